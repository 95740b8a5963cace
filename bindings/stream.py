"""Files larger than memory: open an input as a stream of record batches, transform it batch
by batch, and write Parquet atomically.

* ``open_input(path)`` accepts a Parquet file, a directory of Parquet files (hive
  partition folders such as ``date=2031-03-14/`` add their key as a column), an Arrow IPC
  file or stream, or a CSV file (optionally ``.gz``/``.bz2``).  Files of a directory are
  read in lexicographic path order and rows in file order, so the output order is the
  input order.  Batches are at most ``batch_rows`` rows; nothing reads a whole file.
* ``AtomicParquetWriter`` writes to a hidden temporary file beside the target
  (``.NAME.tmp-PID-XXXX``), fsyncs it and renames it over the target on success; on any
  exception, ``KeyboardInterrupt`` included, the temporary file is removed, so the target
  is either the complete new file or untouched.
* ``run(source, dst, transform)`` is the driver behind ``volsweep price``, ``volsweep
  sweep`` and each partition of the backfill: read, transform, write, count statuses,
  show progress on a terminal.
* ``SweepPlan`` is the column plan behind ``volsweep sweep``: which quote to invert,
  which input columns to keep, and the output schema, decided once from the input schema.
"""

from __future__ import annotations

import glob
import json
import os
import queue
import secrets
import sys
import threading
import time
from collections import Counter
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq

DEFAULT_BATCH_ROWS = 1 << 18        # 262,144 rows: ~60 MB of inputs and outputs in flight
PARQUET_COMPRESSION = "snappy"     # pyarrow's default: fast, modest ratio
_PARQUET_MAGIC = b"PAR1"
_IPC_FILE_MAGIC = b"ARROW1"
_IPC_STREAM_MAGIC = b"\xff\xff\xff\xff"
_CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2")


class StreamError(ValueError):
    """A user-facing problem with an input or output file (one line of text)."""


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0]


# --------------------------------------------------------------------------- input
@dataclass
class Source:
    """An opened input: its schema, its rows (when known without reading), its batches."""

    path: str
    kind: str                       # "parquet", "ipc-file", "ipc-stream", "csv"
    schema: pa.Schema
    num_rows: int | None
    _open_batches: object = field(repr=False)

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


def _data_files(root: str) -> list[str]:
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
        raise StreamError(f"cannot read {path}: {_one_line(exc)}") from None


def open_input(path, batch_rows: int = DEFAULT_BATCH_ROWS, *, partitioning="hive",
               files: list[str] | None = None) -> Source:
    """Open ``path`` for streaming.  ``files`` (optional) reads exactly those files instead
    of discovering them under ``path`` (the backfill passes one partition's files)."""
    if batch_rows < 1:
        raise ValueError(f"batch_rows must be >= 1, got {batch_rows}")
    path = os.fspath(path)
    if files is None:
        if os.path.isdir(path):
            files = _data_files(path)
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
        raise StreamError(f"cannot read {path}: {_one_line(exc)}") from None

    fragments = list(dataset.get_fragments())
    file_schema = dataset.schema
    if part:
        keys = set()
        for frag in fragments:
            keys |= set(ds.get_partition_keys(frag.partition_expression))
        file_schema = pa.schema([f for f in dataset.schema if f.name not in keys])

    def batches():
        # One file after another, in the order given; each file is read by its own
        # streaming reader (a row group / record batch / CSV block at a time), so memory is
        # bounded by the largest row group or block, never by the file.  (The dataset
        # scanner reads ahead without bound when the consumer is slower than the disk.)
        for frag in fragments:
            keys = ds.get_partition_keys(frag.partition_expression) if part else {}
            for b in _rechunk(_file_batches(kind, frag.path, batch_rows, file_schema),
                              batch_rows):
                if b.schema != file_schema:
                    why = _schema_diff(b.schema, file_schema)
                    raise StreamError(f"cannot read {frag.path}: its columns differ from "
                                      f"those of the first file ({why})")
                if keys:
                    b = _with_keys(b, dataset.schema, keys)
                yield b

    return Source(path, kind, dataset.schema, num_rows,
                  lambda: _prefetched(_guarded(path, batches)))


