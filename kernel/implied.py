"""Implied Black-76 / BSM volatility at the accuracy the inputs allow, with a status per row.

Coordinates (those of kernel/black.py): x = ln(F/K), total vol s = sigma sqrt(T).  Put-call
symmetry reduces every quote to the out-of-the-money option of its pair, x_o = -|x| <= 0,
whose undiscounted value lies in (0, A), A = min(F, K).  The solver works with the time value
per upper bound, r = tv / A in (0, 1), and its complement c = 1 - r.  With d1 = x_o/s + s/2
and u2 = -x_o/s + s/2 > 0, Phi expressed through erfcx gives, without cancellation,

    wing (d1 <= 0):  r(s) = e^{-d1^2/2} (erfcx(-d1/sqrt2) - erfcx(u2/sqrt2)) / 2
    core (d1 >  0):  c(s) = e^{-d1^2/2} (erfcx( d1/sqrt2) + erfcx(u2/sqrt2)) / 2

The wing/core boundary is the inflection point s_c = sqrt(2|x|) of the price in s.

Method (Jaeckel, "Let's Be Rational", 2015, in outline; this is our own construction):

1. Time value.  tv = P/D - intrinsic is the only step where the premium's rounding meets a
   cancellation (in the money); it is formed with error-free transformations (exact division
   remainder by FMA, TwoSum), so tv is the correctly rounded time value of the double inputs.
   The bounds are exact comparisons (premium >= D*U by the sign of one FMA).
2. Region.  Quotes below the inflection value (r <= r_c) are solved on the objective
   ln r(s) = ln r*, those above on ln c(s) = ln c*.  The logarithm makes the objective
   nearly quadratic in 1/s (low prices) or in s (high prices), and the region's own formula
   above is the one without cancellation.  r* and c* are both formed from the inputs (c* as
   (U - P/D)/A), so a price just under its upper bound keeps its digits.
3. Initial guess.  Jaeckel's lower map f_l = (2 pi |x| / 3 sqrt3) Phi(-|x| / (sqrt3 s))^3
   (asymptotic to the price as s -> 0) and upper map f_u = Phi(-s/2) (to half the complement
   as s -> oo) are inverted in closed form after a Delbourgo-Gregory rational cubic in price
   space corrects them between their asymptote and the inflection point (value, slope and
   curvature matched there: the curvature of the price vanishes at s_c, so all three are
   cheap).  The result is clamped into the convexity bounds of the price (chord and tangent
   at s_c).  Its error is below ~40% everywhere, a few % for |x| >= 1.  The guess uses the
   guess-grade exp, log and erfcx of kernel/special.py (1e-8, 1e-9, 1e-7): it needs far
   less, and they cost about half as much.
4. Two Householder steps of order 3 (fourth-order convergence) on the log objective, with
   the derivatives of the normalised Black function in closed form, each iterate kept on
   its region's side of s_c.  The first step evaluates the objective with the guess-grade
   erfcx and log (its iterate is then within ~1e-7 / elasticity of where an exact step
   would land, far inside what the second step's fourth-order convergence removes); the
   second is at full precision.  Fixed count, no loop exits: every row runs the same
   straight-line code (compute both branches, select).
5. Near the money with a time value under ~1e-9 of the forward the log objective of step 2
   cannot resolve the complement; there s = sqrt(2 pi) (r + |x|/2) (the first terms of the
   small-vol expansion of the Black price) is exact to double precision.

Accuracy: the attainable one, i.e. a few ulps times max(1, (1 + e_F + e_K) / e_s) with e_*
the premium's elasticities (tests/test_implied.py measures it against mpmath).
"""

import math

import numpy as np
from numba import prange

from . import status as S
from ._intrinsics import fma
from . import _args
from ._jit import BLOCK, loop, rows, scalar
from .black import _is_inf, _is_nan, bsm_inputs, shifted_inputs
from .special import (INF, INV_SQRT2PI, LN2, NAN, SQRT1_2, SQRT2PI, erfcx_pos,
                      erfcx_pos_approx, erfcx_pos_approx_parts, exp_approx, log, log_approx)

_SQRT3 = 1.7320508075688772
_KAPPA = 1.2091995761561452  # 2 pi / (3 sqrt3): lower map f_l = _KAPPA |x| Phi(.)^3
_TINY_P = 2.0 ** -800        # premiums below this are scaled by _UP before dividing
_UP = 2.0 ** 200
_LN_UP = 200.0 * LN2
_BIG_R = 2.0 ** 1000         # F/K beyond this (or below its inverse) is rescaled first
_R_TINY = 2.0 ** -30         # near-the-money small-vol formula below this time value / A

