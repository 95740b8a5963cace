"""American exercise under Black-Scholes-Merton (spot, rate, continuous dividend yield):
prices, implied vols and Greeks with fixed work per row.

Method: Andersen, Lake & Offengenden, "High-performance American option pricing" (Journal
of Computational Finance, 2016).  For a put with r > 0 the early-exercise premium is

    V(T, S) = v(T, S) + int_0^T [ r K e^{-r s} Phi(-d-(s, S/B(T-s)))
                                 - q S e^{-q s} Phi(-d+(s, S/B(T-s))) ] ds,

v the European put, d+-(s, z) = (ln z + (r - q) s +- sigma^2 s / 2) / (sigma sqrt s), and
B(tau) the exercise boundary at time to expiry tau, the solution of the integral equation
B = K e^{-(r-q) tau} N'(tau, B) / D'(tau, B) in the paper's "FP-B'" form (value matching
combined with smooth pasting):

    N' = phi(d-(tau, B/K)) / (sigma sqrt tau)
         + r int_0^tau e^{r u} phi(d-(tau-u, B(tau)/B(u))) / (sigma sqrt(tau-u)) du
    D' = phi(d+(tau, B/K)) / (sigma sqrt tau) + Phi(d+(tau, B/K))
         + q int_0^tau e^{q u} [Phi(d+(.)) + phi(d+(.)) / (sigma sqrt(tau-u))] du.

As in the paper, the boundary is represented by H(sqrt tau) = ln(B(tau)/X)^2, X = B(0+) =
K min(1, r/q), interpolated by a Chebyshev polynomial in sqrt(tau) on n + 1
Chebyshev-Lobatto nodes (collocation), and improved by m fixed-point sweeps (all nodes
from the previous sweep's interpolant).  Where r T / sigma^2 > 4 (low vol, high rate,
long expiry) the FP-B' sweeps stop contracting (measured against a finite-difference
reference: errors of 1e-3 and more at 5 years); there the value-matching form alone
("FP-A" in the paper) is used, with 2m sweeps.  Our own choices (not the paper's):

* Quadrature.  Every integral over [0, tau] is taken in the angle theta of
  u = tau cos^2 theta, tau - u = tau sin^2 theta, by Gauss-Legendre on [0, pi/2]: both
  sqrt(u) (where the boundary is smooth) and sqrt(tau - u) (where the kernels are smooth)
  are then smooth functions of theta, and the 1/sqrt(tau - u) of the kernels cancels
  against du.  The same for the price integral (p nodes).  The quadrature points, in units
  of the option's own T, do not depend on the row, so the interpolation of H at every
  point is one constant matrix times the node values (``_setting``).
* Initial boundary: Bjerksund & Stensland's (1993) exercise trigger of the symmetric call,
  mapped to the put by McDonald-Schroder symmetry (B_put = K^2 / B_call).
* Calls by put-call symmetry (McDonald & Schroder 1998): C(S, K, r, q) = P(K, S, q, r),
  applied to the early-exercise premium only; the European part is always priced from
  the row's own inputs (kernel/black.py), so a row without early exercise gets the
  European kernel's formula.
* No early exercise where it is never optimal: a put with r <= 0 and q >= r, a call with
  q <= 0 and r >= q: the European price.  A put with q < r <= 0 (a call with
  r < q <= 0) has two exercise boundaries (Battauz, De Donno & Sbuelz 2015), outside
  this method: status ``out_of_range``.
* Zero vol: the deterministic value max_t (K e^{-rt} - S e^{-qt})^+ in closed form.
* Deep in the money (the spot at or beyond the boundary at T): the exercise value.

Settings (``SETTINGS``): ``accurate`` (n, l, m, p) = (20, 16, 8, 48) and ``fast``
(8, 8, 5, 24): n Chebyshev intervals, l Gauss-Legendre nodes per boundary integral, m
fixed-point sweeps, p nodes for the price integral.  Their measured errors are in
tests/test_american.py and benchmarks/RESULTS.md.

Greeks (delta, gamma, vega, theta, rho, div_rho): delta and gamma analytic, from the price
integral differentiated under the integral sign with the boundary held fixed (the boundary
does not depend on the spot); theta from the Black-Scholes equation in the continuation
region (theta = r V - (r - q) S delta - sigma^2 S^2 gamma / 2; 0 in the exercise region);
vega, rho and div_rho by central differences of the whole price (boundary recomputed) with
steps ``_H_VOL``, ``_H_RATE`` (absolute, per 1.00).

Implied vol: the European implied vol of the premium (kernel/implied.py) bounds the
American one from above (the American price is at least the European at every vol); from
there a Newton step with the European vega, then secant steps on the American price:
nine evaluations at the fast setting (with a defect correction by the accurate price)
and two at the accurate one, fixed work per row.

Scalar use (scenario revaluation, other jitted code): ``american_bsm_price`` below is a
plain numba function of one row's numbers (it allocates its small work arrays itself).
"""

import math

import numba
import numpy as np
from numba import prange

from . import _args
from . import greeks as _greeks
from . import quotes as _quotes
from . import status as S
from ._jit import BLOCK, FASTMATH, loop, rows, scalar
from .black import _is_nan, black_price, bsm_inputs
from .implied import black_total_vol
from .special import INF, INV_SQRT2PI, NAN, SQRT1_2, erfcx_pos, exp, log

