"""Configuration: every invalid value of every key gives one clear error naming the key.

Table-driven: each case starts from a valid minimal configuration, sets one key to a bad value,
and checks that :class:`ConfigError` names exactly that key (and the value) before any pipeline
would start.
"""

import copy
import datetime as dt

import pytest

from corrtransforms.config import ConfigError, load_config, parse_config

MINIMAL = {
    "asset": {"name": "test-asset"},
    "archive": {"path": "archive", "sample_rate_hz": 20.0},
    "channels": {"names": ["a", "b"], "covariates": ["temp"], "units": {"a": "m/s2"}},
}

# (section or "top", key, bad value, key text that the message must contain)
BAD_VALUES = [
    ("asset", "name", "has/slash", "[asset] name"),
    ("asset", "name", "", "[asset] name"),
    ("asset", "name", 7, "[asset] name"),
    ("asset", "colour", "red", "[asset] colour"),
    ("archive", "path", "", "[archive] path"),
    ("archive", "path", 3, "[archive] path"),
    ("archive", "layout", "tall", "[archive] layout"),
    ("archive", "time_column", "", "[archive] time_column"),
    ("archive", "channel_column", 1, "[archive] channel_column"),
    ("archive", "value_column", None, "[archive] value_column"),
    ("archive", "sample_rate_hz", 0, "[archive] sample_rate_hz"),
    ("archive", "sample_rate_hz", -5.0, "[archive] sample_rate_hz"),
    ("archive", "sample_rate_hz", "fast", "[archive] sample_rate_hz"),
    ("archive", "sample_rate_hz", True, "[archive] sample_rate_hz"),
    ("archive", "timezone", "Mars/Olympus", "[archive] timezone"),
    ("archive", "file_time_pattern", "site_%H.parquet", "[archive] file_time_pattern"),
    ("archive", "file_time_pattern", "site_%Y%q.parquet", "[archive] file_time_pattern"),
    ("archive", "file_time_pattern", "%Y%m%j", "[archive] file_time_pattern"),
    ("archive", "file_time_pattern", "%Y/%M.parquet", "[archive] file_time_pattern"),
    ("archive", "file_time_pattern", "/%Y.parquet", "[archive] file_time_pattern"),
    ("archive", "file_time_pattern", 2024, "[archive] file_time_pattern"),
    ("archive", "file_span_h", 12, "[archive] file_span_h"),
    ("asset", "timezone", "Mars/Olympus", "[asset] timezone"),
    ("asset", "timezone", 1, "[asset] timezone"),
    ("channels", "names", "a", "[channels] names"),
    ("channels", "names", ["a", "a"], "[channels] names"),
    ("channels", "names", ["x:y"], "[channels] names"),
    ("channels", "names", [], "[channels] names"),
    ("channels", "covariates", ["a"], "[channels] covariates"),
    ("channels", "covariates", [1], "[channels] covariates"),
    ("channels", "units", ["m"], "[channels] units"),
    ("windows", "length_s", 0, "[windows] length_s"),
    ("windows", "length_s", 0.13, "[windows] length_s"),  # not a whole number of samples at 20 Hz
    ("windows", "hop_s", -1, "[windows] hop_s"),
    ("windows", "hop_s", 10_000, "[windows] hop_s"),  # longer than the window
    ("windows", "min_coverage", 1.5, "[windows] min_coverage"),
    ("windows", "min_coverage", 0, "[windows] min_coverage"),
    ("windows", "align", "hours", "[windows] align"),
    ("windows", "offset_s", -1, "[windows] offset_s"),
    ("windows", "offset_s", 600, "[windows] offset_s"),  # not below hop_s (600 s)
    ("windows", "offset_s", "3 min", "[windows] offset_s"),
    ("windows", "record_gap_s", 0, "[windows] record_gap_s"),
    ("correlation", "max_lag_s", 0, "[correlation] max_lag_s"),
    ("correlation", "max_lag_s", 400, "[correlation] max_lag_s"),  # >= half of a 600 s window
    ("correlation", "pairs", "some", "[correlation] pairs"),
    ("correlation", "pairs", [["a"]], "[correlation] pairs"),
    ("correlation", "pairs", [["a", "zz"]], "[correlation] pairs"),
    ("correlation", "estimator", "median", "[correlation] estimator"),
    ("correlation", "detrend", "quadratic", "[correlation] detrend"),
    ("correlation", "weighting", "roth", "[correlation] weighting"),
    ("correlation", "transform_precision", "float16", "[correlation] transform_precision"),
    ("correlation", "target_rel_error", 0, "[correlation] target_rel_error"),
    ("correlation", "target_rel_error", 1.0, "[correlation] target_rel_error"),
    ("baseline", "start", "yesterday", "[baseline] start"),
    ("baseline", "windows", 1, "[baseline] windows"),
    ("baseline", "windows", 2.5, "[baseline] windows"),
    ("baseline", "min_windows", 0, "[baseline] min_windows"),
    ("screening", "enabled", "yes", "[screening] enabled"),
    ("screening", "segments", 3, "[screening] segments"),
    ("screening", "alpha", 0.9, "[screening] alpha"),
    ("screening", "action", "drop", "[screening] action"),
    ("shifts", "detector", "shewhart", "[shifts] detector"),
    ("shifts", "cusum_k", -0.5, "[shifts] cusum_k"),
    ("shifts", "cusum_h", 0, "[shifts] cusum_h"),
    ("shifts", "ewma_lambda", 1.5, "[shifts] ewma_lambda"),
    ("shifts", "ewma_L", -3, "[shifts] ewma_L"),
    ("shifts", "compensate", ["humidity"], "[shifts] compensate"),
    ("shifts", "compensate", 5, "[shifts] compensate"),
    ("shifts", "indicators", ["kurtosis"], "[shifts] indicators"),
    ("shifts", "indicators", [], "[shifts] indicators"),
    ("reading", "task_bytes", 10, "[reading] task_bytes"),
    ("reading", "grid_tolerance", 0.7, "[reading] grid_tolerance"),
    ("reading", "clip_fraction", 0, "[reading] clip_fraction"),
]


