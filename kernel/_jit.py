"""Compilation policy for every kernel, in one place.

Two tiers (see DEVELOPERS.md):

* ``scalar`` -- pointwise float64 functions, always inlined into their callers so that the
  array loops see straight-line code LLVM can vectorise.  They are also callable from
  Python (for tests) and from any other numba-jitted code.
* ``rows`` -- serial loops over one range of rows ``[a, e)`` of their arrays: the body of
  every array operation, compiled once and *called* (not inlined) from the parallel loop,
  from the fused sweep and, for small inputs, straight from Python.
* ``loop`` -- the parallel loops (``prange``), which own threading: thin wrappers that hand
  blocks of ``BLOCK`` rows to a ``rows`` function.  ``nogil`` so that a risk engine can call
  them from several Python threads.

Why two loops per operation: numba inlines the scalar tier at its own IR level, which is
what makes a cold compile slow (tens of seconds per loop).  Writing the body once as a
serial row-range loop means it is compiled once, and the parallel wrapper, the sweep and
small-input calls all reuse the same machine code, so they also give the same bits.

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
  stamped with a hash of the module's sources and of every kernel module it imports
  (``_cache.py``), because the loops inline code from other modules and numba alone would
  only notice edits to the loop's own file.
"""

import os
import types

import llvmlite.binding as _llvm
import numba
from numba.core.compiler_lock import global_compiler_lock

from . import _cache

_cache.install()

# Threading layer: a risk engine calls the kernels from many Python threads at once, and
# numba's fallback layer (workqueue) aborts the process when two threads launch parallel
# loops concurrently.  "threadsafe" makes numba pick tbb if installed, else GNU OpenMP
# (thread-safe on Linux; not fork-safe, so worker pools must spawn, not fork), and raise
# rather than fall back to workqueue.  An explicit NUMBA_THREADING_LAYER wins.
if "NUMBA_THREADING_LAYER" not in os.environ:
    numba.config.THREADING_LAYER = "threadsafe"

FASTMATH = frozenset({"contract"})

BLOCK = 2048  # rows per parallel task: a block's columns stay in L1/L2 between steps


# Vector interleave count of the row loops.  Their bodies are long dependency chains (log ->
# division -> exp / erfcx -> combination, ~200 cycles of latency per vector of 8 rows), and
# the out-of-order window of the CPU holds less than one such iteration, so LLVM's own
# choice (1 for loops this large) leaves the loop latency-bound.  Interleaving 3 vectors
# per iteration gives 3 independent chains: +20-30% price, +45% implied vol on Zen 4
# (benchmarks/RESULTS.md).  Not for the Greeks loops (``interleave=0``): they write 16
# output columns and are bound by memory at table sizes, where interleaving lost 7%.  Each
# row is computed by the same instructions either way, so the bits do not change
# (tests/test_determinism.py).  VOLSWEEP_INTERLEAVE=0 restores LLVM's choice everywhere
# (say, for a CPU with 16 vector registers, where the spills might cost more); it is part
# of the cache stamp.
INTERLEAVE = _cache.INTERLEAVE
_stack: list = []


def _set_interleave(count: int) -> None:
    _llvm.set_option("volsweep", f"--force-vector-interleave={count}")


def _interleaved(disp, count: int):
    """Compile ``disp`` with LLVM's --force-vector-interleave=count (0: LLVM's choice).

    The option is process-wide LLVM state, so it is set under numba's global compiler lock
    (no other compilation runs meanwhile), per dispatcher (a kernel compiled inside
    another's compilation gets its own count, then the outer one's is restored), and reset
    to 0 when the outermost of our compilations ends: other numba code in the process is
    compiled as if volsweep were not there.
    """
    compile_one = disp.compile

    def compile(sig):
        with global_compiler_lock:
            _stack.append(count)
            _set_interleave(count)
            try:
                return compile_one(sig)
            finally:
                _stack.pop()
                _set_interleave(_stack[-1] if _stack else 0)

    disp.compile = compile
    return disp


def scalar(fn):
    """Pointwise float64 function: inlined, numpy error model, FMA contraction."""
    return numba.njit(inline="always", error_model="numpy", fastmath=set(FASTMATH),
                      cache=True, nogil=True)(fn)


def _compiled(fn, parallel: bool, interleave: int):
    return _interleaved(numba.njit(parallel=parallel, error_model="numpy",
                                   fastmath=set(FASTMATH), cache=True, nogil=True)(fn),
                        interleave)


def loop(fn):
    """Parallel array loop over preallocated outputs."""
    return _compiled(fn, True, INTERLEAVE)


def rows(fn, interleave: int = INTERLEAVE):
    """Serial loop over rows ``a <= i < e`` (first two arguments), called per block;
    ``interleave``: LLVM's vector interleave count for it (0: LLVM's choice)."""
    return _compiled(fn, False, interleave)


def serial_loop(fn):
    """Single-threaded array loop (used where parallel overhead dominates)."""
    return _compiled(fn, False, INTERLEAVE)


def specialise(template, name: str, **consts):
    """A copy of ``template`` called ``name`` that also sees ``consts`` as globals.

    For kernels built per configuration (one per mask of Greeks): numba freezes global
    values into the machine code, files its cache under the qualified name, and names the
    machine-code symbols after it.  A closure would do the first, but copies sharing one
    qualified name share one symbol name, and when one cached kernel links another, two
    configurations with equal names can be merged into one (LLVM assumes equal names mean
    equal code) and a kernel silently runs the other's code.  A closure capturing a
    dispatcher also never hits the cache (its key pickles a per-process uuid).  So: a
    distinct name per configuration, and no closures.
    """
    g = dict(template.__globals__)
    g.update(consts)
    fn = types.FunctionType(template.__code__, g, name, template.__defaults__)
    fn.__qualname__ = name
    fn.__module__ = template.__module__
    return fn