# The status of a put with q < r <= 0 (a call with r < q <= 0): two exercise boundaries,
# outside the method.  An existing code (status.py is imported by every kernel module, so a
# new code there recompiles them all); README's status table says so.
TWO_BOUNDARIES = S.OUT_OF_RANGE

_FPA_FROM = 4.0      # r T / sigma^2 above which the boundary uses FP-A (see _boundary)
_H_VOL = 1e-4        # central-difference steps of vega, rho, div_rho (per 1.00)
_H_RATE = 1e-4

AMERICAN_GREEKS = ("delta", "gamma", "vega", "theta", "rho", "div_rho")


def _fn(f):
    """A plain (called, not inlined) numba function with the kernels' numeric flags: the
    American row is far too large to inline into every loop (``_jit.scalar``)."""
    return numba.njit(error_model="numpy", fastmath=set(FASTMATH), cache=True,
                      nogil=True)(f)


# ------------------------------------------------------------------ settings

def _setting(n, l, m, p):
    """The constants of one setting: interpolation matrices and quadrature weights in units
    of the option's own T (row-independent), and (m, n, l, p)."""
    y, w = np.polynomial.legendre.leggauss(l)
    j = np.arange(n + 1)
    c = ((1.0 + np.cos(j * np.pi / n)) / 2.0) ** 2       # tau_j / T, tau_0 = T, tau_n = 0
    C = np.empty((n + 1, n + 1))                         # node values -> coefficients
    for k in range(n + 1):
        wj = np.where((j == 0) | (j == n), 0.5, 1.0)
        C[k] = 2.0 / n * wj * np.cos(j * k * np.pi / n)
    C[0] *= 0.5
    C[n] *= 0.5

    def interp(xi):          # xi = sqrt(u / T) in [0, 1] -> rows of the interpolation
        z = np.clip(2.0 * xi - 1.0, -1.0, 1.0)
        return np.cos(np.outer(np.arccos(z), np.arange(n + 1))) @ C

    th = np.pi / 4.0 * (1.0 + y)                         # Gauss-Legendre on [0, pi/2]
    wt = w * np.pi / 4.0
    sf = np.outer(c[:n], np.sin(th) ** 2)                # (tau_i - u) / T
    uf = np.outer(c[:n], np.cos(th) ** 2)                # u / T
    wa = np.outer(c[:n], 2.0 * wt * np.sin(th) * np.cos(th))          # du / T
    wb = np.outer(np.sqrt(c[:n]), 2.0 * wt * np.cos(th))              # du / sqrt(T (tau-u))
    M = interp(np.sqrt(uf.ravel()))
    yp, wp = np.polynomial.legendre.leggauss(p)
    thp = np.pi / 4.0 * (1.0 + yp)
    ps = np.sin(thp) ** 2                                # s / T
    pw = wp * np.pi / 4.0 * 2.0 * np.sin(thp) * np.cos(thp)           # ds / T
    pb = wp * np.pi / 4.0 * 2.0 * np.cos(thp)                         # ds / sqrt(T s)
    P = interp(np.sqrt(1.0 - ps))
    assert p <= n * l, "the price integral reuses a work row of n * l"
    f = np.ascontiguousarray
    return (f(M.T), f(P.T), f(sf.ravel()), f(uf.ravel()), f(wa.ravel()), f(wb.ravel()),
            f(c), f(ps), f(pw), f(pb), np.array([m, n, l, p], np.int64))


# (n, l, m, p); see the module docstring
# l a multiple of 8: the loops over a node's quadrature points vectorise without a scalar
# remainder (l = 20 ran 1.7x slower than l = 16 at the same accuracy)
SETTING_SIZES = {"accurate": (20, 16, 8, 48), "fast": (8, 8, 5, 24)}
SETTINGS = {name: _setting(*size) for name, size in SETTING_SIZES.items()}


def setting(name):
    """The constants of setting ``name`` ("accurate" or "fast")."""
    try:
        return SETTINGS[name]
    except KeyError:
        raise ValueError(f"unknown setting {name!r}; expected one of "
                         f"{', '.join(SETTINGS)}") from None


def work_arrays(st):
    """Scratch for one row at a time of setting ``st``: (H, work)."""
    n, l = int(st[10][1]), int(st[10][2])
    return np.empty(n + 1), np.empty((_WORK_ROWS, n * l))


# ------------------------------------------------------------------ the put

_WORK_ROWS = 9       # rows of the per-row work array (see _boundary)

@scalar
def _phis(d):
    """(phi(d), Phi(d)) with one exponential (Phi through erfcx, accurate in both tails)."""
    e = exp(-0.5 * d * d)
    half = 0.5 * erfcx_pos(abs(d) * SQRT1_2) * e
    return INV_SQRT2PI * e, (half if d < 0.0 else 1.0 - half)


