"""Baseline model of an indicator, optionally compensated for covariates (temperature, speed).

Natural frequencies of a structure move with temperature and a machine's spectra with speed. The
baseline model predicts the indicator of a window from its window-averaged covariates with a
low-order polynomial fitted on the baseline windows; detection then runs on the residuals.

- No covariates: the prediction is the baseline median and the residual scale the normalised MAD
  (:func:`corrtransforms.numerics.robust.summarize_baseline`).
- With covariates: Huber M-regression (iteratively reweighted least squares with the MAD scale),
  on the covariates centred at their baseline medians; ``order = 2`` adds the squares.
  A baseline window with a missing covariate is left out of the fit; a monitored window with a
  missing covariate is predicted with that covariate at its baseline median and carries the
  quality code ``covariate_missing``.

The model reports its coefficients, the number of windows fitted, R^2, the robust residual scale
and ``s_resid``, the part of that scale not explained by the windows' own estimation errors.

References
----------
Huber, P. J. (1981). Robust Statistics. Wiley, Section 7.8 (Huber's psi, t = 1.345 for 95 %
efficiency at the normal).
Holland, P. W. & Welsch, R. E. (1977). Robust regression using iteratively reweighted
least-squares. Comm. Statist. A6, 813-827.
"""

from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple

import numpy as np
from scipy import special as _special

from corrtransforms.numerics.robust import BASELINE_TOO_SHORT, MAD_TO_SIGMA, net_scale, summarize_baseline

HUBER_T = 1.345
COVARIATE_MISSING = "covariate_missing"
COVARIATE_CONSTANT = "covariate_constant"
COVARIATE_MODEL_UNFITTED = "covariate_model_unfitted"
ORDERS = (1, 2)


def _median(values: np.ndarray) -> float:
    """``np.median`` of a 1-d array without its overhead (the same value: the middle element, or
    the mean of the two middle ones); called in every iteration of :func:`huber_regression`."""
    n = len(values)
    half = n // 2
    if n % 2:
        return float(np.partition(values, half)[half])
    middle = np.partition(values, (half - 1, half))
    return float((middle[half - 1] + middle[half]) / 2.0)


def huber_regression(
    design, response, t: float = HUBER_T, max_iter: int = 200, tol: float = 1e-12
) -> Tuple[np.ndarray, float, int]:
    """Huber M-estimate of linear-regression coefficients by IRLS with the MAD scale.

    Parameters
    ----------
    design : array_like, shape (n, p)
        Regressors (include a column of ones for an intercept).
    response : array_like, shape (n,)
        Observations.
    t : float
        Huber's tuning constant (1.345: 95 % efficiency at the normal).
    max_iter : int
        Iteration limit.
    tol : float
        Stop when no coefficient moves by more than ``tol * (1 + max |beta|)``.

    Returns
    -------
    beta : ndarray, shape (p,)
    scale : float
        ``median(|r|) / Phi^-1(3/4)`` of the final residuals.
    iterations : int

    Notes
    -----
    Minimises ``sum rho(r_i / s)`` with ``rho`` Huber's function; each step solves weighted least
    squares with ``w_i = min(1, t / |r_i / s|)`` and re-estimates ``s = median|r| / 0.6745``
    from the new residuals (Holland & Welsch 1977; the same fixed point as statsmodels'
    ``RLM(..., M=HuberT())``), starting from ordinary least squares.

    References
    ----------
    Huber (1981) Section 7.8 (from memory); Holland & Welsch (1977).
    """
    x = np.asarray(design, dtype=float)
    y = np.asarray(response, dtype=float)
    beta = np.linalg.lstsq(x, y, rcond=None)[0]
    scale = float("nan")
    iterations = 0
    for iterations in range(1, max_iter + 1):  # noqa: B007 - the count is returned
        residual = y - x @ beta
        scale = _median(np.abs(residual)) / _special.ndtri(0.75)
        if scale == 0.0:
            break
        u = np.abs(residual) / scale
        weight = np.where(u <= t, 1.0, t / np.maximum(u, 1e-300))
        root = np.sqrt(weight)
        updated = np.linalg.lstsq(x * root[:, None], y * root, rcond=None)[0]
        moved = np.max(np.abs(updated - beta))
        beta = updated
        if moved <= tol * (1.0 + np.max(np.abs(beta))):
            break
    residual = y - x @ beta
    scale = _median(np.abs(residual)) / _special.ndtri(0.75)
    return beta, scale, iterations


