"""The Bachelier (normal) model: price, implied normal vol and Greeks, calls and puts.

Inputs: forward F and strike K of any sign (zero included: they are data, never errors),
time T, discount factor D, normal vol sigma (price units per year^1/2) and the call/put
sign cp.  With x = F - K, total vol s = sigma sqrt(T) and d = x / s the price is

    V = D (cp x Phi(cp d) + s phi(d)) = D (max(cp x, 0) + time value).

Price
-----
The time value is that of the out-of-the-money option of the pair, s (phi(d) - |d|
Phi(-|d|)).  Written as s phi(d) (1 - |d| Phi(-|d|) / phi(d)) it cancels in the wings:
the bracket is ~1/d^2 while both terms are ~1, so about 2 log10|d| digits are lost (three
at |d| = 38).  With z = |d| / sqrt2 and Phi(-|d|) = erfcx(z) e^{-z^2} / 2,

    time value = s e^{-z^2} h(z) / sqrt2,   h(z) = 1/sqrt(pi) - z erfcx(z) = -erfcx'(z)/2,

and h is evaluated as one rational function P(z)/Q(z) of degree 11/13 with positive
coefficients (fitted with mpmath to 1.2e-17 relative on [0, 1e8] by
tests/fit_bachelier.py, the method of tests/fit_erfcx.py), so nothing cancels.  e^{-z^2}
= e^{-d^2/2} is formed from d^2 split exactly into two doubles (only the rounding of d
reaches it, a relative ~eps d^2: the problem's own sensitivity there), and multiplied
into s h / sqrt2 before its last power-of-two factor (``special.exp_mul``), so the time
value stays relatively accurate while it is a normal double (|d| up to ~38 for s ~ 1).
One exponential and one division per price.

Implied normal vol
------------------
After Jaeckel, "Implied Normal Volatility" (Wilmott, 2017) in outline -- a rational
initial guess in the two regions of the normalised time value and one Householder step
of order 3 -- with our own coordinates, fits and objective:

1. The time value tv = P/D - max(cp x, 0) is formed exactly (error-free transformations,
   ``implied.exact_time_value``); there is no upper bound (V grows without limit in s).
2. With u = |x| / s > 0 and v = tv / |x|, the problem is psi(u) = v for
   psi(u) = phi(u)/u - Phi(-u) = e^{-z^2} h(z) / (2z), z = u/sqrt2, decreasing from +inf
   to 0.  (x = 0: s = sqrt(2 pi) tv, exactly the at-the-money price.)
3. Initial guess (tests/fit_bachelier.py, rational fits with mpmath, <= 4.3e-7 relative):
   for v >= psi(2) (core) u = w Rc(w^2), w = 1/(v + 1/2) (psi ~ 1/(sqrt(2 pi) u) - 1/2);
   below (wing) u = eta Rw(eta), eta = sqrt(-ln v) (u ~ sqrt2 eta as v -> 0).
4. One Householder step of order 3 (fourth-order convergence: 4e-7 -> ~1e-25) in u on
   ln psi(u) = ln v.  Its residual is computed as ln(v 2z / h(z)) + z^2 -- one logarithm,
   no exponential and no cancellation beyond a rounding of z^2 -- and its derivatives in
   closed form through w = u sqrt(pi) h(z) = u^2 psi / phi: (ln psi)' = -1/w,
   psi''/psi = (u^2 + 2)/(u w), psi'''/psi = -(u^2 + 3 + 6/u^2)/w.
5. u below 2^-27 (near the money, psi huge): s = sqrt(2 pi) (tv + |x|/2), the first terms
   of the expansion of psi, exact to double precision there.
Fixed cost, no loop, no branch: every row runs the same straight-line code.

Accuracy (tests/test_bachelier.py against mpmath): a few ulps times the problem's condition
number, for the price max(1, e_F + e_K + e_s), for the implied vol (1 + e_F + e_K) / e_s.

Greeks (against F; D held fixed, r = -ln(D)/T; n = phi(d), N = Phi(cp d)):

    delta  D cp N            gamma  D n / s              vega   D sqrt(T) n
    theta  r V - D n sigma / (2 sqrt(T))                 rho    -T V
    vanna  -D n d / sigma    volga  vega d^2 / sigma     ultima vega d^2 (d^2 - 3) / sigma^2
    charm  r delta + D n d / (2T)                        veta   r vega - vega (1 + d^2) / (2T)
    speed  -gamma d / s      zomma  gamma (d^2 - 1) / sigma
    color  gamma (r + (1 - d^2) / (2T))
    dual_delta -delta        dual_gamma gamma            (div_rho: not defined, NaN)

Units: as Black-76's, with vega and the other derivatives in sigma per 1.00 of normal vol
(price units per year^1/2).  At s = 0 the Greeks are the limits, as in kernel/greeks.py:
away from the strike those of the discounted intrinsic value, at x = 0 exactly delta =
cp D / 2, vega = D sqrt(T) / sqrt(2 pi), and gamma, speed (0), zomma (-inf), color,
dual_gamma infinite.
"""

