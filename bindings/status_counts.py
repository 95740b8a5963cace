"""Count the statuses of output batches and print them as a small table (the summary
after a file command)."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pyarrow as pa

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
