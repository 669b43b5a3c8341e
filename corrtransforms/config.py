"""Asset configuration: one TOML file per monitored asset, validated before any pipeline starts.

:func:`load_config` reads the file, resolves relative paths against the file's own folder, fills
defaults and validates every key. An invalid value raises :class:`ConfigError` whose message names
the key, the value and what is allowed, for example::

    [windows] min_coverage = 1.5: must be a number in (0, 1]

The README's configuration reference lists every key with its default; this module is the source
of truth for both.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import logging
import math
import os
import re
import sys
from typing import Any, Dict, Mapping, Optional, Sequence, Tuple, Union

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from corrtransforms.numerics.correlation import DETRENDS, ESTIMATORS, WEIGHTINGS
from corrtransforms.numerics.correlation import PRECISIONS as TRANSFORM_PRECISIONS
from corrtransforms.numerics.covariate_model import MODELS as COVARIATE_MODELS
from corrtransforms.storage_precision import STORAGES
from corrtransforms.timeutil import FILE_TIME_FIELDS, compile_file_time_pattern

_LOG = logging.getLogger(__name__)

LAYOUTS = ("wide", "long")
ALIGNMENTS = ("epoch", "records")
#: default [windows] record_gap_s, in sample intervals: a longer pause between samples ends a record
RECORD_GAP_PERIODS = 2.0
SCREENING_ACTIONS = ("flag", "exclude")
DETECTORS = ("cusum", "ewma", "both")
#: indicator names of the indicators table (more may follow); "covariate_mean" rows carry the
#: window means of covariate channels and are inputs of compensation, never monitored themselves
INDICATOR_NAMES = (
    "rms",
    "corr_time_s",
    "decay_time_s",
    "mode_freq_hz",
    "mode_damping",
    "mode_mac",
    "lag_s",
    "peak_coef",
    "stationarity_p",
)
DEFAULT_MONITORED = ("rms", "corr_time_s", "decay_time_s", "mode_freq_hz", "mode_damping", "lag_s", "peak_coef")
ASSET_NAME_PATTERN = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
CHANNEL_NAME_PATTERN = re.compile(r"^[^:\x00-\x1f]{1,128}$")


class ConfigError(ValueError):
    """An invalid configuration: names the key, the value and what is allowed."""

    def __init__(self, key: str, value: Any, allowed: str):
        self.key = key
        self.value = value
        self.allowed = allowed
        super().__init__(f"{key} = {value!r}: {allowed}")


@dataclasses.dataclass(frozen=True)
class ArchiveConfig:
    path: str
    sample_rate_hz: float
    layout: str = "wide"
    time_column: str = "time"
    channel_column: str = "channel"
    value_column: str = "value"
    timezone: str = "UTC"
    #: strftime-like pattern of the start time in the files' names (None: names carry no time);
    #: matched against the last path parts (see corrtransforms.timeutil.compile_file_time_pattern)
    file_time_pattern: Optional[str] = None
    #: with file_time_pattern: a file holds no sample later than this many hours after its named start
    file_span_h: float = 24.0


@dataclasses.dataclass(frozen=True)
class ChannelsConfig:
    #: channels to correlate; None means every numeric column that is not time or a covariate
    names: Optional[Tuple[str, ...]] = None
    covariates: Tuple[str, ...] = ()
    units: Mapping[str, str] = dataclasses.field(default_factory=dict)
    #: covariate name -> time constant in hours of its trailing exponential mean (thermal inertia)
    smoothing_h: Mapping[str, float] = dataclasses.field(default_factory=dict)

    def unit(self, name: str) -> str:
        return self.units.get(name, "")


@dataclasses.dataclass(frozen=True)
class WindowsConfig:
    length_s: float = 600.0
    hop_s: float = 600.0
    min_coverage: float = 0.9
    #: "epoch": window starts offset_s + k * hop_s after the Unix epoch; "records": every
    #: contiguous record starts its own windows at its first sample
    align: str = "epoch"
    #: shift of the epoch grid in seconds, in [0, hop_s)
    offset_s: float = 0.0
    #: align = "records": a pause between samples longer than this ends a record (None: 2 sample
    #: intervals, resolved by the planner from the sample rate)
    record_gap_s: Optional[float] = None


@dataclasses.dataclass(frozen=True)
class CorrelationConfig:
    max_lag_s: float = 10.0
    #: "all", "auto", or a tuple of (a, b) channel pairs
    pairs: Union[str, Tuple[Tuple[str, str], ...]] = "all"
    estimator: str = "biased"
    detrend: str = "mean"
    weighting: str = "none"
    target_rel_error: float = 0.05
    #: how the correlations table stores its lag lists: "compact" (rounded, see
    #: corrtransforms.storage_precision) or "float32" (every bit)
    storage: str = "compact"
    #: precision of the per-channel block transforms and the lag sums taken from them:
    #: "float32" (the default: exact far below the standard errors and the stored precision)
    #: or "float64"; error sums, spectra for lag errors and every other figure stay float64
    transform_precision: str = "float32"


@dataclasses.dataclass(frozen=True)
class ModeConfig:
    """One ``[[modes]]`` entry: a single-channel mode (``channel``) or a multi-channel one
    (``channels``, identified from their correlation matrix; ``channel`` is then "")."""

    name: str
    channel: str
    band_hz: Tuple[float, float]
    #: two or more channels of a multi-channel mode (empty for a single-channel mode)
    channels: Tuple[str, ...] = ()
    #: the reference channels of the identification (default: all of ``channels``)
    reference_channels: Tuple[str, ...] = ()
    #: the reference shape that mode_mac compares with, one real component per channel
    #: (empty: the baseline reference shape, corrtransforms.stages.mode_reference)
    reference_shape: Tuple[float, ...] = ()

    @property
    def is_multichannel(self) -> bool:
        return bool(self.channels)


@dataclasses.dataclass(frozen=True)
class BaselineConfig:
    start: Optional[_dt.date] = None
    end: Optional[_dt.date] = None
    #: count of windows from the first one; used when start/end are not given
    windows: Optional[int] = None
    #: fewer baseline windows than this is a quality code ("baseline_too_short"), not an alarm
    min_windows: int = 30

    @property
    def by_dates(self) -> bool:
        return self.start is not None


@dataclasses.dataclass(frozen=True)
class ScreeningConfig:
    enabled: bool = True
    segments: int = 20
    alpha: float = 0.05
    action: str = "flag"


@dataclasses.dataclass(frozen=True)
class ShiftsConfig:
    detector: str = "both"
    cusum_k: float = 0.5
    cusum_h: float = 10.0
    ewma_lambda: float = 0.1
    ewma_L: float = 4.3
    #: covariates regressed out of each indicator; None means all configured covariates
    compensate: Optional[Tuple[str, ...]] = None
    #: indicators the detectors run on (the others are still written to the indicators table)
    indicators: Tuple[str, ...] = DEFAULT_MONITORED
    #: false alarms per asset and year the detectors may raise on healthy series: CUSUM h and
    #: EWMA L are chosen from it per series (None: the configured h and L)
    false_alarms_per_year: Optional[float] = None
    #: which of "cusum_h" and "ewma_L" the file gives explicitly (they win over the budget)
    explicit_limits: Tuple[str, ...] = ()
    #: covariate model: "linear", "quadratic" or "hinge" (a knee in the first compensated covariate)
    model: str = "linear"
    #: a novelty model across the asset's monitored series (Hotelling T^2 and SPE of their
    #: standardised residuals, corrtransforms.stages.novelty), charted as indicators of subject = the asset
    multivariate: bool = False
    #: windows with every series' residual usable that the novelty model is fitted on; the
    #: charts of the two novelty indicators take as many windows as their own baseline
    multivariate_windows: int = 100


@dataclasses.dataclass(frozen=True)
class CovariateSourceConfig:
    """One ``[[covariate_sources]]`` entry: covariates kept in another archive (a weather
    station, a control system), each sampled on its own clock and joined to every window as the
    time-weighted mean of its piecewise-linear signal
    (:func:`corrtransforms.numerics.covariate_join.time_weighted_window_means`)."""

    path: str
    #: the covariates it provides (wide: column names; long: values of channel_column)
    names: Tuple[str, ...]
    layout: str = "wide"
    time_column: str = "time"
    channel_column: str = "channel"
    value_column: str = "value"
    #: how naive (zone-less) timestamps are read
    timezone: str = "UTC"
    #: covariate name -> time constant in hours of its trailing exponential mean
    smoothing_h: Mapping[str, float] = dataclasses.field(default_factory=dict)
    #: longest interval between two samples that is interpolated; a longer one is a gap
    max_gap_s: float = 900.0
    #: smallest covered fraction of a window for a mean (else NaN: covariate_missing)
    min_coverage: float = 0.5


@dataclasses.dataclass(frozen=True)
class ReadingConfig:
    #: target size of one read task in bytes of decoded samples
    task_bytes: int = 32 * 2**20
    #: a timestamp within this fraction of a sample period of a grid point is snapped onto it
    grid_tolerance: float = 0.25
    #: a channel with at least this fraction of its samples at its extreme values is "clipped"
    clip_fraction: float = 0.01


@dataclasses.dataclass(frozen=True)
class AssetConfig:
    name: str
    archive: ArchiveConfig
    channels: ChannelsConfig = ChannelsConfig()
    windows: WindowsConfig = WindowsConfig()
    correlation: CorrelationConfig = CorrelationConfig()
    modes: Tuple[ModeConfig, ...] = ()
    baseline: BaselineConfig = BaselineConfig()
    screening: ScreeningConfig = ScreeningConfig()
    shifts: ShiftsConfig = ShiftsConfig()
    reading: ReadingConfig = ReadingConfig()
    #: ``[asset] timezone``: the calendar day a window belongs to (partitions, --date, baselines);
    #: naive timestamps are read in ``archive.timezone``
    timezone: str = "UTC"
    #: ``[[covariate_sources]]``: covariates read from other archives
    covariate_sources: Tuple[CovariateSourceConfig, ...] = ()
    #: the file the configuration was read from ("" when built in code)
    source: str = ""
    #: messages about the configuration that are not errors (deprecated forms still accepted)
    notes: Tuple[str, ...] = ()

    def covariate_smoothing_h(self) -> Dict[str, float]:
        """Time constant (hours) of each smoothed covariate (``[channels] smoothing_h`` and the
        ``smoothing_h`` of every ``[[covariate_sources]]`` entry; the names never overlap)."""
        merged = dict(self.channels.smoothing_h)
        for source in self.covariate_sources:
            merged.update(source.smoothing_h)
        return dict(sorted(merged.items()))

    def covariate_names(self) -> Tuple[str, ...]:
        """Every covariate of the asset: ``[channels] covariates`` (in the archive), then the
        names of each ``[[covariate_sources]]`` entry in file order."""
        return tuple(self.channels.covariates) + tuple(n for s in self.covariate_sources for n in s.names)

    def compensated_covariates(self) -> Tuple[str, ...]:
        if self.shifts.compensate is None:
            return self.covariate_names()
        return tuple(self.shifts.compensate)

    def as_dict(self) -> Dict[str, Any]:
        """Plain, JSON-serialisable form (dates as ISO strings), without ``source`` and ``notes``."""

        def plain(value):
            if dataclasses.is_dataclass(value):
                return {
                    f.name: plain(getattr(value, f.name))
                    for f in dataclasses.fields(value)
                    if f.name not in ("source", "notes")
                    # no sources: the digest of every configuration written before the section existed
                    and not (f.name == "covariate_sources" and not getattr(value, f.name))
                }
            if isinstance(value, (list, tuple)):
                return [plain(v) for v in value]
            if isinstance(value, Mapping):
                return {str(k): plain(v) for k, v in sorted(value.items())}
            if isinstance(value, _dt.date):
                return value.isoformat()
            return value

        return plain(self)

    def digest(self) -> str:
        """SHA-256 of the canonical JSON of the resolved configuration (provenance)."""
        text = json.dumps(self.as_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------------------------
# Validation helpers

_KNOWN = {
    "asset": {"name", "timezone"},
    "archive": {
        "path",
        "layout",
        "time_column",
        "channel_column",
        "value_column",
        "sample_rate_hz",
        "timezone",
        "file_time_pattern",
        "file_span_h",
    },
    "channels": {"names", "covariates", "units", "smoothing_h"},
    "windows": {"length_s", "hop_s", "min_coverage", "align", "offset_s", "record_gap_s"},
    "correlation": {
        "max_lag_s",
        "pairs",
        "estimator",
        "detrend",
        "weighting",
        "target_rel_error",
        "storage",
        "transform_precision",
    },
    "modes": {"name", "channel", "channels", "reference_channels", "reference_shape", "band_hz"},
    "baseline": {"start", "end", "windows", "min_windows"},
    "screening": {"enabled", "segments", "alpha", "action"},
    "shifts": {
        "detector",
        "cusum_k",
        "cusum_h",
        "ewma_lambda",
        "ewma_L",
        "compensate",
        "indicators",
        "false_alarms_per_year",
        "model",
        "multivariate",
        "multivariate_windows",
    },
    "reading": {"task_bytes", "grid_tolerance", "clip_fraction"},
    "covariate_sources": {
        "path",
        "layout",
        "time_column",
        "channel_column",
        "value_column",
        "timezone",
        "names",
        "smoothing_h",
        "max_gap_s",
        "min_coverage",
    },
}


def _number(key, value, *, low=None, high=None, low_open=False, high_open=False, integer=False):
    kind = "an integer" if integer else "a number"
    ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok_type or value != value:
        raise ConfigError(key, value, f"must be {kind}")
    lo = "(" if low_open else "["
    hi = ")" if high_open else "]"
    rng = f"{lo}{'-inf' if low is None else low}, {'inf' if high is None else high}{hi}"
    if low is not None and (value < low or (low_open and value == low)):
        raise ConfigError(key, value, f"must be {kind} in {rng}")
    if high is not None and (value > high or (high_open and value == high)):
        raise ConfigError(key, value, f"must be {kind} in {rng}")
    if value in (float("inf"), float("-inf")):
        raise ConfigError(key, value, f"must be a finite {kind[2:] if kind.startswith('a ') else kind}")
    return int(value) if integer else float(value)


def _choice(key, value, allowed: Sequence[str]):
    if value not in allowed:
        raise ConfigError(key, value, "must be one of " + ", ".join(f'"{a}"' for a in allowed))
    return value


def _string(key, value, pattern=None, what="a non-empty string"):
    if not isinstance(value, str) or not value or (pattern is not None and not pattern.match(value)):
        raise ConfigError(key, value, f"must be {what}")
    return value


def _string_list(key, value, pattern=CHANNEL_NAME_PATTERN):
    if not isinstance(value, list) or not all(isinstance(v, str) and pattern.match(v) for v in value):
        raise ConfigError(key, value, "must be a list of channel names (no ':' or control characters)")
    if len(set(value)) != len(value):
        raise ConfigError(key, value, "must not repeat a name")
    return tuple(value)


def _date(key, value):
    if isinstance(value, _dt.datetime):
        return value.date()
    if isinstance(value, _dt.date):
        return value
    if isinstance(value, str):
        try:
            return _dt.date.fromisoformat(value)
        except ValueError:
            pass
    raise ConfigError(key, value, "must be a date YYYY-MM-DD")


def _section(raw: Mapping[str, Any], name: str, required=False) -> Mapping[str, Any]:
    value = raw.get(name)
    if value is None:
        if required:
            raise ConfigError(f"[{name}]", None, "this section is required")
        return {}
    if not isinstance(value, Mapping):
        raise ConfigError(f"[{name}]", value, "must be a table")
    unknown = sorted(set(value) - _KNOWN[name])
    if unknown:
        raise ConfigError(
            f"[{name}] {unknown[0]}",
            value[unknown[0]],
            "is not a known key; known keys: " + ", ".join(sorted(_KNOWN[name])),
        )
    return value


def _resolve_path(path: str, base_dir: str) -> str:
    if "://" in path or os.path.isabs(path) or not base_dir:
        return path
    return os.path.normpath(os.path.join(base_dir, path))


def _timezone(key, value):
    import zoneinfo

    if not isinstance(value, str):
        raise ConfigError(key, value, 'must be an IANA time zone name such as "UTC" or "Europe/Vienna"')
    try:
        zoneinfo.ZoneInfo(value)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ConfigError(key, value, 'must be an IANA time zone name such as "UTC" or "Europe/Vienna"') from None
    return value


def parse_config(raw: Mapping[str, Any], base_dir: str = "", source: str = "") -> AssetConfig:
    """Validate a parsed TOML mapping and build an :class:`AssetConfig`.

    Parameters
    ----------
    raw : mapping
        The TOML document as returned by ``tomllib.loads``.
    base_dir : str
        Folder against which relative ``[archive] path`` values resolve ("" leaves them as given).
    source : str
        Where the configuration came from, kept for messages.

    Raises
    ------
    ConfigError
        On the first invalid key, naming the key, the value and what is allowed. Sections are
        checked in the order asset, archive, channels, windows, correlation, modes,
        covariate_sources, baseline, screening, shifts, reading (one parser per section).
    """
    unknown = sorted(set(raw) - set(_KNOWN))
    if unknown:
        raise ConfigError(
            f"[{unknown[0]}]", "...", "is not a known section; known sections: " + ", ".join(sorted(_KNOWN))
        )
    name = _parse_asset(raw)
    archive = _parse_archive(raw, base_dir)
    timezone, notes = _calendar_timezone(raw, archive)
    channels = _parse_channels(raw)
    windows = _parse_windows(raw, archive)
    correlation = _parse_correlation(raw, windows, channels)
    modes = _parse_modes(raw, archive, channels)
    sources = _parse_covariate_sources(raw, base_dir, channels, modes)
    return AssetConfig(
        name=name,
        archive=archive,
        channels=channels,
        windows=windows,
        correlation=correlation,
        modes=modes,
        baseline=_parse_baseline(raw),
        screening=_parse_screening(raw),
        shifts=_parse_shifts(raw, channels, sources),
        reading=_parse_reading(raw),
        covariate_sources=sources,
        timezone=timezone,
        source=source,
        notes=notes,
    )


def _parse_asset(raw: Mapping[str, Any]) -> str:
    """``[asset]``: the asset's name."""
    asset = _section(raw, "asset", required=True)
    return _string(
        "[asset] name",
        asset.get("name"),
        ASSET_NAME_PATTERN,
        "1-64 letters, digits, '-' or '_' (it becomes a folder name)",
    )


