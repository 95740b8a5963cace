"""One synthetic end-of-day snapshot of the whole listed universe, as an Arrow table."""

import datetime as _dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import carry, svi
from ._bsm import black_price, forward_price
from .quotes import FLAGS, _largest_remainder, inject_bad, make_quotes
from .universe import (K_LOG_HI, K_LOG_LO, STRIKE_SDS, VENUE, VENUE_CODE, atm_vol,
                       listed_expiries, make_universe, smile_params)

DEFAULT_AS_OF = np.datetime64("2031-03-14T20:00:00", "s")
CLOSE_TIME = np.timedelta64(20 * 3600, "s")   # the venue's close, 20:00 UTC
_SNAP_TAG = 0x534E4150                         # rng stream tag: "SNAP"

# Base strike step by spot level, one notch finer within a month and one coarser beyond
# nine months (listing practice in the trade: finer steps on cheap names and near-term
# expiries, wider on expensive names and long-dated ones).
_STEP_BREAKS = np.array([5.0, 25.0, 100.0, 250.0, 1000.0])
_STEPS = np.array([0.5, 1.0, 2.5, 5.0, 10.0, 25.0, 50.0])

SCHEMA = pa.schema([
    ("underlying", pa.dictionary(pa.int32(), pa.string())),
    ("as_of", pa.timestamp("ms", tz="UTC")),     # ms: Parquet has no seconds unit
    ("expiry", pa.timestamp("ms", tz="UTC")),
    ("expiry_years", pa.float64()),
    ("spot", pa.float64()),
    ("forward", pa.float64()),
    ("div_yield", pa.float64()),
    ("rate", pa.float64()),
    ("strike", pa.float64()),
    ("is_call", pa.bool_()),
    ("true_vol", pa.float64()),
    ("model_price", pa.float64()),
    ("premium", pa.float64()),
    ("bid", pa.float64()),
    ("ask", pa.float64()),
    ("quote_flag", pa.dictionary(pa.int8(), pa.string())),
])

# make_snapshot(hidden_carry=True): the forward the prices were made from, and the labels
# of the stale and outlying quotes (data_gen.carry)
CHAIN_SCHEMA = SCHEMA.append(pa.field("true_forward", pa.float64())).append(
    pa.field("parity_flag", pa.dictionary(pa.int8(), pa.string())))


def parse_as_of(as_of):
    """datetime64[s] (UTC) from None, a str, a date, a datetime or a numpy datetime64.

    A bare date means that day's close (20:00 UTC); an aware datetime is converted to UTC.
    """
    if as_of is None:
        return DEFAULT_AS_OF
    if isinstance(as_of, _dt.datetime):
        if as_of.tzinfo is not None:
            as_of = as_of.astimezone(_dt.timezone.utc).replace(tzinfo=None)
        return np.datetime64(as_of, "s")
    if isinstance(as_of, _dt.date):
        return np.datetime64(as_of, "D") + CLOSE_TIME
    v = np.datetime64(as_of)
    if np.datetime_data(v.dtype)[0] in ("Y", "M", "W", "D"):
        return v.astype("datetime64[D]") + CLOSE_TIME
    return v.astype("datetime64[s]")


def _nice_floor(x):
    """Largest number of the form {1, 2, 2.5, 5} * 10^e not above x (x > 0)."""
    e = np.floor(np.log10(x))
    mant = x / 10.0 ** e
    nice = np.select([mant >= 5.0 - 1e-9, mant >= 2.5 - 1e-9, mant >= 2.0 - 1e-9], [5.0, 2.5, 2.0], 1.0)
    return np.round(nice * 10.0 ** e, 12)


def _grid_span(k_lo, k_hi, step):
    """First and last multiples of ``step`` inside [k_lo, k_hi] (first >= 1, strikes > 0)."""
    return np.maximum(np.ceil(k_lo / step - 1e-9), 1.0), np.floor(k_hi / step + 1e-9)


