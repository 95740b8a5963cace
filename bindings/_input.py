"""Turn whatever the caller hands us into a schema and a stream of Arrow record batches.

Accepted: ``pyarrow.Table`` (chunk by chunk, never concatenated), ``pyarrow.RecordBatch``,
``pyarrow.RecordBatchReader``, any object with the Arrow PyCapsule stream interface
(``__arrow_c_stream__``: pandas >= 2.2, polars, DuckDB results, ...), a pandas DataFrame,
or a ``dict`` of numpy arrays / sequences and scalars (scalars are broadcast).
The caller's objects are never modified: numpy inputs are wrapped, not written.
"""

from __future__ import annotations

import numbers

import numpy as np
import pyarrow as pa


def as_batches(data):
    """Return ``(schema, iterable of RecordBatch)`` for any accepted input."""
    if isinstance(data, pa.Table):
        return data.schema, data.to_batches()
    if isinstance(data, pa.RecordBatch):
        return data.schema, [data]
    if isinstance(data, pa.RecordBatchReader):
        return data.schema, data
    if isinstance(data, dict):
        batch = _batch_from_dict(data)
        return batch.schema, [batch]
    if hasattr(data, "__arrow_c_stream__"):
        reader = pa.RecordBatchReader.from_stream(data)
        return reader.schema, reader
    if type(data).__name__ == "DataFrame" and hasattr(data, "columns"):  # older pandas
        table = pa.Table.from_pandas(data, preserve_index=False)
        return table.schema, table.to_batches()
    raise TypeError(
        "data must be a pyarrow Table/RecordBatch, an object with __arrow_c_stream__, "
        f"or a dict of arrays and scalars; got {type(data).__name__}")


def _is_scalar(value) -> bool:
    return isinstance(value, (numbers.Number, str, bytes, np.generic, pa.Scalar)) or (
        value is None) or (isinstance(value, np.ndarray) and value.ndim == 0)


def _is_column(value) -> bool:
    """Array-like with a length and an order (sets, mappings and iterators are not)."""
    if isinstance(value, (np.ndarray, pa.Array, pa.ChunkedArray, list, tuple, range)):
        return True
    if isinstance(value, (set, frozenset, dict)) or not hasattr(value, "__len__"):
        return False
    return hasattr(value, "__array__") or hasattr(value, "__getitem__")


def _batch_from_dict(data: dict) -> pa.RecordBatch:
    lengths = {}
    for name, value in data.items():
        if not isinstance(name, str):
            raise TypeError(f"column names must be strings; got {name!r}")
        if not _is_scalar(value):
            if not _is_column(value):
                raise TypeError(f"column {name!r}: expected an array, a sequence or a scalar, "
                                f"got {type(value).__name__}")
            if isinstance(value, np.ndarray) and value.ndim != 1:
                raise ValueError(f"column {name!r}: expected a 1-D array, got shape {value.shape}")
            lengths[name] = len(value)
    if len(set(lengths.values())) > 1:
        detail = ", ".join(f"{k}={v}" for k, v in lengths.items())
        raise ValueError(f"columns have different lengths: {detail}")
    n = next(iter(lengths.values())) if lengths else 1
    arrays, names = [], []
    for name, value in data.items():
        try:
            if _is_scalar(value):
                arr = _broadcast(value, n)
            elif isinstance(value, (pa.Array, pa.ChunkedArray)):
                arr = value.combine_chunks() if isinstance(value, pa.ChunkedArray) else value
            else:
                arr = _array_from_sequence(name, value)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError,
                OverflowError) as exc:
            raise TypeError(f"column {name!r}: cannot convert to an Arrow array ({exc})") from None
        arrays.append(arr)
        names.append(name)
    return pa.RecordBatch.from_arrays(arrays, names=names)


def _broadcast(value, n: int) -> pa.Array:
    if isinstance(value, pa.Scalar):
        return pa.array([value.as_py()] * n, type=value.type)
    if isinstance(value, (np.ndarray, np.generic)):
        value = value.item()
    if value is None:
        return pa.nulls(n)
    if isinstance(value, bool):
        return pa.array(np.full(n, value, dtype=bool))
    if isinstance(value, numbers.Real):
        return pa.array(np.full(n, float(value)))
    return pa.array([value] * n)


def _array_from_sequence(name, value) -> pa.Array:
    mask = None
    if isinstance(value, np.ma.MaskedArray):  # masked entries are nulls, not values
        mask = np.ma.getmaskarray(value)
        value = value.data
    a = np.asarray(value)
    if a.ndim != 1:
        raise ValueError(f"column {name!r}: expected a 1-D sequence, got shape {a.shape}")
    if len(a) == 0 and not isinstance(value, np.ndarray):
        return pa.nulls(0)  # an empty list has no type; any column may be empty
    if not a.dtype.isnative:
        a = a.astype(a.dtype.newbyteorder("="))  # a converted copy; the caller's is untouched
    if a.dtype.kind == "f":
        # NaN stays a NaN value (not a null): the kernels give it missing_input either way.
        return pa.array(a, mask=mask)
    return pa.array(a if a.dtype.kind != "O" else list(a), mask=mask)