@_fn
def _boundary(K, T, r, q, v, st, H, w):
    """H[j] = ln(B(tau_j)/X)^2 at the nodes of setting ``st``, for a put with r > 0, v > 0;
    returns ln X."""
    M, _, sf, uf, wa, wb, c, _, _, _, ints = st
    m = ints[0]
    n = ints[1]
    l = ints[2]
    X = K if q <= r else K * (r / q)
    lnX = log(X)
    lnK = log(K)
    v2 = v * v
    # FP-B' converges fastest, but its sweeps stop contracting when r T / sigma^2 is large
    # (low vol, high rate, long expiry: measured, the price drifts away from a
    # finite-difference reference beyond about 4); there the value-matching form alone
    # ("FP-A" in the paper) is used, with twice the sweeps
    form_a = r * T > _FPA_FROM * v2
    # Bjerksund-Stensland (1993) trigger of the symmetric call (rate q, yield r), as a put
    # boundary K^2 / I; any guess below X converges, this one in fewer sweeps
    b = q - r
    beta = 0.5 - b / v2 + math.sqrt(max((b / v2 - 0.5) ** 2 + 2.0 * q / v2, 0.0))
    binf = K * beta / (beta - 1.0) if beta > 1.0 else 1e300
    b0 = K * max(1.0, q / r)
    for i in range(n):
        tau = c[i] * T
        h = -(b * tau + 2.0 * v * math.sqrt(tau)) * b0 / (binf - b0)
        trig = b0 + (binf - b0) * (1.0 - exp(h))
        lb = min(2.0 * lnK - log(trig) - lnX, 0.0)
        H[i] = lb * lb
    H[n] = 0.0
    nl = n * l
    Hq = w[0]
    eru = w[1]
    equ = w[2]
    ivs = w[3]
    vs = w[4]
    dr = w[5]
    sT = math.sqrt(T)
    for j in range(nl):
        s = sf[j] * T
        u = uf[j] * T
        eru[j] = exp(r * u) * (wa[j] if form_a else wb[j])
        equ[j] = exp(q * u)
        sq = v * math.sqrt(s)
        vs[j] = sq
        ivs[j] = 1.0 / sq if sq > 0.0 else 0.0
        dr[j] = (r - q) * s
    tn = w[6]
    ta = w[7]
    tb = w[8]
    for _ in range(m * (2 if form_a else 1)):
        # Hq = sqrt(H interpolated at every quadrature point): M^T is stored, so the inner
        # loops run along contiguous rows without a reduction (they vectorise)
        for j in range(nl):
            Hq[j] = 0.0
        for k in range(n + 1):
            hk = H[k]
            for j in range(nl):
                Hq[j] += M[k, j] * hk
        for j in range(nl):
            Hq[j] = math.sqrt(max(Hq[j], 0.0))
        for i in range(n):
            tau = c[i] * T
            rh = math.sqrt(H[i])
            o = i * l
            if form_a:
                for k in range(l):                # value matching alone ("FP-A")
                    j = o + k
                    lnz = Hq[j] - rh
                    dp = (lnz + dr[j] + 0.5 * vs[j] * vs[j]) * ivs[j]
                    _, cdp = _phis(dp)
                    _, cdm = _phis(dp - vs[j])
                    tn[k] = eru[j] * cdm
                    ta[k] = wa[j] * equ[j] * cdp
                    tb[k] = 0.0
            else:
                for k in range(l):                # terms stored, summed below: vectorises
                    j = o + k
                    lnz = Hq[j] - rh              # ln B(tau_i) - ln B(u)
                    dp = (lnz + dr[j] + 0.5 * vs[j] * vs[j]) * ivs[j]
                    php, cdp = _phis(dp)
                    # phi(d-) = phi(d+) z e^{(r-q)s}
                    tn[k] = eru[j] * php * exp(lnz + dr[j])
                    ta[k] = wa[j] * equ[j] * cdp
                    tb[k] = wb[j] * equ[j] * php
            nsum = 0.0
            dsa = 0.0
            dsb = 0.0
            for k in range(l):
                nsum += tn[k]
                dsa += ta[k]
                dsb += tb[k]
            st0 = v * math.sqrt(tau)
            dp0 = (lnX - rh - lnK + (r - q) * tau) / st0 + 0.5 * st0
            ph0p, cd0p = _phis(dp0)
            ph0m = ph0p * exp(lnX - rh - lnK + (r - q) * tau)
            num = ph0m / st0 + r * (sT / v) * nsum
            den = ph0p / st0 + cd0p + q * (T * dsa + (sT / v) * dsb)
            _, cd0m = _phis(dp0 - st0)
            num = (cd0m + r * T * nsum) if form_a else num
            den = (cd0p + q * T * dsa) if form_a else den
            lb = min(log(K / X * num / den) - (r - q) * tau, 0.0)
            lb = lb if lb == lb else 0.0
            H[i] = lb * lb
    return lnX


