"""The benchmark report behind `volsweep bench` / `make bench`: every ratio, one run.

    .venv/bin/python -m benchmarks.report [--rows N] [--repeats R] [--asm] [--cold]

At N rows (2M by default), with every implementation taking turns round by round (so the
drift of a shared machine hits all of them alike) and the median of R rounds:

* kernel throughput, 1 and 2 threads, both models: a memory floor (read the same input
  columns, write one), price, implied vol, all Greeks, the fused sweep (iv + all Greeks),
  and the ratios price/floor, iv/price, greeks/price, sweep/price, 2 threads / 1 thread;
* against the straightforward alternatives: whole-array numpy/scipy prices and Greeks,
  a vectorised numpy Newton for implied vol, scipy's brentq per contract (subsample);
* table-level calls (Arrow in, Arrow out) against the kernel calls on the same columns,
  at N rows and on small batches (100 and 10,000 rows: the fixed cost of a call);
* first-call latency in a new process with the cache warm (subprocess);
* ``--asm``: the hot loops' machine code (packed AVX-512/AVX2 arithmetic, no libm calls),
  compiled afresh in a subprocess because numba does not keep assembly for cached code;
* ``--cold``: cold compile time of ``volsweep.warmup()`` with an empty cache (minutes).

Read the ratios, not the absolute numbers: these machines are shared and noisy.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time

import numba
import numpy as np

from benchmarks import bench_greeks, bench_implied, bench_price
from benchmarks._timing import median_times
from volsweep.kernel import black, greeks, implied, registry, sweep

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _rounds(runs: dict, repeats: int) -> dict:
    return median_times(runs, repeats, warmup=True)


def _kernel_runs(model: str, d: dict) -> dict:
    n = d["K"].shape[0]
    m = greeks.greek_mask(None, model)   # all the model has (Black-76: no div_rho)
    U = d["F"] if model == "black76" else d["spot"]
    cols = (U, d["K"], d["T"], d["D"]) + ((np.zeros(n),) if model == "black76" else (d["q"],))
    p, st, iv = np.empty(n), np.empty(n, np.int8), np.empty(n)
    out = np.empty((bin(m).count("1"), n))
    fp, fi, fg, fs = ((black.black76_price, implied.black76_iv, greeks.black76_greeks,
                       sweep.black76_sweep) if model == "black76" else
                      (black.bsm_price, implied.bsm_iv, greeks.bsm_greeks, sweep.bsm_sweep))
    fp(*cols, d["vol"], d["cp"], p, st)
    prem = p.copy()
    floor = bench_price.floor_bsm        # one extra input each (Black-76: the shift)
    fl_out = np.empty(n)
    return {
        "floor": lambda: floor(*cols, d["vol"], d["cp"], fl_out),
        "price": lambda: fp(*cols, d["vol"], d["cp"], p, st),
        "iv": lambda: fi(prem, *cols, d["cp"], iv, st),
        "greeks": lambda: fg(*cols, d["vol"], d["cp"], m, out, st),
        "sweep": lambda: fs(prem, *cols, d["cp"], m, iv, out, st),
    }


def kernel_section(n: int, repeats: int) -> dict:
    d = bench_price.make_data(n)
    before = numba.get_num_threads()
    res = {}
    try:
        for model in ("black76", "bsm"):
            for th in sorted({1, min(2, numba.config.NUMBA_NUM_THREADS)}):
                numba.set_num_threads(th)
                t = _rounds(_kernel_runs(model, d), repeats)
                res[(model, th)] = {k: n / v for k, v in t.items()}
    finally:
        numba.set_num_threads(before)
    print(f"\n1. Kernels, {n:,} rows (M contracts/s; ratios within each row)")
    print(f"{'model':8} {'thr':>3} {'floor':>7} {'price':>7} {'iv':>7} {'greeks':>7} "
          f"{'sweep':>7} | {'px/floor':>8} {'iv/px':>6} {'grk/px':>6} {'swp/px':>6}")
    for (model, th), r in res.items():
        print(f"{model:8} {th:>3} " + " ".join(f"{r[k] / 1e6:7.1f}" for k in
                                               ("floor", "price", "iv", "greeks", "sweep"))
              + f" | {r['price'] / r['floor']:8.3f} {r['iv'] / r['price']:6.3f} "
              f"{r['greeks'] / r['price']:6.3f} {r['sweep'] / r['price']:6.3f}")
    if any(th == 2 for _, th in res):
        print("2 threads / 1 thread: " + "; ".join(
            f"{model} " + " ".join(f"{k} {res[(model, 2)][k] / res[(model, 1)][k]:.2f}"
                                   for k in ("price", "iv", "greeks", "sweep"))
            for model in ("black76", "bsm")))
    return res


def models_section(n: int, repeats: int) -> dict:
    """Price and implied vol of every model of the registry, all taking turns in the same
    rounds (2 threads): the cross-model ratios.  Same batch for every model (its extra
    inputs at their registry defaults; a normal model's vols are the batch's lognormal
    vols times the forward, so its rows sit as far from the money in standard
    deviations)."""
    d = bench_price.make_data(n)
    d = dict(d, forward=d["F"], div_yield=d["q"])
    runs = {}
    for name, m in registry.MODELS.items():
        cols = (d[m.underlying], d["K"], d["T"], d["D"]) + tuple(
            d[x.name] if x.name in d else np.full(n, x.default) for x in m.extras)
        # a normal vol of the same size in standard deviations (registry Model.vol)
        vol = d["vol"] * d["F"] if m.vol == "normal" else d["vol"]
        p, st, iv = np.empty(n), np.empty(n, np.int8), np.empty(n)
        m.kernels["price"](*cols, vol, d["cp"], p, st)
        prem = p.copy()
        runs[f"{name} price"] = (lambda m=m, c=cols, v=vol, p=p, st=st:
                                 m.kernels["price"](*c, v, d["cp"], p, st))
        runs[f"{name} iv"] = (lambda m=m, c=cols, q=prem, iv=iv, st=st:
                              m.kernels["implied_vol"](q, *c, d["cp"], iv, st))
    t = _rounds(runs, repeats)
    r = {k: n / v for k, v in t.items()}
    print(f"\n1b. Every model's price and implied vol taking turns, {n:,} rows, "
          f"{numba.get_num_threads()} threads (M contracts/s; price against the other "
          "models' prices, iv against the model's own price)")
    for name in registry.MODEL_NAMES:
        px = r[f"{name} price"]
        others = ", ".join(f"x{px / r[f'{o} price']:.2f} {o}" for o in registry.MODEL_NAMES
                           if o != name)
        print(f"  {name:9} price {px / 1e6:7.1f} ({others})   iv "
              f"{r[f'{name} iv'] / 1e6:7.1f} (iv/price {r[f'{name} iv'] / px:.3f})")
    return r


def alternatives_section(n: int, repeats: int, brentq_rows: int = 2000) -> None:
    d = bench_price.make_data(n)
    runs = {}
    for model in ("black76", "bsm"):
        runs[f"{model} price"] = bench_price._runner(model, "ours", d)
        runs[f"{model} price numpy"] = bench_price._runner(model, "numpy", d)
        runs[f"{model} greeks"] = bench_greeks._runner(model, "all", d)
        runs[f"{model} greeks numpy"] = bench_greeks._runner(model, "numpy", d)
    c = bench_implied.make_contracts(n)
    nc = c["F"].shape[0]
    ivo = np.empty(nc)
    runs["iv"] = lambda: bench_implied.ours_iv(c, ivo)
    runs["iv numpy"] = lambda: bench_implied.numpy_newton(c)
    t = _rounds(runs, max(3, repeats // 2))
    idx = np.random.default_rng(3).choice(nc, size=min(brentq_rows, nc), replace=False)
    t0 = time.perf_counter()
    got = bench_implied.scipy_brentq(c, idx)
    t_brentq = (time.perf_counter() - t0) / idx.size
    tol = bench_implied.tolerance(c)
    acc_ours = bench_implied._accuracy(ivo, c, tol)
    acc_np = bench_implied._accuracy(bench_implied.numpy_newton(c), c, tol)
    acc_bq = bench_implied._accuracy(got, c, tol, idx)
    print(f"\n2. Against the straightforward versions (2 threads for ours; numpy is "
          f"single-threaded)")
    for model in ("black76", "bsm"):
        print(f"  {model:8} price  {t[f'{model} price numpy'] / t[f'{model} price']:6.1f}x "
              f"numpy+ndtr   greeks {t[f'{model} greeks numpy'] / t[f'{model} greeks']:6.1f}x "
              "numpy+ndtr")
    print(f"  black76  iv     {t['iv numpy'] / t['iv']:6.1f}x numpy Newton (8 steps; "
          f"{100 * acc_np[2]:.1f}% of rows within tolerance vs ours {100 * acc_ours[2]:.1f}%)")
    print(f"  black76  iv     {t_brentq / (t['iv'] / nc):6.0f}x scipy brentq per contract "
          f"({idx.size} rows; brentq worst {acc_bq[1]:.2f} of tolerance, ours "
          f"{acc_ours[1]:.2f})")


def _bsm_snapshot(n: int):
    """A one-chunk synthetic BSM snapshot of n rows (no bad rows, premium quotes), and the
    kernel inputs the table-level calls derive from it: float columns and call/put codes."""
    import pyarrow as pa

    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(n_rows=n, seed=5, bad_fraction=0.0).drop_columns(["bid", "ask"])
    snap = pa.Table.from_batches(snap.combine_chunks().to_batches())
    col = {k: snap.column(k).to_numpy() for k in
           ("spot", "strike", "expiry_years", "rate", "div_yield", "true_vol", "premium")}
    cp = np.where(snap.column("is_call").to_numpy(zero_copy_only=False), 1, -1).astype(np.int8)
    return snap, col, cp


def table_section(n: int, repeats: int) -> None:
    import volsweep

    snap, col, cp = _bsm_snapshot(n)
    T = col["expiry_years"]
    D = black.discount_factors(col["rate"], T, np.empty(n))   # as the bindings derive it
    args = (col["spot"], col["strike"], T, D, col["div_yield"])
    p, st, iv = np.empty(n), np.empty(n, np.int8), np.empty(n)
    out = np.empty((greeks.N_GREEKS, n))
    m = greeks.ALL_GREEKS
    runs = {
        "price": lambda: volsweep.price(snap, columns={"vol": "true_vol"}),
        "price kernel": lambda: black.bsm_price(*args, col["true_vol"], cp, p, st),
        "implied_vol": lambda: volsweep.implied_vol(snap),
        "implied_vol kernel": lambda: implied.bsm_iv(col["premium"], *args, cp, iv, st),
        "greeks": lambda: volsweep.greeks(snap, columns={"vol": "true_vol"}),
        "greeks kernel": lambda: greeks.bsm_greeks(*args, col["true_vol"], cp, m, out, st),
        "sweep": lambda: volsweep.sweep(snap),
        "sweep kernel": lambda: sweep.bsm_sweep(col["premium"], *args, cp, m, iv, out, st),
        # the same kernels writing into fresh outputs, as a table-level call must (the
        # first touch of new memory is part of the cost: 256 MB for 16 Greeks at 2M rows)
        "price fresh": lambda: black.bsm_price(*args, col["true_vol"], cp, np.empty(n),
                                               np.empty(n, np.int8)),
        "implied_vol fresh": lambda: implied.bsm_iv(col["premium"], *args, cp, np.empty(n),
                                                    np.empty(n, np.int8)),
        "greeks fresh": lambda: greeks.bsm_greeks(*args, col["true_vol"], cp, m,
                                                  np.empty_like(out), np.empty(n, np.int8)),
        "sweep fresh": lambda: sweep.bsm_sweep(col["premium"], *args, cp, m, np.empty(n),
                                               np.empty_like(out), np.empty(n, np.int8)),
        # what a kernel-level caller holding rates (as the table does) must also compute
        "discount": lambda: black.discount_factors(col["rate"], T, np.empty(n)),
    }
    t = _rounds(runs, repeats)
    print(f"\n3. Table-level calls (BSM, synthetic snapshot, {n:,} rows, one chunk) against "
          "the kernel on the same columns, into reused and into fresh output arrays")
    print("  (fresh+D: into fresh outputs, plus the discount factors from the rates)")
    print(f"  {'':12s} {'table':>7s} {'kernel':>7s} {'fresh':>7s} {'fresh+D':>7s}  (M/s)   "
          "table/kernel  table/fresh  table/fresh+D")
    for name in ("price", "implied_vol", "greeks", "sweep"):
        r = {k: n / t[name + k] / 1e6 for k in ("", " kernel", " fresh")}
        r["+D"] = n / (t[name + " fresh"] + t["discount"]) / 1e6
        print(f"  {name:12s} {r['']:7.1f} {r[' kernel']:7.1f} {r[' fresh']:7.1f} "
              f"{r['+D']:7.1f}          {r[''] / r[' kernel']:6.3f}       "
              f"{r[''] / r[' fresh']:6.3f}        {r[''] / r['+D']:6.3f}")



def small_batch_section(repeats: int, sizes=(100, 10_000)) -> None:
    """Table-level calls on small batches (the embedded case: a risk engine calling per
    book or per underlying): the fixed cost of a call beside the kernels it runs."""
    import volsweep

    print("\n3b. Small batches (BSM): table-level call against discount factors + kernel "
          "(microseconds per call, median)")
    for n in sizes:
        snap, col, cp = _bsm_snapshot(n)
        T = col["expiry_years"]
        S, K, q = col["spot"], col["strike"], col["div_yield"]

        def price_k():
            D = black.discount_factors(col["rate"], T, np.empty(n))
            black.bsm_price(S, K, T, D, q, col["true_vol"], cp, np.empty(n),
                            np.empty(n, np.int8))

        def iv_k():
            D = black.discount_factors(col["rate"], T, np.empty(n))
            implied.bsm_iv(col["premium"], S, K, T, D, q, cp, np.empty(n),
                           np.empty(n, np.int8))

        calls = 20   # per timing: one 100-row call is ~0.1 ms, too short to time alone
        runs = {name: (lambda f=f: [f() for _ in range(calls)]) for name, f in {
            "price": lambda: volsweep.price(snap, columns={"vol": "true_vol"}),
            "price kernel": price_k,
            "implied_vol": lambda: volsweep.implied_vol(snap),
            "implied_vol kernel": iv_k}.items()}
        t = _rounds(runs, max(repeats, 60))
        us = {k: v / calls * 1e6 for k, v in t.items()}
        print(f"  {n:>7,d} rows: price {us['price']:7.1f} vs {us['price kernel']:6.1f}   "
              f"implied_vol {us['implied_vol']:7.1f} vs {us['implied_vol kernel']:6.1f}")


_FIRST_CALL = """
import time
t0 = time.perf_counter()
import volsweep
t1 = time.perf_counter()
volsweep.price({"spot": [100.0], "strike": [105.0], "expiry_years": [0.5], "rate": [0.03],
                "div_yield": [0.01], "vol": [0.2], "is_call": [True]})
