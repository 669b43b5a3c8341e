"""``[[covariate_sources]]`` below Beam: the configuration's errors, and the per-day join of a
source archive (long layout, repeated timestamps, only the row groups of the day decoded)."""

import copy
import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.integrate import trapezoid

from corrtransforms.config import ConfigError, load_config, parse_config
from corrtransforms.stages import covariate_sources as sources
from corrtransforms.stages.plan import list_local_archive
from corrtransforms.timeutil import day_start_us

BASE = {
    "asset": {"name": "invented-deck"},
    "archive": {"path": "archive", "sample_rate_hz": 20.0},
    "channels": {"names": ["a", "b"], "covariates": ["deck_temp"], "units": {"air": "degC"}},
    "windows": {"length_s": 600.0},
    "covariate_sources": [{"path": "weather", "names": ["air", "wind"], "smoothing_h": {"air": 6}}],
}


def _with(**changes):
    raw = copy.deepcopy(BASE)
    raw["covariate_sources"][0].update(changes)
    return raw


@pytest.mark.parametrize(
    "raw, key",
    [
        (_with(names=["deck_temp"], smoothing_h={}), "[[covariate_sources]] #1 names"),  # a [channels] covariate
        (_with(names=["a"], smoothing_h={}), "[[covariate_sources]] #1 names"),  # a correlated channel
        (_with(names=[]), "[[covariate_sources]] #1 names"),
        (_with(names=["air", "air"]), "[[covariate_sources]] #1 names"),
        (_with(names=["time"]), "[[covariate_sources]] #1 names"),  # the time column
        (_with(layout="tall"), "[[covariate_sources]] #1 layout"),
        (_with(timezone="Mars/Olympus"), "[[covariate_sources]] #1 timezone"),
        (_with(smoothing_h={"rain": 3}), "[[covariate_sources]] #1 smoothing_h.rain"),
        (_with(smoothing_h={"air": 0}), "[[covariate_sources]] #1 smoothing_h.air"),
        (_with(max_gap_s=-1), "[[covariate_sources]] #1 max_gap_s"),
        (_with(min_coverage=1.5), "[[covariate_sources]] #1 min_coverage"),
        (_with(colour="red"), "[[covariate_sources]] #1 colour"),
        ({**BASE, "covariate_sources": {"path": "weather"}}, "[[covariate_sources]]"),
        ({**BASE, "covariate_sources": [{"names": ["air"]}]}, "[[covariate_sources]] #1 path"),
        ({**BASE, "covariate_sources": [{"path": "weather"}]}, "[[covariate_sources]] #1 names"),
        (
            {**BASE, "covariate_sources": BASE["covariate_sources"] + [{"path": "station2", "names": ["wind"]}]},
            "[[covariate_sources]] #2 names",  # a name of another source
        ),
        ({**BASE, "shifts": {"compensate": ["rain"]}}, "[shifts] compensate"),
    ],
)
def test_each_bad_value_names_its_key(raw, key):
    with pytest.raises(ConfigError) as err:
        parse_config(raw, base_dir="/site")
    assert err.value.key == key, str(err.value)
    assert str(err.value).startswith(key)


def test_source_names_are_covariates_everywhere(tmp_path):
    raw = {**BASE, "shifts": {"compensate": ["air", "deck_temp"]}}
    config = parse_config(raw, base_dir="/site")
    assert config.covariate_names() == ("deck_temp", "air", "wind")
    assert config.compensated_covariates() == ("air", "deck_temp")
    assert config.covariate_smoothing_h() == {"air": 6.0}
    assert parse_config(BASE).compensated_covariates() == ("deck_temp", "air", "wind")  # all, by default
    # the path resolves against the configuration file's folder, as [archive] path does
    path = tmp_path / "site" / "deck.toml"
    path.parent.mkdir()
    path.write_text(
        '[asset]\nname = "d"\n[archive]\npath = "archive"\nsample_rate_hz = 20.0\n'
        '[[covariate_sources]]\npath = "../weather"\nnames = ["air"]\n'
    )
    assert load_config(str(path)).covariate_sources[0].path == str(tmp_path / "weather")


def test_a_configuration_without_sources_keeps_its_digest():
    raw = {k: v for k, v in BASE.items() if k != "covariate_sources"}
    assert "covariate_sources" not in parse_config(raw).as_dict()


DAY = dt.date(2025, 1, 14)


