"""The chain operations as backfill tasks: one partition in, one row per group out.

A group operation (``forwards``, ``variance``, ``smiles``) needs every row of a group at
once, and a group (an underlying's expiry on one day) lives in one partition (one day),
so a task reads its whole partition into memory, runs the operation once over it, and
writes the result, one row per group, to ``dst/<partition>/part-0.parquet`` through the
same atomic writer as the sweep: a hidden temporary file, fsynced, renamed; the rename is
the commit.  The output's schema metadata records the operation, its options, the
package version and the partition's source row count (``GROUP_STAMP_KEY``); a partition
is complete, and skipped, only when that record matches the run's.

``run_group`` is the single-machine reference: what a task writes is exactly
``run_group(<the partition's rows as one table>, operation, options)``, whatever the
scheduler, worker count or batch size.
"""

from __future__ import annotations

import json
import os

import pyarrow as pa
import pyarrow.parquet as pq

from .atomic_parquet import AtomicWriter

GROUP_OPERATIONS = ("forwards", "variance", "smiles")
GROUP_STAMP_KEY = b"volsweep.group"
DEFAULT_BY = ("underlying", "expiry")

# the options each group operation accepts, besides by / columns / as_of, with defaults
_EXTRA = {
    "forwards": {"quotes": "auto", "min_pairs": 3, "rate_range": (-0.2, 1.0)},
    "variance": {"quotes": "auto", "forwards": "implied"},
    "smiles": {"quotes": "auto", "arbitrage_free": False},
}


def group_options(operation: str, by=None, columns=None, as_of=None, extra=None) -> dict:
    """The full, checked option set of a group operation (the stamp is made from it)."""
    if operation not in GROUP_OPERATIONS:
        raise ValueError(f"unknown group operation {operation!r}; expected one of "
                         f"{', '.join(GROUP_OPERATIONS)}")
    extra = dict(extra or {})
    unknown = sorted(set(extra) - set(_EXTRA[operation]))
    if unknown:
        raise ValueError(f"unknown option {unknown[0]!r} for the {operation!r} operation; "
                         f"it takes {', '.join(sorted(_EXTRA[operation]))}")
    opts = dict(_EXTRA[operation], **extra)
    by = DEFAULT_BY if by is None else (by,) if isinstance(by, str) else tuple(by)
    return dict(opts, by=list(by), columns=dict(columns or {}), as_of=as_of)


def _smiles(table: pa.Table, by, columns, as_of, quotes, arbitrage_free) -> pa.Table:
    """Forwards implied per group, put on the rows; Black-76 implied vols of the quotes on
    those forwards; one SVI fit per group."""
    from .api import implied_vol
    from .chains import implied_forwards
    from .smiles import fit_smiles

    name = lambda k: columns.get(k, k)  # noqa: E731
    have = set(table.column_names)
    if quotes == "auto":
        quotes = "bid-ask" if {name("bid"), name("ask")} <= have else "premium"
    # what the pipeline adds or re-reads must not clash with, or be shadowed by, columns of
    # the input: its own forward and discount give way to the implied ones; the quote not
    # used, spot and yield (inputs Black-76 does not read) are left out
    drop = {"forward", "discount", "forward_status", name("spot"), name("div_yield")}
    drop |= {name("premium")} if quotes == "bid-ask" else {name("bid"), name("ask")}
    if name("rate") not in have:
        drop.discard(name("spot"))      # the fit needs no spot; kept out of Black-76 below
    chain = implied_forwards(table.drop_columns([c for c in table.column_names
                                                 if c in drop - {name("spot")}]),
                             by=by, columns=_without(columns, ("forward", "discount")),
                             as_of=as_of, quotes=quotes, attach=True)
    chain = chain.drop_columns([c for c in chain.column_names if c == name("spot")])
    b76 = _without(columns, ("spot", "div_yield", "forward", "discount", "premium", "bid",
                             "ask") if quotes == "bid-ask" else
                   ("spot", "div_yield", "forward", "discount", "premium", "bid", "ask"))
    vols = implied_vol(chain, model="black76", columns=_quote_map(columns, quotes, b76),
                       as_of=as_of)
    return fit_smiles(vols, model="black76", by=by, arbitrage_free=arbitrage_free,
                      columns=b76 or None, as_of=as_of)


def _without(columns: dict, names) -> dict:
    return {k: v for k, v in columns.items() if k not in names}


def _quote_map(columns: dict, quotes: str, base: dict) -> dict | None:
    keys = ("bid", "ask") if quotes == "bid-ask" else ("premium",)
    out = dict(base, **{k: columns[k] for k in keys if k in columns})
    return out or None


def run_group(table: pa.Table, operation: str, options: dict) -> pa.Table:
    """``operation`` over ``table`` with ``options`` (from ``group_options``)."""
    from . import chains

    o = dict(options)
    by, columns, as_of = tuple(o.pop("by")), o.pop("columns") or None, o.pop("as_of")
    if operation == "forwards":
        return chains.implied_forwards(table, by=by, columns=columns, as_of=as_of, **o)
    if operation == "variance":
        return chains.model_free_variance(table, by=by, columns=columns, as_of=as_of, **o)
    return _smiles(table, by, columns or {}, as_of, **o)


def group_stamp(operation: str, options: dict, source_rows) -> bytes:
    import volsweep

    return json.dumps(dict(operation=operation, options=options, source_rows=source_rows,
                           version=volsweep.__version__), sort_keys=True, default=str).encode()


def stamped_rows(target: str, key: bytes, stamp: bytes):
    """Rows of a committed Parquet ``target`` whose schema metadata holds ``stamp`` under
    ``key``, else None (missing, unreadable or made otherwise: then it is made again)."""
    if not os.path.exists(target):
        return None
    try:
        md = pq.read_metadata(target)
        made_with = (pq.read_schema(target).metadata or {}).get(key)
    except Exception:   # unreadable: redo it
        return None
    return md.num_rows if made_with == stamp else None


def complete(target: str, stamp: bytes):
    """Rows of a committed group-operation ``target`` made with ``stamp``, else None."""
    return stamped_rows(target, GROUP_STAMP_KEY, stamp)


def write_group_table(table: pa.Table, dst: str, stamp: bytes) -> None:
    """``table`` to ``dst`` atomically, with ``stamp`` in its schema metadata."""
    meta = dict(table.schema.metadata or {})
    meta[GROUP_STAMP_KEY] = stamp
    table = table.replace_schema_metadata(meta)
    with AtomicWriter(dst, table.schema) as writer:
        writer.write(table)
        writer.commit()
