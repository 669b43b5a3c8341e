"""Output tables read back as a user would (pyarrow.dataset over the Hive folders) and compared."""

import hashlib
import os

import pyarrow.dataset as ds

TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects", "mode_shapes")
SORT_KEYS = {
    "correlations": ["window_start", "channel_a", "channel_b"],
    "indicators": ["window_start", "subject", "indicator"],
    "shifts": ["window_start", "subject", "indicator"],
    "state": ["window_start", "subject", "indicator"],
    "baseline_sample": ["window_start", "subject", "indicator"],
    "rejects": ["stage", "source", "subject", "reason", "detail"],
    "mode_shapes": ["window_start", "mode", "channel"],
}


def read_table(output, name):
    """One table of an output folder as sorted columns (None when it was not written)."""
    folder = os.path.join(str(output), name)
    if not os.path.isdir(folder):
        return None
    table = ds.dataset(folder, format="parquet", partitioning="hive").to_table()
    return table.sort_by([(k, "ascending") for k in SORT_KEYS[name]]).to_pydict()


def assert_same_tables(left, right, tables=TABLES):
    """Every table of two output folders holds the same rows (NaN equal to NaN; file metadata,
    where the run id lives, is not compared)."""
    for name in tables:
        a, b = read_table(left, name), read_table(right, name)
        assert (a is None) == (b is None), name
        if a is None:
            continue
        assert a.keys() == b.keys(), name
        for column in a:
            assert a[column] == b[column] or _nan_equal(a[column], b[column]), (name, column)


def _nan_equal(xs, ys):
    if len(xs) != len(ys):
        return False
    for x, y in zip(xs, ys):
        if x == y:
            continue
        if isinstance(x, float) and isinstance(y, float) and x != x and y != y:
            continue
        if isinstance(x, list) and isinstance(y, list) and _nan_equal(x, y):
            continue
        return False
    return True


def files_by_path(root, skip=("_runs",)):
    """sha256 of every file below ``root`` except the run summaries (they name the output folder)."""
    found = {}
    for folder, _, names in os.walk(root):
        for name in names:
            path = os.path.join(folder, name)
            relative = os.path.relpath(path, root)
            if relative.split(os.sep)[0] in skip:
                continue
            with open(path, "rb") as handle:
                found[relative] = hashlib.sha256(handle.read()).hexdigest()
    return found
