"""Quotes around a model price: ticks, spreads, no-arbitrage clamps, injected bad quotes."""

import numpy as np

# Tick rule (common practice on listed equity options): 0.01 below 3.00, 0.05 from 3.00.
TICK_BREAK = 3.0
TICK_LOW = 0.01
TICK_HIGH = 0.05

# quote_flag dictionary, in code order; code 0 is a clean quote.
FLAGS = ("clean", "crossed", "premium_too_low", "zero_bid", "nan", "bad_strike", "expired")
CLEAN, CROSSED, BELOW_INTRINSIC, ZERO_BID, NAN, BAD_STRIKE, EXPIRED = range(len(FLAGS))

# Share of the bad rows given to each kind (normalised).
BAD_MIX = {
    CROSSED: 0.25,
    BELOW_INTRINSIC: 0.20,
    ZERO_BID: 0.20,
    NAN: 0.20,
    BAD_STRIKE: 0.075,
    EXPIRED: 0.075,
}

# What a checker should report for each injected kind, by status name (the kernel's
# names; strings only, data_gen does not import the kernel).  "clean" rows invert from
# premium, bid and ask alike; "crossed" rows keep a sound premium but bid > ask;
# "zero_bid" rows keep a sound premium and ask but bid == 0.
EXPECTED_STATUS = {
    "clean": "ok",
    "crossed": "crossed_quote",
    "premium_too_low": "premium_too_low",
    "zero_bid": "zero_bid",
    "nan": "missing_input",
    "bad_strike": "bad_strike",
    "expired": "expired",
}


def tick_size(price):
    return np.where(price < TICK_BREAK, TICK_LOW, TICK_HIGH)


def _snap(n, tick):
    # Two decimals so that tick multiples are the nearest doubles to 0.07, 3.05, ...
    return np.round(n * tick, 2)


def round_tick(x):
    t = tick_size(x)
    return _snap(np.rint(x / t), t)


def floor_tick(x):
    t = tick_size(x)
    return _snap(np.floor(x / t + 1e-9), t)


def ceil_tick(x):
    t = tick_size(x)
    return _snap(np.ceil(x / t - 1e-9), t)


def tick_above(x):
    """Smallest tick price strictly above x."""
    c = floor_tick(x)
    c = np.round(c + tick_size(c), 2)
    return np.where(c <= x, np.round(c + tick_size(c), 2), c)


def tick_below(x):
    """Largest tick price strictly below x."""
    c = ceil_tick(x)
    c = np.round(c - np.where(c <= TICK_BREAK + 1e-9, TICK_LOW, TICK_HIGH), 2)
    return np.where(c >= x, np.round(c - tick_size(c - 1e-9), 2), c)


def make_quotes(model, lower, upper, otm_sds, t, liquidity, rng):
    """Premium, bid and ask on the tick grid around ``model``.

    Spread: a minimum of two ticks, plus a part proportional to the price that widens
    with out-of-the-moneyness (in standard deviations) and for short expiries, times the
    name's liquidity factor and a little per-row noise.  Then every clean quote is forced
    at least half a tick inside the no-arbitrage bounds (lower, upper): a rounded quote
    at or below discounted intrinsic would have no implied vol.
    """
    rel = liquidity * (0.01 + 0.012 * otm_sds) * (1.0 + 0.25 / np.sqrt(np.maximum(t, 1 / 365) * 12.0))
    rel *= rng.uniform(0.8, 1.25, model.size)
    tick = tick_size(model)
    spread = np.maximum(rel * model + 0.02 * liquidity, 2.0 * tick)
    half = np.maximum(0.5 * spread, tick)

    # Half a tick of room on each side: a quote a hair above intrinsic has a time value
    # of a few ulps, whose implied vol is meaningless.
    lo_ok = tick_above(lower + 0.5 * tick_size(lower))
    hi_ok = tick_below(upper - 0.5 * tick_size(upper))
    premium = np.maximum(round_tick(model), lo_ok)
    bid = np.maximum(floor_tick(np.maximum(model - half, 0.0)), lo_ok)
    ask = ceil_tick(model + half)
    bid = np.minimum(bid, premium)
    ask = np.maximum(ask, premium)
    ask = np.maximum(ask, np.round(bid + tick_size(bid), 2))
    ask = np.minimum(ask, hi_ok)
    premium = np.minimum(premium, ask)
    bid = np.minimum(bid, premium)
    return premium, bid, ask


