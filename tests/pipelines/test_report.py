"""The report (corrtransforms.report, run as ``python -m pipelines.report``) on small output tables
written with pyarrow, on local disk and on an object-store filesystem.

Counts on the page are checked against DuckDB queries over the same Parquet files (an outside
reader); pictures are checked to be valid PNG images with the shifted windows marked.
"""

import datetime as dt
import html.parser
import math
import os
import subprocess
import sys

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pytest
from matplotlib import image as mpimg

from corrtransforms import tables
from corrtransforms.report import episodes_from_shifts, write_report
from corrtransforms.report.files import ReportFiles
from pipelines import report
from tests.support import memory_filesystem

UTC = dt.timezone.utc
START = dt.datetime(2025, 5, 1, tzinfo=UTC)
TS = pa.timestamp("us", tz="UTC")
PARTITIONING = ds.partitioning(pa.schema([("asset", pa.string()), ("date", pa.string())]), flavor="hive")


def _write(root, name, table):
    ds.write_dataset(
        table,
        os.path.join(root, name),
        format="parquet",
        partitioning=PARTITIONING,
        existing_data_behavior="overwrite_or_ignore",
    )


def write_example_output(root, seed=3, with_shifts=True, with_rejects=True, with_correlations=True):
    """A small, invented output folder: asset "demo-asset" (6 days, a window every 2 h) with an
    open shift in a modal frequency and a closed one in a lag; asset "pump-skid" with one
    unmonitored indicator. Returns the windows rejected of demo-asset."""
    rng = np.random.default_rng(seed)
    windows = [START + dt.timedelta(hours=2 * i) for i in range(72)]
    rejected = {windows[20], windows[45]}  # insufficient coverage: no rows for these windows
    computed = [w for w in windows if w not in rejected]
    hours = np.array([(w - START).total_seconds() / 3600 for w in computed])
    temperature = 12 + 5 * np.sin(2 * np.pi * (hours - 9) / 24)
    frequency_expected = 2.45 * (1 - 0.0015 * (temperature - 10))
    frequency = frequency_expected + rng.normal(0, 0.004, len(computed))
    frequency[np.arange(len(computed)) >= 55] *= 0.97
    lag_expected = np.full(len(computed), 0.060)
    lag = lag_expected + rng.normal(0, 0.001, len(computed))
    lag[30:38] += 0.012
    rms = rng.lognormal(np.log(0.02), 0.2, len(computed))
    n = len(computed)

    def rows(subject, indicator, value, stderr, unit, asset="demo-asset", when=computed):
        return {
            "asset": [asset] * len(when),
            "date": [w.date().isoformat() for w in when],
            "window_start": list(when),
            "subject": [subject] * len(when),
            "indicator": [indicator] * len(when),
            "value": list(map(float, value)),
            "stderr": list(map(float, stderr)),
            "unit": [unit] * len(when),
            "quality": ["ok"] * len(when),
        }

    parts = [
        rows("bending_1", "mode_freq_hz", frequency, np.full(n, 0.004), "Hz"),
        rows("footing_n:footing_s", "lag_s", lag, np.full(n, 0.001), "s"),
        rows("deck_mid_v", "rms", rms, 0.1 * rms, "m/s^2"),
        rows("deck_temp", "covariate_mean", temperature, np.full(n, 0.01), "degC"),
        rows(
            "motor_de",
            "rms",
            rng.lognormal(0, 0.1, 10),
            np.full(10, 0.05),
            "mm/s",
            asset="pump-skid",
            when=[START + dt.timedelta(hours=i) for i in range(10)],
        ),
    ]
    parts[2]["quality"][5] = "nonstationary"
    columns = {k: sum((p[k] for p in parts), []) for k in parts[0]}
    indicator_schema = pa.schema(
        [
            ("asset", pa.string()),
            ("date", pa.string()),
            ("window_start", TS),
            ("subject", pa.string()),
            ("indicator", pa.string()),
            ("value", pa.float64()),
            ("stderr", pa.float64()),
            ("unit", pa.string()),
            ("quality", pa.string()),
        ]
    )
    _write(root, "indicators", pa.table(columns, schema=indicator_schema))

    if with_shifts:
        shift_rows = []
        for subject, indicator, value, expected, scale, unit, shifted in (
            ("bending_1", "mode_freq_hz", frequency, frequency_expected, 0.004, "Hz", np.arange(n) >= 57),
            ("footing_n:footing_s", "lag_s", lag, lag_expected, 0.001, "s", (np.arange(n) >= 31) & (np.arange(n) < 38)),
        ):
            onset_index = int(np.argmax(shifted)) - 2
            for i, w in enumerate(computed):
                z = (value[i] - expected[i]) / math.hypot(scale, scale)
                state = "baseline" if i < 24 else ("shifted" if shifted[i] else "normal")
                shift_rows.append(
                    {
                        "asset": "demo-asset",
                        "date": w.date().isoformat(),
                        "window_start": w,
                        "subject": subject,
                        "indicator": indicator,
                        "value": float(value[i]),
                        "stderr": scale,
                        "expected": float(expected[i]),
                        "resid_scale": scale,
                        "z": float(z),
                        "cusum_pos": 0.0,
                        "cusum_neg": 0.0,
                        "ewma": 0.0,
                        "ewma_limit": 1.0,
                        "state": state,
                        "onset": computed[onset_index] if state == "shifted" else None,
                        "first_alarm": computed[onset_index + 2] if state == "shifted" else None,
                        "direction": (1 if value[i] > expected[i] else -1) if state == "shifted" else 0,
                        "shift_size": float(value[i] - expected[i]) if state == "shifted" else None,
                        "detector": "cusum+ewma" if state == "shifted" else None,
                        "quality": "ok",
                        "unit": unit,
                    }
                )
        shift_schema = pa.schema(
            [
                ("asset", pa.string()),
                ("date", pa.string()),
                ("window_start", TS),
                ("subject", pa.string()),
                ("indicator", pa.string()),
                ("value", pa.float64()),
                ("stderr", pa.float64()),
                ("expected", pa.float64()),
                ("resid_scale", pa.float64()),
                ("z", pa.float64()),
                ("cusum_pos", pa.float64()),
                ("cusum_neg", pa.float64()),
                ("ewma", pa.float64()),
                ("ewma_limit", pa.float64()),
                ("state", pa.string()),
                ("onset", TS),
                ("first_alarm", TS),
                ("direction", pa.int8()),
                ("shift_size", pa.float64()),
                ("detector", pa.string()),
                ("quality", pa.string()),
                ("unit", pa.string()),
            ]
        )
        _write(root, "shifts", pa.Table.from_pylist(shift_rows, schema=shift_schema))

    if with_rejects:
        reject_rows = []
        for w in sorted(rejected):
            reject_rows.append(
                dict(
                    stage="read",
                    source=w.isoformat(),
                    subject="*",
                    reason="insufficient_coverage",
                    detail="coverage 0.41 < 0.9",
                    action="rejected",
                    window_start=w,
                )
            )
        for w in computed[60:63]:
            reject_rows.append(
                dict(
                    stage="read",
                    source=w.isoformat(),
                    subject="deck_mid_h",
                    reason="flat_channel",
                    detail="all 15000 valid samples equal -0.0312",
                    action="rejected",
                    window_start=w,
                )
            )
        for w in computed[3:7]:
            reject_rows.append(
                dict(
                    stage="read",
                    source=w.isoformat(),
                    subject="*",
                    reason="off_grid_timestamps",
                    detail="12 timestamps snapped",
                    action="repaired",
                    window_start=w,
                )
            )
        reject_rows.append(
            dict(
                stage="plan",
                source="archive/date=2025-05-04/rec_0600.parquet",
                subject="*",
                reason="unreadable_file",
                detail="Parquet magic bytes not found in footer",
                action="rejected",
                window_start=None,
            )
        )
        for r in reject_rows:
            r["asset"] = "demo-asset"
            r["date"] = (r["window_start"] or dt.datetime(2025, 5, 4, tzinfo=UTC)).date().isoformat()
        reject_schema = pa.schema(
            [
                ("asset", pa.string()),
                ("date", pa.string()),
                ("stage", pa.string()),
                ("source", pa.string()),
                ("subject", pa.string()),
                ("reason", pa.string()),
                ("detail", pa.string()),
                ("action", pa.string()),
                ("window_start", TS),
            ]
        )
        _write(root, "rejects", pa.Table.from_pylist(reject_rows, schema=reject_schema))

    if with_correlations:
        corr_rows = []
        for w in computed:
            for a, b in (("deck_mid_v", "deck_mid_v"), ("footing_n", "footing_s")):
                corr_rows.append(
                    dict(
                        asset="demo-asset",
                        date=w.date().isoformat(),
                        window_start=w,
                        channel_a=a,
                        channel_b=b,
                        coefficient=rng.normal(size=41).astype(np.float32).tolist(),
                    )
                )
        corr_schema = pa.schema(
            [
                ("asset", pa.string()),
                ("date", pa.string()),
                ("window_start", TS),
                ("channel_a", pa.string()),
                ("channel_b", pa.string()),
                ("coefficient", pa.list_(pa.float32())),
            ]
        )
        _write(root, "correlations", pa.Table.from_pylist(corr_rows, schema=corr_schema))
    return rejected