@_fn
def _put_premium(S, K, T, r, q, v, st, H, w):
    """(premium, dpremium/dS, d2premium/dS2, exercised) of a put with r > 0, v > 0: the
    early-exercise premium over the European put with the boundary held fixed; exercised:
    the spot is at or below the boundary at T (the put is worth K - S)."""
    lnX = _boundary(K, T, r, q, v, st, H, w)
    P = st[1]
    ps = st[7]
    pw = st[8]
    pb = st[9]
    n = st[10][1]
    p = st[10][3]
    lnS = log(S)
    lnBT = lnX - math.sqrt(H[0])
    ex = lnS <= lnBT
    prem = 0.0
    da = 0.0
    db = 0.0
    d2 = 0.0
    sT = math.sqrt(T)
    hp = w[0]
    for k in range(p):
        hp[k] = 0.0
    for jj in range(n + 1):
        hj = H[jj]
        for k in range(p):
            hp[k] += P[jj, k] * hj
    for k in range(p):
        lnB = lnX - math.sqrt(max(hp[k], 0.0))
        s = ps[k] * T
        sq = v * math.sqrt(s)
        x = lnS - lnB + (r - q) * s
        dp = x / sq + 0.5 * sq
        dm = dp - sq
        php, cdp = _phis(-dp)        # Phi(-d+)
        _, cdm = _phis(-dm)          # Phi(-d-)
        er = exp(-r * s)
        eq = exp(-q * s)
        prem += pw[k] * (r * K * er * cdm - q * S * eq * cdp)
        # with phi(d-) B e^{-rs} = phi(d+) S e^{-qs}:
        # d/dS = -q e^{-qs} Phi(-d+) + e^{-qs} phi(d+) (q - r K/B) / (sigma sqrt s)
        B = exp(lnB)
        g = eq * php * (q - r * K / B)
        da -= pw[k] * q * eq * cdp
        db += pb[k] * g
        # d2/dS2 = [q e^{-qs} phi(d+) - g d+ / (sigma sqrt s)] / (sigma sqrt s S)
        d2 += pb[k] * (q * eq * php - g * dp / sq)
    return prem * T, T * da + sT / v * db, sT / v * d2 / S, ex


@_fn
def _deterministic(S, K, T, r, q, cp):
    """The zero-vol American value, max over exercise times t in [0, T] of the discounted
    payoff of the forward path: put max(K e^{-rt} - S e^{-qt}); a call by symmetry."""
    a = S if cp > 0.0 else K      # the asset received (call: the stock) ...
    b = K if cp > 0.0 else S      # ... and paid
    ya = q if cp > 0.0 else r     # its yield
    yb = r if cp > 0.0 else q
    # f(t) = a e^{-ya t} - b e^{-yb t}; f'(t) = 0 at e^{(yb - ya) t} = yb b / (ya a)
    best = max(a - b, a * exp(-ya * T) - b * exp(-yb * T), 0.0)
    ratio = (yb * b) / (ya * a)
    ts = log(ratio) / (yb - ya) if (ratio > 0.0 and ya != yb) else -1.0
    ts = ts if ts == ts else -1.0
    val = a * exp(-ya * ts) - b * exp(-yb * ts)
    return max(best, val) if (ts > 0.0 and ts < T) else best


@_fn
def _no_early(r, q, cp):
    """Early exercise never optimal: a put with r <= 0 and q >= r; a call with q <= 0
    and r >= q."""
    rr = r if cp < 0.0 else q
    qq = q if cp < 0.0 else r
    return rr <= 0.0 and qq >= rr


@_fn
def _double(r, q, cp):
    rr = r if cp < 0.0 else q
    qq = q if cp < 0.0 else r
    return rr <= 0.0 and qq < rr


@_fn
def american_value(S, K, T, r, q, v, cp, st, H, w):
    """(price, delta, gamma, exercised) of one American BSM option with valid inputs
    (S, K, T > 0, v >= 0, cp = +-1, r and q finite, not the two-boundary case), in setting
    ``st`` with work arrays (H, w) of ``work_arrays``.  Delta and gamma are NaN at zero
    vol."""
    D = exp(-r * T)
    dq = exp(-q * T)
    F = S * dq / D
    s = v * math.sqrt(T)
    eu = black_price(F, K, s, D, cp)
    sd = s if s > 0.0 else 1.0
    d1 = log(F / K) / sd + 0.5 * sd
    ph1, cd1 = _phis(cp * d1)
    e_delta = cp * dq * cd1
    e_gamma = dq * INV_SQRT2PI * exp(-0.5 * d1 * d1) / (S * sd)
    if _no_early(r, q, cp):
        return eu, e_delta, e_gamma, False
    if not (v > 0.0):
        return max(_deterministic(S, K, T, r, q, cp), eu), NAN, NAN, False
    if cp < 0.0:
        pr, pd, pg, ex = _put_premium(S, K, T, r, q, v, st, H, w)
        delta = e_delta + pd
        gamma = e_gamma + pg
    else:
        # C(S, K, r, q) = P(K, S, q, r); the premium is homogeneous of degree 1 in (S, K):
        # d/dS of P(K, S) = (P - K dP/dK') / S, d2/dS2 = P'' K^2 / S^2
        pr, pd, pg, ex = _put_premium(K, S, T, q, r, v, st, H, w)
        delta = e_delta + (pr - K * pd) / S
        gamma = e_gamma + pg * (K / S) * (K / S)
    intrinsic = max(cp * (S - K), 0.0)
    price = eu + pr
    price = intrinsic if ex else max(price, intrinsic)
    delta = cp if ex else delta
    gamma = 0.0 if ex else gamma
    return price, delta, gamma, ex


@_fn
def american_price_row(S, K, T, r, q, v, cp, st, H, w):
    """The American BSM price of one row (valid inputs, see ``american_value``)."""
    return american_value(S, K, T, r, q, v, cp, st, H, w)[0]


_ACCURATE = SETTINGS["accurate"]
_FAST = SETTINGS["fast"]


