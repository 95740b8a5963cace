"""Chain operations against one implied-vol pass on the same rows.

    .venv/bin/python -m benchmarks.bench_chains [--underlyings 600] [--expiries 16]
        [--strikes 100] [--repeats 7]

A universe of fictional underlyings (600 x 16 expiries x 100 strikes x call and put =
1.92M rows by default), each expiry's chain priced by Black-76 (scipy) at a known
forward and discount and quoted bid/ask on a 0.01 tick.  Timed in one run, every
implementation taking turns round by round, medians of the rounds (see
``_timing.median_times``): ``volsweep.implied_vol(model="black76")`` from the premium
(the yardstick; from bid/ask too, for scale: one pass inverting bid, ask and mid),
``volsweep.implied_forwards`` from bid/ask and from the premium, on the
rows as listed (grouped already: no sort) and shuffled (one sort of the group keys), and
``volsweep.model_free_variance``.  Prints each time and its ratio to the implied-vol pass.
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import pyarrow as pa
from scipy.special import ndtr

from benchmarks._timing import median_times


def make_universe(n_under=600, n_exp=16, n_strikes=100, seed=5) -> pa.Table:
    """Rows ordered by underlying, expiry, strike, call before put."""
    rng = np.random.default_rng(seed)
    tickers = [f"Z{i:04d}X" for i in range(n_under)]        # fictional codes
    spot = np.exp(rng.normal(np.log(80.0), 0.8, n_under))
    carry = rng.uniform(-0.02, 0.05, n_under)
    t = np.array(sorted(rng.choice(np.arange(7, 1100), n_exp, replace=False))) / 365.0
    u = np.repeat(np.arange(n_under), n_exp * n_strikes * 2)
    e = np.tile(np.repeat(np.arange(n_exp), n_strikes * 2), n_under)
    j = np.tile(np.repeat(np.arange(n_strikes), 2), n_under * n_exp)
    call = np.tile(np.array([True, False]), n_under * n_exp * n_strikes)
    T = t[e]
    F = spot[u] * np.exp(carry[u] * T)
    D = np.exp(-0.03 * T)
    vol = 0.25 + 0.1 * rng.random(n_under)[u]
    sd = vol * np.sqrt(T)
    K = np.round(F * np.exp((j / (n_strikes - 1) - 0.5) * 6.0 * sd), 2)
    d1 = np.log(F / K) / sd + 0.5 * sd
    w = np.where(call, 1.0, -1.0)
    price = D * w * (F * ndtr(w * d1) - K * ndtr(w * (d1 - sd)))
    half = np.maximum(0.01, 0.02 * price)
    bid = np.maximum(np.floor((price - half) * 100.0) / 100.0, 0.0)
    ask = np.ceil((price + half) * 100.0) / 100.0
    as_of = np.datetime64("2031-03-14T20:00:00", "ms").astype(np.int64)
    expiry = as_of + np.rint(T * 365 * 86400).astype(np.int64) * 1000
    return pa.table({
        "underlying": pa.DictionaryArray.from_arrays(pa.array(u.astype(np.int32)),
                                                     pa.array(tickers)),
        "expiry": pa.array(expiry, pa.timestamp("ms", tz="UTC")),
        "expiry_years": T, "forward": F, "discount": D, "strike": K, "is_call": call,
        "premium": price, "bid": bid, "ask": ask,
    })


def runs(table: pa.Table, seed=1) -> dict:
    import volsweep

    shuffled = table.take(pa.array(np.random.default_rng(seed).permutation(table.num_rows)))
    chain = table.drop_columns(["forward", "discount"])
    chain_premium = chain.drop_columns(["bid", "ask"])
    chain_shuffled = shuffled.drop_columns(["forward", "discount"])
    iv_input = table.drop_columns(["bid", "ask"])
    iv_quotes = table.drop_columns(["premium"])
    return {
        "implied_vol black76 (premium)":
            lambda: volsweep.implied_vol(iv_input, model="black76"),
        "implied_vol black76 (bid/ask)":
            lambda: volsweep.implied_vol(iv_quotes, model="black76"),
        "implied_forwards bid/ask": lambda: volsweep.implied_forwards(chain),
        "implied_forwards premium": lambda: volsweep.implied_forwards(chain_premium),
        "implied_forwards bid/ask, shuffled": lambda: volsweep.implied_forwards(chain_shuffled),
        "implied_forwards bid/ask, attach": lambda: volsweep.implied_forwards(chain,
                                                                              attach=True),
        "model_free_variance bid/ask": lambda: volsweep.model_free_variance(chain),
    }


def chains_section(n_under=600, n_exp=16, n_strikes=100, repeats=7) -> dict:
    import numba

    table = make_universe(n_under, n_exp, n_strikes)
    times = median_times(runs(table), repeats, warmup=True)
    base = times["implied_vol black76 (premium)"]
    load = os.getloadavg()
    print(f"\nChains: {table.num_rows:,} rows ({n_under} underlyings x {n_exp} expiries x "
          f"{n_strikes} strikes x call/put), {numba.get_num_threads()} threads, median of "
          f"{repeats} rounds, load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")
    for name, t in times.items():
        print(f"  {name:40} {t * 1e3:8.1f} ms   {t / base:5.2f} x implied_vol")
    return times


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--underlyings", type=int, default=600)
    ap.add_argument("--expiries", type=int, default=16)
    ap.add_argument("--strikes", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--threads", type=int, default=None,
                    help="numba threads (default: numba's)")
    args = ap.parse_args(argv)
    import numba

    import volsweep

    if args.threads:
        numba.set_num_threads(args.threads)
    volsweep.warmup(models="black76", which=[], sweep=False, bid_ask=False)
    chains_section(args.underlyings, args.expiries, args.strikes, args.repeats)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
