"""Tracking modes across windows: one identified pole per configured mode, chosen by frequency and shape.

Each configured mode (an *entry*) has a reference frequency and shape from the baseline. A
window offers candidate poles (:func:`~corrtransforms.numerics.multichannel_modes.identify_modes`).
Every entry-candidate pair has the cost

    cost = |f_candidate - f_entry| / f_entry + (1 - MAC(shape_candidate, shape_entry))

(relative frequency distance plus shape distance, equal weights: common practice), and the
assignment minimising the total cost with at most one pole per entry and one entry per pole is
found by the Hungarian method (``scipy.optimize.linear_sum_assignment``, [1]_). A pair is
*admissible* when the candidate lies in the entry's band (or within ``max_freq_distance`` of
its frequency) and its MAC reaches ``min_mac``; inadmissible pairs are never assigned. Because
each pole goes to one entry only, two entries with overlapping bands stay apart by shape.

Codes (:data:`QUALITY_CODES`) when an entry gets no pole, or holds a contested one.

References
----------
.. [1] H. W. Kuhn, "The Hungarian method for the assignment problem", Naval Research Logistics
   Quarterly 2, 83-97, 1955.
"""

from __future__ import annotations

import dataclasses
from typing import List, Optional, Tuple

import numpy as np
import scipy.optimize

from corrtransforms.numerics.mode_shapes import modal_assurance_criterion

#: candidates further than this relative distance from an entry's frequency are not its mode
#: when the entry has no band (common practice)
MAX_FREQ_DISTANCE = 0.05
#: candidates with a lower MAC to the entry's reference shape are not its mode (common practice)
MIN_MAC = 0.8
#: cost of an inadmissible pair (never chosen while an admissible one is left)
_INADMISSIBLE = 1e6

QUALITY_CODES = {
    "mode_not_found": "no candidate pole lies in the mode's band",
    "mode_pole_shared": "two entries claim one pole: the pole went to the entry of lower cost, the other is empty",
    "mode_low_mac": "every candidate in the band has a MAC to the reference shape below min_mac",
}


@dataclasses.dataclass(frozen=True)
class ModeAssignment:
    """Result of :func:`track_modes`.

    Attributes
    ----------
    candidate : ndarray of int, shape (n_entries,)
        Index of the pole assigned to each entry, -1 for none.
    cost, mac, freq_distance : ndarray, shape (n_entries,)
        Of the assigned pair (NaN for none); ``freq_distance`` is relative.
    quality : tuple of tuple of str
        Per entry, codes from :data:`QUALITY_CODES` (empty when assigned without contest).
    """

    candidate: np.ndarray
    cost: np.ndarray
    mac: np.ndarray
    freq_distance: np.ndarray
    quality: Tuple[Tuple[str, ...], ...]


def assignment_costs(reference_freq_hz, reference_shapes, candidate_freq_hz, candidate_shapes):
    """``(cost, relative frequency distance, MAC)``, each of shape (n_entries, n_candidates)."""
    f_ref = np.asarray(reference_freq_hz, dtype=float)
    f_can = np.asarray(candidate_freq_hz, dtype=float)
    distance = np.abs(f_can[None, :] - f_ref[:, None]) / f_ref[:, None]
    if len(f_can) == 0:
        empty = np.zeros((len(f_ref), 0))
        return empty, empty, empty
    mac = modal_assurance_criterion(np.atleast_2d(reference_shapes), np.atleast_2d(candidate_shapes))
    return distance + (1.0 - mac), distance, mac


def track_modes(
    reference_freq_hz,
    reference_shapes,
    candidate_freq_hz,
    candidate_shapes,
    bands_hz: Optional[np.ndarray] = None,
    max_freq_distance: float = MAX_FREQ_DISTANCE,
    min_mac: float = MIN_MAC,
) -> ModeAssignment:
    """Assign at most one candidate pole to each configured mode.

    Parameters
    ----------
    reference_freq_hz : array_like, shape (n_entries,)
    reference_shapes : array_like, shape (n_entries, n_channels)
    candidate_freq_hz : array_like, shape (n_candidates,)
    candidate_shapes : array_like, shape (n_candidates, n_channels)
    bands_hz : array_like, shape (n_entries, 2), optional
        Each entry's admissible frequencies (the configured band, widened as the search was).
        None means ``|df| / f <= max_freq_distance``.
    max_freq_distance, min_mac : float
        Defaults :data:`MAX_FREQ_DISTANCE`, :data:`MIN_MAC`.

    Returns
    -------
    ModeAssignment
        An entry without an admissible candidate gets ``mode_not_found`` (none in its band) or
        ``mode_low_mac`` (some in the band, none similar enough). When admissible candidates
        exist but every one went to other entries, the entry gets ``mode_pole_shared``, and so
        does each entry holding one of them.

    Examples
    --------
    Two entries 1.5 % apart: frequency alone would swap them, the shapes do not.

    >>> ref_f, ref_phi = [2.00, 2.03], [[1.0, 1.0, 0.0], [1.0, -1.0, 0.5]]
    >>> cand_f, cand_phi = [2.025, 2.005], [[1.0, 1.0, 0.05], [0.9, -1.0, 0.5]]
    >>> track_modes(ref_f, ref_phi, cand_f, cand_phi).candidate.tolist()
    [0, 1]
    """
    f_ref = np.asarray(reference_freq_hz, dtype=float)
    f_can = np.asarray(candidate_freq_hz, dtype=float)
    cost, distance, mac = assignment_costs(f_ref, reference_shapes, f_can, candidate_shapes)
    if bands_hz is None:
        in_band = distance <= max_freq_distance
    else:
        bands = np.asarray(bands_hz, dtype=float).reshape(len(f_ref), 2)
        in_band = (f_can[None, :] >= bands[:, :1]) & (f_can[None, :] <= bands[:, 1:])
    admissible = in_band & (mac >= min_mac)
    chosen = np.full(len(f_ref), -1)
    if admissible.any():
        rows, cols = scipy.optimize.linear_sum_assignment(np.where(admissible, cost, _INADMISSIBLE))
        for r, c in zip(rows, cols):
            if admissible[r, c]:
                chosen[r] = c
    quality = _assignment_quality(chosen, in_band, admissible)
    pick = np.maximum(chosen, 0)
    rows_all = np.arange(len(f_ref))

    def taken(values):
        return np.where(chosen >= 0, values[rows_all, pick], np.nan) if values.size else np.full(len(f_ref), np.nan)

    return ModeAssignment(chosen, taken(cost), taken(mac), taken(distance), quality)


def _assignment_quality(chosen, in_band, admissible) -> Tuple[Tuple[str, ...], ...]:
    codes: List[List[str]] = [[] for _ in range(len(chosen))]
    holder = {int(c): e for e, c in enumerate(chosen) if c >= 0}
    for e in range(len(chosen)):
        if chosen[e] >= 0:
            continue
        if not in_band[e].any():
            codes[e].append("mode_not_found")
        elif not admissible[e].any():
            codes[e].append("mode_low_mac")
        else:
            codes[e].append("mode_pole_shared")
            for c in np.nonzero(admissible[e])[0]:
                other = holder.get(int(c))
                if other is not None and "mode_pole_shared" not in codes[other]:
                    codes[other].append("mode_pole_shared")
    return tuple(tuple(c) for c in codes)
