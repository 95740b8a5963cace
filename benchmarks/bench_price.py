"""Price kernel speed: ours (Black-76, BSM) beside numpy/scipy and a memory-bandwidth floor.

    .venv/bin/python -m pytest benchmarks/bench_price.py --benchmark-only   # pytest-benchmark
    .venv/bin/python -m benchmarks.bench_price [--rows N] [--repeats R]    # ratios at 2M rows

Implementations, all on the same arrays, for every model of the registry
(``volsweep.kernel.registry.MODELS``; its inputs in the registry's order):

* ``ours``   -- the model's price kernel (``model.kernels["price"]``, parallel loop)
* ``numpy``  -- the straightforward whole-array formula with scipy.special.ndtr (per model,
  in ``NUMPY_PRICE``; a model without one is skipped)
* ``floor``  -- a parallel loop that reads the same input columns and writes one float64
  column: what memory bandwidth alone allows (by number of input columns, ``FLOORS``).

Speed is reported as ratios measured in one run (the machines are shared and noisy).
"""

import argparse

import numba
import numpy as np
import pytest
from scipy.special import ndtr

from benchmarks._cases import FLOORS, make_data, model_inputs
from benchmarks._timing import median_times
from volsweep.kernel import registry

SIZES = (1_000, 100_000, 2_000_000)


def numpy_black76(F, K, T, D, vol, cp):
    theta = cp.astype(np.float64)
    s = vol * np.sqrt(T)
    d1 = np.log(F / K) / s + 0.5 * s
    d2 = d1 - s
    return D * theta * (F * ndtr(theta * d1) - K * ndtr(theta * d2))


def numpy_bsm(spot, K, T, D, q, vol, cp):
    return numpy_black76(spot * np.exp(-q * T) / D, K, T, D, vol, cp)


# the numpy references, per model name, in the kernels' calling convention (*inputs, vol, cp)
NUMPY_PRICE = {"black76": numpy_black76, "bsm": numpy_bsm}


def _runner(model, impl, d):
    """A no-argument callable doing one pass of ``impl`` over the batch ``d`` with the
    registry model named ``model``; None when the model has no such implementation."""
    m = registry.model(model)
    n = d["K"].shape[0]
    inputs = model_inputs(m, d)
    args = inputs + (d["vol"], d["cp"])
    price = np.empty(n)
    status = np.empty(n, dtype=np.int8)
    if impl == "ours":
        fn = m.kernels["price"]
        return lambda: fn(*args, price, status)
    fn = (FLOORS.get(len(inputs)) if impl == "floor" else NUMPY_PRICE.get(model))
    if fn is None:
        return None
    if impl == "floor":
        return lambda: fn(*args, price)
    return lambda: fn(*args)


# ---------------------------------------------------------------- pytest-benchmark

@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("impl", ["ours", "ours_1thread", "numpy", "floor"])
@pytest.mark.parametrize("model", registry.MODEL_NAMES)
def test_price(benchmark, model, impl, n):
    benchmark.group = f"{model} n={n}"
    threads = 1 if impl == "ours_1thread" else numba.config.NUMBA_NUM_THREADS
    run = _runner(model, "ours" if impl == "ours_1thread" else impl, make_data(n))
    if run is None:
        pytest.skip(f"no {impl} implementation for model {model}")
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
        for model in registry.MODEL_NAMES:
            numpy_run = _runner(model, "numpy", d)
            t_np = float("nan")
            if numpy_run is None:
                print(f"{model:8} {'numpy':6} (no numpy reference for this model: skipped)")
            else:
                numpy_run()
                t_np = median_times({"numpy": numpy_run}, args.repeats)["numpy"]
                print(f"{model:8} {'numpy':6} {1:>7} {t_np:>10.4f} {n / t_np / 1e6:>14.1f}")
            for th in thread_counts:
                numba.set_num_threads(th)
                runs = {impl: _runner(model, impl, d) for impl in ("ours", "floor")}
                runs = {k: v for k, v in runs.items() if v is not None}
                t = median_times(runs, args.repeats, warmup=True)
                for impl in runs:
                    print(f"{model:8} {impl:6} {th:>7} {t[impl]:>10.4f} "
                          f"{n / t[impl] / 1e6:>14.1f}")
                summary.append((model, th, t.get("floor", float("nan")) / t["ours"],
                                t_np / t["ours"]))
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
