"""Analytic Greeks of Black-76 and Black-Scholes-Merton options, all from one pass.

Models and underlyings
----------------------
* Black-76 (options on a forward or future F, discount factor D = e^{-rT}): every
  derivative "in the underlying" is taken against the forward F, with D held fixed
  when F moves.  The rate enters only through D, so ``rho`` = dV/dr with the forward
  held fixed = -T V.  There is no dividend yield: ``div_rho`` is not defined
  (``greek_mask(model="black76")`` leaves it out; forced into the mask, the Black-76
  loop writes NaN there).
* BSM (options on a spot S paying a continuous yield q, D = e^{-rT}, forward
  F = S e^{-qT} / D): derivatives against the spot S, with r and q held fixed.
  ``rho`` = dV/dr (the forward moves with r), ``div_rho`` = dV/dq.

Both are one formula with A = D F (the discounted forward, = S e^{-qT} in BSM),
Dq = A / U for the underlying U (F or S; Dq = D for Black-76, e^{-qT} for BSM), the
cost of carry b = r - q (0 for Black-76) and q_e = r - b (r for Black-76, q for BSM).
With cp = +1 call / -1 put, s = sigma sqrt(T), d1,2 = ln(F/K)/s +- s/2, n1 = phi(d1),
N1 = Phi(cp d1), N2 = Phi(cp d2), the rate r = -ln(D)/T (constant while T moves):

    delta   dV/dU             cp Dq N1
    gamma   d2V/dU2           Dq n1 / (U s)
    speed   d3V/dU3           -gamma (1 + d1/s) / U
    vega    dV/dsigma         A n1 sqrt(T)
    vanna   d2V/dU dsigma     -Dq n1 d2 / sigma
    volga   d2V/dsigma2       vega d1 d2 / sigma
    ultima  d3V/dsigma3       -vega (d1 d2 (1 - d1 d2) + d1^2 + d2^2) / sigma^2
    zomma   d3V/dU2 dsigma    gamma (d1 d2 - 1) / sigma
    theta   -dV/dT            r V - cp b A N1 - A n1 sigma / (2 sqrt(T))
    charm   -d2V/dU dT        q_e delta + Dq n1 (d2 / (2T) - b / s)
    veta    -d2V/dsigma dT    vega (q_e + b d1/s - (1 + d1 d2) / (2T))
    color   -d3V/dU2 dT       gamma (q_e + b d1/s + (1 - d1 d2) / (2T))
    rho     dV/dr             BSM: cp T K D N2;  Black-76: -T V
    div_rho dV/dq             BSM: -cp T A N1;   Black-76: not defined (NaN)
    dual_delta dV/dK          -cp D N2
    dual_gamma d2V/dK2        D phi(d2) / (K s)

Signs: theta, charm, veta and color are per year of calendar time *passing*, i.e. minus
the derivative in T (theta is usually negative).  Units are raw: per 1.00 of vol, of rate
and of yield, per year.  ``DESK_SCALE`` holds the desk-unit multipliers (see there).

Numerics
--------
Everything comes from one set of intermediates per row: one log (ln F/K), one exp
(phi(d1); phi(d2) = phi(d1) F/K), two erfcx for the tails Phi(-|d1|), Phi(-|d2|)
(Phi(-|z|) = sqrt(pi/2) erfcx(|z|/sqrt2) phi(z), relative accuracy in the far tail where
0.5 erfc(-z/sqrt2) would round z/sqrt2), a log of D when a rate term is wanted, and
reciprocals shared by the Greeks (divisions are the slowest vector operation).  Phi(+|z|)
is 1 - Phi(-|z|).  The price V (for theta and the Black-76 rho) is rebuilt from the same
tails in the out-of-the-money form of kernel/black.py (``otm_value``, the one place it
is written): intrinsic plus min(F, K) times the OTM ratio, so it carries no cancellation
beyond the problem's own.  The
BSM theta keeps r V and the carry term apart (not q A N1 - r K D N2, whose two terms
cancel for out-of-the-money options when q ~ r).

Limits (all with status ok, no NaN):
* vol = 0 (and s = vol sqrt(T) below 1e-100, where phi(d1) underflows for every F != K):
  away from the strike the option is its discounted intrinsic value; the Greeks are the
  derivatives of that (N1, N2 in {0, 1}; gamma, vega and every term carrying phi are 0).
  At F == K exactly the Greeks are the limits as vol -> 0+: delta = cp Dq / 2,
  vega = A sqrt(T) / sqrt(2 pi), vanna = vega / (2 U), volga = 0, ultima = -vega T / 4,
  and gamma, dual_gamma, speed (-), zomma (-), color are infinite, as is charm when b != 0.
* T -> 0 (T > 0) behaves as vol -> 0: only s = vol sqrt(T) matters (T <= 0 is status
  expired).  Huge total vol: s is capped at 1e100 (beyond, every phi term is exactly 0).
Greeks smaller than about 1e-300 of their natural scale may underflow to 0.

Accuracy
--------
Against mpmath at 40 digits (tests/test_greeks.py; ln F/K in [-3, 3] and wings to 30
standard deviations, vol 5%-150%, T one week to 10 years, calls and puts, both models):
|error| <= 1e-12 |Greek| or <= 1e-14 of the Greek's natural scale (asserted); measured
worst 0.22 of that bar (vanna), and relative error <= 2e-13 wherever the Greek is at least
1% of its scale.  In the far wings the Greeks stay relatively accurate (~2e-13 measured)
except near their zero crossings.

Layout and cost
---------------
The caller chooses the Greeks with a bitmask over ``GREEK_NAMES`` (``greek_mask``); the
output is ``out[n_requested, n_rows]``, rows in ``GREEK_NAMES`` order.  Each mask gets its
own compiled loop (closure constants, cached on disk like every kernel; a cold compile
takes tens of seconds), so a Greek that is not requested is neither computed nor stored:
measured, a runtime test of the mask inside the loop kept LLVM from vectorising.  One
parallel loop over the rows computes the shared intermediates (``_shared``) and then the
requested Greeks (``_from_shared``) and stores each into its row of ``out``; see the note
on ``_MEMORY_CHECKS`` for what that needs from LLVM.  Results do not depend on the mask,
the batch size or the number of threads.
"""

