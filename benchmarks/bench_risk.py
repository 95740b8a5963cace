"""Scenario-grid speed: ``volsweep.scenarios`` against one ``volsweep.price`` call on the
same rows.

    .venv/bin/python -m benchmarks.bench_risk [--rows N] [--repeats R] [--threads 1,2]
    .venv/bin/python -m pytest benchmarks/bench_risk.py --benchmark-only

A book of N positions (1M by default) on 50 fictional underlyings, interleaved in the
input (so the grouping and the stable sort are part of the cost), for every model of the
registry with a scenario pricer.  Both calls are table-level (Arrow in, Arrow out; the
discount factors from the rates included), take turns round by round, and the medians
are compared as per-row rates: a price call values N rows, the default grid (21 spot x 7
vol shocks) N x 147.  The issue's target: revaluations/s of the grid >= 0.8 x rows/s of
the price call, both cores.  Read the ratio, not the absolute numbers.
"""

from __future__ import annotations

import argparse
import os

import numba
import numpy as np
import pyarrow as pa
import pytest

from benchmarks._cases import make_data
from benchmarks._timing import median_times
from volsweep.kernel import registry
from volsweep.kernel import risk as krisk

N_SPOT, N_VOL = 21, 7             # the default grid of volsweep.scenarios
GROUPS = 50


def book(n: int, model) -> pa.Table:
    """N positions of ``model`` (a registry entry): make_data's contracts, a rate column,
    an underlying key per row, signed quantities and a multiplier."""
    d = make_data(n)
    rng = np.random.default_rng(11)
    cols = {"underlying": pa.array(rng.integers(0, GROUPS, n).astype(np.int32)),
            model.underlying: d[model.underlying], "strike": d["K"],
            "expiry_years": d["T"], "rate": -np.log(d["D"]) / d["T"],
            "is_call": d["cp"] > 0, "vol": d["vol"]}
    if model.vol == "normal":     # a normal vol of the same size as the lognormal one
        cols["vol"] = d["vol"] * d[model.underlying]
    for x in model.extras:
        cols[x.name] = d[x.name] if x.name in d else np.full(n, x.default)
    cols["quantity"] = rng.integers(-50, 51, n).astype(np.float64)
    cols["multiplier"] = np.full(n, 100.0)
    return pa.table(cols)


def kernel_runs(n: int, model) -> dict:
    """The same comparison below the bindings: the model's price kernel into preallocated
    outputs against ``kernel.risk.scenario_pnl`` on the same numpy arrays (rows already
    sorted by group; one group, all rows ok)."""
    d = make_data(n)
    from benchmarks._cases import model_inputs

    ins = model_inputs(model, d)
    pricer = krisk.pricer_of(model.name, model.exercise)
    by_name = dict(zip([x.name for x in model.extras], ins[4:]))
    X = [by_name[x] for x in pricer.extras] + [np.zeros(n)] * (2 - len(pricer.extras))
    vol = d["vol"] * (d[model.underlying] if model.vol == "normal" else 1.0)
    p, st = np.empty(n), np.empty(n, np.int8)
    ok = np.ones(n, np.int8)
    w = np.full(n, 100.0)
    g = np.zeros(n, np.int64)
    ds = np.linspace(-0.1, 0.1, N_SPOT)
    dv = np.linspace(-0.03, 0.03, N_VOL)
    pnl, bad = np.empty((1, N_SPOT * N_VOL)), np.empty((1, N_SPOT * N_VOL), np.int64)
    return {"price": lambda: model.kernels["price"](*ins, vol, d["cp"], p, st),
            "grid": lambda: krisk.scenario_pnl(model.name, *ins[:4], *X, vol, d["cp"], ok, w,
                                               g, ds, dv, 0.0, pnl, bad,
                                               exercise=model.exercise)}


def risk_section(n: int = 1_000_000, repeats: int = 5, threads=None) -> dict:
    """Print and return {(model, threads): ratio} of grid revaluations/s to price rows/s."""
    import volsweep

    threads = threads or [numba.get_num_threads()]
    was = numba.get_num_threads()
    out = {}
    print(f"\n3c. Scenario grid ({N_SPOT} spot x {N_VOL} vol shocks = {N_SPOT * N_VOL} "
          f"revaluations per position, {n:,} positions in {GROUPS} groups) against one "
          "price call on the same rows, table-level, taking turns")
    print(f"  {'model':10s} {'threads':>7s} {'price rows/s':>13s} {'grid reval/s':>13s} "
          f"{'grid s':>7s}  ratio (target >= 0.8)  kernel-level ratio")
    try:
        for name, m in registry.MODELS.items():
            if (name, m.exercise) not in krisk.PRICERS:
                print(f"  {name:10s} skipped: no scenario pricer")
                continue
            b = book(n, m)
            kr = kernel_runs(n, m)
            for k in threads:
                numba.set_num_threads(k)
                t = median_times({"price": lambda: volsweep.price(b, model=name),
                                  "grid": lambda: volsweep.scenarios(b, model=name),
                                  "kprice": kr["price"], "kgrid": kr["grid"]},
                                 repeats, warmup=True)
                price_rate = n / t["price"]
                grid_rate = n * N_SPOT * N_VOL / t["grid"]
                kratio = (N_SPOT * N_VOL / t["kgrid"]) / (1.0 / t["kprice"])
                out[(name, k)] = grid_rate / price_rate
                print(f"  {name:10s} {k:7d} {price_rate / 1e6:11.1f} M {grid_rate / 1e6:11.1f} M "
                      f"{t['grid']:7.2f}  {grid_rate / price_rate:6.2f}"
                      f"{'':16s}{kratio:6.2f}")
    finally:
        numba.set_num_threads(was)
    print(f"  load average: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return out


@pytest.mark.parametrize("model", [m for m in registry.MODEL_NAMES
                                   if (m, "european") in krisk.PRICERS])
def test_scenarios_100k(benchmark, model):
    import volsweep

    b = book(100_000, registry.MODELS[model])
    volsweep.scenarios(b, model=model)
    benchmark(lambda: volsweep.scenarios(b, model=model))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--threads", default=None,
                    help="comma-separated thread counts (default: numba's)")
    args = ap.parse_args(argv)
    import volsweep

    volsweep.warmup(sweep=False, bid_ask=False, which="vega")
    threads = [int(x) for x in args.threads.split(",")] if args.threads else None
    risk_section(args.rows, args.repeats, threads)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
