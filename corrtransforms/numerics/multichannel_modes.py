"""Modes of several channels from a window's matrix of correlation functions: covariance-driven
stochastic subspace identification with a stabilisation diagram and automatic pole selection.

A structure driven by broadband stationary forces has output correlations that are sums of free
decays (the Natural Excitation Technique, NExT [1]_): with ``y`` the channels and ``r`` the
reference channels,

    Lambda_k = E[y(t + k dt) r(t)^T] = C A^k G,          k >= 1,

for the discrete state matrix ``A``, the output matrix ``C`` and the cross covariance ``G`` of
the next state with the references. In this package's correlation convention (``R_ab(tau) =
E[a(t) b(t + tau)]``) element ``[a, r]`` of ``Lambda_k`` is ``R_ra(k dt)``
(:func:`correlation_sequence`). Stacked in a block Hankel matrix, ``H = O Gamma`` factors into the
observability matrix ``O = [C; C A; C A^2; ...]`` and a controllability matrix; the SVD of ``H``
gives ``O`` up to a similarity for every model order ``n`` at once, and from ``O``::

    ssi-cov:  A = pinv(O_up) O_down   (O without its last / first block row)  [3]_
    era:      A = S^-1/2 U^T H_1 V S^-1/2  (H_1: H shifted by one lag)          [2]_

then the eigenvalues ``mu`` of ``A`` are the discrete poles: ``lambda = ln(mu) / dt``,
``f = |lambda| / 2 pi``, ``zeta = -Re(lambda) / |lambda|``, and ``C psi`` (``psi`` the
eigenvectors) the complex mode shapes at the channels.

Method choice (measured by ``benchmarks/bench_multichannel_modes.py`` with OPENBLAS_NUM_THREADS=1:
a six-mass chain, six channels, modes at 0.77 and 2.26 Hz in one band, 40 windows of 1200 s at
20 Hz): both found both modes in 40/40 windows; median |df/f| 9.5e-4 / 8.4e-4 (ssi-cov) against
9.7e-4 / 8.3e-4 (era); rms relative damping error 0.180 / 0.103 against 0.188 / 0.103; smallest
MAC 1.0000 / 0.9999 for both; 25.8 against 23.6 ms per window. Accuracy is the same within the
Monte Carlo's noise and the SVD they share dominates the time. The default is "ssi-cov": its
least-squares shift uses the whole observability matrix, which is what [3]_ analyses, and the
first-order uncertainty of [4]_ is written for it (a later replacement of the jackknife can
reuse it); "era" stays available as ``method``.

Physical poles are chosen without a user in the loop (:func:`select_modes`): a pole is *stable*
when the previous model order has a pole within :data:`FREQUENCY_TOLERANCE` in frequency,
:data:`DAMPING_TOLERANCE` in damping and with a MAC of at least :data:`MAC_TOLERANCE`; stable
poles inside the search band (the mode's band widened by :data:`BAND_MARGIN` of its width on each
side) with a damping ratio in :data:`DAMPING_RANGE` are grouped by the distance
``|df| / f + (1 - MAC)`` (average linkage, cut at :data:`CLUSTER_DISTANCE`); a group that holds
stable poles at :data:`MIN_STABLE_FRACTION` of the orders or more is a mode, represented by its
pole of lowest model order from ``2 n_channels`` up (a real pole at one order, so the jackknife of
:mod:`~corrtransforms.numerics.mode_uncertainty` can repeat it at that order).

Time per window (same script, 8 channels, 2 modes in band, 600 s at 50 Hz, lags on a stride of
2, 75 block rows, one busy 2-core machine, OPENBLAS_NUM_THREADS=1): the correlation stage's
``correlate_block`` 7 ms; the 32 sub-record lag sums 29 ms; :func:`identify_modes` 96 ms with a
square Hankel matrix (600 x 600) and 16 ms with 6 block columns (600 x 48); the jackknife
(:mod:`~corrtransforms.numerics.mode_uncertainty`, 32 SVDs per model order used) 7.0 s square
and 82 ms with 6 block columns. The square default is kept until the narrow matrix's accuracy
and coverage are measured (both modes were found with it, frequencies within 1 stderr). With a
multithreaded BLAS on a busy machine the small SVDs were up to 16 times slower.

References
----------
.. [1] G. H. James, T. G. Carne and J. P. Lauffer, "The Natural Excitation Technique (NExT) for
   modal parameter extraction from operating structures", Int. J. Analytical and Experimental
   Modal Analysis 10(4), 260-277, 1995.
.. [2] J.-N. Juang and R. S. Pappa, "An eigensystem realization algorithm for modal parameter
   identification and model reduction", J. Guidance, Control, and Dynamics 8(5), 620-627, 1985.
.. [3] B. Peeters and G. De Roeck, "Reference-based stochastic subspace identification for
   output-only modal analysis", Mechanical Systems and Signal Processing 13(6), 855-878, 1999
   (covariance-driven SSI, Sec. 3; from memory).
.. [4] E. Reynders, R. Pintelon and G. De Roeck, "Uncertainty bounds on modal parameters obtained
   from stochastic subspace identification", Mechanical Systems and Signal Processing 22(4),
   948-969, 2008.
"""

