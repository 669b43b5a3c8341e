"""Healthy baseline of an indicator: its robust location and scale.

Which windows form the baseline (a period of calendar days or a count of windows) is decided by
the shifts stage (:func:`corrtransforms.stages.shifts.period_position`). The baseline's location
is the median and its scale the normalised median absolute deviation; fewer usable windows than
``[baseline] min_windows`` is the quality code ``baseline_too_short`` (the detectors then never
signal for that series).

Only numpy and scipy are used.

References
----------
Hampel, F. R. (1974). The influence curve and its role in robust estimation. JASA 69, 383-393.
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute deviation. JASA 88,
1273-1283 (the consistency factor 1/Phi^-1(3/4) = 1.4826).
"""

from __future__ import annotations

import dataclasses
from typing import Tuple

import numpy as np
from scipy import special as _special

#: consistency factor of the MAD for the normal distribution, 1 / Phi^-1(3/4) = 1.482602...
MAD_TO_SIGMA = float(1.0 / _special.ndtri(0.75))
BASELINE_TOO_SHORT = "baseline_too_short"


def robust_location_scale(values) -> Tuple[float, float, int]:
    """Median and normalised MAD of the finite values.

    Parameters
    ----------
    values : array_like
        Sample (NaN and inf are ignored).

    Returns
    -------
    location : float
        Median (NaN for an empty sample).
    scale : float
        ``1.4826 * median(|x - median(x)|)``, a consistent estimate of the standard deviation
        for normal data (NaN for an empty sample).
    n : int
        Number of finite values used.

    Notes
    -----
    ``sigma_hat = MAD / Phi^-1(3/4)``; breakdown point 50 %, so a few disturbed baseline
    windows cannot move the reference (Hampel 1974; Rousseeuw & Croux 1993, eq. 1).

    References
    ----------
    Rousseeuw & Croux (1993).

    Examples
    --------
    >>> robust_location_scale([1.0, 2.0, 3.0, 4.0, 100.0])
    (3.0, 1.482602218505602, 5)
    """
    x = np.asarray(values, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return float("nan"), float("nan"), 0
    location = float(np.median(x))
    scale = MAD_TO_SIGMA * float(np.median(np.abs(x - location)))
    return location, scale, int(x.size)


def net_scale(total_scale: float, stderr) -> Tuple[float, float]:
    """Scatter of the indicator net of the windows' own estimation error.

    Parameters
    ----------
    total_scale : float
        Robust scale of the baseline residuals (they include each window's estimation error).
    stderr : array_like
        Standard errors of the baseline windows.

    Returns
    -------
    resid_scale : float
        ``s_resid = sqrt(max(total_scale^2 - median(stderr^2), 0))``.
    stderr_sq : float
        ``median(stderr^2)`` (0 for an empty sample).

    Notes
    -----
    The baseline residual of a window is the sum of the indicator's own variability and the
    window's estimation error, whose variances add. The standardised residual
    ``z = r / sqrt(s_resid^2 + stderr^2)`` adds the window's own error back once, so an
    in-control window with a typical stderr has unit variance and a window whose estimate is
    poor (large stderr) has a small ``|z|`` (method-of-moments decomposition; medians keep it
    robust).
    """
    se = np.asarray(stderr, dtype=float)
    se = se[np.isfinite(se)]
    stderr_sq = float(np.median(se * se)) if se.size else 0.0
    if not np.isfinite(total_scale):
        return float("nan"), stderr_sq
    return float(np.sqrt(max(total_scale * total_scale - stderr_sq, 0.0))), stderr_sq


@dataclasses.dataclass(frozen=True)
class BaselineSummary:
    """Robust summary of a baseline sample (no covariates)."""

    location: float
    scale: float
    resid_scale: float
    stderr_sq: float
    n: int
    quality: Tuple[str, ...]


def summarize_baseline(values, stderr, min_windows: int) -> BaselineSummary:
    """Location, scale, net scale, count and quality of a baseline sample.

    Parameters
    ----------
    values, stderr : array_like
        Baseline windows' indicator values and standard errors.
    min_windows : int
        ``[baseline] min_windows``; fewer usable windows gives ``baseline_too_short``.

    Returns
    -------
    BaselineSummary
    """
    values = np.asarray(values, dtype=float)
    stderr = np.asarray(stderr, dtype=float)
    usable = np.isfinite(values) & np.isfinite(stderr)
    location, scale, n = robust_location_scale(values[usable])
    resid_scale, stderr_sq = net_scale(scale, stderr[usable])
    quality = (BASELINE_TOO_SHORT,) if n < min_windows else ()
    return BaselineSummary(location, scale, resid_scale, stderr_sq, n, quality)
