"""The kernel's on-disk cache is keyed on every kernel source file."""

import shutil

from volsweep.kernel import _cache, black


def test_kernel_loops_use_the_package_wide_cache_stamp():
    black.black76_price.enable_caching()
    locator = black.black76_price._cache._impl.locator
    assert isinstance(locator, (_cache.KernelInTreeLocator, _cache.KernelUserWideLocator,
                                _cache.KernelUserProvidedLocator))
    assert locator.get_source_stamp() == _cache.kernel_source_hash()


def test_editing_any_kernel_file_changes_the_stamp(tmp_path, monkeypatch):
    copy = tmp_path / "kernel"
    shutil.copytree(_cache._KERNEL_DIR, copy, ignore=shutil.ignore_patterns("__pycache__"))
    monkeypatch.setattr(_cache, "_KERNEL_DIR", str(copy))
    before = _cache.kernel_source_hash()
    (copy / "special.py").write_text((copy / "special.py").read_text() + "\n# edit\n")
    assert _cache.kernel_source_hash() != before