# -Phi^{-1}(p) for p in (0, 1/2], our own least-squares rational fits (guess only: the
# Householder steps polish; relative error 1.4e-8 central, 1.1e-7 tail).
_PPF_SPLIT = 0.075
_PC = (2.506628269651873, -18.507652685510926, 40.81504786849507, -24.75188693857737)
_QC = (-8.430683641717101, 22.808603288743463, -20.597124232488884, 3.000888092177835)
_PT = (-2.7954772401096353, -2.4242528626130735, 2.3659200683394, 1.3363746143620117,
       0.09933503956549516)
_QT = (2.824980902700804, 1.3390179774888396, 0.09930942858108555, 1.4879682955210568e-07)


@scalar
def _neg_ppf(p, lp):
    """-Phi^{-1}(p) >= 0 for p in (0, 1/2], given p and lp = ln p (p may underflow)."""
    q = 0.5 - p
    u = q * q
    num = _PC[0] + u * (_PC[1] + u * (_PC[2] + u * _PC[3]))
    den = 1.0 + u * (_QC[0] + u * (_QC[1] + u * (_QC[2] + u * _QC[3])))
    r = math.sqrt(max(-2.0 * lp, 0.0))
    numt = _PT[0] + r * (_PT[1] + r * (_PT[2] + r * (_PT[3] + r * _PT[4])))
    dent = 1.0 + r * (_QT[0] + r * (_QT[1] + r * (_QT[2] + r * _QT[3])))
    central = p > _PPF_SPLIT
    return (q * num if central else numt) / (den if central else dent)


@scalar
def _two_diff(a, b):
    """(a - b rounded, its exact error) -- Knuth's TwoSum."""
    s = a - b
    bb = s - a
    return s, (a - (s - bb)) - (b + bb)


@scalar
def log_moneyness(F, K):
    """ln(F/K) to about one ulp of the result (the rounding of F/K is corrected)."""
    big = F > K * _BIG_R
    small = F * _BIG_R < K
    Fs = F * ((1.0 / _BIG_R) if big else (_BIG_R if small else 1.0))
    q = Fs / K
    shift = 1000.0 * LN2 if big else (-1000.0 * LN2 if small else 0.0)
    # Fs = q K + e exactly, so ln(Fs/K) = ln q + ln(1 + e/(qK)) ~ ln q + e/Fs
    corr = fma(-q, K, Fs) / Fs
    return log(q) + shift + corr


@scalar
def _time_value_parts(P, U, V, D):
    """(tv, small, q, 1/D): tv = P/D - max(U - V, 0) as the correctly rounded time value of
    the double inputs, times 2^200 where P < 2^-800 (small); q = P/D (scaled alike)."""
    small = P < _TINY_P
    scale = _UP if small else 1.0
    Ps = P * scale
    # P/D = q + qlo exactly up to the rounding of qlo (the remainder is exact)
    # the remainder Ps - q D is exact for any q within an ulp of the quotient
    invD = 1.0 / D
    q = Ps * invD
    qlo = fma(-q, D, Ps) * invD
    itm = U > V
    d, de = _two_diff(U, V)
    d = d * scale if itm else 0.0
    de = de * scale if itm else 0.0
    t, et = _two_diff(q, d)
    tv = t + ((et + qlo) - de)
    return tv, small, q, invD


@scalar
def exact_time_value(P, U, V, D):
    """(tv, small): the time value P/D - max(U - V, 0) of a premium P, U - V the intrinsic
    value's difference (F - K for a call, K - F for a put), correctly rounded from the
    double inputs (error-free transformations), times 2^200 where P < 2^-800 (small)."""
    tv, small, _, _ = _time_value_parts(P, U, V, D)
    return tv, small


