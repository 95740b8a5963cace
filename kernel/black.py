"""Black-76 and Black-Scholes-Merton prices, calls and puts, in normalised form.

Every model input is reduced to forward F, strike K, total volatility s = sigma*sqrt(T),
discount factor D and the sign theta (+1 call, -1 put).  With x = ln(F/K), h = x/s and
t = s/2 the undiscounted Black price is

    theta * (F Phi(theta (h + t)) - K Phi(theta (h - t))).

The textbook difference of two normal CDFs loses everything in the wings: both terms
underflow, and the rounding of d1 = h + t and d2 = h - t (absolute error ~eps*|h|)
becomes a relative error ~eps*h^2 in each term that the cancellation then amplifies again.

What we do instead:

1. Put-call symmetry reduces every option to its intrinsic value plus the time value of
   the out-of-the-money option of the pair, with x_o = -|x| <= 0, A = min(F, K),
   B = max(F, K):  price = D * (max(theta (F - K), 0) + otm).  Both parts are positive.
2. With Phi(z) = erfcx(-z/sqrt2) exp(-z^2/2) / 2, both terms of the OTM value share the
   factor E = exp(-d1^2/2) / 2 = exp(-a^2) / 2 (because B phi(d2) = A phi(d1) for the OTM
   option: x_o/2 = h t), which is computed once, and the rest is a difference of slowly
   varying scaled complementary error functions (a = -(h+t)/sqrt2 = -d1/sqrt2,
   b = (t-h)/sqrt2 >= |a|):

       a >= 0 (wing):  otm = A E (erfcx(a) - erfcx(b))
       a <  0 (core):  otm = A (1 - E (erfcx(-a) + erfcx(b)))

   In the core A Phi(d1) = A - A Phi(-d1) is written through the same E, so each price
   costs one exp (of -a^2 split exactly into two doubles, so that only the rounding of a
   reaches it) and two erfcx of non-negative arguments (``erfcx_pos``, itself without an
   exponential).  The relative amplification of rounding errors in the
   remaining subtraction equals the price's elasticity to F (or K), i.e. it is the
   problem's own condition number, so the price is accurate to a few ulps times
   max(1, e_F + e_K + e_s) down to prices near underflow (about 1e-300 F).
"""

import math

import numpy as np
from numba import prange

from . import status as S
from . import _args
from ._jit import BLOCK, loop, rows, scalar
from .special import _exp_sq, erfcx_pos, exp, log

_SQRT1_2 = 0.7071067811865476
NAN = np.nan
INF = np.inf


@scalar
def otm_ratio(x, s):
    """Out-of-the-money time value per upper bound, otm / min(F, K), for x <= 0, s > 0.

    ``h = x/s`` may be -inf (s -> 0), giving 0.  The common factor is
    E = exp(-d1^2/2) / 2 = exp(-a^2) / 2 with a^2 split exactly, so only the rounding of a
    itself reaches it (relative ~eps a^2, the problem's own sensitivity to x there).
    """
    h = x / s
    t = 0.5 * s
    a = -(h + t) * _SQRT1_2
    b = (t - h) * _SQRT1_2
    ya = abs(a)
    e = 0.5 * _exp_sq(40.0 if ya > 40.0 else ya, -1.0)   # exp(-1600) = 0
    wing = a >= 0.0
    ea = erfcx_pos(ya)
    eb = erfcx_pos(b)
    return e * (ea - eb) if wing else 1.0 - e * (ea + eb)


@scalar
def black_price(F, K, s, D, theta):
    """Discounted Black-76 price for valid inputs (F, K > 0, s >= 0, theta = +-1)."""
    x = log(F / K)
    xo = -abs(x)
    A = min(F, K)
    ss = s if s > 0.0 else 1.0
    otm = A * otm_ratio(xo, ss)
    otm = otm if s > 0.0 else 0.0
    intrinsic = max(theta * (F - K), 0.0)
    return D * (intrinsic + otm)


@scalar
def _is_nan(v):
    return v != v


@scalar
def _is_inf(v):
    return abs(v) == INF


@scalar
def input_status(F, K, T, D, vol, cp):
    """Status of one row's model inputs (forward space), in priority order."""
    missing = (_is_nan(F) or _is_nan(K) or _is_nan(T) or _is_nan(D) or _is_nan(vol)
               or cp == 0)
    nonfinite = _is_inf(F) or _is_inf(K) or _is_inf(T) or _is_inf(vol)
    st = S.OUT_OF_RANGE if not (D > 0.0 and D < INF) else S.OK
    st = S.EXPIRED if not (T > 0.0) else st
    st = S.NEGATIVE_VOL if vol < 0.0 else st
    st = S.BAD_STRIKE if not (K > 0.0) else st
    st = S.BAD_UNDERLYING if not (F > 0.0) else st
    st = S.NON_FINITE_INPUT if nonfinite else st
    st = S.MISSING_INPUT if missing else st
    return st