def _calendar_timezone(raw: Mapping[str, Any], archive: ArchiveConfig) -> Tuple[str, Tuple[str, ...]]:
    """``[asset] timezone`` (calendar days) and the notes about it.

    Before the key existed, ``[archive] timezone`` set both how naive timestamps are read and the
    calendar day of a window. A file that gives ``[archive] timezone`` but no ``[asset] timezone``
    keeps that meaning (same partitions, dates and baselines as before), with a note and a logged
    warning that asks for the explicit key.
    """
    asset = raw.get("asset") or {}
    if "timezone" in asset:
        return _timezone("[asset] timezone", asset["timezone"]), ()
    arch = raw.get("archive") or {}
    if "timezone" not in arch or archive.timezone == "UTC":
        return "UTC", ()
    note = (
        f"[archive] timezone = {archive.timezone!r} also sets the calendar day of windows (partitions, "
        f"--date, baselines) because [asset] timezone is not given; this fallback is deprecated: "
        f"add [asset] timezone = {archive.timezone!r} to keep today's days"
    )
    _LOG.warning(note)
    return archive.timezone, (note,)


def _parse_archive(raw: Mapping[str, Any], base_dir: str) -> ArchiveConfig:
    """``[archive]``: where the samples are and how the files are laid out."""
    arch = _section(raw, "archive", required=True)
    if "path" not in arch:
        raise ConfigError("[archive] path", None, "is required: a folder, a glob or a Beam filesystem URL")
    if "sample_rate_hz" not in arch:
        raise ConfigError("[archive] sample_rate_hz", None, "is required: the nominal sample rate in Hz")
    return ArchiveConfig(
        path=_resolve_path(_string("[archive] path", arch["path"]), base_dir),
        layout=_choice("[archive] layout", arch.get("layout", "wide"), LAYOUTS),
        time_column=_string("[archive] time_column", arch.get("time_column", "time")),
        channel_column=_string("[archive] channel_column", arch.get("channel_column", "channel")),
        value_column=_string("[archive] value_column", arch.get("value_column", "value")),
        sample_rate_hz=_number("[archive] sample_rate_hz", arch["sample_rate_hz"], low=0, low_open=True),
        timezone=_timezone("[archive] timezone", arch.get("timezone", "UTC")),
        file_time_pattern=_file_time_pattern(arch),
        file_span_h=_file_span_h(arch),
    )


