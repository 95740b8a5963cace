"""Bid/ask quotes in one pass: implied vols of the bid, the ask and the mid, the Greeks at
the mid vol (vega always), the vol uncertainty of the spread, and every status.

Rows are processed in blocks of ``BLOCK`` rows that stay in cache: per block the
implied-vol row loop of kernel/implied.py runs on the bid, the ask and the mid, the Greeks
row loop of kernel/greeks.py at the mid vol, then ``_quote_rows`` decides the quote's own
statuses and the uncertainty.  Main memory is read once, in one parallel launch (the
bindings used to make three implied-vol passes and a Greeks pass).

Statuses (priority in kernel/status.py): the input problems of a row (and of a side's own
quote: null, NaN or +-inf) stay; above the premium's own problems, a crossed quote
(bid > ask) is ``crossed_quote`` on every side without an input problem, and a bid at or
below zero is ``zero_bid`` on the bid and the mid (the ask keeps its vol).
``iv_spread_uncertainty`` = (ask - bid) / 2 / vega at the mid vol,
NaN where the mid has no vol.
"""

import functools

import numpy as np
from numba import prange

from . import greeks as _greeks
from . import implied as _implied
from . import status as S
from . import _args
from ._jit import BLOCK, loop, rows, specialise
from .special import NAN

_VEGA = 1 << _greeks.GREEK_NAMES.index("vega")


@rows
def _quote_rows(a, e, bid, ask, iv_bid, iv_ask, iv, st_bid, st_ask, st, vega, unc):
    for i in range(np.uint64(a), np.uint64(e)):
        b = bid[i]
        k = ask[i]
        crossed = b > k
        zero_bid = (b <= 0.0) and not crossed
        sb = st_bid[i]
        sa = st_ask[i]
        sm = st[i]
        # quote problems rank below the input problems and above the premium's own
        qb = ((S.INPUT_PROBLEMS >> sb) & 1) == 0
        qa = ((S.INPUT_PROBLEMS >> sa) & 1) == 0
        qm = ((S.INPUT_PROBLEMS >> sm) & 1) == 0
        sb = S.CROSSED_QUOTE if (crossed and qb) else (S.ZERO_BID if (zero_bid and qb) else sb)
        sa = S.CROSSED_QUOTE if (crossed and qa) else sa
        sm = S.CROSSED_QUOTE if (crossed and qm) else (S.ZERO_BID if (zero_bid and qm) else sm)
        st_bid[i] = sb
        st_ask[i] = sa
        st[i] = sm
        iv_bid[i] = iv_bid[i] if sb == S.OK else NAN
        iv_ask[i] = iv_ask[i] if sa == S.OK else NAN
        iv[i] = iv[i] if sm == S.OK else NAN
        half = 0.5 * k - 0.5 * b           # (ask - bid) / 2 without overflow
        unc[i] = half / vega[i] if sm == S.OK else NAN


# Templates of the per-mask loops, by the model's number of extra inputs (the registry's
# calling convention), copied per model and mask with its implied-vol row loop IV, its
# Greeks row loop GREEKS and the output row VEGA_ROW of vega as frozen globals (see
# _jit.specialise).
def _template0(bid, ask, mid, U, K, T, D, cp, iv_bid, iv_ask, iv, unc, out, st_bid,
               st_ask, status, scratch):
    n = U.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        IV(a, e, bid, U, K, T, D, cp, iv_bid, st_bid)  # noqa: F821
        IV(a, e, ask, U, K, T, D, cp, iv_ask, st_ask)  # noqa: F821
        IV(a, e, mid, U, K, T, D, cp, iv, status)  # noqa: F821
        GREEKS(a, e, U, K, T, D, iv, cp, out, scratch)  # noqa: F821
        _quote_rows(a, e, bid, ask, iv_bid, iv_ask, iv, st_bid, st_ask, status,
                    out[VEGA_ROW], unc)  # noqa: F821


def _template1(bid, ask, mid, U, K, T, D, X, cp, iv_bid, iv_ask, iv, unc, out, st_bid,
               st_ask, status, scratch):
    n = U.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        IV(a, e, bid, U, K, T, D, X, cp, iv_bid, st_bid)  # noqa: F821
        IV(a, e, ask, U, K, T, D, X, cp, iv_ask, st_ask)  # noqa: F821
        IV(a, e, mid, U, K, T, D, X, cp, iv, status)  # noqa: F821
        GREEKS(a, e, U, K, T, D, X, iv, cp, out, scratch)  # noqa: F821
        _quote_rows(a, e, bid, ask, iv_bid, iv_ask, iv, st_bid, st_ask, status,
                    out[VEGA_ROW], unc)  # noqa: F821


