"""Raw SVI smiles, one per slice of quotes: calibration, Durrleman's condition, calendar
check, and the fitted surface evaluated anywhere.

Raw SVI (Gatheral, 2004) gives the total implied variance w = sigma_BS^2 T at log-moneyness
k = ln(K/F) as

    w(k) = a + b (rho (k - m) + sqrt((k - m)^2 + sigma^2)).

Calibration (per slice, a fixed amount of work apart from the polish's convergence stop;
slices run in parallel, in tasks of 32 with their own scratch):

1. Quasi-explicit step (De Marco and Martini, "Quasi-explicit calibration of Gatheral's
   SVI model", 2009).  With y = (k - m)/sigma and z = sqrt(y^2 + 1), w = a + d y + c z
   (d = rho b sigma, c = b sigma) is linear in (a, d, c) for fixed (m, sigma): a weighted
   linear least-squares problem.  ``a`` is eliminated in closed form (it only centres the
   sums), and (d, c) are kept in the quadrilateral |d| <= c, c + |d| <= 2 sigma, that is
   b >= 0, |rho| <= 1 and both wing slopes b (1 +- rho) <= 2 (the bound of Roger Lee's
   moment formula, 2004).  The minimum of a convex quadratic over that polygon is the
   unconstrained minimiser when it lies inside, else the best of the four edges (each a
   clamped one-dimensional minimum): a few dozen flops once the sums are known.  Unlike
   De Marco and Martini we leave ``a`` unbounded, so that slices with a < 0 (such as
   Gatheral and Jacquier's example of butterfly arbitrage) are reproduced.
2. Outer search over (m, log sigma), on at most ``SEARCH_QUOTES`` quotes evenly spread
   over the slice: the reduced objective on a fixed ``GRID_M`` x ``GRID_S`` grid scaled to
   the slice's log-moneyness range, then ``NM_ITERATIONS`` Nelder-Mead iterations from the
   best grid point (a fixed count).
3. Polish: at most ``POLISH_ITERATIONS`` Levenberg-Marquardt steps on all five
   parameters over the search's quotes, then as many over all the quotes (a step is taken only when it does not raise the objective and
   keeps b >= 0, |rho| < 1, sigma > 0 and the wing slopes <= 2; the iteration stops once
   a step changes no parameter by more than 1e-10 relative), so that exact SVI vols are
   reproduced to rounding error.

The objective is in total variance, each quote weighted by u_i / (iv_i^2 T^2), which makes
it the first-order expansion of sum u_i (fitted vol - iv_i)^2 (dw = 2 iv T d(iv)); u_i is
1/(iv_ask - iv_bid)^2 where the spread of implied vols is known (inverse variance, the
half-spread read as the quote's standard deviation), else that of the slice's widest
spread (1 for every quote when no spread is known).

Durrleman's condition (Gatheral and Jacquier, "Arbitrage-free SVI volatility surfaces",
2014): a slice is free of butterfly arbitrage where

    g(k) = (1 - k w'/(2w))^2 - (w'^2/4)(1/w + 1/4) + w''/2 >= 0   (and w > 0).

g is evaluated at ``G_POINTS`` points evenly spaced over the checked range of k: the
range [k_lo, k_hi] of the quotes used (``CHECK_WIDEN`` = 0: not widened); its smallest
value is refined by golden-section search between the neighbours of the smallest grid
point.  The fitted wings beyond that range rest on no quote (SVI extends them linearly)
and are not judged: on the demo data, with a quarter of the width added on each side,
about a tenth of the slices were flagged, nearly all in that extension.

``arbitrage_free``: our own construction, not a published region.  When the fitted slice
has g < 0 (or w <= 0) somewhere on the checked range, it is blended towards the flat smile of the
same at-the-money total variance, w_theta = (1 - theta) w + theta w(0) (itself a raw SVI:
a' = (1 - theta) a + theta w(0), b' = (1 - theta) b), and theta is the smallest found by
``BLEND_STEPS`` bisection steps that passes the butterfly check (``_free``: w > 0 and
g >= 0 at every grid point, and the refined minimum >= 0; theta = 1, a flat smile, has
g = 1).  Then Levenberg-Marquardt steps refit it, each accepted only if it still passes.
So ``butterfly_arbitrage`` is false after it, at the cost of a flatter smile; the wing
slopes stay <= 2, so g tends to 1/4 - slope^2/16 >= 0 beyond the range.

Calendar arbitrage: a slice whose total variance lies below that of the previous fitted
slice of the same surface (an earlier expiry) at some point of an evenly spaced grid of
``G_POINTS`` over the part of k where both slices are checked, by more than 1e-10
relative (no flag when the two ranges do not overlap).

Slice statuses (``SLICE_NAMES``; codes stable, append only).  A quote is used when its
``ok`` flag is set and its implied vol, strike, forward and time are finite and positive.
"""

import math

import numba
import numpy as np
from numba import prange

from . import _jit  # noqa: F401  (imported for its side effect: the kernel cache locators)

# Slice statuses
OK = 0
NO_QUOTES = 1          # no quote with an ok status and a finite positive implied vol
BAD_FORWARD = 2        # such quotes, but none with a finite positive forward
BAD_EXPIRY = 3         # ... none with a finite positive time to expiry as well
TOO_FEW_QUOTES = 4     # fewer than MIN_STRIKES distinct strikes among the quotes used
FIT_FAILED = 5         # the fit gave non-finite parameters

SLICE_NAMES = ("ok", "no_quotes", "bad_forward", "bad_expiry", "too_few_quotes",
               "fit_failed")