import functools
import math

import llvmlite.binding as llvm
import numpy as np
from numba import prange

from . import status as S
from ._intrinsics import fma
from . import _args
from ._jit import BLOCK, loop, rows, scalar, specialise
from .black import bsm_inputs, otm_value, shifted_inputs
from .special import INF, INV_SQRT2PI, NAN, SQRT1_2, SQRT_PI_2, erfcx_pos, exp, log

# Phi(-|z|) = sqrt(pi/2) erfcx(|z|/sqrt2) phi(z)
_S_TINY = 1e-100                  # below: phi(d1) == 0 for every F != K (|ln F/K| >= 1.1e-16)
_S_HUGE = 1e100                   # above: phi(d1) == 0 for every F, K
GREEK_NAMES = ("delta", "gamma", "vega", "theta", "rho", "div_rho", "vanna", "volga",
               "charm", "veta", "speed", "zomma", "color", "ultima", "dual_delta",
               "dual_gamma")
N_GREEKS = len(GREEK_NAMES)
ALL_GREEKS = (1 << N_GREEKS) - 1
_BIT = {name: 1 << k for k, name in enumerate(GREEK_NAMES)}

# Desk units: raw value times this.  One rule: each derivative with respect to sigma is
# per vol point (/100), each with respect to r or q per 1% (/100), each with respect to
# T per calendar day (/365); derivatives in the underlying or the strike keep their units.
_ORDERS = {  # (sigma, rate or yield, time)
    "delta": (0, 0, 0), "gamma": (0, 0, 0), "vega": (1, 0, 0), "theta": (0, 0, 1),
    "rho": (0, 1, 0), "div_rho": (0, 1, 0), "vanna": (1, 0, 0), "volga": (2, 0, 0),
    "charm": (0, 0, 1), "veta": (1, 0, 1), "speed": (0, 0, 0), "zomma": (1, 0, 0),
    "color": (0, 0, 1), "ultima": (3, 0, 0), "dual_delta": (0, 0, 0),
    "dual_gamma": (0, 0, 0),
}
DESK_SCALE = {name: 1.0 / (100.0 ** (o[0] + o[1]) * 365.0 ** o[2])
              for name, o in _ORDERS.items()}


