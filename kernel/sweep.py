"""One pass from quotes to implied vols and Greeks.

Each row is read once: inputs are validated, the premium is inverted (``implied``), and
the requested Greeks are evaluated at that vol (``greeks``), all in registers.  Rows
without an implied vol get NaN Greeks and the implied-vol status.  Like the Greeks loops,
each mask of requested Greeks gets its own compiled loop, so unrequested Greeks cost
nothing.
"""

import functools
import math

import numpy as np
from numba import prange

from . import status as S
from ._jit import loop, scalar
from .black import input_status, spot_status
from .greeks import (ALL_GREEKS, _greeks_spot, _slots, _store, greeks_forward)
from .implied import black_total_vol
from .special import exp

NAN = np.nan


@scalar
def _iv_row(P, f, k, tt, d, w, st):
    """(sigma, status) of one row whose input status is ``st``; placeholders if not ok."""
    ok = st == S.OK
    s, st2 = black_total_vol(P, f if ok else 1.0, k if ok else 1.0, d if ok else 1.0,
                             w if ok else 1.0)
    st = st2 if ok else st
    good = st == S.OK
    return (s / math.sqrt(tt) if good else NAN), st


@functools.lru_cache(maxsize=None)
def _kernel(model, mask):
    sl, _ = _slots(mask)

    if model == "black76":
        @loop
        def kern(premium, F, K, T, D, cp, iv_out, out, status):
            for i in prange(F.shape[0]):
                f = F[i]
                k = K[i]
                tt = T[i]
                d = D[i]
                w = float(cp[i])
                st = input_status(f, k, tt, d, 0.0, cp[i])
                sig, st = _iv_row(premium[i], f, k, tt, d, w, st)
                ok = st == S.OK
                g = greeks_forward(f if ok else 1.0, k if ok else 1.0, tt if ok else 1.0,
                                   d if ok else 1.0, sig if ok else 0.2, w if ok else 1.0)
                iv_out[i] = sig
                _store(out, i, g, ok, sl)
                status[i] = st
        return kern

    @loop
    def kern(premium, spot, K, T, D, q, cp, iv_out, out, status):
        for i in prange(spot.shape[0]):
            u = spot[i]
            k = K[i]
            tt = T[i]
            d = D[i]
            y = q[i]
            w = float(cp[i])
            st = input_status(u, k, tt, d, 0.0, cp[i])
            dq = exp(-y * tt)
            f = u * dq / d
            st2 = spot_status(u, tt, d, y, f)
            st = st2 if (st == S.OK and st2 != S.OK) else st
            sig, st = _iv_row(premium[i], f, k, tt, d, w, st)
            ok = st == S.OK
            g = _greeks_spot(u if ok else 1.0, k if ok else 1.0, tt if ok else 1.0,
                             d if ok else 1.0, y if ok else 0.0, dq if ok else 1.0,
                             f if ok else 1.0, sig if ok else 0.2, w if ok else 1.0)
            iv_out[i] = sig
            _store(out, i, g, ok, sl)
            status[i] = st
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
    _kernel("black76", mask)(premium, F, K, T, D, cp, iv_out, out, status)


def bsm_sweep(premium, spot, K, T, D, q, cp, mask, iv_out, out, status):
    """BSM implied vol of ``premium`` and the Greeks in ``mask`` (against spot)."""
    mask = int(mask)
    _check(spot.shape[0], mask, iv_out, out, status)
    _kernel("bsm", mask)(premium, spot, K, T, D, q, cp, iv_out, out, status)
