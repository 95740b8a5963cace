"""Group kernels over option chains: implied forward and discount per group by put-call
parity, the model-free implied variance of each group, and constant-maturity variance.

Rows arrive grouped: ``starts`` (int64, groups + 1) cuts the row positions ``order``
(int64) into one contiguous segment per group, ``order[starts[g]:starts[g+1]]`` being the
rows of group g in any order.  The bindings build both with one sort of the group keys
(none when the input is already grouped); everything per group happens here, in parallel
over blocks of groups, with the same work per group whatever the data: each group's rows
are put in strike order inside its own segment (a stable merge sort, skipped when
already in order), and each thread works in its own small work space (sized by the largest group,
allocated once per call), so no loop allocates and no group depends on another.

Quotes: with ``quoted`` the quote of a row is its bid and ask (mid used, half-spread as its
uncertainty; a row whose bid is not positive, whose ask is missing or below the bid is left
out), else its ``bid`` array holds the premium (used when positive and finite).

**Implied forward and discount** (``forwards``).  Put-call parity (a published identity)
says C(K) - P(K) = D F - D K for European options of one expiry: a straight line in the
strike with slope -D and intercept D F.  Over the strikes where both a call and a put are
quoted, the line is fitted by a robust weighted regression:

1. weights 1 / (h_C^2 + h_P^2) from the half-spreads of the two quotes (the variance of
   C - P when each true value lies anywhere inside its spread), normalised to mean 1;
   equal weights for premiums;
2. a start that no minority of bad quotes can move: the slope as the median of the
   slopes between each pair and the pair half the chain away (Theil 1950, the abbreviated
   form of his rank-invariant method; it tolerates up to a quarter of the pairs
   corrupted, with m/2 slopes instead of Sen's (1968) m^2/2), the intercept as the median
   of y - b x; the scale as 1.4826 times the median absolute weighted residual (MAD), but
   at least the smallest one above rounding (quotes on a tick grid can put more than
   half the pairs on one line, where the MAD would be rounding and reject the others);
3. iteratively reweighted least squares with Tukey's biweight (Beaton and Tukey 1974),
   c = 4.685 (95% efficiency under normal errors): a quote more than c scales off the
   line gets weight 0, so a stale or outlying quote is ignored, not just damped (Huber's
   weights would leave a bias proportional to its size); the scale is taken again from
   the residuals halfway through.  A fixed number of steps (``_IRLS_STEPS`` = 4) keeps
   the work per group the same: from a start this good, a few steps of an M-estimator
   are as efficient as iterating to convergence (Bickel 1975, one-step M-estimates in
   the linear model).  With exact prices every weight stays 1 and the result is the
   weighted least-squares line, exact to rounding.

The fit works in the strike centred on the middle pair (conditioning), and returns
F = K_c + a / D from the intercept a at K_c, without cancellation.  With the discount
given (a ``rate`` or ``discount`` column) only F is fitted: the same steps on the
location of C - P + D K (= D F).

**Model-free implied variance** (``strip_variance``).  The variance of the log return to
expiry under the forward measure is the price of a log contract, replicated by
out-of-the-money options (Demeterfi, Derman, Kamal and Zou 1999; Britten-Jones and
Neuberger 2000):

    sigma^2 T = (2 / D) [ int_0^F P(K) / K^2 dK + int_F^inf C(K) / K^2 dK ].

Discretised the way exchanges' published volatility-index methodologies do: K_0 is the
listed strike at or just below the forward; puts below K_0, calls above, the average of
the call and the put at K_0; from K_0 outwards a strike is used while it has a usable
out-of-the-money quote, and the strip ends at the first two strikes in a row without
one; each strike weighs dK_i / K_i^2 with dK_i half the distance between its neighbours
in the strip (the whole distance to the one neighbour at either end); and
(1/T)(F / K_0 - 1)^2 is subtracted, which removes the first-order error of splitting the
strip at K_0 instead of at F:

    sigma^2 = (2 / (T D)) sum_i dK_i / K_i^2 Q(K_i)  -  (1 / T) (F / K_0 - 1)^2.

Errors against the integral: the sum is a midpoint-type rule, whose error is of order
h^2 / 24 times the integral of the second derivative of Q(K)/K^2 for a strike step h
(smaller on a finer grid, largest for short expiries where Q bends sharply near the
forward); truncation leaves out the option value beyond the first and last strikes used
(small when the strikes reach several standard deviations into each wing; nothing is
extrapolated).  ``tests/test_chains.py`` measures both against scipy's quadrature.

**Constant-maturity variance** (``horizon_variance``): per underlying, the total variance
w = sigma^2 T of the expiries is interpolated linearly in T between the two expiries
that bracket the horizon (an expiry equal to the horizon is used as it is), and divided
by the horizon.  Outside the listed expiries nothing, or with ``extrapolate`` the
variance (not the total variance) of the nearest expiry, flagged ``extrapolated``.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba import prange

from ._jit import FASTMATH

# Group statuses (int8 codes, append only).  One vocabulary for every group operation.
OK = 0
MISSING_TIME = 1            # no row of the group has a finite time to expiry
EXPIRED = 2                 # time to expiry <= 0
INCONSISTENT_INPUTS = 3     # rows of the group disagree on the time, discount or forward
BAD_DISCOUNT = 4            # a given discount factor (or rate) not positive and finite
TOO_FEW_PAIRS = 5           # fewer than min_pairs strikes with a usable call and put
DISCOUNT_OUT_OF_RANGE = 6   # fitted discount not positive, or its rate outside the range
FORWARD_NOT_POSITIVE = 7    # fitted or given forward not positive and finite
MISSING_FORWARD = 8         # no forward for the variance (no given forward column value)
TOO_FEW_STRIKES = 9         # fewer than MIN_STRIKES strikes in the strip
VARIANCE_NOT_POSITIVE = 10  # the strip's variance is not positive and finite
NO_EXPIRIES = 11            # constant maturity: no expiry of the underlying has a variance
BEFORE_FIRST_EXPIRY = 12    # constant maturity: horizon before the first expiry
AFTER_LAST_EXPIRY = 13      # constant maturity: horizon after the last expiry
EXTRAPOLATED = 14           # constant maturity: value carried from the nearest expiry

NAMES = (
    "ok",
    "missing_time",
    "expired",
    "inconsistent_inputs",
    "bad_discount",
    "too_few_pairs",
    "discount_out_of_range",
    "forward_not_positive",
    "missing_forward",
    "too_few_strikes",
    "variance_not_positive",
    "no_expiries",
    "before_first_expiry",
    "after_last_expiry",
    "extrapolated",
)

MIN_STRIKES = 3        # a strip needs at least three strikes
TUKEY_C = 4.685        # biweight tuning constant, 95% efficiency under normal errors
MAD_SCALE = 1.4826     # MAD -> standard deviation under normal errors
_IRLS_STEPS = 4        # reweighting steps per group (fixed: the same work everywhere)
_RESCALE_STEP = 2      # the scale is taken again from the residuals before this step
_REL_TIME = 1e-12      # rows of a group agree on T, D, F within this relative difference
GROUP_BLOCK = 16       # groups per parallel task

_njit = numba.njit(error_model="numpy", fastmath=set(FASTMATH), cache=True, nogil=True)
# The weighted sums of the reweighting steps are added in source order (no ``reassoc``):
# with it, the order LLVM chose depended on the compile (a cold compile in the test
# process and the cached code in a Dask worker gave forwards a few ulps apart), and the
# backfill promises the single-process bits.  No ``nnan``/``ninf``: the NaN tests that
# decide the statuses must stay.
_njit_sums = numba.njit(error_model="numpy", fastmath=set(FASTMATH), cache=True, nogil=True)


# ------------------------------------------------------------------ sorting helpers

@_njit
def _strike_key(k):
    """The sort key of a strike: NaN sorts with +inf, last (both are unusable)."""
    return k if k == k else np.inf


@_njit
def _sort_rows(idx, a, e, K, key, key2, tmp):
    """Put the row positions idx[a:e] in strike order (NaN last), stably (rows of one
    strike keep their order), in place; nothing to do when they already are.  A bottom-up
    merge sort through the work arrays ``key``, ``key2`` (float) and ``tmp`` (int64), at
    least e - a long: no allocation, no data-dependent worst case."""
    m = e - a
    done = True
    prev = -np.inf
    for i in range(m):
        k = _strike_key(K[idx[a + i]])
        key[i] = k
        if k < prev:
            done = False
        prev = k
    if done:
        return
    src_k, dst_k = key, key2
    src_i = idx[a:e]
    dst_i = tmp
    in_idx = True                   # src_i is the idx slice
    width = 1
    while width < m:
        lo = 0
        while lo < m:
            mid = min(lo + width, m)
            hi = min(lo + 2 * width, m)
            i = lo
            j = mid
            o = lo
            while i < mid and j < hi:
                if src_k[j] < src_k[i]:
                    dst_k[o] = src_k[j]
                    dst_i[o] = src_i[j]
                    j += 1
                else:
                    dst_k[o] = src_k[i]
                    dst_i[o] = src_i[i]
                    i += 1
                o += 1
            while i < mid:
                dst_k[o] = src_k[i]
                dst_i[o] = src_i[i]
                i += 1
                o += 1
            while j < hi:
                dst_k[o] = src_k[j]
                dst_i[o] = src_i[j]
                j += 1
                o += 1
            lo = hi
        src_k, dst_k = dst_k, src_k
        if in_idx:
            src_i, dst_i = tmp, idx[a:e]
        else:
            src_i, dst_i = idx[a:e], tmp
        in_idx = not in_idx
        width *= 2
    if not in_idx:                  # the sorted positions are in tmp
        for i in range(m):
            idx[a + i] = tmp[i]


@_njit
def _median(v, a, m):
    """Median of v[a:a+m] (m >= 1; v[a:a+m] is reordered)."""
    h = m // 2
    hi_mid = _select(v, a, m, h)
    if m % 2:
        return hi_mid
    # after the selection every element before position a+h is <= v[a+h]
    lo_mid = v[a]
    for i in range(a + 1, a + h):
        lo_mid = max(lo_mid, v[i])
    return 0.5 * (lo_mid + hi_mid)


@_njit
def _select(v, a, m, k):
    """The k-th smallest (0-based) of v[a:a+m], left at v[a+k] with no larger element
    before it and no smaller one after it.

    Hoare's selection (FIND, 1961) with a median-of-three pivot, partitioning by Lomuto's
    scheme written without branches (a swap every step, the boundary moved by the
    comparison): on data that differ from group to group the branches of the classic
    partition are mispredicted about half the time, and cost more than the swaps.  A
    round that finds nothing below the pivot splits off the elements equal to it by a
    second such pass, so ties cannot make it quadratic.  Linear time on average.
    """
    lo = a
    hi = a + m
    kk = a + k
    while hi - lo > 2:
        x = v[lo]
        y = v[(lo + hi) >> 1]
        z = v[hi - 1]
        pivot = max(min(x, y), min(max(x, y), z))
        s = lo
        for i in range(lo, hi):
            t = v[i]
            v[i] = v[s]
            v[s] = t
            s += t < pivot
        if kk < s:
            hi = s
            continue
        if s > lo:
            lo = s
            continue
        # nothing below the pivot: split off the elements equal to it
        for i in range(lo, hi):
            t = v[i]
            v[i] = v[s]
            v[s] = t
            s += t <= pivot
        if kk < s or s == lo:     # v[kk] is the pivot (or only NaNs are left)
            return v[kk]
        lo = s
    if hi - lo == 2 and v[lo + 1] < v[lo]:
        v[lo], v[lo + 1] = v[lo + 1], v[lo]
    return v[kk]


# ------------------------------------------------------------------ per-group inputs

@_njit
def _quote(r, bid, ask, quoted):
    """(mid, half-spread) of row r, or (NaN, NaN) when it has no usable quote."""
    nan = np.nan
    b = bid[r]
    if quoted:
        x = ask[r]
        if not (b > 0.0 and x >= b and x < np.inf):
            return nan, nan
        return 0.5 * (b + x), 0.5 * (x - b)
    if not (b > 0.0 and b < np.inf):
        return nan, nan
    return b, nan


@_njit
def _group_value(idx, a, e, X):
    """(value, status) of a per-row input that must be one value per group: the first
    finite value of the group's rows; MISSING_TIME-style 1 when none is finite,
    INCONSISTENT_INPUTS when two finite values differ by more than _REL_TIME."""
    v = np.nan
    for i in range(a, e):
        x = X[idx[i]]
        if abs(x) < np.inf:
            if v != v:
                v = x
            elif abs(x - v) > _REL_TIME * abs(v):
                return v, INCONSISTENT_INPUTS
    if v != v:
        return v, MISSING_TIME
    return v, OK


@_njit
def _pairs(idx, a, e, K, cp, bid, ask, T, D, quoted, fit_discount, x, y, v):
    """The group's parity pairs, written to x, y, v at [0, m): strike, C - P and the
    variance proxy h_C^2 + h_P^2 (NaN for premiums); returns m, or -1 when idx[a:e] is
    not in strike order (NaN strikes last): sort, then call again.  At a strike with
    several usable calls (or puts) the first in row order is used."""
    m = 0
    prev_k = -np.inf
    c_mid = np.nan
    c_h = np.nan
    p_mid = np.nan
    p_h = np.nan
    for j in range(a, e):
        r = idx[j]
        k = _strike_key(K[r])
        c = cp[r]
        if k < prev_k:
            return -1
        if k != prev_k:
            if c_mid == c_mid and p_mid == p_mid:
                x[m] = prev_k
                y[m] = c_mid - p_mid
                v[m] = c_h * c_h + p_h * p_h
                m += 1
            c_mid = np.nan
            p_mid = np.nan
            prev_k = k
        if k > 0.0 and k < np.inf and abs(T[r]) < np.inf and \
                (fit_discount or abs(D[r]) < np.inf):
            mid, h = _quote(r, bid, ask, quoted)
            if mid == mid:
                if c == 1 and c_mid != c_mid:
                    c_mid = mid
                    c_h = h
                elif c == -1 and p_mid != p_mid:
                    p_mid = mid
                    p_h = h
    if c_mid == c_mid and p_mid == p_mid:
        x[m] = prev_k
        y[m] = c_mid - p_mid
        v[m] = c_h * c_h + p_h * p_h
        m += 1
    return m


@_njit
def _weights(v, a, m, quoted):
    """The square roots of the spread weights 1 / v, in place: v floored at 1e-6 of its
    mean, the weights normalised to mean 1 (all 1 for premiums or when no pair has a
    spread)."""
    total = 0.0
    for i in range(a, a + m):
        total += v[i]
    mean = total / m
    if not quoted or not mean > 0.0 or not mean < np.inf:
        for i in range(a, a + m):
            v[i] = 1.0
        return
    floor = 1e-6 * mean
    s = 0.0
    for i in range(a, a + m):
        w = 1.0 / max(v[i], floor)
        v[i] = w
        s += w
    s = m / s
    for i in range(a, a + m):
        v[i] = math.sqrt(v[i] * s)


@_njit
def _scale(x, y, sw, a, m, icpt, slope, work, floor):
    """1.4826 * median |residual| * sqrt(weight) (the MAD), at least the smallest such
    residual above 1e4 * ``floor`` (rounding) and at least ``floor``.  Quotes on a price
    grid can put more than half the pairs on one line up to rounding (their mids differ
    from the truth by the same quarter tick); the MAD alone is then of the order of the
    rounding, and every other pair would be thrown out."""
    smallest = np.inf
    zero = 1e4 * floor
    for i in range(a, a + m):
        r = abs(y[i] - icpt - slope * x[i]) * sw[i]
        work[i] = r
        if r > zero:
            smallest = min(smallest, r)
    s = MAD_SCALE * _median(work, a, m)
    if smallest < np.inf:
        s = max(s, smallest)
    return max(s, floor)


@_njit_sums
def _fit_group(x, y, sw, work, a, m, center, fixed_d, fit_discount):
    """Robust fit of y = icpt + slope * x over [a, a + m) (x: the strike minus
    ``center``; ``sw``: square roots of the spread weights); the slope fixed at
    -fixed_d unless fit_discount.  Returns (icpt, slope, pairs with weight > 0, RMS
    residual of those)."""
    nan = np.nan
    # ---- robust start
    if fit_discount:
        h = m // 2
        cnt = m - h
        for i in range(cnt):
            work[a + i] = (y[a + i + h] - y[a + i]) / (x[a + i + h] - x[a + i])
        slope = _median(work, a, cnt)
    else:
        slope = -fixed_d
    for i in range(a, a + m):
        work[i] = y[i] - slope * x[i]
    icpt = _median(work, a, m)
    floor = 1e-13 * max(abs(center), 1e-300)
    sigma = _scale(x, y, sw, a, m, icpt, slope, work, floor)
    # ---- reweighting, a fixed number of steps
    used = 0
    least = 2 if fit_discount else 1
    for step in range(_IRLS_STEPS):
        if step == _RESCALE_STEP:
            sigma = _scale(x, y, sw, a, m, icpt, slope, work, floor)
        inv = 1.0 / (TUKEY_C * sigma)
        s0 = 0.0
        sx = 0.0
        sy = 0.0
        sxx = 0.0
        sxy = 0.0
        used = 0
        for i in range(a, a + m):
            xi = x[i]
            yi = y[i]
            si = sw[i]
            u = (yi - icpt - slope * xi) * si * inv
            t = 1.0 - u * u
            q = si * si * t * t if t > 0.0 else 0.0
            work[i] = q
            used += q > 0.0
            s0 += q
            sx += q * xi
            sy += q * yi
            sxx += q * xi * xi
            sxy += q * xi * yi
        if used < least:
            return nan, nan, used, nan
        xm = sx / s0
        ym = sy / s0
        if fit_discount:
            vxx = sxx / s0 - xm * xm
            if not vxx > 0.0:
                return nan, nan, used, nan
            slope = (sxy / s0 - xm * ym) / vxx
        icpt = ym - slope * xm
    # ---- the pairs kept and their residual
    ss = 0.0
    for i in range(a, a + m):
        if work[i] > 0.0:
            r = y[i] - icpt - slope * x[i]
            ss += r * r
    return icpt, slope, used, math.sqrt(ss / used)


@_njit
def _forward_group(g, starts, idx, K, cp, bid, ask, T, D, quoted, fit_discount, min_pairs,
                   rate_lo, rate_hi, x, y, v, work, itmp, t_out, f_out, d_out, n_out,
                   res_out, st_out):
    nan = np.nan
    a = starts[g]
    e = starts[g + 1]
    t_out[g] = nan
    f_out[g] = nan
    d_out[g] = nan
    n_out[g] = 0
    res_out[g] = nan
    t, st = _group_value(idx, a, e, T)
    if st != OK:
        st_out[g] = st
        return
    t_out[g] = t
    if t <= 0.0:
        st_out[g] = EXPIRED
        return
    d = nan
    if not fit_discount:
        d, st = _group_value(idx, a, e, D)
        if st == MISSING_TIME:
            st = BAD_DISCOUNT
        if st != OK:
            st_out[g] = st
            return
        if not d > 0.0:
            st_out[g] = BAD_DISCOUNT
            return
    m = _pairs(idx, a, e, K, cp, bid, ask, T, D, quoted, fit_discount, x, y, v)
    if m < 0:
        _sort_rows(idx, a, e, K, x, y, itmp)
        m = _pairs(idx, a, e, K, cp, bid, ask, T, D, quoted, fit_discount, x, y, v)
    n_out[g] = m
    if m < max(min_pairs, 2 if fit_discount else 1):
        st_out[g] = TOO_FEW_PAIRS
        return
    _weights(v, 0, m, quoted)
    center = x[m // 2]
    for i in range(m):
        x[i] -= center
    icpt, slope, used, res = _fit_group(x, y, v, work, 0, m, center, d, fit_discount)
    n_out[g] = used
    if not slope == slope or used < max(min_pairs, 2 if fit_discount else 1):
        st_out[g] = TOO_FEW_PAIRS
        return
    res_out[g] = res
    if fit_discount:
        d = -slope
    f = center + icpt / d
    d_out[g] = d
    f_out[g] = f
    st = OK
    if fit_discount:
        rate = -math.log(d) / t if d > 0.0 else nan
        if not (rate >= rate_lo and rate <= rate_hi):
            st = DISCOUNT_OUT_OF_RANGE
    if st == OK and not (f > 0.0 and f < np.inf):
        st = FORWARD_NOT_POSITIVE
    st_out[g] = st
    if st != OK:
        f_out[g] = nan
        d_out[g] = nan
        res_out[g] = nan


@_njit
def _forward_groups(a, e, starts, idx, K, cp, bid, ask, T, D, quoted, fit_discount,
                    min_pairs, rate_lo, rate_hi, x, y, v, work, itmp, t_out, f_out, d_out,
                    n_out, res_out, st_out):
    for g in range(a, e):
        _forward_group(g, starts, idx, K, cp, bid, ask, T, D, quoted, fit_discount,
                       min_pairs, rate_lo, rate_hi, x, y, v, work, itmp, t_out, f_out,
                       d_out, n_out, res_out, st_out)


@numba.njit(parallel=True, error_model="numpy", fastmath=set(FASTMATH), cache=True,
            nogil=True)
def _forward_par(starts, idx, K, cp, bid, ask, T, D, quoted, fit_discount, min_pairs,
                 rate_lo, rate_hi, scratch, iscratch, t_out, f_out, d_out, n_out, res_out,
                 st_out):
    n_groups = starts.shape[0] - 1
    for blk in prange((n_groups + GROUP_BLOCK - 1) // GROUP_BLOCK):
        a = blk * GROUP_BLOCK
        e = min(n_groups, a + GROUP_BLOCK)
        tid = numba.get_thread_id()             # this thread's work space
        w = scratch[tid]
        _forward_groups(a, e, starts, idx, K, cp, bid, ask, T, D, quoted, fit_discount,
                        min_pairs, rate_lo, rate_hi, w[0], w[1], w[2], w[3], iscratch[tid],
                        t_out, f_out, d_out, n_out, res_out, st_out)


# ------------------------------------------------------------------ argument checks

def _scratch(starts, k):
    """Work space: k float arrays and one int64 array of the largest group's size per
    thread (a thread works on one group at a time, so its arrays stay in cache; nothing
    is allocated in the loops)."""
    largest = max(int(np.max(np.diff(starts))) if starts.shape[0] > 1 else 0, 1)
    threads = numba.config.NUMBA_NUM_THREADS
    return np.empty((threads, k, largest)), np.empty((threads, largest), np.int64)


def _ro(a, dtype):
    a = np.ascontiguousarray(a, dtype=dtype)
    if a.flags.writeable:
        a = a.view()
        a.flags.writeable = False
    return a


@numba.njit(parallel=True, error_model="numpy", cache=True, nogil=True)
def _within(idx, n):
    """Every position in [0, n) (the loops do no bounds checks)."""
    bad = 0
    for i in prange(idx.shape[0]):
        bad += (idx[i] < 0) | (idx[i] >= n)
    return bad == 0


def _rows_args(starts, order, K, cp, bid, ask, T, own_order=False):
    starts = _ro(starts, np.int64)
    K, bid, ask, T = (_ro(z, np.float64) for z in (K, bid, ask, T))
    n = K.shape[0]
    for name, z in (("bid", bid), ("ask", ask), ("T", T)):
        if z.shape != (n,):
            raise ValueError(f"{name} must have shape {(n,)}, got {z.shape}")
    cp = np.asarray(cp)
    if cp.shape != (n,) or not np.issubdtype(cp.dtype, np.integer):
        raise ValueError(f"cp must be integer codes of shape {(n,)}")
    if cp.dtype != np.int8:       # the kernels read +1 as a call, -1 as a put, else missing
        cp = np.where((cp == 1) | (cp == -1), cp, 0).astype(np.int8)
    cp = _ro(cp, np.int8)
    if starts.ndim != 1 or starts.shape[0] < 1 or starts[0] != 0 or \
            np.any(np.diff(starts) < 0) or starts[-1] > n:
        raise ValueError("starts must rise from 0 to at most the number of rows")
    # the kernels sort each group's row positions in place: a copy unless the caller
    # hands its own (a writable int64 array it does not need in its order any more)
    idx = order if own_order and isinstance(order, np.ndarray) and order.dtype == np.int64 \
        and order.flags.writeable and order.flags.c_contiguous else \
        np.array(order, dtype=np.int64)
    if idx.shape != (int(starts[-1]),) or not _within(idx, n):
        raise ValueError("order must hold starts[-1] row positions within the rows")
    return starts, idx, K, cp, bid, ask, T


def forwards(starts, order, K, cp, bid, ask, T, D=None, *, quoted=True, min_pairs=3,
             rate_range=(-0.2, 1.0), idx_out=None, own_order=False):
    """Implied forward and discount of every group by put-call parity (see the module
    docstring).

    ``starts``, ``order``: the groups (see the module docstring); ``K``, ``cp`` (+1 call,
    -1 put), ``bid``, ``ask`` (with ``quoted=False``, ``bid`` is the premium and ``ask``
    is not read), ``T`` per row; ``D`` per row, or None to fit it.  ``min_pairs``: the
    fewest usable call/put pairs a group needs (at least 2 when D is fitted, 1 when
    given); ``rate_range``: the sane range of the implied rate -ln(D)/T.

    Returns a dict of per-group arrays: ``T``, ``forward``, ``discount``, ``pairs_used``
    (int64), ``residual`` (RMS of C - P - D (F - K) over the pairs kept, in currency) and
    ``status`` (int8 codes of ``NAMES``).  ``idx_out``: when given, a dict that receives
    ``order`` with each group's rows in strike order (reused by ``strip_variance``).
    ``own_order``: sort ``order`` itself in place (each group's rows stay its rows)
    instead of a copy.
    """
    starts, idx, K, cp, bid, ask, T = _rows_args(starts, order, K, cp, bid, ask, T,
                                                 own_order)
    fit_discount = D is None
    n = K.shape[0]
    D = _ro(np.zeros(n) if fit_discount else D, np.float64)
    if D.shape != (n,):
        raise ValueError(f"D must have shape {(n,)}, got {D.shape}")
    if int(min_pairs) < 1:
        raise ValueError("min_pairs must be >= 1")
    lo, hi = (float(z) for z in rate_range)
    G = starts.shape[0] - 1
    scratch, iscratch = _scratch(starts, 4)
    out = {"T": np.empty(G), "forward": np.empty(G), "discount": np.empty(G),
           "pairs_used": np.empty(G, np.int64), "residual": np.empty(G),
           "status": np.empty(G, np.int8)}
    head = (starts, idx, K, cp, bid, ask, T, D, bool(quoted), fit_discount, int(min_pairs),
            lo, hi)
    tail = (out["T"], out["forward"], out["discount"], out["pairs_used"], out["residual"],
            out["status"])
    if G <= GROUP_BLOCK:
        w = scratch[0]
        _forward_groups(0, G, *head, w[0], w[1], w[2], w[3], iscratch[0], *tail)
    else:
        _forward_par(*head, scratch, iscratch, *tail)
    if idx_out is not None:
        idx_out["order"] = idx
    return out


# ------------------------------------------------------------------ variance strip

@_njit
def _strip(idx, a, e, K, cp, bid, ask, T, quoted, ks, cm, pm):
    """Distinct usable strikes of the group, in order, into ks[0:m], with the call and
    put mids (NaN where that side has no usable quote) in cm, pm; returns m.  idx[a:e]
    is in strike order."""
    m = 0
    i = a
    while i < e:
        k = K[idx[i]]
        if k != k:
            break
        c_mid = np.nan
        p_mid = np.nan
        j = i
        while j < e and K[idx[j]] == k:
            r = idx[j]
            if k > 0.0 and k < np.inf and abs(T[r]) < np.inf:
                mid, h = _quote(r, bid, ask, quoted)
                if mid == mid:
                    if cp[r] == 1 and c_mid != c_mid:
                        c_mid = mid
                    elif cp[r] == -1 and p_mid != p_mid:
                        p_mid = mid
            j += 1
        if c_mid == c_mid or p_mid == p_mid:
            ks[m] = k
            cm[m] = c_mid
            pm[m] = p_mid
            m += 1
        i = j
    return m


@_njit
def _variance_group(g, starts, idx, K, cp, bid, ask, T, quoted, F, D, Tg, st_in, ks, cm,
                    pm, itmp, var_out, n_out, st_out):
    nan = np.nan
    var_out[g] = nan
    n_out[g] = 0
    if st_in[g] != OK:
        st_out[g] = st_in[g]
        return
    a = starts[g]
    e = starts[g + 1]
    f = F[g]
    d = D[g]
    t = Tg[g]
    _sort_rows(idx, a, e, K, ks, cm, itmp)
    m = _strip(idx, a, e, K, cp, bid, ask, T, quoted, ks, cm, pm)
    # K0: the largest strike at or below the forward
    i0 = -1
    for i in range(m):
        if ks[i] <= f:
            i0 = i
    if i0 < 0:
        st_out[g] = TOO_FEW_STRIKES
        return
    k0 = ks[i0]
    if cm[i0] == cm[i0] and pm[i0] == pm[i0]:
        q0 = 0.5 * (cm[i0] + pm[i0])
    elif pm[i0] == pm[i0]:
        q0 = pm[i0]
    else:
        q0 = cm[i0]
    # walk out from K0 each way, up to the first two strikes in a row without a quote
    lo = i0
    miss = 0
    i = i0 - 1
    while i >= 0 and miss < 2:
        if pm[i] == pm[i]:
            lo = i
            miss = 0
        else:
            miss += 1
        i -= 1
    hi = i0
    miss = 0
    i = i0 + 1
    while i < m and miss < 2:
        if cm[i] == cm[i]:
            hi = i
            miss = 0
        else:
            miss += 1
        i += 1
    # the strikes used and their out-of-the-money quotes, compacted to ks/cm[0:u]
    # (position u <= i: nothing is overwritten before it is read)
    u = 0
    for i in range(lo, hi + 1):
        q = pm[i] if i < i0 else (cm[i] if i > i0 else q0)
        if q == q:
            ks[u] = ks[i]
            cm[u] = q
            u += 1
    n_out[g] = u
    if u < MIN_STRIKES:
        st_out[g] = TOO_FEW_STRIKES
        return
    total = 0.0
    for i in range(u):
        if i == 0:
            dk = ks[1] - ks[0]
        elif i == u - 1:
            dk = ks[i] - ks[i - 1]
        else:
            dk = 0.5 * (ks[i + 1] - ks[i - 1])
        total += dk / (ks[i] * ks[i]) * cm[i]
    z = f / k0 - 1.0
    var = 2.0 * total / (t * d) - z * z / t
    if not (var > 0.0 and var < np.inf):
        st_out[g] = VARIANCE_NOT_POSITIVE
        return
    var_out[g] = var
    st_out[g] = OK


@_njit
def _variance_groups(a, e, starts, idx, K, cp, bid, ask, T, quoted, F, D, Tg, st_in, ks,
                     cm, pm, itmp, var_out, n_out, st_out):
    for g in range(a, e):
        _variance_group(g, starts, idx, K, cp, bid, ask, T, quoted, F, D, Tg, st_in, ks, cm,
                        pm, itmp, var_out, n_out, st_out)


@numba.njit(parallel=True, error_model="numpy", fastmath=set(FASTMATH), cache=True,
            nogil=True)
def _variance_par(starts, idx, K, cp, bid, ask, T, quoted, F, D, Tg, st_in, scratch,
                  iscratch, var_out, n_out, st_out):
    n_groups = starts.shape[0] - 1
    for blk in prange((n_groups + GROUP_BLOCK - 1) // GROUP_BLOCK):
        a = blk * GROUP_BLOCK
        e = min(n_groups, a + GROUP_BLOCK)
        tid = numba.get_thread_id()             # this thread's work space
        w = scratch[tid]
        _variance_groups(a, e, starts, idx, K, cp, bid, ask, T, quoted, F, D, Tg, st_in,
                         w[0], w[1], w[2], iscratch[tid], var_out, n_out, st_out)


def strip_variance(starts, order, K, cp, bid, ask, T, F, D, Tg, status_in=None, *,
                   quoted=True, own_order=False):
    """Model-free implied variance (annualised) of every group from its out-of-the-money
    strip (see the module docstring).

    Rows as for ``forwards``; per group: ``F`` forward, ``D`` discount, ``Tg`` time to
    expiry and ``status_in`` (int8; a group whose status is not ok keeps it and gets no
    variance; None: all ok).  Returns a dict of per-group arrays ``variance``,
    ``strikes_used`` (int64) and ``status``; ``own_order`` as for ``forwards``."""
    starts, idx, K, cp, bid, ask, T = _rows_args(starts, order, K, cp, bid, ask, T,
                                                 own_order)
    G = starts.shape[0] - 1
    F, D, Tg = (_ro(z, np.float64) for z in (F, D, Tg))
    st_in = _ro(np.zeros(G, np.int8) if status_in is None else status_in, np.int8)
    for name, z in (("F", F), ("D", D), ("Tg", Tg), ("status_in", st_in)):
        if z.shape != (G,):
            raise ValueError(f"{name} must have one value per group, shape {(G,)}")
    scratch, iscratch = _scratch(starts, 3)
    out = {"variance": np.empty(G), "strikes_used": np.empty(G, np.int64),
           "status": np.empty(G, np.int8)}
    head = (starts, idx, K, cp, bid, ask, T, bool(quoted), F, D, Tg, st_in)
    tail = (out["variance"], out["strikes_used"], out["status"])
    if G <= GROUP_BLOCK:
        w = scratch[0]
        _variance_groups(0, G, *head, w[0], w[1], w[2], iscratch[0], *tail)
    else:
        _variance_par(*head, scratch, iscratch, *tail)
    return out


# ------------------------------------------------------------------ constant maturity

@_njit
def _horizon_group(g, starts, T, V, ok, horizons, extrapolate, var_out, near_out, far_out,
                   st_out):
    a = starts[g]
    e = starts[g + 1]
    H = horizons.shape[0]
    # the group's usable expiries, in the caller's order (sorted by time by the caller)
    first = -1
    last = -1
    for i in range(a, e):
        if ok[i]:
            if first < 0:
                first = i
            last = i
    for h in range(H):
        o = g * H + h
        tau = horizons[h]
        var_out[o] = np.nan
        near_out[o] = np.nan
        far_out[o] = np.nan
        if first < 0:
            st_out[o] = NO_EXPIRIES
            continue
        if tau < T[first]:
            if extrapolate:
                var_out[o] = V[first]
                far_out[o] = T[first]
                st_out[o] = EXTRAPOLATED
            else:
                st_out[o] = BEFORE_FIRST_EXPIRY
            continue
        if tau > T[last]:
            if extrapolate:
                var_out[o] = V[last]
                near_out[o] = T[last]
                st_out[o] = EXTRAPOLATED
            else:
                st_out[o] = AFTER_LAST_EXPIRY
            continue
        lo = first
        hi = last
        for i in range(first, last + 1):
            if ok[i]:
                if T[i] <= tau:
                    lo = i
                if T[i] >= tau:
                    hi = i
                    break
        w1 = V[lo] * T[lo]
        w2 = V[hi] * T[hi]
        if hi == lo or T[hi] == T[lo]:
            w = w1 if T[lo] == tau else w2
            var = w / tau
        else:
            w = w1 + (w2 - w1) * (tau - T[lo]) / (T[hi] - T[lo])
            var = w / tau
        near_out[o] = T[lo]
        far_out[o] = T[hi]
        if var > 0.0 and var < np.inf:
            var_out[o] = var
            st_out[o] = OK
        else:
            st_out[o] = VARIANCE_NOT_POSITIVE


@_njit
def _horizon_groups(starts, T, V, ok, horizons, extrapolate, var_out, near_out, far_out,
                    st_out):
    for g in range(starts.shape[0] - 1):
        _horizon_group(g, starts, T, V, ok, horizons, extrapolate, var_out, near_out,
                       far_out, st_out)


def horizon_variance(starts, T, V, ok, horizons, *, extrapolate=False):
    """Constant-maturity variance per group of expiries (see the module docstring).

    ``starts`` cuts the expiries (``T`` years, ``V`` annualised variance, ``ok`` bool:
    usable) into groups, each sorted by ``T``; ``horizons`` in years (> 0).  Returns a
    dict of arrays of shape (groups * horizons,), group-major: ``variance``,
    ``near_expiry_years``, ``far_expiry_years``, ``status``."""
    starts = _ro(starts, np.int64)
    T, V, horizons = (_ro(z, np.float64) for z in (T, V, horizons))
    ok = _ro(ok, np.bool_)
    n = T.shape[0]
    if V.shape != (n,) or ok.shape != (n,) or starts[-1] != n:
        raise ValueError("T, V and ok must have one value per expiry")
    G = starts.shape[0] - 1
    size = G * horizons.shape[0]
    out = {"variance": np.empty(size), "near_expiry_years": np.empty(size),
           "far_expiry_years": np.empty(size), "status": np.empty(size, np.int8)}
    _horizon_groups(starts, T, V, ok, horizons, bool(extrapolate), out["variance"],
                    out["near_expiry_years"], out["far_expiry_years"], out["status"])
    return out


# ------------------------------------------------------------------ segmentation

@_njit
def _segment(keys, starts):
    n = keys[0].shape[0]
    nk = len(keys)
    starts[0] = 0
    if n == 0:
        return 0
    g = 0
    for i in range(1, n):
        for j in range(nk):
            a = keys[j][i - 1]
            b = keys[j][i]
            if a != b:
                if b < a:
                    return -1
                g += 1
                starts[g] = i
                break
    g += 1
    starts[g] = n
    return g


def segment(keys):
    """Group starts of rows whose int64 ``keys`` (a sequence of 1-d arrays, one per key)
    are already in ascending lexicographic order: an int64 array (groups + 1); None when
    they are not in order (then sort first)."""
    keys = tuple(_ro(k, np.int64) for k in keys)
    n = keys[0].shape[0]
    if any(k.shape != (n,) for k in keys):
        raise ValueError("keys must be 1-d arrays of one length")
    starts = np.empty(n + 1, np.int64)
    g = _segment(keys, starts)
    if g < 0:
        return None
    return starts[:g + 1].copy()


@_njit
def _group_inputs(starts, idx, T, D, F, t_out, d_out, f_out, st_out):
    for g in range(starts.shape[0] - 1):
        a = starts[g]
        e = starts[g + 1]
        t_out[g] = np.nan
        d_out[g] = np.nan
        f_out[g] = np.nan
        t, st = _group_value(idx, a, e, T)
        if st != OK:
            st_out[g] = st
            continue
        t_out[g] = t
        if t <= 0.0:
            st_out[g] = EXPIRED
            continue
        d, st = _group_value(idx, a, e, D)
        if st != OK or not d > 0.0:
            st_out[g] = INCONSISTENT_INPUTS if st == INCONSISTENT_INPUTS else BAD_DISCOUNT
            continue
        f, st = _group_value(idx, a, e, F)
        if st != OK:
            st_out[g] = INCONSISTENT_INPUTS if st == INCONSISTENT_INPUTS else MISSING_FORWARD
            continue
        if not (f > 0.0 and f < np.inf):
            st_out[g] = FORWARD_NOT_POSITIVE
            continue
        d_out[g] = d
        f_out[g] = f
        st_out[g] = OK


def group_inputs(starts, order, T, D, F):
    """Per group the time, discount and forward given per row (each one value per group;
    statuses as for ``forwards``: missing_time, expired, inconsistent_inputs,
    bad_discount, missing_forward, forward_not_positive).  Returns a dict ``T``,
    ``discount``, ``forward``, ``status``."""
    starts = _ro(starts, np.int64)
    idx = _ro(order, np.int64)
    T, D, F = (_ro(z, np.float64) for z in (T, D, F))
    G = starts.shape[0] - 1
    out = {"T": np.empty(G), "discount": np.empty(G), "forward": np.empty(G),
           "status": np.empty(G, np.int8)}
    _group_inputs(starts, idx, T, D, F, out["T"], out["discount"], out["forward"],
                  out["status"])
    return out


@_njit
def _count_groups(codes, n_codes, counts, order):
    for i in range(codes.shape[0]):
        counts[codes[i] + 1] += 1
    for c in range(n_codes):
        counts[c + 1] += counts[c]
    for i in range(codes.shape[0]):        # stable: input order within a code
        c = codes[i]
        order[counts[c]] = i
        counts[c] += 1


def counting_groups(codes, n_codes):
    """(starts, order) of rows grouped by dense int64 ``codes`` in [0, n_codes), groups in
    code order (empty codes left out), rows of a group in input order: a counting sort,
    linear in the rows."""
    codes = _ro(codes, np.int64)
    if codes.size and (codes.min() < 0 or codes.max() >= n_codes):
        raise ValueError("codes must lie in [0, n_codes)")
    counts = np.zeros(n_codes + 1, np.int64)
    order = np.empty(codes.shape[0], np.int64)
    _count_groups(codes, n_codes, counts, order)
    # counts[c] is now the end of code c's rows: the starts are the distinct ends
    ends = counts[:n_codes]
    sizes = np.diff(np.concatenate(([0], ends)))
    starts = np.concatenate(([0], ends[sizes > 0])).astype(np.int64)
    return starts, order