def _file_time_pattern(arch: Mapping[str, Any]) -> Optional[str]:
    """``[archive] file_time_pattern``: None, or a pattern :func:`compile_file_time_pattern` accepts."""
    if "file_time_pattern" not in arch:
        return None
    text = arch["file_time_pattern"]
    if not isinstance(text, str):
        raise ConfigError("[archive] file_time_pattern", text, f"must be a string such as {_PATTERN_EXAMPLE}")
    try:
        compile_file_time_pattern(text)
    except ValueError as err:
        raise ConfigError(
            "[archive] file_time_pattern",
            text,
            f"{err}; fields {' '.join('%' + f for f in FILE_TIME_FIELDS)}, * (any characters but /), %% "
            f"and literal characters, e.g. {_PATTERN_EXAMPLE}",
        ) from None
    return text


_PATTERN_EXAMPLE = '"site_%Y%m%d_%H%M.parquet" or "%Y-%m-%d/%H.parquet"'


def _file_span_h(arch: Mapping[str, Any]) -> float:
    """``[archive] file_span_h`` (hours, > 0; only with ``file_time_pattern``)."""
    if "file_span_h" not in arch:
        return 24.0
    if "file_time_pattern" not in arch:
        raise ConfigError(
            "[archive] file_span_h", arch["file_span_h"], "is used only with [archive] file_time_pattern; give both"
        )
    return _number("[archive] file_span_h", arch["file_span_h"], low=0, low_open=True)


