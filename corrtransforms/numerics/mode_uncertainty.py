"""Standard errors of identified modes: the delete-one-sub-record jackknife over a window.

The window is cut into ``K`` sub-records (the overlap-save blocks of
:func:`~corrtransforms.numerics.correlation.block_lag_sums`). Leaving sub-record ``i`` out gives
the correlation matrices of the rest of the window,

    Lambda_(i) = (sum_j S_j - S_i) / (sum_j N_j - N_i)      (lag sums S, pair counts N),

from which the mode is identified again at the model order and Hankel size of the window's own
estimate, and matched to it by frequency and shape. The jackknife variance of any parameter
``theta`` (frequency, damping, each component of the normalised shape, the MAC to a reference)
is [1]_ [2]_

    var(theta) = (K - 1) / K  sum_i (theta_(i) - mean(theta_(.)))^2.

Why this and not the first-order perturbation of Reynders, Pintelon & De Roeck (2008): the
perturbation needs the covariance of the Hankel matrix, itself estimated from sub-records, and a
chain of sensitivities through the SVD and the eigenproblem; the jackknife needs only repeated
identification, applies to every derived quantity (the MAC included) without new derivations,
and each replicate uses ``(K - 1) / K`` of the window, so the order and pole chosen by the
window's stabilisation diagram stay identifiable in every replicate. Calibration by Monte Carlo
(``benchmarks/bench_multichannel_modes.py --coverage``: three channels, modes at 2.0 Hz (2 %) and
3.0 Hz (1.5 %) in one band, a third at 4.5 Hz outside, 400 windows of 300 s at 20 Hz, K = 32;
tests/numerics/test_multichannel_modes.py checks a 48-window run): both modes found in 388
windows; coverage of ``+/- 1.96`` stderr 0.951 (frequency) and 0.948 (damping) for the 3.0 Hz
mode, but 0.915 and 0.912 for the 2.0 Hz mode, whose rms error is 1.06 and 1.14 times its rms
stderr: **not yet calibrated to [0.93, 0.97] for every mode** (a suspected cause, not tested:
sub-records of 9.4 s are not long against the correlation time, so neighbouring blocks'
lag sums are positively correlated and the jackknife sees too little scatter).
With ``K = 32`` the jackknife's own ``K - 1`` degrees of freedom
put the coverage of a correct standard error at ``P(|t_31| < 1.96) = 0.94`` (Student's t; the
reason :data:`DEFAULT_SEGMENTS` is not smaller).

Sub-records are blocks of one window, so their lag sums are weakly dependent near the block
boundaries (the extended block reaches ``L`` samples into its neighbours); with blocks much
longer than the Hankel's lags this dependence is small (the block jackknife of [2]_).

References
----------
.. [1] B. Efron and C. Stein, "The jackknife estimate of variance", Annals of Statistics 9(3),
   586-596, 1981 (the delete-one variance above; from memory).
.. [2] H. R. Kuensch, "The jackknife and the bootstrap for general stationary observations",
   Annals of Statistics 17(3), 1217-1241, 1989 (blocks of dependent observations; from memory).
"""

from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple

import numpy as np

from corrtransforms.numerics.mode_shapes import largest_component, modal_assurance_criterion, normalise_shape
from corrtransforms.numerics.multichannel_modes import IdentifiedModes, poles_at_order

#: sub-records of a window (32: t with 31 degrees of freedom, 1.96 -> 94 % coverage)
DEFAULT_SEGMENTS = 32
#: a replicate's pole matches the window's when within this relative frequency distance ...
MATCH_FREQUENCY = 0.05
#: ... and with at least this MAC (common practice, both)
MATCH_MAC = 0.8

#: quality codes of this module
QUALITY_CODES = {
    "jackknife_unmatched": "a leave-one-out replicate had no pole matching the mode: stderr NaN",
    "too_few_segments": "fewer than 3 sub-records: stderr NaN",
    "nonfinite_correlation": "a leave-one-out replicate's correlations hold NaN or inf: stderr NaN",
}