def greek_mask(which=None, model="bsm"):
    """Bitmask of the Greeks named in ``which`` (None: all the model defines; the models
    and their Greeks are in kernel/registry.py)."""
    from .registry import model as _model   # the registry imports this module

    defined = _model(model).greeks
    if which is None:
        return sum(_BIT[name] for name in defined)
    if isinstance(which, str):
        which = (which,)
    mask = 0
    for name in which:
        if name not in _BIT:
            raise ValueError(f"unknown Greek {name!r}; known: {', '.join(GREEK_NAMES)}")
        if name not in defined:
            raise ValueError(f"{name} is not defined for model {model!r} (its Greeks: "
                             f"{', '.join(defined)})")
        mask |= _BIT[name]
    return mask


def greek_names(mask):
    """Names of the Greeks in ``mask``, in the order of the rows of ``out``."""
    return tuple(name for k, name in enumerate(GREEK_NAMES) if (mask >> k) & 1)


def desk_factors(mask):
    """Desk-unit multipliers for the rows of ``out`` (float64 array)."""
    return np.array([DESK_SCALE[name] for name in greek_names(mask)], dtype=np.float64)


# ------------------------------------------------------------------ scalar tier

@scalar
def _shared(F, K, T, D, vol, cp):
    # what depends on d1 and d2: the special functions and the price (see _from_shared)
    sqT = math.sqrt(T)
    s = min(vol * sqT, _S_HUGE)
    pos = s > _S_TINY
    iK = 1.0 / K
    m = F * iK
    x = log(m)
    atm = x == 0.0
    live = pos | atm                     # phi(d1) is not exactly 0
    inv_s0 = 1.0 / s
    h = x * inv_s0 if pos else 0.0
    hs = h * inv_s0 if pos else 0.0      # ln(F/K) / s^2
    t = 0.5 * s
    d1 = h + t
    d2 = h - t
    n1 = INV_SQRT2PI * exp(-0.5 * (d1 * d1))
    n1 = n1 if live else 0.0
    n2 = n1 * m                          # phi(d2) = phi(d1) F / K
    g1 = SQRT_PI_2 * n1
    e1 = erfcx_pos(abs(d1) * SQRT1_2)
    e2 = erfcx_pos(abs(d2) * SQRT1_2)
    c1 = g1 * e1                         # Phi(-|d1|)
    c2 = g1 * m * e2                     # Phi(-|d2|)
    k1 = d1 if pos else x                # the sign of d1 (of ln F/K when s -> 0)
    k2 = d2 if pos else x
    N1 = c1 if cp * k1 <= 0.0 else 1.0 - c1
    N2 = c2 if cp * k2 <= 0.0 else 1.0 - c2

    # the out-of-the-money option of the pair (black.otm_value): for F > K the put, whose
    # d1, d2 are -d2, -d1; A E = F g1 for either
    up = x > 0.0
    wing = (d2 >= 0.0) if up else (d1 <= 0.0)
    otm = otm_value(min(F, K), F * g1, e2 if up else e1, e1 if up else e2, wing)
    otm = otm if live else 0.0
    V = D * (max(cp * (F - K), 0.0) + otm)

    inv_s = inv_s0 if live else 0.0      # +inf at the strike with s == 0
    d1s = hs + 0.5                       # d1 / s
    d2s = hs - 0.5                       # d2 / s
    return (sqT, iK, inv_s, n1, n2, N1, N2, V, d1, d2, d1s, d2s)