def _parse_channels(raw: Mapping[str, Any]) -> ChannelsConfig:
    """``[channels]``: correlated channels, covariates and units."""
    ch = _section(raw, "channels")
    names = _string_list("[channels] names", ch["names"]) if "names" in ch else None
    covariates = _string_list("[channels] covariates", ch.get("covariates", []))
    units = ch.get("units", {})
    if not isinstance(units, Mapping) or not all(isinstance(v, str) for v in units.values()):
        raise ConfigError("[channels] units", units, 'must be a table of channel name = "unit"')
    if names is not None:
        both = sorted(set(names) & set(covariates))
        if both:
            raise ConfigError(
                "[channels] covariates",
                list(covariates),
                f"must not repeat a correlated channel ({both[0]!r} is in names too)",
            )
    if not names and names is not None:
        raise ConfigError("[channels] names", [], "must list at least one channel, or be omitted for all")
    smoothing = _smoothing_h("[channels] smoothing_h", ch.get("smoothing_h", {}), covariates)
    return ChannelsConfig(names=names, covariates=covariates, units=dict(units), smoothing_h=smoothing)


def _smoothing_h(key: str, value: Any, covariates: Tuple[str, ...]) -> Dict[str, float]:
    """``smoothing_h = {covariate = hours}``: a table of covariate names to time constants > 0."""
    if not isinstance(value, Mapping):
        raise ConfigError(key, value, "must be a table {covariate name = time constant in hours}")
    for name in value:
        if name not in covariates:
            raise ConfigError(f"{key}.{name}", value[name], f"names no covariate; covariates: {list(covariates)}")
    return {name: _number(f"{key}.{name}", hours, low=0, low_open=True) for name, hours in sorted(value.items())}