@dataclasses.dataclass(frozen=True)
class ModeUncertainty:
    """Jackknife results for the modes of one :class:`IdentifiedModes`.

    Attributes
    ----------
    freq_stderr_hz, damping_stderr : ndarray, shape (n_modes,)
    shapes : ndarray of complex, shape (n_modes, n_channels)
        The window's shapes normalised at ``reference_index`` (that component ``1 + 0j``).
    shape_stderr_real, shape_stderr_imag : ndarray, shape (n_modes, n_channels)
        Standard errors of the real and imaginary parts of each normalised component (0 at the
        reference component).
    reference_index : ndarray of int, shape (n_modes,)
    replicate_freq_hz, replicate_damping : ndarray, shape (K, n_modes)
    replicate_shapes : ndarray of complex, shape (K, n_modes, n_channels)
        Normalised like ``shapes``; NaN where a replicate found no matching pole.
    quality : tuple of tuple of str
        Per mode, codes from :data:`QUALITY_CODES`.
    """

    freq_stderr_hz: np.ndarray
    damping_stderr: np.ndarray
    shapes: np.ndarray
    shape_stderr_real: np.ndarray
    shape_stderr_imag: np.ndarray
    reference_index: np.ndarray
    replicate_freq_hz: np.ndarray
    replicate_damping: np.ndarray
    replicate_shapes: np.ndarray
    quality: Tuple[Tuple[str, ...], ...]


def jackknife_stderr(replicates, axis: int = 0) -> np.ndarray:
    """Delete-one jackknife standard error ``sqrt((K-1)/K sum (theta_i - mean)^2)`` along ``axis``.

    NaN where any replicate is NaN (real arrays; pass real and imaginary parts separately).
    """
    theta = np.asarray(replicates, dtype=float)
    K = theta.shape[axis]
    if K < 3:
        return np.full(np.delete(theta.shape, axis), np.nan)
    deviation = theta - theta.mean(axis=axis, keepdims=True)
    return np.sqrt((K - 1) / K * np.sum(deviation**2, axis=axis))


def leave_one_out_sequences(lag_sums, pair_counts) -> np.ndarray:
    """``Lambda_(i) = (sum S - S_i) / (sum N - N_i)`` for every sub-record ``i``.

    Parameters
    ----------
    lag_sums, pair_counts : array_like, shape (K, n_lags, n_outputs, n_references)
        Per sub-record (:func:`~corrtransforms.numerics.multichannel_modes.correlation_sequence`
        of :func:`~corrtransforms.numerics.correlation.block_lag_sums`).

    Returns
    -------
    ndarray, shape (K, n_lags, n_outputs, n_references)
    """
    S = np.asarray(lag_sums, dtype=float)
    N = np.asarray(pair_counts, dtype=float)
    rest_counts = N.sum(axis=0) - N
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(rest_counts > 0, (S.sum(axis=0) - S) / np.where(rest_counts > 0, rest_counts, 1.0), np.nan)


def window_sequence(lag_sums, pair_counts) -> np.ndarray:
    """The whole window's ``Lambda = sum S / sum N`` (count-corrected: no lag taper)."""
    N = np.asarray(pair_counts, dtype=float).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(N > 0, np.asarray(lag_sums, dtype=float).sum(axis=0) / np.where(N > 0, N, 1.0), np.nan)


def _matching_pole(freq, damping, shapes, target_freq: float, target_shape):
    """Index of the replicate pole nearest the window's by ``|df| / f + (1 - MAC)``, or -1."""
    if not len(freq):
        return -1
    rel = np.abs(freq - target_freq) / target_freq
    mac = np.atleast_1d(modal_assurance_criterion(target_shape[None, :], shapes)[0])
    ok = (rel <= MATCH_FREQUENCY) & (mac >= MATCH_MAC) & (damping > 0)
    if not ok.any():
        return -1
    cost = np.where(ok, rel + (1 - mac), np.inf)
    return int(np.argmin(cost))