class _Tables(html.parser.HTMLParser):
    """Cell texts of every <table> of a page, plus the order of <h2> headings."""

    def __init__(self):
        super().__init__()
        self.tables, self.headings, self._cell, self._row, self._in_h2 = [], [], None, None, False

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = ""
        elif tag == "h2":
            self._in_h2 = True
            self.headings.append("")

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._row.append(self._cell.strip())
            self._cell = None
        elif tag == "tr":
            self.tables[-1].append(self._row)
        elif tag == "h2":
            self._in_h2 = False

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data
        if self._in_h2:
            self.headings[-1] += data


def _parse(path):
    parser = _Tables()
    with open(path, encoding="utf-8") as handle:
        parser.feed(handle.read())
    return parser


def _table_with(parser, header):
    for table in parser.tables:
        if table and header in table[0]:
            return [dict(zip(table[0], row)) for row in table[1:]]
    raise AssertionError(f"no table with column {header!r}")


@pytest.fixture(scope="module")
def full_report(tmp_path_factory):
    root = str(tmp_path_factory.mktemp("output"))
    rejected = write_example_output(root)
    assert report.main(["--output", root]) == 0
    return root, rejected


def test_index_lists_open_episodes_first_then_assets_and_reject_counts(full_report):
    root, rejected = full_report
    page = _parse(os.path.join(root, "report", "index.html"))
    headings = page.headings
    assert headings[0].startswith("Open shift episodes (1)")
    assert headings.index(next(h for h in headings if h.startswith("Assets"))) > 0
    episode_tables = [
        [dict(zip(table[0], r)) for r in table[1:]] for table in page.tables if table and "estimated onset" in table[0]
    ]
    # the open episode's table first (the frequency drop), then the closed lag episode's
    assert [[(e["subject"], e["indicator"]) for e in t] for t in episode_tables] == [
        [("bending_1", "mode_freq_hz")],
        [("footing_n:footing_s", "lag_s")],
    ]
    episodes = [e for t in episode_tables for e in t]
    assert episodes[0]["direction"] == "down" and episodes[1]["direction"] == "up"
    assert episodes[1]["windows"] == "7"
    with open(os.path.join(root, "report", "index.html"), encoding="utf-8") as handle:
        text = handle.read()
    assert (
        "never replace, inspection and judgement by qualified engineers under local codes and licensed practice" in text
    )

    # outside reader: DuckDB over the same files
    con = duckdb.connect()
    counts = dict(
        con.execute(
            f"select reason, count(*) from read_parquet('{root}/rejects/**/*.parquet', hive_partitioning=true) "
            "group by reason"
        ).fetchall()
    )
    listed = {r["reason"]: int(r["rows"]) for r in _table_with(page, "reason")}
    assert (
        listed
        == counts
        == {"insufficient_coverage": 2, "flat_channel": 3, "off_grid_timestamps": 4, "unreadable_file": 1}
    )
    computed = con.execute(
        f"select count(distinct window_start) from read_parquet('{root}/correlations/**/*.parquet', "
        "hive_partitioning=true) where asset = 'demo-asset'"
    ).fetchone()[0]
    assets = {a["asset"]: a for a in _table_with(page, "windows planned")}
    assert int(assets["demo-asset"]["windows computed"]) == computed == 70
    assert int(assets["demo-asset"]["windows rejected"]) == len(rejected) == 2
    assert int(assets["demo-asset"]["windows planned"]) == 72
    assert int(assets["demo-asset"]["days"]) == 6
    assert int(assets["demo-asset"]["monitored series"]) == 2
    # the second asset's windows come from its indicators table (it has no correlation rows)
    assert int(assets["pump-skid"]["windows computed"]) == 10