from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple

import numpy as np
import scipy.cluster.hierarchy
import scipy.linalg
import scipy.spatial.distance

from corrtransforms.numerics.mode_shapes import modal_assurance_criterion

METHODS = ("ssi-cov", "era")
#: stability between consecutive model orders (common practice: 1 % in frequency, 5 % in
#: damping, MAC 0.98 are the values usually quoted for stabilisation diagrams; unsourced)
FREQUENCY_TOLERANCE = 0.01
DAMPING_TOLERANCE = 0.05
MAC_TOLERANCE = 0.98
#: damping ratios accepted as physical (common practice for lightly damped structures)
DAMPING_RANGE = (0.0005, 0.20)
#: the search band is the mode's band widened by this fraction of its width on each side
#: (common practice: a pole just outside a hand-set band is still the mode)
BAND_MARGIN = 0.10
#: poles closer than this in ``|df| / f + (1 - MAC)`` are one mode (common practice)
CLUSTER_DISTANCE = 0.02
#: a mode needs stable poles at this fraction of the model orders (common practice)
MIN_STABLE_FRACTION = 0.3
#: largest model order of the default range 2, 4, ..., MAX_ORDER (common practice: several
#: times the modes expected in the band, leaving room for noise and out-of-band modes)
MAX_ORDER = 40
#: the Hankel matrix spans at least this many periods of the search band's low edge
#: (common practice)
HANKEL_PERIODS = 1.0


@dataclasses.dataclass(frozen=True)
class Poles:
    """Poles of a range of model orders (one row per pole with positive imaginary part).

    Attributes
    ----------
    order : ndarray of int, shape (n_poles,)
    freq_hz, damping : ndarray, shape (n_poles,)
        Undamped natural frequency ``|lambda| / 2 pi`` and damping ratio ``-Re(lambda) / |lambda|``.
    shapes : ndarray of complex, shape (n_poles, n_channels)
        ``C psi``, not normalised.
    """

    order: np.ndarray
    freq_hz: np.ndarray
    damping: np.ndarray
    shapes: np.ndarray


@dataclasses.dataclass(frozen=True)
class IdentifiedModes:
    """The physical modes :func:`select_modes` found in a search band.

    Attributes
    ----------
    freq_hz, damping : ndarray, shape (n_modes,)
    shapes : ndarray of complex, shape (n_modes, n_channels)
        Shape of the representative pole, not normalised.
    order : ndarray of int, shape (n_modes,)
        Model order of the representative pole.
    n_stable : ndarray of int, shape (n_modes,)
        Stable poles in the mode's group.
    block_rows, block_columns, lag_stride : int
        Hankel size and lag stride used (the jackknife repeats them).
    method : str
    """

    freq_hz: np.ndarray
    damping: np.ndarray
    shapes: np.ndarray
    order: np.ndarray
    n_stable: np.ndarray
    block_rows: int
    lag_stride: int
    method: str
    block_columns: int = 0  # 0: as many as block_rows

    @property
    def n_modes(self) -> int:
        return int(len(self.freq_hz))


