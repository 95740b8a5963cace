"""Scenario grids of option positions by full revaluation, summed per group.

Every row is a position: quantity x multiplier (``w``, units of underlying held through
the option) of one contract.  For each scenario (a relative shock ds of the model's
underlying input, an absolute shock dv of its vol, and an optional time shift dt in
years, the same for the whole grid) the contract is priced again from scratch and the
group's P&L is

    pnl[g, scenario] = sum over the rows of g of  w (V(U (1 + ds), vol + dv, T - dt) - V(U, vol, T))

Nothing is approximated: no Taylor expansion, the model's own price at the shocked
inputs.  The grid (rows x scenarios) is never held in memory: per block of ``BLOCK`` rows
the base values are computed once, then each scenario revalues the block into one
block-sized buffer, which is summed per group at once.

Order and determinism
---------------------
The rows arrive sorted by group (the caller sorts stably, so rows keep their input order
within a group).  The blocks of ``BLOCK`` rows and the group boundaries cut the rows into
*pieces* (the rows of one group inside one block); each piece's sum is written by the one
thread that owns the block, in row order with four interleaved accumulators: straight
into the group's result when it is the group's only piece, else into its own slot
(``psum[slot, scenario]``), and the pieces of each group of several are then added in
piece order by one thread.  Every addition therefore happens in an order fixed by the data alone: the
sums are the same bits whatever the number of threads and however the parallel loop
schedules the blocks.

Statuses
--------
A row enters the grid only when ``ok`` (its status at the base inputs is ok, quantity and
multiplier finite): the caller decides that with the model's own price kernel, so a row
has the same status here as in ``volsweep.price``.  Rows that are not ok contribute 0 to
every scenario (the caller counts them).  An ok row whose *shocked* inputs have no value
(a vol shocked below zero, a shifted forward pushed to zero or below, a price or a
contribution that is not a finite double) contributes 0 to that scenario and is counted
in ``bad[g, scenario]``.

Time shift
----------
T' = T - dt.  The discount factor follows the same rate: D' = D^(T'/T) (= e^{-r T'} for
D = e^{-r T}).  A contract with T' <= 0 has expired within the shift and is valued at its
payoff at the shocked underlying, undiscounted (no interest between its expiry and the
shifted valuation date).

Adding a model: one ``ScenarioPricer`` in ``PRICERS`` (its two scalar functions below,
and the names of the extra inputs it reads, at most two); ``scenario_pnl`` does the rest.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from . import _args
from ._jit import BLOCK, FASTMATH, loop, rows, scalar, specialise
from .american import american_bsm_price
from .bachelier import bachelier_price
from .black import black_price
from .special import INF, NAN, exp


# ----------------------------------------------------------- per-model scalar pricers
#
# value(U, K, T, D, X1, X2, vol, cp): the discounted price at a (shocked) underlying U
# and vol for T > 0, vol >= 0, cp = +-1 and the row's other inputs valid at base; NaN
# where the shocked inputs are outside the model's range.  X1, X2: the extra inputs the
# pricer names (``ScenarioPricer.extras``, in that order; 0.0 where it names fewer).
# payoff(U, K, X1, X2, cp): the value at or after expiry.
# Each is the arithmetic of the model's price kernel, so a zero shock reproduces the
# base value exactly (the base is computed by the same code, see _revalue_template).

@scalar
def _bsm_value(S, K, T, D, q, X2, vol, cp):
    f = S * exp(-q * T) / D                       # as black.bsm_inputs
    p = black_price(f if f > 0.0 else 1.0, K, vol * math.sqrt(T), D, cp)
    return p if (f > 0.0 and f < INF) else NAN


@scalar
def _american_value(S, K, T, D, q, ex, vol, cp):
    """BSM with the row's exercise style: American (kernel/american.py at its accurate
    setting, r = -ln(D)/T) where the flag ``ex`` is not 0, else the European value.  Each
    American revaluation is a boundary solve (microseconds, not nanoseconds)."""
    eu = _bsm_value(S, K, T, D, q, ex, vol, cp)
    if ex == 0.0 or not (eu == eu):
        return eu
    return american_bsm_price(S, K, T, -math.log(D) / T, q, vol, cp)


@scalar
def _black76_value(F, K, T, D, shift, X2, vol, cp):
    f = F + shift                                 # as black.shifted_inputs
    k = K + shift
    p = black_price(f if f > 0.0 else 1.0, k, vol * math.sqrt(T), D, cp)
    return p if f > 0.0 else NAN


@scalar
def _bachelier_value(F, K, T, D, X1, X2, vol, cp):
    x = F - K                                     # as bachelier.bachelier_inputs
    ok = abs(x) < INF
    p = bachelier_price(x if ok else 0.0, vol * math.sqrt(T), D, cp)
    return p if ok else NAN


@scalar
def _payoff(U, K, X1, X2, cp):
    """max(cp (U - K), 0): the payoff of a European option on U (spot or forward; a
    shift cancels in F + shift - (K + shift))."""
    return max(cp * (U - K), 0.0)


@dataclass(frozen=True)
class ScenarioPricer:
    """How ``scenario_pnl`` revalues one model's contracts (see the module docstring)."""

    value: object            # @scalar (U, K, T, D, X1, X2, vol, cp) -> price, T > 0
    payoff: object           # @scalar (U, K, X1, X2, cp) -> value at or after expiry
    extras: tuple = ()       # the registry inputs read as X1, X2 (at most two)


