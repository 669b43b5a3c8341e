"""Multivariate novelty of a vector of standardised residuals: PCA, Hotelling T^2 and the
squared prediction error (SPE, Q), with control limits from the baseline sample and per-variable
contributions. Pure numpy/scipy.

Model (Jackson 1991; Jolliffe 2002; MacGregor & Kourti 1995, from memory): the baseline sample
``Z`` (m windows x p variables, each a series' standardised residual) is centred at its mean
``mu``; ``S`` is its covariance (divisor m - 1) with eigenvalues ``l_1 >= ... >= l_p`` and unit
eigenvectors ``P``. The first ``k`` components are retained (:func:`retained_components`). For a
new vector ``z``, with ``d = z - mu`` and scores ``t = P_k' d``:

- ``T^2 = sum_a t_a^2 / l_a`` (the Mahalanobis distance in the retained subspace; with k = p it
  is ``d' S^-1 d``);
- ``SPE = |d - P_k t|^2 = sum_j e_j^2`` (the squared distance from the retained subspace).

Limits (level ``alpha``, the false-alarm probability per window):

- T^2 of a new observation, mean and covariance estimated from m windows (Tracy, Young & Mason
  1992; Montgomery 2009, eq. 11.19): ``UCL = k (m + 1)(m - 1) / (m (m - k)) F(1 - alpha; k, m - k)``;
- SPE (Jackson & Mudholkar 1979), with ``theta_i = sum_{j > k} l_j^i`` and
  ``h0 = 1 - 2 theta_1 theta_3 / (3 theta_2^2)``: ``c = theta_1 [(Q / theta_1)^h0 - 1 -
  theta_2 h0 (h0 - 1) / theta_1^2] / sqrt(2 theta_2 h0^2)`` is approximately N(0, 1), so
  ``Q_alpha = theta_1 [c_alpha sqrt(2 theta_2 h0^2) / theta_1 + 1 + theta_2 h0 (h0 - 1) /
  theta_1^2]^(1 / h0)``.

Normal scores: each statistic is also returned as ``Phi^-1`` of its in-control distribution
function (the F distribution above for T^2, the Jackson-Mudholkar ``c`` for SPE), so that a
chart designed for N(0, 1) values can watch it.

Contributions (Miller, Swanson & Heckler 1998; Westerhuis, Gurden & Smilde 2000, from memory):
``SPE_j = e_j^2`` and ``T2_j = d_j sum_a p_ja t_a / l_a``; each set sums to its statistic.
"""

from __future__ import annotations

import dataclasses
from typing import Optional

import numpy as np
from scipy import stats

#: default share of the baseline variance the retained components explain (Jolliffe 2002,
#: Section 6.1.1, suggests a cut-off between 70 % and 90 %)
VARIANCE_FRACTION = 0.9


def retained_components(eigenvalues, fraction: float = VARIANCE_FRACTION) -> int:
    """The number of components: the smallest k whose cumulative variance fraction reaches
    ``fraction`` (Jolliffe 2002, Section 6.1.1), at most p - 1 so that SPE has a residual
    subspace, at least 1."""
    lam = np.clip(np.asarray(eigenvalues, dtype=float), 0.0, None)
    p = lam.size
    if p < 2:
        raise ValueError("a novelty model needs at least two variables")
    cumulative = np.cumsum(lam) / lam.sum()
    k = int(np.searchsorted(cumulative, fraction - 1e-12) + 1)
    return max(1, min(k, p - 1))


