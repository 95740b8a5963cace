"""Hidden carry and off-parity quotes: what implied forwards are for.

With ``make_snapshot(..., hidden_carry=True)`` the prices are made from a forward the
visible columns do not give: on top of the published ``div_yield`` some names carry a
borrow cost (hard-to-borrow names) and some pay a cash dividend before some expiries, so
the true forward is

    F = (S - sum of PV(cash dividends paid before T)) * exp((r - q - borrow) T),

PV at the zero rate of the payment date, not S exp((r - q) T) (the ``forward`` column,
as a user would compute it).  The truth is recorded in ``true_forward``.  A fraction of
the clean calls or puts (never both of a pair) is then replaced by a quote from another
time or another price, labelled in ``parity_flag``:

* ``stale``: quoted as if the underlying were 1-4% away (a quote not refreshed after a
  move), requoted on the tick grid inside the no-arbitrage bounds;
* ``outlier``: quoted 15-50% off the model price, likewise requoted.

Everything here is invented, drawn from a random stream of its own, so the snapshot
without ``hidden_carry`` is unchanged.
"""

import numpy as np

PARITY_FLAGS = ("clean", "stale", "outlier")
CLEAN, STALE, OUTLIER = range(len(PARITY_FLAGS))
_CARRY_TAG = 0x43415252    # rng stream tag: "CARR"


def carry_rng(seed, as_of):
    day = int(as_of.astype("datetime64[D]").astype(np.int64))
    return np.random.default_rng([int(seed), _CARRY_TAG, day])


def hidden_terms(n_underlyings, spot, rng):
    """Per underlying: borrow cost (per year), cash dividend amount and the time of its
    first payment (years; then yearly)."""
    borrow = np.where(rng.random(n_underlyings) < 0.3, rng.uniform(0.005, 0.04, n_underlyings),
                      0.0)
    pays = rng.random(n_underlyings) < 0.4
    cash = np.where(pays, np.round(spot * rng.uniform(0.005, 0.02, n_underlyings), 2), 0.0)
    first = rng.uniform(0.02, 0.6, n_underlyings)
    return borrow, cash, first


def true_forward(spot, rate_curve, rate, div_yield, t, borrow, cash, first):
    """The forward of each slice (arrays per slice): S less the PV of the cash dividends
    paid before t (yearly from ``first``), carried at r - q - borrow."""
    pv = np.zeros_like(t)
    for k in range(15):
        pay = first + k
        before = pay < t
        pv += np.where(before, cash * np.exp(-rate_curve(pay) * pay), 0.0)
    return (spot - pv) * np.exp((rate - div_yield - borrow) * t)


def spoil_pairs(clean, is_call, fraction, rng):
    """Rows to spoil, as int8 flags: ``fraction`` of the clean rows, one side of a pair at
    most (an even row is the call, the next the put of the same strike), half stale and
    half outliers."""
    n = clean.size
    flags = np.zeros(n, np.int8)
    k = int(round(min(max(fraction, 0.0), 1.0) * n))
    if k == 0:
        return flags
    pair_ok = clean[0:n - 1:2] & clean[1::2] if n > 1 else np.zeros(0, bool)
    cand = np.flatnonzero(pair_ok) * 2
    k = min(k, cand.size)
    rows = rng.choice(cand, size=k, replace=False) + rng.integers(0, 2, k)
    flags[rows] = np.where(rng.random(k) < 0.5, STALE, OUTLIER)
    return flags
