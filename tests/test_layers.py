"""The layers import only downwards (shared/ARCHITECTURE.md, "Layers").

Read from the source with :mod:`ast` (nothing is imported), so a violation is found even in a
function-level import:

- ``corrtransforms/numerics/``: arrays in, arrays out: numpy and scipy only, never Beam, pyarrow,
  the configuration, the rejects, the stages or anything above;
- ``corrtransforms/stages/`` and the package-root modules (config, records, rejects, tables,
  timeutil): no Beam, nothing from beam/, report/ or the launchers;
- ``corrtransforms/beam/``: no launcher code, no report;
- nothing in the package imports ``pipelines`` or ``demo_data`` (they are not installed).
"""

from __future__ import annotations

import ast
import os
from typing import Iterator, List, Tuple

import pytest

PACKAGE = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "corrtransforms")
ROOT_MODULES = ("config.py", "records.py", "rejects.py", "storage_precision.py", "tables.py", "timeutil.py")

#: (folder or root module, forbidden import prefixes)
RULES = {
    "numerics": (
        "apache_beam",
        "pyarrow",
        "corrtransforms.config",
        "corrtransforms.rejects",
        "corrtransforms.records",
        "corrtransforms.tables",
        "corrtransforms.stages",
        "corrtransforms.beam",
        "corrtransforms.report",
        "corrtransforms.launch",
        "pipelines",
        "demo_data",
    ),
    "stages": (
        "apache_beam",
        "corrtransforms.beam",
        "corrtransforms.report",
        "corrtransforms.launch",
        "pipelines",
        "demo_data",
    ),
    "root": (
        "apache_beam",
        "corrtransforms.beam",
        "corrtransforms.report",
        "corrtransforms.launch",
        "corrtransforms.stages",
        "pipelines",
        "demo_data",
    ),
    "beam": ("corrtransforms.report", "corrtransforms.launch", "pipelines", "demo_data"),
    "report": ("pipelines", "demo_data"),
    "launch": ("pipelines", "demo_data"),
}


def _imports(path: str) -> Iterator[Tuple[int, str]]:
    with open(path, encoding="utf-8") as handle:
        tree = ast.parse(handle.read(), filename=path)
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield node.lineno, alias.name
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            yield node.lineno, node.module
            for alias in node.names:  # "from corrtransforms import stages" names a module too
                yield node.lineno, f"{node.module}.{alias.name}"
        elif isinstance(node, ast.ImportFrom) and node.level:
            raise AssertionError(f"{path}:{node.lineno}: relative import (the package uses absolute ones)")


def _files(layer: str, package: str) -> List[str]:
    if layer == "root":
        return [os.path.join(package, name) for name in ROOT_MODULES if os.path.exists(os.path.join(package, name))]
    folder = os.path.join(package, layer)
    out = []
    for where, _, names in os.walk(folder):
        out.extend(os.path.join(where, n) for n in names if n.endswith(".py"))
    return sorted(out)


def _violations(layer: str, package: str = PACKAGE) -> List[str]:
    forbidden = RULES[layer]
    found = []
    for path in _files(layer, package):
        for line, name in _imports(path):
            if any(name == f or name.startswith(f + ".") for f in forbidden):
                found.append(f"{os.path.relpath(path, package)}:{line} imports {name}")
    return found


@pytest.mark.parametrize("layer", sorted(RULES))
def test_layer_imports_only_downwards(layer):
    if layer not in ("root",) and not os.path.isdir(os.path.join(PACKAGE, layer)):
        pytest.fail(f"corrtransforms/{layer}/ is missing")
    assert _violations(layer) == []


def test_the_check_sees_a_violation(tmp_path):
    """The checker itself: a numerics module that imports Beam inside a function is caught."""
    fake = tmp_path / "numerics"
    fake.mkdir()
    (fake / "bad.py").write_text("def f():\n    import apache_beam as beam\n    return beam\n")
    assert _violations("numerics", str(tmp_path)) == ["numerics/bad.py:2 imports apache_beam"]


#: functions allowed over MAX_FUNCTION_LINES, with the reason (none today)
LONG_FUNCTIONS_ALLOWED = {}
MAX_FUNCTION_LINES = 80


def _docstring_lines(node: ast.AST) -> int:
    body = getattr(node, "body", [])
    if (
        body
        and isinstance(body[0], ast.Expr)
        and isinstance(body[0].value, ast.Constant)
        and isinstance(body[0].value.value, str)
    ):
        return body[0].end_lineno - body[0].lineno + 1
    return 0


def _long_functions(package: str = PACKAGE) -> List[str]:
    found = []
    for where, _, names in os.walk(package):
        for name in sorted(n for n in names if n.endswith(".py")):
            path = os.path.join(where, name)
            with open(path, encoding="utf-8") as handle:
                tree = ast.parse(handle.read(), filename=path)
            for node in ast.walk(tree):
                if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                    length = node.end_lineno - node.lineno + 1 - _docstring_lines(node)
                    key = f"{os.path.relpath(path, package)}:{node.name}"
                    if length > MAX_FUNCTION_LINES and key not in LONG_FUNCTIONS_ALLOWED:
                        found.append(f"{key} ({length} lines)")
    return found


def test_no_function_over_a_screenful():
    """Every function of the package fits in MAX_FUNCTION_LINES lines of code (its numpydoc
    docstring not counted: Parameters, Returns, Notes and References are long by design): a
    longer one becomes named steps (STYLE.md, "For this project")."""
    assert _long_functions() == []