@scalar
def _from_shared(K, T, D, Dq, U, q, vol, cp, spot, sh):
    # the Greeks from the intermediates, the rate and the carry
    sqT, iK, inv_s, n1, n2, N1, N2, V, d1, d2, d1s, d2s = sh
    iT = 1.0 / T
    r = -log(D) * iT
    b = r - q if spot else 0.0           # cost of carry
    qe = q if spot else r                # r - b
    bs = b * inv_s if b != 0.0 else 0.0
    iU = 1.0 / U
    d12 = d1 * d2
    A = U * Dq
    i2T = 0.5 * iT
    delta = cp * Dq * N1
    gamma = Dq * n1 * inv_s * iU
    vega = A * n1 * sqT
    theta = r * V - cp * b * A * N1 - A * n1 * vol * (sqT * i2T)
    rho = cp * T * (K * D) * N2 if spot else -T * V
    div_rho = -cp * T * A * N1 if spot else NAN
    vanna = -Dq * n1 * d2s * sqT
    volga = vega * d1 * d2s * sqT
    # explicit fma: left to contraction, the vector body and the scalar remainder of a
    # loop fused this differently (1 ulp apart for the same row)
    charm = fma(qe, delta, Dq * n1 * fma(d2, i2T, -bs))
    veta = vega * (qe + b * d1s - (1.0 + d12) * i2T)
    speed = -gamma * iU * (1.0 + d1s)
    zomma = gamma * (d12 - 1.0) * sqT * inv_s
    color = gamma * (qe + b * d1s + (1.0 - d12) * i2T)
    ultima = -vega * T * (d1s * d2s * (1.0 - d12) + d1s * d1s + d2s * d2s)
    dual_delta = -cp * D * N2
    dual_gamma = D * n2 * inv_s * iK
    return (delta, gamma, vega, theta, rho, div_rho, vanna, volga, charm, veta, speed,
            zomma, color, ultima, dual_delta, dual_gamma)


@scalar
def _greeks(F, K, T, D, Dq, U, q, vol, cp, spot):
    return _from_shared(K, T, D, Dq, U, q, vol, cp, spot, _shared(F, K, T, D, vol, cp))


@scalar
def greeks_forward(F, K, T, D, vol, cp):
    """All Black-76 Greeks (tuple in ``GREEK_NAMES`` order) for valid inputs.

    F, K > 0, T > 0, D > 0, vol >= 0 finite, cp = +1.0 call / -1.0 put.  Greeks not used by
    the caller are removed by the compiler once this is inlined.
    """
    return _greeks(F, K, T, D, D, F, 0.0, vol, cp, False)


@scalar
def _greeks_spot(spot, K, T, D, q, Dq, F, vol, cp):
    return _greeks(F, K, T, D, Dq, spot, q, vol, cp, True)


@scalar
def greeks_spot(spot, K, T, D, q, vol, cp):
    """All BSM Greeks (tuple in ``GREEK_NAMES`` order) for valid inputs (see above).

    The forward is F = spot e^{-qT} / D, as in ``black.bsm_inputs``.
    """
    Dq = exp(-q * T)
    return _greeks_spot(spot, K, T, D, q, Dq, spot * Dq / D, vol, cp)


# ------------------------------------------------------------------ loop tier

# Each requested Greek is a separate output stream (a row of out).  LLVM vectorises the
# row loop only after proving with runtime checks that no two streams overlap, and by
# default it gives up beyond a handful of checks (cl::opt -vectorize-memory-check-
# threshold): with more than about six Greeks the loop stayed scalar, at a fifth of the
# speed.  All Greeks and the status need 17 * 16 / 2 + 17 * 7 = 255 checks, done once per
# chunk of rows.  The option is process-wide and only lets LLVM vectorise loops it would
# otherwise leave scalar (the checks keep them correct); it must be set before the loops
# compile, i.e. at import.
_MEMORY_CHECKS = 512
llvm.set_option("volsweep", f"-vectorize-memory-check-threshold={_MEMORY_CHECKS}")


@scalar
def _b76_row(F, K, T, D, shift, vol, cp, i):
    # status of row i and its (shifted) inputs (harmless placeholders where not ok)
    tt = T[i]
    d = D[i]
    v = vol[i]
    st, f, k = shifted_inputs(F[i], K[i], tt, d, shift[i], v, cp[i])
    ok = st == S.OK
    return (st, f if ok else 1.0, k if ok else 1.0, tt if ok else 1.0, d if ok else 1.0,
            v if ok else 0.2, float(cp[i]))