@pytest.mark.parametrize("section,key,value,named", BAD_VALUES, ids=[f"{s}.{k}={v!r}" for s, k, v, _ in BAD_VALUES])
def test_invalid_value_names_its_key(section, key, value, named):
    raw = copy.deepcopy(MINIMAL)
    raw.setdefault(section, {})[key] = value
    with pytest.raises(ConfigError) as info:
        parse_config(raw)
    message = str(info.value)
    assert message.startswith(named), message
    assert info.value.key == named


BAD_MODES = [
    ({"name": "m1", "channel": "a", "band_hz": [2.0, 1.0]}, "band_hz"),
    ({"name": "m1", "channel": "a", "band_hz": [1.0, 15.0]}, "band_hz"),  # above Nyquist at 20 Hz
    ({"name": "m1", "channel": "a", "band_hz": "1-2"}, "band_hz"),
    ({"name": "m1", "channel": "nope", "band_hz": [1.0, 2.0]}, "channel"),
    ({"name": "", "channel": "a", "band_hz": [1.0, 2.0]}, "name"),
    ({"name": "m1", "channel": "a", "band_hz": [1.0, 2.0], "order": 2}, "order"),
]


@pytest.mark.parametrize("mode,key", BAD_MODES)
def test_invalid_mode_names_its_key(mode, key):
    raw = copy.deepcopy(MINIMAL)
    raw["modes"] = [mode]
    with pytest.raises(ConfigError) as info:
        parse_config(raw)
    assert info.value.key == f"[[modes]] #1 {key}"


def test_required_keys_and_sections():
    for missing in ("asset", "archive"):
        raw = copy.deepcopy(MINIMAL)
        del raw[missing]
        with pytest.raises(ConfigError, match=rf"^\[{missing}\]"):
            parse_config(raw)
    raw = copy.deepcopy(MINIMAL)
    del raw["archive"]["sample_rate_hz"]
    with pytest.raises(ConfigError, match=r"^\[archive\] sample_rate_hz"):
        parse_config(raw)
    raw = copy.deepcopy(MINIMAL)
    raw["unknown_section"] = {}
    with pytest.raises(ConfigError, match=r"^\[unknown_section\]"):
        parse_config(raw)