# Statuses of the fitted surface at a point (``surface_points``)
POINT_OK = 0
POINT_MISSING_INPUT = 1    # log-moneyness or time missing (NaN)
POINT_BAD_INPUT = 2        # log-moneyness +-inf, time <= 0 or +inf
POINT_NO_SMILE = 3         # no fitted slice for this surface
POINT_NEGATIVE_VARIANCE = 4  # the fitted total variance is <= 0 there

POINT_NAMES = ("ok", "missing_input", "bad_input", "no_smile", "negative_variance")

MIN_STRIKES = 5
GRID_M = 3             # start grid: GRID_M values of m times GRID_S of sigma
GRID_S = 2
NM_ITERATIONS = 6
POLISH_ITERATIONS = 12
SEARCH_QUOTES = 32     # quotes of a slice the outer search uses (evenly spread)
G_POINTS = 101
CHECK_WIDEN = 0.0     # the checked range of k: the quotes', widened by this much a side
GOLDEN_STEPS = 30
BLEND_STEPS = 40
LEE_SLOPE = 2.0        # largest wing slope of total variance (Lee's moment formula)
_N_PARAMS = 5

_FLAGS = frozenset({"contract"})
# The sums over the quotes of one slice are added in source order (no "reassoc"): with it
# the order is fixed by the compiled code, and the compiled code depended on the compile
# (the chain kernels' forwards differed by a few ulps between a cold compile in one process
# and another process's cached code), while the backfill promises the single-process bits.
_SUM_FLAGS = frozenset({"contract"})


def _njit(fn):
    return numba.njit(error_model="numpy", fastmath=set(_FLAGS), cache=True, nogil=True)(fn)


def _njit_sums(fn):
    return numba.njit(error_model="numpy", fastmath=set(_SUM_FLAGS), cache=True,
                      nogil=True)(fn)


def _njit_par(fn):
    return numba.njit(parallel=True, error_model="numpy", fastmath=set(_FLAGS), cache=True,
                      nogil=True)(fn)


# ------------------------------------------------------------------ the SVI function
@_njit
def total_variance(k, a, b, rho, m, sigma):
    """Raw SVI total variance w(k)."""
    x = k - m
    return a + b * (rho * x + math.sqrt(x * x + sigma * sigma))


@_njit
def durrleman_g(k, a, b, rho, m, sigma):
    """Durrleman's g(k) of a raw SVI slice (NaN where w(k) <= 0)."""
    x = k - m
    r = math.sqrt(x * x + sigma * sigma)
    w = a + b * (rho * x + r)
    w1 = b * (rho + x / r)
    w2 = b * sigma * sigma / (r * r * r)
    h = 1.0 - k * w1 / (2.0 * w)
    g = h * h - 0.25 * w1 * w1 * (1.0 / w + 0.25) + 0.5 * w2
    return g if w > 0.0 else np.nan


# ------------------------------------------------------------- quasi-explicit step
@_njit_sums
def _moments(k, v, W, o, e, m, inv_s):
    """The weighted sums of z, yz and vz over quotes [o, e) (y = (k - m)/sigma,
    z = sqrt(y^2 + 1)); the sums of y, y^2, vy and z^2 = y^2 + 1 follow from the slice's
    moments of k (``_reduced``), so one square root and three sums per quote remain."""
    sz = 0.0
    syz = 0.0
    svz = 0.0
    for i in range(o, e):
        y = (k[i] - m) * inv_s
        z = math.sqrt(y * y + 1.0)
        wz = W[i] * z
        sz += wz
        syz += wz * y
        svz += wz * v[i]
    return sz, syz, svz


@_njit
def _edge(q11, q12, q22, p1, p2, d0, c0, d1, c1):
    """Minimum of phi(x) = x'Qx - 2 p'x on the segment from (d0, c0) to (d1, c1)."""
    ed = d1 - d0
    ec = c1 - c0
    qe_d = q11 * ed + q12 * ec
    qe_c = q12 * ed + q22 * ec
    eqe = ed * qe_d + ec * qe_c
    num = p1 * ed + p2 * ec - (d0 * qe_d + c0 * qe_c)
    t = num / eqe if eqe > 0.0 else (1.0 if num > 0.0 else 0.0)
    t = min(max(t, 0.0), 1.0)
    d = d0 + t * ed
    c = c0 + t * ec
    phi = q11 * d * d + 2.0 * q12 * d * c + q22 * c * c - 2.0 * (p1 * d + p2 * c)
    return phi, d, c