def _replicates(sequences, fs: float, modes: IdentifiedModes):
    """Frequency, damping and raw shape of every mode in every leave-one-out replicate."""
    K, m, n_out = sequences.shape[0], modes.n_modes, modes.shapes.shape[1]
    freq = np.full((K, m), np.nan)
    damping = np.full((K, m), np.nan)
    shapes = np.full((K, m, n_out), np.nan + 0j)
    for i in range(K):
        for order in np.unique(modes.order):
            f, z, phi = poles_at_order(
                sequences[i], fs, int(order), modes.block_rows, modes.method, modes.lag_stride, modes.block_columns
            )
            for j in np.nonzero(modes.order == order)[0]:
                hit = _matching_pole(f, z, phi, modes.freq_hz[j], modes.shapes[j])
                if hit >= 0:
                    freq[i, j], damping[i, j], shapes[i, j] = f[hit], z[hit], phi[hit]
    return freq, damping, shapes


def mode_uncertainty(
    lag_sums,
    pair_counts,
    fs: float,
    modes: IdentifiedModes,
    reference_index: Optional[Sequence[int]] = None,
) -> ModeUncertainty:
    """Jackknife standard errors of the frequency, damping and normalised shape of each mode.

    Parameters
    ----------
    lag_sums, pair_counts : array_like, shape (K, n_lags, n_outputs, n_references)
        Per sub-record, as in :func:`leave_one_out_sequences`; ``modes`` must come from
        :func:`~corrtransforms.numerics.multichannel_modes.identify_modes` of
        :func:`window_sequence` of the same arrays.
    fs : float
        Sample rate, Hz.
    modes : IdentifiedModes
    reference_index : sequence of int, optional
        Per mode, the component set to 1 (the largest component of the mode's reference shape
        when tracking); None means each window shape's own largest component.

    Returns
    -------
    ModeUncertainty
    """
    sequences = leave_one_out_sequences(lag_sums, pair_counts)
    K = sequences.shape[0]
    if reference_index is None:
        reference_index = [largest_component(s) for s in modes.shapes]
    index = np.asarray(reference_index, dtype=int)
    shapes = (
        np.stack([normalise_shape(s, int(r)) for s, r in zip(modes.shapes, index)]) if modes.n_modes else modes.shapes
    )
    if K < 3 or not np.all(np.isfinite(sequences)):
        nan = np.full(modes.n_modes, np.nan)
        code = ("too_few_segments",) if K < 3 else ("nonfinite_correlation",)
        blank = np.full((K, modes.n_modes), np.nan)
        return ModeUncertainty(
            nan, nan, shapes, np.full(shapes.shape, np.nan), np.full(shapes.shape, np.nan), index, blank, blank,
            np.full((K,) + shapes.shape, np.nan + 0j), tuple(code for _ in range(modes.n_modes)),
        )  # fmt: skip
    freq, damping, raw = _replicates(sequences, fs, modes)
    replicate_shapes = np.empty_like(raw)
    for j, r in enumerate(index):
        replicate_shapes[:, j] = normalise_shape(raw[:, j], int(r))
    quality = tuple(("jackknife_unmatched",) if np.isnan(freq[:, j]).any() else () for j in range(modes.n_modes))
    return ModeUncertainty(
        freq_stderr_hz=jackknife_stderr(freq),
        damping_stderr=jackknife_stderr(damping),
        shapes=shapes,
        shape_stderr_real=jackknife_stderr(replicate_shapes.real),
        shape_stderr_imag=jackknife_stderr(replicate_shapes.imag),
        reference_index=index,
        replicate_freq_hz=freq,
        replicate_damping=damping,
        replicate_shapes=replicate_shapes,
        quality=quality,
    )


def mac_stderr(replicate_shapes, reference_shape) -> float:
    """Jackknife standard error of the MAC between a mode's shape and a reference shape.

    Parameters
    ----------
    replicate_shapes : array_like, shape (K, n_channels), complex
        One mode's leave-one-out shapes (:attr:`ModeUncertainty.replicate_shapes` ``[:, j]``).
    reference_shape : array_like, shape (n_channels,)
    """
    mac = modal_assurance_criterion(np.asarray(replicate_shapes), np.asarray(reference_shape)[None, :])[:, 0]
    return float(jackknife_stderr(mac))
