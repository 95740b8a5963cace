"""The kernel's on-disk cache is keyed on each kernel module's import closure."""

import shutil

from volsweep.kernel import _cache, black


def test_kernel_loops_use_their_module_closure_stamp():
    black._black76_price_rows.enable_caching()
    locator = black._black76_price_rows._cache._impl.locator
    assert isinstance(locator, (_cache.KernelInTreeLocator, _cache.KernelUserWideLocator,
                                _cache.KernelUserProvidedLocator))
    assert locator.get_source_stamp() == _cache.module_stamp(black.__file__)


def test_the_closure_follows_relative_imports_transitively():
    # black.py imports special (which imports _intrinsics and _jit), status, _args, _jit;
    # read here from the sources themselves
    closure = _cache.module_closure(_cache._KERNEL_DIR, "black")
    assert {"black", "special", "_intrinsics", "_jit", "_cache", "status", "_args"} <= set(closure)
    assert "greeks" not in closure and "registry" not in closure
    assert "black" in _cache.module_closure(_cache._KERNEL_DIR, "greeks")


def test_an_edit_changes_the_stamp_of_every_importer_and_no_other(tmp_path):
    copy = tmp_path / "kernel"
    shutil.copytree(_cache._KERNEL_DIR, copy, ignore=shutil.ignore_patterns("__pycache__"))
    mods = ("special", "black", "greeks", "status")
    before = {m: _cache.hash_closure(str(copy), m) for m in mods}
    (copy / "black.py").write_text((copy / "black.py").read_text() + "\n# edit\n")
    after = {m: _cache.hash_closure(str(copy), m) for m in mods}
    assert after["black"] != before["black"] and after["greeks"] != before["greeks"]
    assert after["special"] == before["special"] and after["status"] == before["status"]
    (copy / "newmodule.py").write_text("from .special import exp\n")
    assert {m: _cache.hash_closure(str(copy), m) for m in mods} == after


def test_editing_any_kernel_file_changes_the_stamp(tmp_path):
    copy = tmp_path / "kernel"
    shutil.copytree(_cache._KERNEL_DIR, copy, ignore=shutil.ignore_patterns("__pycache__"))
    before = _cache.hash_sources(str(copy))
    assert before == _cache.hash_sources(_cache._KERNEL_DIR)
    (copy / "special.py").write_text((copy / "special.py").read_text() + "\n# edit\n")
    assert _cache.hash_sources(str(copy)) != before


def test_the_stamp_is_taken_once_per_process():
    # a process running while kernel/ is edited must not stamp old code with the new hash
    assert _cache.kernel_source_hash() is _cache.kernel_source_hash()


def test_each_kernel_version_caches_in_its_own_folder(monkeypatch, tmp_path):
    from numba.core import caching
    monkeypatch.setattr(caching.config, "CACHE_DIR", str(tmp_path))
    loc = _cache.KernelUserProvidedLocator(black._black76_price_rows.py_func, black.__file__)
    assert loc.get_cache_path() == str(tmp_path / "volsweep-kernel"
                                       / _cache.module_stamp(black.__file__).hex()[:16])


_INTERLEAVE_PROBE = r"""
import re, sys
import numba, numpy as np

def packed_adds(fn):
    asm = "\n".join(fn.inspect_asm().values())
    return len(re.findall(r"\bvaddpd\s+%[xyz]mm", asm))

def user_loop():
    @numba.njit(fastmath=True)
    def total(a):
        s = 0.0
        for i in range(a.shape[0]):
            s += a[i]
        return s
    total(np.ones(4))
    return total

before = packed_adds(user_loop())
from volsweep.kernel import _jit, black
x = np.linspace(0.0, 0.1, 100)
black.discount_factors(x, x, np.empty(100))         # compiles one of our row loops
after = packed_adds(user_loop())
print(before, after, len(_jit._stack))
"""


def test_forced_interleave_does_not_leak_into_other_numba_code(tmp_path):
    # the interleave option is process-wide LLVM state: set while our kernels compile, it
    # must be back at LLVM's own choice for code compiled afterwards
    import os
    import subprocess
    import sys
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path))        # force a fresh compile
    out = subprocess.run([sys.executable, "-c", _INTERLEAVE_PROBE], env=env, check=True,
                         capture_output=True, text=True).stdout.split()
    before, after, depth = (int(v) for v in out)
    assert before > 0 and after == before and depth == 0


def test_interleave_setting_is_part_of_the_stamp_and_checked():
    import os
    import subprocess
    import sys
    code = "from volsweep.kernel import _cache; print(_cache.kernel_source_hash().hex())"
    stamps = set()
    for value in ("0", "3"):
        env = dict(os.environ, VOLSWEEP_INTERLEAVE=value)
        stamps.add(subprocess.run([sys.executable, "-c", code], env=env, check=True,
                                  capture_output=True, text=True).stdout.strip())
    assert len(stamps) == 2
    env = dict(os.environ, VOLSWEEP_INTERLEAVE="three")
    r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    assert r.returncode != 0 and "VOLSWEEP_INTERLEAVE" in r.stderr