import math

import numpy as np
from numba import prange

from . import greeks as _greeks
from . import quotes as _quotes
from . import status as S
from . import sweep as _sweep
from . import _args
from ._jit import BLOCK, loop, rows, scalar
from .black import checked_status
from .implied import exact_time_value
from .special import (INF, INV_SQRT2PI, LN2, NAN, SQRT1_2, SQRT2PI, SQRT_PI_2, erfcx_pos,
                      exp, exp_mul, log)
from ._intrinsics import fma

_SQRT_PI = 1.7724538509055159
_Z_BIG = 1e8                  # h(z) = 1/(2 sqrt(pi) z^2) beyond (P/Q's powers overflow)
_D_MAX = 38.6                 # e^{-d^2/2} < 2^-1074 beyond: the time value is 0

# h(z) = 1/sqrt(pi) - z erfcx(z) ~ P(z)/Q(z), degree 11/13, all coefficients positive
# (tests/fit_bachelier.py; 1.2e-17 relative for the exact coefficients on [0, 1.5e8])
_HP = (0.5641895835477563,
       1.2293574977802437,
       1.3518754774291368,
       0.9732726737812903,
       0.5048084016225955,
       0.19697838636780052,
       0.05885256491304032,
       0.013461281347370032,
       0.0023149258090372285,
       0.00028644158490651175,
       2.315303586173926e-05,
       9.410609240603235e-07)
_HQ = (1.0,
       3.9514332819856786,
       7.3998700331657385,
       8.710596322043994,
       7.204539327700949,
       4.4312332833950485,
       2.090561149689434,
       0.7683430994031134,
       0.2208130950579087,
       0.04923710943414067,
       0.008329311392295898,
       0.001020412941630423,
       8.20753751465865e-05,
       3.3359741175748473e-06)

# Initial guesses of the implied vol (tests/fit_bachelier.py, guess-grade):
# core u = w Rc(w^2), w = 1/(v + 1/2), 3.3e-7; wing u = eta Rw(eta), eta = sqrt(-ln v),
# 4.3e-7 (fitted for u in [2, 60]).  The regions meet at u = 2, v = psi(2).
_LN_V_SPLIT = -5.4619307044770595       # ln psi(2)
_CP = (0.39894233052667716, -0.34388605143982465, 0.11148438251046104,
       -0.01643879300010922, 0.0010215467318426558, -1.6187388330533355e-05)
_CQ = (1.0, -0.9415687484815322, 0.34275772256963893, -0.05957064655652838,
       0.004839161434984756, -0.00014077015013327929)
_WP = (1.648959609676157, -2.7171895663663626, 1.6012888331233535, -0.1446677639527624,
       -0.13391011669796563, -0.003579229787550254)
_WQ = (1.0, -1.1443515046584887, 0.707604960919525, -0.12376299912763519,
       -0.09470707206117047, -0.002530923328717535)
_U_SMALL = 2.0 ** -27         # below: s = sqrt(2 pi) (tv + |x|/2) is exact
_LN_UP = 200.0 * LN2          # premiums below 2^-800 come scaled by 2^200
_V_UNSCALE = 2.0 ** -600      # a scaled v above this is unscaled exactly


@scalar
def h_scaled(z):
    """h(z) = 1/sqrt(pi) - z erfcx(z) for z >= 0, without cancellation (see above);
    h(inf) = 0, NaN -> NaN."""
    big = z > _Z_BIG
    y = 0.0 if big else z
    num = _HP[11] * y + _HP[10]
    num = num * y + _HP[9]
    num = num * y + _HP[8]
    num = num * y + _HP[7]
    num = num * y + _HP[6]
    num = num * y + _HP[5]
    num = num * y + _HP[4]
    num = num * y + _HP[3]
    num = num * y + _HP[2]
    num = num * y + _HP[1]
    num = num * y + _HP[0]
    den = _HQ[13] * y + _HQ[12]
    den = den * y + _HQ[11]
    den = den * y + _HQ[10]
    den = den * y + _HQ[9]
    den = den * y + _HQ[8]
    den = den * y + _HQ[7]
    den = den * y + _HQ[6]
    den = den * y + _HQ[5]
    den = den * y + _HQ[4]
    den = den * y + _HQ[3]
    den = den * y + _HQ[2]
    den = den * y + _HQ[1]
    den = den * y + _HQ[0]
    num = (0.5 / _SQRT_PI) if big else num
    den = z * z if big else den
    return num / den


