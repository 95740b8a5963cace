"""Argument checks and canonical array types for the public kernel entry points.

numba compiles one machine-code specialisation per combination of argument types, and an
array's type includes its layout and whether it is writable.  Arrow-backed columns are
read-only, numpy arrays usually writable: left alone, every loop would be compiled (tens
of seconds cold) and cached twice, and the two copies are not guaranteed to give the same
bits.  So every input goes in as a read-only C-contiguous view (no copy when it already is
contiguous and of the right dtype) and every output must be a writable C-contiguous array
of the right dtype and shape.  Lengths are checked here: the loops do no bounds checks.
"""

from __future__ import annotations

import numpy as np

from ._jit import BLOCK


def _readonly(a: np.ndarray) -> np.ndarray:
    if a.flags.writeable:
        a = a.view()
        a.flags.writeable = False
    return a


def floats(*arrays):
    """Read-only C-contiguous float64 views of 1-d inputs of one common length."""
    out = []
    n = None
    for a in arrays:
        a = np.ascontiguousarray(a, dtype=np.float64)
        if a.ndim != 1:
            raise ValueError(f"kernel inputs must be 1-d arrays, got shape {a.shape}")
        if n is None:
            n = a.shape[0]
        if a.shape[0] != n:
            raise ValueError(f"kernel inputs must all have length {n}, got {a.shape[0]}")
        out.append(_readonly(a))
    return out


def codes(n: int, cp) -> np.ndarray:
    """Read-only int8 call/put codes (+1 call, -1 put, 0 missing) of length n.

    Any other value is treated as missing (0), so it gets status missing_input.
    """
    cp = np.asarray(cp)
    if not np.issubdtype(cp.dtype, np.integer):
        raise TypeError(f"cp must be integer codes (+1 call, -1 put, 0 missing), "
                        f"got dtype {cp.dtype}")
    # one reduction: int8 codes viewed as uint8 are 255, 0, 1, and adding 1 (wrapping)
    # maps exactly the valid ones into 0..2; anything else is made 0 (missing)
    if cp.dtype != np.int8 or (cp.size and (cp.view(np.uint8) + np.uint8(1)).max() > 2):
        cp = np.where((cp == 1) | (cp == -1), cp, 0).astype(np.int8)
    cp = np.ascontiguousarray(cp)
    if cp.shape != (n,):
        raise ValueError(f"cp must have shape {(n,)}, got {cp.shape}")
    return _readonly(cp)


def output(name: str, a, shape, dtype) -> np.ndarray:
    """Check a preallocated output: writable, C-contiguous, of this dtype and shape."""
    if not isinstance(a, np.ndarray) or a.dtype != dtype or a.shape != tuple(shape) \
            or not a.flags.c_contiguous or not a.flags.writeable:
        raise ValueError(f"{name} must be a writable C-contiguous {np.dtype(dtype).name} "
                         f"array of shape {tuple(shape)}")
    return a


def run(rows_fn, par_fn, n: int, *args) -> None:
    """Call the serial row loop directly for one block or less, else the parallel loop.

    Both run the same compiled row loop, so the choice never changes a bit.
    """
    if n <= BLOCK:
        rows_fn(0, n, *args)
    else:
        par_fn(*args)