t2 = time.perf_counter()
volsweep.sweep({"spot": [100.0], "strike": [105.0], "expiry_years": [0.5], "rate": [0.03],
                "div_yield": [0.01], "premium": [4.2], "is_call": [True]})
t3 = time.perf_counter()
print(t1 - t0, t2 - t1, t3 - t2)
"""


def latency_section() -> None:
    subprocess.run([sys.executable, "-c", _FIRST_CALL], check=True, capture_output=True)
    runs = []
    for _ in range(3):
        r = subprocess.run([sys.executable, "-c", _FIRST_CALL], check=True,
                           capture_output=True, text=True)
        runs.append([float(v) for v in r.stdout.split()])
    imp, first, sw = (statistics.median(v) for v in zip(*runs))
    print(f"\n4. New process, warm cache (median of 3): import {imp:.2f} s, first price() "
          f"{first:.2f} s, then first sweep() {sw:.2f} s; import + first price "
          f"{imp + first:.2f} s")


_ASM = """
import json, re, numpy as np
import volsweep
from volsweep.kernel import bachelier, black, implied, greeks
volsweep.warmup(which=None, sweep=False)
found = {}
loops = {"black76 price": black._black76_price_rows, "bsm price": black._bsm_price_rows,
         "black76 iv": implied._black76_iv_rows, "bsm iv": implied._bsm_iv_rows,
         "black76 greeks": greeks._kernel("black76", greeks.greek_mask(None, "black76"))[0],
         "bsm greeks": greeks._kernel("bsm", greeks.greek_mask(None, "bsm"))[0],
         "bachelier price": bachelier._price_rows, "bachelier iv": bachelier._iv_rows}
