"""Load (or, the first time on a machine, compile) the kernels before the first real call.

numba compiles on first use and keeps the machine code on disk (kernel/_cache.py).  With a
warm cache, loading a kernel takes milliseconds; with a cold one, compiling takes tens of
seconds per kernel (minutes for everything on two loaded cores).

The number of compiled variants is bounded: each model's Greeks, sweep and bid/ask loops
are compiled for the Greek sets of ``registry.GREEK_SETS`` only, and any other set is
served by the smallest of them that holds it (the extra Greeks are computed and dropped;
each row's Greeks are the same bits whatever the set).  ``warmup()`` loads or compiles
every variant a call can use, so that after it no call compiles.  Any first use of a
kernel in a process goes through ``load_kernel``, which says on stderr when it has to
compile (once per machine), so that a compile is never mistaken for a slow run.
"""

from __future__ import annotations

import contextlib
import sys
import threading
import time

import numba
import numpy as np

from volsweep.kernel import black as _black
from volsweep.kernel import greeks as _greeks
from volsweep.kernel import registry as _registry
from volsweep.kernel._jit import BLOCK

_VEGA = 1 << _greeks.GREEK_NAMES.index("vega")
_LOADED: set = set()
_LOCK = threading.Lock()
_LAUNCH_LOCK = threading.Lock()
_UNGUARDED = contextlib.nullcontext()
_workqueue = None  # is numba's threading layer "workqueue"?  Known after the first launch


def _probe_threading_layer() -> bool:
    """Start numba's threading layer with the smallest parallel kernel (discount factors:
    quick to load from the cache, and most calls need it anyway) and say whether it is
    ``workqueue``, which is not thread-safe and aborts the process on a nested parallel
    launch."""
    global _workqueue
    with _LAUNCH_LOCK:
        if _workqueue is None:
            # more than one block: one block or less runs the row loop without a launch
            n = BLOCK + 1
            _black.discount_factors(np.zeros(n), np.ones(n), np.empty(n))
            _workqueue = numba.threading_layer() == "workqueue"
    return _workqueue


def launch_guard():
    """The context every kernel launch of the bindings runs in: nothing under ``omp`` or
    ``tbb``, which take parallel launches from several Python threads at once; under
    ``workqueue``, which aborts the process on concurrent launches, a lock, so that one
    call at a time runs the kernels (loads and warm-ups included)."""
    if _workqueue is False or not _probe_threading_layer():
        return _UNGUARDED
    return _LAUNCH_LOCK
_NOTICE_AFTER = 2.0        # seconds: a load that takes longer is a compile (loading
#                            from the disk cache takes milliseconds, ~1 s on a loaded machine)


def served_mask(model: str, mask: int, exercise: str = "european") -> int:
    """The compiled Greek set (a mask of ``registry.GREEK_SETS``) that serves ``mask``."""
    for cand in _registry.greek_set_masks(model, exercise):
        if mask & ~cand == 0:
            return cand
    raise ValueError(f"mask {mask:#x} holds Greeks model {model!r} does not define")


def _touch(model: str, op: str, mask: int, exercise: str = "european") -> None:
    """Run one kernel on one row and on BLOCK + 1 rows of valid inputs (both code paths:
    the row loop called directly and the parallel loop)."""
    entry = _registry.model(model, exercise)
    kern = entry.kernels[op]
    n = BLOCK + 1
    und = np.full(n, 1.0)
    K = np.full(n, 1.1)
    T = np.full(n, 0.5)
    D = np.full(n, 0.98)
    vol = np.full(n, 0.2)
    cp = np.ones(n, np.int8)
    extras = tuple(np.full(n, x.default) for x in entry.extras)
    premium = np.full(n, 0.05)
    nsel = bin(mask).count("1")
    for s in (slice(0, 1), slice(0, n)):
        m = s.stop
        ins = (und[s], K[s], T[s], D[s], *(e[s] for e in extras))
        f64 = [np.empty(m) for _ in range(4)]
        i8 = [np.empty(m, np.int8) for _ in range(3)]
        out = np.empty((nsel, m))
        if op == "price":
            kern(*ins, vol[s], cp[s], f64[0], i8[0])
        elif op == "implied_vol":
            kern(premium[s], *ins, cp[s], f64[0], i8[0])
        elif op == "greeks":
            kern(*ins, vol[s], cp[s], mask, out, i8[0])
        elif op == "sweep":
            kern(premium[s], *ins, cp[s], mask, f64[0], out, i8[0])
        elif op == "bid_ask":
            kern(0.9 * premium[s], 1.1 * premium[s], *ins, cp[s], mask, *f64, out, *i8)
        else:
            raise ValueError(f"unknown kernel operation {op!r}")


