"""One pass from quotes to implied vols and Greeks.

Rows are processed in blocks small enough to stay in cache: the premiums of a block are
inverted (``implied``), then the requested Greeks are evaluated at those vols
(``greeks``), so main memory is read once.  Rows
without an implied vol get NaN Greeks and the implied-vol status.  Like the Greeks loops,
each mask of requested Greeks gets its own compiled loop, so unrequested Greeks cost
nothing.
"""

import functools

import numpy as np
from numba import prange

from . import greeks as _greeks
from . import implied as _implied
from . import _args
from ._jit import BLOCK, loop, specialise


# Templates of the per-mask fused loops, copied per mask with the Greeks row loop GREEKS
# as a frozen global (see _jit.specialise).  Each block calls the row loops of
# kernel/implied.py and kernel/greeks.py (compiled once, called, not inlined: inlining the
# solver and all Greeks into one loop took minutes of cold compile per mask).  The Greeks
# read the vols just written, so the Greeks row loop gets one more specialisation here (a
# writable vol array).  Rows without an iv have a NaN vol: their Greeks come out NaN.
def _b76_template(premium, F, K, T, D, cp, iv_out, out, status, scratch):
    n = F.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        _implied._black76_iv_rows(a, e, premium, F, K, T, D, cp, iv_out, status)
        GREEKS(a, e, F, K, T, D, iv_out, cp, out, scratch)  # noqa: F821


def _bsm_template(premium, spot, K, T, D, q, cp, iv_out, out, status, scratch):
    n = spot.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        _implied._bsm_iv_rows(a, e, premium, spot, K, T, D, q, cp, iv_out, status)
        GREEKS(a, e, spot, K, T, D, q, iv_out, cp, out, scratch)  # noqa: F821


@functools.lru_cache(maxsize=None)
def _kernel(model, mask):
    template = _b76_template if model == "black76" else _bsm_template
    greek_rows, _ = _greeks._kernel(model, mask)
    return loop(specialise(template, f"sweep_{model}_{mask:04x}", GREEKS=greek_rows))


def _outputs(n, mask, iv_out, out, status):
    mask, nsel = _greeks._check_mask(mask)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    return mask


def black76_sweep(premium, F, K, T, D, cp, mask, iv_out, out, status):
    """Black-76 implied vol of ``premium`` and the Greeks in ``mask`` at that vol.

    Returns the number of rows with an implied vol and a requested Greek that is not
    finite (as ``greeks.black76_greeks``).
    """
    premium, F, K, T, D = _args.floats(premium, F, K, T, D)
    n = F.shape[0]
    cp = _args.codes(n, cp)
    mask = _outputs(n, mask, iv_out, out, status)
    scratch = np.empty(n, np.int8)    # the Greeks' own statuses (the iv's take priority)
    if n <= BLOCK:                    # one block: the row loops, without a parallel launch
        _implied._black76_iv_rows(0, n, premium, F, K, T, D, cp, iv_out, status)
        _greeks._kernel("black76", mask)[0](0, n, F, K, T, D, iv_out, cp, out, scratch)
    else:
        _kernel("black76", mask)(premium, F, K, T, D, cp, iv_out, out, status, scratch)
    return _greeks.take_nonfinite_flags(scratch)


def bsm_sweep(premium, spot, K, T, D, q, cp, mask, iv_out, out, status):
    """BSM implied vol of ``premium`` and the Greeks in ``mask`` (against spot)."""
    premium, spot, K, T, D, q = _args.floats(premium, spot, K, T, D, q)
    n = spot.shape[0]
    cp = _args.codes(n, cp)
    mask = _outputs(n, mask, iv_out, out, status)
    scratch = np.empty(n, np.int8)
    if n <= BLOCK:
        _implied._bsm_iv_rows(0, n, premium, spot, K, T, D, q, cp, iv_out, status)
        _greeks._kernel("bsm", mask)[0](0, n, spot, K, T, D, q, iv_out, cp, out, scratch)
    else:
        _kernel("bsm", mask)(premium, spot, K, T, D, q, cp, iv_out, out, status, scratch)
    return _greeks.take_nonfinite_flags(scratch)
