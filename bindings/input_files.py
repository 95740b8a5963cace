"""Open an input file or folder as a stream of record batches, whatever its format.

``open_input(path)`` accepts a Parquet file, a directory of Parquet files (hive partition
folders such as ``date=2031-03-14/`` add their key as a column), an Arrow IPC file or
stream, or a CSV file (optionally ``.gz``/``.bz2``).  The format is told by the file's
first bytes (CSV by its name).  Files of a directory are read in lexicographic path order
and rows in file order, so the output order is the input order.  Batches are at most
``batch_rows`` rows; nothing reads a whole file.

CSV cells are data: a cell that is not of its column's type (``n.a.`` in a column of
numbers) is read as null and counted in ``Source.unreadable``, never an error.  Column
types are inferred from the first block of the first file, except the ``numbers``
columns (float64 whatever the first block holds) and the columns empty in the first
block (text).  A file that cannot be parsed (a row with the wrong number of fields) is an
error naming the file and the line.
"""

from __future__ import annotations

import os
import re
from collections import Counter
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from .file_errors import StreamError, one_line
from .read_ahead import read_ahead

DEFAULT_BATCH_ROWS = 1 << 18        # 262,144 rows: ~60 MB of inputs and outputs in flight
_PARQUET_MAGIC = b"PAR1"
_IPC_FILE_MAGIC = b"ARROW1"
_IPC_STREAM_MAGIC = b"\xff\xff\xff\xff"
_CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2")


@dataclass
class Source:
    """An opened input: its schema, its rows (when known without reading), its batches."""

    path: str
    kind: str                       # "parquet", "ipc-file", "ipc-stream", "csv"
    schema: pa.Schema
    num_rows: int | None
    _open_batches: object = field(repr=False)
    # CSV: column -> cells not of the column's type, read as null (counted as read)
    unreadable: Counter = field(default_factory=Counter)

    def batches(self):
        """Record batches in input order (a fresh iterator each call)."""
        return self._open_batches()


def _sniff(path: str) -> str:
    low = path.lower()
    if low.endswith(_CSV_SUFFIXES):
        return "csv"
    try:
        with open(path, "rb") as f:
            head = f.read(8)
    except OSError as exc:
        raise StreamError(f"cannot read {path}: {exc.strerror or exc}") from None
    if head.startswith(_PARQUET_MAGIC):
        return "parquet"
    if head.startswith(_IPC_FILE_MAGIC):
        return "ipc-file"
    if head.startswith(_IPC_STREAM_MAGIC):
        return "ipc-stream"
    raise StreamError(f"cannot read {path}: not a Parquet, Arrow IPC or CSV file "
                      "(CSV files must end in .csv)")


def data_files(root: str) -> list[str]:
    """Data files under ``root`` in lexicographic order, skipping hidden and _ files."""
    out = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith((".", "_")))
        out.extend(os.path.join(dirpath, f) for f in filenames if not f.startswith((".", "_")))
    return sorted(out, key=lambda p: os.path.relpath(p, root).split(os.sep))


def _rechunk(batches, max_rows: int):
    """Slices of at most ``max_rows`` rows (zero-copy), empty batches dropped."""
    for b in batches:
        n = b.num_rows
        if n <= max_rows:
            if n:
                yield b
            continue
        for start in range(0, n, max_rows):
            yield b.slice(start, max_rows)


def _guarded(path, make_iter):
    """Turn read errors in the middle of a file into a one-line StreamError."""
    try:
        yield from make_iter()
    except (OSError, pa.ArrowException) as exc:
        raise StreamError(f"cannot read {path}: {_csv_words(one_line(exc))}") from None


def _csv_words(text: str) -> str:
    """A CSV parse error in the user's words: Arrow's "Row #3" is line 3 of the file (the
    header is line 1; the reader runs serially so that Arrow knows the row)."""
    if "CSV parse error: " in text:       # the parser's own words, without Arrow's preamble
        text = text[text.rindex("CSV parse error: "):]
    return re.sub(r"^CSV parse error: Row #(\d+): ", r"line \1: ", text)


