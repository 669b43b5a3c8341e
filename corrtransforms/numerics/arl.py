"""Average run length (ARL) of the shift detectors of :mod:`corrtransforms.numerics.detectors`.

- :func:`simulate_run_lengths`: run lengths of many charts at once, by simulation with the
  production code paths;
- :func:`cusum_arl_integral_equation` (Page's integral equation, Gauss-Legendre Nystrom method),
  :func:`cusum_arl_markov_chain` (Brook & Evans 1972), :func:`cusum_arl_siegmund` (closed-form
  approximation);
- :func:`ewma_arl_integral_equation` (Crowder 1987) and :func:`ewma_arl_markov_chain`
  (Lucas & Saccucci 1990; optionally with exact limits).

Only numpy and scipy are used.

References
----------
Page, E. S. (1954). Continuous inspection schemes. Biometrika 41, 100-115.
Brook, D. & Evans, D. A. (1972). An approach to the probability distribution of CUSUM run length.
Biometrika 59, 539-549.
Goel, A. L. & Wu, S. M. (1971). Determination of A.R.L. and a contour nomogram for CUSUM charts
to control normal mean. Technometrics 13, 221-230.
Lucas, J. M. & Crosier, R. B. (1982). Fast initial response for CUSUM quality-control schemes.
Technometrics 24, 199-205.
Crowder, S. V. (1987). A simple method for studying run-length distributions of exponentially
weighted moving average charts. Technometrics 29, 401-407.
Lucas, J. M. & Saccucci, M. S. (1990). Exponentially weighted moving average control schemes:
properties and enhancements. Technometrics 32, 1-12.
Siegmund, D. (1985). Sequential Analysis. Springer.
Montgomery, D. C. (2009). Introduction to Statistical Quality Control, 6th ed., Wiley, ch. 9.
"""

from __future__ import annotations

import functools
from typing import Optional

import numpy as np
from scipy import optimize as _optimize
from scipy import special as _special

from corrtransforms.numerics.detectors import CHARTS, cusum_path, ewma_limits, ewma_path

# --------------------------------------------------------------------------------------------
# Average run length by simulation


def simulate_run_lengths(
    chart: str,
    *,
    shift: float = 0.0,
    n_chains: int = 10000,
    rng: Optional[np.random.Generator] = None,
    k: float = 0.5,
    h: float = 5.0,
    smoothing: float = 0.2,
    width: float = 3.0,
    exact_limits: bool = True,
    block: int = 256,
    max_steps: int = 10**6,
) -> np.ndarray:
    """Run lengths of two-sided charts on N(shift, 1) data, many chains at once.

    Parameters
    ----------
    chart : {"cusum", "ewma"}
        Which chart.
    shift : float
        Mean of the data in standard deviations (0: in control).
    n_chains : int
        Independent charts simulated side by side.
    rng : numpy.random.Generator
        Source of the N(0, 1) values (``np.random.default_rng()`` if None).
    k, h : float
        CUSUM reference value and decision interval.
    smoothing, width : float
        EWMA lambda and L.
    exact_limits : bool
        EWMA with the exact time-varying limits (True) or their asymptote (False, as in
        Lucas & Saccucci's tables).
    block : int
        Time steps drawn per chain and iteration (the time loop runs ``ARL / block`` times).
    max_steps : int
        A chain still in control after this many steps raises RuntimeError.

    Returns
    -------
    ndarray of int64
        One run length (index of the first signal, counting from 1) per chain. Their mean
        estimates the ARL with standard error ``std / sqrt(n_chains)``.

    Notes
    -----
    Both detectors use the same code as the production path (:func:`cusum_path`,
    :func:`ewma_path`), vectorised over chains and over a block of time steps.
    """
    if chart not in CHARTS:
        raise ValueError(f"chart = {chart!r}: must be one of {CHARTS}")
    rng = np.random.default_rng() if rng is None else rng
    run_length = np.zeros(n_chains, dtype=np.int64)
    active = np.arange(n_chains)
    first_state = np.zeros(n_chains)
    second_state = np.zeros(n_chains)
    elapsed = 0
    while active.size:
        if elapsed >= max_steps:
            raise RuntimeError(f"{active.size} chains still in control after {max_steps} steps")
        z = rng.standard_normal((active.size, block)) + shift
        if chart == "cusum":
            upper, lower = cusum_path(z, k, first_state, second_state)
            alarm = (upper > h) | (lower > h)
            next_first, next_second = upper[:, -1], lower[:, -1]
        else:
            w = ewma_path(z, smoothing, first_state)
            limit = ewma_limits(elapsed + 1 + np.arange(block), smoothing, width, exact_limits)
            alarm = np.abs(w) > limit
            next_first, next_second = w[:, -1], second_state
        hit = alarm.any(axis=1)
        run_length[active[hit]] = elapsed + 1 + np.argmax(alarm[hit], axis=1)
        keep = ~hit
        active = active[keep]
        first_state = next_first[keep]
        second_state = next_second[keep]
        elapsed += block
    return run_length


