"""A history of daily snapshots, and a hive-partitioned Parquet writer for it.

The universe (tickers, smiles' shapes, listing tiers) is fixed by the seed; from one
date to the next the spots follow a lognormal random walk at each name's long-end ATM
vol, the vol levels a mean-reverting log walk, each name's skew (the SVI correlation
rho) a mean-reverting walk around its seeded value, and the rate curve a parallel walk of
a few basis points a day.  Each day's snapshot (listed expiries, quotes, bad rows) is then
made as by ``make_snapshot``; the first date of a history equals
``make_snapshot(rows_per_day, seed, bad_fraction, n_underlyings, as_of=dates[0],
hidden_carry=..., off_parity_fraction=...)``.  With ``hidden_carry=True`` every day's
prices come from forwards with hidden borrow and cash dividends (the ``true_forward``
column), and a few quotes are stale or outlying (``parity_flag``), as in
``make_snapshot``.
"""

import datetime as _dt
import os
from dataclasses import replace

import numpy as np

from .snapshot import CLOSE_TIME, _build, _snapshot_rng, write_snapshot
from .universe import make_universe

_WALK_TAG = 0x57414C4B   # rng stream tag: "WALK"


def _as_day(d):
    if isinstance(d, _dt.datetime):
        d = d.date()
    return np.datetime64(d, "D")


def make_history(dates, rows_per_day=100_000, seed=0, bad_fraction=0.01, n_underlyings=600,
                 *, hidden_carry=False, off_parity_fraction=0.02):
    """Yield ``(date, table)`` for each of ``dates`` (sorted, duplicates dropped).

    ``date`` is a ``datetime.date``; the table's ``as_of`` is that day's close.
    ``hidden_carry``, ``off_parity_fraction``: as for ``make_snapshot``.
    """
    days = np.unique(np.array([_as_day(d) for d in dates], dtype="datetime64[D]"))
    base = make_universe(n_underlyings, seed)
    walk = np.random.default_rng([int(seed), _WALK_TAG])
    spot = base.spot.copy()
    level = base.vol_level.copy()
    rho = base.rho.copy()
    shift = 0.0
    prev = None
    for day in days:
        if prev is not None:
            dt = int((day - prev).astype(np.int64)) / 365.0
            z = walk.standard_normal((4, base.n))
            spot = np.round(np.maximum(spot * np.exp(level * np.sqrt(dt) * z[0] - 0.5 * level ** 2 * dt), 0.5), 2)
            # log-vol: mean reversion to the seed's level over about half a year
            ln = np.log(level) + 2.0 * (np.log(base.vol_level) - np.log(level)) * dt + 0.8 * np.sqrt(dt) * z[1]
            level = np.clip(np.exp(ln), 0.08, 1.5)
            shift += 0.0006 * np.sqrt(dt * 365.0 / 7.0) * z[2, 0]
            # skew: reverts to the seed's rho over about three months, moves ~0.03 a day
            rho = np.clip(rho + 4.0 * (base.rho - rho) * dt + 0.6 * np.sqrt(dt) * z[3],
                          -0.9, 0.5)
        prev = day
        as_of = day.astype("datetime64[s]") + CLOSE_TIME
        uni = replace(base.with_state(spot, level, base.curve.shifted(shift)), rho=rho)
        table = _build(uni, int(rows_per_day), _snapshot_rng(seed, as_of), bad_fraction, as_of,
                       seed, hidden_carry=hidden_carry,
                       off_parity_fraction=off_parity_fraction)
        yield day.astype(_dt.date), table


def write_history(root, dates, rows_per_day=100_000, seed=0, bad_fraction=0.01,
                  n_underlyings=600, row_group_size=128 * 1024, *, hidden_carry=False,
                  off_parity_fraction=0.02):
    """Write ``root/date=YYYY-MM-DD/part-0.parquet`` for each date; return the paths.

    Read it back with ``pyarrow.dataset.dataset(root, partitioning="hive")``.
    """
    paths = []
    for day, table in make_history(dates, rows_per_day, seed, bad_fraction, n_underlyings,
                                   hidden_carry=hidden_carry,
                                   off_parity_fraction=off_parity_fraction):
        folder = os.path.join(os.fspath(root), f"date={day.isoformat()}")
        os.makedirs(folder, exist_ok=True)
        paths.append(write_snapshot(table, os.path.join(folder, "part-0.parquet"), row_group_size))
    return paths