def _long_station(folder, days, duplicates=False):
    """Long layout, one file per day, row groups of two hours: air (a ramp) and wind each minute."""
    folder.mkdir(exist_ok=True)
    written = {}
    for d in days:
        first = day_start_us(d, "UTC")
        t = first + 60_000_000 * np.arange(1440, dtype=np.int64)
        air = 0.001 * (t - day_start_us(DAY, "UTC")) / 60e6 + np.sin(t / 3.6e9)
        times = np.concatenate([t, t])
        channel = ["air"] * t.size + ["wind"] * t.size
        value = np.concatenate([air, np.full(t.size, 3.0)])
        if duplicates and d == DAY:
            times = np.concatenate([times, t[[600, 700]]])  # 10:00 repeated equal, 11:40 conflicting
            channel += ["air", "air"]
            value = np.concatenate([value, [air[600], air[700] + 1.0]])
        order = np.argsort(times, kind="stable")
        table = pa.table(
            {
                "time": pa.array(times[order], pa.timestamp("us", "UTC")),
                "channel": pa.array(np.array(channel)[order]),
                "value": value[order],
            }
        )
        pq.write_table(table, str(folder / f"{d:%Y%m%d}.parquet"), row_group_size=240)
        written[d] = (t, air)
    return written


def _long_config(folder):
    raw = {
        **BASE,
        "covariate_sources": [{"path": str(folder), "layout": "long", "names": ["air", "wind"], "max_gap_s": 120.0}],
    }
    return parse_config(raw)


def _footers(config):
    found = []
    for path in list_local_archive(config.covariate_sources[0].path):
        footer, findings = sources.read_source_footer(path, config, 0)
        assert footer is not None and not findings
        found.append((0, footer))
    return found


def test_long_layout_with_repeated_timestamps_gives_the_trapezoidal_means(tmp_path):
    written = _long_station(tmp_path / "station", [DAY - dt.timedelta(days=1), DAY], duplicates=True)
    config = _long_config(tmp_path / "station")
    midnight = day_start_us(DAY, "UTC")
    starts = [midnight, midnight + 9_000_000_000, midnight + 36_000_000_000, midnight + 42_000_000_000]
    joined = sources.join_day(DAY.isoformat(), starts, _footers(config), config)
    assert {(f.reason, f.subject, f.action) for f in joined.findings} == {
        ("duplicate_timestamps", "air", "repaired"),
        ("conflicting_duplicates", "air", "rejected"),
    }
    got = {(r.window_start_us, r.subject): r for r in joined.rows}
    t = np.concatenate([written[DAY - dt.timedelta(days=1)][0], written[DAY][0]])
    air = np.concatenate([written[DAY - dt.timedelta(days=1)][1], written[DAY][1]])
    keep = t != written[DAY][0][700]  # the conflicting timestamp is not used: interpolated across
    for start in starts:
        grid = np.linspace(start, start + 600e6, 6001)
        # reference: scipy's trapezoid of the dense linear interpolation of the samples kept
        expected = trapezoid(np.interp(grid, t[keep], air[keep]), grid) / 600e6
        assert got[(start, "air")].value == pytest.approx(expected, rel=1e-9)
        assert got[(start, "wind")].value == pytest.approx(3.0, rel=1e-12)
        assert got[(start, "air")].unit == "degC" and got[(start, "air")].quality == "ok"


def test_one_day_decodes_one_day_whatever_the_archives_length(tmp_path):
    decoded = []
    for n_days in (3, 12):
        folder = tmp_path / f"station{n_days}"
        _long_station(folder, [DAY + dt.timedelta(days=i - 1) for i in range(n_days)])
        config = _long_config(folder)
        midnight = day_start_us(DAY, "UTC")
        starts = [midnight + k * 3_600_000_000 for k in range(24)]
        joined = sources.join_day(DAY.isoformat(), starts, _footers(config), config)
        assert len(joined.rows) == 48 and all(r.quality == "ok" for r in joined.rows)
        decoded.append(joined.decoded_bytes[0])
    assert decoded[0] == decoded[1]
    # row groups of two hours: the day's 12 and the last one of the day before (it reaches the
    # span's start, max_gap_s before midnight); none of the other days
    one_group = pq.ParquetFile(str(tmp_path / "station3" / f"{DAY:%Y%m%d}.parquet")).read_row_group(0).nbytes
    assert decoded[0] == 13 * one_group


def test_a_window_past_the_last_sample_has_no_mean(tmp_path):
    _long_station(tmp_path / "station", [DAY])
    config = _long_config(tmp_path / "station")
    late = day_start_us(DAY + dt.timedelta(days=1), "UTC") + 3_600_000_000  # 01:00 of the next day
    joined = sources.join_day(DAY.isoformat(), [late], _footers(config), config)
    assert all(np.isnan(r.value) and r.quality == "no_covariate_samples" for r in joined.rows)