# One entry per (model name, exercise style) of kernel/registry (tests/test_risk.py checks
# every registry entry has one, reading its extra inputs).
PRICERS = {
    ("bsm", "european"): ScenarioPricer(_bsm_value, _payoff, ("div_yield",)),
    ("bsm", "american"): ScenarioPricer(_american_value, _payoff, ("div_yield", "exercise")),
    ("black76", "european"): ScenarioPricer(_black76_value, _payoff, ("shift",)),
    ("bachelier", "european"): ScenarioPricer(_bachelier_value, _payoff, ()),
}


# ------------------------------------------------------------------ row and block loops

# Revalue rows [a, e) at underlying U (1 + ds) and vol + dv into out:
#   rel == 0: out[i] = V (the base value itself),
#   rel != 0: out[i] = w[i] (V - base[i]),
# 0 for rows that are not ok, NaN for ok rows whose shocked inputs have no value (or whose
# contribution w (V - base) is not a finite double).
# Copied per model with VALUE and PAYOFF as frozen globals (_jit.specialise).
def _revalue_template(a, e, U, K, T, D, X1, X2, vol, cp, ok, w, base, ds, dv, rel, out):
    up = 1.0 + ds
    for i in range(np.uint64(a), np.uint64(e)):  # unsigned: no wraparound selects
        t = T[i]
        live = t > 0.0
        u = U[i] * up
        v = vol[i] + dv
        c = float(cp[i])
        x1 = X1[i]
        x2 = X2[i]
        p = VALUE(u, K[i], t if live else 1.0, D[i], x1, x2,  # noqa: F821
                  v if v >= 0.0 else 0.0, c)
        p = p if live else PAYOFF(u, K[i], x1, x2, c)  # noqa: F821
        p = p if (v >= 0.0 and abs(p) < INF) else NAN
        r = w[i] * (p - base[i]) if rel != 0.0 else p
        r = r if abs(r) < INF else NAN            # an overflowing contribution: no value
        out[i] = r if ok[i] != 0 else 0.0


@njit(inline="always", error_model="numpy", fastmath=set(FASTMATH), cache=True,
      nogil=True)
def _piece_sum(buf, s, t):
    """(sum, count) of buf[s:t] without its NaNs, and the count of NaNs: four interleaved
    accumulators in a fixed order (the order depends on s and t only).  Inlined into the
    grid loop: with many small groups it runs once per piece and scenario."""
    a0 = 0.0
    a1 = 0.0
    a2 = 0.0
    a3 = 0.0
    bad = 0
    i = s
    while i + 4 <= t:
        v0 = buf[i]
        v1 = buf[i + 1]
        v2 = buf[i + 2]
        v3 = buf[i + 3]
        bad += (v0 != v0) + (v1 != v1) + (v2 != v2) + (v3 != v3)
        a0 += v0 if v0 == v0 else 0.0
        a1 += v1 if v1 == v1 else 0.0
        a2 += v2 if v2 == v2 else 0.0
        a3 += v3 if v3 == v3 else 0.0
        i += 4
    while i < t:
        v0 = buf[i]
        bad += v0 != v0
        a0 += v0 if v0 == v0 else 0.0
        i += 1
    return (a0 + a1) + (a2 + a3), bad