def _parse_windows(raw: Mapping[str, Any], archive: ArchiveConfig) -> WindowsConfig:
    """``[windows]``: length, hop, minimum coverage (a whole number of samples per window) and
    alignment (epoch grid with an offset, or record starts)."""
    win = _section(raw, "windows")
    length_s = _number("[windows] length_s", win.get("length_s", 600.0), low=0, low_open=True)
    hop_s = _number("[windows] hop_s", win.get("hop_s", length_s), low=0, low_open=True)
    if hop_s > length_s:
        raise ConfigError("[windows] hop_s", hop_s, f"must be at most length_s ({length_s})")
    align = _choice("[windows] align", win.get("align", "epoch"), ALIGNMENTS)
    offset_s = _number("[windows] offset_s", win.get("offset_s", 0.0), low=0, high=hop_s, high_open=True)
    if offset_s and align == "records":
        raise ConfigError(
            "[windows] offset_s", offset_s, 'must be 0 with align = "records" (record starts fix the windows)'
        )
    record_gap_s = (
        _number("[windows] record_gap_s", win["record_gap_s"], low=0, low_open=True) if "record_gap_s" in win else None
    )
    windows = WindowsConfig(
        length_s=length_s,
        hop_s=hop_s,
        min_coverage=_number("[windows] min_coverage", win.get("min_coverage", 0.9), low=0, high=1, low_open=True),
        align=align,
        offset_s=offset_s,
        record_gap_s=record_gap_s,
    )
    n_per_window = length_s * archive.sample_rate_hz
    if abs(n_per_window - round(n_per_window)) > 1e-6 or n_per_window < 16:
        raise ConfigError(
            "[windows] length_s",
            length_s,
            f"must hold a whole number (>= 16) of samples at {archive.sample_rate_hz} Hz",
        )
    return windows


def _parse_correlation(raw: Mapping[str, Any], windows: WindowsConfig, channels: ChannelsConfig) -> CorrelationConfig:
    """``[correlation]``: maximum lag, pairs, estimator, detrending, weighting, target error."""
    cor = _section(raw, "correlation")
    length_s = windows.length_s
    max_lag_s = _number("[correlation] max_lag_s", cor.get("max_lag_s", min(10.0, length_s / 10)), low=0, low_open=True)
    if max_lag_s >= length_s / 2:
        raise ConfigError(
            "[correlation] max_lag_s", max_lag_s, f"must be below half the window length ({length_s / 2} s)"
        )
    return CorrelationConfig(
        max_lag_s=max_lag_s,
        pairs=_parse_pairs(cor.get("pairs", "all"), channels.names),
        estimator=_choice("[correlation] estimator", cor.get("estimator", "biased"), ESTIMATORS),
        detrend=_choice("[correlation] detrend", cor.get("detrend", "mean"), DETRENDS),
        weighting=_choice("[correlation] weighting", cor.get("weighting", "none"), WEIGHTINGS),
        target_rel_error=_number(
            "[correlation] target_rel_error",
            cor.get("target_rel_error", 0.05),
            low=0,
            high=1,
            low_open=True,
            high_open=True,
        ),
        storage=_choice("[correlation] storage", cor.get("storage", "compact"), STORAGES),
        transform_precision=_choice(
            "[correlation] transform_precision", cor.get("transform_precision", "float32"), TRANSFORM_PRECISIONS
        ),
    )