_TEMPLATES = (_template0, _template1)


def _vega_row(mask):
    """The row of vega in ``out`` for a mask holding it."""
    return bin(mask & (_VEGA - 1)).count("1")


@functools.lru_cache(maxsize=None)
def _kernel(iv_rows, greek_rows, n_extras, model, mask):
    return loop(specialise(_TEMPLATES[n_extras], f"bid_ask_{model}_{mask:04x}", IV=iv_rows,
                           GREEKS=greek_rows, VEGA_ROW=_vega_row(mask)))


def mid_price(bid, ask):
    """(bid + ask) / 2, without overflow for quotes near the largest double."""
    with np.errstate(all="ignore"):
        mid = 0.5 * (bid + ask)
        over = np.isinf(mid) & np.isfinite(bid) & np.isfinite(ask)
        if over.any():
            mid[over] = 0.5 * bid[over] + 0.5 * ask[over]
    return mid


def run(model, iv_rows, greek_loops, bid, ask, inputs, cp, mask, outs):
    """inputs: (U, K, T, D, *extras) as the model's kernels take them (read-only float64
    views); greek_loops(mask): the model's Greeks (row loop, parallel loop) for a mask."""
    iv_bid, iv_ask, iv, unc, out, st_bid, st_ask, status = outs
    n = inputs[0].shape[0]
    cp = _args.codes(n, cp)
    mask, nsel = _greeks._check_mask(mask)
    if not mask & _VEGA:
        raise ValueError("the bid/ask kernel's mask must hold vega (the spread's vol "
                         "uncertainty needs it)")
    for name, arr in (("iv_bid", iv_bid), ("iv_ask", iv_ask), ("iv", iv), ("unc", unc)):
        _args.output(name, arr, (n,), np.float64)
    _args.output("out", out, (nsel, n), np.float64)
    for name, arr in (("status_bid", st_bid), ("status_ask", st_ask), ("status", status)):
        _args.output(name, arr, (n,), np.int8)
    (mid,) = _args.floats(mid_price(bid, ask))
    scratch = np.empty(n, np.int8)     # the Greeks' own statuses (the iv's take priority)
    greek_rows = greek_loops(mask)[0]
    if n <= BLOCK:          # one block: the same row loops, without a parallel launch
        iv_rows(0, n, bid, *inputs, cp, iv_bid, st_bid)
        iv_rows(0, n, ask, *inputs, cp, iv_ask, st_ask)
        iv_rows(0, n, mid, *inputs, cp, iv, status)
        greek_rows(0, n, *inputs, iv, cp, out, scratch)
        _quote_rows(0, n, bid, ask, iv_bid, iv_ask, iv, st_bid, st_ask, status,
                    out[_vega_row(mask)], unc)
    else:
        _kernel(iv_rows, greek_rows, len(inputs) - 4, model, mask)(
            bid, ask, mid, *inputs, cp, iv_bid, iv_ask, iv, unc, out, st_bid, st_ask, status,
            scratch)
    return _greeks.take_nonfinite_flags(scratch)


def black76_bid_ask(bid, ask, F, K, T, D, shift, cp, mask, iv_bid, iv_ask, iv, unc, out,
                    status_bid, status_ask, status):
    """(Shifted) Black-76 implied vols of bid, ask and mid, the Greeks in ``mask`` at the
    mid vol (``mask`` must hold vega), and unc = half-spread / vega, in one pass.

    Inputs: float64 arrays of one length n, cp int8 (+1 call, -1 put, 0 missing); outputs
    preallocated: iv_bid, iv_ask, iv, unc float64 (n,), out float64 (n_greeks, n), three
    int8 statuses.  Returns the number of rows with a mid vol and a non-finite Greek.
    """
    bid, ask, F, K, T, D, shift = _args.floats(bid, ask, F, K, T, D, shift)
    return run("black76", _implied._black76_iv_rows,
               lambda m: _greeks._kernel("black76", m), bid, ask, (F, K, T, D, shift), cp,
               mask, (iv_bid, iv_ask, iv, unc, out, status_bid, status_ask, status))


def bsm_bid_ask(bid, ask, spot, K, T, D, q, cp, mask, iv_bid, iv_ask, iv, unc, out,
                status_bid, status_ask, status):
    """BSM (spot, continuous yield q) version of ``black76_bid_ask``."""
    bid, ask, spot, K, T, D, q = _args.floats(bid, ask, spot, K, T, D, q)
    return run("bsm", _implied._bsm_iv_rows, lambda m: _greeks._kernel("bsm", m), bid, ask,
               (spot, K, T, D, q), cp, mask,
               (iv_bid, iv_ask, iv, unc, out, status_bid, status_ask, status))