# Blocks b0 <= b < b1 of the grid: per block the base values, then every scenario into the
# block's part of buf, summed per piece: into pnl / bad directly for a group's only piece
# (no other block touches that group), else into its slot of psum / pbad.  Copied per
# model with REVALUE (the model's row loop) as a frozen global.
def _grid_template(b0, b1, U, K, T, D, X1, X2, vol, cp, ok, w, T1, D1, ds, dv, piece_lo,
                   piece_start, piece_end, piece_group, piece_slot, base, buf, psum, pbad,
                   pnl, bad_out):
    n = U.shape[0]
    nv = dv.shape[0]
    for j in prange(b1 - b0):
        blk = b0 + j
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        # the base values through the scenario's own code (a zero shock gives exactly 0)
        REVALUE(a, e, U, K, T, D, X1, X2, vol, cp, ok, w, base, 0.0, 0.0, 0.0,  # noqa: F821
                buf)
        for i in range(a, e):
            base[i] = buf[i]
        for si in range(ds.shape[0]):
            for vi in range(nv):
                sc = si * nv + vi
                REVALUE(a, e, U, K, T1, D1, X1, X2, vol, cp, ok, w, base,  # noqa: F821
                        ds[si], dv[vi], 1.0, buf)
                for k in range(piece_lo[blk], piece_lo[blk + 1]):
                    tot, bad = _piece_sum(buf, piece_start[k], piece_end[k])
                    j = piece_slot[k]
                    if j < 0:
                        pnl[piece_group[k], sc] = tot
                        bad_out[piece_group[k], sc] = bad
                    else:
                        psum[j, sc] = tot
                        pbad[j, sc] = bad


@njit(error_model="numpy", fastmath=set(FASTMATH), cache=True, nogil=True)
def _reduce_pieces(piece_group, piece_slot, psum, pbad, pnl, bad):
    """pnl[g] = sum of psum over the pieces of each group of several pieces, in piece
    (= row) order, starting from 0; bad likewise."""
    for k in range(piece_group.shape[0]):
        j = piece_slot[k]
        if j < 0:
            continue
        g = piece_group[k]
        for sc in range(psum.shape[1]):
            pnl[g, sc] += psum[j, sc]
            bad[g, sc] += pbad[j, sc]


@functools.lru_cache(maxsize=None)
def grid_loops(model: str, exercise: str = "european"):
    """(row loop, parallel grid loop) of ``model`` with this exercise style, compiled on
    first use."""
    pricer = pricer_of(model, exercise)
    tag = f"{model}_{exercise}"
    row_loop = rows(specialise(_revalue_template, f"risk_revalue_{tag}",
                               VALUE=pricer.value, PAYOFF=pricer.payoff))
    grid = loop(specialise(_grid_template, f"risk_grid_{tag}", REVALUE=row_loop))
    return row_loop, grid


# ------------------------------------------------------------------ entry points

# blocks per launch of the parallel loop: between launches ``progress`` is told of the rows
# done (each launch is ~CHUNK_BLOCKS * BLOCK * scenarios revaluations)
CHUNK_BLOCKS = 64


def pieces(group: np.ndarray, n_groups: int):
    """The pieces of rows sorted by ``group``: (piece_lo[n_blocks + 1], piece_start,
    piece_end, piece_group, piece_slot), a piece being the rows of one group inside one
    block; piece_slot is -1 for a group's only piece (its block owns the group's sums and
    writes them in place) and else the piece's row in the partial sums, numbered in piece
    order."""
    n = group.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    cuts = np.flatnonzero(group[1:] != group[:-1]) + 1
    starts = np.union1d(cuts, np.arange(0, n, BLOCK, dtype=np.int64)).astype(np.int64)
    ends = np.append(starts[1:], n).astype(np.int64)
    lo = np.searchsorted(starts, np.arange(nb + 1, dtype=np.int64) * BLOCK).astype(np.int64)
    pgroup = np.ascontiguousarray(group[starts], dtype=np.int64)
    per_group = np.bincount(pgroup, minlength=n_groups)
    split = per_group[pgroup] > 1
    slot = np.full(len(starts), -1, np.int64)
    slot[split] = np.arange(int(split.sum()), dtype=np.int64)
    return lo, starts, ends, pgroup, slot


