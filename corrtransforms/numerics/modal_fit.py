"""Modal frequency and damping ratio from a band-limited auto-correlation function.

A lightly damped structure driven by broadband stationary forces has correlation functions that
decay like its free vibration (the Natural Excitation Technique, James, Carne & Lauffer). Within
a band around one mode the correlation is one exponentially decaying cosine, so

    rho(tau) ~ A exp(-zeta w_n tau) cos(w_d tau + phi),   w_d = w_n sqrt(1 - zeta^2)

and :func:`fit_mode` estimates ``f_n = w_n / 2 pi`` and ``zeta`` by weighted least squares.

Against the logarithmic decrement: the decrement ``delta = ln(x_k / x_{k+m}) / m`` uses two (or
a few) peak values: sampled peaks miss the true peak (a bias of ``1 - cos(pi f/fs)``), the
non-zero phase ``phi`` shifts peaks off the envelope, each peak carries the full error of one
lag, and no standard error follows. The fit uses every lag in the range weighted by its error,
estimates frequency and damping jointly with a covariance, and for an ideal decaying cosine
returns ``f_n`` and ``zeta`` exactly.
"""

from __future__ import annotations

from typing import NamedTuple, Tuple

import numpy as np
import scipy.optimize
import scipy.signal

from corrtransforms.numerics.bartlett import bartlett_kernel, bartlett_variance, coarsen_lags, kernel_quadratic_form
from corrtransforms.numerics.envelope import analytic_correlation, correlation_envelope

#: quality codes of this module (code -> meaning)
QUALITY_CODES = {
    "band_outside_nyquist": "the mode's band reaches or passes the Nyquist frequency of the lag grid",
    "nonfinite_correlation": "the band-limited correlation holds NaN or inf in the fitting range",
    "too_few_cycles": "the fitting range holds fewer than min_cycles periods of the mode",
    "fit_not_converged": "the least-squares fit did not converge or returned non-finite values",
    "frequency_outside_band": "the fitted natural frequency lies outside the mode's band",
    "damping_out_of_range": "the fitted damping ratio sits at its bound (0 or 0.95)",
    "no_stderr": "no usable per-lag standard errors: unweighted fit, stderr NaN",
}

#: the fitting range ends where the envelope falls below this fraction of its value at the first
#: lag (0.1 = 2.3 decay times: about 84 % of the Fisher information on zeta of an exponential
#: decay in white error, and the estimate's tail beyond is mostly error)
END_FRACTION = 0.1
#: ... or where it falls below this many standard errors of the coefficient (the noise floor)
NOISE_FLOOR_Z = 2.0
#: ... or after this many periods (bounds the cost for very lightly damped modes)
MAX_CYCLES = 40.0
#: fewer periods than this in the fitting range: damping is not identifiable from the decay
MIN_CYCLES = 1.5
DAMPING_BOUNDS = (1e-6, 0.95)
#: the fit starts this many inverse band widths after lag 0: band-limiting with a rectangular
#: spectral window removes the resonance's spectral tails, whose correlation lives at lags below
#: about 1 / (high - low), and distorts the decay there
START_BANDWIDTHS = 1.0


class ModalFit(NamedTuple):
    """Result of :func:`fit_mode` (frequencies in Hz, lags in s, damping as ratio of critical)."""

    freq_hz: float
    freq_stderr_hz: float
    damping: float
    damping_stderr: float
    amplitude: float
    phase_rad: float
    fit_start_s: float
    fit_end_s: float
    cycles: float
    quality: Tuple[str, ...]


def decaying_cosine(lags_s, amplitude, freq_hz, damping, phase_rad):
    """``A exp(-zeta w_n tau) cos(w_d tau + phi)`` with ``w_n = 2 pi f_n``, ``w_d = w_n sqrt(1-zeta^2)``."""
    wn = 2 * np.pi * freq_hz
    wd = wn * np.sqrt(1 - damping**2)
    tau = np.asarray(lags_s, dtype=float)
    return amplitude * np.exp(-damping * wn * tau) * np.cos(wd * tau + phase_rad)


