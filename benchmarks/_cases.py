"""Benchmark cases derived from the model registry, shared by the report (one process) and
the before/after comparison (``benchmarks.compare``: one child process per checkout).

``models()`` lists the models of the checkout being measured with their kernels: from
``volsweep.kernel.registry`` or, for a checkout from before the registry existed, from its
bindings' model list and the kernels' naming convention of that time (so the same cases
run on both sides of a comparison).  Nothing here names a model.
"""

from __future__ import annotations

import functools
from types import SimpleNamespace

import numpy as np
from numba import prange

from volsweep.kernel._jit import loop


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
    # the registry's input names ("forward", "div_yield") beside the short ones
    return {"F": F, "forward": F, "spot": spot, "K": K, "T": T, "D": D, "q": q,
            "div_yield": q, "vol": vol, "cp": cp}


def model_inputs(model, d):
    """The kernel inputs ``(U, K, T, D, *extras)`` of a registry ``model`` from a batch
    ``d`` of ``make_data``: the underlying and extras by their registry names, an extra the
    batch lacks at its registry default."""
    n = d["K"].shape[0]
    return (d[model.underlying], d["K"], d["T"], d["D"]) + tuple(
        d[x.name] if x.name in d else np.full(n, x.default) for x in model.extras)


def defaulted(model, d) -> list:
    """The names of ``model``'s extra inputs that ``d`` lacks (run at their defaults)."""
    return [x.name for x in model.extras if x.name not in d]


# ---------------------------------------------------------------- implementations

# Floors by the number of kernel inputs before the vol (U, K, T, D, *extras): a model with
# another number of inputs has none (the report says so).
@loop
def floor_4(U, K, T, D, vol, cp, out):
    for i in prange(U.shape[0]):
        out[i] = U[i] + K[i] + T[i] + D[i] + vol[i] + cp[i]


@loop
def floor_5(U, K, T, D, x, vol, cp, out):
    for i in prange(U.shape[0]):
        out[i] = U[i] + K[i] + T[i] + D[i] + x[i] + vol[i] + cp[i]


FLOORS = {4: floor_4, 5: floor_5}


def models() -> dict:
    """{name: spec}; a spec has ``name``, ``underlying``, ``extras`` (with ``name`` and
    ``default``), ``greeks`` or None, and ``kernels`` {operation: entry point}."""
    try:
        from volsweep.kernel import registry
    except ImportError:
        return _models_before_registry()
    return {name: SimpleNamespace(name=name, underlying=m.underlying, extras=m.extras,
                                  greeks=m.greeks, kernels=dict(m.kernels))
            for name, m in registry.MODELS.items()}


def _models_before_registry() -> dict:
    """The layout up to 7e7d8a5: ``volsweep._columns.MODELS`` and ``UNDERLYING``, entry points
    ``<model>_price`` / ``_iv`` / ``_greeks`` / ``_sweep``, a spot model taking a dividend
    yield after the discount factors."""
    from volsweep import _columns
    from volsweep.kernel import black, greeks, implied, sweep

    where = {"price": (black, "price"), "implied_vol": (implied, "iv"),
             "greeks": (greeks, "greeks"), "sweep": (sweep, "sweep")}
    found = {}
    for name in _columns.MODELS:
        underlying = _columns.UNDERLYING[name]
        extras = ((SimpleNamespace(name="div_yield", default=0.0),) if underlying == "spot"
                  else ())
        found[name] = SimpleNamespace(
            name=name, underlying=underlying, extras=extras, greeks=None,
            kernels={op: getattr(mod, f"{name}_{suffix}") for op, (mod, suffix) in
                     where.items()})
    return found


def all_greeks(spec) -> int:
    """The mask of every Greek the model defines."""
    from volsweep.kernel import greeks

    return greeks.greek_mask(None, spec.name)


# ---------------------------------------------------------------- kernels, large batches