@scalar
def time_value(ax, s):
    """Undiscounted time value s e^{-d^2/2} h(d/sqrt2) / sqrt2 of the out-of-the-money
    option, ax = |F - K| >= 0, s > 0 (d = ax / s may be +inf: 0)."""
    d = ax / s
    d = _D_MAX if d > _D_MAX else d
    hi = d * d
    lo = fma(d, d, -hi)                              # d^2 = hi + lo exactly
    m = (s * SQRT1_2) * h_scaled(d * SQRT1_2)
    return exp_mul(-0.5 * hi, m * (1.0 - 0.5 * lo))


@scalar
def bachelier_price(x, s, D, cp):
    """Discounted Bachelier price, x = F - K finite, s >= 0, cp = +-1."""
    ss = s if s > 0.0 else 1.0
    tv = time_value(abs(x), ss)
    tv = tv if s > 0.0 else 0.0
    return D * (max(cp * x, 0.0) + tv)


@scalar
def bachelier_inputs(F, K, T, D, vol, cp):
    """One row: (status, x = F - K).  F and K may have any finite value; an F - K that is
    not a finite double is out_of_range."""
    st = checked_status(F, K, T, D, vol, cp, 0.0, S.OK, S.OK)
    x = F - K
    return (S.OUT_OF_RANGE if (st == S.OK and not (abs(x) < INF)) else st), x


# ------------------------------------------------------------------ implied normal vol

@scalar
def _guess(v, lt):
    """u within ~4.3e-7 of psi^{-1}(v), v = e^lt (v may be a scaled value: lt is exact)."""
    w = 1.0 / (v + 0.5)
    X = w * w
    pc = _CP[0] + X * (_CP[1] + X * (_CP[2] + X * (_CP[3] + X * (_CP[4] + X * _CP[5]))))
    qc = _CQ[0] + X * (_CQ[1] + X * (_CQ[2] + X * (_CQ[3] + X * (_CQ[4] + X * _CQ[5]))))
    eta = math.sqrt(max(-lt, 0.0))
    pw = _WP[0] + eta * (_WP[1] + eta * (_WP[2] + eta * (_WP[3] + eta * (_WP[4]
                                                                          + eta * _WP[5]))))
    qw = _WQ[0] + eta * (_WQ[1] + eta * (_WQ[2] + eta * (_WQ[3] + eta * (_WQ[4]
                                                                          + eta * _WQ[5]))))
    core = lt >= _LN_V_SPLIT
    return (w if core else eta) * (pc if core else pw) / (qc if core else qw)


@scalar
def _householder(u, vs, lsc):
    """One Householder step of order 3 in u on ln psi(u) = ln vs - lsc (see above)."""
    z = u * SQRT1_2
    hz = h_scaled(z)
    # residual ln v - ln psi(u) = ln(v 2z / h) + z^2, without cancellation
    delta = log(vs * (2.0 * z) / hz) - lsc + z * z
    w = u * _SQRT_PI * hz
    r = 1.0 / (u * w)                               # one division for 1/u and 1/w
    iu = w * r
    iw = u * r
    u2 = u * u
    h2 = iw - (u2 + 2.0) * iu                       # (ln psi)'' / (ln psi)'
    h3 = u2 + 3.0 + 6.0 * iu * iu - 3.0 * (u2 + 2.0) * iu * iw + 2.0 * iw * iw
    nu = -delta * w                                 # the Newton step
    du = nu * (1.0 + 0.5 * h2 * nu) / (1.0 + nu * (h2 + h3 * nu * (1.0 / 6.0)))
    return u + du


