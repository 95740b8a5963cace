"""The driver behind ``volsweep price``, ``volsweep sweep`` and each partition of the
backfill: read an opened input batch by batch, transform each batch, write the results
to one Parquet file atomically, count the statuses and show progress."""

from __future__ import annotations

import time
from dataclasses import dataclass

import pyarrow as pa

from .atomic_parquet import PARQUET_COMPRESSION, AtomicParquetWriter, check_output
from .file_errors import StreamError
from .input_files import Source
from .progress import Progress
from .status_counts import count_statuses


@dataclass
class StreamResult:
    rows: int
    seconds: float
    statuses: dict          # status column -> Counter(status name -> rows)


def stream_to_parquet(source: Source, dst: str, transform, out_schema: pa.Schema, *,
                      overwrite: bool = False, progress: Progress | None = None,
                      compression: str = PARQUET_COMPRESSION,
                      dictionary: list | None = None) -> StreamResult:
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
    return StreamResult(rows, time.perf_counter() - t0, counts)
