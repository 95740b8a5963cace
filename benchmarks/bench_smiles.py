"""Smile fits against one implied-vol pass on the same rows (issue 16: 9,600 slices x 100
quotes in at most 5x the time of one ``implied_vol`` pass; goal 2x).

    .venv/bin/python -m benchmarks.bench_smiles [--slices 9600] [--quotes 100] [--repeats 7]

The chain is synthetic (fictional underlyings ``QZ0001`` ...): per slice a raw SVI smile,
Black-76 premiums from a plain numpy/scipy pricer (not the kernel), ``quotes`` strikes
spread over +-3 standard deviations of log-moneyness, calls above the forward and puts
below.  Both calls are table-level (Arrow in, Arrow out): ``implied_vol`` on the premiums,
and ``fit_smiles`` on its output; they take turns round by round and the medians are
compared.  ``arbitrage_free=True`` is timed in the same rounds.
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import pyarrow as pa
from scipy.special import ndtr

from benchmarks._timing import median_times


def make_chain(n_slices: int = 9600, n_quotes: int = 100, seed: int = 11) -> pa.Table:
    """Premiums of ``n_slices`` raw SVI smiles of ``n_quotes`` strikes each, ordered by
    underlying, expiry and strike (as a chain usually arrives)."""
    rng = np.random.default_rng(seed)
    per_name = 16
    T = np.tile(np.geomspace(7 / 365, 3.0, per_name), n_slices // per_name + 1)[:n_slices]
    name = np.arange(n_slices) // per_name
    atm = rng.uniform(0.15, 0.6, n_slices)
    sd = atm * np.sqrt(T)
    b = rng.uniform(0.1, 0.4, n_slices) * sd
    rho = rng.uniform(-0.8, 0.0, n_slices)
    m = rng.uniform(-0.3, 0.3, n_slices) * sd
    sig = rng.uniform(0.3, 1.5, n_slices) * sd
    a = atm ** 2 * T - b * sig * np.sqrt(1 - rho ** 2)
    F = np.repeat(rng.uniform(20.0, 500.0, n_slices // per_name + 1), per_name)[:n_slices]
    x = np.linspace(-3.0, 3.0, n_quotes)[None, :] * sd[:, None]
    w = a[:, None] + b[:, None] * (rho[:, None] * (x - m[:, None])
                                   + np.sqrt((x - m[:, None]) ** 2 + sig[:, None] ** 2))
    K = F[:, None] * np.exp(x)
    call = x >= 0
    s = np.sqrt(w)
    d1 = -x / s + 0.5 * s
    sign = np.where(call, 1.0, -1.0)
    disc = np.exp(-0.03 * T)[:, None]
    prem = disc * sign * (F[:, None] * ndtr(sign * d1) - K * ndtr(sign * (d1 - s)))
    rep = np.repeat
    tick = pa.array([f"QZ{i:04d}" for i in range(name.max() + 1)])
    return pa.table({
        "underlying": pa.DictionaryArray.from_arrays(pa.array(rep(name, n_quotes), pa.int32()),
                                                     tick),
        "expiry_years": rep(T, n_quotes), "forward": rep(F, n_quotes),
        "discount": rep(disc.ravel(), n_quotes), "strike": K.ravel(),
        "is_call": call.ravel(), "premium": prem.ravel()})


def runs(chain: pa.Table) -> dict:
    import volsweep

    vols = volsweep.implied_vol(chain, model="black76")
    by = ("underlying", "expiry_years")
    return {
        "implied_vol": lambda: volsweep.implied_vol(chain, model="black76"),
        "fit_smiles": lambda: volsweep.fit_smiles(vols, model="black76", by=by),
        "fit_smiles arbitrage_free": lambda: volsweep.fit_smiles(
            vols, model="black76", by=by, arbitrage_free=True),
    }


def report(n_slices: int = 9600, n_quotes: int = 100, repeats: int = 7) -> dict:
    chain = make_chain(n_slices, n_quotes)
    t = median_times(runs(chain), repeats, warmup=True)
    load = os.getloadavg()
    print(f"\n3c. Smiles: {n_slices:,} slices x {n_quotes} quotes ({chain.num_rows:,} rows), "
          f"table-level, median of {repeats} rounds taking turns (load average "
          f"{load[0]:.2f} {load[1]:.2f} {load[2]:.2f})")
    base = t["implied_vol"]
    for k, v in t.items():
        print(f"  {k:28s} {v * 1e3:8.1f} ms   x{v / base:5.2f} of one implied_vol pass")
    return t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slices", type=int, default=9600)
    ap.add_argument("--quotes", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args(argv)
    report(args.slices, args.quotes, args.repeats)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