# --------------------------------------------------------------------------------------------
# Average run length by numerical methods


def _normal_cdf(x):
    return _special.ndtr(x)


def _normal_pdf(x):
    return np.exp(-0.5 * np.square(x)) / np.sqrt(2.0 * np.pi)


def _gauss_legendre(low: float, high: float, nodes: int):
    x, w = np.polynomial.legendre.leggauss(nodes)
    half = 0.5 * (high - low)
    return low + half * (x + 1.0), half * w


def _one_sided_cusum_arl_integral(k: float, h: float, mean: float, nodes: int) -> float:
    y, w = _gauss_legendre(0.0, h, nodes)
    u = np.concatenate(([0.0], y))  # starting points: 0 then the nodes
    # L(u) = 1 + L(0) F(k - u) + int_0^h L(y) f(y + k - u) dy, observations N(mean, 1)
    system = np.zeros((nodes + 1, nodes + 1))
    system[:, 0] = _normal_cdf(k - u - mean)
    system[:, 1:] = w[None, :] * _normal_pdf(y[None, :] + k - u[:, None] - mean)
    arl = np.linalg.solve(np.eye(nodes + 1) - system, np.ones(nodes + 1))
    return float(arl[0])


def cusum_arl_integral_equation(
    k: float, h: float, shift: float = 0.0, nodes: int = 48, two_sided: bool = True
) -> float:
    """Zero-start ARL of the tabular CUSUM from Page's integral equation.

    Parameters
    ----------
    k, h : float
        Reference value and decision interval in standard deviations.
    shift : float
        Mean of the N(shift, 1) data.
    nodes : int
        Gauss-Legendre nodes on [0, h].
    two_sided : bool
        Combine the upper and lower schemes (True) or return the upper one-sided ARL.

    Returns
    -------
    float
        Average run length.

    Notes
    -----
    One-sided ARL ``L(u)`` from head start ``u`` (Page 1954, Goel & Wu 1971)::

        L(u) = 1 + L(0) F(k - u) + int_0^h L(y) f(y + k - u) dy

    with F, f the distribution and density of the observations, solved by the Nystrom method
    with Gauss-Legendre quadrature (a linear system of ``nodes + 1`` unknowns). The two-sided
    ARL follows from ``1/L = 1/L+ + 1/L-`` (Lucas & Crosier 1982), exact when the two sides
    cannot be positive together (h <= 2k) and a close approximation otherwise (checked against
    simulation in the tests).

    References
    ----------
    Page (1954); Goel & Wu (1971); Lucas & Crosier (1982) eq. (2) (from memory).
    """
    upper = _one_sided_cusum_arl_integral(k, h, shift, nodes)
    if not two_sided:
        return upper
    lower = _one_sided_cusum_arl_integral(k, h, -shift, nodes)
    return 1.0 / (1.0 / upper + 1.0 / lower)


