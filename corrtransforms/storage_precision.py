"""How the correlations table stores its lag lists: compact by default, full float32 on request.

The correlations table holds, per window and channel pair, one coefficient and one standard error
per lag: almost all of the table's bytes. Stored as float32 with every mantissa bit, those lists
are noise to a compressor and the table reached a quarter to two thirds of the raw archive's size.
The compact storage (``[correlation] storage = "compact"``, the default) keeps plain
``list<float32>`` columns, so every reader gets ordinary floats, but writes

- each coefficient rounded to a multiple of :data:`COEFFICIENT_STEP` = 2**-13 (about 1.2e-4):
  the rounding error is at most half a step, 6.1e-5, an absolute error on a number in [-1, 1];
- each standard error rounded to :data:`STDERR_MANTISSA_BITS` = 6 significant mantissa bits (round
  to nearest): a relative error of at most 2**-7 = 0.78 % of the standard error itself.

Both are exact float32 values with trailing zero bits, which Parquet's BYTE_STREAM_SPLIT encoding
and zstd compress well (the write stage asks for that encoding on the two list columns). The
precision lost is far below the random error the table reports: the coefficient's rounding error
against its own standard error is checked per table by :func:`worst_rounding_to_stderr`, and
docs/correlation.md states the measured figures. The in-pipeline values (from which the indicators
are computed) are never rounded; only the stored lists are.

Choice of step and bits: common practice for lossy float storage (quantise to a fixed absolute
step where the value range is bounded, keep a fixed number of significant bits where it is not),
sized by measurement on the benchmark archive (docs/correlation.md, "Storage").
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

#: absolute rounding step of a stored coefficient (an exact power of two)
COEFFICIENT_STEP = 2.0**-13
#: significant mantissa bits kept of a stored standard error (float32 has 23)
STDERR_MANTISSA_BITS = 6
#: the choices of ``[correlation] storage``
STORAGES = ("compact", "float32")
#: list columns of the correlations table that the compact storage rounds
LIST_COLUMNS = ("coefficient", "stderr")


def round_to_step(values: np.ndarray, step: float = COEFFICIENT_STEP) -> np.ndarray:
    """float32 values rounded to the nearest multiple of ``step`` (NaN stays NaN; ties to even)."""
    v = np.asarray(values, dtype=np.float64)
    return (np.round(v / step) * step).astype(np.float32)


def round_mantissa(values: np.ndarray, bits: int = STDERR_MANTISSA_BITS) -> np.ndarray:
    """float32 values rounded to ``bits`` significant mantissa bits, to nearest (ties away from zero).

    Non-finite values are returned unchanged; a value that would round past the largest float32 is
    kept as it was.
    """
    v = np.ascontiguousarray(values, dtype=np.float32)
    if not 0 <= bits <= 23:
        raise ValueError(f"bits must be in 0..23, got {bits}")
    if bits == 23:
        return v.copy()
    drop = 23 - bits
    u = v.view(np.uint32)
    rounded = ((u.astype(np.uint64) + (1 << (drop - 1))) & ~np.uint64((1 << drop) - 1)).astype(np.uint32)
    out = rounded.view(np.float32)
    keep = ~np.isfinite(v) | ~np.isfinite(out)
    return np.where(keep, v, out)


def _rounded_list(column: pa.ChunkedArray, rounding) -> pa.Array:
    lists = column.combine_chunks()
    if isinstance(lists, pa.ChunkedArray):  # an empty column
        lists = pa.array([], type=column.type)
    flat = lists.values.to_numpy(zero_copy_only=False)
    values = pa.array(rounding(flat), type=pa.float32())
    return pa.ListArray.from_arrays(lists.offsets, values, mask=lists.is_null())


def compact_correlations(table: pa.Table) -> pa.Table:
    """The correlations table with its coefficient and stderr lists rounded for compact storage."""
    out = table
    for name, rounding in (("coefficient", round_to_step), ("stderr", round_mantissa)):
        i = out.schema.get_field_index(name)
        field = out.schema.field(i)
        out = out.set_column(i, field, _rounded_list(out.column(name), rounding))
    return out


def worst_rounding_to_stderr(table: pa.Table) -> float:
    """Largest ratio of a coefficient's possible rounding error (half a step) to its stored stderr.

    Over finite, positive standard errors; NaN when there are none.
    """
    stderr = table.column("stderr").combine_chunks()
    if isinstance(stderr, pa.ChunkedArray) or len(stderr) == 0:
        return float("nan")
    se = stderr.values.to_numpy(zero_copy_only=False).astype(np.float64)
    se = se[np.isfinite(se) & (se > 0)]
    if se.size == 0:
        return float("nan")
    return float(0.5 * COEFFICIENT_STEP / se.min())


def parquet_column_paths() -> list:
    """The Parquet leaf paths of the list columns (for per-column encodings)."""
    return [f"{name}.list.element" for name in LIST_COLUMNS]
