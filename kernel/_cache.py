"""numba on-disk cache keyed on the whole kernel package, not one file.

numba's cache stamps each compiled function with its own source file only.  Our array
loops inline scalar functions from other modules (``special.py``, ``_intrinsics.py``,
``black.py``), so an edit there would leave stale machine code in the cache, silently.
These locators stamp every kernel function with a hash of all ``kernel/*.py`` sources;
any kernel edit invalidates every cached kernel.  Registered first, they claim only
functions defined in this folder and leave everything else to numba's own locators.
"""

from __future__ import annotations

import glob
import hashlib
import os

from numba.core import caching

_KERNEL_DIR = os.path.dirname(os.path.abspath(__file__))


def hash_sources(folder: str) -> bytes:
    """sha256 over the names and contents (not mtimes) of folder/*.py."""
    h = hashlib.sha256()
    for path in sorted(glob.glob(os.path.join(folder, "*.py"))):
        h.update(os.path.basename(path).encode())
        with open(path, "rb") as f:
            h.update(hashlib.sha256(f.read()).digest())
    return h.digest()


_STAMP: list = []


def _interleave_setting() -> int:
    value = os.environ.get("VOLSWEEP_INTERLEAVE", "3")
    try:
        count = int(value)
    except ValueError:
        count = -1
    if not 0 <= count <= 16:
        raise ValueError(f"VOLSWEEP_INTERLEAVE must be an integer from 0 (LLVM's choice) to "
                         f"16, got {value!r}")
    return count


# Code-generation settings that change the machine code without changing the sources; they
# are part of the stamp, so each setting keeps its own compiled cache (see _jit.INTERLEAVE).
INTERLEAVE = _interleave_setting()


def kernel_source_hash() -> bytes:
    """The hash of the kernel sources as this process imported them (and of the
    code-generation settings above).

    Taken once, at import: a process that keeps running while someone edits kernel/ goes
    on stamping what it compiles with the hash of the code it actually runs, so it cannot
    file old machine code under the new sources' stamp.
    """
    if not _STAMP:
        settings = f"interleave={INTERLEAVE}".encode()
        _STAMP.append(hashlib.sha256(hash_sources(_KERNEL_DIR) + settings).digest())
    return _STAMP[0]


class _PackageStamp:
    def get_source_stamp(self):
        return kernel_source_hash()

    @classmethod
    def from_function(cls, py_func, py_file):
        if os.path.dirname(os.path.abspath(py_file)) != _KERNEL_DIR:
            return None
        return super().from_function(py_func, py_file)


class KernelUserProvidedLocator(_PackageStamp, caching.UserProvidedCacheLocator):
    """Cache in NUMBA_CACHE_DIR when it is set (numba's own precedence).

    The folder does not depend on where the sources are, only on their hash: two checkouts
    of the same kernel (a CI clone beside a developer's tree, Dask workers on a shared file
    system) share one compiled cache, and two different kernels (a branch beside main)
    keep separate ones instead of overwriting each other's index files.
    """

    def __init__(self, py_func, py_file):
        super().__init__(py_func, py_file)
        self._cache_path = os.path.join(caching.config.CACHE_DIR, "volsweep-kernel",
                                        kernel_source_hash().hex()[:16])


class KernelInTreeLocator(_PackageStamp, caching.InTreeCacheLocator):
    """Cache in kernel/__pycache__ (a source checkout or a writable install)."""


class KernelUserWideLocator(_PackageStamp, caching.UserWideCacheLocator):
    """Cache in the user's cache folder when kernel/ is not writable."""


def install() -> None:
    kernel_source_hash()
    classes = caching.CacheImpl._locator_classes
    for cls in (KernelUserWideLocator, KernelInTreeLocator, KernelUserProvidedLocator):
        if cls not in classes:
            classes.insert(0, cls)
