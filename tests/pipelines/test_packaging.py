"""The package builds as an sdist and a wheel from setup.cfg, offline, with what remote workers and
the demo need; the wheel works on its own (imported from the wheel file, not from this checkout)
and, installed in a clean virtual environment, gives the three console commands. The wheel holds
the one package ``corrtransforms``: the checkout's launchers (``pipelines``) and the demo
(``demo_data``) ship in the sdist only.

The build runs on a copy of the project's files in a temporary folder (the shared checkout is left
alone): sdist with setuptools' PEP 517 backend, then the wheel from the unpacked sdist with
``pip wheel --no-deps --no-build-isolation`` (no download: setuptools and wheel are test extras).
"""

from __future__ import annotations

import configparser
import os
import re
import shutil
import subprocess
import sys
import tarfile
import zipfile

import pytest

import corrtransforms

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
VERSION = corrtransforms.__version__
COPIED = (
    "setup.cfg",
    "setup.py",
    "pyproject.toml",
    "README.md",
    "MANIFEST.in",
    "requirements-worker.txt",
    "corrtransforms",
    "pipelines",
    "demo_data",
    "docs",
)
#: modules a worker imports (the Beam layer and everything it reaches), and the demo's files
REQUIRED = (
    "corrtransforms/__init__.py",
    "corrtransforms/config.py",
    "corrtransforms/stages/plan.py",
    "corrtransforms/stages/read.py",
    "corrtransforms/stages/write.py",
    "corrtransforms/beam/__init__.py",
    "corrtransforms/beam/plan.py",
    "corrtransforms/beam/read.py",
    "corrtransforms/beam/correlate.py",
    "corrtransforms/beam/write.py",
    "corrtransforms/beam/filesystems.py",
    "corrtransforms/beam/metrics.py",
    "corrtransforms/beam/monitor.py",
    "corrtransforms/beam/shifts.py",
    "corrtransforms/beam/indicators.py",
    "corrtransforms/beam/output_tables.py",
    "corrtransforms/launch/__init__.py",
    "corrtransforms/launch/common.py",
    "corrtransforms/launch/backfill.py",
    "corrtransforms/launch/nightly.py",
    "corrtransforms/launch/report.py",
    "corrtransforms/report/__init__.py",
    "corrtransforms/report/summaries.py",
    "corrtransforms/report/plots.py",
    "corrtransforms/report/page.py",
    "corrtransforms/report/files.py",
)
#: files of the checkout that the sdist carries and the wheel does not install
CHECKOUT_ONLY = (
    "pipelines/__init__.py",
    "pipelines/backfill.py",
    "pipelines/nightly.py",
    "pipelines/report.py",
    "demo_data/__init__.py",
    "demo_data/generate.py",
    "demo_data/footbridge.toml",
    "demo_data/expected_changes.json",
)
COMMANDS = ("corrtransforms-backfill", "corrtransforms-nightly", "corrtransforms-report")

pytestmark = pytest.mark.slow


def _run(command, cwd, env=None):
    done = subprocess.run(command, cwd=cwd, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, f"{command} failed:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
    return done


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("packaging")
    source = root / "source"
    source.mkdir()
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", "*.egg-info", "archive", "build", "dist")
    for name in COPIED:
        origin = os.path.join(REPO, name)
        if os.path.isdir(origin):
            shutil.copytree(origin, source / name, ignore=ignore)
        else:
            shutil.copy2(origin, source / name)
    dist = root / "dist"
    dist.mkdir()
    _run(
        [sys.executable, "-c", f"from setuptools import build_meta; build_meta.build_sdist({str(dist)!r})"],
        cwd=str(source),
    )
    sdists = list(dist.glob("*.tar.gz"))
    assert [p.name for p in sdists] == [f"corrtransforms-{VERSION}.tar.gz"]
    unpacked = root / "unpacked"
    with tarfile.open(sdists[0]) as archive:
        archive.extractall(unpacked, filter="data")
    wheels = root / "wheels"
    _run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "--no-index",
            "--quiet",
            "-w",
            str(wheels),
            str(unpacked / f"corrtransforms-{VERSION}"),
        ],
        cwd=str(root),
    )
    found = list(wheels.glob("*.whl"))
    assert [p.name for p in found] == [f"corrtransforms-{VERSION}-py3-none-any.whl"]
    return root, sdists[0], found[0]


def test_sdist_holds_the_sources_and_not_the_demo_archive(built):
    _, sdist, _ = built
    with tarfile.open(sdist) as archive:
        names = {n.split("/", 1)[1] for n in archive.getnames() if "/" in n}
    for required in (
        REQUIRED
        + CHECKOUT_ONLY
        + ("setup.cfg", "setup.py", "pyproject.toml", "requirements-worker.txt", "docs/cluster.md")
    ):
        assert required in names, required
    assert not [n for n in names if n.startswith("demo_data/archive") or n.endswith(".parquet")]


