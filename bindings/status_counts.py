"""The summary after a file command: the statuses of the output batches as a small
table, the vols above the plausibility bound, and the input cells read as missing."""

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


# Above this a volatility (per year) is almost surely in the wrong unit: a percentage
# typed as a number (20 for 20%).  Such rows are computed as given, and counted.
PLAUSIBLE_VOL = 5.0


def count_high_vols(batch, columns, counts: Counter) -> None:
    """Add to ``counts[column]`` the rows of ``batch`` whose vol in ``column`` (an input
    vol or an implied vol) is above ``PLAUSIBLE_VOL``."""
    from ._columns import _to_float64

    for name in columns:
        col = batch.column(name)
        for ch in col.chunks if isinstance(col, pa.ChunkedArray) else [col]:
            n = int(np.count_nonzero(_to_float64(ch) > PLAUSIBLE_VOL))
            if n:
                counts[name] += n


def high_vol_lines(counts: Counter) -> list:
    """One line per vol column with rows above the bound."""
    return [f"  {n:,d} rows with {name!r} above {PLAUSIBLE_VOL:g} ({PLAUSIBLE_VOL:.0%} a year): "
            "computed as given; a vol is a fraction (0.2 = 20%), check the unit"
            for name, n in counts.items()]


def _kind(t: pa.DataType) -> str:
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_decimal(t):
        return "numbers"
    if pa.types.is_boolean(t):
        return "true/false"
    if pa.types.is_timestamp(t) or pa.types.is_date(t):
        return "dates or times"
    return str(t)


def unreadable_lines(counts: Counter, schema: pa.Schema) -> list:
    """The input cells read as missing (``Source.unreadable``), one line per kind, e.g.
    ``2 cells not numbers: read as missing ('strike' 1, 'rate' 1)``."""
    kinds: dict = {}
    for name, n in counts.items():
        kinds.setdefault(_kind(schema.field(name).type), []).append((name, n))
    lines = []
    for kind, cols in kinds.items():
        total = sum(n for _, n in cols)
        where = ", ".join(f"{name!r} {n:,d}" for name, n in cols)
        lines.append(f"  {total:,d} {'cell' if total == 1 else 'cells'} not {kind}: read as "
                     f"missing ({where})")
    return lines
