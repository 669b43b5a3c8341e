"""Baseline model of an indicator, optionally compensated for covariates (temperature, speed).

Natural frequencies of a structure move with temperature and a machine's spectra with speed. The
baseline model predicts the indicator of a window from its window-averaged covariates with a
low-order polynomial fitted on the baseline windows; detection then runs on the residuals.

- No covariates: the prediction is the baseline median and the residual scale the normalised MAD
  (:func:`corrtransforms.numerics.robust.summarize_baseline`).
- With covariates: Huber M-regression (iteratively reweighted least squares with the MAD scale),
  on the covariates centred at their baseline medians; ``order = 2`` adds the squares
  (``[shifts] model = "quadratic"``); ``hinge=True`` (``model = "hinge"``) adds one term
  ``max(0, x_1 - knee)`` in the first covariate, with the knee found on the baseline by a grid
  search of the robust objective (:func:`hinge_knee`): a bilinear relation such as the
  stiffening of a bridge deck below 0 degC (Peeters & De Roeck 2001).
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
Hudson, D. J. (1966). Fitting segmented curves whose join points have to be estimated. JASA 61,
1097-1129 (the join point by minimising the residual objective over it; from memory).
Peeters, B. & De Roeck, G. (2001). One-year monitoring of the Z24-Bridge: environmental effects
versus damage events. Earthquake Engng Struct. Dyn. 30, 149-171 (a bilinear frequency-temperature
relation with its knee near 0 degC; from memory).
"""

from __future__ import annotations

import dataclasses
import math
from typing import List, Optional, Sequence, Tuple

import numpy as np
from scipy import optimize as _optimize
from scipy import special as _special
from scipy import stats as _stats

from corrtransforms.numerics.robust import BASELINE_TOO_SHORT, MAD_TO_SIGMA, net_scale, summarize_baseline

HUBER_T = 1.345
COVARIATE_MISSING = "covariate_missing"
COVARIATE_CONSTANT = "covariate_constant"
COVARIATE_MODEL_UNFITTED = "covariate_model_unfitted"
ORDERS = (1, 2)
KNEE_NOT_IN_BASELINE = "knee_not_in_baseline"
#: ``[shifts] model`` values and the (order, hinge) of each
MODELS = {"linear": (1, False), "quadratic": (2, False), "hinge": (1, True)}
#: a knee candidate has at least max(HINGE_MIN_SIDE, HINGE_SIDE_FRACTION * n) fitted windows on
#: each side (common practice: enough windows to fit a slope on either side)
HINGE_MIN_SIDE = 10
HINGE_SIDE_FRACTION = 0.10
#: knee candidates, evenly spaced between the lowest and highest admissible knee
HINGE_GRID = 41
#: level of the drop-in-dispersion test a knee must pass (see :func:`hinge_knee`)
HINGE_ALPHA = 0.01


def _huber_moments_ratio(t: float = HUBER_T) -> float:
    """``E[psi^2] / E[psi']`` of Huber's psi at the standard normal: the scale of the robust
    drop-in-dispersion statistic (Schrader & Hettmansperger 1980)."""
    slope = 2.0 * _special.ndtr(t) - 1.0
    density = math.exp(-0.5 * t * t) / math.sqrt(2.0 * math.pi)
    square = slope - 2.0 * t * density + 2.0 * t * t * _special.ndtr(-t)
    return float(square / slope)


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
        ``baseline_too_short``, ``covariate_constant``, ``covariate_model_unfitted``,
        ``knee_not_in_baseline``.
    knee : float or None
        Hinge model: the knee in units of the first covariate; ``coefficients`` then ends with
        the change of slope above it (``len(covariates) + 1`` values). None for the other models
        (and for a hinge model that fell back to linear).
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
    knee: Optional[float] = None

    @property
    def too_short(self) -> bool:
        return BASELINE_TOO_SHORT in self.quality

    @property
    def has_knee(self) -> bool:
        """True for a fitted hinge model (a finite knee)."""
        return self.knee is not None

    @property
    def hinge_slopes(self) -> Tuple[float, float]:
        """Slopes in the first covariate below and above the knee (equal without a knee)."""
        if not self.coefficients:
            return float("nan"), float("nan")
        below = float(self.coefficients[0])
        above = below + float(self.coefficients[len(self.covariates)]) if self.has_knee else below
        return below, above

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
        if self.knee is not None:
            terms = np.concatenate([terms, _hinge_term(centred[:, 0] + self.center[0], self.knee)], axis=1)
        expected = self.location + terms @ np.asarray(self.coefficients, dtype=float)
        return expected, missing


def _terms(centred: np.ndarray, order: int) -> np.ndarray:
    if order == 1:
        return centred
    return np.concatenate([centred, centred * centred], axis=1)


def _hinge_term(covariate: np.ndarray, knee: float) -> np.ndarray:
    """The column ``max(0, x - knee)`` (shape (n, 1))."""
    return np.maximum(np.asarray(covariate, dtype=float) - knee, 0.0)[:, None]