def _largest_remainder(total, weights):
    w = np.asarray(weights, dtype=np.float64)
    quota = total * w / w.sum()
    n = np.floor(quota).astype(np.int64)
    short = int(total - n.sum())
    if short > 0:
        n[np.argsort(-(quota - n), kind="stable")[:short]] += 1
    return n


def inject_bad(cols, lower, bad_fraction, rng):
    """Corrupt ``round(bad_fraction * n)`` rows in place; return the int8 flag codes.

    ``cols`` holds the arrays premium, bid, ask, strike, expiry_years.  Below-intrinsic
    quotes need room under intrinsic, so they are drawn among rows whose discounted
    intrinsic is at least 0.10; the other kinds from all remaining rows.
    """
    n = cols["premium"].size
    flags = np.zeros(n, dtype=np.int8)
    n_bad = int(round(min(max(bad_fraction, 0.0), 1.0) * n))
    if n_bad == 0:
        return flags
    kinds = np.array(list(BAD_MIX), dtype=np.int8)
    counts = dict(zip(kinds.tolist(), _largest_remainder(n_bad, list(BAD_MIX.values())).tolist()))

    prio = rng.random(n)
    pool = np.flatnonzero(lower >= 0.10)
    n_bi = min(counts[BELOW_INTRINSIC], pool.size)
    counts[CROSSED] += counts[BELOW_INTRINSIC] - n_bi
    counts[BELOW_INTRINSIC] = n_bi
    if n_bi:
        rows = pool[np.argpartition(prio[pool], n_bi - 1)[:n_bi]]
        flags[rows] = BELOW_INTRINSIC
        prio[rows] = np.inf
    n_rest = n_bad - n_bi
    if n_rest:
        rows = np.argpartition(prio, n_rest - 1)[:n_rest]
        labels = np.repeat(kinds, [counts[k] if k != BELOW_INTRINSIC else 0 for k in kinds.tolist()])
        flags[rows] = rng.permutation(labels)

    p, b, a = cols["premium"], cols["bid"], cols["ask"]

    r = np.flatnonzero(flags == CROSSED)
    old_bid = b[r].copy()
    b[r] = np.round(a[r] + tick_size(a[r]) * rng.integers(1, 4, r.size), 2)
    a[r] = old_bid

    r = np.flatnonzero(flags == BELOW_INTRINSIC)
    lb = lower[r]
    ask = floor_tick(lb * (1.0 - rng.uniform(0.005, 0.05, r.size)))
    ask = np.where(ask >= lb, tick_below(lb), ask)
    bid = np.maximum(np.round(ask - 2.0 * tick_size(ask), 2), 0.0)
    a[r] = ask
    b[r] = bid
    p[r] = np.minimum(np.maximum(round_tick(0.5 * (bid + ask)), bid), ask)

    b[flags == ZERO_BID] = 0.0

    r = flags == NAN
    p[r] = np.nan
    b[r] = np.nan
    a[r] = np.nan

    r = np.flatnonzero(flags == BAD_STRIKE)
    k = cols["strike"]
    k[r] = np.where(rng.random(r.size) < 0.5, 0.0, -k[r])

    r = np.flatnonzero(flags == EXPIRED)
    t = cols["expiry_years"]
    t[r] = np.where(rng.random(r.size) < 0.5, 0.0, -rng.integers(1, 6, r.size) / 365.0)
    return flags
