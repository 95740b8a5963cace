"""Row status codes written by the kernels (int8), their names, and their priority.

The bindings turn the codes into a dictionary-encoded string column.  Codes are stable:
append new ones, never renumber.  The README documents each name.

Every status is decided here and in the kernels' row loops, once; nothing re-ranks it
afterwards.  Priority, highest first (a row gets the first that applies):

1. input problems, in this order: ``missing_input`` (any required input NaN/null, the
   call/put flag included), ``non_finite_input`` (any required input +-inf, the discount
   factor and the extra inputs of a model included), then the range checks
   ``bad_underlying``, ``bad_strike``, ``shifted_not_positive``, ``negative_vol``,
   ``expired``, ``out_of_range`` (code order, except the appended
   ``shifted_not_positive``, which ranks with the other checks of forward and strike);
   The premium of a side counts among that side's inputs: a null/NaN or +-inf premium
   (bid, ask or mid) is ``missing_input`` / ``non_finite_input`` on that side, and an
   implied vol that is not a finite double is ``out_of_range``;
2. quote problems of a bid/ask pair: ``crossed_quote`` (on each side without an input
   problem), then ``zero_bid`` (the bid and the mid);
3. the premium's own problems, per side: ``premium_too_low``, ``premium_too_high``,
   ``no_time_value``.

A rate is turned into a discount factor by ``black.discount_factors``, which carries the
rate's own problems into the factor: a NaN rate gives NaN (missing_input), an infinite
rate or time gives +inf (non_finite_input), and e^{-rT} that is not a positive finite
double gives 0 (out_of_range).  So a row's status is the same whichever of ``rate`` or
``discount`` it came with.
"""

import numpy as np

OK = 0
MISSING_INPUT = 1      # a required input is null or NaN
NON_FINITE_INPUT = 2   # a required input is +-inf
BAD_UNDERLYING = 3     # forward / spot <= 0
BAD_STRIKE = 4         # strike <= 0
NEGATIVE_VOL = 5       # vol < 0
EXPIRED = 6            # time to expiry <= 0
OUT_OF_RANGE = 7       # discount factor <= 0 (or e^{-rT} not representable), a derived
#                        forward or the output itself not a finite double
# implied volatility
PREMIUM_TOO_LOW = 8    # premium below the discounted intrinsic value (or negative)
PREMIUM_TOO_HIGH = 9   # premium at or above the no-arbitrage upper bound
NO_TIME_VALUE = 10     # time value not resolvable in double precision (premium == intrinsic)
CROSSED_QUOTE = 11     # bid > ask
ZERO_BID = 12          # bid <= 0 (that side has no vol)
SHIFTED_NOT_POSITIVE = 13  # shifted Black-76 with a nonzero shift: forward + shift or
#                            strike + shift <= 0 (with shift 0: bad_underlying / bad_strike)

NAMES = (
    "ok",
    "missing_input",
    "non_finite_input",
    "bad_underlying",
    "bad_strike",
    "negative_vol",
    "expired",
    "out_of_range",
    "premium_too_low",
    "premium_too_high",
    "no_time_value",
    "crossed_quote",
    "zero_bid",
    "shifted_not_positive",
)

# The input problems, as a bit set over the codes (``(INPUT_PROBLEMS >> code) & 1``: a
# branch-free test inside the loops).  A new input problem appends a code and a bit here.
INPUT_PROBLEMS = sum(1 << c for c in (MISSING_INPUT, NON_FINITE_INPUT, BAD_UNDERLYING,
                                      BAD_STRIKE, NEGATIVE_VOL, EXPIRED, OUT_OF_RANGE,
                                      SHIFTED_NOT_POSITIVE))

STATUS_DTYPE = np.int8

# Internal flag, never seen outside the kernel: the Greeks row loops add it to an ok row's
# status when one of its requested Greeks is not finite (an infinite limit such as gamma
# at the strike with zero vol); the entry points count and clear it.
NONFINITE_GREEK_FLAG = 64