def huber_objective(residual, scale: float, t: float = HUBER_T) -> float:
    """``sum rho(r_i / s)`` with Huber's ``rho(u) = u^2 / 2`` for ``|u| <= t``, else
    ``t |u| - t^2 / 2`` (Huber 1981, Section 7.8, from memory)."""
    u = np.abs(np.asarray(residual, dtype=float)) / scale
    return float(np.sum(np.where(u <= t, 0.5 * u * u, t * u - 0.5 * t * t)))


def hinge_knee(covariate, response, other_terms: Optional[np.ndarray] = None) -> Optional[float]:
    """Knee of a hinge relation ``y = b_0 + b_1 x + c max(0, x - knee) [+ other terms]``.

    Parameters
    ----------
    covariate : array_like, shape (n,)
        The hinge covariate (finite).
    response : array_like, shape (n,)
        The indicator (finite).
    other_terms : ndarray, shape (n, q), optional
        Further regressors (the other covariates, centred).

    Returns
    -------
    float or None
        The knee, or None when the baseline does not reach one (the rule of
        ``knee_not_in_baseline``): fewer than ``2 * side + 4`` windows, no spread between the
        admissible knees, the smallest objective at the first or last candidate (no interior
        minimum: the knee lies outside the range, or within ``side`` windows of its ends), or a
        drop-in-dispersion statistic below the chi-square limit (the hinge does not fit
        significantly better than a line).

    Notes
    -----
    Profile search over the knee (Hudson 1966): for each candidate ``k`` the coefficients are
    the Huber M-estimate (:func:`huber_regression`) with the hinge column ``max(0, x - k)``, and
    the profile objective is ``sum rho(r_i(k) / s_0)`` (:func:`huber_objective`) with ``s_0``
    the MAD scale of the linear fit's residuals, one scale for every candidate so that the
    objectives compare. Candidates: :data:`HINGE_GRID` knees evenly spaced between the
    ``side``-th smallest and the ``side``-th largest covariate value,
    ``side = max(HINGE_MIN_SIDE, ceil(HINGE_SIDE_FRACTION * n))``, so every candidate has at
    least ``side`` windows on each side; the best grid knee is refined by a bounded scalar
    minimisation (``scipy.optimize.minimize_scalar``) between its two neighbours.

    Significance: ``S = 2 (Q_line - Q_hinge) E[psi'] / E[psi^2]``, the robust drop in
    dispersion (Schrader & Hettmansperger 1980; Hampel et al. 1986, Section 7.3, from memory),
    must exceed the ``1 - HINGE_ALPHA`` quantile of chi-square with 2 degrees of freedom (the
    slope change and the knee). The knee is not identified under a line, so the chi-square
    is an approximation; a simulation (uniform covariate, normal errors, 200 series each of
    60 and 400 windows; ``python -m benchmarks.bench_hinge --series 200``) gave 99th
    percentiles of the maximised S of 8.7 and 9.1 against the limit 9.21, and knees found in
    0 % and 1 % of the lines.

    References
    ----------
    Hudson (1966); Schrader, R. M. & Hettmansperger, T. P. (1980). Robust analysis of variance
    based upon a likelihood ratio criterion. Biometrika 67, 93-101 (from memory).
    """
    x = np.asarray(covariate, dtype=float)
    y = np.asarray(response, dtype=float)
    n = x.size
    others = np.zeros((n, 0)) if other_terms is None else np.asarray(other_terms, dtype=float).reshape(n, -1)
    side = max(HINGE_MIN_SIDE, math.ceil(HINGE_SIDE_FRACTION * n))
    if n < 2 * side + 4:
        return None
    ordered = np.sort(x)
    low, high = ordered[side - 1], ordered[n - side]
    if not high > low:
        return None
    linear = np.concatenate([np.ones((n, 1)), others, (x - np.median(x))[:, None]], axis=1)
    beta_line, scale, _ = huber_regression(linear, y)
    if not scale > 0:
        return None
    line_objective = huber_objective(y - linear @ beta_line, scale)

    def objective(knee: float) -> float:
        design = np.concatenate([linear, _hinge_term(x, knee)], axis=1)
        beta, _, _ = huber_regression(design, y)
        return huber_objective(y - design @ beta, scale)

    grid = np.linspace(low, high, HINGE_GRID)
    values = np.array([objective(k) for k in grid])
    best = int(np.argmin(values))
    if best in (0, grid.size - 1):
        return None
    refined = _optimize.minimize_scalar(
        objective, bounds=(grid[best - 1], grid[best + 1]), method="bounded", options={"xatol": 1e-6 * (high - low)}
    )
    knee, smallest = (
        (float(refined.x), float(refined.fun)) if refined.fun <= values[best] else (grid[best], values[best])
    )
    statistic = 2.0 * (line_objective - smallest) / _huber_moments_ratio()
    if statistic <= _stats.chi2.ppf(1.0 - HINGE_ALPHA, 2):
        return None
    return float(knee)