def load_kernel(model: str, op: str, mask: int = 0, exercise: str = "european") -> float:
    """Load (or compile) one kernel variant once per process; returns the seconds spent
    (0 when it was already loaded).  A load that takes longer than two seconds is a
    compile: a line on stderr says so while it runs, and another when it is done.
    ``exercise``: the registry entry's exercise style (American kernels are their own)."""
    european = exercise == "european"
    key = (model, op, mask) if european else (model, op, mask, exercise)
    if key in _LOADED:
        return 0.0
    with _LOCK:
        if key in _LOADED:
            return 0.0
        t0 = time.perf_counter()
        failed = []

        def work():
            try:
                with launch_guard():
                    if european:
                        _touch(model, op, mask)
                    else:
                        _touch(model, op, mask, exercise)
            except BaseException as exc:       # re-raised in the caller's thread
                failed.append(exc)

        worker = threading.Thread(target=work, name="volsweep-load", daemon=True)
        worker.start()
        worker.join(_NOTICE_AFTER)
        noticed = worker.is_alive()
        if noticed:
            what = (f"{model} {op}" + ("" if european else f" {exercise}")
                    + (f" ({_set_label(model, mask)})" if mask else ""))
            print(f"volsweep: compiling the {what} kernel (once per machine; "
                  "volsweep.warmup() does all of them up front)...", file=sys.stderr,
                  flush=True)
        worker.join()
        if failed:
            raise failed[0]
        spent = time.perf_counter() - t0
        if noticed:
            print(f"volsweep: compiled in {spent:.0f} s", file=sys.stderr, flush=True)
        _LOADED.add(key)
        return spent


def _set_label(model: str, mask: int) -> str:
    if mask == _greeks.greek_mask(None, model):
        return "all Greeks"
    return "Greeks " + ",".join(_greeks.greek_names(mask))


def kernel_variants(models=None, which=None, sweep: bool = True, bid_ask: bool = True):
    """The kernel variants calls can use (see ``warmup``): (model, operation, mask) for
    European exercise, (model, operation, mask, "american") for the American kernels of
    the models that have them (registry ``AMERICAN``)."""
    models = _registry.MODEL_NAMES if models is None else models
    if isinstance(models, str):
        models = (models,)
    out = []
    for name in models:
        for exercise in _registry.EXERCISES:
            if exercise == "american" and name not in _registry.AMERICAN:
                continue
            tail = () if exercise == "european" else (exercise,)
            entry = _registry.model(name, exercise)
            sets = _registry.greek_set_masks(name, exercise)
            if which is not None:
                want = _greeks.greek_mask(which, name)
                if want & ~_registry.greek_set_masks(name, exercise)[-1]:
                    continue            # Greeks these kernels do not compute
                sets = (served_mask(name, want, exercise),)
            out += [(entry.name, "price", 0) + tail, (entry.name, "implied_vol", 0) + tail]
            out += [(entry.name, "greeks", m) + tail for m in sets]
            if sweep:
                out += [(entry.name, "sweep", m) + tail for m in sets]
            if bid_ask:
                out += [(entry.name, "bid_ask", m) + tail
                        for m in sorted({served_mask(name, m | _VEGA, exercise)
                                         for m in sets})]
    return out


def warmup(models=None, which=None, sweep: bool = True, bid_ask: bool = True) -> dict:
    """Load or compile every kernel variant the calls can use, so that no call compiles.

    ``models``: the model names (None: every model of the registry); ``which``: only the
    Greek set serving these Greeks (None: every set of ``registry.GREEK_SETS``); ``sweep``,
    ``bid_ask``: also the fused implied-vol + Greeks loops and the one-pass bid/ask loops.
    Returns the seconds spent per kernel variant ("model op [Greek set]").
    """
    spent = {}
    for model, op, mask, *exercise in kernel_variants(models, which, sweep, bid_ask):
        label = (f"{model} {op}" + "".join(f" {e}" for e in exercise)
                 + (f" ({_set_label(model, mask)})" if mask else ""))
        spent[label] = load_kernel(model, op, mask, *exercise)
    return spent