def test_baseline_dates_must_come_together_and_in_order():
    raw = copy.deepcopy(MINIMAL)
    raw["baseline"] = {"start": dt.date(2026, 1, 5)}
    with pytest.raises(ConfigError, match=r"^\[baseline\] end"):
        parse_config(raw)
    raw["baseline"] = {"start": dt.date(2026, 1, 5), "end": dt.date(2026, 1, 1)}
    with pytest.raises(ConfigError, match=r"^\[baseline\] end"):
        parse_config(raw)
    raw["baseline"] = {"start": dt.date(2026, 1, 1), "end": dt.date(2026, 1, 5), "windows": 10}
    with pytest.raises(ConfigError, match=r"^\[baseline\] windows"):
        parse_config(raw)


def test_defaults_and_relative_path(tmp_path):
    path = tmp_path / "site" / "asset.toml"
    path.parent.mkdir()
    path.write_text('[asset]\nname = "pump-7"\n[archive]\npath = "raw"\nsample_rate_hz = 50\n')
    config = load_config(str(path))
    assert config.archive.path == str(tmp_path / "site" / "raw")
    assert config.windows.length_s == 600.0 and config.windows.hop_s == 600.0
    assert config.windows.min_coverage == 0.9
    assert config.windows.align == "epoch" and config.windows.offset_s == 0.0
    assert config.windows.record_gap_s is None
    assert config.correlation.pairs == "all" and config.correlation.estimator == "biased"
    assert config.correlation.target_rel_error == 0.05
    assert config.screening.segments == 20 and config.screening.action == "flag"
    assert config.baseline.windows == 100
    assert config.shifts.detector == "both"
    # the digest is stable across loads and changes with any value
    assert config.digest() == load_config(str(path)).digest()
    path.write_text('[asset]\nname = "pump-7"\n[archive]\npath = "raw"\nsample_rate_hz = 51\n')
    assert load_config(str(path)).digest() != config.digest()