def _parse_pairs(pairs_raw: Any, names: Optional[Tuple[str, ...]]):
    """``[correlation] pairs``: "all", "auto" or a tuple of (a, b) pairs of configured channels."""
    if isinstance(pairs_raw, str):
        return _choice("[correlation] pairs", pairs_raw, ("all", "auto"))
    if (
        isinstance(pairs_raw, list)
        and pairs_raw
        and all(isinstance(p, list) and len(p) == 2 and all(isinstance(c, str) for c in p) for p in pairs_raw)
    ):
        pairs = tuple((p[0], p[1]) for p in pairs_raw)
        if names is not None:
            for p in pairs:
                for c in p:
                    if c not in names:
                        raise ConfigError(
                            "[correlation] pairs", pairs_raw, f"names channel {c!r}, which is not in [channels] names"
                        )
        return pairs
    raise ConfigError("[correlation] pairs", pairs_raw, 'must be "all", "auto" or a list of [a, b] channel pairs')


def _parse_modes(raw: Mapping[str, Any], archive: ArchiveConfig, channels: ChannelsConfig) -> Tuple[ModeConfig, ...]:
    """``[[modes]]``: named modes, each a channel and a frequency band below Nyquist."""
    modes_raw = raw.get("modes", [])
    if not isinstance(modes_raw, list):
        raise ConfigError("[[modes]]", modes_raw, "must be an array of tables ([[modes]])")
    modes = tuple(_parse_mode(i, m, archive, channels) for i, m in enumerate(modes_raw))
    if len({m.name for m in modes}) != len(modes):
        raise ConfigError("[[modes]] name", [m.name for m in modes], "must be unique")
    return modes


def _parse_mode(i: int, m: Any, archive: ArchiveConfig, channels: ChannelsConfig) -> ModeConfig:
    """One ``[[modes]]`` table (``i`` counts from 0; messages count from 1)."""
    where = f"[[modes]] #{i + 1}"
    if not isinstance(m, Mapping):
        raise ConfigError(where, m, "must be a table")
    unknown = sorted(set(m) - _KNOWN["modes"])
    if unknown:
        raise ConfigError(
            f"{where} {unknown[0]}",
            m[unknown[0]],
            "is not a known key; known keys: " + ", ".join(sorted(_KNOWN["modes"])),
        )
    mname = _string(f"{where} name", m.get("name"), CHANNEL_NAME_PATTERN, "a name (no ':')")
    band = _mode_band(where, m.get("band_hz"), archive)
    if ("channel" in m) == ("channels" in m):
        raise ConfigError(
            f"{where} channel / channels",
            {k: m[k] for k in ("channel", "channels") if k in m},
            "give exactly one: channel (one channel) or channels (a list of two or more)",
        )
    if "channel" in m:
        for key in ("reference_channels", "reference_shape"):
            if key in m:
                raise ConfigError(f"{where} {key}", m[key], "is allowed only with channels = [...], not with channel")
        mchan = _string(f"{where} channel", m.get("channel"), CHANNEL_NAME_PATTERN, "a channel name")
        _configured_channel(f"{where} channel", mchan, channels)
        return ModeConfig(mname, mchan, band)
    return _multichannel_mode(where, mname, band, m, channels)


def _mode_band(where: str, band: Any, archive: ArchiveConfig) -> Tuple[float, float]:
    if (
        not isinstance(band, list)
        or len(band) != 2
        or not all(isinstance(b, (int, float)) and not isinstance(b, bool) for b in band)
        or not 0 < band[0] < band[1]
    ):
        raise ConfigError(f"{where} band_hz", band, "must be [low, high] in Hz with 0 < low < high")
    nyquist = archive.sample_rate_hz / 2
    if band[1] >= nyquist:
        raise ConfigError(f"{where} band_hz", band, f"must lie below the Nyquist frequency ({nyquist} Hz)")
    return float(band[0]), float(band[1])


def _configured_channel(key: str, name: str, channels: ChannelsConfig) -> None:
    if channels.names is not None and name not in channels.names:
        raise ConfigError(key, name, "must be one of [channels] names: " + ", ".join(channels.names))


def _multichannel_mode(where: str, mname: str, band, m: Mapping[str, Any], channels: ChannelsConfig) -> ModeConfig:
    """``channels`` (two or more), ``reference_channels`` (a subset) and ``reference_shape``."""
    listed = _string_list(f"{where} channels", m["channels"])
    if len(listed) < 2:
        raise ConfigError(f"{where} channels", m["channels"], "must list two or more channels (one: use channel)")
    for name in listed:
        _configured_channel(f"{where} channels", name, channels)
    references = listed
    if "reference_channels" in m:
        references = _string_list(f"{where} reference_channels", m["reference_channels"])
        outside = [r for r in references if r not in listed]
        if not references or outside:
            raise ConfigError(
                f"{where} reference_channels",
                m["reference_channels"],
                "must be a non-empty subset of the entry's channels: " + ", ".join(listed),
            )
    shape: Tuple[float, ...] = ()
    if "reference_shape" in m:
        raw = m["reference_shape"]
        if (
            not isinstance(raw, list)
            or len(raw) != len(listed)
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in raw)
            or not any(v != 0 for v in raw)
        ):
            raise ConfigError(
                f"{where} reference_shape",
                raw,
                f"must be {len(listed)} finite real numbers (one per channel, in the order of channels), not all 0",
            )
        shape = tuple(float(v) for v in raw)
    return ModeConfig(mname, "", band, channels=listed, reference_channels=references, reference_shape=shape)