def correlation_sequence(values, pairs: Sequence[Tuple[int, int]], outputs, references, n_lags: int) -> np.ndarray:
    """Output correlation matrices ``Lambda_k[a, r] = E[y_a(t + k dt) y_r(t)]`` from pair rows.

    Parameters
    ----------
    values : array_like, shape (n_pairs, ..., 2L + 1)
        One row per pair at lags ``-L..L`` (correlations, lag sums or pair counts; any axes
        between, e.g. sub-records).
    pairs : sequence of (int, int)
        The channel pair ``(a, b)`` of each row, ``R_ab(tau) = E[a(t) b(t + tau)]``.
    outputs, references : sequence of int
        Channels of the rows and of the columns of ``Lambda``.
    n_lags : int
        Lags ``k = 0 .. n_lags - 1`` wanted (at most ``L + 1``).

    Returns
    -------
    ndarray, shape (..., n_lags, n_outputs, n_references)
        ``Lambda_k[a, r] = R_ra(k)`` taken from row ``(r, a)`` at lag ``+k`` or from row
        ``(a, r)`` at lag ``-k``; a KeyError names a pair found in neither order.
    """
    v = np.asarray(values)
    L = (v.shape[-1] - 1) // 2
    if not 1 <= n_lags <= L + 1:
        raise ValueError(f"n_lags={n_lags}: the rows hold lags 0..{L}")
    row = {tuple(int(c) for c in p): i for i, p in enumerate(pairs)}
    out = np.empty(v.shape[1:-1] + (len(outputs), len(references), n_lags), dtype=v.dtype)
    for i, a in enumerate(outputs):
        for j, r in enumerate(references):
            if (r, a) in row:
                out[..., i, j, :] = v[row[(r, a)]][..., L : L + n_lags]
            elif (a, r) in row:
                out[..., i, j, :] = v[row[(a, r)]][..., L - n_lags + 1 : L + 1][..., ::-1]
            else:
                raise KeyError(f"pair ({r}, {a}) (or ({a}, {r})) is missing from the correlation rows")
    return np.moveaxis(out, -1, -3)


def block_hankel(sequence, block_rows: int, block_columns: int, first_lag: int = 1) -> np.ndarray:
    """``H[p, q] = Lambda_{first_lag + p + q}`` as a (block_rows n_out, block_columns n_ref) matrix."""
    lam = np.asarray(sequence)
    needed = first_lag + block_rows + block_columns - 1
    if lam.shape[0] < needed:
        raise ValueError(f"the Hankel matrix needs lags up to {needed - 1}, the sequence holds {lam.shape[0] - 1}")
    n_out, n_ref = lam.shape[1], lam.shape[2]
    H = np.empty((block_rows * n_out, block_columns * n_ref), dtype=float)
    for p in range(block_rows):
        block = lam[first_lag + p : first_lag + p + block_columns]  # (block_columns, n_out, n_ref)
        H[p * n_out : (p + 1) * n_out] = block.transpose(1, 0, 2).reshape(n_out, block_columns * n_ref)
    return H


#: the Gram-matrix path of :func:`leading_subspace` is taken only when the smallest singular
#: value kept is at least this fraction of the largest: its error is then about
#: ``eps / GRAM_MIN_RATIO^2`` relative (squared conditioning; Golub & Van Loan, *Matrix
#: Computations*, 4th ed., Sec. 8.6, from memory), i.e. rounding (1e-10)
GRAM_MIN_RATIO = 1e-6


def leading_subspace(H, order: int) -> Optional[Tuple[np.ndarray, np.ndarray]]:
    """The first ``order`` left singular vectors and values of ``H`` from the eigendecomposition of
    its Gram matrix (``H^T H`` for a tall matrix, ``H H^T`` for a wide one), or None when
    ``s_order / s_1 < GRAM_MIN_RATIO`` (the caller then takes the SVD).

    Four times cheaper than the SVD of a tall Hankel matrix (656 x 48: 0.21 against 0.84 ms); the
    jackknife repeats it for every replicate at one model order.
    """
    H = np.asarray(H, dtype=float)
    tall = H.shape[0] >= H.shape[1]
    if not 0 < order <= min(H.shape):
        return None
    w, vectors = np.linalg.eigh(H.T @ H if tall else H @ H.T)
    w, vectors = w[::-1][:order], vectors[:, ::-1][:, :order]
    if not w[0] > 0 or w[-1] < (GRAM_MIN_RATIO**2) * w[0]:
        return None
    s = np.sqrt(w)
    return ((H @ vectors) / s if tall else vectors), s