def _prefetched(iterator, depth: int = 1):
    """Run ``iterator`` one batch ahead in a thread (decoding releases the GIL), so the
    next batch is read while this one is computed.  Errors surface in order; closing the
    generator (an exception or Ctrl-C downstream) stops the thread."""
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def produce():
        try:
            for item in iterator:
                while not stop.is_set():
                    try:
                        q.put((True, item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
        except BaseException as exc:   # handed over in order, raised by the consumer
            q.put((False, exc))
            return
        q.put((True, done))

    thread = threading.Thread(target=produce, name="volsweep-reader", daemon=True)
    thread.start()
    try:
        while True:
            ok, item = q.get()
            if not ok:
                raise item
            if item is done:
                return
            yield item
    finally:
        stop.set()
        while thread.is_alive():      # unblock a producer waiting on a full queue
            try:
                q.get_nowait()
            except queue.Empty:
                pass
            thread.join(0.05)


def _schema_diff(got: pa.Schema, want: pa.Schema) -> str:
    for f in want:
        if f.name not in got.names:
            return f"no column {f.name!r}"
        if got.field(f.name).type != f.type:
            return f"column {f.name!r} is {got.field(f.name).type}, not {f.type}"
    extra = [n for n in got.names if n not in want.names]
    return f"extra column {extra[0]!r}" if extra else "column order"


def _with_keys(batch: pa.RecordBatch, schema: pa.Schema, keys: dict) -> pa.RecordBatch:
    n = batch.num_rows
    arrays = list(batch.columns)
    for f in schema:
        if f.name not in batch.schema.names:
            value = keys.get(f.name)
            arrays.append(pa.repeat(pa.scalar(value, type=f.type), n) if value is not None
                          else pa.nulls(n, f.type))
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _file_batches(kind: str, path: str, batch_rows: int, schema: pa.Schema):
    if kind == "parquet":
        pf = pq.ParquetFile(path)
        for rg in range(pf.metadata.num_row_groups):
            yield from pf.iter_batches(batch_size=batch_rows, row_groups=[rg], use_threads=True)
    elif kind == "ipc-file":
        with pa.OSFile(path) as f:       # not memory-mapped: touched pages would count
            reader = pa.ipc.open_file(f)
            for i in range(reader.num_record_batches):
                yield reader.get_batch(i)
    else:   # csv: the first file's types for every file, blocks of ~1 MB
        convert = pcsv.ConvertOptions(column_types=schema)
        with pcsv.open_csv(path, convert_options=convert) as reader:
            yield from reader


def _ipc_stream_source(path: str, batch_rows: int) -> Source:
    with pa.ipc.open_stream(path) as r:
        schema = r.schema

    def batches():
        with pa.OSFile(path) as f, pa.ipc.open_stream(f) as reader:
            yield from _rechunk(reader, batch_rows)

    return Source(path, "ipc-stream", schema, None,
                  lambda: _prefetched(_guarded(path, batches)))


# -------------------------------------------------------------------------- output
def temp_path(dst: str) -> str:
    """Hidden temporary name beside ``dst`` (dataset readers skip names starting with '.')."""
    folder, name = os.path.split(os.path.abspath(dst))
    return os.path.join(folder, f".{name}.tmp-{os.getpid()}-{secrets.token_hex(4)}")


def stale_temps(dst: str) -> list[str]:
    folder, name = os.path.split(os.path.abspath(dst))
    return glob.glob(os.path.join(glob.escape(folder), f".{glob.escape(name)}.tmp-*"))


def _fsync_dir(folder: str) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


class AtomicParquetWriter:
    """Write Parquet to a temporary file; ``commit()`` renames it over ``dst``.

    Used as a context manager: leaving the block without ``commit()`` (an exception, a
    ``KeyboardInterrupt``) removes the temporary file and leaves ``dst`` untouched.

    ``dictionary``: the columns to dictionary-encode (None: all; see
    ``dictionary_columns``).

    ``background=True`` writes in a thread (Parquet encoding releases the GIL), so the
    next batch is computed while this one is encoded; at most one batch waits in between.
    """

    def __init__(self, dst: str, schema: pa.Schema, compression: str = PARQUET_COMPRESSION,
                 dictionary: list | None = None, background: bool = False):
        self.dst = os.path.abspath(dst)
        self.tmp = temp_path(self.dst)
        self.schema = schema
        self.committed = False
        self._writer = self._queue = self._thread = self._error = None
        try:
            # write_batch_size: values encoded per inner step (default 1024); 64k: ~12% less CPU
            self._writer = pq.ParquetWriter(self.tmp, schema, compression=compression,
                                            use_dictionary=True if dictionary is None
                                            else list(dictionary), write_batch_size=1 << 16)
            if background:
                self._queue = queue.Queue(maxsize=1)
                self._thread = threading.Thread(target=self._drain, name="volsweep-writer",
                                                daemon=True)
                self._thread.start()
        except BaseException:    # Ctrl-C while the file is being created
            self.abort()
            raise

    def _write_now(self, batch) -> None:
        if isinstance(batch, pa.Table):
            self._writer.write_table(batch)
        else:
            self._writer.write_batch(batch)

    def _drain(self) -> None:
        while True:
            batch = self._queue.get()
            if batch is None:
                return
            if self._error is None:
                try:
                    self._write_now(batch)
                except BaseException as exc:   # handed to the producer on its next call
                    self._error = exc

    def _check(self) -> None:
        if self._error is not None:
            raise self._error

    def write(self, batch) -> None:
        if self._thread is None:
            self._write_now(batch)
            return
        self._check()
        self._queue.put(batch)

    def _stop(self) -> None:
        if self._thread is not None and self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()

    def commit(self) -> None:
        self._stop()
        self._check()
        self._writer.close()
        with open(self.tmp, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(self.tmp, self.dst)
        _fsync_dir(os.path.dirname(self.dst))
        self.committed = True

    def abort(self) -> None:
        if self._thread is not None:
            self._error = self._error or RuntimeError("aborted")   # skip what is queued
            self._stop()
        try:
            if self._writer is not None:
                self._writer.close()
        except Exception:   # the file is being thrown away
            pass
        try:
            os.remove(self.tmp)
        except FileNotFoundError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if not self.committed:
            self.abort()
        return False


def dictionary_columns(schema: pa.Schema) -> list:
    """Columns worth Parquet dictionary encoding: all but the floats.  Floats (computed
    vols and Greeks above all) are nearly all distinct, and trying a dictionary on them
    first costs more than the rest of the write (1M swept rows: 1.2 s -> 0.45 s)."""
    return [f.name for f in schema if not pa.types.is_floating(f.type)]


def check_output(dst: str, overwrite: bool) -> None:
    """Refuse an existing ``dst`` (unless ``overwrite``) or a missing/unwritable folder."""
    if os.path.isdir(dst):
        raise StreamError(f"{dst} is a directory; give a file name for the output")
    if os.path.exists(dst) and not overwrite:
        raise StreamError(f"{dst} exists (use --overwrite)")
    folder = os.path.dirname(os.path.abspath(dst))
    if not os.path.isdir(folder):
        raise StreamError(f"cannot write {dst}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise StreamError(f"cannot write {dst}: folder {folder} is not writable")


# ------------------------------------------------------------------------ progress
class Progress:
    """A one-line progress bar (rows, rows/s, ETA) on a terminal stream; silent otherwise."""

    def __init__(self, total: int | None, stream=None, enabled: bool | None = None,
                 unit: str = "rows"):
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = (self.stream.isatty() if hasattr(self.stream, "isatty") else False) \
            if enabled is None else enabled
        self.total = total
        self.unit = unit
        self.done = 0
        self.t0 = time.perf_counter()
        self._last = 0.0
        self._width = 0

    def update(self, n: int) -> None:
        self.done += n
        if not self.enabled:
            return
        now = time.perf_counter()
        if now - self._last < 0.2 and (self.total is None or self.done < self.total):
            return
        self._last = now
        dt = max(now - self.t0, 1e-9)
        rate = self.done / dt
        if self.total:
            frac = min(self.done / self.total, 1.0)
            bar = "#" * int(24 * frac) + "-" * (24 - int(24 * frac))
            eta = (self.total - self.done) / rate if rate > 0 else float("inf")
            line = (f"[{bar}] {self.done:,d}/{self.total:,d} {self.unit} {100 * frac:5.1f}% "
                    f"| {_rate(rate)} {self.unit}/s | ETA {_clock(eta)}")
        else:
            line = f"{self.done:,d} {self.unit} | {_rate(rate)} {self.unit}/s | {_clock(dt)}"
        self.stream.write("\r" + line.ljust(self._width))
        self._width = len(line)
        self.stream.flush()

    def close(self) -> None:
        if self.enabled and self._width:
            self.stream.write("\r" + " " * self._width + "\r")
            self.stream.flush()


def _rate(r: float) -> str:
    return f"{r / 1e6:.2f} M" if r >= 1e6 else f"{r / 1e3:.1f} k" if r >= 1e3 else f"{r:.0f}"


def _clock(seconds: float) -> str:
    if not np.isfinite(seconds):
        return "--:--"
    s = int(seconds + 0.5)
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


# -------------------------------------------------------------------------- driver
STATUS_COLUMNS = ("status", "status_bid", "status_ask")


def count_statuses(batch, counts: dict) -> None:
    """Add the status counts of ``batch`` to ``counts[column][status name]``."""
    for name in STATUS_COLUMNS:
        if name not in batch.schema.names:
            continue
        col = batch.column(name)
        chunks = col.chunks if isinstance(col, pa.ChunkedArray) else [col]
        c = counts.setdefault(name, Counter())
        for ch in chunks:
            if not len(ch):
                continue
            idx = ch.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
            words = ch.dictionary.to_pylist()
            for code, n in enumerate(np.bincount(idx[idx >= 0], minlength=len(words))):
                if n:
                    c[words[code]] += int(n)


def status_table(counts: dict) -> str:
    """A small table: one row per status, one count column per status column."""
    if not counts:
        return ""
    cols = [c for c in STATUS_COLUMNS if c in counts]
    names = sorted({k for c in cols for k in counts[c]},
                   key=lambda k: (k != "ok", -counts[cols[0]].get(k, 0), k))
    total = sum(counts[cols[0]].values()) or 1
    head = f"  {'':<20s}" + "".join(f"{c:>14s}" for c in cols) + "  (% of status)"
    lines = [head]
    for k in names:
        cells = "".join(f"{counts[c].get(k, 0):>14,d}" for c in cols)
        lines.append(f"  {k:<20s}{cells}  {100.0 * counts[cols[0]].get(k, 0) / total:6.2f}%")
    return "\n".join(lines)


@dataclass
class RunResult:
    rows: int
    seconds: float
    statuses: dict          # status column -> Counter(status name -> rows)


def run(source: Source, dst: str, transform, out_schema: pa.Schema, *, overwrite: bool = False,
        progress: Progress | None = None, compression: str = PARQUET_COMPRESSION,
        dictionary: list | None = None) -> RunResult:
    """Stream ``source`` through ``transform`` (RecordBatch -> RecordBatch or Table) into a
    Parquet file ``dst``, atomically.  ``out_schema`` is written even for an empty input;
    ``dictionary``: columns to dictionary-encode (None: all)."""
    check_output(dst, overwrite)
    rows, counts = 0, {}
    t0 = time.perf_counter()
    batches = source.batches()
    writer = None
    try:
        writer = AtomicParquetWriter(dst, out_schema, compression, dictionary, background=True)
        with writer:
            for batch in batches:
                out = transform(batch)
                if out.schema != out_schema:
                    raise StreamError(f"cannot read {source.path}: the schema changes between "
                                      "batches or files")
                if out.num_rows != batch.num_rows:   # never: every row gets a status
                    raise RuntimeError(f"transform returned {out.num_rows} rows for "
                                       f"{batch.num_rows}")
                writer.write(out)
                count_statuses(out, counts)
                rows += out.num_rows
                if progress is not None:
                    progress.update(batch.num_rows)
            writer.commit()
    finally:
        if writer is not None and not writer.committed:
            writer.abort()        # also when interrupted before the with block was entered
        if hasattr(batches, "close"):
            batches.close()       # stops the reader thread now, not at garbage collection
        if progress is not None:
            progress.close()      # before any error line, and on Ctrl-C
    return RunResult(rows, time.perf_counter() - t0, counts)


# ----------------------------------------------------------------- sweep columns
QUOTE_CHOICES = ("auto", "premium", "bid-ask")
SWEEP_STAMP_KEY = b"volsweep.sweep"


def sweep_stamp(options: dict) -> bytes:
    """The options a sweep ran with, as stored in its output's schema metadata."""
    import volsweep

    return json.dumps(dict(options, version=volsweep.__version__), sort_keys=True,
                      default=str).encode()


@dataclass
class SweepPlan:
    """Everything decided once from the input schema for a streamed sweep.

    ``needed``: the input columns the sweep reads (the chosen quote only); ``kept``: the
    positions of the input columns copied to the output; ``out_schema``: kept columns,
    then the outputs.
    """

    needed: list
    kept: list
    out_schema: pa.Schema
    n_outputs: int
    options: dict

    @classmethod
    def build(cls, schema: pa.Schema, *, model="bsm", which=None, units="raw", columns=None,
              as_of=None, quotes="auto", keep=None) -> "SweepPlan":
        import volsweep
        from ._columns import ColumnPlan
        from ._output import check_no_clash

        if quotes not in QUOTE_CHOICES:
            raise ValueError(f"unknown quotes {quotes!r}; expected one of "
                             f"{', '.join(QUOTE_CHOICES)}")
        columns = dict(columns or {})
        names = schema.names
        prem = columns.get("premium", "premium")
        sides = [columns.get("bid", "bid"), columns.get("ask", "ask")]
        has_prem = prem in names
        has_sides = any(s in names for s in sides)
        if quotes == "auto" and "premium" in columns:      # a mapped quote is a choice
            quotes = "premium"
        elif quotes == "auto" and ("bid" in columns or "ask" in columns):
            quotes = "bid-ask"
        if quotes == "auto" and has_prem and has_sides:
            raise ValueError(f"the input has both {prem!r} and {'/'.join(map(repr, sides))}: "
                             "choose the quote to invert (--quotes premium or bid-ask; "
                             "quotes= in Python)")
        hidden = set(sides) if quotes == "premium" else {prem} if quotes == "bid-ask" else set()
        visible = pa.schema([f for f in schema if f.name not in hidden])
        if quotes == "premium" and not has_prem:
            raise ValueError(f"missing column {prem!r}: required for the premium quote")
        if quotes == "bid-ask" and not all(s in names for s in sides):
            missing = next(s for s in sides if s not in names)
            raise ValueError(f"missing column {missing!r}: required for the bid-ask quote")
        plan = ColumnPlan.build(visible, model=model, columns=columns, need_vol=False,
                                need_quote=True, as_of=as_of)
        used = set(plan.source.values())
        needed = [n for n in visible.names if n in used]
        if keep is None:
            kept = list(range(len(names)))      # by position: duplicate names are kept too
        else:
            for k in keep:
                if k not in names:
                    raise ValueError(f"missing column {k!r}: asked to keep it")
                if names.count(k) > 1:
                    raise ValueError(f"column {k!r} appears more than once in the input")
            kept = [names.index(k) for k in keep]
        options = dict(model=model, which=which, units=units, columns=columns, as_of=as_of)
        probe = volsweep.sweep(visible.empty_table().select(needed), **options)
        outputs = probe.schema.names[len(needed):]
        kept_schema = pa.schema([schema.field(i) for i in kept])
        check_no_clash(kept_schema, outputs)
        meta = dict(schema.metadata or {})
        meta[SWEEP_STAMP_KEY] = sweep_stamp(dict(options, quotes=quotes, keep=keep))
        out_schema = pa.schema(list(kept_schema) + [probe.schema.field(n) for n in outputs],
                               metadata=meta)
        return cls(needed, kept, out_schema, len(outputs), options)

    @property
    def dictionary(self) -> list:
        return dictionary_columns(self.out_schema)

    @property
    def stamp(self) -> bytes:
        return self.out_schema.metadata[SWEEP_STAMP_KEY]

    def transform(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        import volsweep

        res = volsweep.sweep(batch.select(self.needed), **self.options)
        new = [_one_chunk(res.column(j)) for j in range(len(self.needed), res.num_columns)]
        return pa.RecordBatch.from_arrays([batch.column(i) for i in self.kept] + new,
                                          schema=self.out_schema)


def _one_chunk(col: pa.ChunkedArray) -> pa.Array:
    return col.chunk(0) if col.num_chunks == 1 else col.combine_chunks()
