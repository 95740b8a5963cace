"""The kernel imports alone: no pyarrow, no bindings, no benchmarks (issue: layering)."""

import subprocess
import sys
import textwrap

_BLOCK_PYARROW = textwrap.dedent("""
    import sys, importlib.abc

    class _NoArrow(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path, target=None):
            if name == "pyarrow" or name.startswith("pyarrow."):
                raise ImportError("pyarrow is blocked in this test")
            return None

    sys.meta_path.insert(0, _NoArrow())
""")


def _run(code: str) -> str:
    res = subprocess.run([sys.executable, "-c", _BLOCK_PYARROW + textwrap.dedent(code)],
                         capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr[-3000:]
    return res.stdout


def test_kernel_and_registry_import_and_run_without_pyarrow():
    out = _run("""
        import numpy as np
        import volsweep.kernel
        from volsweep.kernel import (black, greeks, implied, quotes, registry, special,
                                     status, sweep)
        # every model's price kernel runs through the registry's calling convention
        for m in registry.MODELS.values():
            n = 3
            extras = [np.full(n, x.default) for x in m.extras]
            p, st = np.empty(n), np.empty(n, np.int8)
            m.kernels["price"](np.full(n, 100.0), np.full(n, 100.0), np.full(n, 0.5),
                               np.full(n, 0.99), *extras, np.full(n, 0.2),
                               np.ones(n, np.int8), p, st)
            assert (st == 0).all() and (p > 0).all()
        assert not [k for k in sys.modules if k.startswith(("pyarrow", "benchmarks"))]
        assert "volsweep.api" not in sys.modules
        print("ok")
    """)
    assert out.strip() == "ok"


def test_facade_imports_arrow_modules_only_when_used():
    out = _run("""
        import volsweep
        assert "volsweep.api" not in sys.modules and "pyarrow" not in sys.modules
        print(volsweep.__version__)
        try:
            volsweep.price
        except ImportError as exc:
            print("needs pyarrow:", "pyarrow" in str(exc))
    """)
    assert out.splitlines() == ["0.1.0", "needs pyarrow: True"]


def test_product_never_imports_benchmarks():
    res = subprocess.run([sys.executable, "-c", textwrap.dedent("""
        import sys
        import volsweep, volsweep.cli, volsweep.api, volsweep.loader
        volsweep.backfill
        print(sorted(k for k in sys.modules if k.startswith("benchmarks")))
    """)], capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr[-3000:]
    assert res.stdout.strip() == "[]"
