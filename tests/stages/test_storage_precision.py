"""Compact storage of the correlations table's lag lists: bounded rounding, smaller files, plain floats."""

import glob
import os

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corrtransforms import storage_precision as sp
from corrtransforms.config import ConfigError
from corrtransforms.stages.write import write_tables
from tests.stages.test_write import _correlation_rows
from tests.support.archive_data import T0, make_config


def _reference_mantissa(values, bits):
    # outside reference: numpy's frexp/ldexp (x = m * 2**e, 0.5 <= |m| < 1), m rounded to
    # bits + 1 significant binary digits (the leading one plus `bits` stored bits), half away from 0
    m, e = np.frexp(values.astype(np.float64))
    scale = 2.0 ** (bits + 1)
    rounded = np.sign(m) * np.floor(np.abs(m) * scale + 0.5) / scale
    return np.ldexp(rounded, e).astype(np.float32)


def test_coefficients_are_multiples_of_the_step_within_half_a_step():
    x = np.random.default_rng(1).uniform(-1, 1, 100_000).astype(np.float32)
    q = sp.round_to_step(x)
    assert q.dtype == np.float32
    # closed form: rounding to a grid of step s moves a value by at most s / 2
    assert np.max(np.abs(q.astype(np.float64) - x)) <= sp.COEFFICIENT_STEP / 2
    assert np.all(np.mod(q.astype(np.float64), sp.COEFFICIENT_STEP) == 0)
    assert np.isnan(sp.round_to_step(np.array([np.nan], np.float32))[0])


@pytest.mark.parametrize("bits", [3, 6, 10])
def test_stderr_mantissa_rounding_matches_numpy_frexp(bits):
    x = np.random.default_rng(2).lognormal(-4, 2, 50_000).astype(np.float32)
    q = sp.round_mantissa(x, bits)
    np.testing.assert_array_equal(q, _reference_mantissa(x, bits))
    rel = np.abs(q.astype(np.float64) - x) / x
    assert rel.max() <= 2.0 ** -(bits + 1)
    special = np.array([np.nan, np.inf, 0.0, np.finfo(np.float32).max], np.float32)
    out = sp.round_mantissa(special, bits)
    assert np.isnan(out[0]) and out[1] == np.inf and out[2] == 0.0 and out[3] == special[3]


def _smooth_rows(n_rows, lags, seed=3):
    """Rows with correlation-like lists: a smooth damped cosine plus noise, a smooth stderr."""
    table = _correlation_rows([T0 + i * 600_000_000 for i in range(n_rows)], lags=lags)
    rng = np.random.default_rng(seed)
    tau = np.arange(lags) * 0.01
    coef = [
        (np.exp(-tau / 2) * np.cos(2 * np.pi * 3 * tau) + 0.01 * rng.standard_normal(lags)).astype(np.float32)
        for _ in range(n_rows)
    ]
    stderr = [(0.01 + 0.002 * np.sqrt(tau) + 1e-4 * rng.random(lags)).astype(np.float32) for _ in range(n_rows)]
    table = table.set_column(8, table.schema.field(8), pa.array([c.tolist() for c in coef], pa.list_(pa.float32())))
    i = table.schema.get_field_index("stderr")
    return table.set_column(i, table.schema.field(i), pa.array([s.tolist() for s in stderr], pa.list_(pa.float32())))


def _written(root, storage, rows):
    config = make_config("/nowhere", extra={"correlation": {"storage": storage}})
    write_tables(str(root), config, "run-1", {"correlations": [rows]})
    (path,) = glob.glob(os.path.join(str(root), "correlations", "*", "*", "*.parquet"))
    return path


def test_compact_storage_is_smaller_bounded_and_read_as_plain_floats(tmp_path):
    rows = _smooth_rows(24, 2001)
    full = _written(tmp_path / "full", "float32", rows)
    compact = _written(tmp_path / "compact", "compact", rows)
    # float32 storage keeps every bit
    back = pq.read_table(full)
    assert back.column("coefficient").to_pylist() == rows.column("coefficient").to_pylist()
    small = pq.read_table(compact)
    assert small.schema.field("coefficient").type == pa.list_(pa.float32())
    c_in = np.concatenate(rows.column("coefficient").to_numpy(zero_copy_only=False))
    c_out = np.concatenate(small.column("coefficient").to_numpy(zero_copy_only=False))
    s_in = np.concatenate(rows.column("stderr").to_numpy(zero_copy_only=False)).astype(np.float64)
    s_out = np.concatenate(small.column("stderr").to_numpy(zero_copy_only=False)).astype(np.float64)
    assert np.max(np.abs(c_out - c_in)) <= sp.COEFFICIENT_STEP / 2
    assert np.max(np.abs(s_out - s_in) / s_in) <= 2.0 ** -(sp.STDERR_MANTISSA_BITS + 1)
    # the precision lost is far below the reported random error (issue: below a tenth of the median)
    assert sp.COEFFICIENT_STEP / 2 < 0.1 * np.median(s_in)
    assert sp.worst_rounding_to_stderr(small) < 0.01
    # compression: the rounded lists take well under the float32 bytes (measured here about 0.45)
    assert os.path.getsize(compact) < 0.6 * os.path.getsize(full)
    # another reader gets the same plain floats
    first = duckdb.sql(f"select coefficient from read_parquet('{compact}') order by window_start limit 1").fetchall()
    np.testing.assert_array_equal(np.array(first[0][0], np.float32), small.column("coefficient")[0].as_py())


def test_unknown_storage_is_a_config_error():
    with pytest.raises(ConfigError, match="storage"):
        make_config("/nowhere", extra={"correlation": {"storage": "float16"}})
