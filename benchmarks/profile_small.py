"""Where the time of a small table-level call goes, stage by stage (this checkout).

    .venv/bin/python -m benchmarks.profile_small [--rows 100] [--rounds 200] [--cprofile]

Times, on a one-chunk synthetic snapshot (as the report's section 3b), the whole call and
each stage of it taking turns round by round (medians, microseconds): the input to
batches (``_input.as_batches``), ``prepare`` (a cache hit: its key, with the hash of the
schema), then inside ``Prepared.__call__`` the column extraction (``ColumnPlan``: expiry,
the underlying, strike, discount factors from the rates, the extras, call/put), the
output arrays, the kernel, the output columns, appending them to the batch, and the
table the call returns.  The stages are the bindings' own functions called one by one,
so their sum is close to, not exactly, the call.  ``--cprofile``: the call's profile by
function (cumulative), over many calls.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import statistics
import time

import numpy as np


def stages(spec, snap, op) -> dict:
    """Callables for the stages of the table-level ``op`` ("price" or "sweep") on ``snap``."""
    import pyarrow as pa

    import volsweep
    from volsweep import _output, api
    from volsweep._input import as_batches

    options = {"columns": {"vol": "true_vol"}} if op == "price" else {}
    prep = api.prepare(op, snap.schema, model=spec.name, **options)
    schema = snap.schema
    (batch,) = as_batches(snap)[1]
    plan, m = prep.plan, prep.model
    n = batch.num_rows
    T = plan.expiry_years(batch)
    inputs, cp = prep._inputs(batch)
    cols = prep._compute(batch)
    out = prep(batch)
    call = (lambda: volsweep.price(snap, model=spec.name, **options)) if op == "price" else (
        lambda: volsweep.sweep(snap, model=spec.name))
    if op == "price":
        def kernel():
            m.kernels["price"](*inputs, vol, cp, np.empty(n), np.empty(n, np.int8))

        def outputs():
            st = np.zeros(n, np.int8)
            return {"price": _output.float_column(inputs[0], st == 0),
                    "status": _output.status_column(st)}
        vol = plan.floats(batch, "vol")
    else:
        mask = prep.mask

        def kernel():
            m.kernels["sweep"](prem, *inputs, cp, mask, np.empty(n),
                               np.empty((rows, n)), np.empty(n, np.int8))
        prem = plan.floats(batch, "premium")
        rows = bin(mask).count("1")        # the Greeks the kernel computes
        g = np.zeros((rows, n))

        def outputs():
            st = np.zeros(n, np.int8)
            ok = st == 0
            c = {"iv": _output.float_column(inputs[0], ok)}
            c.update(prep._greek_out(g, 0, ok))
            c["status"] = _output.status_column(st)
            return c
    quote = "vol" if op == "price" else "premium"
    return {
        "whole call": call,
        "as_batches": lambda: as_batches(snap),
        "prepare (cache hit)": lambda: api.prepare(op, schema, model=spec.name, **options),
        "  hash(schema)": lambda: hash(schema),
        "Prepared.__call__": lambda: prep(batch),
        "  expiry_years": lambda: plan.expiry_years(batch),
        "  floats(underlying)": lambda: plan.floats(batch, m.underlying),
        "  floats(strike)": lambda: plan.floats(batch, "strike"),
        "  discount (rates)": lambda: plan.discount(batch, T),
        "  extras": lambda: [plan.extra(batch, x) for x in m.extras],
        "  call_put": lambda: plan.call_put(batch),
        f"  floats({quote})": lambda: plan.floats(batch, quote),
        "  _inputs (all above)": lambda: prep._inputs(batch),
        "  kernel (fresh outputs)": kernel,
        "  output columns": outputs,
        "  _compute (inputs+kernel+columns)": lambda: prep._compute(batch),
        "  append": lambda: _output.append(batch, prep.out_schema, cols),
        "Table.from_batches": lambda: pa.Table.from_batches([out], schema=prep.out_schema),
    }


def main(argv=None) -> int:
    from benchmarks import _cases

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=100)
    ap.add_argument("--rounds", type=int, default=200)
    ap.add_argument("--calls", type=int, default=20)
    ap.add_argument("--cprofile", action="store_true")
    args = ap.parse_args(argv)
    snap, _ = _cases.snapshot(args.rows)
    for spec in _cases.models().values():
        for op in ("price", "sweep"):
            runs = stages(spec, snap, op)
            for fn in runs.values():
                fn()
            times = {k: [] for k in runs}
            for _ in range(args.rounds):
                for k, fn in runs.items():
                    t0 = time.perf_counter()
                    for _ in range(args.calls):
                        fn()
                    times[k].append((time.perf_counter() - t0) / args.calls)
            print(f"\n{spec.name} {op}, {args.rows} rows: microseconds per call (median of "
                  f"{args.rounds} rounds of {args.calls})")
            for k, v in times.items():
                print(f"  {k:36s} {statistics.median(v) * 1e6:8.1f}")
            if args.cprofile:
                call = runs["whole call"]
                prof = cProfile.Profile()
                prof.enable()
                for _ in range(2000):
                    call()
                prof.disable()
                pstats.Stats(prof).sort_stats("tottime").print_stats(18)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