def make_snapshot(n_rows=1_000_000, seed=0, bad_fraction=0.01, n_underlyings=600, as_of=None,
                  *, hidden_carry=False, off_parity_fraction=0.02):
    """A seeded synthetic snapshot of the fictional venue, ``n_rows`` rows exactly.

    Deterministic in (n_rows, seed, bad_fraction, n_underlyings, as_of) and the two
    options.  Rows are ordered by underlying, expiry, strike, then call before put.  See
    the package docstring for the columns.  ``hidden_carry=True``: the prices come from a
    forward with borrow costs and cash dividends that the visible columns do not show,
    and ``off_parity_fraction`` of the clean rows are stale or outlying quotes (see
    ``data_gen.carry``); two more columns, ``true_forward`` and ``parity_flag``
    (``CHAIN_SCHEMA``).
    """
    if n_rows < 0:
        raise ValueError("n_rows must be >= 0")
    as_of = parse_as_of(as_of)
    universe = make_universe(n_underlyings, seed)
    return _build(universe, int(n_rows), _snapshot_rng(seed, as_of), bad_fraction, as_of, seed,
                  hidden_carry=hidden_carry, off_parity_fraction=off_parity_fraction)


def _snapshot_rng(seed, as_of):
    day = int(as_of.astype("datetime64[D]").astype(np.int64))
    return np.random.default_rng([int(seed), _SNAP_TAG, day])