for name, fn in loops.items():
    asm = "\\n".join(fn.inspect_asm().values())
    packed = len(re.findall(r"\\bv(?:fmadd|fmsub|fnmadd|mul|add|sub|div)\\w*pd\\s+%[yz]mm", asm))
    calls = sorted(set(re.findall(r"call\\w*\\s+([A-Za-z_][\\w@.]*)", asm)))
    found[name] = {"packed_double_ops": packed, "named_calls": calls,
                   "zmm": "zmm" in asm}
print(json.dumps(found))
"""


def asm_section() -> None:
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        r = subprocess.run([sys.executable, "-c", _ASM], check=True, capture_output=True,
                           text=True, env=env, cwd=ROOT)
    found = json.loads(r.stdout.strip().splitlines()[-1])
    print("\n5. Machine code of the hot row loops (fresh compile)")
    for name, f in found.items():
        libm = [c for c in f["named_calls"] if any(s in c for s in ("exp", "log", "erf"))]
        print(f"  {name:15s} packed double ops {f['packed_double_ops']:5d} "
              f"({'zmm' if f['zmm'] else 'ymm'}), libm calls: {libm or 'none'}")


def cold_section() -> None:
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-c",
                            "import json, volsweep; print(json.dumps(volsweep.warmup()))"],
                           check=True, capture_output=True, text=True, env=env, cwd=ROOT)
        total = time.perf_counter() - t0
    spent = json.loads(r.stdout.strip().splitlines()[-1])
    print(f"\n6. Cold compile of volsweep.warmup() (empty cache): {total:.0f} s in all")
    for k, v in spent.items():
        print(f"  {k:22s} {v:6.1f} s")


def machine() -> str:
    cpu = ""
    try:
        with open("/proc/cpuinfo") as f:
            cpu = next(line.split(":", 1)[1].strip() for line in f if "model name" in line)
    except (OSError, StopIteration):
        cpu = platform.processor()
    return (f"{cpu}, {os.cpu_count()} logical CPUs; Python {platform.python_version()}, "
            f"numba {numba.__version__}, numpy {np.__version__}, threading layer "
            f"{numba.threading_layer()}")


def main(argv=None, rows: int | None = None) -> int:
    if rows is not None:                  # `volsweep bench --rows N`
        argv = list(argv or []) + ["--rows", str(rows)]
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--asm", action="store_true", help="inspect the hot loops' machine code")
    ap.add_argument("--cold", action="store_true", help="time a cold compile (minutes)")
    args = ap.parse_args(argv)
    import volsweep

    volsweep.warmup()
    print(f"volsweep benchmark report, {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    kernel_section(args.rows, args.repeats)
    models_section(args.rows, args.repeats)
    print(f"   machine: {machine()}")
    alternatives_section(args.rows, args.repeats)
    table_section(args.rows, args.repeats)
    small_batch_section(args.repeats)
    latency_section()
    if args.asm:
        asm_section()
    if args.cold:
        cold_section()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