class _Factorisation:
    """SVD of the block Hankel matrix and the per-order state matrices of one method.

    With ``order`` (one model order only, "ssi-cov") the leading subspace comes from
    :func:`leading_subspace` when it is well conditioned (else the SVD).

    The "ssi-cov" shift ``A_n = pinv(O_up) O_down`` of every order ``n`` comes from two products
    formed once, ``G = U_up^T U_up`` and ``X = U_up^T U_down`` (``U_up`` / ``U_down``: ``U``
    without its last / first block row): with ``O = U S^1/2``,
    ``A_n = S_n^-1/2 G_n^-1 X_n S_n^1/2`` (``G_n``, ``X_n`` the leading ``n x n`` blocks), the
    normal equations of the least-squares shift with the singular values factored out, so their
    conditioning is ``G``'s (close to 1: ``U`` has orthonormal columns), not ``S``'s. Each order is
    then an ``n x n`` solve instead of a least-squares problem of the Hankel's height.
    """

    def __init__(self, sequence, block_rows: int, method: str, block_columns: int = 0, order: Optional[int] = None):
        self.n_out = sequence.shape[1]
        self.method = method
        block_columns = block_columns or block_rows
        H = block_hankel(sequence, block_rows, block_columns)
        leading = leading_subspace(H, int(order)) if order is not None and method == "ssi-cov" else None
        if leading is not None:
            self.U, self.s = leading
        else:
            self.U, self.s, Vt = scipy.linalg.svd(H, full_matrices=False, lapack_driver="gesdd")
        if method == "era":
            H1 = block_hankel(sequence, block_rows, block_columns, first_lag=2)
            self.shifted = self.U.T @ H1 @ Vt.T
        else:
            width = min(len(self.s), self.max_order())
            upper = self.U[: -self.n_out, :width]
            self.gram, self.cross = upper.T @ upper, upper.T @ self.U[self.n_out :, :width]

    def max_order(self) -> int:
        """Largest order: the shifted observability matrix must keep at least as many rows."""
        return min(len(self.s), self.U.shape[0] - self.n_out)

    def system(self, order: int) -> Tuple[np.ndarray, np.ndarray]:
        """``(A, C)`` of a model order."""
        root = np.sqrt(self.s[:order])
        if self.method == "era":
            A = self.shifted[:order, :order] / np.outer(root, root)
        else:
            A = np.linalg.solve(self.gram[:order, :order], self.cross[:order, :order]) * root / root[:, None]
        return A, self.U[: self.n_out, :order] * root


def _poles_of_system(A, C, dt: float):
    mu, psi = np.linalg.eig(A)
    upper = mu.imag > 0
    mu, psi = mu[upper], psi[:, upper]
    lam = np.log(mu) / dt
    return np.abs(lam) / (2 * np.pi), -lam.real / np.abs(lam), (C @ psi).T


def default_block_rows(fs: float, low_hz: float, n_references: int, max_order: int, lag_stride: int = 1) -> int:
    """Block rows ``i`` of the Hankel matrix: room for ``max_order`` and :data:`HANKEL_PERIODS`.

    ``i = max(ceil(max_order / n_references) + 1, ceil(HANKEL_PERIODS fs / (stride low_hz)))``:
    the order cannot exceed the rank ``i n_references`` of the matrix, and the lags should
    span a period of the lowest mode searched (common practice).
    """
    by_order = int(np.ceil(max_order / max(n_references, 1))) + 1
    by_period = int(np.ceil(HANKEL_PERIODS * fs / (lag_stride * max(low_hz, 1e-12))))
    return max(by_order, by_period, 2)