@_njit
def _reduced(k, v, W, o, e, m, sig, mom):
    """(objective, a, d, c): the best (a, d, c) for this (m, sigma) on the polytope.

    ``mom``: the slice's weighted moments (sum W = 1): mean k, variance of k, mean v,
    variance of v, covariance of k and v (centred, so no cancellation here)."""
    mk, vk, sv, svv, ckv = mom[0], mom[1], mom[2], mom[3], mom[4]
    inv_s = 1.0 / sig
    sz, syz, svz = _moments(k, v, W, o, e, m, inv_s)
    dm = (mk - m) * inv_s                 # sum of W y
    q11 = vk * inv_s * inv_s              # variance of y
    q12 = syz - dm * sz                   # covariance of y and z
    q22 = q11 + dm * dm + 1.0 - sz * sz   # variance of z (sum W z^2 = sum W y^2 + 1)
    p1 = ckv * inv_s                      # covariance of y and v
    p2 = svz - sv * sz                    # covariance of z and v
    sy = dm
    det = q11 * q22 - q12 * q12
    best = np.inf
    bd = 0.0
    bc = 0.0
    if det > 1e-13 * q11 * q22 and det > 0.0:
        d = (q22 * p1 - q12 * p2) / det
        c = (q11 * p2 - q12 * p1) / det
        if abs(d) <= c and c + abs(d) <= LEE_SLOPE * sig:
            best = q11 * d * d + 2.0 * q12 * d * c + q22 * c * c - 2.0 * (p1 * d + p2 * c)
            bd = d
            bc = c
    if best == np.inf:
        h = 0.5 * LEE_SLOPE * sig
        # vertices (d, c): (0, 0), (h, h), (0, 2h), (-h, h)
        phi, d, c = _edge(q11, q12, q22, p1, p2, 0.0, 0.0, h, h)
        if phi < best:
            best, bd, bc = phi, d, c
        phi, d, c = _edge(q11, q12, q22, p1, p2, h, h, 0.0, 2.0 * h)
        if phi < best:
            best, bd, bc = phi, d, c
        phi, d, c = _edge(q11, q12, q22, p1, p2, 0.0, 2.0 * h, -h, h)
        if phi < best:
            best, bd, bc = phi, d, c
        phi, d, c = _edge(q11, q12, q22, p1, p2, -h, h, 0.0, 0.0)
        if phi < best:
            best, bd, bc = phi, d, c
    a = sv - sy * bd - sz * bc
    return svv + best, a, bd, bc


@_njit
def _objective(k, v, W, o, e, m, s, mom):
    f, _, _, _ = _reduced(k, v, W, o, e, m, math.exp(s), mom)
    return f if f == f else np.inf


@_njit
def _search(k, v, W, o, e, mom, k_lo, k_hi):
    """Grid then Nelder-Mead over (m, log sigma); returns (m, sigma)."""
    span = max(k_hi - k_lo, 1e-4)
    bm = 0.5 * (k_lo + k_hi)
    bs = math.log(0.2 * span)
    bf = np.inf
    for i in range(GRID_M):
        m = k_lo + span * (i + 1.0) / (GRID_M + 1.0)
        for j in range(GRID_S):
            s = math.log(span * 0.05 * 4.0 ** j)
            f = _objective(k, v, W, o, e, m, s, mom)
            if f < bf:
                bf, bm, bs = f, m, s
    # Nelder-Mead (reflection 1, expansion 2, contraction 1/2, shrink 1/2)
    x0, y0, f0 = bm, bs, bf
    x1, y1 = bm + 0.1 * span, bs
    f1 = _objective(k, v, W, o, e, x1, y1, mom)
    x2, y2 = bm, bs + 0.5
    f2 = _objective(k, v, W, o, e, x2, y2, mom)
    for _ in range(NM_ITERATIONS):
        # order: f0 <= f1 <= f2
        if f1 < f0:
            x0, y0, f0, x1, y1, f1 = x1, y1, f1, x0, y0, f0
        if f2 < f1:
            x1, y1, f1, x2, y2, f2 = x2, y2, f2, x1, y1, f1
            if f1 < f0:
                x0, y0, f0, x1, y1, f1 = x1, y1, f1, x0, y0, f0
        cx = 0.5 * (x0 + x1)
        cy = 0.5 * (y0 + y1)
        xr = 2.0 * cx - x2
        yr = 2.0 * cy - y2
        fr = _objective(k, v, W, o, e, xr, yr, mom)
        if fr < f0:
            xe = 3.0 * cx - 2.0 * x2
            ye = 3.0 * cy - 2.0 * y2
            fe = _objective(k, v, W, o, e, xe, ye, mom)
            if fe < fr:
                x2, y2, f2 = xe, ye, fe
            else:
                x2, y2, f2 = xr, yr, fr
        elif fr < f1:
            x2, y2, f2 = xr, yr, fr
        else:
            if fr < f2:
                xc = cx + 0.5 * (xr - cx)
                yc = cy + 0.5 * (yr - cy)
            else:
                xc = cx + 0.5 * (x2 - cx)
                yc = cy + 0.5 * (y2 - cy)
            fc = _objective(k, v, W, o, e, xc, yc, mom)
            if fc < min(fr, f2):
                x2, y2, f2 = xc, yc, fc
            else:
                x1 = x0 + 0.5 * (x1 - x0)
                y1 = y0 + 0.5 * (y1 - y0)
                f1 = _objective(k, v, W, o, e, x1, y1, mom)
                x2 = x0 + 0.5 * (x2 - x0)
                y2 = y0 + 0.5 * (y2 - y0)
                f2 = _objective(k, v, W, o, e, x2, y2, mom)
    if f1 < f0:
        x0, y0, f0 = x1, y1, f1
    if f2 < f0:
        x0, y0, f0 = x2, y2, f2
    return x0, math.exp(y0)


