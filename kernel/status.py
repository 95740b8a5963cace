"""Row status codes written by the kernels (int8), and their names.

The bindings turn the codes into a dictionary-encoded string column.  Codes are stable:
append new ones, never renumber.  The README documents each name.
"""

import numpy as np

OK = 0
MISSING_INPUT = 1      # a required input is null or NaN
NON_FINITE_INPUT = 2   # a required input is +-inf
BAD_UNDERLYING = 3     # forward / spot <= 0
BAD_STRIKE = 4         # strike <= 0
NEGATIVE_VOL = 5       # vol < 0
EXPIRED = 6            # time to expiry <= 0
OUT_OF_RANGE = 7       # discount factor not in (0, inf), or a derived forward not representable
# implied volatility
BELOW_INTRINSIC = 8    # premium below the discounted intrinsic value (or negative)
ABOVE_UPPER_BOUND = 9  # premium at or above the no-arbitrage upper bound
NO_TIME_VALUE = 10     # time value not resolvable in double precision (premium == intrinsic)
CROSSED_QUOTE = 11     # bid > ask
ZERO_BID = 12          # bid <= 0 (that side has no vol)

NAMES = (
    "ok",
    "missing_input",
    "non_finite_input",
    "bad_underlying",
    "bad_strike",
    "negative_vol",
    "expired",
    "out_of_range",
    "below_intrinsic",
    "above_upper_bound",
    "no_time_value",
    "crossed_quote",
    "zero_bid",
)

STATUS_DTYPE = np.int8

# Internal flag, never seen outside the kernel: the Greeks row loops add it to an ok row's
# status when one of its requested Greeks is not finite (an infinite limit such as gamma
# at the strike with zero vol); the entry points count and clear it.
NONFINITE_GREEK_FLAG = 64