def test_unreadable_toml_is_a_clear_error(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[asset\nname = ")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(str(path))
    with pytest.raises(ConfigError, match="file not found"):
        load_config(str(tmp_path / "absent.toml"))


def test_offset_s_is_for_the_epoch_grid_only():
    raw = copy.deepcopy(MINIMAL)
    raw["windows"] = {"align": "records", "offset_s": 180}
    with pytest.raises(ConfigError, match=r"^\[windows\] offset_s = 180.0: must be 0 with align"):
        parse_config(raw)
    raw["windows"] = {"align": "records", "record_gap_s": 5}
    windows = parse_config(raw).windows
    assert (windows.align, windows.offset_s, windows.record_gap_s) == ("records", 0.0, 5.0)


def test_asset_and_archive_time_zones_are_separate_keys_and_the_old_single_key_still_works(caplog):
    raw = copy.deepcopy(MINIMAL)
    assert (parse_config(raw).timezone, parse_config(raw).archive.timezone) == ("UTC", "UTC")
    raw["asset"]["timezone"] = "Europe/Vienna"
    config = parse_config(raw)
    assert (config.timezone, config.archive.timezone, config.notes) == ("Europe/Vienna", "UTC", ())
    raw = copy.deepcopy(MINIMAL)
    raw["archive"]["timezone"] = "Europe/Vienna"
    with caplog.at_level("WARNING", logger="corrtransforms.config"):
        config = parse_config(raw)
    # before [asset] timezone existed, [archive] timezone set the calendar days too: kept, with a note
    assert (config.timezone, config.archive.timezone) == ("Europe/Vienna", "Europe/Vienna")
    assert len(config.notes) == 1 and "[asset] timezone" in config.notes[0] and "deprecated" in config.notes[0]
    assert config.notes[0] in caplog.text
    # notes are not part of the configuration's digest
    assert "notes" not in config.as_dict() and config.as_dict()["timezone"] == "Europe/Vienna"


def test_file_span_h_needs_a_pattern_and_is_positive():
    raw = copy.deepcopy(MINIMAL)
    raw["archive"]["file_time_pattern"] = "site_%Y%m%d_%H%M.parquet"
    assert parse_config(raw).archive.file_span_h == 24.0
    raw["archive"]["file_span_h"] = 1
    assert parse_config(raw).archive.file_span_h == 1.0
    for bad in (0, -1, "1h", float("inf")):
        raw["archive"]["file_span_h"] = bad
        with pytest.raises(ConfigError, match=r"\[archive\] file_span_h"):
            parse_config(raw)


THREE_CHANNELS = {"names": ["a", "b", "c"], "covariates": ["temp"]}
BAD_MULTICHANNEL_MODES = [
    ({"name": "m1", "band_hz": [1.0, 2.0]}, "channel / channels"),  # neither
    ({"name": "m1", "channel": "a", "channels": ["a", "b"], "band_hz": [1.0, 2.0]}, "channel / channels"),  # both
    ({"name": "m1", "channels": ["a"], "band_hz": [1.0, 2.0]}, "channels"),  # one channel
    ({"name": "m1", "channels": ["a", "a"], "band_hz": [1.0, 2.0]}, "channels"),  # repeated
    ({"name": "m1", "channels": ["a", "nope"], "band_hz": [1.0, 2.0]}, "channels"),  # not configured
    ({"name": "m1", "channels": "a,b", "band_hz": [1.0, 2.0]}, "channels"),
    ({"name": "m1", "channels": ["a", "b"], "reference_channels": ["c"], "band_hz": [1.0, 2.0]}, "reference_channels"),
    ({"name": "m1", "channels": ["a", "b"], "reference_channels": [], "band_hz": [1.0, 2.0]}, "reference_channels"),
    ({"name": "m1", "channels": ["a", "b"], "reference_shape": [1.0], "band_hz": [1.0, 2.0]}, "reference_shape"),
    ({"name": "m1", "channels": ["a", "b"], "reference_shape": [0, 0], "band_hz": [1.0, 2.0]}, "reference_shape"),
    ({"name": "m1", "channels": ["a", "b"], "reference_shape": ["x", 1], "band_hz": [1.0, 2.0]}, "reference_shape"),
    ({"name": "m1", "channel": "a", "reference_channels": ["a"], "band_hz": [1.0, 2.0]}, "reference_channels"),
    ({"name": "m1", "channels": ["a", "b"], "band_hz": [1.0, 12.0]}, "band_hz"),  # above Nyquist at 20 Hz
]


@pytest.mark.parametrize("mode,key", BAD_MULTICHANNEL_MODES)
def test_invalid_multichannel_mode_names_its_key_value_and_what_is_allowed(mode, key):
    raw = copy.deepcopy(MINIMAL)
    raw["channels"] = dict(THREE_CHANNELS)
    raw["modes"] = [mode]
    with pytest.raises(ConfigError) as info:
        parse_config(raw)
    assert info.value.key == f"[[modes]] #1 {key}"
    assert info.value.allowed and str(info.value).startswith(f"[[modes]] #1 {key} = ")


def test_multichannel_mode_entry_and_single_channel_entry_side_by_side():
    raw = copy.deepcopy(MINIMAL)
    raw["channels"] = dict(THREE_CHANNELS)
    raw["modes"] = [
        {"name": "single", "channel": "a", "band_hz": [1.0, 2.0]},
        {"name": "first_bending", "channels": ["a", "b", "c"], "reference_channels": ["a", "c"], "band_hz": [1, 3]},
        {"name": "second", "channels": ["b", "c"], "reference_shape": [1.0, -0.5], "band_hz": [3.0, 4.0]},
    ]
    single, multi, shaped = parse_config(raw).modes
    assert (single.channel, single.channels, single.is_multichannel) == ("a", (), False)
    assert (multi.channel, multi.channels, multi.reference_channels) == ("", ("a", "b", "c"), ("a", "c"))
    assert multi.band_hz == (1.0, 3.0) and multi.reference_shape == () and multi.is_multichannel
    assert shaped.reference_channels == ("b", "c") and shaped.reference_shape == (1.0, -0.5)


def test_mode_mac_is_a_monitorable_indicator():
    raw = copy.deepcopy(MINIMAL)
    raw["shifts"] = {"indicators": ["mode_freq_hz", "mode_mac"]}
    assert parse_config(raw).shifts.indicators == ("mode_freq_hz", "mode_mac")
