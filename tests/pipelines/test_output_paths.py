"""Output paths: asset and channel names never make the job write outside its output folder.

Asset names become folder names, so the configuration only accepts letters, digits, '-' and '_'.
Channel names (from the configuration or from an archive's channel column) only ever appear inside
files, as column values: a channel called "../x" is a row value, never a path.
"""

import os

import numpy as np
import pytest

from corrtransforms.config import ConfigError, parse_config
from pipelines.report import plot_file_name
from tests.support.archive_data import long_table, samples, wide_table, write_files
from tests.support.reliability_data import read_table, run_backfill, write_config

ODD_ASSET_NAMES = [
    "../x",
    "a/b",
    "a\\b",
    "..",
    ".",
    "/abs",
    "x y",
    "name:1",
    "tab\t",
    "nul\x00",
    "",
    "é",
    "a" * 65,
    "~user",
    "$HOME",
    "C:",
]
ODD_CHANNELS = ["../x", "..", "a/b", "c\\d", "/abs/path", " spaced name ", "é-ü"]


@pytest.mark.parametrize("name", ODD_ASSET_NAMES, ids=repr)
def test_asset_names_that_are_not_plain_folder_names_are_refused(name):
    raw = {"asset": {"name": name}, "archive": {"path": "archive", "sample_rate_hz": 10.0}}
    with pytest.raises(ConfigError, match=r"\[asset\] name"):
        parse_config(raw)


def _every_file(root):
    for folder, _, names in os.walk(root):
        for n in names:
            yield os.path.realpath(os.path.join(folder, n))


def _assert_inside(tmp_path, output, archive_files):
    """Every file below tmp_path is the archive, the config, or inside the output folder."""
    output = os.path.realpath(output)
    allowed = {os.path.realpath(p) for p in archive_files}
    for path in _every_file(str(tmp_path)):
        assert path.startswith(output + os.sep) or path in allowed or path.endswith(".toml"), path
    for path in _every_file(output):  # and inside the output, only the table layout
        relative = os.path.relpath(path, output).split(os.sep)
        assert relative[0] in (
            "correlations",
            "indicators",
            "shifts",
            "state",
            "baseline_sample",
            "mode_shapes",
            "rejects",
            "episodes",
            "_summaries",
            "_runs",
            "report",
        ), path
        if relative[0] == "report":  # report/index.html, report/plots/<asset>/<picture>.png
            assert relative[1:2] == ["index.html"] or (
                relative[1] == "plots" and relative[2] == "odd-asset" and len(relative) == 4
            ), path
        else:
            assert relative[1] == "asset=odd-asset", path


def test_long_layout_channel_values_with_path_characters_stay_inside_files(tmp_path):
    rng = np.random.default_rng(3)
    cols = samples(180, 10.0, seed=4, channels=("../x", ".."), covariate=False)
    cols["a/b"] = rng.standard_normal(cols["time"].size)
    archive = tmp_path / "nested" / "archive"
    files = write_files(str(archive), long_table(cols), 180, 2000)
    config = tmp_path / "nested" / "asset.toml"
    write_config(config, "archive", name="odd-asset", layout="long", covariates="[]")
    config.write_text(config.read_text().replace('names = ["a", "b"]\n', ""))  # channels from the archive
    output = tmp_path / "nested" / "out"
    counters = run_backfill(str(config), str(output))
    assert counters["windows_planned"] == counters["windows_computed"] == 3
    correlations = read_table(str(output), "correlations")
    assert set(correlations.column("channel_a").to_pylist()) == {"../x", "..", "a/b"}
    subjects = set(read_table(str(output), "indicators").column("subject").to_pylist())
    assert {"../x", "..", "a/b", "..:../x", "../x:a/b"} <= subjects
    from pipelines import report

    report.main(["--output", str(output)])
    _assert_inside(tmp_path, str(output), files)
    assert not os.path.exists(tmp_path / "x") and not os.path.exists(tmp_path / "nested" / "x")


def test_wide_layout_column_names_with_path_characters_stay_inside_files(tmp_path):
    cols = samples(120, 10.0, seed=5, channels=ODD_CHANNELS[:2], covariate=False)
    for i, name in enumerate(ODD_CHANNELS[2:]):
        cols[name] = np.random.default_rng(i).standard_normal(cols["time"].size)
    files = write_files(str(tmp_path / "archive"), wide_table(cols), 120, 600)
    names = "[" + ", ".join('"' + n.replace("\\", "\\\\") + '"' for n in ODD_CHANNELS) + "]"
    config = write_config(tmp_path / "asset.toml", "archive", name="odd-asset", names=names, covariates="[]")
    counters = run_backfill(config, str(tmp_path / "out"))
    assert counters["windows_planned"] == counters["windows_computed"] == 2
    got = set(read_table(str(tmp_path / "out"), "correlations").column("channel_b").to_pylist())
    assert got == set(ODD_CHANNELS)
    _assert_inside(tmp_path, str(tmp_path / "out"), files)


@pytest.mark.parametrize("subject", ODD_CHANNELS + ["../x:a/b", "..:.."])
def test_report_picture_names_have_no_separator(subject):
    name = plot_file_name(subject, "rms")
    assert "/" not in name and "\\" not in name and name not in (".", "..") and name.endswith("__rms.png")