def identify_poles(
    sequence,
    fs: float,
    orders: Optional[Sequence[int]] = None,
    block_rows: Optional[int] = None,
    method: str = "ssi-cov",
    lag_stride: int = 1,
    low_hz: Optional[float] = None,
    block_columns: int = 0,
) -> Tuple[Poles, int]:
    """Poles and complex shapes of every model order from output correlation matrices.

    Parameters
    ----------
    sequence : array_like, shape (n_lags, n_outputs, n_references)
        ``Lambda_k`` at lags ``k = 0, 1, ...`` (:func:`correlation_sequence`); lag 0 is not used.
    fs : float
        Sample rate of the lags, Hz.
    orders : sequence of int, optional
        Model orders (even: two per mode). None means ``2, 4, ..., MAX_ORDER``, capped at the
        rank the Hankel matrix allows.
    block_rows : int, optional
        Block rows (= block columns) of the Hankel matrix. None means :func:`default_block_rows`
        with ``low_hz`` (required then).
    method : {"ssi-cov", "era"}
    lag_stride : int
        Use every ``lag_stride``-th lag (a coarser lag grid for oversampled records; content
        above ``fs / (2 lag_stride)`` then aliases into the band). Default 1.
    low_hz : float, optional
        Lowest frequency searched, for the default ``block_rows``.
    block_columns : int
        Block columns; 0 (the default) means as many as ``block_rows``. Fewer columns (at least
        ``max(orders) / n_references``) make the SVD much cheaper; see the benchmark.

    Returns
    -------
    poles : Poles
    block_rows : int
        The Hankel size used.

    References
    ----------
    See the module docstring: [3]_ for "ssi-cov", [2]_ for "era".
    """
    if method not in METHODS:
        raise ValueError(f"method={method!r}: must be one of " + ", ".join(repr(m) for m in METHODS))
    lam = np.asarray(sequence, dtype=float)[:: int(lag_stride)]
    if lam.ndim != 3:
        raise ValueError(f"sequence must have shape (n_lags, n_outputs, n_references), got {lam.shape}")
    if not np.all(np.isfinite(lam)):
        raise ValueError("sequence holds NaN or inf: cut it before the first non-finite lag")
    wanted = list(range(2, MAX_ORDER + 1, 2)) if orders is None else [int(n) for n in orders]
    if block_rows is None:
        if low_hz is None:
            raise ValueError("block_rows=None needs low_hz (the lowest frequency searched)")
        block_rows = default_block_rows(fs, low_hz, lam.shape[2], max(wanted), lag_stride)
        block_rows = min(block_rows, (lam.shape[0] - 1) // 2)
    factorisation = _Factorisation(lam, int(block_rows), method, int(block_columns))
    usable = [n for n in wanted if 0 < n <= factorisation.max_order()]
    dt = lag_stride / fs
    parts = [_poles_of_system(*factorisation.system(n), dt) + (n,) for n in usable]
    n_out = lam.shape[1]
    poles = Poles(
        order=np.concatenate([np.full(len(p[0]), p[3]) for p in parts]) if parts else np.zeros(0, int),
        freq_hz=np.concatenate([p[0] for p in parts]) if parts else np.zeros(0),
        damping=np.concatenate([p[1] for p in parts]) if parts else np.zeros(0),
        shapes=np.concatenate([p[2] for p in parts]) if parts else np.zeros((0, n_out), complex),
    )
    return poles, int(block_rows)


def poles_at_order(
    sequence,
    fs: float,
    order: int,
    block_rows: int,
    method: str = "ssi-cov",
    lag_stride: int = 1,
    block_columns: int = 0,
):
    """``(freq_hz, damping, shapes)`` of one model order (the jackknife's repeated identification)."""
    lam = np.asarray(sequence, dtype=float)[:: int(lag_stride)]
    system = _Factorisation(lam, int(block_rows), method, int(block_columns), order=int(order)).system(int(order))
    return _poles_of_system(*system, lag_stride / fs)


def stability_flags(
    poles: Poles,
    frequency_tolerance: float = FREQUENCY_TOLERANCE,
    damping_tolerance: float = DAMPING_TOLERANCE,
    mac_tolerance: float = MAC_TOLERANCE,
) -> np.ndarray:
    """True for a pole that the previous order in ``poles`` repeats (frequency, damping, MAC).

    For each pole of order ``n`` the pole of the previous order with the nearest frequency is
    compared: ``|df| / f <= frequency_tolerance``, ``|dzeta| / zeta <= damping_tolerance`` and
    ``MAC >= mac_tolerance``. Poles of the lowest order are never stable.
    """
    stable = np.zeros(len(poles.order), dtype=bool)
    orders = np.unique(poles.order)
    for previous, current in zip(orders[:-1], orders[1:]):
        now = np.nonzero(poles.order == current)[0]
        before = np.nonzero(poles.order == previous)[0]
        if not len(now) or not len(before):
            continue
        df = np.abs(poles.freq_hz[now][:, None] - poles.freq_hz[before][None, :]) / poles.freq_hz[now][:, None]
        nearest = before[np.argmin(df, axis=1)]
        rel_f = np.min(df, axis=1)
        rel_z = np.abs(poles.damping[now] - poles.damping[nearest]) / np.abs(poles.damping[now])
        mac = _paired_mac(poles.shapes[now], poles.shapes[nearest])
        stable[now] = (rel_f <= frequency_tolerance) & (rel_z <= damping_tolerance) & (mac >= mac_tolerance)
    return stable


def _paired_mac(a, b) -> np.ndarray:
    """MAC of row ``i`` of ``a`` with row ``i`` of ``b`` (the diagonal of
    :func:`~corrtransforms.numerics.mode_shapes.modal_assurance_criterion`, without the rest)."""
    cross = np.abs(np.sum(np.conj(a) * b, axis=1)) ** 2
    denominator = np.sum(np.abs(a) ** 2, axis=1) * np.sum(np.abs(b) ** 2, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mac = np.where(denominator > 0, cross / np.where(denominator > 0, denominator, 1.0), np.nan)
    return np.minimum(mac, 1.0)


def search_band(band_hz: Tuple[float, float], margin: float = BAND_MARGIN) -> Tuple[float, float]:
    """The band widened by ``margin`` times its width on each side (the low edge kept above 0)."""
    low, high = float(band_hz[0]), float(band_hz[1])
    if not 0 < low < high:
        raise ValueError(f"band_hz={band_hz!r}: must be (low, high) with 0 < low < high")
    width = high - low
    return max(low - margin * width, 0.5 * low), high + margin * width


def select_modes(
    poles: Poles,
    band_hz: Tuple[float, float],
    margin: float = BAND_MARGIN,
    damping_range: Tuple[float, float] = DAMPING_RANGE,
    cluster_distance: float = CLUSTER_DISTANCE,
    min_stable_fraction: float = MIN_STABLE_FRACTION,
    stable: Optional[np.ndarray] = None,
) -> Tuple[np.ndarray, np.ndarray]:
    """Physical modes among the poles: stable, in the search band, damping in range, grouped.

    Returns
    -------
    representatives : ndarray of int
        Row in ``poles`` of each mode's representative (:func:`_representative`), by
        increasing frequency.
    n_stable : ndarray of int
        Stable poles in each mode's group.
    """
    stable = stability_flags(poles) if stable is None else np.asarray(stable, dtype=bool)
    low, high = search_band(band_hz, margin)
    keep = (
        stable
        & (poles.freq_hz >= low)
        & (poles.freq_hz <= high)
        & (poles.damping > damping_range[0])
        & (poles.damping < damping_range[1])
    )
    rows = np.nonzero(keep)[0]
    n_orders = len(np.unique(poles.order))
    needed = max(2, int(np.ceil(min_stable_fraction * n_orders)))
    if len(rows) < needed:
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int)
    labels = _group_poles(poles, rows, cluster_distance)
    representatives, counts = [], []
    for label in np.unique(labels):
        members = rows[labels == label]
        if len(members) < needed:
            continue
        representatives.append(_representative(poles, members))
        counts.append(len(members))
    order = np.argsort(poles.freq_hz[representatives]) if representatives else np.zeros(0, dtype=int)
    return np.asarray(representatives, dtype=int)[order], np.asarray(counts, dtype=int)[order]


def _representative(poles: Poles, members: np.ndarray) -> int:
    """The group's pole of lowest model order from ``2 n_channels`` up (on ties the one nearest the
    group's median frequency); the lowest order of the group when none reaches ``2 n_channels``.

    ``2 n_channels`` is the smallest state that can hold as many modes as there are channels, so
    modes outside the band do not bias the pole (at lower orders, a 2.26 Hz mode of a six-mass
    chain came out 0.2 % high); staying near it keeps the estimate smooth: on the Monte Carlo of
    ``benchmarks/bench_multichannel_modes.py`` the pole nearest the group's median frequency often
    sat at a high order, where leave-one-out replicates met spurious neighbours and the jackknife
    stderr came out 2.5 times the actual scatter (coverage 0.99).
    """
    order = poles.order[members]
    floor = 2 * poles.shapes.shape[1]
    rank = np.where(order >= floor, order, order.max() + floor - order)
    distance = np.abs(poles.freq_hz[members] - np.median(poles.freq_hz[members]))
    return int(members[np.lexsort((distance, rank))[0]])


def _group_poles(poles: Poles, rows: np.ndarray, cluster_distance: float) -> np.ndarray:
    """Average-linkage groups of poles under ``|df| / max(f) + (1 - MAC)``."""
    if len(rows) == 1:
        return np.zeros(1, dtype=int)
    f = poles.freq_hz[rows]
    distance = np.abs(f[:, None] - f[None, :]) / np.maximum(f[:, None], f[None, :])
    distance += 1.0 - modal_assurance_criterion(poles.shapes[rows], poles.shapes[rows])
    np.fill_diagonal(distance, 0.0)
    condensed = scipy.spatial.distance.squareform(np.maximum(distance, 0.0), checks=False)
    tree = scipy.cluster.hierarchy.linkage(condensed, method="average")
    return scipy.cluster.hierarchy.fcluster(tree, t=cluster_distance, criterion="distance")


def identify_modes(
    sequence,
    fs: float,
    band_hz: Tuple[float, float],
    orders: Optional[Sequence[int]] = None,
    block_rows: Optional[int] = None,
    method: str = "ssi-cov",
    lag_stride: int = 1,
    margin: float = BAND_MARGIN,
    damping_range: Tuple[float, float] = DAMPING_RANGE,
    block_columns: int = 0,
) -> IdentifiedModes:
    """Physical modes in a band from output correlation matrices: :func:`identify_poles`, then
    :func:`select_modes`.

    Parameters
    ----------
    sequence : array_like, shape (n_lags, n_outputs, n_references)
        :func:`correlation_sequence` of the window.
    fs : float
        Sample rate, Hz.
    band_hz : (float, float)
        The band searched (widened by ``margin``): one band around the modes of interest; the
        modes of several ``[[modes]]`` entries may share one band.
    orders, block_rows, method, lag_stride, block_columns
        As in :func:`identify_poles`.
    margin, damping_range
        As in :func:`select_modes`.

    Returns
    -------
    IdentifiedModes
        Possibly empty (no stable mode in the band).

    Examples
    --------
    >>> import numpy as np
    >>> fs, f, zeta = 20.0, 2.0, 0.02                   # one exact decaying correlation
    >>> k = np.arange(200) / fs
    >>> wd = 2 * np.pi * f * np.sqrt(1 - zeta**2)
    >>> r = np.exp(-zeta * 2 * np.pi * f * k) * np.cos(wd * k)
    >>> seq = np.stack([np.outer([1.0, -0.5], [1.0, -0.5]) * v for v in r])
    >>> modes = identify_modes(seq, fs, (1.5, 2.5), orders=range(2, 11, 2))
    >>> round(float(modes.freq_hz[0]), 6), round(float(modes.damping[0]), 6)
    (2.0, 0.02)
    """
    low, _ = search_band(band_hz, margin)
    poles, rows_used = identify_poles(sequence, fs, orders, block_rows, method, lag_stride, low, block_columns)
    chosen, n_stable = select_modes(poles, band_hz, margin=margin, damping_range=damping_range)
    return IdentifiedModes(
        freq_hz=poles.freq_hz[chosen],
        damping=poles.damping[chosen],
        shapes=poles.shapes[chosen],
        order=poles.order[chosen],
        n_stable=n_stable,
        block_rows=rows_used,
        lag_stride=int(lag_stride),
        method=method,
        block_columns=int(block_columns),
    )
