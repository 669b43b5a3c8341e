"""One window from samples to correlation results: stationarity screening, then correlation.

:func:`analyse_window` is what the correlate stage runs per window. It screens the window for
stationarity first (so that an excluded window costs no correlation), correlates it, and
merges the screening's findings into the result:

- every pair's quality gains the screening codes of its subject (``"nonstationary"`` and the
  "not screened" codes); an auto pair takes its channel's codes, a cross pair ``"a:b"`` the pair's
  (which already include either channel's flag);
- ``subject_quality`` carries the same codes for the indicators stage, and every mode takes the
  codes of its channel (each of its channels for a multi-channel mode), so a mode fitted on a
  flagged record is flagged too;
- the ``stationarity_p`` rows become ``extra_indicators``.

With ``[screening] action = "exclude"`` a flagged window yields no result, only its
``nonstationary_window`` reject: it is neither written nor fed to baselines and detectors.
"""

from __future__ import annotations

import dataclasses
from typing import Dict, List, Optional, Tuple

from corrtransforms.config import AssetConfig
from corrtransforms.numerics.correlation import pairs_by_name
from corrtransforms.records import WindowBlock, WindowCorrelation
from corrtransforms.rejects import Reject
from corrtransforms.stages.correlate import correlate_window
from corrtransforms.stages.screen import screen_window


def analyse_window(
    block: WindowBlock, config: AssetConfig, mode_references=None
) -> Tuple[Optional[WindowCorrelation], List[Reject]]:
    """Screen and correlate one window.

    Parameters
    ----------
    block : WindowBlock
        The window's samples and validity mask.
    config : AssetConfig
        ``[screening]``, ``[correlation]`` and ``[[modes]]``.
    mode_references : mapping, optional
        Baseline references of the multi-channel modes (:mod:`corrtransforms.stages.mode_reference`).

    Returns
    -------
    result : WindowCorrelation or None
        None when the window is excluded by screening.
    rejects : list of Reject
        The screening's ``nonstationary_window`` reject when excluded, else empty.
    """
    names = tuple(block.channels)
    screened = [(names[a], names[b]) for a, b in pairs_by_name(config.correlation.pairs, names)]
    screening = screen_window(block, config.screening, screened)
    if screening.excluded:
        return None, list(screening.rejects)
    result = correlate_window(block, config, mode_references=mode_references)
    codes: Dict[str, Tuple[str, ...]] = {s: tuple(q) for s, q in screening.subject_quality.items()}
    pairs = tuple(
        dataclasses.replace(p, quality=tuple(p.quality) + codes.get(p.subject, ())) if codes.get(p.subject) else p
        for p in result.pairs
    )
    subject_quality = {s: tuple(q) for s, q in result.subject_quality.items()}
    for subject, found in codes.items():
        subject_quality[subject] = subject_quality.get(subject, ()) + found
    for mode in config.modes:
        for channel in mode.channels or (mode.channel,):
            if codes.get(channel):
                subject_quality[mode.name] = subject_quality.get(mode.name, ()) + codes[channel]
    return dataclasses.replace(
        result,
        pairs=pairs,
        subject_quality=subject_quality,
        extra_indicators=tuple(result.extra_indicators) + tuple(screening.indicators),
    ), []