def test_wheel_holds_the_package_its_commands_and_the_declared_dependencies(built):
    _, _, wheel = built
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        metadata = archive.read(f"corrtransforms-{VERSION}.dist-info/METADATA").decode()
        entry_points = archive.read(f"corrtransforms-{VERSION}.dist-info/entry_points.txt").decode()
    for required in REQUIRED:
        assert required in names, required
    tops = {n.split("/")[0] for n in names if not n.startswith(f"corrtransforms-{VERSION}.dist-info")}
    assert tops == {"corrtransforms"}  # no pipelines, demo_data, tests, benchmarks or archive
    for command in COMMANDS:
        assert f"{command} = corrtransforms.launch." in entry_points, command
    assert not [n for n in names if n.endswith(".parquet")]
    # every module of the checkout's packages is in the wheel (a new subpackage without
    # __init__.py would silently be left out)
    for package in ("corrtransforms",):
        for folder, _, files in os.walk(os.path.join(REPO, package)):
            if "archive" in os.path.relpath(folder, REPO).split(os.sep) or "__pycache__" in folder:
                continue
            for name in files:
                if name.endswith(".py"):
                    rel = os.path.relpath(os.path.join(folder, name), REPO).replace(os.sep, "/")
                    assert rel in names, rel
    requires = set(re.findall(r"^Requires-Dist: ([A-Za-z0-9_.-]+)[^;\n]*$", metadata, re.M))
    assert {"apache-beam", "numpy", "scipy", "pyarrow"} <= requires


def test_worker_requirements_match_install_requires():
    parser = configparser.ConfigParser()
    parser.read(os.path.join(REPO, "setup.cfg"))
    declared = {line.strip() for line in parser["options"]["install_requires"].splitlines() if line.strip()}
    with open(os.path.join(REPO, "requirements-worker.txt")) as handle:
        worker = {line.strip() for line in handle if line.strip() and not line.startswith("#")}
    # the worker image provides apache-beam (the launcher's version); everything else is the same
    assert worker == {d for d in declared if not d.startswith("apache-beam")}


def test_the_wheel_runs_on_its_own(built, tmp_path):
    """Import from the wheel file (zip import, pure Python) in an isolated interpreter started
    outside the checkout, and write a demo archive and configuration with the packaged generator."""
    _, _, wheel = built
    script = f"""
import sys
sys.path.insert(0, {str(wheel)!r})
import corrtransforms, corrtransforms.beam.monitor, corrtransforms.launch.backfill, corrtransforms.report
for module in (corrtransforms, corrtransforms.launch.backfill, corrtransforms.report):
    assert module.__file__.startswith({str(wheel)!r}), module.__file__
print(corrtransforms.__version__)
"""
    done = _run([sys.executable, "-I", "-c", script], cwd=str(tmp_path))
    assert done.stdout.strip() == VERSION
    # the demo stays runnable from the checkout: the generator's command line, one day, one
    # record in twelve hours
    _run(
        [
            sys.executable,
            "-m",
            "demo_data.generate",
            "--out",
            str(tmp_path / "site" / "archive"),
            "--days",
            "1",
            "--every-hours",
            "12",
            "--config-out",
            str(tmp_path / "site" / "footbridge.toml"),
        ],
        cwd=REPO,
    )
    assert len(list((tmp_path / "site" / "archive").rglob("*.parquet"))) == 2
    from corrtransforms.config import load_config

    config = load_config(str(tmp_path / "site" / "footbridge.toml"))
    assert config.archive.path == str(tmp_path / "site" / "archive")
    # and the weather logger's day beside it, named by the configuration's covariate source
    assert len(list((tmp_path / "site" / "weather").rglob("*.parquet"))) == 1
    assert config.covariate_sources[0].path == str(tmp_path / "site" / "weather")


def test_the_installed_commands_run_in_a_clean_environment(built, tmp_path):
    """pip installs the wheel (no index, no dependencies) into a new virtual environment whose
    dependencies come from this interpreter's site-packages as a plain path (so the checkout's
    editable install is not seen); each console command answers ``--help`` with status 0."""
    _, _, wheel = built
    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", str(venv)], cwd=str(tmp_path))
    python = venv / "bin" / "python"
    _run(
        [
            sys.executable,
            "-m",
            "pip",
            "--python",
            str(python),
            "install",
            "--no-deps",
            "--no-index",
            "--quiet",
            str(wheel),
        ],
        cwd=str(tmp_path),
    )
    site = _run(
        [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=str(tmp_path)
    ).stdout.strip()
    dependencies = [p for p in sys.path if p.endswith("site-packages")]
    with open(os.path.join(site, "zz_dependencies.pth"), "w") as handle:
        handle.write("\n".join(dependencies) + "\n")
    where = _run([str(python), "-c", "import corrtransforms; print(corrtransforms.__file__)"], cwd=str(tmp_path))
    assert where.stdout.strip().startswith(site)
    for command in COMMANDS:
        done = _run([str(venv / "bin" / command), "--help"], cwd=str(tmp_path))
        assert "--output" in done.stdout and "exit statuses" in done.stdout, (command, done.stdout)
