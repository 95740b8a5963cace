"""Implied-vol throughput and accuracy: our kernels vs their own price kernels, a vectorised
numpy Newton and a per-contract scipy root-finder, on the same contracts in one run.

Every model of the registry (``volsweep.kernel.registry.MODELS``) gets its implied-vol and
price kernels timed on the same contracts, expressed in its own inputs (premiums from its
own price kernel).  The reference implementations (numpy Newton, scipy brentq) and the
tolerance are Black-76's, on the forward: they run for the models in ``REFERENCE_MODELS``
and are skipped, saying so, for the others.

    .venv/bin/python benchmarks/bench_implied.py [--rows 2000000] [--repeat 5]

prints a table (contracts/s, ratio to our iv kernel, accuracy).  Under pytest the
``test_*`` functions are pytest-benchmark benchmarks (skipped unless ``--benchmark-only``
or ``--benchmark-enable`` is given; the default options skip them).

Accuracy is measured as relative error against the vol the premium was priced from, in
units of the tolerance of tests/test_implied.py (8 ulp max(1, (1 + e_F + e_K) / e_s)) plus
the price kernel's own bound carried to the vol; "within" is the share of rows <= 1.
"""

import argparse
import math
import time

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import ndtr

from benchmarks._cases import model_inputs
from volsweep.kernel import registry

EPS = 2.0 ** -52
SQRT2PI = math.sqrt(2.0 * math.pi)


# the models whose premiums the Black-76 references below invert (on the forward)
REFERENCE_MODELS = ("black76",)


def make_contracts(n, seed=11, model=REFERENCE_MODELS[0]):
    """Seeded synthetic contracts for the registry model ``model`` (the same forwards,
    strikes, expiries and vols for every model; spot and yield consistent with the
    forward), premiums from its own price kernel, valid rows only.  Keys: the registry's
    input names (``forward``, ``spot``, ``div_yield``), ``F`` (the forward), ``K``, ``T``,
    ``D``, ``vol``, ``cp``, ``premium``."""
    rng = np.random.default_rng(seed)
    F = np.exp(rng.uniform(np.log(5.0), np.log(500.0), n))
    T = np.exp(rng.uniform(np.log(2.0 / 365.0), np.log(3.0), n))
    vol = np.exp(rng.uniform(np.log(0.05), np.log(1.2), n))
    # strikes spread by +-3.5 standard deviations of the forward
    x = rng.uniform(-3.5, 3.5, n) * vol * np.sqrt(T)
    K = F * np.exp(-x)
    D = np.exp(-0.03 * T)
    cp = np.where(rng.random(n) < 0.5, 1, -1).astype(np.int8)
    q = rng.uniform(0.0, 0.04, n)
    c = dict(F=F, forward=F, spot=F * D / np.exp(-q * T), div_yield=q, K=K, T=T, D=D,
             vol=vol, cp=cp)
    price = np.empty(n)
    st = np.empty(n, dtype=np.int8)
    registry.model(model).kernels["price"](*model_inputs(registry.model(model), c), vol, cp,
                                          price, st)
    intrinsic = D * np.maximum(np.where(cp > 0, F - K, K - F), 0.0)
    good = (st == 0) & (price > intrinsic) & (price - intrinsic > 1e-300 * F)
    c["premium"] = price
    return {k: np.ascontiguousarray(v[good]) for k, v in c.items()}


def tolerance(c):
    """Per-row tolerance (relative) as in tests/test_implied.py, plus the price error."""
    s = c["vol"] * np.sqrt(c["T"])
    d1 = np.log(c["F"] / c["K"]) / s + s / 2
    th = c["cp"].astype(np.float64)
    V = c["premium"]
    eF = c["D"] * c["F"] * ndtr(th * d1) / V
    eK = c["D"] * c["K"] * ndtr(th * (d1 - s)) / V
    es = s * c["D"] * c["F"] * np.exp(-0.5 * d1 * d1) / SQRT2PI / V
    return 8 * EPS * (np.maximum(1.0, (1 + eF + eK) / es) + np.maximum(1.0, eF + eK + es) / es)


# ---------------------------------------------------------------- the implementations

def ours_iv(c, out=None, model=REFERENCE_MODELS[0]):
    m = registry.model(model)
    iv = np.empty_like(c["F"]) if out is None else out
    st = np.empty(c["F"].shape, dtype=np.int8)
    m.kernels["implied_vol"](c["premium"], *model_inputs(m, c), c["cp"], iv, st)
    return iv


def ours_price(c, model=REFERENCE_MODELS[0]):
    m = registry.model(model)
    p = np.empty_like(c["F"])
    st = np.empty(c["F"].shape, dtype=np.int8)
    m.kernels["price"](*model_inputs(m, c), c["vol"], c["cp"], p, st)
    return p


def numpy_newton(c, steps=8):
    """Vectorised Newton on the price from the Brenner-Subrahmanyam start
    sigma0 = sqrt(2 pi / T) C / (D F), with scipy.special.ndtr: the straightforward way."""
    F, K, T, D, th, P = c["F"], c["K"], c["T"], c["D"], c["cp"].astype(np.float64), c["premium"]
    sqT = np.sqrt(T)
    x = np.log(F / K)
    sig = np.sqrt(2 * np.pi / T) * P / (D * F)
    with np.errstate(all="ignore"):       # it diverges in the wings; that is measured
        for _ in range(steps):
            s = np.maximum(sig, 1e-8) * sqT
            d1 = x / s + s / 2
            d2 = d1 - s
            price = D * th * (F * ndtr(th * d1) - K * ndtr(th * d2))
            vega = D * F * np.exp(-0.5 * d1 * d1) / SQRT2PI * sqT
            sig = sig - (price - P) / vega
    return sig