def shifted_time(T, D, dt):
    """(T', D') after a time shift of dt >= 0 years: T - dt and D^(T'/T) (D where dt is 0;
    1 where T' <= 0, where the payoff is not discounted)."""
    if dt == 0.0:
        return T, D
    T1 = T - dt
    with np.errstate(all="ignore"):
        D1 = np.where(T1 > 0.0, np.exp(np.log(D) * (T1 / T)), 1.0)
    return _args.floats(T1, D1)


def pricer_of(model: str, exercise: str = "european") -> ScenarioPricer:
    """The ``ScenarioPricer`` of (model, exercise); ValueError when there is none."""
    try:
        return PRICERS[(model, exercise)]
    except (KeyError, TypeError):
        known = ", ".join(f"{m} ({x})" for m, x in PRICERS)
        raise ValueError(f"no scenario pricer for model {model!r} with {exercise} exercise "
                         f"(kernel/risk.py PRICERS has {known})") from None


def scenario_pnl(model, U, K, T, D, X1, X2, vol, cp, ok, w, group, spot_shocks, vol_shocks,
                 dt, pnl, bad, progress=None, exercise="european"):
    """P&L of a spot x vol scenario grid per group, by full revaluation.

    U, K, T, D, X1, X2 (the extra inputs of ``pricer_of(model, exercise).extras``, zeros
    where it names fewer), vol: float64 arrays of one length n, sorted by ``group`` (int64, non-decreasing, values in
    [0, n_groups)); cp: int8 call/put codes; ok: int8, 1 for the rows that enter the grid;
    w: quantity x multiplier per row.  spot_shocks (relative, > -1 for a positive
    underlying), vol_shocks (absolute): float64; dt: time shift in years (>= 0).
    pnl: preallocated float64 [n_groups, n_spot * n_vol], scenarios in (spot, vol) order;
    bad: preallocated int64 of the same shape (ok rows without a value in the scenario).
    Both are overwritten.  ``progress``: None, or called with the rows done after each
    launch of CHUNK_BLOCKS blocks.
    """
    U, K, T, D, X1, X2, vol, w = _args.floats(U, K, T, D, X1, X2, vol, w)
    n = U.shape[0]
    cp = _args.codes(n, cp)
    ok = np.ascontiguousarray(ok, dtype=np.int8)
    group = np.ascontiguousarray(group, dtype=np.int64)
    if ok.shape != (n,) or group.shape != (n,):
        raise ValueError(f"ok and group must have shape {(n,)}")
    ds = np.ascontiguousarray(spot_shocks, dtype=np.float64).reshape(-1)
    dv = np.ascontiguousarray(vol_shocks, dtype=np.float64).reshape(-1)
    if not (np.all(np.isfinite(ds)) and np.all(np.isfinite(dv))):
        raise ValueError("shocks must be finite")
    if not (math.isfinite(dt) and dt >= 0.0):
        raise ValueError(f"time shift must be finite and >= 0, got {dt!r}")
    n_groups = pnl.shape[0] if isinstance(pnl, np.ndarray) else 0
    nsc = ds.shape[0] * dv.shape[0]
    _args.output("pnl", pnl, (n_groups, nsc), np.float64)
    _args.output("bad", bad, (n_groups, nsc), np.int64)
    if n and (group[0] < 0 or group[-1] >= n_groups or np.any(group[1:] < group[:-1])):
        raise ValueError("group must be non-decreasing, in [0, n_groups)")
    pnl[:] = 0.0
    bad[:] = 0
    if n == 0 or nsc == 0:
        return
    T1, D1 = shifted_time(T, D, float(dt))
    lo, starts, ends, pgroup, slot = pieces(group, n_groups)
    n_split = int((slot >= 0).sum())
    psum = np.empty((n_split, nsc))
    pbad = np.empty((n_split, nsc), np.int64)
    base = np.empty(n)
    buf = np.empty(n)
    _, grid = grid_loops(model, exercise)
    nb = lo.shape[0] - 1
    for b0 in range(0, nb, CHUNK_BLOCKS):
        b1 = min(nb, b0 + CHUNK_BLOCKS)
        grid(b0, b1, U, K, T, D, X1, X2, vol, cp, ok, w, T1, D1, ds, dv, lo, starts, ends,
             pgroup, slot, base, buf, psum, pbad, pnl, bad)
        if progress is not None:
            progress(min(n, b1 * BLOCK) - min(n, b0 * BLOCK))
    _reduce_pieces(pgroup, slot, psum, pbad, pnl, bad)