# ------------------------------------------------------------------------- polish
@_njit_sums
def _normal_equations(k, v, W, o, e, a, b, rho, m, sig, A, g):
    """A = J'WJ (upper triangle, row-major 5x5) and g = J'W r for (a, b, rho, m, sigma);
    returns the objective sum W r^2 at these parameters."""
    ss = sig * sig
    A00 = A01 = A02 = A03 = A04 = 0.0
    A11 = A12 = A13 = A14 = 0.0
    A22 = A23 = A24 = 0.0
    A33 = A34 = 0.0
    A44 = 0.0
    g0 = g1 = g2 = g3 = g4 = 0.0
    f = 0.0
    for i in range(o, e):
        x = k[i] - m
        R = math.sqrt(x * x + ss)
        iR = 1.0 / R
        j1 = rho * x + R
        j2 = b * x
        j3 = -b * (rho + x * iR)
        j4 = b * sig * iR
        wt = W[i]
        res = a + b * j1 - v[i]
        r = res * wt
        f += r * res
        A00 += wt
        A01 += wt * j1
        A02 += wt * j2
        A03 += wt * j3
        A04 += wt * j4
        A11 += wt * j1 * j1
        A12 += wt * j1 * j2
        A13 += wt * j1 * j3
        A14 += wt * j1 * j4
        A22 += wt * j2 * j2
        A23 += wt * j2 * j3
        A24 += wt * j2 * j4
        A33 += wt * j3 * j3
        A34 += wt * j3 * j4
        A44 += wt * j4 * j4
        g0 += r
        g1 += r * j1
        g2 += r * j2
        g3 += r * j3
        g4 += r * j4
    A[0] = A00
    A[1] = A01
    A[2] = A02
    A[3] = A03
    A[4] = A04
    A[6] = A11
    A[7] = A12
    A[8] = A13
    A[9] = A14
    A[12] = A22
    A[13] = A23
    A[14] = A24
    A[18] = A33
    A[19] = A34
    A[24] = A44
    g[0] = g0
    g[1] = g1
    g[2] = g2
    g[3] = g3
    g[4] = g4
    return f


@_njit
def _damped_solve(A, g, lam, L, step):
    """step = -(A + lam diag(A))^{-1} g by Cholesky (A: upper triangle of a 5x5, row
    major); False when the damped matrix is not positive definite."""
    n = _N_PARAMS
    for i in range(n):
        for j in range(i, n):
            L[i * n + j] = A[i * n + j] * (1.0 + lam) if i == j else A[i * n + j]
    for i in range(n):               # in place: upper-triangular R with R'R = the matrix
        s = L[i * n + i]
        for p in range(i):
            s -= L[p * n + i] * L[p * n + i]
        if not s > 0.0:
            return False
        rii = math.sqrt(s)
        L[i * n + i] = rii
        for j in range(i + 1, n):
            t = L[i * n + j]
            for p in range(i):
                t -= L[p * n + i] * L[p * n + j]
            L[i * n + j] = t / rii
    for i in range(n):               # R' y = -g
        t = -g[i]
        for p in range(i):
            t -= L[p * n + i] * step[p]
        step[i] = t / L[i * n + i]
    for i in range(n - 1, -1, -1):   # R x = y
        t = step[i]
        for p in range(i + 1, n):
            t -= L[i * n + p] * step[p]
        step[i] = t / L[i * n + i]
    return True


@_njit
def _admissible(b, rho, sig):
    return b >= 0.0 and abs(rho) < 1.0 and sig > 0.0 and b * (1.0 + abs(rho)) <= LEE_SLOPE


@_njit
def _polish(k, v, W, o, e, p, scratch, lo, hi, iterations):
    """Levenberg-Marquardt on p = (a, b, rho, m, sigma), in place: at most
    ``iterations`` iterations of one pass over the quotes each, ending early once an
    accepted step changes no parameter by more than 1e-10 relative (converged; the
    only data-dependent amount of work in a fit).  The pass at a trial
    point gives its
    objective and, when that is not higher, the normal equations of the next step (kept
    apart until then, so a refused trial costs no second pass).  A trial point is
    refused without a pass when it leaves the admissible set, and, with lo < hi, unless the
    slice stays free of butterfly arbitrage on [lo, hi] (``_free``)."""
    A = scratch[0:25]
    g = scratch[25:30]
    L = scratch[30:55]
    step = scratch[55:60]
    best = scratch[65:70]
    A2 = scratch[80:105]
    g2 = scratch[105:110]
    gs = scratch[_SCRATCH_FIXED:_SCRATCH_FIXED + G_POINTS]
    for j in range(_N_PARAMS):
        best[j] = p[j]
    f = _normal_equations(k, v, W, o, e, p[0], p[1], p[2], p[3], p[4], A, g)
    lam = 1e-3
    for _ in range(iterations):
        if not _damped_solve(A, g, lam, L, step):
            lam *= 10.0
            continue
        a = best[0] + step[0]
        b = best[1] + step[1]
        rho = best[2] + step[2]
        m = best[3] + step[3]
        sig = best[4] + step[4]
        if not _admissible(b, rho, sig) or (lo < hi and not _free(a, b, rho, m, sig, lo, hi,
                                                                     gs)):
            lam *= 10.0
            continue
        fn = _normal_equations(k, v, W, o, e, a, b, rho, m, sig, A2, g2)
        if fn <= f:
            small = True                  # converged: no step changes more than
            for j in range(_N_PARAMS):    # 1e-10 relative
                small = small and abs(step[j]) <= 1e-10 * (abs(best[j]) + 1e-3)
            best[0], best[1], best[2], best[3], best[4] = a, b, rho, m, sig
            f = fn
            for j in range(25):
                A[j] = A2[j]
            for j in range(_N_PARAMS):
                g[j] = g2[j]
            lam = max(lam * 0.1, 1e-12)
            if small:
                break
        else:
            lam *= 10.0
    for j in range(_N_PARAMS):
        p[j] = best[j]


