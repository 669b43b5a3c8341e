"""Phase statistics of a single-bin cross-spectrum estimate, for the error of a PHAT time delay.

The PHAT-weighted cross-correlation keeps only the phase of each raw cross-spectrum bin
``conj(X_a) X_b``. With jointly Gaussian records of coherence ``gamma`` at that frequency, the
phase error ``theta`` of one bin (one "look") has the density of Lee, Hoppel, Mango & Miller
[1]_ (also Just & Bamler [2]_), from memory, checked in the tests against a direct simulation of
complex Gaussian pairs::

    p(theta) = (1 - g^2) / (2 pi (1 - b^2)) * [1 + b arccos(-b) / sqrt(1 - b^2)],  b = g cos(theta)

:func:`phase_moments` gives ``E[cos theta]`` and ``E[sin^2 theta]``, the two terms of the
first-order delay error of a phase-only correlation: its curvature at the peak is
``sum w^2 E[cos theta]`` and its slope error ``sum w^2 E[sin^2 theta]``. Knapp & Carter's PHAT
formula takes ``E[cos theta] = 1`` and ``E[sin^2 theta] = (1 - gamma^2) / (2 gamma^2)``, the
single-look Cramer-Rao bound. That is close at moderate coherence (``E[sin^2 theta]`` is 1.02x the
bound at ``gamma = 0.8``) but wrong at both ends: for ``gamma -> 0`` the moments tend to 0 and
1/2, so a bin of pure noise adds a bounded amount to the error, not the bound's unbounded one;
for ``gamma -> 1`` the density's heavy tails keep ``E[sin^2 theta]`` above the bound (1.7x at
``gamma = 0.9``, 3.9x at 0.99; by numerical integration of the density).

References
----------
.. [1] J.-S. Lee, K. W. Hoppel, S. A. Mango and A. R. Miller, "Intensity and phase statistics of
   multilook polarimetric and interferometric SAR imagery", IEEE Trans. Geosci. Remote Sens.
   32(5), 1017-1028, 1994.
.. [2] D. Just and R. Bamler, "Phase statistics of interferograms with applications to synthetic
   aperture radar", Applied Optics 33(20), 4361-4368, 1994.
"""

from __future__ import annotations

import functools
from typing import Tuple

import numpy as np

#: coherence magnitudes above this are taken as it (the phase error is then below 0.03 rad)
MAX_COHERENCE = 0.9995
#: points of the coherence table and of the phase grid it is integrated on (the phase density is
#: narrowest at MAX_COHERENCE, about 0.03 rad wide, i.e. about 80 grid steps)
_TABLE_POINTS = 400
_PHASE_POINTS = 16384


def single_look_phase_pdf(theta, coherence: float) -> np.ndarray:
    """Density of the phase error of one cross-spectrum bin with coherence magnitude ``coherence``.

    Parameters
    ----------
    theta : array_like
        Phase errors (rad), any real values (the density has period ``2 pi``).
    coherence : float
        ``|gamma|`` in ``[0, 1)``.

    Returns
    -------
    ndarray
        ``p(theta)`` of the module's formula (Lee et al. 1994).
    """
    g = float(coherence)
    if not 0.0 <= g < 1.0:
        raise ValueError(f"coherence={coherence!r}: must be in [0, 1)")
    b = g * np.cos(np.asarray(theta, dtype=float))
    root = np.sqrt(1.0 - b * b)
    return (1.0 - g * g) / (2.0 * np.pi * (1.0 - b * b)) * (1.0 + b * np.arccos(-b) / root)


@functools.lru_cache(maxsize=1)
def _moment_table() -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(gamma, E[cos theta], E[sin^2 theta])`` on a grid of ``gamma`` (trapezoid rule on a
    periodic grid: exact to round-off for this smooth periodic density)."""
    gamma = MAX_COHERENCE * np.sin(0.5 * np.pi * np.linspace(0.0, 1.0, _TABLE_POINTS))
    theta = np.linspace(-np.pi, np.pi, _PHASE_POINTS, endpoint=False)
    step = 2 * np.pi / _PHASE_POINTS
    cos, sin2 = np.cos(theta), np.sin(theta) ** 2
    mean_cos = np.empty(_TABLE_POINTS)
    mean_sin2 = np.empty(_TABLE_POINTS)
    for i, g in enumerate(gamma):
        p = single_look_phase_pdf(theta, g) * step
        mean_cos[i] = p @ cos
        mean_sin2[i] = p @ sin2
    for table in (gamma, mean_cos, mean_sin2):
        table.flags.writeable = False
    return gamma, mean_cos, mean_sin2


def phase_moments(coherence) -> Tuple[np.ndarray, np.ndarray]:
    """``E[cos theta]`` and ``E[sin^2 theta]`` of the single-look phase error.

    Parameters
    ----------
    coherence : array_like
        Signed coherence estimates (the real part of the aligned, normalised cross spectrum);
        ``E[cos theta]`` is extended as an odd function, so a noise estimate of either sign adds
        nothing on average; magnitudes above :data:`MAX_COHERENCE` are taken as it.

    Returns
    -------
    mean_cos, mean_sin2 : ndarray
        Same shape as ``coherence``.
    """
    c = np.asarray(coherence, dtype=float)
    gamma, mean_cos, mean_sin2 = _moment_table()
    g = np.minimum(np.abs(c), MAX_COHERENCE)
    return np.sign(c) * np.interp(g, gamma, mean_cos), np.interp(g, gamma, mean_sin2)
