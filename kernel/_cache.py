"""numba on-disk cache keyed on a kernel module and everything it imports, not one file.

numba's cache stamps each compiled function with its own source file only.  Our array
loops inline scalar functions from other modules (``special.py``, ``_intrinsics.py``,
``black.py``), so an edit there would leave stale machine code in the cache, silently.
These locators stamp every kernel function with a hash of its module's sources *and of
every kernel module it imports, transitively* (``module_closure``; the imports are read
from the source with ``ast``, relative imports only, which is how kernel modules import
each other).  An edit to ``special.py`` invalidates every module that imports it; a new
module, or an edit to a module nothing else imports, leaves the others' cached machine
code valid.  Registered first, the locators claim only functions defined in this folder
and leave everything else to numba's own locators.

``kernel_source_hash()`` (all kernel sources) stays the kernel's version as a whole: the
backfill records it as the provenance of what it wrote.
"""

from __future__ import annotations

import ast
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
_MODULE_STAMPS: dict = {}


def kernel_imports(path: str) -> set:
    """The kernel modules (file base names) that the source at ``path`` imports, read with
    ``ast``: ``from . import a, b``, ``from .a import x`` and ``from .a.b import y``."""
    with open(path, "rb") as f:
        tree = ast.parse(f.read(), filename=path)
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                names.add(node.module.split(".")[0])
            else:
                names.update(alias.name for alias in node.names)
    return names


def module_closure(folder: str, name: str) -> list:
    """Sorted base names of ``name`` and every module of ``folder`` it imports,
    transitively."""
    seen = set()
    todo = [name]
    while todo:
        mod = todo.pop()
        path = os.path.join(folder, mod + ".py")
        if mod in seen or not os.path.exists(path):
            continue
        seen.add(mod)
        todo.extend(kernel_imports(path))
    return sorted(seen)


def hash_closure(folder: str, name: str) -> bytes:
    """sha256 over the names and contents of ``name``'s import closure in ``folder``."""
    h = hashlib.sha256()
    for mod in module_closure(folder, name):
        h.update(mod.encode())
        with open(os.path.join(folder, mod + ".py"), "rb") as f:
            h.update(hashlib.sha256(f.read()).digest())
    return h.digest()


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
        _STAMP.append(hashlib.sha256(hash_sources(_KERNEL_DIR) + _settings()).digest())
    return _STAMP[0]


def _settings() -> bytes:
    return f"interleave={INTERLEAVE}".encode()


def module_stamp(py_file: str) -> bytes:
    """The stamp of the kernel module at ``py_file``: its import closure's sources as this
    process first saw them, and the code-generation settings.  Taken once per module and
    process, for the reason given in ``kernel_source_hash``."""
    name = os.path.splitext(os.path.basename(py_file))[0]
    if name not in _MODULE_STAMPS:
        _MODULE_STAMPS[name] = hashlib.sha256(hash_closure(_KERNEL_DIR, name)
                                              + _settings()).digest()
    return _MODULE_STAMPS[name]


class _PackageStamp:
    def get_source_stamp(self):
        return module_stamp(self._py_file)

    @classmethod
    def from_function(cls, py_func, py_file):
        if os.path.dirname(os.path.abspath(py_file)) != _KERNEL_DIR:
            return None
        return super().from_function(py_func, py_file)


class KernelUserProvidedLocator(_PackageStamp, caching.UserProvidedCacheLocator):
    """Cache in NUMBA_CACHE_DIR when it is set (numba's own precedence).

    The folder does not depend on where the sources are, only on the module's stamp: two
    checkouts of the same kernel (a CI clone beside a developer's tree, Dask workers on a
    shared file system) share one compiled cache, and two different versions of a module
    (a branch beside main) keep separate ones instead of overwriting each other's index
    files, while the modules a branch did not touch are shared.
    """

    def __init__(self, py_func, py_file):
        super().__init__(py_func, py_file)
        self._cache_path = os.path.join(caching.config.CACHE_DIR, "volsweep-kernel",
                                        module_stamp(py_file).hex()[:16])


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