def _red_pixels(path):
    picture = mpimg.imread(path)
    target = np.array([0xC0, 0x39, 0x2B]) / 255.0
    return int(np.sum(np.all(np.abs(picture[..., :3] - target) < 0.02, axis=-1)))


def test_one_valid_png_per_subject_and_indicator(full_report):
    root, _ = full_report
    con = duckdb.connect()
    series = con.execute(
        f"select distinct asset, subject, indicator from read_parquet('{root}/indicators/**/*.parquet', "
        "hive_partitioning=true)"
    ).fetchall()
    assert len(series) == 5
    for asset, subject, indicator in series:
        path = os.path.join(root, "report", "plots", asset, report.plot_file_name(subject, indicator))
        with open(path, "rb") as handle:
            assert handle.read(8) == b"\x89PNG\r\n\x1a\n"
        picture = mpimg.imread(path)
        assert picture.ndim == 3 and picture.shape[0] >= 400 and picture.shape[1] >= 900
        assert picture[..., :3].std() > 0.05  # not blank
    plots = os.path.join(root, "report", "plots", "demo-asset")
    # shifted windows are marked in the monitored series, and nowhere else
    assert _red_pixels(os.path.join(plots, report.plot_file_name("bending_1", "mode_freq_hz"))) > 50
    assert _red_pixels(os.path.join(plots, report.plot_file_name("footing_n:footing_s", "lag_s"))) > 50
    assert _red_pixels(os.path.join(plots, report.plot_file_name("deck_mid_v", "rms"))) == 0
    assert ":" not in report.plot_file_name("footing_n:footing_s", "lag_s")


