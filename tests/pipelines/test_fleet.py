"""Fleet runs end to end: a folder of assets with _defaults.toml, one pipeline, outputs equal to
the single runs asset by asset; a broken asset isolated (status 4, named in the fleet summary);
the defaults merged and duplicate names refused.

Archives: the reliability tests' clean archive (10 minutes at 10 Hz, 10 windows of 60 s) with a
different seed per asset.
"""

import html.parser
import json
import os

import pytest

from corrtransforms.config import ConfigError, merge_defaults
from corrtransforms.launch import fleet as fleet_launch
from pipelines import backfill, report
from tests.support.fleet_data import DEFAULTS, SOUTH_EXTRA, TABLES, assert_same_asset, asset_text
from tests.support.reliability_data import clean_columns, write_clean_archive


@pytest.fixture(scope="module")
def sites(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet")
    for name, seed in (("north", 21), ("south", 5)):
        write_clean_archive(str(root / "archives" / name), columns=clean_columns(seed=seed))
    fleet = root / "fleet"
    fleet.mkdir()
    (fleet / "_defaults.toml").write_text(DEFAULTS)
    (fleet / "north.toml").write_text(asset_text("north", "../archives/north"))
    # asset keys win, tables merge: south's own [baseline] windows over the defaults' min_windows
    (fleet / "south.toml").write_text(asset_text("south", "../archives/south", SOUTH_EXTRA))
    singles = root / "singles"
    singles.mkdir()
    for name, extra in (
        ("north", ""),
        ("south", SOUTH_EXTRA.replace("windows = 5\n", "windows = 5\nmin_windows = 2\n")),
    ):
        text = DEFAULTS.replace("[baseline]\nwindows = 4\nmin_windows = 2\n", "") if extra else DEFAULTS
        (singles / f"{name}.toml").write_text(
            asset_text(name, f"../archives/{name}") + text.replace("[archive]\n", "") + extra
        )
    return root


@pytest.fixture(scope="module")
def fleet_run(sites):
    fleet_output = str(sites / "out_fleet")
    found = backfill.main(["--config", str(sites / "fleet"), "--output", fleet_output, "--run_id", "fleet"])
    return fleet_output, found


def test_fleet_run_equals_the_single_runs_asset_by_asset(sites, fleet_run):
    fleet_output, found = fleet_run
    assert sorted(found) == ["north", "south"]
    assert all(found[a]["windows_planned"] == 10 and found[a]["windows_computed"] == 10 for a in found)
    for name in ("north", "south"):
        single_output = str(sites / f"out_{name}")
        counters = backfill.main(
            ["--config", str(sites / "singles" / f"{name}.toml"), "--output", single_output, "--run_id", "single"]
        )
        assert counters["windows_computed"] == found[name]["windows_computed"]
        assert_same_asset(fleet_output, single_output, name)
    # the defaults merged under south's keys: its own baseline windows, the defaults' min_windows
    with open(os.path.join(fleet_output, "_runs", "fleet", "fleet.json")) as handle:
        summary = json.load(handle)
    assert summary["status"] == 0
    assert [(a["asset"], a["outcome"]) for a in summary["assets"]] == [("north", "done"), ("south", "done")]
    assert not os.path.exists(os.path.join(fleet_output, "_temporary", "fleet"))
    # south's budget is named in its run summary; with 60-s windows no series fits (every window
    # has few_effective_samples), so the limits in use are checked where baselines fit:
    # tests/pipelines/test_fleet_resume.py::test_the_budget_gives_the_limits_of_the_fitted_states
    with open(os.path.join(fleet_output, "_runs", "asset=south", "fleet.json")) as handle:
        limits = json.load(handle)["detector_limits"]
    assert limits["false_alarms_per_year"] == 1.0


def test_broken_assets_are_reported_and_the_others_written(sites, fleet_run):
    broken = sites / "broken"
    broken.mkdir()
    (broken / "_defaults.toml").write_text(DEFAULTS)
    (broken / "north.toml").write_text(asset_text("north", "../archives/north"))
    (broken / "badkey.toml").write_text(asset_text("badkey", "../archives/south", "[windows]\nmin_coverage = 1.5\n"))
    (broken / "nofiles.toml").write_text(asset_text("nofiles", "../archives/nowhere"))
    # the fleet's shared shift detection has no novelty step: such an asset is refused, not run without it
    (broken / "novel.toml").write_text(asset_text("novel", "../archives/south", "[shifts]\nmultivariate = true\n"))
    output = str(sites / "out_broken")
    with pytest.raises(SystemExit) as stop:
        backfill.main(["--config", str(broken), "--output", output, "--run_id", "broken"])
    assert stop.value.code == 4
    assert_same_asset(output, str(sites / "out_fleet"), "north")
    for table in TABLES:
        assert not os.path.exists(os.path.join(output, table, "asset=badkey"))
        assert not os.path.exists(os.path.join(output, table, "asset=nofiles"))
    with open(os.path.join(output, "_runs", "fleet", "broken.json")) as handle:
        summary = json.load(handle)
    outcomes = {a["asset"]: a for a in summary["assets"]}
    assert summary["status"] == 4
    assert outcomes["north"]["outcome"] == "done"
    assert outcomes["badkey"]["status"] == 1 and "[windows] min_coverage" in outcomes["badkey"]["reason"]
    assert outcomes["badkey"]["source"].endswith("badkey.toml")
    assert outcomes["nofiles"]["status"] == 1 and "no files match" in outcomes["nofiles"]["reason"]
    assert outcomes["novel"]["status"] == 1 and "multivariate" in outcomes["novel"]["reason"]
    assert not os.path.exists(os.path.join(output, "indicators", "asset=novel"))


def test_defaults_merge_tables_recursively_and_replace_arrays():
    defaults = {"channels": {"names": ["a", "b"], "units": {"a": "g", "b": "g"}}, "windows": {"length_s": 60.0}}
    asset = {"channels": {"names": ["a"], "units": {"b": "m/s^2"}}, "asset": {"name": "x"}}
    assert merge_defaults(defaults, asset) == {
        "channels": {"names": ["a"], "units": {"a": "g", "b": "m/s^2"}},
        "windows": {"length_s": 60.0},
        "asset": {"name": "x"},
    }
    assert defaults["channels"]["names"] == ["a", "b"]  # the defaults are not changed


def test_folder_loading_skips_underscore_files_and_resolves_default_paths_per_asset(tmp_path):
    (tmp_path / "site").mkdir()
    (tmp_path / "site" / "_defaults.toml").write_text(DEFAULTS.replace("[archive]\n", '[archive]\npath = "data"\n'))
    (tmp_path / "site" / "_notes.toml").write_text("not = 'an asset'")
    (tmp_path / "site" / "one.toml").write_text('[asset]\nname = "one"\n')
    files = fleet_launch.member_files([str(tmp_path / "site")])
    assert [os.path.basename(p) for p, _ in files] == ["one.toml"]
    path, defaults_path = files[0]
    config = fleet_launch.load_member(path, fleet_launch.read_toml(defaults_path))
    # a relative path of the defaults resolves against the asset file's folder
    assert config.archive.path == os.path.join(str(tmp_path / "site"), "data")
    assert config.windows.length_s == 60.0 and config.channels.names == ("a", "b")


def test_duplicate_asset_names_are_an_error_naming_both_files(tmp_path):
    (tmp_path / "a.toml").write_text(asset_text("same", "x") + DEFAULTS.replace("[archive]\n", ""))
    (tmp_path / "b.toml").write_text(asset_text("same", "x") + DEFAULTS.replace("[archive]\n", ""))
    with pytest.raises(SystemExit) as stop:
        fleet_launch.load_fleet([str(tmp_path / "a.toml"), str(tmp_path / "b.toml")], None, None)
    message = str(stop.value.code)
    assert "a.toml" in message and "b.toml" in message and "'same'" in message


def test_a_folder_without_assets_is_a_configuration_error(tmp_path):
    (tmp_path / "_defaults.toml").write_text(DEFAULTS)
    with pytest.raises(ConfigError, match="gives no asset file"):
        fleet_launch.member_files([str(tmp_path)])


class _Links(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.links, self.rows, self.cells = [], [], None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag in ("a", "img") and (attrs.get("href") or attrs.get("src")):
            self.links.append(attrs.get("href") or attrs.get("src"))
        if tag == "tr":
            self.cells = []
        if tag == "td" and self.cells is not None:
            self.cells.append("")

    def handle_data(self, data):
        if self.cells:
            self.cells[-1] += data

    def handle_endtag(self, tag):
        if tag == "tr" and self.cells:
            self.rows.append(self.cells)
        if tag == "tr":
            self.cells = None


def _page(path, section=None):
    """Links and table rows of a page, or of one of its sections (from its h2 id to the next h2)."""
    parser = _Links()
    with open(path, encoding="utf-8") as handle:
        text = handle.read()
    if section is not None:
        start = text.index(f'<h2 id="{section}">')
        end = text.find("<h2", start + 1)
        text = text[start : end if end > 0 else len(text)]
    parser.feed(text)
    return parser


def test_report_of_a_fleet_starts_with_an_overview_linking_each_asset(fleet_run):
    pytest.importorskip("matplotlib")
    fleet_output, found = fleet_run
    assert report.main(["--output", fleet_output]) == 0
    folder = os.path.join(fleet_output, "report")
    # the fleet's page: open episodes first, then the overview of its assets
    text = open(os.path.join(folder, "index.html"), encoding="utf-8").read()
    assert text.index("Open shift episodes") < text.index('<h2 id="overview">Fleet overview</h2>')
    overview = _page(os.path.join(folder, "index.html"), section="overview")
    assert [row[0] for row in overview.rows] == ["north", "south"]
    for row in overview.rows:
        # the last day's windows: all 10 of the archive's single day; every series fitted
        assert row[2] == "10", row
        assert row[4].startswith("0 of ") and int(row[4].split(" of ")[1]) > 0, row
    assert overview.links == ["asset-north.html", "asset-south.html"]
    for link in overview.links:
        page = _page(os.path.join(folder, link))
        assert page.links, link
        for target in page.links:
            if "://" in target or target.startswith("#"):
                continue
            assert os.path.exists(os.path.join(folder, target)), (link, target)
