"""The benchmark report behind `volsweep bench` / `make bench`: every benchmark, one run.

Prints contracts/s and ratios for pricing (against a memory floor and numpy/scipy),
implied vol (against pricing, a numpy Newton and scipy's brentq) and the Greeks (against
pricing), plus the table-level calls against the kernels.  Read the ratios, not the
absolute numbers: these machines are shared and noisy.
"""

import time

import numpy as np


def _table_level(rows: int, repeats: int = 5) -> None:
    import volsweep
    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(n_rows=rows, seed=5, bad_fraction=0.0)
    quotes = snap.drop_columns(["bid", "ask"])
    calls = {
        "price": lambda t: volsweep.price(t, columns={"vol": "true_vol"}),
        "implied_vol": lambda t: volsweep.implied_vol(t),
        "greeks (all)": lambda t: volsweep.greeks(t, columns={"vol": "true_vol"}),
        "sweep (iv + all Greeks)": lambda t: volsweep.sweep(t),
    }
    print(f"\nTable-level calls on a synthetic snapshot, {rows:,d} rows (median of {repeats})")
    base = None
    for name, fn in calls.items():
        fn(quotes.slice(0, 1000))  # compile / load the cache
        times = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            fn(quotes)
            times.append(time.perf_counter() - t0)
        rate = rows / float(np.median(times))
        base = base or rate
        print(f"  {name:<26s}{rate / 1e6:10.1f} M contracts/s   {rate / base:6.3f} x price")


def main(rows: int = 2_000_000) -> int:
    from benchmarks import bench_greeks, bench_implied, bench_price

    bench_price.main(["--rows", str(rows)])
    bench_implied.main(["--rows", str(rows)])
    bench_greeks.main(["--rows", str(rows)])
    _table_level(rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
