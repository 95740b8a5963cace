"""The public operations: Arrow-compatible tables in, Arrow tables out.

Every operation returns the input columns, in the input order, plus its outputs; every row
gets a ``status`` (``"ok"`` or the reason it has no value).  Multi-chunk tables and streams
are processed batch by batch, never concatenated.  Schema problems raise ``ValueError`` /
``TypeError`` naming the column before any work is done; data problems never raise.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from volsweep.kernel import black as _black

from ._columns import ColumnPlan
from ._input import as_batches
from ._output import append, check_no_clash, float_column, output_schema, status_column


def _run(data, plan_kwargs, outputs, compute) -> pa.Table:
    """Shared driver: plan the columns once, then ``compute(plan, batch)`` per batch."""
    schema, batches = as_batches(data)
    plan = ColumnPlan.build(schema, **plan_kwargs)
    check_no_clash(schema, outputs)
    out_schema = output_schema(schema, outputs)
    out = [append(b, out_schema, compute(plan, b)) for b in batches]
    return pa.Table.from_batches(out, schema=out_schema)


def _forward_inputs(plan: ColumnPlan, batch: pa.RecordBatch):
    T = plan.expiry_years(batch)
    return (plan.underlying(batch), plan.floats(batch, "strike"), T, plan.discount(batch, T),
            plan.div_yield(batch) if plan.model == "bsm" else None, plan.call_put(batch))


def price(data, model: str = "bsm", columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Model prices of European options.

    ``model="bsm"``: Black-Scholes-Merton on ``spot`` with continuous ``div_yield``;
    ``model="black76"``: Black-76 on ``forward``.  Adds ``price`` (null where the row has no
    price) and ``status``.  ``columns`` maps our input names to yours, e.g.
    ``{"strike": "K"}``; ``as_of`` is the valuation time when expiries are timestamps.
    """

    def compute(plan, batch):
        und, K, T, D, q, cp = _forward_inputs(plan, batch)
        vol = plan.floats(batch, "vol")
        n = batch.num_rows
        p = np.empty(n)
        st = np.empty(n, np.int8)
        if plan.model == "bsm":
            _black.bsm_price(und, K, T, D, q, vol, cp, p, st)
        else:
            _black.black76_price(und, K, T, D, vol, cp, p, st)
        return {"price": float_column(p, st == 0), "status": status_column(st)}

    return _run(data, dict(model=model, columns=columns, need_vol=True, need_quote=False,
                           as_of=as_of), ("price", "status"), compute)