@scalar
def bachelier_implied_vol(P, F, K, T, D, cp):
    """(sigma, status) of one quote with valid inputs (F - K finite, T > 0, D > 0,
    cp = +-1); sigma = s / sqrt(T) with s the total normal vol."""
    call = cp > 0.0
    tvs, small = exact_time_value(P, F if call else K, K if call else F, D)
    x = F - K
    ax = abs(x)
    vs = tvs / ax
    unscale = small and vs > _V_UNSCALE       # v = vs 2^-200 >= 2^-800: exact, normal
    vs = vs * 2.0 ** -200 if unscale else vs
    lsc = _LN_UP if (small and not unscale) else 0.0
    lt = log(vs) - lsc
    u0 = _guess(vs, lt)
    u = _householder(u0 if u0 > _U_SMALL else 1.0, vs, lsc)
    tv = tvs * 2.0 ** -200 if small else tvs
    sqT = math.sqrt(T)
    near = u0 <= _U_SMALL
    # sigma = |x| / (u sqrt(T)), or the near-the-money form: one division for either
    sig = (SQRT2PI * (tv + 0.5 * ax) if near else ax) / (sqT if near else u * sqT)
    st = S.NO_TIME_VALUE if not (tvs > 0.0) else S.OK
    st = S.PREMIUM_TOO_LOW if (tvs < 0.0 or P < 0.0) else st
    st = S.NON_FINITE_INPUT if abs(P) == INF else st
    st = S.MISSING_INPUT if P != P else st
    return sig, st


# ------------------------------------------------------------------ Greeks

@scalar
def bachelier_greeks(x, T, D, vol, cp):
    """All Greeks (tuple in ``greeks.GREEK_NAMES`` order, div_rho NaN) for valid inputs:
    x = F - K finite, T > 0, D > 0, vol >= 0 finite, cp = +-1.0."""
    sqT = math.sqrt(T)
    s = vol * sqT
    pos = s > 0.0
    atm = x == 0.0
    live = pos or atm
    inv_s0 = 1.0 / s
    d = x * inv_s0 if pos else 0.0
    ad = abs(d)
    adc = _D_MAX if ad > _D_MAX else ad
    hi = adc * adc
    n = INV_SQRT2PI * exp(-0.5 * hi) * (1.0 - 0.5 * fma(adc, adc, -hi))
    n = n if live else 0.0                          # phi(d)
    c = SQRT_PI_2 * n * erfcx_pos(ad * SQRT1_2)     # Phi(-|d|)
    N = c if cp * x <= 0.0 else 1.0 - c             # Phi(cp d) (1/2 at the strike)
    tv = (s * _SQRT_PI) * n * h_scaled(ad * SQRT1_2)
    V = D * (max(cp * x, 0.0) + (tv if pos else 0.0))
    inv_s = inv_s0 if live else 0.0                 # +inf at the strike with s == 0
    ds = d * inv_s0 if pos else 0.0                 # d / s
    iT = 1.0 / T
    r = -log(D) * iT
    Dn = D * n
    delta = cp * D * N
    gamma = Dn * inv_s
    vega = Dn * sqT
    theta = r * V - 0.5 * Dn * vol / sqT
    rho = -T * V
    vanna = -Dn * ds * sqT
    volga = vega * d * ds * sqT
    charm = fma(r, delta, 0.5 * Dn * d * iT)
    veta = vega * (r - (1.0 + d * d) * (0.5 * iT))
    speed = -gamma * ds if d != 0.0 else 0.0        # 0 at the strike, also as s -> 0
    zomma = gamma * (d * d - 1.0) * sqT * inv_s
    color = gamma * (r + (1.0 - d * d) * (0.5 * iT))
    ultima = vega * (ds * ds) * T * (d * d - 3.0)
    return (delta, gamma, vega, theta, rho, NAN, vanna, volga, charm, veta, speed, zomma,
            color, ultima, -delta, gamma)


# ------------------------------------------------------------------ loops

@rows
def _price_rows(a, e, F, K, T, D, vol, cp, price, status):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        tt = T[i]
        v = vol[i]
        st, x = bachelier_inputs(F[i], K[i], tt, D[i], v, cp[i])
        ok = st == S.OK
        s = v * math.sqrt(tt if tt > 0.0 else 0.0)
        p = bachelier_price(x if ok else 0.0, s if ok else 1.0, D[i], float(cp[i]))
        st = S.OUT_OF_RANGE if (ok and not (abs(p) < INF)) else st      # overflow
        price[i] = p if st == S.OK else NAN
        status[i] = st