def open_input(path, batch_rows: int = DEFAULT_BATCH_ROWS, *, partitioning="hive",
               files: list[str] | None = None, numbers=()) -> Source:
    """Open ``path`` for streaming.  ``files`` (optional) reads exactly those files instead
    of discovering them under ``path`` (the backfill passes one partition's files).
    ``numbers``: CSV columns to read as float64 whatever their first block holds (the
    columns of numeric inputs; see ``_columns.numeric_columns``)."""
    if batch_rows < 1:
        raise ValueError(f"batch_rows must be >= 1, got {batch_rows}")
    path = os.fspath(path)
    if files is None:
        if os.path.isdir(path):
            files = data_files(path)
            if not files:
                raise StreamError(f"cannot read {path}: no data files in the directory")
        elif os.path.exists(path):
            files = [path]
        else:
            raise StreamError(f"cannot read {path}: no such file or directory")
    kinds = {_sniff(f) for f in files}
    if len(kinds) > 1:
        raise StreamError(f"cannot read {path}: mixed file formats ({', '.join(sorted(kinds))})")
    kind = kinds.pop()
    part = partitioning if (os.path.isdir(path) and len(files) > 0) else None
    try:
        if kind == "ipc-stream":
            if len(files) != 1:
                raise StreamError(f"cannot read {path}: a directory of Arrow IPC streams is not "
                                  "supported (use IPC files or Parquet)")
            return _ipc_stream_source(files[0], batch_rows)
        fmt = {"parquet": "parquet", "ipc-file": "ipc", "csv": "csv"}[kind]
        base = path if part else None
        dataset = ds.dataset(files, format=fmt, partitioning=part, partition_base_dir=base)
        num_rows = None if kind == "csv" else dataset.count_rows()
    except StreamError:
        raise
    except (OSError, pa.ArrowException) as exc:
        raise StreamError(f"cannot read {path}: {_csv_words(one_line(exc))}") from None

    fragments = list(dataset.get_fragments())
    file_schema = dataset.schema
    keys = set()
    if part:
        for frag in fragments:
            keys |= set(ds.get_partition_keys(frag.partition_expression))
        file_schema = pa.schema([f for f in dataset.schema if f.name not in keys])
    schema = dataset.schema
    if kind == "csv":
        file_schema = _csv_types(file_schema, set(numbers))
        schema = pa.schema(list(file_schema) + [f for f in dataset.schema if f.name in keys])
    unreadable = Counter()

    def batches():
        # One file after another, in the order given; each file is read by its own
        # streaming reader (a row group / record batch / CSV block at a time), so memory is
        # bounded by the largest row group or block, never by the file.  (The dataset
        # scanner reads ahead without bound when the consumer is slower than the disk.)
        for frag in fragments:
            keys = ds.get_partition_keys(frag.partition_expression) if part else {}
            rows = _file_batches(kind, frag.path, batch_rows, file_schema, unreadable)
            for b in _rechunk(_guarded(frag.path, lambda: rows), batch_rows):
                if b.schema != file_schema:
                    why = _schema_diff(b.schema, file_schema)
                    raise StreamError(f"cannot read {frag.path}: its columns differ from "
                                      f"those of the first file ({why})")
                if keys:
                    b = _with_keys(b, schema, keys)
                yield b

    return Source(path, kind, schema, num_rows,
                  lambda: read_ahead(_guarded(path, batches)), unreadable)


def _schema_diff(got: pa.Schema, want: pa.Schema) -> str:
    for f in want:
        if f.name not in got.names:
            return f"no column {f.name!r}"
        if got.field(f.name).type != f.type:
            return f"column {f.name!r} is {got.field(f.name).type}, not {f.type}"
    extra = [n for n in got.names if n not in want.names]
    return f"extra column {extra[0]!r}" if extra else "column order"


def _with_keys(batch: pa.RecordBatch, schema: pa.Schema, keys: dict) -> pa.RecordBatch:
    """``batch`` with its hive partition keys appended as constant columns."""
    n = batch.num_rows
    arrays = list(batch.columns)
    for f in schema:
        if f.name not in batch.schema.names:
            value = keys.get(f.name)
            arrays.append(pa.repeat(pa.scalar(value, type=f.type), n) if value is not None
                          else pa.nulls(n, f.type))
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _file_batches(kind: str, path: str, batch_rows: int, schema: pa.Schema,
                  unreadable: Counter):
    if kind == "parquet":
        pf = pq.ParquetFile(path)
        for rg in range(pf.metadata.num_row_groups):
            yield from pf.iter_batches(batch_size=batch_rows, row_groups=[rg], use_threads=True)
    elif kind == "ipc-file":
        with pa.OSFile(path) as f:       # not memory-mapped: touched pages would count
            reader = pa.ipc.open_file(f)
            for i in range(reader.num_record_batches):
                yield reader.get_batch(i)
    else:   # csv: blocks of ~1 MB, the columns of _csv_types as text, then each to its type
        as_text = pcsv.ConvertOptions(column_types={
            f.name: pa.string() if _via_text(f.type) else f.type for f in schema})
        # serial: Arrow then numbers the rows in its parse errors
        serial = pcsv.ReadOptions(use_threads=False)
        with pcsv.open_csv(path, read_options=serial, convert_options=as_text) as reader:
            for b in reader:
                yield _typed(b, schema, unreadable)


