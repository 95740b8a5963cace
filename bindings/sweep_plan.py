"""The plan of a streamed sweep (``volsweep sweep``, each backfill partition), decided once
per run from the input schema: which quote to invert, which input columns reach the
operation, which are copied to the output, the output schema, and the stamp of the
options that the backfill compares to tell a complete partition."""

from __future__ import annotations

import json
from dataclasses import dataclass

import pyarrow as pa

from volsweep.kernel.registry import DEFAULT_MODEL
from ._columns import KNOWN_NAMES, OptionError
from ._output import check_no_clash
from .atomic_parquet import dictionary_columns

QUOTE_CHOICES = ("auto", "premium", "bid-ask")
SWEEP_STAMP_KEY = b"volsweep.sweep"


def sweep_stamp(options: dict) -> bytes:
    """The options a sweep ran with, as stored in its output's schema metadata."""
    import volsweep

    return json.dumps(dict(options, version=volsweep.__version__), sort_keys=True,
                      default=str).encode()


def _choose_quote(names, columns: dict, quotes: str) -> set:
    """Resolve ``quotes`` against the input's names; returns the quote columns to hide."""
    if quotes not in QUOTE_CHOICES:
        raise ValueError(f"unknown quotes {quotes!r}; expected one of "
                         f"{', '.join(QUOTE_CHOICES)}")
    prem = columns.get("premium", "premium")
    sides = [columns.get("bid", "bid"), columns.get("ask", "ask")]
    has_prem = prem in names
    has_sides = any(s in names for s in sides)
    if quotes == "auto" and "premium" in columns:      # a mapped quote is a choice
        quotes = "premium"
    elif quotes == "auto" and ("bid" in columns or "ask" in columns):
        quotes = "bid-ask"
    if quotes == "auto" and has_prem and has_sides:
        raise OptionError("quotes", "the input has both {prem!r} and {sides}: choose the "
                          "quote to invert with {option} ('premium' or 'bid-ask')",
                          prem=prem, sides="/".join(map(repr, sides)))
    if quotes == "premium" and not has_prem:
        raise ValueError(f"missing column {prem!r}: required for the premium quote")
    if quotes == "bid-ask" and not all(s in names for s in sides):
        missing = next(s for s in sides if s not in names)
        raise ValueError(f"missing column {missing!r}: required for the bid-ask quote")
    return set(sides) if quotes == "premium" else {prem} if quotes == "bid-ask" else set()


def _kept_positions(names, keep) -> list:
    if keep is None:
        return list(range(len(names)))      # by position: duplicate names are kept too
    for k in keep:
        if k not in names:
            raise OptionError("keep", "{option} names column {k!r}, which the input does "
                              "not have", k=k)
        if names.count(k) > 1:
            raise ValueError(f"column {k!r} appears more than once in the input")
    return [names.index(k) for k in keep]


@dataclass
class SweepPlan:
    """Everything decided once from the input schema for a streamed sweep.

    ``readable``: the positions of the input columns handed to the operation (those it
    could read: our input names, the columns mapped to them, an ``as_of`` column; the
    quote not chosen is hidden), so an input column that is not kept may share an output's
    name; ``kept``: the positions of the input columns copied to the output;
    ``out_schema``: kept columns, then the outputs; ``prepared``: the operation, prepared
    once for the schema of the readable columns and called per batch.
    """

    readable: list
    kept: list
    out_schema: pa.Schema
    n_outputs: int
    prepared: object

    @classmethod
    def build(cls, schema: pa.Schema, *, model=DEFAULT_MODEL, which=None, units="raw", columns=None,
              as_of=None, quotes="auto", keep=None, exercise=None) -> "SweepPlan":
        from .api import prepare

        columns = dict(columns or {})
        names = schema.names
        hidden = _choose_quote(names, columns, quotes)
        maybe_read = set(KNOWN_NAMES) | {v for v in columns.values() if isinstance(v, str)}
        if isinstance(as_of, str):
            maybe_read.add(as_of)
        readable = [i for i, n in enumerate(names) if n in maybe_read and n not in hidden]
        kept = _kept_positions(names, keep)
        options = dict(model=model, which=which, units=units, columns=columns, as_of=as_of)
        if exercise is not None:          # in the stamp only when given (older stamps hold)
            options["exercise"] = exercise
        prepared = prepare("sweep", pa.schema([schema.field(i) for i in readable]), **options)
        kept_schema = pa.schema([schema.field(i) for i in kept])
        check_no_clash(kept_schema, prepared.outputs)
        meta = dict(schema.metadata or {})
        meta[SWEEP_STAMP_KEY] = sweep_stamp(dict(options, quotes=quotes, keep=keep))
        outputs = [prepared.out_schema.field(n) for n in prepared.outputs]
        out_schema = pa.schema(list(kept_schema) + outputs, metadata=meta)
        return cls(readable, kept, out_schema, len(outputs), prepared)

    @property
    def vol_columns(self) -> tuple:
        """The implied vols among the outputs (counted above the plausibility bound)."""
        return tuple(n for n in ("iv_bid", "iv_ask", "iv") if n in self.out_schema.names[
            len(self.kept):])

    @property
    def dictionary(self) -> list:
        return dictionary_columns(self.out_schema)

    @property
    def stamp(self) -> bytes:
        return self.out_schema.metadata[SWEEP_STAMP_KEY]

    def transform(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        res = self.prepared(batch.select(self.readable))
        n = res.num_columns
        new = [res.column(j) for j in range(n - self.n_outputs, n)]
        return pa.RecordBatch.from_arrays([batch.column(i) for i in self.kept] + new,
                                          schema=self.out_schema)