def _one_sided_cusum_arl_markov(k: float, h: float, mean: float, states: int) -> float:
    width = 2.0 * h / (2 * states - 1)
    i = np.arange(states)[:, None]
    j = np.arange(states)[None, :]
    upper_edge = (j - i + 0.5) * width + k - mean
    lower_edge = (j - i - 0.5) * width + k - mean
    transition = _normal_cdf(upper_edge) - _normal_cdf(lower_edge)
    transition[:, 0] = _normal_cdf(k - i[:, 0] * width + 0.5 * width - mean)
    arl = np.linalg.solve(np.eye(states) - transition, np.ones(states))
    return float(arl[0])


def cusum_arl_markov_chain(k: float, h: float, shift: float = 0.0, states: int = 200, two_sided: bool = True) -> float:
    """Zero-start ARL of the tabular CUSUM by the Markov-chain method of Brook & Evans (1972).

    Parameters
    ----------
    k, h, shift : float
        As in :func:`cusum_arl_integral_equation`.
    states : int
        Transient states: state 0 is ``[0, w/2)``, state i is ``[(i - 1/2) w, (i + 1/2) w)``,
        ``w = 2h / (2 states - 1)``.
    two_sided : bool
        Combine both sides with ``1/L = 1/L+ + 1/L-``.

    Returns
    -------
    float
        ``[(I - R)^{-1} 1]_0`` with R the transient transition matrix.

    References
    ----------
    Brook & Evans (1972); Lucas & Crosier (1982).
    """
    upper = _one_sided_cusum_arl_markov(k, h, shift, states)
    if not two_sided:
        return upper
    lower = _one_sided_cusum_arl_markov(k, h, -shift, states)
    return 1.0 / (1.0 / upper + 1.0 / lower)


def cusum_arl_siegmund(k: float, h: float, shift: float = 0.0, two_sided: bool = True) -> float:
    """Siegmund's closed-form approximation of the CUSUM ARL.

    Notes
    -----
    ``ARL+ = (exp(-2 D b) + 2 D b - 1) / (2 D^2)`` with ``D = shift - k``, ``b = h + 1.166``
    (``b^2`` when ``D = 0``); two-sided by ``1/L = 1/L+ + 1/L-``.

    References
    ----------
    Siegmund (1985); Montgomery (2009) Section 9.1.4 (from memory).
    """

    def one(delta):
        b = h + 1.166
        if abs(delta) < 1e-12:
            return b * b
        return (np.exp(-2.0 * delta * b) + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)

    upper = one(shift - k)
    if not two_sided:
        return float(upper)
    return float(1.0 / (1.0 / upper + 1.0 / one(-shift - k)))


def ewma_arl_integral_equation(smoothing: float, width: float, shift: float = 0.0, nodes: int = 128) -> float:
    """Zero-start ARL of the two-sided EWMA chart with asymptotic limits (Crowder 1987).

    Parameters
    ----------
    smoothing, width : float
        lambda and L.
    shift : float
        Mean of the N(shift, 1) data.
    nodes : int
        Gauss-Legendre nodes on [-c, c].

    Returns
    -------
    float
        ``L(0)``.

    Notes
    -----
    With ``c = L sqrt(lambda / (2 - lambda))`` and ``w_0 = u``::

        L(u) = 1 + (1/lambda) int_{-c}^{c} L(y) f((y - (1 - lambda) u) / lambda) dy

    solved by the Nystrom method with Gauss-Legendre quadrature.

    References
    ----------
    Crowder (1987) eq. (2.2) (from memory); Lucas & Saccucci (1990).
    """
    c = float(ewma_limits(1, smoothing, width, exact=False))
    y, w = _gauss_legendre(-c, c, nodes)
    u = np.concatenate(([0.0], y))
    kernel = _normal_pdf((y[None, :] - (1.0 - smoothing) * u[:, None]) / smoothing - shift) / smoothing
    system = np.zeros((nodes + 1, nodes + 1))
    system[:, 1:] = w[None, :] * kernel
    arl = np.linalg.solve(np.eye(nodes + 1) - system, np.ones(nodes + 1))
    return float(arl[0])


