"""Rejected, repaired and flagged input: one record per finding, with a stable reason code.

Nothing is lost silently. Every finding of every stage becomes a :class:`Reject` that lands in the
rejects table (stage, source, subject, reason, detail, action, window_start). ``action`` says what
the job did about it:

- ``"rejected"``: the data was not used. With ``subject == WHOLE_WINDOW`` a planned window produced
  no correlation rows; window accounting counts exactly these rows
  (windows planned = windows computed + windows rejected).
- ``"repaired"``: the data was used after a documented repair (duplicates dropped, rows sorted,
  timestamps snapped to the grid, non-finite samples masked as gaps).
- ``"flagged"``: the data was used and its rows carry a quality code (for example clipping).

Reason codes are stable snake_case strings; :data:`REASONS` documents each one and the README's
table is generated from it.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
from typing import Optional

WHOLE_WINDOW = "*"
WHOLE_FILE = "*"

ACTIONS = ("rejected", "repaired", "flagged")

#: reason code -> (default action, one-line description)
REASONS = {
    # files (stage "plan" or "read")
    "unreadable_file": ("rejected", "the file could not be opened or its Parquet footer could not be decoded"),
    "empty_file": ("rejected", "the file has zero bytes"),
    "no_rows": ("rejected", "valid Parquet with no rows"),
    "missing_time_column": ("rejected", "the configured time column is absent (renamed or missing)"),
    "time_column_not_timestamp": ("rejected", "the time column is not a timestamp type (for example strings)"),
    "missing_channel_column": ("rejected", "a configured channel is absent from the file"),
    "non_numeric_channel": ("rejected", "a channel column holds non-numeric values"),
    "statistics_missing": ("repaired", "row-group time statistics are absent; the time column was read to plan"),
    "file_time_mismatch": (
        "flagged",
        "the file holds samples before the start its name gives, or more than [archive] file_span_h after it; "
        "runs of other days may not open it",
    ),
    "sample_rate_mismatch": ("rejected", "the sample interval in the data differs from the nominal sample rate"),
    "overlapping_files": ("repaired", "two files hold samples of the same span; identical samples were kept once"),
    "decode_failed": ("rejected", "a row group could not be decoded while reading the window"),
    "statistics_mismatch": (
        "rejected",
        "a row group's timestamps disagree with its footer statistics; its rows were not used",
    ),
    "null_timestamps": ("rejected", "rows without a timestamp (null); they were not used"),
    # windows (stage "read")
    "insufficient_coverage": ("rejected", "fewer valid samples than [windows] min_coverage requires"),
    "duplicate_timestamps": ("repaired", "equal timestamps with equal values; kept once"),
    "conflicting_duplicates": ("rejected", "equal timestamps with different values"),
    "unordered_timestamps": ("repaired", "rows were out of time order; sorted"),
    "off_grid_timestamps": ("repaired", "timestamps off the nominal grid within tolerance; snapped"),
    "jitter_beyond_tolerance": ("repaired", "samples further from the grid than the tolerance were dropped as gaps"),
    "nonfinite_values": ("repaired", "NaN or inf samples were treated as gaps"),
    "flat_channel": ("rejected", "the channel does not vary in the window (dead sensor)"),
    "clipped_channel": ("flagged", "many samples sit at the channel's extreme values (saturation)"),
    # correlate / indicators / screening / shifts
    "no_valid_pairs": ("rejected", "no requested channel pair has enough valid samples"),
    "correlation_failed": ("rejected", "the estimator raised an error; detail holds it"),
    "nonstationary_window": ("rejected", 'stationarity screening failed and [screening] action = "exclude"'),
    "indicator_failed": ("rejected", "an indicator computation raised an error; detail holds it"),
    "duplicate_indicator_rows": (
        "rejected",
        "several indicator rows of one subject and indicator share a window start; only the first (sorted) was used",
    ),
    "duplicate_covariate_rows": (
        "rejected",
        "several covariate_mean rows of one covariate share a window start; the covariate was treated as missing",
    ),
    "window_before_state": (
        "rejected",
        "the window is not after the resumed state's last window; run a backfill to include it",
    ),
    "state_mismatch": (
        "rejected",
        "the resumed shift state was computed with other [baseline]/[shifts] settings; run a backfill",
    ),
    "baseline_sample_incomplete": (
        "rejected",
        "the resumed series is still in its baseline and the baseline_sample table lacks some of its "
        "windows (a lost partition); nightly --rebuild_state or a backfill restores it",
    ),
    "shift_detection_failed": ("rejected", "shift detection raised an error for the series; detail holds it"),
    "novelty_fit_failed": (
        "flagged",
        "the multivariate novelty model could not be fitted on its sample (detail holds why); the sample restarts",
    ),
}


_EPOCH = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)


def iso_utc(utc_us: int) -> str:
    """ISO-8601 text of a UTC instant (``source`` of window findings, and ``detail`` texts)."""
    instant = _EPOCH + _dt.timedelta(microseconds=int(utc_us))
    text = instant.isoformat(timespec="microseconds" if int(utc_us) % 1_000_000 else "seconds")
    return text.replace("+00:00", "Z")


@dataclasses.dataclass(frozen=True)
class Reject:
    """One finding for the rejects table.

    Attributes
    ----------
    stage : str
        Pipeline stage: "plan", "read", "correlate", "screen", "indicators", "shifts".
    source : str
        File path, or the window's ISO start time for window-level findings.
    subject : str
        Channel, "a:b" pair, mode name, or ``"*"`` for the whole file or window.
    reason : str
        A code from :data:`REASONS`.
    detail : str
        Human-readable specifics (counts, values, exception text).
    asset : str
        The asset's name (the Hive partition ``asset=``).
    window_start_us : int or None
        Window start (us since epoch, UTC) for window-level findings, else None.
    date : str or None
        ``YYYY-MM-DD`` partition for findings with no window (file-level); None derives it
        from ``window_start_us``.
    action : str or None
        One of :data:`ACTIONS`; None takes the reason's default.
    """

    stage: str
    source: str
    subject: str
    reason: str
    detail: str
    asset: str = ""
    window_start_us: Optional[int] = None
    date: Optional[str] = None
    action: Optional[str] = None

    def __post_init__(self):
        if self.reason not in REASONS:
            raise ValueError(f"unknown reason code {self.reason!r}; add it to corrtransforms.rejects.REASONS")
        if self.action is None:
            object.__setattr__(self, "action", REASONS[self.reason][0])
        elif self.action not in ACTIONS:
            raise ValueError(f"action {self.action!r} not one of {ACTIONS}")

    @classmethod
    def for_window(
        cls,
        asset: str,
        window_start_us: int,
        stage: str,
        reason: str,
        detail: str,
        subject: str = WHOLE_WINDOW,
        action: Optional[str] = None,
    ) -> Reject:
        """A finding of one window: ``source`` is the window's ISO start time.

        Parameters
        ----------
        asset : str
            The asset's name.
        window_start_us : int
            Window start, microseconds since the epoch (UTC).
        stage, reason, detail : str
            As the attributes of the same names.
        subject : str
            ``WHOLE_WINDOW`` (the default) for a finding of the whole window, else the channel,
            pair or mode concerned.
        action : str, optional
            None takes the reason's default action.
        """
        start = int(window_start_us)
        return cls(
            stage=stage,
            source=iso_utc(start),
            subject=subject,
            reason=reason,
            detail=detail,
            asset=asset,
            window_start_us=start,
            action=action,
        )

    @property
    def rejects_whole_window(self) -> bool:
        return self.action == "rejected" and self.subject == WHOLE_WINDOW and self.window_start_us is not None
