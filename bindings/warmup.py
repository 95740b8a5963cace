"""Load (or, the first time on a machine, compile) the kernels before the first real call.

numba compiles on first use and keeps the machine code on disk (kernel/_cache.py).  With a
warm cache, loading a kernel takes milliseconds; with a cold one, compiling takes tens of
seconds per kernel (about 3-5 minutes for everything on two loaded cores).  A service calls
``warmup()`` once at start-up so that no request pays for it.
"""

from __future__ import annotations

import time

import numpy as np

from volsweep.kernel import black as _black
from volsweep.kernel import greeks as _greeks
from volsweep.kernel import implied as _implied
from volsweep.kernel import sweep as _sweep
from volsweep.kernel._jit import BLOCK


def warmup(models=("bsm", "black76"), which=None, sweep: bool = True) -> dict:
    """Load or compile the price, implied-vol, Greeks and sweep kernels.

    ``models``: the models to prepare; ``which``: the Greeks set as for ``greeks()``
    (``None``: all of them; each distinct set is its own compiled kernel); ``sweep``: also
    the fused implied-vol + Greeks pass.  Returns the seconds spent per kernel.
    Both code paths (a single block, called directly, and the multi-threaded loop) are
    touched, on ``BLOCK + 1`` rows of valid inputs.
    """
    n = BLOCK + 1
    one = np.ones(n)
    K = np.full(n, 1.1)
    T = np.full(n, 0.5)
    D = np.full(n, 0.98)
    q = np.full(n, 0.01)
    vol = np.full(n, 0.2)
    cp = np.ones(n, np.int8)
    price = np.empty(n)
    st = np.empty(n, np.int8)
    iv = np.empty(n)
    spent = {}

    def timed(name, fn):
        t0 = time.perf_counter()
        fn(slice(0, 1))
        fn(slice(0, n))
        spent[name] = time.perf_counter() - t0

    for model in models:
        mask = _greeks.greek_mask(which, model)
        out = np.empty((bin(mask).count("1"), n))
        if model == "bsm":
            und, extra = one, (q,)
            fprice, fiv, fgreeks, fsweep = (_black.bsm_price, _implied.bsm_iv,
                                            _greeks.bsm_greeks, _sweep.bsm_sweep)
        elif model == "black76":
            und, extra = one, ()
            fprice, fiv, fgreeks, fsweep = (_black.black76_price, _implied.black76_iv,
                                            _greeks.black76_greeks, _sweep.black76_sweep)
        else:
            raise ValueError(f"model must be 'bsm' or 'black76', got {model!r}")

        def cols(s, *more):
            return (und[s], K[s], T[s], D[s], *(e[s] for e in extra), *(m[s] for m in more))

        timed(f"{model} price", lambda s: fprice(*cols(s, vol), cp[s], price[s], st[s]))
        premium = price.copy()
        timed(f"{model} implied_vol",
              lambda s: fiv(premium[s], *cols(s), cp[s], iv[s], st[s]))
        timed(f"{model} greeks",
              lambda s: fgreeks(*cols(s, vol), cp[s], mask,
                                np.ascontiguousarray(out[:, s]), st[s]))
        if sweep:
            timed(f"{model} sweep",
                  lambda s: fsweep(premium[s], *cols(s), cp[s], mask, iv[s],
                                   np.ascontiguousarray(out[:, s]), st[s]))
    return spent
