"""Greeks kernel speed: all Greeks, a few, one, beside the price kernel and numpy/scipy.

    .venv/bin/python -m pytest benchmarks/bench_greeks.py --benchmark-only   # pytest-benchmark
    .venv/bin/python -m benchmarks.bench_greeks [--rows N] [--repeats R]    # ratios at 2M rows

Implementations, all on the same arrays (one pass each):

For every model of the registry (``volsweep.kernel.registry.MODELS``):

* ``price``  -- the model's price kernel: the yardstick
* ``all``    -- every Greek the model defines (``model.greeks``)
* ``few``    -- delta and vega only: Greeks not requested should cost nothing
* ``gamma``  -- one Greek that needs no normal CDF
* ``numpy``  -- the straightforward whole-array formulas for all Greeks (scipy ndtr; per
  model in ``NUMPY_GREEKS``, skipped for a model without one)
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
from benchmarks._cases import make_data, model_inputs  # the same batch as bench_price
from volsweep.kernel import greeks, registry
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


def numpy_greeks(U, K, T, D, q, vol, cp):
    """All Greeks by the textbook formulas, whole-array numpy + scipy.special.ndtr, on a
    spot with yield ``q``, or on a forward when ``q`` is None (cost of carry zero)."""
    spot = q is not None
    w = cp.astype(np.float64)
    r = -np.log(D) / T
    q = q if spot else r
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
         "rho": w * T * K * D * N2 if spot else -T * V,
         "vanna": -Dq * n1 * d2 / vol, "volga": vega * d1 * d2 / vol,
         "charm": -Dq * (-q * w * N1 + n1 * dd1),
         "veta": -vega * (-q - d1 * dd1 + 1 / (2 * T)),
         "speed": -gamma / U * (1 + d1 / s), "zomma": gamma * (d1 * d2 - 1) / vol,
         "color": -gamma * (-q - d1 * dd1 - 1 / (2 * T)),
         "ultima": -vega / vol ** 2 * (d1 * d2 * (1 - d1 * d2) + d1 ** 2 + d2 ** 2),
         "dual_delta": -w * D * N2, "dual_gamma": D * n2 / (K * s)}
    if spot:
        g["div_rho"] = -w * T * U * Dq * N1
    return g


# the numpy references, per model name, in the kernels' calling convention (*inputs, vol, cp)
NUMPY_GREEKS = {"bsm": numpy_greeks,
                "black76": lambda F, K, T, D, vol, cp: numpy_greeks(F, K, T, D, None, vol, cp)}


def _runner(model, impl, d):
    """A no-argument callable doing one pass of ``impl`` over the batch ``d`` with the
    registry model named ``model``; None when the model has no such implementation (no
    numpy reference, or not the Greeks that ``impl`` asks for)."""
    m = registry.model(model)
    n = d["K"].shape[0]
    args = model_inputs(m, d) + (d["vol"], d["cp"])
    status = np.empty(n, dtype=np.int8)
    if impl == "price":
        price = np.empty(n)
        fn = m.kernels["price"]
        return lambda: fn(*args, price, status)
    if impl == "numpy":
        fn = NUMPY_GREEKS.get(model)
        return None if fn is None else (lambda: fn(*args))
    which = {"all": None, "few": FEW, "gamma": ("gamma",), "store": None}[impl]
    if which is not None and not set(which) <= set(m.greeks):
        return None
    mask = greeks.greek_mask(which, model)
    out = np.empty((bin(mask).count("1"), n))
    if impl == "store":
        return lambda: store_rows(d["K"], d["T"], d["D"], d["vol"], d["cp"], out)
    fn = m.kernels["greeks"]
    return lambda: fn(*args, mask, out, status)


# ---------------------------------------------------------------- pytest-benchmark

@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("model", registry.MODEL_NAMES)
def test_greeks(benchmark, model, impl, n):
    benchmark.group = f"greeks {model} n={n}"
    run = _runner(model, impl, make_data(n))
    if run is None:
        pytest.skip(f"no {impl} implementation for model {model}")
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
        for model in registry.MODEL_NAMES:
            for th in thread_counts:
                numba.set_num_threads(th)
                impls = IMPLS if th == 1 else tuple(i for i in IMPLS if i != "numpy")
                runs = {impl: _runner(model, impl, d) for impl in impls}
                skipped = [impl for impl, fn in runs.items() if fn is None]
                if skipped:
                    print(f"{model:8} skipped (not defined for this model): "
                          f"{', '.join(skipped)}")
                runs = {k: v for k, v in runs.items() if v is not None}
                t = median_times(runs, args.repeats, warmup=True)
                for impl in runs:
                    print(f"{model:8} {impl:6} {th if impl != 'numpy' else 1:>7} "
                          f"{t[impl]:>10.4f} {n / t[impl] / 1e6:>14.1f} "
                          f"{t['price'] / t[impl]:>8.2f}")
                summary.append((model, th, t["price"] / t["all"],
                                t["price"] / t.get("few", float("nan"))))
    finally:
        numba.set_num_threads(before)
    print()
    for model, th, r_all, r_few in summary:
        verdict = "meets" if r_all >= 0.5 else "MISSES"
        print(f"{model:8} {th} thread(s): all Greeks at {r_all:.2f} x price throughput "
              f"({verdict} the 0.5 x target); delta+vega at {r_few:.2f} x")


if __name__ == "__main__":
    main()