def test_missing_tables_are_named_on_the_page(tmp_path):
    root = str(tmp_path)
    write_example_output(root, with_shifts=False, with_rejects=False, with_correlations=False)
    assert report.main(["--output", root]) == 0
    with open(os.path.join(root, "report", "index.html"), encoding="utf-8") as handle:
        text = handle.read()
    assert "No shifts table was found" in text and "No input was rejected." in text
    page = _parse(os.path.join(root, "report", "index.html"))
    assets = {a["asset"]: a for a in _table_with(page, "windows planned")}
    assert int(assets["demo-asset"]["windows computed"]) == 70  # from the indicators table
    assert (
        os.path.getsize(
            os.path.join(root, "report", "plots", "demo-asset", report.plot_file_name("bending_1", "mode_freq_hz"))
        )
        > 1000
    )


def test_empty_output_folder_still_gets_a_page(tmp_path):
    assert report.main(["--output", str(tmp_path)]) == 0
    with open(tmp_path / "report" / "index.html", encoding="utf-8") as handle:
        text = handle.read()
    assert "No output tables with rows were found" in text and "No shifts table was found" in text


def test_missing_output_folder_is_an_error(tmp_path, capsys):
    # exit status 1 (a configuration error): 2 means a missing previous state (README "Commands")
    assert report.main(["--output", str(tmp_path / "nothing")]) == 1
    assert "is not a folder" in capsys.readouterr().err