def kernel_runs(spec, d) -> dict:
    """One pass each over the batch ``d`` (``make_data``): the memory floor
    (when there is one for the model's number of inputs), price, implied vol, all Greeks,
    the fused sweep; and bid/ask quotes (bid, ask = premium -/+ 2%) both the old way (the
    mid, three implied-vol passes over bid, ask and mid, a Greeks pass for vega) and in
    the one-pass kernel (``bid_ask``, when the checkout has it), vega only in both."""
    from volsweep.kernel import greeks

    n = d["K"].shape[0]
    k = spec.kernels
    inputs = model_inputs(spec, d)
    vol, cp = d["vol"], d["cp"]
    m = all_greeks(spec)
    vega = greeks.greek_mask(("vega",), spec.name)
    p, st, iv = np.empty(n), np.empty(n, np.int8), np.empty(n)
    out = np.empty((bin(m).count("1"), n))
    k["price"](*inputs, vol, cp, p, st)
    prem = p.copy()
    bid, ask = 0.98 * prem, 1.02 * prem
    iv_b, iv_a, unc, g_vega = np.empty(n), np.empty(n), np.empty(n), np.empty((1, n))
    st_b, st_a = np.empty(n, np.int8), np.empty(n, np.int8)

    def old_bid_ask():
        mid = 0.5 * (bid + ask)
        k["implied_vol"](bid, *inputs, cp, iv_b, st_b)
        k["implied_vol"](ask, *inputs, cp, iv_a, st_a)
        k["implied_vol"](mid, *inputs, cp, iv, st)
        k["greeks"](*inputs, iv, cp, vega, g_vega, st)

    runs = {}
    floor = FLOORS.get(len(inputs))
    if floor is not None:
        fl_out = np.empty(n)
        runs["floor"] = lambda: floor(*inputs, vol, cp, fl_out)
    runs.update({
        "price": lambda: k["price"](*inputs, vol, cp, p, st),
        "iv": lambda: k["implied_vol"](prem, *inputs, cp, iv, st),
        "greeks": lambda: k["greeks"](*inputs, vol, cp, m, out, st),
        "sweep": lambda: k["sweep"](prem, *inputs, cp, m, iv, out, st),
        "bid/ask 3+1": old_bid_ask,
    })
    if "bid_ask" in k:
        runs["bid/ask"] = lambda: k["bid_ask"](bid, ask, *inputs, cp, vega, iv_b, iv_a, iv,
                                               unc, g_vega, st_b, st_a, st)
    return runs


# ---------------------------------------------------------------- table-level calls

def snapshot(n: int, quote: str = "premium"):
    """A one-chunk synthetic snapshot of n rows (no bad rows; ``quote`` "premium" or
    "bid_ask": the quote columns kept) and the columns a kernel-level caller would hold,
    keyed as ``model_inputs`` reads them (``K``, ``T``, the registry's input names) plus
    ``rate``, ``vol``, ``premium``, ``cp``."""
    import pyarrow as pa

    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(n_rows=n, seed=5, bad_fraction=0.0)
    snap = snap.drop_columns(["bid", "ask"] if quote == "premium" else ["premium"])
    snap = pa.Table.from_batches(snap.combine_chunks().to_batches())
    col = {k: snap.column(k).to_numpy() for k in
           ("spot", "forward", "div_yield", "rate", quote.split("_")[0])}
    col.update(K=snap.column("strike").to_numpy(), T=snap.column("expiry_years").to_numpy(),
               vol=snap.column("true_vol").to_numpy())
    col["cp"] = np.where(snap.column("is_call").to_numpy(zero_copy_only=False), 1,
                         -1).astype(np.int8)
    return snap, col


TABLE_OPS = ("price", "implied_vol", "sweep")