@dataclasses.dataclass(frozen=True)
class BaselineModel:
    """Fitted baseline of one indicator: ``expected = location + sum coef_j * term_j(x - center)``.

    Attributes
    ----------
    covariates : tuple of str
        Compensated covariates in model order (empty: median model).
    order : int
        1 (linear) or 2 (linear and squared terms, no cross terms).
    location : float
        Prediction at the covariate centres (the median without covariates).
    coefficients : tuple of float
        ``order * len(covariates)`` values: linear terms, then squares; per unit of covariate.
    center : tuple of float
        Baseline medians of the covariates.
    scale : float
        Robust scale of the baseline residuals, MAD * 1.4826.
    stderr_sq : float
        Median squared stderr of the fitted baseline windows.
    resid_scale : float
        ``s_resid = sqrt(max(scale^2 - stderr_sq, 0))``.
    r_squared : float
        ``1 - SS_res / SS_tot`` on the fitted windows (NaN without covariates).
    n : int
        Baseline windows used by the fit.
    quality : tuple of str
        ``baseline_too_short``, ``covariate_constant``, ``covariate_model_unfitted``.
    """

    covariates: Tuple[str, ...]
    order: int
    location: float
    coefficients: Tuple[float, ...]
    center: Tuple[float, ...]
    scale: float
    stderr_sq: float
    resid_scale: float
    r_squared: float
    n: int
    quality: Tuple[str, ...] = ()

    @property
    def too_short(self) -> bool:
        return BASELINE_TOO_SHORT in self.quality

    def predict(self, covariates: Optional[np.ndarray], n: Optional[int] = None):
        """Expected indicator values for windows with the given covariates.

        Parameters
        ----------
        covariates : ndarray, shape (n, len(self.covariates)) or None
            Window-averaged covariates (NaN where missing).
        n : int, optional
            Number of windows when ``covariates`` is None.

        Returns
        -------
        expected : ndarray, shape (n,)
        missing : ndarray of bool, shape (n,)
            Windows where a covariate was missing and its baseline median was used.
        """
        p = len(self.covariates)
        if p == 0 or covariates is None:
            count = int(n) if covariates is None else len(covariates)  # type: ignore[arg-type]
            return np.full(count, self.location), np.zeros(count, dtype=bool)
        x = np.asarray(covariates, dtype=float).reshape(-1, p)
        missing_cell = ~np.isfinite(x)
        missing = missing_cell.any(axis=1)
        centred = np.where(missing_cell, 0.0, x - np.asarray(self.center)[None, :])
        terms = _terms(centred, self.order)
        expected = self.location + terms @ np.asarray(self.coefficients, dtype=float)
        return expected, missing


def _terms(centred: np.ndarray, order: int) -> np.ndarray:
    if order == 1:
        return centred
    return np.concatenate([centred, centred * centred], axis=1)


def fit_baseline_model(
    values,
    stderr,
    covariates: Optional[np.ndarray] = None,
    names: Sequence[str] = (),
    min_windows: int = 30,
    order: int = 1,
) -> BaselineModel:
    """Fit the baseline model of one indicator on its baseline windows.

    Parameters
    ----------
    values, stderr : array_like, shape (n,)
        Baseline windows' indicator values and standard errors (non-finite ones are skipped).
    covariates : ndarray, shape (n, len(names)), optional
        Window-averaged covariates (NaN where missing).
    names : sequence of str
        Covariate names; empty for the median/MAD model.
    min_windows : int
        ``[baseline] min_windows``: fewer fitted windows gives ``baseline_too_short``.
    order : {1, 2}
        Polynomial order in each covariate.

    Returns
    -------
    BaselineModel

    Notes
    -----
    Model ``y_i = b_0 + sum_j b_j (x_ij - m_j) [+ sum_j c_j (x_ij - m_j)^2] + e_i`` with ``m_j``
    the baseline median of covariate j, fitted by :func:`huber_regression`. A covariate that
    does not vary over the fitted windows is left out (coefficient 0, quality
    ``covariate_constant``). With fewer than ``terms + 3`` complete windows the median model of
    the usable windows is used instead (quality ``covariate_model_unfitted``).
    """
    if order not in ORDERS:
        raise ValueError(f"order = {order!r}: must be one of {ORDERS}")
    y = np.asarray(values, dtype=float)
    se = np.asarray(stderr, dtype=float)
    names = tuple(names)
    p = len(names)
    usable = np.isfinite(y) & np.isfinite(se)

    def median_model(extra=()):
        summary = summarize_baseline(y[usable], se[usable], min_windows)
        centre = tuple(float("nan") for _ in names)
        if p and covariates is not None and len(y):
            x_all = np.asarray(covariates, dtype=float).reshape(len(y), p)[usable]
            centre = tuple(
                float(np.median(c[np.isfinite(c)])) if np.isfinite(c).any() else float("nan") for c in x_all.T
            )
        return BaselineModel(
            names,
            order,
            summary.location,
            tuple(0.0 for _ in range(p * order)),
            centre,
            summary.scale,
            summary.stderr_sq,
            summary.resid_scale,
            float("nan"),
            summary.n,
            tuple(summary.quality) + tuple(extra),
        )

    if p == 0 or covariates is None:
        return median_model()
    x = np.asarray(covariates, dtype=float).reshape(len(y), p)
    complete = usable & np.isfinite(x).all(axis=1)
    n = int(complete.sum())
    if n < order * p + 3:
        return median_model((COVARIATE_MODEL_UNFITTED,))
    yc, xc, sec = y[complete], x[complete], se[complete]
    center = np.median(xc, axis=0)
    terms = _terms(xc - center[None, :], order)
    varying = np.ptp(terms, axis=0) > 0
    quality = []
    if not varying.all():
        quality.append(COVARIATE_CONSTANT)
    design = np.concatenate([np.ones((n, 1)), terms[:, varying]], axis=1)
    beta, _, _ = huber_regression(design, yc)
    coefficients = np.zeros(terms.shape[1])
    coefficients[varying] = beta[1:]
    residual = yc - design @ beta
    scale = MAD_TO_SIGMA * float(np.median(np.abs(residual - np.median(residual))))
    total = float(np.sum((yc - yc.mean()) ** 2))
    r_squared = 1.0 - float(np.sum(residual**2)) / total if total > 0 else float("nan")
    resid_scale, stderr_sq = net_scale(scale, sec)
    if n < min_windows:
        quality.insert(0, BASELINE_TOO_SHORT)
    return BaselineModel(
        names,
        order,
        float(beta[0]),
        tuple(float(c) for c in coefficients),
        tuple(float(c) for c in center),
        scale,
        stderr_sq,
        resid_scale,
        r_squared,
        n,
        tuple(quality),
    )
