"""Greeks kernel speed: all Greeks, a few, one, beside the price kernel and numpy/scipy.

    .venv/bin/python -m pytest benchmarks/bench_greeks.py --benchmark-only   # pytest-benchmark
    .venv/bin/python -m benchmarks.bench_greeks [--rows N] [--repeats R]    # ratios at 2M rows

Implementations, all on the same arrays (one pass each):

* ``price``  -- volsweep.kernel.black.black76_price / bsm_price: the yardstick
* ``all``    -- every Greek of the model (15 for Black-76, 16 for BSM)
* ``few``    -- delta and vega only: Greeks not requested should cost nothing
* ``gamma``  -- one Greek that needs no normal CDF
* ``numpy``  -- the straightforward whole-array formulas for all Greeks (scipy ndtr)
* ``store``  -- a loop that only reads the inputs and writes as many float64 rows as
  ``all``: what the memory traffic of the outputs alone costs

Target: ``all`` at >= 0.5 x the price kernel's throughput.  Speed is reported as ratios
measured in one run, the implementations taking turns (these machines are shared and
noisy).
"""

import argparse

import numba
import numpy as np
import pytest
from numba import prange
from scipy.special import ndtr

from benchmarks._timing import median_times
from benchmarks.bench_price import make_data  # the same listed-options-like batch
from volsweep.kernel import black, greeks
from volsweep.kernel._jit import loop

SIZES = (100_000, 2_000_000)
FEW = ("delta", "vega")
IMPLS = ("price", "all", "few", "gamma", "store", "numpy")


# ---------------------------------------------------------------- implementations

@loop
def store_rows(K, T, D, vol, cp, out):
    for i in prange(K.shape[0]):
        v = K[i] + T[i] + D[i] + vol[i] + cp[i]
        for j in range(out.shape[0]):
            out[j, i] = v


def numpy_greeks(model, U, K, T, D, q, vol, cp):
    """All Greeks by the textbook formulas, whole-array numpy + scipy.special.ndtr."""
    w = cp.astype(np.float64)
    r = -np.log(D) / T
    q = q if model == "bsm" else r
    b = r - q
    Dq = np.exp(-q * T)
    sT = np.sqrt(T)
    s = vol * sT
    d1 = (np.log(U / K) + (b + 0.5 * vol * vol) * T) / s
    d2 = d1 - s
    n1 = np.exp(-0.5 * d1 * d1) / np.sqrt(2 * np.pi)
    n2 = np.exp(-0.5 * d2 * d2) / np.sqrt(2 * np.pi)
    N1, N2 = ndtr(w * d1), ndtr(w * d2)
    V = w * (U * Dq * N1 - K * D * N2)
    delta = w * Dq * N1
    gamma = Dq * n1 / (U * s)
    vega = U * Dq * n1 * sT
    dd1 = b / s - d2 / (2 * T)
    g = {"delta": delta, "gamma": gamma, "vega": vega,
         "theta": -U * Dq * n1 * vol / (2 * sT) + w * q * U * Dq * N1 - w * r * K * D * N2,
         "rho": w * T * K * D * N2 if model == "bsm" else -T * V,
         "vanna": -Dq * n1 * d2 / vol, "volga": vega * d1 * d2 / vol,
         "charm": -Dq * (-q * w * N1 + n1 * dd1),
         "veta": -vega * (-q - d1 * dd1 + 1 / (2 * T)),
         "speed": -gamma / U * (1 + d1 / s), "zomma": gamma * (d1 * d2 - 1) / vol,
         "color": -gamma * (-q - d1 * dd1 - 1 / (2 * T)),
         "ultima": -vega / vol ** 2 * (d1 * d2 * (1 - d1 * d2) + d1 ** 2 + d2 ** 2),
         "dual_delta": -w * D * N2, "dual_gamma": D * n2 / (K * s)}
    if model == "bsm":
        g["div_rho"] = -w * T * U * Dq * N1
    return g


def _runner(model, impl, d):
    """A no-argument callable doing one pass of ``impl`` over the batch ``d``."""
    n = d["K"].shape[0]
    U = d["F"] if model == "black76" else d["spot"]
    cols = ((U, d["K"], d["T"], d["D"], np.zeros(n), d["vol"], d["cp"]) if model == "black76"
            else (U, d["K"], d["T"], d["D"], d["q"], d["vol"], d["cp"]))
    status = np.empty(n, dtype=np.int8)
    if impl == "price":
        price = np.empty(n)
        fn = black.black76_price if model == "black76" else black.bsm_price
        return lambda: fn(*cols, price, status)
    if impl == "numpy":
        return lambda: numpy_greeks(model, U, d["K"], d["T"], d["D"], d["q"], d["vol"],
                                    d["cp"])
    which = {"all": None, "few": FEW, "gamma": ("gamma",), "store": None}[impl]
    mask = greeks.greek_mask(which, model)
    out = np.empty((bin(mask).count("1"), n))
    if impl == "store":
        return lambda: store_rows(d["K"], d["T"], d["D"], d["vol"], d["cp"], out)
    fn = greeks.black76_greeks if model == "black76" else greeks.bsm_greeks
    return lambda: fn(*cols, mask, out, status)


# ---------------------------------------------------------------- pytest-benchmark

@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("model", ["black76", "bsm"])
def test_greeks(benchmark, model, impl, n):
    benchmark.group = f"greeks {model} n={n}"
    run = _runner(model, impl, make_data(n))
    run()  # JIT warm-up (and cache load) outside the timing
    benchmark(run)
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
    print(f"{'model':8} {'impl':6} {'threads':>7} {'median s':>10} {'M contracts/s':>14} "
          f"{'x price':>8}")
    summary = []
    try:
        for model in ("black76", "bsm"):
            for th in thread_counts:
                numba.set_num_threads(th)
                impls = IMPLS if th == 1 else tuple(i for i in IMPLS if i != "numpy")
                runs = {impl: _runner(model, impl, d) for impl in impls}
                for fn in runs.values():
                    fn()  # JIT warm-up
                t = median_times(runs, args.repeats)
                for impl in impls:
                    print(f"{model:8} {impl:6} {th if impl != 'numpy' else 1:>7} "
                          f"{t[impl]:>10.4f} {n / t[impl] / 1e6:>14.1f} "
                          f"{t['price'] / t[impl]:>8.2f}")
                summary.append((model, th, t["price"] / t["all"], t["price"] / t["few"]))
    finally:
        numba.set_num_threads(before)
    print()
    for model, th, r_all, r_few in summary:
        verdict = "meets" if r_all >= 0.5 else "MISSES"
        print(f"{model:8} {th} thread(s): all Greeks at {r_all:.2f} x price throughput "
              f"({verdict} the 0.5 x target); delta+vega at {r_few:.2f} x")


if __name__ == "__main__":
    main()