@_fn
def american_bsm_price(S, K, T, r, q, vol, cp):
    """One American BSM price at the accurate setting, for scalar callers (scenario
    revaluation, other jitted code): spot S, strike K, T years, continuously compounded
    rate r and yield q, vol, cp = +1 call / -1 put.  Valid inputs are assumed (S, K, T > 0,
    vol >= 0); a two-boundary row (a put with q < r <= 0, a call with r < q <= 0) gives
    NaN.  Allocates its small work arrays per call."""
    st = _ACCURATE
    n = st[10][1]
    l = st[10][2]
    H = np.empty(n + 1)
    w = np.empty((_WORK_ROWS, n * l))
    if _double(r, q, cp):
        return NAN
    return american_value(S, K, T, r, q, vol, cp, st, H, w)[0]


# ------------------------------------------------------------------ implied vol

_IV_TOL = 1e-3      # accepted |price - premium| per time value before the last secant step


@_fn
def _step(xa, fa, xb, fb, slope_b, lo, hi, ftol):
    """The next iterate after xb: the secant through (xa, fa), (xb, fb), or ``slope_b``
    where the secant has no positive finite slope, kept inside (lo, hi) (else halfway to
    the bracket's end on the root's side); xb itself where |fb| <= ftol (converged)."""
    slope = (fb - fa) / (xb - xa)
    slope = slope if (slope > 0.0 and slope < INF) else slope_b
    x = xb - fb / slope
    x = x if (x > lo and x < hi) else 0.5 * (xb + (lo if fb > 0.0 else hi))
    return xb if abs(fb) <= ftol else x


@_fn
def _euro_vega(F, K, D, x, sT):
    """The European vega at vol x (a positive slope for the first steps)."""
    s = x * sT
    d = log(F / K) / s + 0.5 * s
    return F * D * INV_SQRT2PI * exp(-0.5 * d * d) * sT


_IV_MAX = 8.0        # vols above this are not searched (status out_of_range)
_TV_RESOLVED = 1e-4  # time value per premium below which an unresolved row is no_time_value
_IV_FAST_STEPS = 5   # secant steps on the fast setting's price before the final setting


@_fn
def american_iv(P, U, K, T, r, q, cp, F, D, st, stf, H, w):
    """(implied vol, status) of an American premium P (valid inputs, early exercise
    possible, not the two-boundary case); ``st`` the final setting, ``stf`` the fast one.

    The European implied vol of P bounds the American one from above.  From there: a
    Newton step with the European vega and secant steps on the fast-setting price
    (``_IV_FAST_STEPS`` evaluations in all, bracketed); then, with the difference of the
    two settings' prices there added to the fast price (defect correction), two more fast
    secant steps; then the price at ``st`` there and one Newton step with the secant's
    slope, and a secant step through those two final-setting points, accepted when the
    price at the point before it is within _IV_TOL of the time value (or 4e-9 of the
    premium, the price's own accuracy): the error of that last secant step is about the
    product of its two points' errors."""
    call = cp > 0.0
    if not (P == P):
        return NAN, S.MISSING_INPUT
    if abs(P) == INF:
        return NAN, S.NON_FINITE_INPUT
    lower = _deterministic(U, K, T, r, q, cp)
    upper = U if call else K
    if P < lower or P < 0.0:
        return NAN, S.PREMIUM_TOO_LOW
    if P >= upper:
        return NAN, S.PREMIUM_TOO_HIGH
    if P == lower:
        return NAN, S.NO_TIME_VALUE
    sT = math.sqrt(T)
    se, ste = black_total_vol(P, F, K, D, cp)
    x0 = min(se / sT if ste == S.OK else 1.0, _IV_MAX)
    f0 = american_price_row(U, K, T, r, q, x0, cp, stf, H, w) - P
    ftol = 1e-13 * P                 # a few ulps of the premium: converged
    for _ in range(2):               # without a European vol the start may be too low
        grow = ste != S.OK and f0 < 0.0 and x0 < _IV_MAX
        x0 = min(4.0 * x0, _IV_MAX) if grow else x0
        f0 = (american_price_row(U, K, T, r, q, x0, cp, stf, H, w) - P) if grow else f0
    lo = 0.0
    hi = x0 if f0 >= 0.0 else _IV_MAX
    # fast phase: a Newton step with the European vega, then secant steps (bracketed)
    xa = x0
    fa = f0
    xb = x0
    fb = f0
    slope = _euro_vega(F, K, D, x0, sT)
    for _ in range(_IV_FAST_STEPS):
        x = _step(xa, fa, xb, fb, slope, lo, hi, ftol)
        f = american_price_row(U, K, T, r, q, x, cp, stf, H, w) - P
        lo = x if f < 0.0 else lo
        hi = x if f > 0.0 else hi
        s_ab = (f - fb) / (x - xb)
        slope = s_ab if (s_ab > 0.0 and s_ab < INF) else slope
        xa = xb
        fa = fb
        xb = x
        fb = f
    x3 = _step(xa, fa, xb, fb, slope, lo, hi, ftol)
    # at the final setting: its root is within the fast setting's error of x3.  Defect
    # correction: the difference of the two settings' prices at x3 is added to the fast
    # price, whose root then moves to within (its slope in vol) x (x3's error) of the final
    # setting's, in two more fast secant steps
    g3 = american_price_row(U, K, T, r, q, x3, cp, st, H, w) - P
    defect = g3 - (american_price_row(U, K, T, r, q, x3, cp, stf, H, w) - P)
    lo = 0.0
    hi = _IV_MAX
    xa = x3
    fa = g3
    xb = x3
    fb = g3
    for _ in range(2):
        x = _step(xa, fa, xb, fb, slope, lo, hi, ftol)
        f = american_price_row(U, K, T, r, q, x, cp, stf, H, w) - P + defect
        lo = x if f < 0.0 else lo
        hi = x if f > 0.0 else hi
        s_ab = (f - fb) / (x - xb)
        slope = s_ab if (s_ab > 0.0 and s_ab < INF) else slope
        xa = xb
        fa = fb
        xb = x
        fb = f
    x4 = _step(xa, fa, xb, fb, slope, lo, hi, ftol)
    lo = 0.0
    hi = _IV_MAX
    g4 = american_price_row(U, K, T, r, q, x4, cp, st, H, w) - P
    # the secant through two final-setting points, both near the root: its error is about
    # the product of theirs
    x5 = _step(x3, g3, x4, g4, slope, lo, hi, ftol)
    tv = P - lower
    good = (abs(g4) <= max(_IV_TOL * tv, 4e-9 * P) and abs(x5 - x4) <= 0.01 * x4
            and x5 > 0.0 and x5 < _IV_MAX)
    # a time value below 1e-4 of the premium (deep in the money, at the edge of the
    # exercise region, where the price is flat in vol up to a kink) is not resolved by
    # these steps: no_time_value, as a European time value below double precision is
    bad = S.NO_TIME_VALUE if tv < _TV_RESOLVED * P else S.OUT_OF_RANGE
    return (x5 if good else NAN), (S.OK if good else bad)


