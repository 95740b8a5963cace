"""Compilation policy for every kernel, in one place.

Two tiers (see DEVELOPERS.md):

* ``scalar`` -- pointwise float64 functions, always inlined into their callers so that the
  array loops see straight-line code LLVM can vectorise.  They are also callable from
  Python (for tests) and from any other numba-jitted code.
* ``loop`` -- the array loops (``prange``), which own threading.  ``nogil`` so that a risk
  engine can call them from several Python threads.

Why these flags:

* ``error_model="numpy"``: with numba's default ("python") every float division carries a
  ZeroDivisionError check, which blocks vectorisation of serial loops.  Division by zero
  gives inf/nan, as in numpy; the kernels select their way around it explicitly.
* ``fastmath={"contract"}``: lets LLVM fuse a*b+c into FMA instructions (about 25% faster,
  never less accurate).  No other fast-math flag: ``nnan``/``ninf`` would let LLVM assume
  away the NaN checks that produce our statuses, and ``reassoc``/``afn`` cost accuracy.
  Where an exact product error is needed we call a real fused multiply-add (``_intrinsics``)
  because ``contract`` does not guarantee fusion.
* ``cache=True``: compiled code is kept in ``__pycache__`` next to the source, so a new
  process (a Dask worker, the CLI) loads it instead of recompiling.  The cache entries are
  stamped with a hash of every kernel source file (``_cache.py``), because the loops
  inline code from other modules and numba alone would only notice edits to the loop's
  own file.
"""

import numba

from . import _cache

_cache.install()

FASTMATH = frozenset({"contract"})


def scalar(fn):
    """Pointwise float64 function: inlined, numpy error model, FMA contraction."""
    return numba.njit(inline="always", error_model="numpy", fastmath=set(FASTMATH),
                      cache=True, nogil=True)(fn)


def loop(fn):
    """Parallel array loop over preallocated outputs."""
    return numba.njit(parallel=True, error_model="numpy", fastmath=set(FASTMATH),
                      cache=True, nogil=True)(fn)


def serial_loop(fn):
    """Single-threaded array loop (used where parallel overhead dominates)."""
    return numba.njit(parallel=False, error_model="numpy", fastmath=set(FASTMATH),
                      cache=True, nogil=True)(fn)