def test_episodes_of_a_shifts_table_are_the_stages_episodes_open_first():
    """The page's episodes come from the package's one algorithm (stages.summaries.shift_episodes):
    an episode is identified by the first_alarm its shifted rows carry; open episodes first."""
    times = [START + dt.timedelta(hours=i) for i in range(6)]
    states_a = ["baseline", "normal", "shifted", "shifted", "normal", "shifted"]
    z_a = [0.1, 0.5, 4.0, -6.5, 1.0, 3.5]
    first_a = [None, None, times[2], times[2], None, times[5]]
    rows = [
        dict(
            asset="x",
            window_start=t,
            subject="a",
            indicator="rms",
            state=s,
            z=z,
            expected=1.0,
            direction=(1 if s == "shifted" else 0),
            onset=(times[1] if s == "shifted" else None),
            first_alarm=f,
            shift_size=(0.2 if s == "shifted" else None),
            detector=("cusum" if s == "shifted" else None),
            unit="g",
        )
        for t, s, z, f in zip(times, states_a, z_a, first_a)
    ]
    rows += [
        dict(
            asset="x",
            window_start=times[4],
            subject="b",
            indicator="rms",
            state="normal",
            z=0.0,
            expected=1.0,
            direction=0,
            onset=None,
            first_alarm=None,
            shift_size=None,
            detector=None,
            unit="g",
        ),
        dict(
            asset="x",
            window_start=times[5],
            subject="b",
            indicator="rms",
            state="shifted",
            z=-5.0,
            expected=1.0,
            direction=-1,
            onset=times[5],
            first_alarm=times[5],
            shift_size=-0.3,
            detector="ewma",
            unit="g",
        ),
    ]
    schema = tables.SHIFTS.insert(0, pa.field("asset", pa.string()))
    table = pa.Table.from_pylist(rows[::-1], schema=schema)  # unsorted on purpose
    episodes = episodes_from_shifts(table)
    summary = [
        (e["subject"], e["status"], e["n_windows"], e["first_alarm"], e["last_window"], e["direction"])
        for e in episodes
    ]
    # open episodes first, by onset: a's last episode (onset times[1]) before b's (onset times[5])
    assert summary == [
        ("a", "open", 1, times[5], times[5], 1),
        ("b", "open", 1, times[5], times[5], -1),
        ("a", "closed", 2, times[2], times[3], 1),
    ]
    assert episodes[2]["peak_abs_z"] == 6.5 and episodes[2]["detector"] == "cusum"
    assert episodes[2]["shift_size_pct"] == pytest.approx(20.0)  # 100 * 0.2 / |1.0|


def test_an_episodes_table_is_used_when_present(tmp_path):
    root = str(tmp_path)
    write_example_output(root)
    episode = dict(
        asset="demo-asset",
        date="2025-05-06",
        subject="torsion_1",
        indicator="mode_damping",
        onset=dt.datetime(2025, 5, 5, 12, tzinfo=UTC),
        first_alarm=dt.datetime(2025, 5, 5, 18, tzinfo=UTC),
        last_window=dt.datetime(2025, 5, 6, 22, tzinfo=UTC),
        status="open",
        direction=1,
        shift_size=0.008,
        peak_abs_z=7.5,
        detector="cusum",
        n_windows=15,
        unit="",
    )
    _write(root, "episodes", pa.Table.from_pylist([episode]))
    assert report.main(["--output", root]) == 0
    page = _parse(os.path.join(root, "report", "index.html"))
    first = _table_with(page, "estimated onset")[0]
    assert (first["subject"], first["indicator"], first["windows"]) == ("torsion_1", "mode_damping", "15")


def test_a_report_read_from_and_written_to_an_object_store(tmp_path):
    """The same output copied to the in-memory object store (``memfs://``, no folders) gives the
    same page, and the pictures land in the store, not on local disk."""
    local = str(tmp_path / "local")
    write_example_output(local)
    memory_filesystem.reset()
    for folder, _, names in os.walk(local):
        for name in names:
            path = os.path.join(folder, name)
            with open(path, "rb") as handle:
                memory_filesystem.put(
                    "memfs://site/out/" + os.path.relpath(path, local).replace(os.sep, "/"), handle.read()
                )
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        index = write_report("memfs://site/out", store=ReportFiles())
    finally:
        os.chdir(cwd)
    assert index == "memfs://site/out/report/index.html"
    assert not [n for n in os.listdir(tmp_path) if n.startswith("memfs")]  # nothing written locally
    opened = {path for _, path in memory_filesystem.calls("open")}
    assert any("/out/indicators/asset=demo-asset/" in p for p in opened)
    remote_page = memory_filesystem.get(index).decode("utf-8")
    write_report(local)
    with open(os.path.join(local, "report", "index.html"), encoding="utf-8") as handle:
        local_page = handle.read()
    drop = lambda page: [line for line in page.splitlines() if "report written" not in line]  # noqa: E731
    assert drop(remote_page) == drop(local_page)
    pictures = [p for p in memory_filesystem.paths("memfs://site/out/report/plots/") if p.endswith(".png")]
    assert len(pictures) == 5 and all(memory_filesystem.get(p)[:8] == b"\x89PNG\r\n\x1a\n" for p in pictures)