def table_runs(spec, snap, col, ops=TABLE_OPS, fresh=True) -> dict:
    """For each operation in ``ops``: the table-level call on ``snap`` (key ``op``) and what
    a kernel-level caller holding the same columns does (key ``op + " kernel"``): the
    discount factors from the rates, then the kernel, into fresh outputs when ``fresh``
    (as a table-level call must), else into outputs reused from call to call.  Sweeps
    and Greeks compute every Greek the model defines, as the table-level calls do by
    default."""
    import volsweep
    from volsweep.kernel import black

    name, k = spec.name, spec.kernels
    n = snap.num_rows
    T, cp, prem, vol = col["T"], col["cp"], col.get("premium"), col["vol"]
    U, K, _, _, *extras = model_inputs(spec, dict(col, D=None))
    m = all_greeks(spec)
    ng = bin(m).count("1")
    keep = (np.empty(n), np.empty(n), np.empty((ng, n)), np.empty(n, np.int8))

    def outs():
        return ((np.empty(n), np.empty(n), np.empty((ng, n)), np.empty(n, np.int8)) if fresh
                else keep)

    def D():
        return black.discount_factors(col["rate"], T, np.empty(n) if fresh else keep[1])

    def price_k():
        p, _, _, st = outs()
        k["price"](U, K, T, D(), *extras, vol, cp, p, st)

    def iv_k():
        iv, _, _, st = outs()
        k["implied_vol"](prem, U, K, T, D(), *extras, cp, iv, st)

    def greeks_k():
        _, _, g, st = outs()
        k["greeks"](U, K, T, D(), *extras, vol, cp, m, g, st)

    def sweep_k():
        iv, _, g, st = outs()
        k["sweep"](prem, U, K, T, D(), *extras, cp, m, iv, g, st)

    table = {"price": lambda: volsweep.price(snap, model=name, columns={"vol": "true_vol"}),
             "implied_vol": lambda: volsweep.implied_vol(snap, model=name),
             "greeks": lambda: volsweep.greeks(snap, model=name, columns={"vol": "true_vol"}),
             "sweep": lambda: volsweep.sweep(snap, model=name)}
    kernel = {"price": price_k, "implied_vol": iv_k, "greeks": greeks_k, "sweep": sweep_k}
    runs = {}
    for op in ops:
        runs[op] = table[op]
        runs[op + " kernel"] = kernel[op]
    return runs


def repeated(runs: dict, calls: int) -> dict:
    """Each run made ``calls`` times in a row (one timing: a 100-row call is too short to
    time alone)."""
    return {key: (lambda f=f: [f() for _ in range(calls)]) for key, f in runs.items()}


# ---------------------------------------------------------------- American exercise

def american_runs(n_euro, n_amer):
    """Runs taking turns for the American section of the report: the European price of
    every model with an American entry (``n_euro`` rows of ``make_data``) and, on the first
    ``n_amer`` rows, its American price at the accurate and the fast setting and the
    American implied vol of the accurate prices.  Returns (runs, rows per run)."""
    from volsweep.kernel import registry

    d = make_data(n_euro)
    runs, rows = {}, {}
    for name, am in registry.AMERICAN.items():
        eu = registry.MODELS[name]
        cols = model_inputs(eu, d)
        p, st = np.empty(n_euro), np.empty(n_euro, np.int8)
        runs[f"{name} european price"] = (lambda k=eu.kernels["price"], c=cols, p=p, st=st:
                                          k(*c, d["vol"], d["cp"], p, st))
        rows[f"{name} european price"] = n_euro
        sub = {k: v[:n_amer] for k, v in d.items()}
        sub["exercise"] = np.ones(n_amer)
        acols = model_inputs(am, sub)
        ap, ast, aiv = np.empty(n_amer), np.empty(n_amer, np.int8), np.empty(n_amer)
        am.kernels["price"](*acols, sub["vol"], sub["cp"], ap, ast)
        prem = ap.copy()
        for setting in ("accurate", "fast"):
            runs[f"{name} american price {setting}"] = (
                lambda k=am.kernels["price"], c=acols, s=setting, p=ap, st=ast:
                k(*c, sub["vol"], sub["cp"], p, st, setting=s))
            rows[f"{name} american price {setting}"] = n_amer
        runs[f"{name} american iv"] = (lambda k=am.kernels["implied_vol"], c=acols, q=prem,
                                       iv=aiv, st=ast: k(q, *c, sub["cp"], iv, st))
        rows[f"{name} american iv"] = n_amer
    return runs, rows