@scalar
def _bsm_row(spot, K, T, D, q, vol, cp, i):
    u = spot[i]
    k = K[i]
    tt = T[i]
    d = D[i]
    y = q[i]
    v = vol[i]
    st, f, dq = bsm_inputs(u, k, tt, d, y, v, cp[i])
    ok = st == S.OK
    return (st, u if ok else 1.0, k if ok else 1.0, tt if ok else 1.0, d if ok else 1.0,
            y if ok else 0.0, dq if ok else 1.0, f if ok else 1.0, v if ok else 0.2,
            float(cp[i]))


@scalar
def _store(dst, j, g, ok, sl):
    # dst[sl[k], j] = Greek k for each requested k (sl[k] >= 0).  sl is a compile-time
    # constant of the specialised loop, so the tests fold away and unrequested Greeks
    # are never computed.  Returns whether the row is ok with a requested Greek that is
    # not finite (bitwise |, not `or`: no branches in the loop body).
    bad = False
    if sl[0] >= 0:
        dst[sl[0], j] = g[0] if ok else NAN
        bad = bad | (not (abs(g[0]) < INF))
    if sl[1] >= 0:
        dst[sl[1], j] = g[1] if ok else NAN
        bad = bad | (not (abs(g[1]) < INF))
    if sl[2] >= 0:
        dst[sl[2], j] = g[2] if ok else NAN
        bad = bad | (not (abs(g[2]) < INF))
    if sl[3] >= 0:
        dst[sl[3], j] = g[3] if ok else NAN
        bad = bad | (not (abs(g[3]) < INF))
    if sl[4] >= 0:
        dst[sl[4], j] = g[4] if ok else NAN
        bad = bad | (not (abs(g[4]) < INF))
    if sl[5] >= 0:
        dst[sl[5], j] = g[5] if ok else NAN
        bad = bad | (not (abs(g[5]) < INF))
    if sl[6] >= 0:
        dst[sl[6], j] = g[6] if ok else NAN
        bad = bad | (not (abs(g[6]) < INF))
    if sl[7] >= 0:
        dst[sl[7], j] = g[7] if ok else NAN
        bad = bad | (not (abs(g[7]) < INF))
    if sl[8] >= 0:
        dst[sl[8], j] = g[8] if ok else NAN
        bad = bad | (not (abs(g[8]) < INF))
    if sl[9] >= 0:
        dst[sl[9], j] = g[9] if ok else NAN
        bad = bad | (not (abs(g[9]) < INF))
    if sl[10] >= 0:
        dst[sl[10], j] = g[10] if ok else NAN
        bad = bad | (not (abs(g[10]) < INF))
    if sl[11] >= 0:
        dst[sl[11], j] = g[11] if ok else NAN
        bad = bad | (not (abs(g[11]) < INF))
    if sl[12] >= 0:
        dst[sl[12], j] = g[12] if ok else NAN
        bad = bad | (not (abs(g[12]) < INF))
    if sl[13] >= 0:
        dst[sl[13], j] = g[13] if ok else NAN
        bad = bad | (not (abs(g[13]) < INF))
    if sl[14] >= 0:
        dst[sl[14], j] = g[14] if ok else NAN
        bad = bad | (not (abs(g[14]) < INF))
    if sl[15] >= 0:
        dst[sl[15], j] = g[15] if ok else NAN
        bad = bad | (not (abs(g[15]) < INF))
    return ok & bad


def _slots(mask):
    slots, j = [], 0
    for k in range(N_GREEKS):
        if (mask >> k) & 1:
            slots.append(j)
            j += 1
        else:
            slots.append(-1)
    return tuple(slots), j


# Templates of the per-mask loops; ``mask_loops`` copies them per mask with SLOTS (the
# output row of each Greek, -1 if not requested) and the row loop ROWS as frozen globals.
def _b76_rows_template(a, e, F, K, T, D, shift, vol, cp, out, status):
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        st, f, k, tt, d, v, cp_i = _b76_row(F, K, T, D, shift, vol, cp, i)
        g = greeks_forward(f, k, tt, d, v, cp_i)
        flag = _store(out, i, g, st == S.OK, SLOTS)  # noqa: F821 (a global of each copy)
        status[i] = st + (S.NONFINITE_GREEK_FLAG if flag else 0)


