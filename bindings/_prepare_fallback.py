"""TEMPORARY stand-in for ``volsweep.api.prepare`` until it lands (issue 13): the same
interface, built on the table-level operations.  Unlike the real one it runs the
operation on an empty table to learn its outputs.  Remove it when ``api.prepare`` exists.
"""

from __future__ import annotations

import pyarrow as pa

from . import api
from ._columns import ColumnPlan

_NEEDS = {"price": (True, False), "implied_vol": (False, True), "greeks": (True, False),
          "sweep": (False, True)}


class Prepared:
    def __init__(self, operation, schema, options):
        self._fn = getattr(api, operation)
        self._options = options
        probe = self._fn(schema.empty_table(), **options)
        self.out_schema = probe.schema
        self.outputs = tuple(probe.schema.names[len(schema):])
        need_vol, need_quote = _NEEDS[operation]
        plan = ColumnPlan.build(schema, options["model"], options.get("columns"),
                                need_vol=need_vol, need_quote=need_quote,
                                as_of=options.get("as_of"))
        used = set(plan.source.values())
        self.used = [n for n in schema.names if n in used]

    def __call__(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        res = self._fn(batch, **self._options)
        return pa.RecordBatch.from_arrays(
            [c.chunk(0) if c.num_chunks == 1 else c.combine_chunks() for c in res.columns],
            schema=res.schema)


def prepare(operation: str, schema: pa.Schema, *, model="bsm", which=None, units="raw",
            columns=None, as_of=None) -> Prepared:
    options = dict(model=model, columns=columns, as_of=as_of)
    if operation in ("greeks", "sweep"):
        options.update(which=which, units=units)
    return Prepared(operation, schema, options)