# ------------------------------------------------------------------ Greeks

@_fn
def american_greeks(S, K, T, r, q, v, cp, st, H, w, want_vega, want_rho, want_div):
    """(delta, gamma, vega, theta, rho, div_rho) of one American row (valid inputs, early
    exercise possible); the central differences only where wanted (NaN otherwise)."""
    price, delta, gamma, ex = american_value(S, K, T, r, q, v, cp, st, H, w)
    theta = r * price - (r - q) * S * delta - 0.5 * v * v * S * S * gamma
    theta = 0.0 if ex else theta
    hv = min(_H_VOL, 0.5 * v)
    vega = NAN
    rho = NAN
    div = NAN
    if want_vega:
        up = american_price_row(S, K, T, r, q, v + hv, cp, st, H, w)
        dn = american_price_row(S, K, T, r, q, v - hv, cp, st, H, w)
        vega = (up - dn) / (2.0 * hv)
    if want_rho:
        up = american_price_row(S, K, T, r + _H_RATE, q, v, cp, st, H, w)
        dn = american_price_row(S, K, T, r - _H_RATE, q, v, cp, st, H, w)
        rho = (up - dn) / (2.0 * _H_RATE)
    if want_div:
        up = american_price_row(S, K, T, r, q + _H_RATE, v, cp, st, H, w)
        dn = american_price_row(S, K, T, r, q - _H_RATE, v, cp, st, H, w)
        div = (up - dn) / (2.0 * _H_RATE)
    return delta, gamma, vega, theta, rho, div


# ------------------------------------------------------------------ row loops

@_fn
def _row_inputs(spot, K, T, D, q, ex, vol, cp, i):
    """(status, american, r, forward): the BSM input status (kernel/black.py), a NaN
    exercise flag as missing_input, the two-boundary case as out_of_range."""
    tt = T[i]
    e = ex[i]
    st, f, _ = bsm_inputs(spot[i], K[i], tt, D[i], q[i], vol, cp[i])
    st = S.MISSING_INPUT if _is_nan(e) else st
    ok = st == S.OK
    r = -log(D[i]) / tt if ok else 0.0
    c = float(cp[i])
    american = ok and e != 0.0 and not _no_early(r, q[i], c)
    st = TWO_BOUNDARIES if (american and _double(r, q[i], c)) else st
    american = american and st == S.OK
    return st, american, r, f


@rows
def _price_rows(a, e, spot, K, T, D, q, ex, vol, cp, st, price, status):
    n = st[10][1]
    l = st[10][2]
    H = np.empty(n + 1)
    w = np.empty((_WORK_ROWS, n * l))
    for i in range(np.uint64(a), np.uint64(e)):
        tt = T[i]
        stt, american, r, f = _row_inputs(spot, K, T, D, q, ex, vol[i], cp, i)
        s = vol[i] * math.sqrt(tt if tt > 0.0 else 0.0)
        ok = stt == S.OK
        p = black_price(f if ok else 1.0, K[i] if ok else 1.0, s if ok else 1.0, D[i],
                        float(cp[i]))
        if american:
            p = american_price_row(spot[i], K[i], tt, r, q[i], vol[i], float(cp[i]), st,
                                   H, w)
        stt = S.OUT_OF_RANGE if (ok and not (abs(p) < INF)) else stt
        price[i] = p if stt == S.OK else NAN
        status[i] = stt