def ewma_arl_markov_chain(
    smoothing: float,
    width: float,
    shift: float = 0.0,
    states: int = 301,
    exact_limits: bool = False,
    tolerance: float = 1e-13,
) -> float:
    """Zero-start ARL of the two-sided EWMA chart by a Markov chain (Brook & Evans method).

    Parameters
    ----------
    smoothing, width, shift : float
        lambda, L and the mean of the N(shift, 1) data.
    states : int
        Cells of the in-control interval (made odd so that 0 is a cell centre).
    exact_limits : bool
        False: the asymptotic limit (as in Lucas & Saccucci's tables); True: the exact
        time-varying limit, the chain being time-inhomogeneous until ``(1 - lambda)^(2t)``
        falls below ``tolerance``.

    Returns
    -------
    float
        ``sum_{t < T} P(RL > t) + p_T (I - Q)^{-1} 1``.

    Notes
    -----
    Cell centres ``s_i`` of width ``d = 2c / states``; from ``s_i`` the next EWMA
    ``(1 - lambda) s_i + lambda X`` falls in cell j with probability
    ``F((s_j + d/2 - (1 - lambda) s_i) / lambda) - F((s_j - d/2 - (1 - lambda) s_i) / lambda)``.
    With exact limits, cells outside the limit at step t are absorbing at that step.

    References
    ----------
    Lucas & Saccucci (1990) Appendix (from memory); Brook & Evans (1972).
    """
    states = states + 1 - states % 2
    c = float(ewma_limits(1, smoothing, width, exact=False))
    d = 2.0 * c / states
    centre = -c + (np.arange(states) + 0.5) * d
    origin = (1.0 - smoothing) * centre[:, None]
    transition = _normal_cdf((centre[None, :] + 0.5 * d - origin) / smoothing - shift) - _normal_cdf(
        (centre[None, :] - 0.5 * d - origin) / smoothing - shift
    )
    fundamental = np.linalg.solve(np.eye(states) - transition, np.ones(states))
    probability = np.zeros(states)
    probability[states // 2] = 1.0
    if not exact_limits:
        return float(fundamental @ probability)
    total = 0.0
    step = 0
    while (1.0 - smoothing) ** (2.0 * step) > tolerance:
        total += probability.sum()
        step += 1
        probability = probability @ transition
        probability[np.abs(centre) > ewma_limits(step, smoothing, width, exact=True)] = 0.0
    return float(total + probability @ fundamental)


# --------------------------------------------------------------------------------------------
# Limits for a baseline of estimated parameters

#: asymptotic variance of the normalised MAD over sigma^2, times n, for normal data:
#: 1 / (4 phi(z_3/4)^2 z_3/4^2) = 1.3605 (Hampel 1974; Rousseeuw & Croux 1993, from memory)
MAD_VARIANCE_FACTOR = 1.3605
#: asymptotic variance of the sample median over sigma^2, times n: pi / 2
MEDIAN_VARIANCE_FACTOR = float(np.pi / 2.0)


def baseline_error_spread(n: int):
    """Spread of the standing errors a baseline of ``n`` windows leaves in the prediction errors.

    Parameters
    ----------
    n : int
        Baseline windows.

    Returns
    -------
    offset_sd : float
        Standard deviation of the standing offset of the standardised prediction errors,
        ``sqrt(pi / (2 n))``: the median of ``n`` AR(1) values has the variance
        ``(pi / 2) (1 + phi) / ((1 - phi) n)`` and a standing offset ``d`` of the residuals is
        ``d sqrt((1 - phi) / (1 + phi))`` in the prediction errors, so phi drops out.
    log_scale_sd : float
        Standard deviation of the log of the true over the estimated scale of the prediction
        errors, ``sqrt(1.3605 / n)``: that scale is the normalised MAD of the baseline's own
        prediction errors, independent in control (the asymptotic variance of the MAD).

    Notes
    -----
    Large-sample approximations (from memory); their effect on the false-alarm rate is checked
    by simulation in tests/numerics/test_detectors.py and benchmarks/calibration.py.
    """
    offset_sd = float(np.sqrt(MEDIAN_VARIANCE_FACTOR / n))
    return offset_sd, float(np.sqrt(MAD_VARIANCE_FACTOR / n))


def _baseline_error_nodes(offset_sd: float, log_scale_sd: float, nodes: int = 9):
    """Gauss-Hermite nodes (offset, scale ratio) and weights of the baseline's errors."""
    x, w = np.polynomial.hermite_e.hermegauss(nodes)
    w = w / w.sum()
    offset = np.repeat(offset_sd * x, nodes)
    ratio = np.tile(np.exp(log_scale_sd * x), nodes)
    return offset, ratio, np.outer(w, w).reshape(-1)


def false_alarm_rate_estimated(
    chart: str, limit: float, offset_sd: float, log_scale_sd: float, k: float = 0.5, smoothing: float = 0.1
) -> float:
    """In-control false-alarm rate (1 / ARL) averaged over the baseline's estimation errors.

    Parameters
    ----------
    chart : {"cusum", "ewma"}
    limit : float
        CUSUM h or EWMA L.
    offset_sd, log_scale_sd : float
        From :func:`baseline_error_spread`.
    k, smoothing : float
        CUSUM reference value, EWMA lambda.

    Returns
    -------
    float
        ``E[1 / ARL(limit; d, c)]`` over a standing offset ``d ~ N(0, offset_sd^2)`` and a
        scale ratio ``log c ~ N(0, log_scale_sd^2)``: the charted values are N(d, c^2), i.e. a
        chart with ``k / c``, ``h / c`` (``L / c``) and shift ``d / c`` on N(0, 1) values.

    Notes
    -----
    The approach of Jones, Champ & Rigdon (2004): the run length given the baseline, averaged
    over the baseline's sampling distribution. The *rate* is averaged rather than the ARL
    itself because the false episodes per window of many series are the mean rate; the mean
    ARL is dominated by the few lucky baselines with very long runs (from memory).
    """
    offset, ratio, weight = _baseline_error_nodes(offset_sd, log_scale_sd)
    rates = []
    for d, c in zip(offset, ratio):
        try:
            if chart == "cusum":
                arl = cusum_arl_integral_equation(k / c, limit / c, shift=d / c, nodes=40)
            else:
                arl = ewma_arl_integral_equation(smoothing, limit / c, shift=d / c, nodes=64)
        except np.linalg.LinAlgError:  # a tiny scale ratio: the run length is astronomically long
            arl = np.inf
        # beyond ~1e15 the linear system is ill-conditioned: such a node adds nothing to the rate
        rates.append(1.0 / arl if np.isfinite(arl) and 0 < arl < 1e15 else 0.0)
    return float(np.dot(weight, rates))


def limit_for_estimated_parameters(chart: str, limit: float, n: int, k: float = 0.5, smoothing: float = 0.1) -> float:
    """CUSUM h or EWMA L whose rate averaged over the baseline's errors is the design rate.

    Parameters
    ----------
    chart : {"cusum", "ewma"}
    limit : float
        Configured h or L: the design rate is its known-parameter ``1 / ARL0`` (zero start).
    n : int
        Baseline windows (:func:`baseline_error_spread`).
    k, smoothing : float

    Returns
    -------
    float
        The widened limit (``>= limit``; at most ``3 limit``), to 4 decimals (cached per
        argument set: a function of the configuration and ``n`` only).

    References
    ----------
    Jones, L. A., Champ, C. W. & Rigdon, S. E. (2004). The run length distribution of the CUSUM
    with estimated parameters. Journal of Quality Technology 36, 95-108.
    """
    return _limit_for_estimated_parameters(chart, float(limit), int(n), float(k), float(smoothing))


@functools.lru_cache(maxsize=256)
def _limit_for_estimated_parameters(chart, limit, n, k, smoothing) -> float:
    if chart not in CHARTS:
        raise ValueError(f"chart = {chart!r}: must be one of {CHARTS}")
    if chart == "cusum":
        design = 1.0 / cusum_arl_integral_equation(k, limit, nodes=40)
    else:
        design = 1.0 / ewma_arl_integral_equation(smoothing, limit, nodes=64)
    offset_sd, log_scale_sd = baseline_error_spread(n)

    def excess(candidate):
        rate = false_alarm_rate_estimated(chart, candidate, offset_sd, log_scale_sd, k, smoothing)
        return np.log(max(rate, 1e-300)) - np.log(design)

    if excess(limit) <= 0:
        return limit
    if excess(3.0 * limit) > 0:
        return 3.0 * limit
    return round(float(_optimize.brentq(excess, limit, 3.0 * limit, xtol=1e-4)), 4)


# --------------------------------------------------------------------------------------------
# Limits from a false-alarm budget

SECONDS_PER_YEAR = 365.25 * 86400.0


def limit_for_run_length(chart: str, arl0: float, k: float = 0.5, smoothing: float = 0.1) -> float:
    """CUSUM h or EWMA L whose zero-start in-control ARL (known parameters, N(0, 1) data) is ``arl0``.

    Parameters
    ----------
    chart : {"cusum", "ewma"}
    arl0 : float
        Wanted in-control average run length in windows (> 1).
    k, smoothing : float
        CUSUM reference value; EWMA lambda.

    Returns
    -------
    float
        ``h`` (two-sided tabular CUSUM, :func:`cusum_arl_integral_equation`) or ``L`` (two-sided
        EWMA with asymptotic limits, :func:`ewma_arl_integral_equation`), to 4 decimals.

    Notes
    -----
    The ARL increases monotonically with the limit, so the root of ``log ARL(limit) - log arl0``
    is bracketed from ``[0.05, 1]`` upwards (the upper end grown by a quarter until the ARL exceeds
    ``arl0``) and found by Brent's method.
    """
    return _limit_for_run_length(chart, float(arl0), float(k), float(smoothing))


@functools.lru_cache(maxsize=256)
def _limit_for_run_length(chart, arl0, k, smoothing) -> float:
    if chart not in CHARTS:
        raise ValueError(f"chart = {chart!r}: must be one of {CHARTS}")
    if not arl0 > 1.0:
        raise ValueError(f"arl0 = {arl0!r}: must exceed 1 window")

    def excess(limit):
        if chart == "cusum":
            arl = cusum_arl_integral_equation(k, limit, nodes=40)
        else:
            arl = ewma_arl_integral_equation(smoothing, limit, nodes=64)
        if not (np.isfinite(arl) and arl > 0):  # beyond the solver's range: far above arl0
            return 50.0
        return float(np.log(arl) - np.log(arl0))

    low, high = 0.05, 1.0
    while excess(high) < 0:
        low, high = high, 1.25 * high
        if high > 100.0:
            raise ValueError(f"arl0 = {arl0!r}: no {chart} limit up to 100 reaches it")
    return round(float(_optimize.brentq(excess, low, high, xtol=1e-5)), 4)


def run_length_for_budget(false_alarms_per_year: float, series: int, windows_per_year: float, charts: int) -> float:
    """In-control ARL each chart of each series needs so that an asset of ``series`` monitored
    series, each charted by ``charts`` detectors, raises ``false_alarms_per_year`` on average.

    The budget is split evenly: each of the ``series * charts`` charts may raise
    ``false_alarms_per_year / (series * charts)`` alarms a year, one every
    ``windows_per_year * series * charts / false_alarms_per_year`` windows. Alarms of
    independent charts add (the union's rate is at most the sum, so the split is conservative
    where charts of one series alarm together).
    """
    if not false_alarms_per_year > 0 or series < 1 or charts < 1 or not windows_per_year > 0:
        raise ValueError("false_alarms_per_year, windows_per_year must be > 0 and series, charts >= 1")
    return float(windows_per_year) * int(series) * int(charts) / float(false_alarms_per_year)
