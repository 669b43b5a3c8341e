"""Fixtures shared by several test files.

``demo_run``: what ``make demo`` runs (the generator and the backfill) on the full invented
footbridge archive, once per session in a temporary folder; the end-to-end demo test and the
doc-example test (README and docs code run on its output) both read it.
"""

import contextlib
import dataclasses
import io
import os
import shutil

import pytest

# the suite starts hundreds of small pipelines: one process each (the default local run's worker
# processes cost a start-up per pipeline); tests of the multi-process run pass their flags, and
# tests/pipelines/test_determinism.py checks the default itself with this variable removed
os.environ.setdefault("CORRTRANSFORMS_LOCAL_WORKERS", "1")


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(items):
    """Groups for ``pytest -n N --dist loadgroup`` (make test): a file's tests stay on one worker,
    so its module fixtures (an archive and its backfill) are built once, and every test that reads
    the session's demo run is on the worker that builds it. Without xdist the marks do nothing."""
    for item in items:
        if item.get_closest_marker("xdist_group") is None:
            group = "demo_run" if "demo_run" in getattr(item, "fixturenames", ()) else item.nodeid.split("::")[0]
            item.add_marker(pytest.mark.xdist_group(group))


REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO_DIR = os.path.join(REPO, "demo_data")


@dataclasses.dataclass(frozen=True)
class DemoRun:
    root: object  # pathlib.Path: archive/, footbridge.toml, output/
    output: object  # pathlib.Path of the backfill's output
    counters: dict
    expected: dict  # demo_data.generate.expected_changes()
    printed: str  # what the backfill printed (its run summary)

    def __iter__(self):  # unpacks as (root, output, counters, expected), as the tests do
        return iter((self.root, self.output, self.counters, self.expected))


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    from demo_data import generate
    from pipelines import backfill

    root = tmp_path_factory.mktemp("demo")
    generate.write_archive(str(root / "archive"))
    shutil.copy(os.path.join(DEMO_DIR, "footbridge.toml"), root / "footbridge.toml")
    output = root / "output"
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        counters = backfill.main(
            ["--config", str(root / "footbridge.toml"), "--output", str(output), "--run_id", "demo"]
        )
    return DemoRun(root, output, counters, generate.expected_changes(), printed.getvalue())
