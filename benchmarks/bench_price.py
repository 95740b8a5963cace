"""Price kernel speed: ours (Black-76, BSM) beside numpy/scipy and a memory-bandwidth floor.

    .venv/bin/python -m pytest benchmarks/bench_price.py --benchmark-only   # pytest-benchmark
    .venv/bin/python -m benchmarks.bench_price [--rows N] [--repeats R]    # ratios at 2M rows

Implementations, all on the same arrays:

* ``ours``   -- volsweep.kernel.black.black76_price / bsm_price (parallel loop)
* ``numpy``  -- the straightforward whole-array formula with scipy.special.ndtr
* ``floor``  -- a parallel loop that reads the same input columns and writes one float64
  column: what memory bandwidth alone allows.

Speed is reported as ratios measured in one run (the machines are shared and noisy).
"""

import argparse
import functools

import numba
import numpy as np
import pytest
from numba import prange
from scipy.special import ndtr

from benchmarks._timing import median_times
from volsweep.kernel import black
from volsweep.kernel._jit import loop

SIZES = (1_000, 100_000, 2_000_000)


@functools.lru_cache(maxsize=4)
def make_data(n, seed=7):
    """A listed-options-like batch: strikes around the forward, 1 day to 5 years."""
    rng = np.random.default_rng(seed)
    T = np.exp(rng.uniform(np.log(1 / 365), np.log(5.0), n))
    vol = rng.uniform(0.05, 0.8, n)
    spot = np.exp(rng.uniform(np.log(5.0), np.log(500.0), n))
    q = rng.uniform(0.0, 0.04, n)
    D = np.exp(-rng.uniform(0.0, 0.06, n) * T)
    F = spot * np.exp(-q * T) / D
    K = F * np.exp(rng.normal(0.0, 1.0, n) * vol * np.sqrt(T))
    cp = np.where(rng.random(n) < 0.5, 1, -1).astype(np.int8)
    return {"F": F, "spot": spot, "K": K, "T": T, "D": D, "q": q, "vol": vol, "cp": cp}


# ---------------------------------------------------------------- implementations

@loop
def floor_black76(F, K, T, D, vol, cp, out):
    for i in prange(F.shape[0]):
        out[i] = F[i] + K[i] + T[i] + D[i] + vol[i] + cp[i]


@loop
def floor_bsm(spot, K, T, D, q, vol, cp, out):
    for i in prange(spot.shape[0]):
        out[i] = spot[i] + K[i] + T[i] + D[i] + q[i] + vol[i] + cp[i]


def numpy_black76(F, K, T, D, vol, cp):
    theta = cp.astype(np.float64)
    s = vol * np.sqrt(T)
    d1 = np.log(F / K) / s + 0.5 * s
    d2 = d1 - s
    return D * theta * (F * ndtr(theta * d1) - K * ndtr(theta * d2))


def numpy_bsm(spot, K, T, D, q, vol, cp):
    return numpy_black76(spot * np.exp(-q * T) / D, K, T, D, vol, cp)


def _runner(model, impl, d):
    """A no-argument callable doing one pass of ``impl`` over the batch ``d``."""
    n = d["K"].shape[0]
    cols = (("F", "K", "T", "D", "vol", "cp") if model == "black76"
            else ("spot", "K", "T", "D", "q", "vol", "cp"))
    args = tuple(d[c] for c in cols)
    price = np.empty(n)
    status = np.empty(n, dtype=np.int8)
    if impl == "ours":
        if model == "black76":                    # shift 0: plain Black-76
            shift = np.zeros(n)
            return lambda: black.black76_price(*args[:4], shift, *args[4:], price, status)
        return lambda: black.bsm_price(*args, price, status)
    if impl == "floor":
        fn = floor_black76 if model == "black76" else floor_bsm
        return lambda: fn(*args, price)
    fn = numpy_black76 if model == "black76" else numpy_bsm
    return lambda: fn(*args)


# ---------------------------------------------------------------- pytest-benchmark

@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("impl", ["ours", "ours_1thread", "numpy", "floor"])
@pytest.mark.parametrize("model", ["black76", "bsm"])
def test_price(benchmark, model, impl, n):
    benchmark.group = f"{model} n={n}"
    threads = 1 if impl == "ours_1thread" else numba.config.NUMBA_NUM_THREADS
    run = _runner(model, "ours" if impl == "ours_1thread" else impl, make_data(n))
    before = numba.get_num_threads()
    numba.set_num_threads(threads)
    try:
        run()  # JIT warm-up (and cache load) outside the timing
        benchmark(run)
    finally:
        numba.set_num_threads(before)
    benchmark.extra_info["contracts_per_s"] = n / benchmark.stats.stats.median


# ---------------------------------------------------------------- script

def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args(argv)
    n = args.rows
    d = make_data(n)
    max_threads = numba.config.NUMBA_NUM_THREADS
    thread_counts = sorted({1, min(2, max_threads)})
    before = numba.get_num_threads()
    print(f"{n:,} rows, median of {args.repeats} runs after a JIT warm-up; "
          f"numba {numba.__version__}, NUMBA_NUM_THREADS={max_threads}")
    print(f"{'model':8} {'impl':6} {'threads':>7} {'median s':>10} {'M contracts/s':>14}")
    summary = []
    try:
        for model in ("black76", "bsm"):
            numpy_run = _runner(model, "numpy", d)
            numpy_run()
            t_np = median_times({"numpy": numpy_run}, args.repeats)["numpy"]
            print(f"{model:8} {'numpy':6} {1:>7} {t_np:>10.4f} {n / t_np / 1e6:>14.1f}")
            for th in thread_counts:
                numba.set_num_threads(th)
                runs = {impl: _runner(model, impl, d) for impl in ("ours", "floor")}
                for fn in runs.values():
                    fn()  # JIT warm-up
                t = median_times(runs, args.repeats)
                for impl in ("ours", "floor"):
                    print(f"{model:8} {impl:6} {th:>7} {t[impl]:>10.4f} "
                          f"{n / t[impl] / 1e6:>14.1f}")
                summary.append((model, th, t["floor"] / t["ours"], t_np / t["ours"]))
    finally:
        numba.set_num_threads(before)
    print(f"threading layer: {numba.threading_layer()}")
    print("\nratios of contracts/s (ours / floor: fraction of the memory-bandwidth bound; "
          "ours / numpy: speed-up over numpy+scipy)")
    print(f"{'model':8} {'threads':>7} {'ours/floor':>11} {'ours/numpy':>11}")
    for model, th, r_floor, r_np in summary:
        print(f"{model:8} {th:>7} {r_floor:>11.3f} {r_np:>11.2f}")
    return summary


if __name__ == "__main__":
    main()
