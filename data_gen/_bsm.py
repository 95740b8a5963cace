"""A small numpy/scipy Black-Scholes-Merton pricer, only for making synthetic quotes.

Deliberately independent of the kernel: the data must not be made by the code it tests.
Absolute accuracy is about 1e-15 of the strike/forward scale, which is plenty for quotes
that are rounded to a tick afterwards; it is not meant for deep-wing relative accuracy.
"""

import numpy as np
from scipy.special import ndtr


def forward_price(spot, rate, div_yield, t):
    """F = S exp((r - q) T)."""
    return spot * np.exp((rate - div_yield) * t)


def black_price(forward, strike, total_var, discount, is_call):
    """Discounted Black price from forward, strike, total variance w = sigma^2 T."""
    s = np.sqrt(total_var)
    d1 = np.log(forward / strike) / s + 0.5 * s
    d2 = d1 - s
    sign = np.where(is_call, 1.0, -1.0)
    return discount * sign * (forward * ndtr(sign * d1) - strike * ndtr(sign * d2))