def fit_baseline_model(
    values,
    stderr,
    covariates: Optional[np.ndarray] = None,
    names: Sequence[str] = (),
    min_windows: int = 30,
    order: int = 1,
    hinge: bool = False,
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
    hinge : bool
        Add the hinge term ``max(0, x_1 - knee)`` in the first covariate (order 1 only), the
        knee from :func:`hinge_knee`; without a knee in the baseline the model stays linear
        with the quality code ``knee_not_in_baseline``.

    Returns
    -------
    BaselineModel

    Notes
    -----
    Model ``y_i = b_0 + sum_j b_j (x_ij - m_j) [+ sum_j c_j (x_ij - m_j)^2]
    [+ d max(0, x_i1 - knee)] + e_i`` with ``m_j`` the baseline median of covariate j, fitted
    by :func:`huber_regression`: below the knee the slope in x_1 is ``b_1``, above it
    ``b_1 + d``. A covariate that does not vary over the fitted windows is left out
    (coefficient 0, quality ``covariate_constant``). With fewer than ``terms + 3`` complete
    windows the median model of the usable windows is used instead (quality
    ``covariate_model_unfitted``).
    """
    if order not in ORDERS:
        raise ValueError(f"order = {order!r}: must be one of {ORDERS}")
    if hinge and order != 1:
        raise ValueError("a hinge model is linear in its covariates (order 1)")
    y = np.asarray(values, dtype=float)
    se = np.asarray(stderr, dtype=float)
    names = tuple(names)
    p = len(names)
    usable = np.isfinite(y) & np.isfinite(se)
    if p == 0 or covariates is None:
        return _median_model(y, se, usable, covariates, names, order, min_windows)
    x = np.asarray(covariates, dtype=float).reshape(len(y), p)
    complete = usable & np.isfinite(x).all(axis=1)
    n = int(complete.sum())
    if n < order * p + int(hinge) + 3:
        return _median_model(y, se, usable, covariates, names, order, min_windows, (COVARIATE_MODEL_UNFITTED,))
    yc, xc, sec = y[complete], x[complete], se[complete]
    center = np.median(xc, axis=0)
    terms = _terms(xc - center[None, :], order)
    quality: List[str] = []
    knee: Optional[float] = None
    if hinge:
        found = hinge_knee(xc[:, 0], yc, terms[:, 1:]) if np.ptp(xc[:, 0]) > 0 else None
        if found is None:
            quality.append(KNEE_NOT_IN_BASELINE)
        else:
            knee = found
            terms = np.concatenate([terms, _hinge_term(xc[:, 0], knee)], axis=1)
    coefficients, location, residual, constant = _robust_fit(yc, terms)
    quality[:0] = constant
    scale = MAD_TO_SIGMA * float(np.median(np.abs(residual - np.median(residual))))
    total = float(np.sum((yc - yc.mean()) ** 2))
    r_squared = 1.0 - float(np.sum(residual**2)) / total if total > 0 else float("nan")
    resid_scale, stderr_sq = net_scale(scale, sec)
    if n < min_windows:
        quality.insert(0, BASELINE_TOO_SHORT)
    return BaselineModel(
        names,
        order,
        location,
        tuple(float(c) for c in coefficients),
        tuple(float(c) for c in center),
        scale,
        stderr_sq,
        resid_scale,
        r_squared,
        n,
        tuple(quality),
        knee,
    )


def _robust_fit(y: np.ndarray, terms: np.ndarray) -> Tuple[np.ndarray, float, np.ndarray, List[str]]:
    """Huber fit of ``y`` on an intercept and the varying columns of ``terms``: coefficients
    (0 for a constant column), intercept, residuals and ``["covariate_constant"]`` when a
    column was left out."""
    varying = np.ptp(terms, axis=0) > 0
    design = np.concatenate([np.ones((len(y), 1)), terms[:, varying]], axis=1)
    beta, _, _ = huber_regression(design, y)
    coefficients = np.zeros(terms.shape[1])
    coefficients[varying] = beta[1:]
    return coefficients, float(beta[0]), y - design @ beta, [] if varying.all() else [COVARIATE_CONSTANT]


def _median_model(y, se, usable, covariates, names, order, min_windows, extra=()) -> BaselineModel:
    """The median/MAD model of the usable windows, with the covariates' baseline medians as
    centres (so a later window with a missing covariate is predicted as the others)."""
    p = len(names)
    summary = summarize_baseline(y[usable], se[usable], min_windows)
    centre = tuple(float("nan") for _ in names)
    if p and covariates is not None and len(y):
        x_all = np.asarray(covariates, dtype=float).reshape(len(y), p)[usable]
        centre = tuple(float(np.median(c[np.isfinite(c)])) if np.isfinite(c).any() else float("nan") for c in x_all.T)
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
