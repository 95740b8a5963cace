"""Assemble output columns: nulls where a row has no value, statuses as a dictionary."""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa

from volsweep.kernel import status as _status

STATUS_VOCABULARY = pa.array(_status.NAMES, type=pa.string())
STATUS_TYPE = pa.dictionary(pa.int8(), pa.string())
_SMALL_BYTES = 64 * 1024
_FEW_COLUMNS = 8


def new_array(shape, dtype=np.float64) -> np.ndarray:
    """An uninitialised output array in Arrow's memory pool (64-byte aligned).

    Output columns are large and fresh on every call (all Greeks of 1M rows: 128 MB).
    From numpy, each such allocation is a new mapping the OS must fault in and zero, and
    with transparent huge pages a fault can stall on memory compaction; Arrow's pool keeps
    and reuses freed memory (benchmarks/RESULTS.md has the measured write times).  The
    Arrow columns then wrap the same memory without a copy.  Small outputs (up to 64 KiB)
    come from numpy, whose heap reuses them as well: there the pool's allocation would
    cost more than the kernel of a 100-row batch.
    """
    dtype = np.dtype(dtype)
    count = math.prod(shape) if isinstance(shape, tuple) else int(shape)
    if count * dtype.itemsize <= _SMALL_BYTES:
        return np.empty(shape, dtype)
    buf = pa.allocate_buffer(count * dtype.itemsize)
    return np.frombuffer(buf, dtype, count).reshape(shape)


def validity_buffer(valid: np.ndarray):
    """(Arrow validity bitmap or None when every row is valid, null count) of ``valid``;
    computed once, it may be shared by several columns of one batch."""
    n = len(valid)
    n_valid = int(np.count_nonzero(valid))
    if n_valid == n:
        return None, 0
    return pa.py_buffer(np.packbits(valid, bitorder="little")), n - n_valid


def float_column(values: np.ndarray, valid: np.ndarray, validity=None) -> pa.Array:
    """float64 Arrow array over ``values`` (no copy), null where ``valid`` is False
    (``validity``: the precomputed ``validity_buffer(valid)``)."""
    bitmap, nulls = validity_buffer(valid) if validity is None else validity
    return pa.Array.from_buffers(pa.float64(), len(values), [bitmap, pa.py_buffer(values)],
                                 null_count=nulls)


def status_column(codes: np.ndarray) -> pa.DictionaryArray:
    """Dictionary-encoded status over the int8 codes (no copy).

    The codes are the kernel's (every row written, every value one of ``status.NAMES``),
    so Arrow's bounds check of the indices (a pass over the column) is skipped;
    tests/test_api.py checks every status value against the vocabulary.
    """
    codes = np.ascontiguousarray(codes, dtype=np.int8)
    indices = pa.Array.from_buffers(pa.int8(), len(codes), [None, pa.py_buffer(codes)])
    return pa.DictionaryArray.from_arrays(indices, STATUS_VOCABULARY, safe=False)


def check_no_clash(schema: pa.Schema, outputs) -> None:
    for name in outputs:
        if name in schema.names:
            raise ValueError(f"input already has a column named {name!r}, which is an output; "
                             "rename or drop it first")


def output_schema(schema: pa.Schema, outputs) -> pa.Schema:
    for name in outputs:
        schema = schema.append(pa.field(name, STATUS_TYPE if name.startswith("status")
                                        else pa.float64()))
    return schema


def append(batch: pa.RecordBatch, schema: pa.Schema, columns: dict) -> pa.RecordBatch:
    """``batch`` with ``columns`` appended, as ``schema`` (its fields followed by theirs).

    A few columns are appended one by one; many at once from the whole list (wrapping
    every input column as a Python object costs more than a few appends)."""
    if len(columns) <= _FEW_COLUMNS:
        n0 = batch.num_columns
        for i, arr in enumerate(columns.values()):
            batch = batch.append_column(schema.field(n0 + i), arr)
        return batch
    arrays = list(batch.columns) + list(columns.values())
    return pa.RecordBatch.from_arrays(arrays, schema=schema)
