"""Black-76 and Black-Scholes-Merton prices, calls and puts, in normalised form.

Every model input is reduced to forward F, strike K, total volatility s = sigma*sqrt(T),
discount factor D and the call/put sign cp (+1 call, -1 put).  With x = ln(F/K), h = x/s and
t = s/2 the undiscounted Black price is

    cp * (F Phi(cp (h + t)) - K Phi(cp (h - t))).

The textbook difference of two normal CDFs loses everything in the wings: both terms
underflow, and the rounding of d1 = h + t and d2 = h - t (absolute error ~eps*|h|)
becomes a relative error ~eps*h^2 in each term that the cancellation then amplifies again.

What we do instead:

1. Put-call symmetry reduces every option to its intrinsic value plus the time value of
   the out-of-the-money option of the pair, with x_o = -|x| <= 0, A = min(F, K),
   B = max(F, K):  price = D * (max(cp (F - K), 0) + otm).  Both parts are positive.
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
from .special import INF, NAN, SQRT1_2, _exp_sq, erfcx_pos, exp, log


@scalar
def otm_value(A, AE, ea, eb, wing):
    """The out-of-the-money time value of the pair, undiscounted, from its parts -- the one
    place this combination is written (the price here and inside the Greeks; the
    implied-vol solver evaluates its logarithm per A, ln E + ln(ea -+ eb), in
    kernel/implied.py).

    A = min(F, K); AE = A E with E = exp(-d1^2/2) / 2 of the OTM option (= F phi(d1)
    sqrt(pi/2) for either option of the pair); ea = erfcx(|d1|/sqrt2) >= eb =
    erfcx(|d2|/sqrt2) of the OTM option; ``wing`` (its d1 <= 0): AE (ea - eb); core:
    A - AE (ea + eb) (A Phi(d1) written as A - A Phi(-d1) through the same E).  Both forms
    are free of cancellation beyond the problem's own.
    """
    return AE * (ea - eb) if wing else A - AE * (ea + eb)


@scalar
def otm_time_value(A, x, s):
    """Out-of-the-money time value, undiscounted, for x = -|ln F/K| <= 0, s > 0, A = min(F, K).

    ``h = x/s`` may be -inf (s -> 0), giving 0.  The common factor is
    E = exp(-d1^2/2) / 2 = exp(-a^2) / 2 with a^2 split exactly, so only the rounding of a
    itself reaches it (relative ~eps a^2, the problem's own sensitivity to x there).
    """
    h = x / s
    t = 0.5 * s
    a = -(h + t) * SQRT1_2
    b = (t - h) * SQRT1_2
    ya = abs(a)
    e = 0.5 * _exp_sq(40.0 if ya > 40.0 else ya, -1.0)   # exp(-1600) = 0
    return otm_value(A, A * e, erfcx_pos(ya), erfcx_pos(b), a >= 0.0)


@scalar
def black_price(F, K, s, D, cp):
    """Discounted Black-76 price for valid inputs (F, K > 0, s >= 0, cp = +-1)."""
    x = log(F / K)
    xo = -abs(x)
    A = min(F, K)
    ss = s if s > 0.0 else 1.0
    otm = otm_time_value(A, xo, ss)
    otm = otm if s > 0.0 else 0.0
    intrinsic = max(cp * (F - K), 0.0)
    return D * (intrinsic + otm)


@scalar
def _is_nan(v):
    return v != v


@scalar
def _is_inf(v):
    return abs(v) == INF


@scalar
def checked_status(U, K, T, D, vol, cp, q, st_u, st_k):
    """Status of one row's model inputs, in the priority order of kernel/status.py, with
    the model's own range checks of the underlying and the strike given as statuses
    (``st_u``, ``st_k``: OK where the value is in the model's range).

    U: the underlying (forward or spot); q: the model's extra input (the dividend yield,
    the shift; 0.0 for a model without one, a constant that folds away); vol: 0.0 where
    the row has no vol input (implied vol).  cp = 0 (a missing call/put flag) is
    missing_input.  A discount factor from a rate carries the rate's problems
    (``discount_factors``).
    """
    missing = (_is_nan(U) or _is_nan(K) or _is_nan(T) or _is_nan(D) or _is_nan(vol)
               or _is_nan(q) or cp == 0)
    nonfinite = (_is_inf(U) or _is_inf(K) or _is_inf(T) or _is_inf(D) or _is_inf(vol)
                 or _is_inf(q))
    st = S.OUT_OF_RANGE if not (D > 0.0) else S.OK
    st = S.EXPIRED if not (T > 0.0) else st
    st = S.NEGATIVE_VOL if vol < 0.0 else st
    st = st_k if st_k != S.OK else st
    st = st_u if st_u != S.OK else st
    st = S.NON_FINITE_INPUT if nonfinite else st
    st = S.MISSING_INPUT if missing else st
    return st


@scalar
def input_status(U, K, T, D, vol, cp, q):
    """``checked_status`` of a lognormal model: U <= 0 is bad_underlying, K <= 0
    bad_strike."""
    return checked_status(U, K, T, D, vol, cp, q,
                          S.BAD_UNDERLYING if not (U > 0.0) else S.OK,
                          S.BAD_STRIKE if not (K > 0.0) else S.OK)


@scalar
def shifted_inputs(F, K, T, D, sh, vol, cp):
    """One shifted Black-76 row: (status, F + sh, K + sh).

    The model of F + sh and K + sh.  With sh == 0 the statuses are Black-76's
    (bad_underlying, bad_strike); with a nonzero shift a shifted forward or strike <= 0 is
    shifted_not_positive.  F + 0.0 == F, so a zero shift gives Black-76's bits.
    """
    f = F + sh
    k = K + sh
    bad = S.SHIFTED_NOT_POSITIVE
    st = checked_status(F, K, T, D, vol, cp, sh,
                        (S.BAD_UNDERLYING if sh == 0.0 else bad) if not (f > 0.0) else S.OK,
                        (S.BAD_STRIKE if sh == 0.0 else bad) if not (k > 0.0) else S.OK)
    return st, f, k


@scalar
def bsm_inputs(spot, K, T, D, q, vol, cp):
    """One BSM row: (status, forward S e^{-qT} / D, e^{-qT}).

    The status is ``input_status`` of the inputs, then out_of_range where the derived
    forward is not a positive finite double.
    """
    dq = exp(-q * T)
    f = spot * dq / D
    st = input_status(spot, K, T, D, vol, cp, q)
    bad_fwd = not (f > 0.0 and f < INF)
    return (S.OUT_OF_RANGE if (st == S.OK and bad_fwd) else st), f, dq


@rows
def _black76_price_rows(a, e, F, K, T, D, shift, vol, cp, price, status):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        tt = T[i]
        v = vol[i]
        st, f, k = shifted_inputs(F[i], K[i], tt, D[i], shift[i], v, cp[i])
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
def _black76_price_par(F, K, T, D, shift, vol, cp, price, status):
    n = F.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _black76_price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), F, K, T, D, shift, vol, cp,
                            price, status)


@loop
def _bsm_price_par(spot, K, T, D, q, vol, cp, price, status):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _bsm_price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), spot, K, T, D, q, vol, cp, price,
                        status)


def black76_price(F, K, T, D, shift, vol, cp, price, status):
    """(Shifted) Black-76 prices of options on forwards F into ``price``, with a ``status``
    per row: the Black-76 price of F + shift and K + shift (shift 0: plain Black-76).

    F, K, T (years), D (discount factor), shift, vol: float64 arrays of one length n; cp:
    integer codes, +1 call, -1 put, 0 missing; price (float64) and status (int8):
    preallocated.  A price that is not a finite double (overflow) gets status out_of_range
    and NaN.
    """
    F, K, T, D, shift, vol = _args.floats(F, K, T, D, shift, vol)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_black76_price_rows, _black76_price_par, n, F, K, T, D, shift, vol, cp, price,
              status)


def bsm_price(spot, K, T, D, q, vol, cp, price, status):
    """Black-Scholes-Merton prices on spot with continuous dividend yield q (as black76)."""
    spot, K, T, D, q, vol = _args.floats(spot, K, T, D, q, vol)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_bsm_price_rows, _bsm_price_par, n, spot, K, T, D, q, vol, cp, price, status)


@scalar
def discount_factor(r, T):
    """e^{-rT}, carrying the inputs' problems into the factor (kernel/status.py): NaN if r
    or T is NaN (missing_input), +inf if either is infinite (non_finite_input), 0 where
    e^{-rT} itself is not a positive finite double (out_of_range)."""
    d = exp(-r * T)
    d = d if d < INF else 0.0
    d = INF if (_is_inf(r) or _is_inf(T)) else d
    return NAN if (_is_nan(r) or _is_nan(T)) else d


@rows
def _discount_rows(a, e, rate, T, out):
    for i in range(np.uint64(a), np.uint64(e)):
        out[i] = discount_factor(rate[i], T[i])


@loop
def _discount_par(rate, T, out):
    n = T.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _discount_rows(b * BLOCK, min(n, (b + 1) * BLOCK), rate, T, out)


def discount_factors(rate, T, out):
    """Discount factors exp(-rate T) of continuously compounded rates into ``out``.

    The kernel's own exp (<= 1 ulp, vectorised, both threads), with the rate's problems
    carried into the factor as ``discount_factor`` says, so that the row loops decide the
    status alone.
    """
    rate, T = _args.floats(rate, T)
    n = T.shape[0]
    _args.output("out", out, (n,), np.float64)
    _args.run(_discount_rows, _discount_par, n, rate, T, out)
    return out