def test_legend_lies_inside_the_canvas_and_codes_that_hold_a_window_out_are_drawn_apart(tmp_path):
    """The legend of a monitored picture with both kinds of quality codes (six entries) is
    within the figure's canvas, and the held-out windows get their own legend entry."""
    import matplotlib.pyplot as plt

    from corrtransforms.report.plots import draw_series

    root = str(tmp_path)
    write_example_output(root)
    from corrtransforms.report.files import ReportFiles
    from corrtransforms.report.summaries import read_output

    output = read_output(root, ReportFiles())
    indicators, shifts = output.get("indicators"), output.get("shifts")
    pick = lambda t: t.filter(pa.compute.equal(t.column("subject"), "bending_1"))  # noqa: E731
    values = pick(indicators)
    quality = values.column("quality").to_pylist()
    quality[3], quality[9] = "window_too_short_for_screening;max_lag_short", "nonstationary;clipped"
    values = values.set_column(values.column_names.index("quality"), "quality", pa.array(quality))
    figure = draw_series("demo-asset", "bending_1", "mode_freq_hz", values, pick(shifts))
    picture = tmp_path / "legend.png"
    figure.savefig(picture, dpi=100)
    renderer = figure.canvas.get_renderer()
    legend = figure.legends[0]
    box, canvas = legend.get_window_extent(renderer), figure.bbox
    labels = [t.get_text() for t in legend.get_texts()]
    plt.close(figure)
    assert canvas.x0 <= box.x0 and box.x1 <= canvas.x1 and canvas.y0 <= box.y0 and box.y1 <= canvas.y1
    assert "value with an informational quality code (max_lag_short, ...)" in labels
    assert "held out of the detectors (clipped, ...)" in labels
    assert mpimg.imread(picture).shape[:2] == (600, 1000)


def test_shift_size_in_percent_and_baseline_status_on_the_page(tmp_path):
    root = str(tmp_path)
    write_example_output(root)
    state = [
        dict(
            asset="demo-asset",
            date="2025-05-06",
            window_start=dt.datetime(2025, 5, 6, 22, tzinfo=UTC),
            subject="bending_1",
            indicator="mode_freq_hz",
            phase="fitted",
            windows_seen=70,
            model_location=2.45,
            model_quality="ok",
        ),
        dict(
            asset="demo-asset",
            date="2025-05-06",
            window_start=dt.datetime(2025, 5, 6, 22, tzinfo=UTC),
            subject="footing_n:footing_s",
            indicator="lag_s",
            phase="accumulating",
            windows_seen=12,
            model_location=None,
            model_quality="ok",
        ),
    ]
    _write(root, "state", pa.Table.from_pylist(state))
    assert report.main(["--output", root]) == 0
    page = _parse(os.path.join(root, "report", "index.html"))
    first = _table_with(page, "estimated onset")[0]
    size = float(first["shift size"].split()[0])
    assert first["of baseline level"] == f"{100 * size / 2.45:+.1f} %"  # shift / |baseline level|
    with open(os.path.join(root, "report", "index.html"), encoding="utf-8") as handle:
        text = handle.read()
    assert "bending_1 \u2014 mode_freq_hz (baseline fitted)" in text
    assert "footing_n:footing_s \u2014 lag_s (baseline accumulating, 12 windows seen)" in text


def test_a_missing_matplotlib_is_one_line_and_status_1(tmp_path):
    root = str(tmp_path)
    write_example_output(root, with_correlations=False)
    script = (
        "import sys; sys.modules['matplotlib'] = None\n"
        "from pipelines import report\n"
        f"sys.exit(report.main(['--output', {root!r}]))"
    )
    repo = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=repo, timeout=120)
    assert done.returncode == 1
    assert done.stderr.strip().splitlines() == [
        'report: matplotlib is not installed; install the report extra: pip install "corrtransforms[report]"'
    ]
    assert not os.path.exists(os.path.join(root, "report"))  # no empty plots folder