@rows
def _iv_rows(a, e, premium, spot, K, T, D, q, ex, cp, st, stf, iv_out, status_out):
    n = st[10][1]
    l = st[10][2]
    H = np.empty(n + 1)
    w = np.empty((_WORK_ROWS, n * l))
    for i in range(np.uint64(a), np.uint64(e)):
        tt = T[i]
        dd = D[i]
        stt, american, r, f = _row_inputs(spot, K, T, D, q, ex, 0.0, cp, i)
        ok = stt == S.OK
        s, st2 = black_total_vol(premium[i], f if ok else 1.0, K[i] if ok else 1.0,
                                 dd if ok else 1.0, float(cp[i]) if ok else 1.0)
        v = s / math.sqrt(tt)
        if american:
            v, st2 = american_iv(premium[i], spot[i], K[i], tt, r, q[i], float(cp[i]), f,
                                 dd, st, stf, H, w)
        stt = st2 if ok else stt
        stt = S.OUT_OF_RANGE if (stt == S.OK and not (v < INF)) else stt
        iv_out[i] = v if stt == S.OK else NAN
        status_out[i] = stt


@rows
def _greeks_rows(a, e, spot, K, T, D, q, ex, vol, cp, slots, st, out, status):
    n = st[10][1]
    l = st[10][2]
    H = np.empty(n + 1)
    w = np.empty((_WORK_ROWS, n * l))
    sl = (slots[0], slots[1], slots[2], slots[3], slots[4], slots[5], slots[6], slots[7],
          slots[8], slots[9], slots[10], slots[11], slots[12], slots[13], slots[14],
          slots[15])
    want_vega = slots[2] >= 0
    want_rho = slots[4] >= 0
    want_div = slots[5] >= 0
    for i in range(np.uint64(a), np.uint64(e)):
        v = vol[i]
        stt, american, r, f = _row_inputs(spot, K, T, D, q, ex, v, cp, i)
        st0, u, k, tt, d, y, dq, f0, v0, cp_i = _greeks._bsm_row(spot, K, T, D, q, vol,
                                                                 cp, i)
        g = _greeks._greeks_spot(u, k, tt, d, y, dq, f0, v0, cp_i)
        if american:
            a6 = american_greeks(u, k, tt, r, y, v0, cp_i, st, H, w, want_vega, want_rho,
                                 want_div)
            g = (a6[0], a6[1], a6[2], a6[3], a6[4], a6[5], NAN, NAN, NAN, NAN, NAN, NAN,
                 NAN, NAN, NAN, NAN)
        ok = stt == S.OK
        flag = _greeks._store(out, i, g, ok, sl)
        status[i] = stt + (S.NONFINITE_GREEK_FLAG if flag else 0)


@loop
def _price_par(spot, K, T, D, q, ex, vol, cp, st, price, status):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _price_rows(b * BLOCK, min(n, (b + 1) * BLOCK), spot, K, T, D, q, ex, vol, cp, st,
                    price, status)


@loop
def _iv_par(premium, spot, K, T, D, q, ex, cp, st, stf, iv_out, status_out):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _iv_rows(b * BLOCK, min(n, (b + 1) * BLOCK), premium, spot, K, T, D, q, ex, cp, st,
                 stf, iv_out, status_out)


@loop
def _greeks_par(spot, K, T, D, q, ex, vol, cp, slots, st, out, status):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        _greeks_rows(b * BLOCK, min(n, (b + 1) * BLOCK), spot, K, T, D, q, ex, vol, cp,
                     slots, st, out, status)


@loop
def _sweep_par(premium, spot, K, T, D, q, ex, cp, slots, st, stf, iv_out, out, status,
               scratch):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        a = b * BLOCK
        e = min(n, a + BLOCK)
        _iv_rows(a, e, premium, spot, K, T, D, q, ex, cp, st, stf, iv_out, status)
        _greeks_rows(a, e, spot, K, T, D, q, ex, iv_out, cp, slots, st, out, scratch)


@loop
def _bid_ask_par(bid, ask, mid, spot, K, T, D, q, ex, cp, slots, vega_row, st, stf, iv_bid,
                 iv_ask, iv, unc, out, st_bid, st_ask, status, scratch):
    n = spot.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        a = b * BLOCK
        e = min(n, a + BLOCK)
        _iv_rows(a, e, bid, spot, K, T, D, q, ex, cp, st, stf, iv_bid, st_bid)
        _iv_rows(a, e, ask, spot, K, T, D, q, ex, cp, st, stf, iv_ask, st_ask)
        _iv_rows(a, e, mid, spot, K, T, D, q, ex, cp, st, stf, iv, status)
        _greeks_rows(a, e, spot, K, T, D, q, ex, iv, cp, slots, st, out, scratch)
        _quotes._quote_rows(a, e, bid, ask, iv_bid, iv_ask, iv, st_bid, st_ask, status,
                            out[vega_row], unc)


# ------------------------------------------------------------------ entry points

def _slots(mask):
    """Output row of each Greek of ``mask`` (-1: not requested); only the American Greeks
    may be asked for."""
    mask, nsel = _greeks._check_mask(mask)
    allowed = sum(1 << _greeks.GREEK_NAMES.index(g) for g in AMERICAN_GREEKS)
    if mask & ~allowed:
        raise ValueError(f"the American kernels compute {', '.join(AMERICAN_GREEKS)} only "
                         f"(mask {mask:#x})")
    sl, _ = _greeks._slots(mask)
    out = np.asarray(sl, np.int64)
    out.flags.writeable = False
    return mask, nsel, out


def _inputs(*arrays):
    return _args.floats(*arrays)