def _csv_types(schema: pa.Schema, numbers: set) -> pa.Schema:
    """The types CSV columns are read as: those inferred from the first block, except the
    ``numbers`` columns, float64 (one bad cell in the first block would make them text),
    and the columns empty in the first block, text (Arrow infers type null for them)."""
    return pa.schema([pa.field(f.name, pa.float64() if f.name in numbers else
                               pa.string() if pa.types.is_null(f.type) else f.type)
                      for f in schema])


def _via_text(t: pa.DataType) -> bool:
    """Types read as text, then converted cell by cell (those Arrow casts from text);
    other columns (text, binary, times of day) are read as the CSV reader reads them."""
    return (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)
            or pa.types.is_timestamp(t) or pa.types.is_date(t))


def _typed(batch: pa.RecordBatch, schema: pa.Schema, unreadable: Counter) -> pa.RecordBatch:
    """A CSV batch read as text, each column converted to its type in ``schema``; cells
    that do not convert are null, counted per column in ``unreadable``."""
    if batch.schema.names != schema.names:
        return batch                      # the caller names the difference
    arrays = []
    for f, col in zip(schema, batch.columns):
        if f.type != col.type:
            col, bad = _cast_cells(col, f.type)
            if bad:
                unreadable[f.name] += bad
        arrays.append(col)
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


_NULL_WORDS = pa.array(pcsv.ConvertOptions().null_values, pa.string())  # Arrow's defaults
# what Arrow's text -> number casts accept, to set the other cells aside in one pass
_NUMBER_PATTERNS = {
    "float": r"^[+-]?(?:\d+\.?\d*(?:[eE][+-]?\d+)?|\.\d+(?:[eE][+-]?\d+)?|inf(?:inity)?|nan)$",
    "integer": r"^[+-]?\d+$",
}
_CAST_ERRORS = (pa.ArrowInvalid,)      # a cell that does not parse (not a missing cast)


def _cast_cells(text: pa.Array, to: pa.DataType) -> tuple[pa.Array, int]:
    """Text cells as ``to``, read as the CSV reader reads them (its null words are null,
    spaces around a value are ignored), except that a cell that does not convert is null
    instead of an error.  Returns the array and the number of such cells."""
    text = pc.if_else(pc.is_in(text, value_set=_NULL_WORDS), pa.scalar(None, pa.string()),
                      text)
    try:
        return pc.cast(text, to), 0
    except _CAST_ERRORS:
        pass
    words = pc.dictionary_encode(pc.utf8_trim_whitespace(text))  # each distinct cell once
    values = words.dictionary
    ok = np.ones(len(values), bool)
    kind = ("float" if pa.types.is_floating(to) else
            "integer" if pa.types.is_integer(to) else None)
    if kind is not None:
        ok = pc.match_substring_regex(values, _NUMBER_PATTERNS[kind], ignore_case=True)
        ok = ok.to_numpy(zero_copy_only=False)
    ok[ok] = _convertible(values.filter(pa.array(ok)), to)
    typed = pc.cast(pc.if_else(pa.array(ok), values, pa.scalar(None, pa.string())), to)
    index = words.indices
    rows = pc.fill_null(index, 0).to_numpy(zero_copy_only=False)
    bad = int(np.count_nonzero(~ok[rows] & index.is_valid().to_numpy(zero_copy_only=False)))
    return pc.take(typed, index), bad


def _convertible(values: pa.Array, to: pa.DataType) -> np.ndarray:
    """Which of ``values`` cast to ``to`` (halving the failing parts: the few bad words
    are found in a few casts)."""
    try:
        pc.cast(values, to)
        return np.ones(len(values), bool)
    except _CAST_ERRORS:
        if len(values) == 1:
            return np.zeros(1, bool)
    half = len(values) // 2
    return np.concatenate([_convertible(values.slice(0, half), to),
                           _convertible(values.slice(half), to)])


def _ipc_stream_source(path: str, batch_rows: int) -> Source:
    with pa.ipc.open_stream(path) as r:
        schema = r.schema

    def batches():
        with pa.OSFile(path) as f, pa.ipc.open_stream(f) as reader:
            yield from _rechunk(reader, batch_rows)

    return Source(path, "ipc-stream", schema, None,
                  lambda: read_ahead(_guarded(path, batches)))