# ---------------------------------------------------------------------- arbitrage
@_njit_sums
def _g_grid(a, b, rho, m, sig, lo, hi, gs):
    """g at the G_POINTS grid points of [lo, hi] into gs (NaN where w <= 0)."""
    h = (hi - lo) / (G_POINTS - 1)
    ss = sig * sig
    for i in range(G_POINTS):
        kk = lo + h * i
        x = kk - m
        r = math.sqrt(x * x + ss)
        ir = 1.0 / r
        w = a + b * (rho * x + r)
        w1 = b * (rho + x * ir)
        w2 = b * ss * ir * ir * ir
        iw = 1.0 / w
        hh = 1.0 - 0.5 * kk * w1 * iw
        gk = hh * hh - 0.25 * w1 * w1 * (iw + 0.25) + 0.5 * w2
        gs[i] = gk if w > 0.0 else np.nan


@_njit
def _min_g(a, b, rho, m, sig, k_lo, k_hi, gs):
    """(smallest g on [k_lo, k_hi]: the grid's, refined by golden-section search between the
    neighbours of the smallest grid point; its k; False when w <= 0 at a grid point)."""
    _g_grid(a, b, rho, m, sig, k_lo, k_hi, gs)
    h = (k_hi - k_lo) / (G_POINTS - 1)
    gmin = np.inf
    imin = 0
    positive = True
    for i in range(G_POINTS):
        gk = gs[i]
        if not gk == gk:
            positive = False
        elif gk < gmin:
            gmin, imin = gk, i
    if not positive:
        return np.nan, np.nan, False
    kmin = k_lo + h * imin
    lo = k_lo + h * max(imin - 1, 0)
    hi = k_lo + h * min(imin + 1, G_POINTS - 1)
    ratio = 0.6180339887498949
    x1 = hi - ratio * (hi - lo)
    x2 = lo + ratio * (hi - lo)
    f1 = durrleman_g(x1, a, b, rho, m, sig)
    f2 = durrleman_g(x2, a, b, rho, m, sig)
    for _ in range(GOLDEN_STEPS):
        if f1 < f2:
            hi, x2, f2 = x2, x1, f1
            x1 = hi - ratio * (hi - lo)
            f1 = durrleman_g(x1, a, b, rho, m, sig)
        else:
            lo, x1, f1 = x1, x2, f2
            x2 = lo + ratio * (hi - lo)
            f2 = durrleman_g(x2, a, b, rho, m, sig)
    if f1 < gmin:
        gmin, kmin = f1, x1
    if f2 < gmin:
        gmin, kmin = f2, x2
    return gmin, kmin, True


@_njit
def _free(a, b, rho, m, sig, lo, hi, gs):
    """Free of butterfly arbitrage as the flags judge it: w > 0 at every grid point of
    [lo, hi] and the refined smallest g >= 0."""
    gmin, _, positive = _min_g(a, b, rho, m, sig, lo, hi, gs)
    return positive and gmin >= 0.0


@_njit
def _blend_free(p, w0, k_lo, k_hi, gs):
    """Blend p towards the flat smile w0 until it is free of butterfly arbitrage (in
    place): bisection on theta, keeping the upper end free (theta = 1 is: g = 1)."""
    a, b = p[0], p[1]
    lo = 0.0
    hi = 1.0
    for _ in range(BLEND_STEPS):
        t = 0.5 * (lo + hi)
        if _free((1.0 - t) * a + t * w0, (1.0 - t) * b, p[2], p[3], p[4], k_lo, k_hi, gs):
            hi = t
        else:
            lo = t
    p[0] = (1.0 - hi) * a + hi * w0
    p[1] = (1.0 - hi) * b


# --------------------------------------------------------------------- one slice
@_njit_sums
def _vol_errors(k, v, W, o, e, a, b, rho, m, sig, inv_t):
    """Root mean square of fitted minus market vols over quotes [o, e), each weighted by
    its u_i (= W_i v_i up to a constant: W_i = u_i / v_i normalised)."""
    num = 0.0
    den = 0.0
    ss = sig * sig
    for j in range(o, e):
        x = k[j] - m
        wf = a + b * (rho * x + math.sqrt(x * x + ss))
        dv = math.sqrt(max(wf, 0.0) * inv_t) - math.sqrt(v[j] * inv_t)
        u = W[j] * v[j]
        num += u * dv * dv
        den += u
    return math.sqrt(num / den)


@_njit
def _weighted_moments(k, v, W, o, e, mom):
    """mom = (mean k, variance of k, mean v, variance of v, covariance of k and v) under
    the weights W (summing to 1) of quotes [o, e); returns mean v."""
    mk = 0.0
    sv = 0.0
    for j in range(o, e):
        mk += W[j] * k[j]
        sv += W[j] * v[j]
    vk = 0.0
    svv = 0.0
    ckv = 0.0
    for j in range(o, e):
        dk = k[j] - mk
        dv = v[j] - sv
        vk += W[j] * dk * dk
        svv += W[j] * dv * dv
        ckv += W[j] * dk * dv
    mom[0], mom[1], mom[2], mom[3], mom[4] = mk, vk, sv, svv, ckv
    return sv


