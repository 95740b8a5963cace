"""The kernel's on-disk cache is keyed on every kernel source file."""

import shutil

from volsweep.kernel import _cache, black


def test_kernel_loops_use_the_package_wide_cache_stamp():
    black._black76_price_rows.enable_caching()
    locator = black._black76_price_rows._cache._impl.locator
    assert isinstance(locator, (_cache.KernelInTreeLocator, _cache.KernelUserWideLocator,
                                _cache.KernelUserProvidedLocator))
    assert locator.get_source_stamp() == _cache.kernel_source_hash()


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
                                       / _cache.kernel_source_hash().hex()[:16])