@scalar
def bsm_forward(spot, T, D, q):
    """Forward of a spot price with continuous yield q: S e^{-qT} / D (= S e^{(r-q)T})."""
    return spot * exp(-q * T) / D


@scalar
def spot_status(spot, T, D, q, F):
    """Extra checks of the BSM adapter: the dividend yield and the derived forward."""
    st = S.MISSING_INPUT if _is_nan(q) else S.OK
    st = S.NON_FINITE_INPUT if _is_inf(q) else st
    bad_fwd = not (F > 0.0 and F < INF)
    return S.OUT_OF_RANGE if (st == S.OK and bad_fwd) else st


@scalar
def bsm_inputs(spot, K, T, D, q, vol, cp):
    """One BSM row: (status, forward S e^{-qT}/D, e^{-qT}); the status in priority order."""
    dq = exp(-q * T)
    f = spot * dq / D                    # = bsm_forward(spot, T, D, q), bit for bit
    st = input_status(spot, K, T, D, vol, cp)
    st2 = spot_status(spot, T, D, q, f)
    return (st2 if (st == S.OK and st2 != S.OK) else st), f, dq


@rows
def _black76_price_rows(a, e, F, K, T, D, vol, cp, price, status):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        f = F[i]
        k = K[i]
        tt = T[i]
        v = vol[i]
        st = input_status(f, k, tt, D[i], v, cp[i])
        s = v * math.sqrt(tt if tt > 0.0 else 0.0)
        p = black_price(f if f > 0.0 else 1.0, k if k > 0.0 else 1.0, s, D[i], float(cp[i]))
        st = S.OUT_OF_RANGE if (st == S.OK and not (abs(p) < INF)) else st  # overflow
        price[i] = p if st == S.OK else NAN
        status[i] = st


@rows
def _bsm_price_rows(a, e, spot, K, T, D, q, vol, cp, price, status):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        tt = T[i]
        st, f, _ = bsm_inputs(spot[i], K[i], tt, D[i], q[i], vol[i], cp[i])
        s = vol[i] * math.sqrt(tt if tt > 0.0 else 0.0)
        ok = st == S.OK
        p = black_price(f if ok else 1.0, K[i] if ok else 1.0, s if ok else 1.0, D[i],
                        float(cp[i]))
        st = S.OUT_OF_RANGE if (ok and not (abs(p) < INF)) else st      # overflow
        price[i] = p if st == S.OK else NAN
        status[i] = st


@loop
def _black76_price_par(F, K, T, D, vol, cp, price, status):
    n = F.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _black76_price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), F, K, T, D, vol, cp, price,
                            status)


@loop
def _bsm_price_par(spot, K, T, D, q, vol, cp, price, status):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _bsm_price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), spot, K, T, D, q, vol, cp, price,
                        status)


def black76_price(F, K, T, D, vol, cp, price, status):
    """Black-76 prices of options on forwards F into ``price``, with a ``status`` per row.

    F, K, T (years), D (discount factor), vol: float64 arrays of one length n; cp: integer
    codes, +1 call, -1 put, 0 missing; price (float64) and status (int8): preallocated.
    A price that is not a finite double (overflow) gets status out_of_range and NaN.
    """
    F, K, T, D, vol = _args.floats(F, K, T, D, vol)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_black76_price_rows, _black76_price_par, n, F, K, T, D, vol, cp, price, status)


def bsm_price(spot, K, T, D, q, vol, cp, price, status):
    """Black-Scholes-Merton prices on spot with continuous dividend yield q (as black76)."""
    spot, K, T, D, q, vol = _args.floats(spot, K, T, D, q, vol)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_bsm_price_rows, _bsm_price_par, n, spot, K, T, D, q, vol, cp, price, status)


@rows
def _discount_rows(a, e, rate, T, out):
    for i in range(np.uint64(a), np.uint64(e)):
        out[i] = exp(-rate[i] * T[i])


@loop
def _discount_par(rate, T, out):
    n = T.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _discount_rows(b * BLOCK, min(n, (b + 1) * BLOCK), rate, T, out)


def discount_factors(rate, T, out):
    """Discount factors exp(-rate T) of continuously compounded rates into ``out``.

    The kernel's own exp (<= 1 ulp, vectorised, both threads): a table-level call spends
    about a quarter of its overhead on this conversion with numpy.  NaN in, NaN out.
    """
    rate, T = _args.floats(rate, T)
    n = T.shape[0]
    _args.output("out", out, (n,), np.float64)
    _args.run(_discount_rows, _discount_par, n, rate, T, out)
    return out