def _price_one(sig, F, K, T, D, th):
    s = sig * math.sqrt(T)
    d1 = math.log(F / K) / s + s / 2
    d2 = d1 - s
    n = lambda z: 0.5 * math.erfc(-z / math.sqrt(2.0))  # noqa: E731
    return D * th * (F * n(th * d1) - K * n(th * d2))


def scipy_brentq(c, idx):
    """scipy.optimize.brentq per contract on [1e-6, 20] (xtol 1e-15)."""
    out = np.empty(idx.size)
    for j, i in enumerate(idx):
        args = (c["F"][i], c["K"][i], c["T"][i], c["D"][i], float(c["cp"][i]))
        P = c["premium"][i]
        try:
            out[j] = brentq(lambda v: _price_one(v, *args) - P, 1e-6, 20.0, xtol=1e-15,
                            rtol=4 * EPS, maxiter=200)
        except ValueError:
            out[j] = np.nan
    return out


# ---------------------------------------------------------------- measurement

def _median_time(fn, repeat):
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return float(np.median(ts))


def _accuracy(got, c, tol, idx=None):
    vol = c["vol"] if idx is None else c["vol"][idx]
    tol = tol if idx is None else tol[idx]
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.abs(got / vol - 1.0)
        ratio = np.where(np.isfinite(rel), rel / tol, np.inf)
    return float(np.nanmax(np.where(np.isfinite(rel), rel, np.inf))), float(ratio.max()), \
        float((ratio <= 1.0).mean())


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--brentq-rows", type=int, default=2000)
    a = ap.parse_args(argv)

    import numba
    rows = []
    print(f"{a.rows} contracts drawn, numba threads = {numba.get_num_threads()}, median of "
          f"{a.repeat} runs (numpy {max(1, a.repeat // 2)}, brentq 1); err/tol in units of "
          "Black-76's tolerance on the forward")
    print(f"{'implementation':32s} {'rows':>9s} {'contracts/s':>12s} {'iv/this':>8s} "
          f"{'max rel err':>11s} {'max err/tol':>11s} {'within tol':>10s}")
    for model in registry.MODEL_NAMES:
        c = make_contracts(a.rows, model=model)
        n = c["F"].size
        small = {k: v[:1000] for k, v in c.items()}
        ours_iv(small, model=model), ours_price(small, model=model)   # JIT warm-up
        tol = tolerance(c)
        t_iv = _median_time(lambda: ours_iv(c, model=model), a.repeat)
        t_px = _median_time(lambda: ours_price(c, model=model), a.repeat)
        r_iv = n / t_iv
        found = [(f"volsweep {model} implied_vol", r_iv, _accuracy(ours_iv(c, model=model),
                                                                   c, tol), n),
                 (f"volsweep {model} price", n / t_px, None, n)]
        if model in REFERENCE_MODELS:
            idx = np.random.default_rng(5).choice(n, size=min(a.brentq_rows, n),
                                                  replace=False)
            t_np = _median_time(lambda: numpy_newton(c), max(1, a.repeat // 2))
            t_bq = _median_time(lambda: scipy_brentq(c, idx), 1)
            found += [("numpy Newton x8 (B-S start)", n / t_np,
                       _accuracy(numpy_newton(c), c, tol), n),
                      ("scipy brentq per contract", idx.size / t_bq,
                       _accuracy(scipy_brentq(c, idx), c, tol, idx), idx.size)]
        for name, r, acc, m in found:
            extra = ("" if acc is None else f" {acc[0]:11.3g} {acc[1]:11.3g} {acc[2]:10.2%}")
            print(f"{name:32s} {m:9d} {r:12.4g} {r_iv / r:8.3g}{extra}")
        print(f"{model}: iv throughput / price throughput = {r_iv / found[1][1]:.3f} "
              "(target >= 1/3)" + ("" if model in REFERENCE_MODELS else
                                   "; no reference implementations for this model: skipped"))
        rows += found
    return rows


# ---------------------------------------------------------------- pytest-benchmark

_BENCH_ROWS = 200_000


def _bench_data(model=REFERENCE_MODELS[0]):
    cache = _bench_data.__dict__.setdefault("cache", {})
    if model not in cache:
        cache[model] = make_contracts(_BENCH_ROWS, model=model)
        ours_iv(cache[model], model=model), ours_price(cache[model], model=model)
    return cache[model]


@pytest.mark.parametrize("model", registry.MODEL_NAMES)
def test_bench_iv(benchmark, model):
    c = _bench_data(model)
    out = np.empty_like(c["F"])
    benchmark(ours_iv, c, out, model)


@pytest.mark.parametrize("model", registry.MODEL_NAMES)
def test_bench_price(benchmark, model):
    benchmark(ours_price, _bench_data(model), model)


def test_bench_numpy_newton(benchmark):
    benchmark(numpy_newton, _bench_data())


def test_bench_scipy_brentq(benchmark):
    c = _bench_data()
    benchmark.pedantic(scipy_brentq, args=(c, np.arange(200)), rounds=3)


if __name__ == "__main__":
    main()