def _build(uni, n_rows, rng, bad_fraction, as_of, seed, hidden_carry=False,
           off_parity_fraction=0.0):
    as_of_day = as_of.astype("datetime64[D]")
    days, tier_max, is_long = listed_expiries(as_of_day)
    dte = (days - as_of_day).astype(np.int64)
    listed = (uni.tier[:, None] <= tier_max[None, :]) & (~is_long[None, :] | uni.has_long[:, None])
    su, se = np.nonzero(listed)            # row-major: by underlying, then expiry

    # ---- per (underlying, expiry) slice
    t = dte[se] / 365.0                    # ACT/365F, expiry at the same time of day
    s0 = uni.spot[su]
    q = uni.div_yield[su]
    r = uni.curve(t)
    fwd = forward_price(s0, r, q, t)      # the forward the visible columns give
    mkt = fwd                              # the forward the prices are made from
    if hidden_carry:
        crng = carry.carry_rng(seed, as_of)
        borrow, cash, first = carry.hidden_terms(uni.n, uni.spot, crng)
        mkt = carry.true_forward(s0, uni.curve, r, q, t, borrow[su], cash[su], first[su])
    a, b, rho, m, sig = smile_params(uni, su, t)
    sd = atm_vol(uni, su, t) * np.sqrt(t)
    k_lo = mkt * np.exp(np.maximum(-STRIKE_SDS * sd, K_LOG_LO))
    k_hi = mkt * np.exp(np.minimum(STRIKE_SDS * sd, K_LOG_HI))
    notch = np.searchsorted(_STEP_BREAKS, s0, side="right") - (t <= 1 / 12) + (t > 0.75)
    base = _STEPS[np.clip(notch, 0, _STEPS.size - 1)]
    i_lo, i_hi = _grid_span(k_lo, k_hi, base)
    n_nat = np.maximum(i_hi - i_lo + 1, 1).astype(np.int64)

    # Share the requested strikes out in proportion to each slice's natural count on its
    # base grid.  Where a slice gets more than that, its step is refined (to a nice
    # value) until the range holds enough grid points.  Each slice then lists ``cnt``
    # points of its grid spread evenly over the whole +-4 sd range, so the wings are
    # always there whatever the row count (a real chain also skips strikes in the wings).
    n_pairs = (n_rows + 1) // 2
    cnt = _largest_remainder(n_pairs, n_nat) if su.size else np.zeros(0, np.int64)
    step = np.where(cnt <= n_nat, base, _nice_floor(base * n_nat / np.maximum(cnt, 1)))
    i_lo, i_hi = _grid_span(k_lo, k_hi, step)
    for _ in range(60):
        short = (i_hi - i_lo + 1 < cnt) & (cnt > 1)
        if not short.any():
            break
        step = np.where(short, _nice_floor(step * (1.0 - 1e-6)), step)
        i_lo, i_hi = _grid_span(k_lo, k_hi, step)
    i_atm = np.maximum(np.rint(mkt / step), 1.0)
    gap = (i_hi - i_lo) / np.maximum(cnt - 1, 1)

    # ---- per row
    pair_slice = np.repeat(np.arange(su.size), cnt)
    j = np.arange(n_pairs) - (np.cumsum(cnt) - cnt)[pair_slice]
    idx = np.where(cnt[pair_slice] > 1, i_lo[pair_slice] + np.floor(j * gap[pair_slice] + 0.5),
                   np.clip(i_atm, i_lo, np.maximum(i_lo, i_hi))[pair_slice])
    strike_pair = np.round(idx * step[pair_slice], 9)
    row = np.arange(n_rows)
    sl = pair_slice[row >> 1]
    strike = strike_pair[row >> 1]
    is_call = (row & 1) == 0

    tr, fr, rr = t[sl], mkt[sl], r[sl]
    k = np.log(strike / fr)
    w = svi.total_variance(k, a[sl], b[sl], rho[sl], m[sl], sig[sl])
    true_vol = np.sqrt(w / tr)
    disc = np.exp(-rr * tr)
    model = black_price(fr, strike, w, disc, is_call)

    df, dk = disc * fr, disc * strike      # S e^{-qT}, K e^{-rT}
    lower = np.maximum(np.where(is_call, df - dk, dk - df), 0.0)
    upper = np.where(is_call, df, dk)
    z = k / sd[sl]
    otm = np.clip(np.where(is_call, z, -z), 0.0, 4.0)
    premium, bid, ask = make_quotes(model, lower, upper, otm, tr, uni.liquidity[su][sl], rng)

    cols = {"premium": premium, "bid": bid, "ask": ask, "strike": strike.copy(), "expiry_years": tr.copy()}
    flags = inject_bad(cols, lower, bad_fraction, rng)
    if hidden_carry:
        parity = carry.spoil_pairs(flags == 0, is_call, off_parity_fraction, crng)
        for kind, lo_f, hi_f in ((carry.STALE, 0.01, 0.04), (carry.OUTLIER, 0.15, 0.5)):
            rows = np.flatnonzero(parity == kind)
            move = crng.uniform(lo_f, hi_f, rows.size) * np.where(crng.random(rows.size) < 0.5, -1.0, 1.0)
            if kind == carry.STALE:     # priced at another level of the underlying
                off = black_price(fr[rows] * (1.0 + move), strike[rows], w[rows], disc[rows], is_call[rows])
            else:                       # priced off the model
                off = model[rows] * (1.0 + move)
            p_, b_, a_ = make_quotes(off, lower[rows], upper[rows], otm[rows], tr[rows],
                                     uni.liquidity[su][sl][rows], crng)
            cols["premium"][rows], cols["bid"][rows], cols["ask"][rows] = p_, b_, a_

    as_of_ms = as_of.astype("datetime64[ms]").astype(np.int64)
    expiry_ms = as_of_ms + np.rint(cols["expiry_years"] * (365 * 86400)).astype(np.int64) * 1000
    ts = SCHEMA.field("as_of").type
    arrays = [
        pa.DictionaryArray.from_arrays(pa.array(su[sl].astype(np.int32)), pa.array(uni.tickers, pa.string())),
        pa.array(np.full(n_rows, as_of_ms, dtype=np.int64), type=pa.int64()).cast(ts),
        pa.array(expiry_ms, type=pa.int64()).cast(ts),
        pa.array(cols["expiry_years"]),
        pa.array(s0[sl]),
        pa.array(fwd[sl]),
        pa.array(q[sl]),
        pa.array(rr),
        pa.array(cols["strike"]),
        pa.array(is_call),
        pa.array(true_vol),
        pa.array(model),
        pa.array(cols["premium"]),
        pa.array(cols["bid"]),
        pa.array(cols["ask"]),
        pa.DictionaryArray.from_arrays(pa.array(flags, pa.int8()), pa.array(FLAGS, pa.string())),
    ]
    meta = {
        "volsweep.synthetic": "true",
        "volsweep.note": "invented data for demos and benchmarks only; not market data",
        "volsweep.venue": f"{VENUE} ({VENUE_CODE}), fictional",
        "volsweep.seed": str(seed),
        "volsweep.as_of": str(as_of) + "Z",
        "volsweep.bad_fraction": repr(float(bad_fraction)),
    }
    schema = SCHEMA
    if hidden_carry:
        arrays += [pa.array(fr), pa.DictionaryArray.from_arrays(
            pa.array(parity, pa.int8()), pa.array(carry.PARITY_FLAGS, pa.string()))]
        schema = CHAIN_SCHEMA
        meta["volsweep.hidden_carry"] = "true"
        meta["volsweep.off_parity_fraction"] = repr(float(off_parity_fraction))
    return pa.Table.from_arrays(arrays, schema=schema.with_metadata(meta))


def write_snapshot(table, path, row_group_size=128 * 1024, compression="zstd"):
    """Write ``table`` to a Parquet file; returns ``path``."""
    pq.write_table(table, path, row_group_size=row_group_size, compression=compression)
    return path
