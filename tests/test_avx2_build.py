"""The prices and implied vols compiled for a CPU without AVX-512.

The kernels are tuned on an AVX-512 machine (32 vector registers; the row loops are
compiled with a 3-way vector interleave, kernel/_jit.py).  On an AVX2 machine (16 ymm
registers, the common server without AVX-512) the same code spills more but must give
results of the same accuracy: this reruns the price and implied-vol test files, whose
references are mpmath and published identities (sources named in those files), in a
child process compiling for ``haswell`` (AVX2 + FMA).  The special functions are rerun for
haswell and the SSE2 baseline in tests/test_special.py.
"""

import os
import pathlib
import subprocess
import sys

import pytest

HERE = pathlib.Path(__file__).resolve().parent


def test_price_and_implied_vol_files_pass_compiled_for_avx2():
    if not (sys.platform.startswith("linux") and os.uname().machine == "x86_64"):
        pytest.skip("x86-64 only")
    env = dict(os.environ, NUMBA_CPU_NAME="haswell", NUMBA_CPU_FEATURES="")
    out = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
         str(HERE / "test_black.py"), str(HERE / "test_implied.py")],
        env=env, cwd=HERE.parent, capture_output=True, text=True, timeout=1800)
    tail = out.stdout[-3000:] + out.stderr[-2000:]
    assert out.returncode == 0, tail
    assert " passed" in out.stdout and "failed" not in out.stdout, tail