def _parse_baseline(raw: Mapping[str, Any]) -> BaselineConfig:
    """``[baseline]``: start and end dates, or a count of windows (default 100)."""
    base = _section(raw, "baseline")
    b_start = _date("[baseline] start", base["start"]) if "start" in base else None
    b_end = _date("[baseline] end", base["end"]) if "end" in base else None
    if (b_start is None) != (b_end is None):
        raise ConfigError(
            "[baseline] start" if b_start is None else "[baseline] end", None, "start and end must be given together"
        )
    if b_start is not None and b_end is not None and b_end < b_start:
        raise ConfigError("[baseline] end", b_end.isoformat(), f"must not be before start ({b_start})")
    b_windows = _number("[baseline] windows", base["windows"], low=2, integer=True) if "windows" in base else None
    if b_windows is not None and b_start is not None:
        raise ConfigError("[baseline] windows", b_windows, "give either start/end or windows, not both")
    if b_windows is None and b_start is None:
        b_windows = 100
    return BaselineConfig(
        start=b_start,
        end=b_end,
        windows=b_windows,
        min_windows=_number("[baseline] min_windows", base.get("min_windows", 30), low=2, integer=True),
    )


def _parse_screening(raw: Mapping[str, Any]) -> ScreeningConfig:
    """``[screening]``: stationarity tests (segments, level, action)."""
    scr = _section(raw, "screening")
    enabled = scr.get("enabled", True)
    if not isinstance(enabled, bool):
        raise ConfigError("[screening] enabled", enabled, "must be true or false")
    return ScreeningConfig(
        enabled=enabled,
        segments=_number("[screening] segments", scr.get("segments", 20), low=10, high=200, integer=True),
        alpha=_number("[screening] alpha", scr.get("alpha", 0.05), low=0, high=0.5, low_open=True),
        action=_choice("[screening] action", scr.get("action", "flag"), SCREENING_ACTIONS),
    )


def _parse_shifts(
    raw: Mapping[str, Any], channels: ChannelsConfig, sources: Tuple[CovariateSourceConfig, ...] = ()
) -> ShiftsConfig:
    """``[shifts]``: detectors, their parameters, compensated covariates, monitored indicators."""
    sh = _section(raw, "shifts")
    covariates = tuple(channels.covariates) + tuple(n for s in sources for n in s.names)
    compensate = _parse_compensate(sh.get("compensate", None), covariates)
    monitored = sh.get("indicators", list(DEFAULT_MONITORED))
    if (
        not isinstance(monitored, list)
        or not monitored
        or not all(isinstance(i, str) and i in INDICATOR_NAMES for i in monitored)
    ):
        raise ConfigError(
            "[shifts] indicators",
            monitored,
            "must be a non-empty list of indicator names from: " + ", ".join(INDICATOR_NAMES),
        )
    return ShiftsConfig(
        indicators=tuple(monitored),
        detector=_choice("[shifts] detector", sh.get("detector", "both"), DETECTORS),
        cusum_k=_number("[shifts] cusum_k", sh.get("cusum_k", 0.5), low=0),
        cusum_h=_number("[shifts] cusum_h", sh.get("cusum_h", 10.0), low=0, low_open=True),
        ewma_lambda=_number("[shifts] ewma_lambda", sh.get("ewma_lambda", 0.1), low=0, high=1, low_open=True),
        ewma_L=_number("[shifts] ewma_L", sh.get("ewma_L", 4.3), low=0, low_open=True),
        compensate=compensate,
        false_alarms_per_year=(
            _number("[shifts] false_alarms_per_year", sh["false_alarms_per_year"], low=0, low_open=True)
            if "false_alarms_per_year" in sh
            else None
        ),
        explicit_limits=tuple(key for key in ("cusum_h", "ewma_L") if key in sh),
        model=_choice("[shifts] model", sh.get("model", "linear"), tuple(COVARIATE_MODELS)),
        multivariate=_flag("[shifts] multivariate", sh.get("multivariate", False)),
        multivariate_windows=_number(
            "[shifts] multivariate_windows", sh.get("multivariate_windows", 100), low=30, high=100000, integer=True
        ),
    )


