"""Synthetic option market snapshots of a fictional venue, for demos and benchmarks only.

**The data is invented.**  The Halvern Bay Options Exchange (HBOX) does not exist; its
underlyings carry four-letter tickers built from syllables with a J, Q, X or Z in the
third place (``KAQU``, ``TOXI``, ...), chosen to look unlike real listings; they name no
real company, and any resemblance to a real listing is coincidental.  The
prices come from a smile model, not from any market.

The scenario: one end-of-day snapshot (20:00 UTC close) of every listed European
contract on a few hundred single names.  Each name has a spot (a lognormal spread of
levels from 1.50 to a few thousand), a dividend yield (none for about 30%), a liquidity
tier deciding its listed expiries (dailies and weeklies for the busiest names, monthlies,
quarterlies, December long-dated expiries out to 5 years, and 7/10/12-year ones on a
few), and a vol surface: per-expiry raw SVI smiles (Gatheral) around an ATM term
structure with a long-end level between 15% and 80%, a negative skew on most names.
Rates come from one Nelson-Siegel zero curve.  Strikes lie on the usual listing grids
(a step by spot level, finer near-term, coarser long-dated) across +-4 standard
deviations of log-moneyness around the forward (within 10%..300% of it).  Quotes are the
model price on the tick grid (0.01 below 3.00, 0.05 from 3.00) with spreads that widen
out of the money, short-dated and on cheap or illiquid contracts.  A fraction of rows
is then spoiled on purpose and labelled in ``quote_flag``.

Columns of ``make_snapshot`` (one row per contract; ordered by underlying, expiry,
strike, call before put):

=============== ============================ ==============================================
column          type                         meaning
=============== ============================ ==============================================
underlying      dictionary<int32, string>    ticker
as_of           timestamp[ms, UTC]           snapshot time
expiry          timestamp[ms, UTC]           as_of + expiry_years * 365 days
expiry_years    float64                      ACT/365F years to expiry (whole days / 365)
spot            float64                      underlying price
forward         float64                      S exp((r - q) T)
div_yield       float64                      continuous dividend yield q
rate            float64                      continuously compounded zero rate r(T)
strike          float64                      strike
is_call         bool                         call (True) or put
true_vol        float64                      the SVI vol the quote was made from
model_price     float64                      BSM price at true_vol, unrounded
premium         float64                      model mid on the tick grid
bid, ask        float64                      quotes on the tick grid
quote_flag      dictionary<int8, string>     clean, crossed, premium_too_low, zero_bid,
                                             nan, bad_strike, expired
=============== ============================ ==============================================

Clean rows satisfy, strictly and with at least half a tick of room, discounted intrinsic
< bid <= premium <= ask < upper bound (S e^{-qT} for calls, K e^{-rT} for puts), so every
side of a clean quote has an implied vol.  On spoiled rows only the spoiled columns
change: ``true_vol``, ``model_price`` and ``forward`` still describe the contract as it
was before (an expired row keeps the forward of its original expiry).
``quotes.EXPECTED_STATUS`` maps each flag to the status a checker should report.

``make_snapshot(..., hidden_carry=True)`` makes the prices from a forward the visible
columns do not give (borrow costs and cash dividends; ``forward`` is then only what
S exp((r - q) T) says) and spoils a few calls or puts with stale or outlying quotes; it
adds ``true_forward`` (the forward the prices were made from) and ``parity_flag``
(``clean``, ``stale``, ``outlier``): see ``data_gen.carry`` and ``CHAIN_SCHEMA``.
"""

from .carry import PARITY_FLAGS
from .history import make_history, write_history
from .quotes import EXPECTED_STATUS, FLAGS
from .snapshot import CHAIN_SCHEMA, DEFAULT_AS_OF, SCHEMA, make_snapshot, write_snapshot
from .universe import VENUE, VENUE_CODE, make_universe

__all__ = [
    "make_snapshot", "write_snapshot", "make_history", "write_history", "make_universe",
    "SCHEMA", "CHAIN_SCHEMA", "FLAGS", "PARITY_FLAGS", "EXPECTED_STATUS", "DEFAULT_AS_OF", "VENUE", "VENUE_CODE",
]
