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


# Templates of the per-mask fused loops, by the model's number of extra inputs (the
# registry's calling convention), copied per model and mask with its implied-vol row loop
# IV and Greeks row loop GREEKS as frozen globals (see _jit.specialise).  Each block calls
# the row loops (compiled once, called, not inlined: inlining the solver and all Greeks
# into one loop took minutes of cold compile per mask).  The Greeks read the vols just
# written, so the Greeks row loop gets one more specialisation here (a writable vol
# array).  Rows without an iv have a NaN vol: their Greeks come out NaN.
def _template0(premium, U, K, T, D, cp, iv_out, out, status, scratch):
    n = U.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        IV(a, e, premium, U, K, T, D, cp, iv_out, status)  # noqa: F821
        GREEKS(a, e, U, K, T, D, iv_out, cp, out, scratch)  # noqa: F821


def _template1(premium, U, K, T, D, X, cp, iv_out, out, status, scratch):
    n = U.shape[0]
    for blk in prange((n + BLOCK - 1) // BLOCK):
        a = blk * BLOCK
        e = min(n, a + BLOCK)
        IV(a, e, premium, U, K, T, D, X, cp, iv_out, status)  # noqa: F821
        GREEKS(a, e, U, K, T, D, X, iv_out, cp, out, scratch)  # noqa: F821


_TEMPLATES = (_template0, _template1)


@functools.lru_cache(maxsize=None)
def fused_loop(iv_rows, greek_rows, n_extras, model, mask):
    """The fused loop of a model with ``n_extras`` extra inputs, its implied-vol row loop
    and its Greeks row loop for ``mask``."""
    return loop(specialise(_TEMPLATES[n_extras], f"sweep_{model}_{mask:04x}", IV=iv_rows,
                           GREEKS=greek_rows))


def run(model, iv_rows, greek_loops, premium, inputs, cp, mask, iv_out, out, status):
    """Check the arguments and run the fused loop; inputs: (U, K, T, D, *extras), already
    read-only float64 views; greek_loops(mask): the model's Greeks (row loop, parallel
    loop) for a mask.  Returns the count of ok rows with a non-finite Greek."""
    n = inputs[0].shape[0]
    mask = _outputs(n, mask, iv_out, out, status)
    cp = _args.codes(n, cp)
    scratch = np.empty(n, np.int8)    # the Greeks' own statuses (the iv's take priority)
    greek_rows = greek_loops(mask)[0]
    if n <= BLOCK:                    # one block: the row loops, without a parallel launch
        iv_rows(0, n, premium, *inputs, cp, iv_out, status)
        greek_rows(0, n, *inputs, iv_out, cp, out, scratch)
    else:
        fused_loop(iv_rows, greek_rows, len(inputs) - 4, model, mask)(
            premium, *inputs, cp, iv_out, out, status, scratch)
    return _greeks.take_nonfinite_flags(scratch)


def _outputs(n, mask, iv_out, out, status):
    mask, nsel = _greeks._check_mask(mask)
    _args.output("iv_out", iv_out, (n,), np.float64)
    _args.output("out", out, (nsel, n), np.float64)
    _args.output("status", status, (n,), np.int8)
    return mask


def black76_sweep(premium, F, K, T, D, shift, cp, mask, iv_out, out, status):
    """(Shifted) Black-76 implied vol of ``premium`` and the Greeks in ``mask`` at that vol.

    Returns the number of rows with an implied vol and a requested Greek that is not
    finite (as ``greeks.black76_greeks``).
    """
    premium, F, K, T, D, shift = _args.floats(premium, F, K, T, D, shift)
    return run("black76", _implied._black76_iv_rows, lambda m: _greeks._kernel("black76", m),
               premium, (F, K, T, D, shift), cp, mask, iv_out, out, status)


def bsm_sweep(premium, spot, K, T, D, q, cp, mask, iv_out, out, status):
    """BSM implied vol of ``premium`` and the Greeks in ``mask`` (against spot)."""
    premium, spot, K, T, D, q = _args.floats(premium, spot, K, T, D, q)
    return run("bsm", _implied._bsm_iv_rows, lambda m: _greeks._kernel("bsm", m), premium,
               (spot, K, T, D, q), cp, mask, iv_out, out, status)
