"""The driver behind ``volsweep price``, ``volsweep sweep`` and each partition of the
backfill: read an opened input batch by batch, transform each batch, write the results
to one file atomically (Parquet, or CSV / Arrow IPC where its name says so), count the
statuses and show progress."""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field

import pyarrow as pa

from .atomic_parquet import PARQUET_COMPRESSION, AtomicWriter, check_output
from .file_errors import StreamError
from .input_files import Source
from .progress import Progress
from .status_counts import count_high_vols, count_statuses


@dataclass
class StreamResult:
    rows: int
    seconds: float
    statuses: dict          # status column -> Counter(status name -> rows)
    high_vols: Counter = field(default_factory=Counter)  # vol column -> rows above the bound


def stream_to_parquet(source: Source, dst: str, transform, out_schema: pa.Schema, *,
                      overwrite: bool = False, progress: Progress | None = None,
                      compression: str = PARQUET_COMPRESSION,
                      dictionary: list | None = None, vol_columns=()) -> StreamResult:
    """Stream ``source`` through ``transform`` (RecordBatch -> RecordBatch or Table) into
    the file ``dst``, atomically, in the format its name says (``output_format``).
    ``out_schema`` is written even for an empty input; ``dictionary``: columns Parquet
    dictionary-encodes (None: all); ``vol_columns``: output columns holding vols, whose
    rows above ``PLAUSIBLE_VOL`` are counted."""
    check_output(dst, overwrite)
    rows, counts, high_vols = 0, {}, Counter()
    t0 = time.perf_counter()
    batches = source.batches()
    writer = None
    try:
        writer = AtomicWriter(dst, out_schema, compression, dictionary, background=True)
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
                count_high_vols(out, vol_columns, high_vols)
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
    return StreamResult(rows, time.perf_counter() - t0, counts, high_vols)
