"""The benchmark report behind `volsweep bench` / `make bench`: every ratio, one run.

    .venv/bin/python -m benchmarks.report [--rows N] [--repeats R] [--asm] [--cold]
        [--before CHECKOUT]

At N rows (2M by default), with every implementation taking turns round by round (so the
drift of a shared machine hits all of them alike) and the median of R rounds:

* kernel throughput, 1 and 2 threads, every model of the registry
  (``volsweep.kernel.registry.MODELS``, its kernels and inputs: adding a model adds it
  here): a memory floor (read the same input columns, write one), price, implied vol, all
  Greeks, the fused sweep (iv + all Greeks), and the ratios price/floor, iv/price,
  greeks/price, sweep/price, 2 threads / 1 thread; bid/ask quotes in one pass (the
  ``bid_ask`` kernel) against three implied-vol passes and a vega pass;
* every model's price and implied vol taking turns in the same rounds (price against the
  other models' prices, iv against the model's own price);
* against the straightforward alternatives: whole-array numpy/scipy prices and Greeks,
  a vectorised numpy Newton for implied vol, scipy's brentq per contract (subsample);
  these references exist per model (``bench_price.NUMPY_PRICE``,
  ``bench_greeks.NUMPY_GREEKS``, ``bench_implied.REFERENCE_MODELS``): a model without one
  is listed as skipped;
* table-level calls (Arrow in, Arrow out) against the kernel calls on the same columns,
  at N rows and on small batches (100 and 10,000 rows: the fixed cost of a call; with
  ``--before CHECKOUT``, the previous code version and this one taking turns in two child
  processes, ``benchmarks.compare``);
* scenario grids (``volsweep.scenarios``, 21 x 7 shocks on up to 1M positions) against
  one ``volsweep.price`` call on the same rows: revaluations/s over rows/s
  (``benchmarks/bench_risk.py``);
* the chain operations (``implied_forwards``, ``model_free_variance``) on 1.92M rows
  against one ``implied_vol`` pass on the same rows (``benchmarks.bench_chains``);
* smiles (``benchmarks.bench_smiles``): ``fit_smiles`` on 9,600 slices x 100 quotes
  against one table-level ``implied_vol`` pass on the same rows, taking turns;
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

from benchmarks import (_cases, bench_greeks, bench_implied, bench_price, bench_risk,
                        bench_smiles, compare)
from benchmarks._timing import median_times
from volsweep.kernel import registry

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _rounds(runs: dict, repeats: int) -> dict:
    return median_times(runs, repeats, warmup=True)


KERNEL_CASES = ("floor", "price", "iv", "greeks", "sweep", "bid/ask 3+1", "bid/ask")


def kernel_section(n: int, repeats: int) -> dict:
    d = _cases.make_data(n)
    models = _cases.models()
    before = numba.get_num_threads()
    res = {}
    try:
        for name, spec in models.items():
            for th in sorted({1, min(2, numba.config.NUMBA_NUM_THREADS)}):
                numba.set_num_threads(th)
                t = _rounds(_cases.kernel_runs(spec, d), repeats)
                res[(name, th)] = {k: n / v for k, v in t.items()}
    finally:
        numba.set_num_threads(before)
    print(f"\n1. Kernels, {n:,} rows, every model of the registry (M contracts/s; ratios "
          "within each row)")
    print(f"{'model':8} {'thr':>3} {'floor':>7} {'price':>7} {'iv':>7} {'greeks':>7} "
          f"{'sweep':>7} | {'px/floor':>8} {'iv/px':>6} {'grk/px':>6} {'swp/px':>6}")
    nan = float("nan")
    for (model, th), r in res.items():
        print(f"{model:8} {th:>3} " + " ".join(f"{r.get(k, nan) / 1e6:7.1f}" for k in
                                               ("floor", "price", "iv", "greeks", "sweep"))
              + f" | {r['price'] / r.get('floor', nan):8.3f} "
              f"{r['iv'] / r['price']:6.3f} {r['greeks'] / r['price']:6.3f} "
              f"{r['sweep'] / r['price']:6.3f}")
    for name, spec in models.items():
        notes = []
        if "floor" not in res[(name, 1)]:
            notes.append("no memory floor for its number of inputs (bench_price.FLOORS)")
        if _cases.defaulted(spec, d):
            notes.append(f"extra inputs at their defaults: {', '.join(_cases.defaulted(spec, d))}")
        if notes:
            print(f"  {name}: " + "; ".join(notes))
    if any(th == 2 for _, th in res):
        print("2 threads / 1 thread: " + "; ".join(
            f"{model} " + " ".join(f"{k} {res[(model, 2)][k] / res[(model, 1)][k]:.2f}"
                                   for k in ("price", "iv", "greeks", "sweep"))
            for model in models))
    print("bid/ask quotes (iv of bid, ask and mid + vega at the mid): one pass (bid_ask "
          "kernel) against 3 implied-vol passes + a vega pass, M/s and ratio: " + "; ".join(
              f"{model} {th} thr {r['bid/ask'] / 1e6:.1f} vs {r['bid/ask 3+1'] / 1e6:.1f} "
              f"x{r['bid/ask'] / r['bid/ask 3+1']:.2f}" for (model, th), r in res.items()
              if "bid/ask" in r))
    return res


def models_section(n: int, repeats: int) -> dict:
    """Price and implied vol of every model of the registry, all taking turns in the same
    rounds: the cross-model ratios.  Same batch for every model (its extra inputs at their
    registry defaults; a normal model's vols, registry ``Model.vol``, are the batch's
    lognormal vols times the forward, so its rows sit as far from the money in standard
    deviations)."""
    d = _cases.make_data(n)
    runs = {}
    for name, m in registry.MODELS.items():
        cols = _cases.model_inputs(m, d)
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


def american_section(n: int, repeats: int, n_amer: int = 20_000) -> dict:
    """American exercise (registry ``AMERICAN``), all taking turns in the same rounds:
    its price at the accurate and the fast setting against the European price of the same
    model (goal at the accurate setting: at least 1/300 of it), and its implied vol
    against its price (goal: at least 1/5)."""
    runs, rows = _cases.american_runs(n, n_amer)
    t = _rounds(runs, repeats)
    r = {k: rows[k] / v for k, v in t.items()}
    print(f"\n1c. American exercise, {n_amer:,} rows ({n:,} for the European price), "
          f"{numba.get_num_threads()} threads, load average {os.getloadavg()[0]:.2f} "
          "(contracts/s; ratios within this run)")
    for name in registry.AMERICAN:
        eu = r[f"{name} european price"]
        acc = r[f"{name} american price accurate"]
        fast = r[f"{name} american price fast"]
        iv = r[f"{name} american iv"]
        print(f"  {name}: european price {eu / 1e6:.1f} M/s; american price accurate "
              f"{acc / 1e3:.1f} k/s (1/{eu / acc:.0f} of european), fast {fast / 1e3:.1f} "
              f"k/s (1/{eu / fast:.0f}); american iv {iv / 1e3:.1f} k/s (iv/price "
              f"{iv / acc:.3f})")
    return r


def alternatives_section(n: int, repeats: int, brentq_rows: int = 2000) -> None:
    d = _cases.make_data(n)
    runs, skipped = {}, []
    for model in registry.MODEL_NAMES:
        for label, runner, impl in (("price", bench_price._runner, "ours"),
                                    ("price numpy", bench_price._runner, "numpy"),
                                    ("greeks", bench_greeks._runner, "all"),
                                    ("greeks numpy", bench_greeks._runner, "numpy")):
            fn = runner(model, impl, d)
            if fn is None:
                skipped.append(f"{model} {label}")
            else:
                runs[f"{model} {label}"] = fn
    iv_models = [m for m in registry.MODEL_NAMES if m in bench_implied.REFERENCE_MODELS]
    contracts = {m: bench_implied.make_contracts(n, model=m) for m in iv_models}
    ivo = {m: np.empty(c["F"].shape[0]) for m, c in contracts.items()}
    for m, c in contracts.items():
        runs[f"{m} iv"] = lambda m=m, c=c: bench_implied.ours_iv(c, ivo[m], m)
        runs[f"{m} iv numpy"] = lambda c=c: bench_implied.numpy_newton(c)
    t = _rounds(runs, max(3, repeats // 2))
    print("\n2. Against the straightforward versions (2 threads for ours; numpy is "
          "single-threaded)")
    for model in registry.MODEL_NAMES:
        cells = [f"{what:6s} {t[f'{model} {what} numpy'] / t[f'{model} {what}']:6.1f}x "
                 "numpy+ndtr" for what in ("price", "greeks") if f"{model} {what} numpy" in t]
        if cells:
            print(f"  {model:8} " + "   ".join(cells))
    for m, c in contracts.items():
        nc = c["F"].shape[0]
        idx = np.random.default_rng(3).choice(nc, size=min(brentq_rows, nc), replace=False)
        t0 = time.perf_counter()
        got = bench_implied.scipy_brentq(c, idx)
        t_brentq = (time.perf_counter() - t0) / idx.size
        tol = bench_implied.tolerance(c)
        acc_ours = bench_implied._accuracy(ivo[m], c, tol)
        acc_np = bench_implied._accuracy(bench_implied.numpy_newton(c), c, tol)
        acc_bq = bench_implied._accuracy(got, c, tol, idx)
        print(f"  {m:8} iv     {t[f'{m} iv numpy'] / t[f'{m} iv']:6.1f}x numpy Newton (8 "
              f"steps; {100 * acc_np[2]:.1f}% of rows within tolerance vs ours "
              f"{100 * acc_ours[2]:.1f}%)")
        print(f"  {m:8} iv     {t_brentq / (t[f'{m} iv'] / nc):6.0f}x scipy brentq per "
              f"contract ({idx.size} rows; brentq worst {acc_bq[1]:.2f} of tolerance, ours "
              f"{acc_ours[1]:.2f})")
    skipped += [f"{m} iv" for m in registry.MODEL_NAMES if m not in iv_models]
    if skipped:
        print(f"  no reference implementation, skipped: {', '.join(skipped)}")


def table_section(n: int, repeats: int) -> None:
    snap, col = _cases.snapshot(n)
    ops = ("price", "implied_vol", "greeks", "sweep")
    print(f"\n3. Table-level calls (synthetic snapshot, {n:,} rows, one chunk) against "
          "the kernel on the same columns (discount factors from the rates included)")
    print("  (fresh: the kernel into fresh outputs, as a table-level call must; reused: into "
          "outputs reused from call to call)")
    print(f"  {'model':8s} {'':12s} {'table':>7s} {'fresh':>7s} {'reused':>7s}  (M/s)   "
          "table/fresh  table/reused")
    for name, spec in _cases.models().items():
        runs = _cases.table_runs(spec, snap, col, ops)
        runs.update({k + " reused": v for k, v in
                     _cases.table_runs(spec, snap, col, ops, fresh=False).items()
                     if k.endswith(" kernel")})
        t = _rounds(runs, repeats)
        for op in ops:
            r = {k: n / t[op + k] / 1e6 for k in ("", " kernel", " kernel reused")}
            print(f"  {name:8s} {op:12s} {r['']:7.1f} {r[' kernel']:7.1f} "
                  f"{r[' kernel reused']:7.1f}          {r[''] / r[' kernel']:6.3f}       "
                  f"{r[''] / r[' kernel reused']:6.3f}")


TARGET_US = 40      # issue 13: a 100-row table-level call at most 40 us above its kernel


def small_batch_section(repeats: int, sizes=(100, 10_000), before: str | None = None) -> None:
    """Table-level calls on small batches (the embedded case: a risk engine calling per
    book or per underlying): the fixed cost of a call above the kernels it runs.  With
    ``before`` (another checkout with its own .venv), both code versions in two child
    processes taking turns (``benchmarks.compare``)."""
    calls = 20   # per timing: one 100-row call is ~0.1 ms, too short to time alone
    rounds = max(repeats, 60)  # fewer rounds read 1.5-2x high while the CPU settles
    if before is not None:
        print("\n3b. Small batches: table-level call against discount factors + kernel, "
              "before and after")
        sides = [compare.Checkout("before", before), compare.Checkout("after", ROOT)]
        try:
            found = compare.small_section(sides, rounds, calls, sizes)
        finally:
            for side in sides:
                side.close()
        over = {k[:3]: v[-1][0] - v[-1][1] for k, v in found.items()
                if v[-1] is not None and k[3] == 1}
    else:
        print("\n3b. Small batches: table-level call against discount factors + kernel into "
              f"fresh outputs (microseconds per call, median of {rounds} rounds of {calls})")
        over = {}
        for n in sizes:
            snap, col = _cases.snapshot(n)
            for name, spec in _cases.models().items():
                t = _rounds(_cases.repeated(_cases.table_runs(spec, snap, col), calls), rounds)
                us = {k: v / calls * 1e6 for k, v in t.items()}
                print(f"  {name:8s} {n:>7,d} rows: " + "   ".join(
                    f"{op} {us[op]:7.1f} vs {us[op + ' kernel']:6.1f}" for op in
                    _cases.TABLE_OPS))
                over.update({(name, n, op): us[op] - us[op + " kernel"]
                             for op in _cases.TABLE_OPS})
    worst = max(v for (_, n, _), v in over.items() if n == min(sizes))
    print(f"  {min(sizes)}-row calls: at most {worst:.1f} us above the kernel (target "
          f"{TARGET_US} us: {'met' if worst <= TARGET_US else 'NOT met'})")


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
import json, re, sys, numpy as np
import volsweep
from volsweep.kernel import black, implied, greeks, registry
volsweep.warmup(which=None, sweep=False)
found = {}
loops = {}
for m in registry.MODEL_NAMES:   # the row loops behind each model's entry points
    for op, mod, key in (("price", black, "price"), ("iv", implied, "implied_vol")):
        own = sys.modules[registry.MODELS[m].kernels[key].__module__]   # a model's module
        loops[f"{m} {op}"] = (getattr(mod, f"_{m}_{op}_rows", None)
                              or getattr(own, f"_{op}_rows", None))
    loops[f"{m} greeks"] = greeks._kernel(m, greeks.greek_mask(None, m))[0]
for name, fn in loops.items():
    if fn is None:
        found[name] = None
        continue
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
        if f is None:
            print(f"  {name:15s} (no row loop of that name: not inspected)")
            continue
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
    ap.add_argument("--before", metavar="CHECKOUT", help="another checkout with its own "
                    ".venv: section 3b measures both code versions taking turns")
    ap.add_argument("--american-only", action="store_true",
                    help="only section 1c (American exercise)")
    ap.add_argument("--american-rows", type=int, default=20_000)
    args = ap.parse_args(argv)
    import volsweep

    if args.american_only:
        print(f"volsweep benchmark report, "
              f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
        american_section(args.rows, args.repeats, args.american_rows)
        print(f"   machine: {machine()}")
        return 0
    volsweep.warmup()
    print(f"volsweep benchmark report, {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    kernel_section(args.rows, args.repeats)
    models_section(args.rows, args.repeats)
    american_section(args.rows, args.repeats, args.american_rows)
    print(f"   machine: {machine()}")
    alternatives_section(args.rows, args.repeats)
    table_section(args.rows, args.repeats)
    small_batch_section(args.repeats, before=args.before)
    bench_risk.risk_section(min(args.rows, 1_000_000), max(3, args.repeats // 2))
    from benchmarks.bench_chains import chains_section
    chains_section(repeats=args.repeats)     # group operations against one implied-vol pass
    bench_smiles.report(repeats=args.repeats)
    latency_section()
    if args.asm:
        asm_section()
    if args.cold:
        cold_section()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