@scalar
def normalised_time_value(P, F, K, D, cp):
    """The premium as the solver sees it: (r, rs, lsc, c, status).

    r = tv / A is the undiscounted time value over its upper bound A = min(F, K) (it may
    underflow for tiny premiums); rs = r e^lsc is the same ratio kept in range (lsc = 0,
    or 200 ln 2 for premiums below 2^-800), so ln r = ln rs - lsc; c = (U - P/D) / A is
    1 - r formed from the inputs, U = F for calls and K for puts.  status is OK,
    MISSING_INPUT / NON_FINITE_INPUT (premium NaN / inf), PREMIUM_TOO_LOW,
    PREMIUM_TOO_HIGH or NO_TIME_VALUE.
    Valid F, K, D > 0 and cp = +-1 are assumed.
    """
    call = cp > 0.0
    U = F if call else K
    V = K if call else F
    A = min(F, K)
    tv, small, q, invD = _time_value_parts(P, U, V, D)
    invA = 1.0 / A
    rs = tv * invA
    lsc = _LN_UP if small else 0.0
    r = rs * (1.0 / _UP) if small else rs
    q1 = q * (1.0 / _UP) if small else q
    q1lo = fma(-q1, D, P) * invD
    u1, eu = _two_diff(U, q1)
    c = (u1 + (eu - q1lo)) * invA
    st = S.NO_TIME_VALUE if not (rs > 0.0) else S.OK
    st = S.PREMIUM_TOO_HIGH if fma(-D, U, P) >= 0.0 else st
    st = S.PREMIUM_TOO_LOW if (tv < 0.0 or P < 0.0) else st
    st = S.NON_FINITE_INPUT if _is_inf(P) else st
    st = S.MISSING_INPUT if _is_nan(P) else st
    return r, rs, lsc, c, st


@scalar
def _householder(s, x, lt, upper, sc, precise):
    """One Householder step (order 3) on ln y(s) = lt, y = r (lower) or c (upper), x <= 0.

    The iterate is first clamped to its region's side of s_c (the root lies there, so this
    only ever moves it closer); the region's own formula then applies without cancellation
    and without the exponential.  ``precise`` (a constant at each call site) picks the
    full-precision erfcx; otherwise ``erfcx_pos_approx`` (1e-7), for a first step that a
    precise one follows: its error reaches the next iterate as about 1e-7 over the
    objective's elasticity, and the next step's fourth-order convergence removes it.  The
    approximate step also spends two divisions fewer (1/s shared by x/s and the inverse
    elasticity; the two erfcx values over one common denominator).
    """
    s = max(s, sc) if upper else min(s, sc)
    inv_s = 1.0 / s
    h = x / s if precise else x * inv_s
    t = 0.5 * s
    d1 = h + t
    u2 = t - h
    za = (d1 if upper else -d1) * SQRT1_2    # >= 0 on the region's side of s_c
    zb = u2 * SQRT1_2
    if precise:
        ea = erfcx_pos(za)
        eb = erfcx_pos(zb)
        sw = ea + eb if upper else ea - eb
    else:
        na, da = erfcx_pos_approx_parts(za)
        nb, db = erfcx_pos_approx_parts(zb)
        # da db overflows only if both arguments exceed ~1e154 (an absurd iterate): sw = 0,
        # the objective is NaN and the guard below leaves s as it is
        sw = (na * db + nb * da if upper else na * db - nb * da) / (da * db)
    ell = (log(0.5 * sw) if precise else log_approx(0.5 * sw)) - 0.5 * d1 * d1
    # ig1 = y / (s y') = +-sqrt(2 pi) sw / (2 s), the inverse elasticity of the objective.
    # nu = delta ig1 is the Newton step over s (delta = lt - ell); since nu g1 = delta, the
    # Householder terms need no g1 and no second division:
    #   a = nu h2 = nu sb2 - delta,  b = nu^2 h3 = nu (nu s2b3 - 3 delta sb2) + 2 delta^2
    # with h2 = s (ln y)'' / (ln y)' and h3 = s^2 (ln y)''' / (ln y)'.
    ig1 = (0.5 * SQRT2PI) * sw / s if precise else (0.5 * SQRT2PI) * sw * inv_s
    ig1 = -ig1 if upper else ig1
    sb2 = h * h - t * t                    # s b''/b'
    s2b3 = sb2 * sb2 - 3.0 * h * h - t * t  # s^2 b'''/b'
    delta = lt - ell
    nu = delta * ig1
    a = nu * sb2 - delta
    b = nu * (nu * s2b3 - 3.0 * delta * sb2) + 2.0 * delta * delta
    dl = nu * (1.0 + 0.5 * a) / (1.0 + a + b * (1.0 / 6.0))
    dl = dl if (dl == dl and abs(dl) < INF) else 0.0
    dl = min(max(dl, -0.75), 3.0)
    s = s * (1.0 + dl)
    return max(s, sc) if upper else min(s, sc)