def _bsm_rows_template(a, e, spot, K, T, D, q, vol, cp, out, status):
    for i in range(np.uint64(a), np.uint64(e)):
        st, u, k, tt, d, y, dq, f, v, cp_i = _bsm_row(spot, K, T, D, q, vol, cp, i)
        g = _greeks_spot(u, k, tt, d, y, dq, f, v, cp_i)
        flag = _store(out, i, g, st == S.OK, SLOTS)  # noqa: F821
        status[i] = st + (S.NONFINITE_GREEK_FLAG if flag else 0)


# The parallel loops, by the model's number of extra inputs (the registry's convention).
def par_template0(U, K, T, D, vol, cp, out, status):
    n = U.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        ROWS(b * BLOCK, min(n, (b + 1) * BLOCK), U, K, T, D, vol, cp, out, status)  # noqa: F821


def par_template1(U, K, T, D, X, vol, cp, out, status):
    n = U.shape[0]
    for b in prange((n + BLOCK - 1) // BLOCK):
        ROWS(b * BLOCK, min(n, (b + 1) * BLOCK), U, K, T, D, X, vol, cp, out,  # noqa: F821
             status)


_TEMPLATES = {"black76": (_b76_rows_template, par_template1),
              "bsm": (_bsm_rows_template, par_template1)}


@functools.lru_cache(maxsize=None)
def mask_loops(rows_template, par_template, model, mask):
    """(row loop, parallel loop) of a model's templates specialised to one mask, compiled
    on first use (kernel/sweep.py and kernel/quotes.py call the row loop per block)."""
    sl, _ = _slots(mask)
    tag = f"{model}_greeks_{mask:04x}"
    row_loop = rows(specialise(rows_template, f"rows_{tag}", SLOTS=sl), interleave=0)  # _jit
    par_loop = loop(specialise(par_template, f"par_{tag}", ROWS=row_loop))
    return row_loop, par_loop


def _kernel(model, mask):
    return mask_loops(*_TEMPLATES[model], model, mask)


def take_nonfinite_flags(status) -> int:
    """Clear the rows' non-finite-Greek flags; return how many rows had one."""
    if status.size == 0 or status.view(np.uint8).max() < S.NONFINITE_GREEK_FLAG:
        return 0
    flagged = status >= S.NONFINITE_GREEK_FLAG
    status[flagged] -= S.NONFINITE_GREEK_FLAG
    return int(np.count_nonzero(flagged))


def _check_mask(mask):
    mask = int(mask)
    if not (0 <= mask <= ALL_GREEKS):
        raise ValueError(f"mask {mask!r} outside 0..{ALL_GREEKS}")
    return mask, bin(mask).count("1")


def black76_greeks(F, K, T, D, shift, vol, cp, mask, out, status):
    """(Shifted) Black-76 Greeks of the rows into ``out[n_requested, n]`` and their
    ``status``: those of Black-76 at F + shift and K + shift (derivatives against F).

    F, K, T, D, shift, vol: float64 arrays; cp: int8 (+1 call, -1 put, 0 missing); mask
    from ``greek_mask``.  Rows whose status is not ok get NaN Greeks.  Returns the number of
    ok rows with a requested Greek that is not finite (the documented infinite limits;
    0 for ordinary inputs), so a caller can skip checking the outputs when it is 0.
    """
    mask, nsel = _check_mask(mask)
    F, K, T, D, shift, vol = _args.floats(F, K, T, D, shift, vol)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(*_kernel("black76", mask), n, F, K, T, D, shift, vol, cp, out, status)
    return take_nonfinite_flags(status)


def bsm_greeks(spot, K, T, D, q, vol, cp, mask, out, status):
    """BSM Greeks (against spot, continuous yield q) into ``out[n_requested, n]``; returns
    the number of ok rows with a requested Greek that is not finite (as black76_greeks)."""
    mask, nsel = _check_mask(mask)
    spot, K, T, D, q, vol = _args.floats(spot, K, T, D, q, vol)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    _args.run(*_kernel("bsm", mask), n, spot, K, T, D, q, vol, cp, out, status)
    return take_nonfinite_flags(status)
