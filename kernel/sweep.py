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
from ._jit import loop, serial_loop
from .greeks import ALL_GREEKS


_BLOCK = 2048  # rows per block: its inputs stay in L1/L2 between the two steps

# Serial row loops, compiled once per model (and per mask for the Greeks) and *called*,
# not inlined, from the block loop below.  Inlining the implied-vol solver and all the
# Greeks into one function made numba's compile time explode (minutes per mask); a call
# per block of 2048 rows costs nothing measurable.
_iv_serial = {
    "black76": serial_loop(_implied.black76_iv.py_func),
    "bsm": serial_loop(_implied.bsm_iv.py_func),
}


@functools.lru_cache(maxsize=None)
def _kernel(model, mask):
    iv_rows = _iv_serial[model]
    greek_rows = _greeks._kernel(model, mask, direct=True, serial=True)
    B = _BLOCK

    if model == "black76":
        @loop
        def kern(premium, F, K, T, D, cp, iv_out, out, status, scratch):
            n = F.shape[0]
            for blk in prange((n + B - 1) // B):
                a = blk * B
                e = min(n, a + B)
                iv_rows(premium[a:e], F[a:e], K[a:e], T[a:e], D[a:e], cp[a:e], iv_out[a:e],
                        status[a:e])
                # rows without an iv have a NaN vol: their Greeks come out NaN
                greek_rows(F[a:e], K[a:e], T[a:e], D[a:e], iv_out[a:e], cp[a:e], out[:, a:e],
                           scratch[a:e])
        return kern

    @loop
    def kern(premium, spot, K, T, D, q, cp, iv_out, out, status, scratch):
        n = spot.shape[0]
        for blk in prange((n + B - 1) // B):
            a = blk * B
            e = min(n, a + B)
            iv_rows(premium[a:e], spot[a:e], K[a:e], T[a:e], D[a:e], q[a:e], cp[a:e],
                    iv_out[a:e], status[a:e])
            greek_rows(spot[a:e], K[a:e], T[a:e], D[a:e], q[a:e], iv_out[a:e], cp[a:e],
                       out[:, a:e], scratch[a:e])
    return kern


def _check(n, mask, iv_out, out, status):
    nsel = bin(mask).count("1")
    if not (0 <= mask <= ALL_GREEKS):
        raise ValueError(f"mask {mask!r} outside 0..{ALL_GREEKS}")
    if out.dtype != np.float64 or out.shape != (nsel, n) or not out.flags.c_contiguous:
        raise ValueError(f"out must be a C-contiguous float64 array of shape {(nsel, n)}")
    if iv_out.shape != (n,) or status.shape != (n,) or status.dtype != np.int8:
        raise ValueError("iv_out must be float64 and status int8, both of shape (n,)")


def black76_sweep(premium, F, K, T, D, cp, mask, iv_out, out, status):
    """Black-76 implied vol of ``premium`` and the Greeks in ``mask`` at that vol."""
    mask = int(mask)
    _check(F.shape[0], mask, iv_out, out, status)
    _kernel("black76", mask)(premium, F, K, T, D, cp, iv_out, out, status,
                             np.empty(F.shape[0], np.int8))


def bsm_sweep(premium, spot, K, T, D, q, cp, mask, iv_out, out, status):
    """BSM implied vol of ``premium`` and the Greeks in ``mask`` (against spot)."""
    mask = int(mask)
    _check(spot.shape[0], mask, iv_out, out, status)
    _kernel("bsm", mask)(premium, spot, K, T, D, q, cp, iv_out, out, status,
                         np.empty(spot.shape[0], np.int8))