@scalar
def _initial_guess(x, r, c, lt, lower, sc, rc):
    """Total vol within ~40% (lower/upper map after a rational cubic, clamped)."""
    xi = -x
    g = exp_approx(0.25 * xi)                    # e^{xi/4} < e^364: finite
    sxi = math.sqrt(xi)
    # second erfcx argument by region: sqrt(xi/12) (lower map at s_c), sqrt(xi)/2 (upper)
    ex2 = erfcx_pos_approx(sxi * (0.28867513459481287 if lower else 0.5))
    p2 = 0.5 * ex2
    # lower: rational cubic of f(beta) on [0, b_c]: f(0)=0, f'(0)=1; value, slope and
    # curvature of f_l(s(beta)) at s_c (b'' = 0 there).  All per b_c; t = r / r_c.
    kap = _KAPPA * xi
    kc = 1.0 - rc
    ih = 1.0 / (rc if lower else kc)              # 1 / interval length (per bound)
    # lower: rational cubic of f(beta) on [0, b_c]: f(0)=0, f'(0)=1; value, slope and
    # curvature of f_l(s(beta)) at s_c (b'' = 0 there).  All per b_c; t = r / r_c.
    phl = kap * p2 * p2 * p2 * g
    d1l = (1.5 / _SQRT3) * kap * p2 * p2 * g
    # kap * [(2 phi - z Phi) z'^2 + Phi z''] / (E12 Phi...) at s_c, z = -sqrt(xi/6)
    zc = -sxi * 0.4082482904638631
    kbr = kap * (2.0 * INV_SQRT2PI - zc * p2) * (1.0 / 12.0) \
        - _KAPPA * p2 * sxi * 0.4082482904638631
    hdd_l = 3.0 * p2 * SQRT2PI * rc * g * kbr
    # upper: f(c) on [0, c_c]: f(0)=0, f'(0)=1/2; per c_c; t = c / c_c
    d1u = 0.5 * g
    hdd_u = kc * (0.125 * sc) * SQRT2PI * g
    phi_ = (phl if lower else p2 * g) * ih
    d0 = 1.0 if lower else 0.5
    d1 = d1l if lower else d1u
    hdd = hdd_l if lower else hdd_u
    tt = (r if lower else c) * ih
    tt = min(max(tt, 0.0), 1.0)
    # Delbourgo-Gregory parameter matching the curvature at t = 1, kept >= the
    # monotonicity bound (d0 + d1) / phi_ (one reciprocal for both quotients)
    inv = 1.0 / ((d1 - phi_) * phi_)
    rr = (0.5 * hdd + (d1 - d0)) * phi_ * inv
    rmin = (d0 + d1) * (d1 - phi_) * inv
    rr = rr if rr >= rmin else rmin
    rr = rr if (rr == rr and abs(rr) < 1e300) else 3.0
    om = 1.0 - tt
    num = phi_ * tt * tt + (rr * phi_ - d1) * tt * om + d0 * om * om
    # f / price = num / den; ln p for Phi^{-1}: lower p = (f / kap)^(1/3), upper p = f
    den = (1.0 + (rr - 3.0) * tt * om) * (kap if lower else 1.0)
    lf = lt + x * 0.5 + log_approx(num / den)
    lp = lf * (1.0 / 3.0) if lower else lf
    p = exp_approx(lp)                            # lp < -700: p unused (tail)
    y = _neg_ppf(min(p, 0.5), lp)
    s0 = (xi if lower else 2.0 * y * y) / (y * (_SQRT3 if lower else 1.0))
    # convexity bounds: chord (lower bound) and tangent at s_c (upper bound below s_c,
    # lower bound above)
    tang = sc + ((r - rc) if lower else (kc - c)) * SQRT2PI
    chord = sc * r * ih
    sl = s0 if s0 >= chord else chord
    sl = tang if (tang > 0.0 and not (sl <= tang)) else sl
    sl = sl if sl < INF else max(chord, 0.5 * sc)
    su = s0 if s0 >= tang else tang
    su = su if su == su else max(tang, sc)
    return sl if lower else su