@_njit
def _fit_slice(s, o, e, lnk, iv, spread, ok, F, T, arbitrage_free, k, v, W,
               params, fwd, tex, rmse, atm_vol, atm_skew, min_g, min_g_k, butterfly,
               used, check_lo, check_hi, status, scratch):
    for j in range(_N_PARAMS):
        params[s, j] = np.nan
    fwd[s] = np.nan
    tex[s] = np.nan
    rmse[s] = np.nan
    atm_vol[s] = np.nan
    atm_skew[s] = np.nan
    min_g[s] = np.nan
    min_g_k[s] = np.nan
    butterfly[s] = -1
    check_lo[s] = np.nan
    check_hi[s] = np.nan
    used[s] = 0
    # one pass: the quotes used, compacted into [o, o + nu) of the work arrays (rows are
    # in strike order, so distinct strikes are counted where k changes), and what the
    # others lack
    n_iv = 0
    n_f = 0
    nu = 0
    n_strikes = 0
    last_k = np.nan
    spread_max = 0.0
    t_s = 1.0
    for i in range(o, e):
        if ok[i] == 1 and iv[i] > 0.0 and iv[i] < np.inf:
            n_iv += 1
            if F[i] > 0.0 and F[i] < np.inf and abs(lnk[i]) < np.inf:
                n_f += 1
                if T[i] > 0.0 and T[i] < np.inf:
                    j = o + nu
                    if nu == 0:                 # the slice's forward and time
                        fwd[s] = F[i]
                        tex[s] = T[i]
                        t_s = T[i]
                    k[j] = lnk[i]
                    v[j] = iv[i] * iv[i] * t_s
                    sp = spread[i]
                    W[j] = sp if sp > 0.0 and sp < np.inf else np.nan
                    if W[j] > spread_max:
                        spread_max = W[j]
                    if k[j] != last_k:
                        n_strikes += 1
                        last_k = k[j]
                    nu += 1
    if n_iv == 0:
        status[s] = NO_QUOTES
        return
    if n_f == 0:
        status[s] = BAD_FORWARD
        return
    if nu == 0:
        status[s] = BAD_EXPIRY
        return
    used[s] = nu
    if n_strikes < MIN_STRIKES:
        status[s] = TOO_FEW_QUOTES
        return
    ee = o + nu
    wsum = 0.0
    k_lo = np.inf
    k_hi = -np.inf
    for j in range(o, ee):
        sp = W[j] if W[j] == W[j] else (spread_max if spread_max > 0.0 else 1.0)
        W[j] = 1.0 / (sp * sp * v[j])    # u / (iv^2 T^2), u = 1/spread^2, up to a factor T
        wsum += W[j]
        k_lo = min(k_lo, k[j])
        k_hi = max(k_hi, k[j])
    for j in range(o, ee):
        W[j] /= wsum
    mom = scratch[70:75]
    sv = _weighted_moments(k, v, W, o, ee, mom)
    # the outer search on at most SEARCH_QUOTES quotes evenly spread over the slice (the
    # polish below uses all of them)
    nsub = min(nu, SEARCH_QUOTES)
    ks = scratch[_SUB:_SUB + SEARCH_QUOTES]
    vs = scratch[_SUB + SEARCH_QUOTES:_SUB + 2 * SEARCH_QUOTES]
    ws = scratch[_SUB + 2 * SEARCH_QUOTES:_SUB + 3 * SEARCH_QUOTES]
    wsub = 0.0
    for i in range(nsub):
        j = o + (i * (nu - 1)) // (nsub - 1)
        ks[i] = k[j]
        vs[i] = v[j]
        ws[i] = W[j]
        wsub += W[j]
    for i in range(nsub):
        ws[i] /= wsub
    mom_s = scratch[75:80]
    _weighted_moments(ks, vs, ws, 0, nsub, mom_s)
    m, sig = _search(ks, vs, ws, 0, nsub, mom_s, k_lo, k_hi)
    _, a, d, c = _reduced(k, v, W, o, ee, m, sig, mom)
    p = scratch[60:65]
    p[0] = a
    p[1] = c / sig
    p[2] = d / c if c > 0.0 else 0.0
    p[3] = m
    p[4] = sig
    if abs(p[2]) >= 1.0:                     # on an edge |d| = c: keep rho inside (-1, 1)
        p[2] = math.copysign(1.0 - 1e-12, p[2])
    # first on the search's quotes (a third of the cost per step), then on all of them
    _polish(ks, vs, ws, 0, nsub, p, scratch, 0.0, 0.0, POLISH_ITERATIONS)
    _polish(k, v, W, o, ee, p, scratch, 0.0, 0.0, POLISH_ITERATIONS)
    # the checked range: the quotes' range of k (widened by CHECK_WIDEN of its width on
    # each side)
    c_lo = k_lo - CHECK_WIDEN * (k_hi - k_lo)
    c_hi = k_hi + CHECK_WIDEN * (k_hi - k_lo)
    check_lo[s] = c_lo
    check_hi[s] = c_hi
    gs = scratch[_SCRATCH_FIXED:_SCRATCH_FIXED + G_POINTS]
    if arbitrage_free and not _free(p[0], p[1], p[2], p[3], p[4], c_lo, c_hi, gs):
        w0 = total_variance(0.0, p[0], p[1], p[2], p[3], p[4])
        if not w0 > 0.0:
            w0 = sv
        _blend_free(p, w0, c_lo, c_hi, gs)
        _polish(k, v, W, o, ee, p, scratch, c_lo, c_hi,      # refit, staying free of it
                POLISH_ITERATIONS)
    finite = True
    for j in range(_N_PARAMS):
        finite = finite and abs(p[j]) < np.inf
    if not finite:
        status[s] = FIT_FAILED
        return
    for j in range(_N_PARAMS):
        params[s, j] = p[j]
    a, b, rho, m, sig = p[0], p[1], p[2], p[3], p[4]
    rmse[s] = _vol_errors(k, v, W, o, ee, a, b, rho, m, sig, 1.0 / t_s)
    w0 = total_variance(0.0, a, b, rho, m, sig)
    if w0 > 0.0:
        atm_vol[s] = math.sqrt(w0 / t_s)
        w1 = b * (rho - m / math.sqrt(m * m + sig * sig))
        atm_skew[s] = w1 / (2.0 * math.sqrt(w0 * t_s))
    gmin, gk, positive = _min_g(a, b, rho, m, sig, c_lo, c_hi, gs)
    min_g[s] = gmin
    min_g_k[s] = gk
    butterfly[s] = 0 if positive and gmin >= 0.0 else 1
    status[s] = OK