def _jacobian(tau, amplitude, freq_hz, damping, phase_rad):
    wn = 2 * np.pi * freq_hz
    root = np.sqrt(1 - damping**2)
    wd = wn * root
    E = np.exp(-damping * wn * tau)
    C = np.cos(wd * tau + phase_rad)
    S = np.sin(wd * tau + phase_rad)
    d_amplitude = E * C
    d_freq = -2 * np.pi * tau * amplitude * E * (damping * C + root * S)
    d_damping = -amplitude * E * wn * tau * (C - damping / root * S)
    d_phase = -amplitude * E * S
    return np.column_stack([d_amplitude, d_freq, d_damping, d_phase])


def _nan_fit(quality, start_s=float("nan"), end_s=float("nan"), cycles=float("nan")) -> ModalFit:
    nan = float("nan")
    return ModalFit(nan, nan, nan, nan, nan, nan, start_s, end_s, cycles, tuple(quality))


def _zero_crossings(rho: np.ndarray) -> np.ndarray:
    sign = np.signbit(rho)
    k = np.nonzero(sign[1:] != sign[:-1])[0]
    return k + rho[k] / (rho[k] - rho[k + 1])


def fit_mode(
    coefficient,
    stderr,
    lag_step_s: float,
    band_hz: Tuple[float, float],
    end_fraction: float = END_FRACTION,
    max_cycles: float = MAX_CYCLES,
    min_cycles: float = MIN_CYCLES,
    start_bandwidths: float = START_BANDWIDTHS,
) -> ModalFit:
    """Natural frequency and damping ratio of one mode from its band-limited auto-correlation.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Band-limited auto-correlation coefficient at lags ``0..L`` (``k * lag_step_s``).
    stderr : array_like, shape (L + 1,)
        Standard error of each coefficient (record-length error).
    lag_step_s : float
        Lag spacing, the sample period.
    band_hz : (float, float)
        The mode's band; the fitted frequency must lie in it.
    end_fraction, max_cycles, min_cycles, start_bandwidths : float
        Fitting range controls, defaults :data:`END_FRACTION`, :data:`MAX_CYCLES`,
        :data:`MIN_CYCLES`, :data:`START_BANDWIDTHS` (:func:`_fitting_range`).

    Returns
    -------
    ModalFit
        NaN values with quality codes (see :data:`QUALITY_CODES`) when the mode cannot be fitted.

    Notes
    -----
    **Model.** NExT [1]_: the correlation of a response to stationary white excitation is a sum of
    free decays; band-limited to one mode it is ``A exp(-zeta w_n tau) cos(w_d tau + phi)``. For
    the single-degree-of-freedom oscillator ``A = 1/sqrt(1 - zeta^2)``, ``phi = -arcsin(zeta)``
    exactly [2]_. The steps: lag weights (:func:`_fit_weights`), the fitting range
    (:func:`_fitting_range`), start values and the weighted least-squares fits
    (:func:`_fit_parameters`), the standard errors (:func:`_sandwich_stderr`).

    References
    ----------
    .. [1] G. H. James, T. G. Carne and J. P. Lauffer, "The Natural Excitation Technique (NExT)
       for modal parameter extraction from operating structures", Int. J. Analytical and
       Experimental Modal Analysis 10(4), 260-277, 1995.
    .. [2] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 6.1 (the
       correlation of a white-noise driven oscillator).
    """
    rho = np.asarray(coefficient, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if rho.shape != s.shape or rho.ndim != 1:
        raise ValueError(f"coefficient {rho.shape} and stderr {s.shape} must be 1-d of equal length")
    low, high = float(band_hz[0]), float(band_hz[1])
    if high >= 0.5 / lag_step_s or low <= 0 or low >= high:
        return _nan_fit(["band_outside_nyquist"])
    if len(rho) < 8 or not np.isfinite(rho[1]):
        return _nan_fit(["nonfinite_correlation" if len(rho) >= 8 else "too_few_cycles"])
    finite = np.isfinite(rho)
    first_bad = int(np.argmin(finite)) if not finite.all() else len(rho)
    envelope, s_fit, usable_s, weighted, quality = _fit_weights(rho, s, first_bad)
    found = _fitting_range(
        rho,
        envelope,
        s_fit,
        weighted,
        first_bad,
        lag_step_s,
        low,
        high,
        end_fraction,
        max_cycles,
        start_bandwidths,
        quality,
    )
    if isinstance(found, ModalFit):
        return found
    start, end, damped0 = found
    cycles = (end - start) * lag_step_s * damped0
    start_s, end_s = start * lag_step_s, end * lag_step_s
    if cycles < min_cycles or end - start < 6:
        return _nan_fit(quality + ["too_few_cycles"], start_s, end_s, cycles)
    lags = np.arange(start, end + 1)
    tau = lags * lag_step_s
    p, ok, sig, scale = _fit_parameters(
        rho, s, s_fit, usable_s, envelope, weighted, lags, first_bad, lag_step_s, low, high, damped0
    )
    if not ok:
        return _nan_fit(quality + ["fit_not_converged"], start_s, end_s, cycles)
    amplitude, freq, zeta, phase = (float(v) for v in p)
    if not low <= freq <= high:
        return _nan_fit(quality + ["frequency_outside_band"], start_s, end_s, cycles)
    if zeta <= DAMPING_BOUNDS[0] * 1.01 or zeta >= DAMPING_BOUNDS[1] * 0.999:
        return _nan_fit(quality + ["damping_out_of_range"], start_s, end_s, cycles)
    freq_sd, damping_sd = _sandwich_stderr(p, tau, sig, lags, first_bad, lag_step_s, scale)
    phase = float(np.angle(np.exp(1j * phase)))
    return ModalFit(
        freq,
        freq_sd,
        zeta,
        damping_sd,
        amplitude,
        phase,
        start_s,
        end_s,
        float((end - start) * lag_step_s * freq * np.sqrt(1 - zeta**2)),
        tuple(quality),
    )


def _fit_weights(rho: np.ndarray, s: np.ndarray, first_bad: int):
    """Hilbert envelope up to the first NaN lag and the lag weights of the first fit.

    Returns ``(envelope, s_fit, usable_s, weighted, quality)``: ``s_fit`` is the stderr floored
    at 1e-3 of its largest value (ones without any usable stderr, quality ``no_stderr``).
    """
    quality = []
    envelope = np.full(len(rho), np.nan)
    envelope[:first_bad] = correlation_envelope(rho[:first_bad], auto=True)
    usable_s = np.isfinite(s) & (s > 0)
    weighted = bool(usable_s[1:first_bad].any())
    if not weighted:
        quality.append("no_stderr")
    s_fit = np.where(usable_s, s, np.nan)
    if weighted:
        floor = 1e-3 * np.nanmax(s_fit[1:first_bad])
        s_fit = np.where(usable_s, np.maximum(s_fit, floor), floor)
    else:
        s_fit = np.ones_like(rho)
    return envelope, s_fit, usable_s, weighted, quality


def _fitting_range(
    rho,
    envelope,
    s_fit,
    weighted: bool,
    first_bad: int,
    lag_step_s: float,
    low: float,
    high: float,
    end_fraction: float,
    max_cycles: float,
    start_bandwidths: float,
    quality: list,
):
    """First and last lag of the fit and the damped frequency's start value (or a NaN ModalFit).

    Notes
    -----
    From ``start_bandwidths / (high - low)`` seconds (at least the first lag; lag 0 is the
    normalisation ``rho = 1`` with zero error): band-limiting with a rectangular spectral window
    removes the resonance's spectral tails, whose correlation lives at lags below about the
    inverse band width; fitting from lag 1 biases ``zeta`` low by 10-20 % on simulated records
    with a band of +/- 25 % around the mode. The range ends at the first lag where the Hilbert
    envelope falls below ``end_fraction`` of its value at the first lag or below
    ``NOISE_FLOOR_Z`` standard errors, at most ``max_cycles`` periods. Most of the information
    on ``zeta`` sits at ``tau ~ 1/(zeta w_n)`` (the derivative of the model with respect to
    ``zeta`` is ``-w_n tau`` times the model); the tail beyond a 10 % envelope is mostly
    estimation error and leakage from outside the band. The damped frequency comes from the
    mean spacing of the zero crossings in the range (the band's geometric centre when that
    falls outside the band). Appends ``nonfinite_correlation`` to ``quality`` when NaN lags cut
    the range short.
    """
    start = max(1, int(np.ceil(start_bandwidths / ((high - low) * lag_step_s))))
    if start + 6 >= first_bad:
        return _nan_fit(
            quality + ["too_few_cycles"],
            start * lag_step_s,
            (first_bad - 1) * lag_step_s,
            (first_bad - 1 - start) * lag_step_s * np.sqrt(low * high),
        )
    e0 = envelope[start]
    below = envelope[start:first_bad] < end_fraction * e0
    if weighted:
        below |= envelope[start:first_bad] < NOISE_FLOOR_Z * s_fit[start:first_bad]
    hits = np.nonzero(below)[0]
    end = start + int(hits[0]) if len(hits) else first_bad - 1
    crossings = _zero_crossings(rho[start : end + 1])
    if len(crossings) >= 2:
        damped0 = 1.0 / (2 * np.mean(np.diff(crossings)) * lag_step_s)
    else:
        damped0 = np.sqrt(low * high)
    if not low <= damped0 <= high:
        damped0 = np.sqrt(low * high)
    end = min(end, start + int(np.ceil(max_cycles / (damped0 * lag_step_s))))
    if first_bad < len(rho) and end >= first_bad - 1:
        quality.append("nonfinite_correlation")  # the range was cut short by NaN lags
    return start, end, damped0


def _fit_parameters(
    rho,
    s,
    s_fit,
    usable_s,
    envelope,
    weighted: bool,
    lags,
    first_bad: int,
    lag_step_s: float,
    low: float,
    high: float,
    damped0: float,
):
    """Start values and the weighted least-squares fit(s); returns ``(p, ok, sig, scale)``.

    Notes
    -----
    Weighted least squares, residuals ``(rho_k - model_k) / s_k``, solved with
    ``scipy.optimize.least_squares`` (trust-region reflective, bounded ``0 < zeta < 0.95``) with
    the analytic Jacobian. Start values: the damped frequency ``damped0``, ``zeta`` from the
    slope of the log-envelope (a straight-line fit), the amplitude and phase from the analytic
    signal. With a stderr, a second pass takes its weights from Bartlett's variance of the fitted
    model, scaled to the given stderr by ``scale`` (NaN without a second pass): weights computed
    from the noisy estimate itself are correlated with its errors and bias ``zeta`` low by
    10-20 % in band-limited correlations.
    """
    tau = lags * lag_step_s
    y = rho[lags]
    sig = s_fit[lags]
    env = np.maximum(envelope[lags], 1e-12)
    slope, intercept = np.polyfit(tau, np.log(env), 1, w=env / sig)
    zeta0 = float(np.clip(-slope / (2 * np.pi * damped0), 1e-4, 0.5))
    freq0 = damped0 / np.sqrt(1 - zeta0**2)
    amp0 = float(np.exp(intercept))
    analytic_phase = np.angle(y + 1j * np.imag(analytic_correlation(rho[:first_bad])[lags]))
    phi0 = float(np.angle(np.mean(np.exp(1j * (analytic_phase - 2 * np.pi * damped0 * tau)))))

    lower = [0.0, 0.5 * low, DAMPING_BOUNDS[0], -2 * np.pi]
    upper = [np.inf, min(1.5 * high, 0.5 / lag_step_s), DAMPING_BOUNDS[1], 2 * np.pi]
    x0 = np.clip([amp0, freq0, zeta0, phi0], np.add(lower, 1e-9), np.subtract(upper, 1e-9))
    p, ok = fit_decaying_cosine(tau, y, sig, x0, (lower, upper))
    scale = float("nan")
    if ok and weighted:
        model = decaying_cosine(np.arange(first_bad) * lag_step_s, *p)
        model[0] = 1.0
        shape = np.sqrt(bartlett_variance(model))
        good = (shape[lags] > 0) & usable_s[lags]
        if good.sum() >= 4:
            scale = float(np.median(s[lags][good] / shape[lags][good]))
            sig = np.maximum(scale * shape[lags], 1e-3 * scale * shape[lags].max())
            p, ok = fit_decaying_cosine(
                tau, y, sig, np.clip(p, np.add(lower, 1e-9), np.subtract(upper, 1e-9)), (lower, upper)
            )
    return p, ok, sig, scale


def _sandwich_stderr(p, tau, sig, lags, first_bad: int, lag_step_s: float, scale: float):
    """Standard errors of frequency and damping: the sandwich with Bartlett's lag covariance.

    Notes
    -----
    The errors of a correlation estimate at neighbouring lags are strongly correlated, so the
    textbook fit covariance ``(J^T W J)^-1`` (independent residuals) is too small by a factor of
    several. The covariance used is the sandwich

        Cov(theta) = (J^T W J)^-1 J^T W Sigma W J (J^T W J)^-1,   W = diag(1/s^2)

    with ``Sigma`` Bartlett's lag-error covariance
    (:func:`~corrtransforms.numerics.bartlett.lag_error_covariance`) [1]_ (Sec. 5.2 of White's
    robust covariance, from memory). NaN without a second-pass ``scale`` or with a singular
    ``J^T W J``.

    References
    ----------
    .. [1] H. White, "A heteroskedasticity-consistent covariance matrix estimator", Econometrica
       48(4), 817-838, 1980.
    """
    if not np.isfinite(scale):
        return float("nan"), float("nan")
    Jw = _jacobian(tau, *p) / sig[:, None]
    try:
        bread = np.linalg.inv(Jw.T @ Jw)
    except np.linalg.LinAlgError:
        return float("nan"), float("nan")
    model = decaying_cosine(np.arange(first_bad) * lag_step_s, *p)
    model[0] = 1.0
    meat = _correlated_meat(Jw, model, lags, sig, scale)
    cov = bread @ meat @ bread
    return float(np.sqrt(max(cov[1, 1], 0.0))), float(np.sqrt(max(cov[2, 2], 0.0)))


def fit_decaying_cosine(lags_s, values, sigma, start, bounds):
    """Weighted least-squares fit of :func:`decaying_cosine` (analytic Jacobian).

    Parameters
    ----------
    lags_s, values, sigma : array_like
        Lags, correlation values and the standard error that weights each residual.
    start : array_like
        ``(amplitude, freq_hz, damping, phase_rad)`` start values.
    bounds : (lower, upper)
        Bounds of the four parameters.

    Returns
    -------
    params : ndarray, shape (4,)
    converged : bool
        False when ``least_squares`` reports failure or a non-finite result.

    Notes
    -----
    Minimises ``sum_k ((values_k - model_k) / sigma_k)^2`` with ``scipy.optimize.least_squares``
    (trust-region reflective); the minimiser is the one ``scipy.optimize.curve_fit`` finds with
    ``sigma=sigma, absolute_sigma=True``.
    """
    tau = np.asarray(lags_s, dtype=float)
    y = np.asarray(values, dtype=float)
    sig = np.asarray(sigma, dtype=float)

    def residuals(p):
        return (y - decaying_cosine(tau, *p)) / sig

    def jacobian(p):
        return -_jacobian(tau, *p) / sig[:, None]

    try:
        result = scipy.optimize.least_squares(
            residuals,
            start,
            jac=jacobian,
            bounds=bounds,
            method="trf",
            x_scale="jac",
            xtol=1e-12,
            ftol=1e-12,
            gtol=1e-12,
            max_nfev=400,
        )
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - defensive
        return np.full(4, np.nan), False
    return result.x, bool(result.status > 0 and np.all(np.isfinite(result.x)))


def _correlated_meat(Jw: np.ndarray, model: np.ndarray, lags: np.ndarray, sig: np.ndarray, scale: float) -> np.ndarray:
    """``J_w^T (Sigma / sig sig^T) J_w`` with ``Sigma = scale^2 K(model) / 1`` (Bartlett; strided when long)."""
    G, nodes = coarsen_lags(Jw / sig[:, None], lags, len(model))
    spacing = np.diff(nodes)
    if len(nodes) < 3 or np.any(spacing != spacing[0]):
        sigma = scale**2 * bartlett_kernel(model, [int(k) for k in nodes])
        return G.T @ sigma @ G
    return scale**2 * kernel_quadratic_form(model, int(nodes[0]), int(spacing[0]), G)