def price(spot, K, T, D, q, exercise, vol, cp, price, status, setting="accurate"):
    """BSM prices with the exercise style of each row: ``exercise`` 1.0 American, 0.0
    European, NaN missing (status missing_input).  European rows (and American rows
    where early exercise is never optimal) get the European kernel's prices.

    spot, K, T (years), D (discount factor, the rate being -ln(D)/T), q (yield), vol:
    float64 arrays of one length n; cp: integer codes, +1 call, -1 put, 0 missing;
    price (float64) and status (int8): preallocated.  ``setting``: "accurate" or "fast".
    """
    spot, K, T, D, q, exercise, vol = _inputs(spot, K, T, D, q, exercise, vol)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("price", price, (n,), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_price_rows, _price_par, n, spot, K, T, D, q, exercise, vol, cp,
              setting_of(setting), price, status)


def setting_of(name):
    return setting(name)


def implied_vol(premium, spot, K, T, D, q, exercise, cp, iv_out, status_out,
                setting="accurate"):
    """Implied vols of premiums with the exercise style of each row (as ``price``): for
    American rows a root-finder on the American price from the European implied vol of the
    premium (nine fast-setting evaluations and two at ``setting``)."""
    premium, spot, K, T, D, q, exercise = _inputs(premium, spot, K, T, D, q, exercise)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("status_out", status_out, (n,), np.int8)
    _args.run(_iv_rows, _iv_par, n, premium, spot, K, T, D, q, exercise, cp,
              setting_of(setting), _FAST, iv_out, status_out)


def greeks(spot, K, T, D, q, exercise, vol, cp, mask, out, status, setting="accurate"):
    """Greeks (delta, gamma, vega, theta, rho, div_rho; against spot) into
    ``out[n_requested, n]``, the exercise style of each row as ``price``; returns the number
    of ok rows with a requested Greek that is not finite (American rows at zero vol)."""
    mask, nsel, slots = _slots(mask)
    spot, K, T, D, q, exercise, vol = _inputs(spot, K, T, D, q, exercise, vol)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(_greeks_rows, _greeks_par, n, spot, K, T, D, q, exercise, vol, cp, slots,
              setting_of(setting), out, status)
    return _greeks.take_nonfinite_flags(status)


def sweep(premium, spot, K, T, D, q, exercise, cp, mask, iv_out, out, status,
          setting="accurate"):
    """Implied vol of ``premium`` and the Greeks in ``mask`` at that vol, block by block."""
    mask, nsel, slots = _slots(mask)
    premium, spot, K, T, D, q, exercise = _inputs(premium, spot, K, T, D, q, exercise)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    st = setting_of(setting)
    scratch = np.empty(n, np.int8)
    if n <= BLOCK:
        _iv_rows(0, n, premium, spot, K, T, D, q, exercise, cp, st, _FAST, iv_out, status)
        _greeks_rows(0, n, spot, K, T, D, q, exercise, iv_out, cp, slots, st, out, scratch)
    else:
        _sweep_par(premium, spot, K, T, D, q, exercise, cp, slots, st, _FAST, iv_out, out,
                   status, scratch)
    return _greeks.take_nonfinite_flags(scratch)


def bid_ask(bid, ask, spot, K, T, D, q, exercise, cp, mask, iv_bid, iv_ask, iv, unc, out,
            status_bid, status_ask, status, setting="accurate"):
    """Implied vols of bid, ask and mid, the Greeks in ``mask`` at the mid vol (``mask``
    must hold vega) and the spread's vol uncertainty, as ``quotes.bsm_bid_ask``, with the
    exercise style of each row."""
    mask, nsel, slots = _slots(mask)
    vega_bit = 1 << _greeks.GREEK_NAMES.index("vega")
    if not mask & vega_bit:
        raise ValueError("the bid/ask kernel's mask must hold vega (the spread's vol "
                         "uncertainty needs it)")
    bid, ask, spot, K, T, D, q, exercise = _inputs(bid, ask, spot, K, T, D, q, exercise)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    for name, arr in (("iv_bid", iv_bid), ("iv_ask", iv_ask), ("iv", iv), ("unc", unc)):
        _args.output(name, arr, (n,), np.float64)
    _args.output("out", out, (nsel, n), np.float64)
    for name, arr in (("status_bid", status_bid), ("status_ask", status_ask),
                      ("status", status)):
        _args.output(name, arr, (n,), np.int8)
    (mid,) = _args.floats(_quotes.mid_price(bid, ask))
    st = setting_of(setting)
    vega_row = int(slots[2])
    scratch = np.empty(n, np.int8)
    if n <= BLOCK:
        _iv_rows(0, n, bid, spot, K, T, D, q, exercise, cp, st, _FAST, iv_bid, status_bid)
        _iv_rows(0, n, ask, spot, K, T, D, q, exercise, cp, st, _FAST, iv_ask, status_ask)
        _iv_rows(0, n, mid, spot, K, T, D, q, exercise, cp, st, _FAST, iv, status)
        _greeks_rows(0, n, spot, K, T, D, q, exercise, iv, cp, slots, st, out, scratch)
        _quotes._quote_rows(0, n, bid, ask, iv_bid, iv_ask, iv, status_bid, status_ask,
                            status, out[vega_row], unc)
    else:
        _bid_ask_par(bid, ask, mid, spot, K, T, D, q, exercise, cp, slots, vega_row, st,
                     _FAST, iv_bid, iv_ask, iv, unc, out, status_bid, status_ask, status,
                     scratch)
    return _greeks.take_nonfinite_flags(scratch)