@dataclasses.dataclass(frozen=True)
class NoveltyModel:
    """A fitted PCA novelty model (see the module docstring)."""

    mean: np.ndarray  # (p,)
    eigenvalues: np.ndarray  # (p,) descending
    loadings: np.ndarray  # (p, p): columns are the eigenvectors, in eigenvalue order
    n_components: int
    n_windows: int

    @property
    def theta(self):
        rest = self.eigenvalues[self.n_components :]
        return tuple(float(np.sum(rest**i)) for i in (1, 2, 3))

    def t2_limit(self, alpha: float) -> float:
        """Tracy, Young & Mason (1992) limit of T^2 for a new window."""
        k, m = self.n_components, self.n_windows
        return float(k * (m + 1) * (m - 1) / (m * (m - k)) * stats.f.ppf(1.0 - alpha, k, m - k))

    def spe_limit(self, alpha: float) -> float:
        """Jackson & Mudholkar (1979) limit of SPE."""
        t1, t2, t3 = self.theta
        h0 = 1.0 - 2.0 * t1 * t3 / (3.0 * t2**2)
        c = stats.norm.ppf(1.0 - alpha)
        return float(t1 * (c * np.sqrt(2.0 * t2 * h0**2) / t1 + 1.0 + t2 * h0 * (h0 - 1.0) / t1**2) ** (1.0 / h0))

    def t2_normal_score(self, t2):
        """``Phi^-1(F(T^2 m (m - k) / (k (m + 1)(m - 1)); k, m - k))``, the T^2 as a N(0, 1) value."""
        k, m = self.n_components, self.n_windows
        scaled = np.asarray(t2, dtype=float) * m * (m - k) / (k * (m + 1) * (m - 1))
        return stats.norm.isf(stats.f.sf(scaled, k, m - k))

    def spe_normal_score(self, spe):
        """The Jackson & Mudholkar (1979) statistic ``c`` of SPE (approximately N(0, 1))."""
        t1, t2, t3 = self.theta
        h0 = 1.0 - 2.0 * t1 * t3 / (3.0 * t2**2)
        q = np.asarray(spe, dtype=float)
        return t1 * ((q / t1) ** h0 - 1.0 - t2 * h0 * (h0 - 1.0) / t1**2) / np.sqrt(2.0 * t2 * h0**2)

    def statistics(self, z):
        """T^2, SPE and their contributions of the rows of ``z`` (n x p).

        Returns
        -------
        t2, spe : ndarray (n,)
        t2_contrib, spe_contrib : ndarray (n, p), each row summing to t2 / spe
        """
        d = np.atleast_2d(np.asarray(z, dtype=float)) - self.mean
        pk = self.loadings[:, : self.n_components]
        lam = self.eigenvalues[: self.n_components]
        scores = d @ pk
        t2_contrib = d * ((scores / lam) @ pk.T)
        e = d - scores @ pk.T
        spe_contrib = e**2
        return np.sum(scores**2 / lam, axis=1), spe_contrib.sum(axis=1), t2_contrib, spe_contrib


def fit_novelty_model(z, fraction: float = VARIANCE_FRACTION, n_components: Optional[int] = None) -> NoveltyModel:
    """PCA of the baseline sample ``z`` (m x p, m > p >= 2): mean, covariance eigen-decomposition
    (``numpy.linalg.eigh``), components by :func:`retained_components` unless ``n_components``
    is given (1..p; p leaves SPE identically 0 and its limit undefined)."""
    z = np.asarray(z, dtype=float)
    if z.ndim != 2 or z.shape[1] < 2 or z.shape[0] <= z.shape[1] + 1:
        raise ValueError(f"need m > p + 1 windows of p >= 2 variables, got shape {z.shape}")
    if not np.all(np.isfinite(z)):
        raise ValueError("the baseline sample must be finite")
    mean = z.mean(axis=0)
    cov = np.cov(z, rowvar=False, ddof=1)
    lam, vec = np.linalg.eigh(cov)
    order = np.argsort(lam)[::-1]
    lam, vec = np.clip(lam[order], 1e-12 * max(lam.max(), 1e-300), None), vec[:, order]
    # a sign convention, so that the model does not depend on the eigen-solver's choice
    signs = np.sign(vec[np.argmax(np.abs(vec), axis=0), np.arange(vec.shape[1])])
    vec = vec * np.where(signs == 0, 1.0, signs)
    k = retained_components(lam, fraction) if n_components is None else int(n_components)
    if not 1 <= k <= z.shape[1]:
        raise ValueError(f"n_components must be in 1..{z.shape[1]}")
    return NoveltyModel(mean, lam, vec, k, z.shape[0])