_SCRATCH_FIXED = 112
_SUB = _SCRATCH_FIXED + G_POINTS       # the search's quotes (k, v, W)
_SLICES_PER_TASK = 32


@_njit_par
def _fit_all(offsets, lnk, iv, spread, ok, F, T, arbitrage_free, k, v, W, params, fwd,
             tex, rmse, atm_vol, atm_skew, min_g, min_g_k, butterfly, used, check_lo,
             check_hi, status, scratch):
    n = offsets.shape[0] - 1
    for task in prange((n + _SLICES_PER_TASK - 1) // _SLICES_PER_TASK):
        for s in range(task * _SLICES_PER_TASK, min(n, (task + 1) * _SLICES_PER_TASK)):
            _fit_slice(s, offsets[s], offsets[s + 1], lnk, iv, spread, ok, F, T,
                       arbitrage_free, k, v, W, params, fwd, tex, rmse, atm_vol, atm_skew,
                       min_g, min_g_k, butterfly, used, check_lo, check_hi, status,
                       scratch[task])


@_njit_sums
def _below(params, s, j, lo, hi, gs):
    """Total variance of slice s minus that of slice j (plus 1e-10 of the latter) at the
    grid points of [lo, hi]."""
    h = (hi - lo) / (G_POINTS - 1)
    a1, b1, r1, m1, q1 = params[s, 0], params[s, 1], params[s, 2], params[s, 3], params[s, 4]
    a0, b0, r0, m0, q0 = params[j, 0], params[j, 1], params[j, 2], params[j, 3], params[j, 4]
    for i in range(G_POINTS):
        kk = lo + h * i
        x1 = kk - m1
        x0 = kk - m0
        w1 = a1 + b1 * (r1 * x1 + math.sqrt(x1 * x1 + q1 * q1))
        w0 = a0 + b0 * (r0 * x0 + math.sqrt(x0 * x0 + q0 * q0))
        gs[i] = w1 - w0 + 1e-10 * abs(w0)


@_njit_par
def _calendar_all(surface, params, status, check_lo, check_hi, calendar, scratch):
    n = surface.shape[0]
    for task in prange((n + _SLICES_PER_TASK - 1) // _SLICES_PER_TASK):
        gs = scratch[task, _SCRATCH_FIXED:_SCRATCH_FIXED + G_POINTS]
        for s in range(task * _SLICES_PER_TASK, min(n, (task + 1) * _SLICES_PER_TASK)):
            calendar[s] = -1
            if status[s] != OK:
                continue
            calendar[s] = 0
            j = s - 1
            while j >= 0 and surface[j] == surface[s] and status[j] != OK:
                j -= 1
            if j < 0 or surface[j] != surface[s]:
                continue
            lo = max(check_lo[s], check_lo[j])     # where both slices are checked
            hi = min(check_hi[s], check_hi[j])
            if not lo < hi:
                continue
            _below(params, s, j, lo, hi, gs)
            for i in range(G_POINTS):
                if gs[i] < 0.0:
                    calendar[s] = 1
                    break


def fit_slices(offsets, lnk, iv, spread, ok, F, T, surface, arbitrage_free=False,
               work=None):
    """Fit one raw SVI slice per segment ``[offsets[s], offsets[s+1])`` of the rows.

    Rows of a segment must be in strike order.  ``lnk``: log-moneyness ln(K/F) per row;
    ``iv``: implied vols; ``ok``: int8, 1 where the quote's implied vol may be used;
    ``spread``: iv_ask - iv_bid (NaN where unknown); ``F``, ``T``: forward and years to
    expiry per row (a slice reports those of its first quote used); ``surface``: int64
    per slice, equal for the slices of one surface (the calendar check compares a slice
    with the previous fitted slice of its surface, so the slices of a surface must be in
    expiry order).  Returns a dict of per-slice arrays: ``params`` (n, 5: a, b, rho, m,
    sigma), ``forward``, ``expiry_years``, ``rmse_iv``, ``atm_vol``, ``atm_skew``,
    ``min_g``, ``min_g_k``, ``butterfly`` and ``calendar`` (int8: 1 yes, 0 no, -1 no
    value), ``quotes_used`` (int64), ``check_lo`` and ``check_hi`` (the checked range of
    k), ``status`` (int8, ``SLICE_NAMES``).
    ``work``: optionally three writable float64 arrays of the rows' length, overwritten
    (the caller's preallocated scratch).  Inputs are not modified.
    """
    offsets = np.ascontiguousarray(offsets, dtype=np.int64)
    lnk, iv, spread, F, T = (np.ascontiguousarray(x, dtype=np.float64)
                             for x in (lnk, iv, spread, F, T))
    ok = np.ascontiguousarray(ok, dtype=np.int8)
    surface = np.ascontiguousarray(surface, dtype=np.int64)
    n_rows = lnk.shape[0]
    ns = offsets.shape[0] - 1
    if ns < 0 or offsets[0] != 0 or offsets[-1] != n_rows or np.any(np.diff(offsets) < 0):
        raise ValueError("offsets must rise from 0 to the number of rows")
    for name, x in (("iv", iv), ("spread", spread), ("ok", ok), ("F", F), ("T", T)):
        if x.shape != (n_rows,):
            raise ValueError(f"{name} must have the length of lnk ({n_rows})")
    if surface.shape != (ns,):
        raise ValueError(f"surface must have one entry per slice ({ns})")
    out = {
        "params": np.empty((ns, _N_PARAMS)), "forward": np.empty(ns),
        "expiry_years": np.empty(ns), "rmse_iv": np.empty(ns), "atm_vol": np.empty(ns),
        "atm_skew": np.empty(ns), "min_g": np.empty(ns), "min_g_k": np.empty(ns),
        "butterfly": np.empty(ns, np.int8), "quotes_used": np.empty(ns, np.int64),
        "check_lo": np.empty(ns), "check_hi": np.empty(ns), "status": np.empty(ns, np.int8),
        "calendar": np.empty(ns, np.int8),
    }
    if ns == 0:
        return out
    if work is None:
        work = (np.empty(n_rows), np.empty(n_rows), np.empty(n_rows))
    for x in work:
        if not (isinstance(x, np.ndarray) and x.dtype == np.float64 and x.shape == (n_rows,)
                and x.flags.c_contiguous and x.flags.writeable):
            raise ValueError(f"work arrays must be writable float64 arrays of length {n_rows}")
    k, v, W = work
    scratch = np.empty(((ns + _SLICES_PER_TASK - 1) // _SLICES_PER_TASK,
                        _SUB + 3 * SEARCH_QUOTES))
    _fit_all(offsets, lnk, iv, spread, ok, F, T, bool(arbitrage_free), k, v, W,
             out["params"], out["forward"], out["expiry_years"], out["rmse_iv"],
             out["atm_vol"], out["atm_skew"], out["min_g"], out["min_g_k"],
             out["butterfly"], out["quotes_used"], out["check_lo"], out["check_hi"],
             out["status"], scratch)
    _calendar_all(surface, out["params"], out["status"], out["check_lo"], out["check_hi"],
                  out["calendar"], scratch)
    return out


# ------------------------------------------------------------ the fitted surface
@_njit
def _slice_w(params, j, k):
    return total_variance(k, params[j, 0], params[j, 1], params[j, 2], params[j, 3],
                          params[j, 4])


@_njit_par
def _surface_all(first, count, t_slices, params, row_surface, lnk, Tr, w_out, status):
    n = lnk.shape[0]
    for i in prange(n):
        w_out[i] = np.nan
        x = lnk[i]
        t = Tr[i]
        if not (x == x and t == t):
            status[i] = POINT_MISSING_INPUT
            continue
        if not (abs(x) < np.inf and t > 0.0 and t < np.inf):
            status[i] = POINT_BAD_INPUT
            continue
        sfc = row_surface[i]
        if sfc < 0 or count[sfc] == 0:
            status[i] = POINT_NO_SMILE
            continue
        j0 = first[sfc]
        nj = count[sfc]
        if t <= t_slices[j0]:                     # before the first: constant vol
            w = _slice_w(params, j0, x) * (t / t_slices[j0])
        elif t >= t_slices[j0 + nj - 1]:          # after the last: constant vol
            jl = j0 + nj - 1
            w = _slice_w(params, jl, x) * (t / t_slices[jl])
        else:                                     # linear in T at fixed k
            lo = j0
            hi = j0 + nj - 1
            while hi - lo > 1:
                mid = (lo + hi) // 2
                if t_slices[mid] <= t:
                    lo = mid
                else:
                    hi = mid
            u = (t - t_slices[lo]) / (t_slices[hi] - t_slices[lo])
            w = (1.0 - u) * _slice_w(params, lo, x) + u * _slice_w(params, hi, x)
        w_out[i] = w
        status[i] = POINT_OK if w > 0.0 else POINT_NEGATIVE_VARIANCE


def surface_points(first, count, t_slices, params, row_surface, lnk, T):
    """Total variance of the fitted surfaces at (log-moneyness lnk, years T) per row.

    Surface j's slices are rows ``first[j] .. first[j] + count[j] - 1`` of ``t_slices``
    (expiry years, strictly increasing) and ``params`` (a, b, rho, m, sigma).  Between two
    slices the total variance is linear in T at fixed k; before the first and after the
    last, the implied vol at fixed k is that of the nearest slice.  ``row_surface``:
    int64 surface per row (-1: none).  Returns (w, status int8 of ``POINT_NAMES``): NaN
    and missing_input where k or T is NaN, bad_input where k is +-inf or T <= 0 or +inf.
    """
    first = np.ascontiguousarray(first, dtype=np.int64)
    count = np.ascontiguousarray(count, dtype=np.int64)
    t_slices = np.ascontiguousarray(t_slices, dtype=np.float64)
    params = np.ascontiguousarray(params, dtype=np.float64)
    row_surface = np.ascontiguousarray(row_surface, dtype=np.int64)
    lnk, T = (np.ascontiguousarray(x, dtype=np.float64) for x in (lnk, T))
    n = lnk.shape[0]
    for name, x in (("T", T), ("row_surface", row_surface)):
        if x.shape != (n,):
            raise ValueError(f"{name} must have the length of lnk ({n})")
    w = np.empty(n)
    st = np.empty(n, np.int8)
    if n:
        _surface_all(first, count, t_slices, params, row_surface, lnk, T, w, st)
    return w, st