@scalar
def implied_total_vol(x, r, rs, lsc, c):
    """Total implied vol s of an out-of-the-money quote, x <= 0; (r, rs, lsc, c) as
    returned by ``normalised_time_value`` (0 < r < 1).  Returns s > 0, or 0 / NaN where
    the time value is not resolvable (the caller maps it to NO_TIME_VALUE)."""
    sc = math.sqrt(-2.0 * x)
    rc = 0.5 * (1.0 - erfcx_pos(math.sqrt(-x)))        # r at s_c: erfcx(0) term is 1
    lower = r <= rc
    lt = log(rs if lower else c) - (lsc if lower else 0.0)   # ln r* or ln c*
    s = _initial_guess(x, r, c, lt, lower, sc, rc)
    # two steps, written out: an inner loop would be what LLVM vectorises
    s = _householder(s, x, lt, not lower, sc, False)
    s = _householder(s, x, lt, not lower, sc, True)
    tiny = (not lower) and r < _R_TINY
    return SQRT2PI * (r - 0.5 * x) if tiny else s


@scalar
def black_total_vol(P, F, K, D, cp):
    """(s, status) for one Black-76 quote with valid F, K, D > 0, cp = +-1."""
    r, rs, lsc, c, st = normalised_time_value(P, F, K, D, cp)
    x = log_moneyness(F, K)
    s = implied_total_vol(-abs(x), r, rs, lsc, c)
    good = s > 0.0 and s < INF
    st = S.NO_TIME_VALUE if (st == S.OK and not good) else st
    return (s if st == S.OK else NAN), st


@rows
def _black76_iv_rows(a, e, premium, F, K, T, D, shift, cp, iv_out, status_out):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        tt = T[i]
        dd = D[i]
        st, f, k = shifted_inputs(F[i], K[i], tt, dd, shift[i], 0.0, cp[i])
        ok = st == S.OK
        s, st2 = black_total_vol(premium[i], f if ok else 1.0, k if ok else 1.0,
                                 dd if ok else 1.0, float(cp[i]) if ok else 1.0)
        st = st2 if ok else st
        v = s / math.sqrt(tt)
        st = S.OUT_OF_RANGE if (st == S.OK and not (v < INF)) else st   # overflow
        iv_out[i] = v if st == S.OK else NAN
        status_out[i] = st


@rows
def _bsm_iv_rows(a, e, premium, spot, K, T, D, q, cp, iv_out, status_out):
    for i in range(np.uint64(a), np.uint64(e)):
        tt = T[i]
        dd = D[i]
        st, f, _ = bsm_inputs(spot[i], K[i], tt, dd, q[i], 0.0, cp[i])
        ok = st == S.OK
        s, st3 = black_total_vol(premium[i], f if ok else 1.0, K[i] if ok else 1.0,
                                 dd if ok else 1.0, float(cp[i]) if ok else 1.0)
        st = st3 if ok else st
        v = s / math.sqrt(tt)
        st = S.OUT_OF_RANGE if (st == S.OK and not (v < INF)) else st   # overflow
        iv_out[i] = v if st == S.OK else NAN
        status_out[i] = st


@loop
def _black76_iv_par(premium, F, K, T, D, shift, cp, iv_out, status_out):
    n = F.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _black76_iv_rows(b * BLOCK, min(n, (b + 1) * BLOCK), premium, F, K, T, D, shift, cp,
                         iv_out, status_out)


@loop
def _bsm_iv_par(premium, spot, K, T, D, q, cp, iv_out, status_out):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _bsm_iv_rows(b * BLOCK, min(n, (b + 1) * BLOCK), premium, spot, K, T, D, q, cp,
                     iv_out, status_out)


def black76_iv(premium, F, K, T, D, shift, cp, iv_out, status_out):
    """(Shifted) Black-76 implied vols of premiums on forwards F: the lognormal vol of
    F + shift and K + shift (shift 0: plain Black-76); cp = +1 call, -1 put, 0 missing.

    Inputs: float64 arrays of one length n (cp integer codes); outputs preallocated:
    iv_out float64 (NaN where the status is not ok) and status_out int8.
    """
    premium, F, K, T, D, shift = _args.floats(premium, F, K, T, D, shift)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("status_out", status_out, (n,), np.int8)
    _args.run(_black76_iv_rows, _black76_iv_par, n, premium, F, K, T, D, shift, cp, iv_out,
              status_out)


def bsm_iv(premium, spot, K, T, D, q, cp, iv_out, status_out):
    """Black-Scholes-Merton implied vols on spot with continuous dividend yield q."""
    premium, spot, K, T, D, q = _args.floats(premium, spot, K, T, D, q)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("status_out", status_out, (n,), np.int8)
    _args.run(_bsm_iv_rows, _bsm_iv_par, n, premium, spot, K, T, D, q, cp, iv_out,
              status_out)