@rows
def _iv_rows(a, e, premium, F, K, T, D, cp, iv_out, status_out):
    for i in range(np.uint64(a), np.uint64(e)):
        tt = T[i]
        dd = D[i]
        st, x = bachelier_inputs(F[i], K[i], tt, dd, 0.0, cp[i])
        ok = st == S.OK
        v, st2 = bachelier_implied_vol(premium[i], F[i] if ok else 1.0,
                                       K[i] if ok else 0.0, tt if ok else 1.0,
                                       dd if ok else 1.0, float(cp[i]) if ok else 1.0)
        st = st2 if ok else st
        st = S.OUT_OF_RANGE if (st == S.OK and not (v < INF)) else st   # overflow
        iv_out[i] = v if st == S.OK else NAN
        status_out[i] = st


def _greeks_rows_template(a, e, F, K, T, D, vol, cp, out, status):
    # copied per mask by greeks.mask_loops with SLOTS as a frozen global
    for i in range(np.uint64(a), np.uint64(e)):
        tt = T[i]
        dd = D[i]
        v = vol[i]
        st, x = bachelier_inputs(F[i], K[i], tt, dd, v, cp[i])
        ok = st == S.OK
        g = bachelier_greeks(x if ok else 0.0, tt if ok else 1.0, dd if ok else 1.0,
                             v if ok else 0.2, float(cp[i]))
        flag = _greeks._store(out, i, g, ok, SLOTS)  # noqa: F821
        status[i] = st + (S.NONFINITE_GREEK_FLAG if flag else 0)


@loop
def _price_par(F, K, T, D, vol, cp, price, status):
    n = F.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), F, K, T, D, vol, cp, price, status)


@loop
def _iv_par(premium, F, K, T, D, cp, iv_out, status_out):
    n = F.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _iv_rows(b * BLOCK, min(n, (b + 1) * BLOCK), premium, F, K, T, D, cp, iv_out,
                 status_out)


# registered with kernel/greeks.py, so ``greeks._kernel("bachelier", mask)`` serves it too
_greeks._TEMPLATES["bachelier"] = (_greeks_rows_template, _greeks.par_template0)


def _greek_loops(mask):
    return _greeks._kernel("bachelier", mask)


# ------------------------------------------------------------------ entry points

def price(F, K, T, D, vol, cp, price, status):
    """Bachelier prices into ``price`` with a ``status`` per row.

    F, K (any sign), T (years), D (discount factor), vol (normal vol, price units per
    year^1/2): float64 arrays of one length n; cp: integer codes, +1 call, -1 put, 0
    missing; price (float64) and status (int8): preallocated.
    """
    F, K, T, D, vol = _args.floats(F, K, T, D, vol)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_price_rows, _price_par, n, F, K, T, D, vol, cp, price, status)


def implied_vol(premium, F, K, T, D, cp, iv_out, status_out):
    """Implied normal vols of premiums (price units per year^1/2); as ``black76_iv``."""
    premium, F, K, T, D = _args.floats(premium, F, K, T, D)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("status_out", status_out, (n,), np.int8)
    _args.run(_iv_rows, _iv_par, n, premium, F, K, T, D, cp, iv_out, status_out)


def greeks(F, K, T, D, vol, cp, mask, out, status):
    """Bachelier Greeks into ``out[n_requested, n]`` (against F; vega per 1.00 of normal
    vol); returns the number of ok rows with a requested Greek that is not finite."""
    mask, nsel = _greeks._check_mask(mask)
    F, K, T, D, vol = _args.floats(F, K, T, D, vol)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(*_greek_loops(mask), n, F, K, T, D, vol, cp, out, status)
    return _greeks.take_nonfinite_flags(status)


def sweep(premium, F, K, T, D, cp, mask, iv_out, out, status):
    """Implied normal vol of ``premium`` and the Greeks in ``mask`` at that vol, one pass."""
    premium, F, K, T, D = _args.floats(premium, F, K, T, D)
    return _sweep.run("bachelier", _iv_rows, _greek_loops, premium, (F, K, T, D), cp, mask,
                      iv_out, out, status)


def bid_ask(bid, ask, F, K, T, D, cp, mask, iv_bid, iv_ask, iv, unc, out,
                      status_bid, status_ask, status):
    """Bachelier version of ``quotes.black76_bid_ask`` (normal vols)."""
    bid, ask, F, K, T, D = _args.floats(bid, ask, F, K, T, D)
    return _quotes.run("bachelier", _iv_rows, _greek_loops, bid, ask, (F, K, T, D), cp, mask,
                       (iv_bid, iv_ask, iv, unc, out, status_bid, status_ask, status))
