"""Load (or, the first time on a machine, compile) the kernels before the first real call.

numba compiles on first use and keeps the machine code on disk (kernel/_cache.py).  With a
warm cache, loading a kernel takes milliseconds; with a cold one, compiling takes tens of
seconds per kernel (minutes for everything on two loaded cores).  A service calls
``warmup()`` once at start-up so that no request pays for it.  The models and their
kernels are the registry's (kernel/registry.py).
"""

from __future__ import annotations

import time

import numpy as np

from volsweep.kernel import greeks as _greeks
from volsweep.kernel import registry as _registry
from volsweep.kernel._jit import BLOCK

_VEGA = 1 << _greeks.GREEK_NAMES.index("vega")


def warmup(models=None, which=None, sweep: bool = True, bid_ask: bool = False) -> dict:
    """Load or compile the price, implied-vol, Greeks and sweep kernels.

    ``models``: the model names to prepare (None: every model of the registry); ``which``:
    the Greeks set as for ``greeks()`` (``None``: all of them; each distinct set is its own
    compiled kernel); ``sweep``: also the fused implied-vol + Greeks pass; ``bid_ask``: also
    the one-pass bid/ask kernel (its Greeks set always holds vega).  Returns the seconds
    spent per kernel.  Both code paths (a single block, called directly, and the
    multi-threaded loop) are touched, on ``BLOCK + 1`` rows of valid inputs.
    """
    models = _registry.MODEL_NAMES if models is None else models
    if isinstance(models, str):
        models = (models,)
    n = BLOCK + 1
    one = np.ones(n)
    K = np.full(n, 1.1)
    T = np.full(n, 0.5)
    D = np.full(n, 0.98)
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

    for name in models:
        model = _registry.model(name)
        kern = model.kernels
        mask = _greeks.greek_mask(which, name)
        out = np.empty((bin(mask).count("1"), n))
        extras = tuple(np.full(n, x.default) for x in model.extras)

        def cols(s, *more):
            return (one[s], K[s], T[s], D[s], *(e[s] for e in extras), *(m[s] for m in more))

        timed(f"{name} price", lambda s: kern["price"](*cols(s, vol), cp[s], price[s], st[s]))
        premium = price.copy()
        timed(f"{name} implied_vol",
              lambda s: kern["implied_vol"](premium[s], *cols(s), cp[s], iv[s], st[s]))
        timed(f"{name} greeks",
              lambda s: kern["greeks"](*cols(s, vol), cp[s], mask,
                                       np.ascontiguousarray(out[:, s]), st[s]))
        if sweep:
            timed(f"{name} sweep",
                  lambda s: kern["sweep"](premium[s], *cols(s), cp[s], mask, iv[s],
                                          np.ascontiguousarray(out[:, s]), st[s]))
        if bid_ask:
            m2 = mask | _VEGA
            out2 = np.empty((bin(m2).count("1"), n))
            more = [np.empty(n) for _ in range(3)] + [np.empty(n, np.int8) for _ in range(2)]
            timed(f"{name} bid_ask",
                  lambda s: kern["bid_ask"](0.99 * premium[s], 1.01 * premium[s], *cols(s),
                                            cp[s], m2, more[0][s], more[1][s], more[2][s],
                                            iv[s], np.ascontiguousarray(out2[:, s]),
                                            more[3][s], more[4][s], st[s]))
    return spent
