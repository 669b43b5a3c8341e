"""The code examples of README.md and docs/*.md run as written, so an example that drifts from the
code fails here.

Every fenced ``python`` block runs in a fresh namespace, in a folder that holds ``demo_output/``
(the output of the session's real backfill of the invented demo archive, tests/conftest.py)
and ``demo_data/`` (its configuration and archive); a fenced ``sql`` block whose first line
is ``-- duckdb`` runs in DuckDB in the same folder and must return rows. A block preceded by the
line ``<!-- example: not run -->`` is a fragment (shown for its shape) and is skipped; the test
counts those so that none slips in unnoticed.
"""

from __future__ import annotations

import os
import re
import runpy
import shutil
from typing import List, Tuple

import pytest

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FENCE = re.compile(r"(?P<marker><!-- example: not run -->\n)?```(?P<lang>python|sql)\n(?P<body>.*?)\n```", re.S)
#: fragments allowed to stay unrun (file, count); each must say why in the prose around it
ALLOWED_FRAGMENTS = {}


def _documents() -> List[str]:
    docs = [os.path.join(REPO, "README.md"), os.path.join(REPO, "DEVELOPERS.md")]
    folder = os.path.join(REPO, "docs")
    docs += sorted(os.path.join(folder, n) for n in os.listdir(folder) if n.endswith(".md"))
    return docs


def _examples() -> List[Tuple[str, int, str, str, bool]]:
    out = []
    for path in _documents():
        with open(path, encoding="utf-8") as handle:
            text = handle.read()
        for m in FENCE.finditer(text):
            line = text.count("\n", 0, m.start("body")) + 1
            out.append((os.path.relpath(path, REPO), line, m.group("lang"), m.group("body"), bool(m.group("marker"))))
    return out


EXAMPLES = _examples()


@pytest.fixture(scope="module")
def example_folder(tmp_path_factory, demo_run):
    """A folder laid out as a checkout after ``make demo``: demo_output/ and demo_data/ with the
    configuration and its archives (links to the session's demo run, copied output)."""
    folder = tmp_path_factory.mktemp("examples")
    shutil.copytree(demo_run.output, folder / "demo_output")
    (folder / "demo_data").mkdir()
    shutil.copy(demo_run.root / "footbridge.toml", folder / "demo_data" / "footbridge.toml")
    os.symlink(demo_run.root / "archive", folder / "demo_data" / "archive")
    os.symlink(demo_run.root / "weather", folder / "demo_data" / "weather")
    return folder


@pytest.mark.parametrize("doc,line,lang,body,fragment", EXAMPLES, ids=[f"{e[0]}:{e[1]}" for e in EXAMPLES])
def test_example_runs(doc, line, lang, body, fragment, example_folder, monkeypatch):
    if fragment:
        pytest.skip("a fragment, marked as not run")
    monkeypatch.chdir(example_folder)
    if lang == "python":
        script = example_folder / f"example_{os.path.basename(doc)}_{line}.py"
        script.write_text(body + "\n")
        import matplotlib

        matplotlib.use("Agg")
        runpy.run_path(str(script), run_name="__main__")
    else:
        if not body.lstrip().startswith("-- duckdb"):
            pytest.skip("not a DuckDB query")
        import duckdb

        rows = duckdb.sql(body).fetchall()
        assert rows, f"{doc}:{line}: the query returned no rows on the demo output"


def test_fragments_are_few_and_known():
    found = {}
    for doc, _, _, _, fragment in EXAMPLES:
        if fragment:
            found[doc] = found.get(doc, 0) + 1
    assert found == ALLOWED_FRAGMENTS