def _flag(key: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise ConfigError(key, value, "must be true or false")
    return value


def _parse_compensate(comp: Any, covariates: Tuple[str, ...]) -> Optional[Tuple[str, ...]]:
    """``[shifts] compensate``: None (all covariates), () (none) or a list of covariate names."""
    if comp is None or comp == "all":
        return None
    if comp == "none":
        return ()
    if isinstance(comp, list) and all(isinstance(c, str) for c in comp):
        missing = [c for c in comp if c not in set(covariates)]
        if missing:
            raise ConfigError(
                "[shifts] compensate",
                comp,
                f"names {missing[0]!r}, which is neither in [channels] covariates nor a [[covariate_sources]] name",
            )
        return tuple(comp)
    raise ConfigError("[shifts] compensate", comp, 'must be "all", "none" or a list of covariate names')


def _parse_covariate_sources(
    raw: Mapping[str, Any], base_dir: str, channels: ChannelsConfig, modes: Tuple[ModeConfig, ...]
) -> Tuple[CovariateSourceConfig, ...]:
    """``[[covariate_sources]]``: other archives' covariates; names unique across the entries
    and distinct from every channel, covariate and mode of the asset."""
    entries = raw.get("covariate_sources", [])
    if not isinstance(entries, list):
        raise ConfigError("[[covariate_sources]]", entries, "must be an array of tables ([[covariate_sources]])")
    taken = {name: "[channels] covariates" for name in channels.covariates}
    taken.update({name: "[channels] names" for name in channels.names or ()})
    taken.update({mode.name: "[[modes]] name" for mode in modes})
    sources = []
    for i, entry in enumerate(entries):
        source = _parse_covariate_source(i, entry, base_dir)
        for name in source.names:
            if name in taken:
                raise ConfigError(
                    f"[[covariate_sources]] #{i + 1} names", list(source.names), f"{name!r} is already in {taken[name]}"
                )
            taken[name] = f"[[covariate_sources]] #{i + 1} names"
        sources.append(source)
    return tuple(sources)


def _parse_covariate_source(i: int, entry: Any, base_dir: str) -> CovariateSourceConfig:
    """One ``[[covariate_sources]]`` table (``i`` counts from 0; messages count from 1)."""
    where = f"[[covariate_sources]] #{i + 1}"
    if not isinstance(entry, Mapping):
        raise ConfigError(where, entry, "must be a table")
    unknown = sorted(set(entry) - _KNOWN["covariate_sources"])
    if unknown:
        raise ConfigError(
            f"{where} {unknown[0]}",
            entry[unknown[0]],
            "is not a known key; known keys: " + ", ".join(sorted(_KNOWN["covariate_sources"])),
        )
    if "path" not in entry:
        raise ConfigError(f"{where} path", None, "is required: a folder, a glob or a Beam filesystem URL")
    if "names" not in entry:
        raise ConfigError(f"{where} names", None, "is required: the covariates this archive provides")
    names = _string_list(f"{where} names", entry["names"])
    if not names:
        raise ConfigError(f"{where} names", [], "must list at least one covariate")
    time_column = _string(f"{where} time_column", entry.get("time_column", "time"))
    if time_column in names:
        raise ConfigError(f"{where} names", list(names), f"must not name the time column {time_column!r}")
    return CovariateSourceConfig(
        path=_resolve_path(_string(f"{where} path", entry["path"]), base_dir),
        names=names,
        layout=_choice(f"{where} layout", entry.get("layout", "wide"), LAYOUTS),
        time_column=time_column,
        channel_column=_string(f"{where} channel_column", entry.get("channel_column", "channel")),
        value_column=_string(f"{where} value_column", entry.get("value_column", "value")),
        timezone=_timezone(f"{where} timezone", entry.get("timezone", "UTC")),
        smoothing_h=_smoothing_h(f"{where} smoothing_h", entry.get("smoothing_h", {}), names),
        max_gap_s=_number(f"{where} max_gap_s", entry.get("max_gap_s", 900.0), low=0, low_open=True),
        min_coverage=_number(f"{where} min_coverage", entry.get("min_coverage", 0.5), low=0, high=1, low_open=True),
    )


def _parse_reading(raw: Mapping[str, Any]) -> ReadingConfig:
    """``[reading]``: read-task size, grid tolerance and clipping fraction."""
    rd = _section(raw, "reading")
    return ReadingConfig(
        task_bytes=_number("[reading] task_bytes", rd.get("task_bytes", 32 * 2**20), low=2**16, integer=True),
        grid_tolerance=_number(
            "[reading] grid_tolerance", rd.get("grid_tolerance", 0.25), low=0, high=0.5, low_open=True, high_open=True
        ),
        clip_fraction=_number("[reading] clip_fraction", rd.get("clip_fraction", 0.01), low=0, high=1, low_open=True),
    )


def load_config(path: str) -> AssetConfig:
    """Read and validate one asset's TOML file (relative paths resolve against its folder)."""
    try:
        with open(path, "rb") as handle:
            raw = tomllib.load(handle)
    except FileNotFoundError:
        raise ConfigError("--config", path, "file not found") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError("--config", path, f"is not valid TOML ({err})") from None
    return parse_config(raw, base_dir=os.path.dirname(os.path.abspath(path)), source=path)


# --------------------------------------------------------------------------------------------
# Fleets: several assets from a folder or a glob, with shared defaults

#: the file of a fleet folder merged under each asset's keys (never an asset itself)
FLEET_DEFAULTS = "_defaults.toml"


def merge_defaults(defaults: Mapping[str, Any], asset: Mapping[str, Any]) -> Dict[str, Any]:
    """``asset`` over ``defaults``: the asset's keys win; tables are merged recursively; arrays
    (``[[modes]]``, ``pairs``, ``names`` ...) and every other value are replaced, not merged."""
    merged: Dict[str, Any] = dict(defaults)
    for key, value in asset.items():
        below = merged.get(key)
        if isinstance(value, Mapping) and isinstance(below, Mapping):
            merged[key] = merge_defaults(below, value)
        else:
            merged[key] = value
    return merged


def is_fleet_member(path: str) -> bool:
    """Whether a listed file is one asset of a fleet: a ``*.toml`` whose name does not start
    with ``_`` (``_defaults.toml`` and any other ``_*.toml`` are not assets)."""
    name = path.replace("\\", "/").rstrip("/").rsplit("/", 1)[-1]
    return name.endswith(".toml") and not name.startswith("_")


def parse_fleet_member(
    raw: Mapping[str, Any], defaults: Optional[Mapping[str, Any]], base_dir: str, source: str
) -> AssetConfig:
    """One asset of a fleet: its TOML mapping merged over the folder's ``_defaults.toml``
    (:func:`merge_defaults`), then validated as a file of its own (:func:`parse_config`).

    Relative paths, the asset's and those of the defaults alike, resolve against the asset
    file's folder (``base_dir``): the defaults file lies in that same folder, so both readings
    agree, and a merged value means the same wherever it came from.
    """
    return parse_config(merge_defaults(defaults or {}, raw), base_dir=base_dir, source=source)


def duplicate_asset_names(configs: Sequence[AssetConfig]) -> Optional[str]:
    """A message naming both files of the first asset name given twice, or None."""
    seen: Dict[str, str] = {}
    for config in configs:
        if config.name in seen:
            return (
                f"[asset] name = {config.name!r} is given by two files: {seen[config.name]} and "
                f"{config.source}; asset names must be unique in a fleet (they name the output partitions)"
            )
        seen[config.name] = config.source
    return None
