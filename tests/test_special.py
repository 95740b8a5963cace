"""Accuracy and special values of kernel/special.py.

Reference: mpmath at 50 significant digits (tests/data/special_reference.npz, written by
tests/gen_special_reference.py; provenance inside the file).  Errors are measured against
the true value, not against its rounding: in ulps of the true value for exp and log,
relative for the others, and in units of 2**-1074 (absolute) where the true result is
subnormal, because there relative error says nothing.

Accuracy table (the bounds asserted below; measured peaks are in kernel/special.py):

=========  ===============================  ======  ====================================
function   range tested                     points  bound
=========  ===============================  ======  ====================================
exp        [-745.13, 709.78]                16005   <= 1 ulp (subnormal results too)
log        positive normals and subnormals  15613   <= 1 ulp
erfc       [-6, 27.3]                       15239   <= 2e-15 rel; subnormal 4 * 2**-1074
erfcx      [-26.628, largest double]        14923   <= 2e-15 rel; subnormal 4 * 2**-1074
norm_cdf   [-38.5, 8.3]                     15206   <= 2e-15 rel; subnormal 4 * 2**-1074
norm_pdf   [-38.5, 38.5]                     8003   <= 2e-15 rel; subnormal 4 * 2**-1074
=========  ===============================  ======  ====================================

Beyond the tables: special values as sentences, the scalar call against the vector loop,
and the accuracy rerun for CPUs without AVX-512 (AVX2, and the SSE2 baseline).
"""

import json
import math
import os
import pathlib
import re
import subprocess
import sys

import llvmlite.binding
import mpmath
import numba
import numpy as np
import pytest

from volsweep.kernel import special
from volsweep.kernel._jit import loop, serial_loop

HERE = pathlib.Path(__file__).parent
TABLE = np.load(HERE / "data" / "special_reference.npz")
NAMES = ("exp", "log", "erfc", "erfcx", "norm_cdf", "norm_pdf")
DBL_MIN = 2.0 ** -1022
TINY = 2.0 ** -1074
REL_TOL = 2e-15
SUBNORMAL_ABS_TOL = 4          # in units of 2**-1074
ULP_TOL = {"exp": 1.0, "log": 1.0}


# --- array loops over each function, the way the pricing kernels call them ----------
# The project's policy (kernel/_jit.py) minus the on-disk cache: numba keys a cache entry
# on the caller's own source file only, so a cached test loop would go on testing the
# special.py it was first compiled against.

def _uncached(policy):
    def decorate(fn):
        options = dict(policy(fn).targetoptions)
        options.pop("nopython", None)
        return numba.njit(**options)(fn)
    return decorate


@_uncached(loop)
def _par_exp(x, out):
    for i in numba.prange(x.size):
        out[i] = special.exp(x[i])


@_uncached(loop)
def _par_log(x, out):
    for i in numba.prange(x.size):
        out[i] = special.log(x[i])


@_uncached(loop)
def _par_erfc(x, out):
    for i in numba.prange(x.size):
        out[i] = special.erfc(x[i])


@_uncached(loop)
def _par_erfcx(x, out):
    for i in numba.prange(x.size):
        out[i] = special.erfcx(x[i])


@_uncached(loop)
def _par_norm_cdf(x, out):
    for i in numba.prange(x.size):
        out[i] = special.norm_cdf(x[i])


@_uncached(loop)
def _par_norm_pdf(x, out):
    for i in numba.prange(x.size):
        out[i] = special.norm_pdf(x[i])


@_uncached(serial_loop)
def _ser_norm_cdf(x, out):
    for i in range(x.size):
        out[i] = special.norm_cdf(x[i])


@_uncached(serial_loop)
def _ser_erfcx(x, out):
    for i in range(x.size):
        out[i] = special.erfcx(x[i])


LOOPS = {"exp": _par_exp, "log": _par_log, "erfc": _par_erfc, "erfcx": _par_erfcx,
         "norm_cdf": _par_norm_cdf, "norm_pdf": _par_norm_pdf}


def apply(name, x):
    x = np.ascontiguousarray(x, dtype=np.float64)
    out = np.empty_like(x)
    LOOPS[name](x, out)
    return out


# --- error metric that behaves for NaN, inf and zero ---------------------------------

def _error_in_ref_ulps(y, ref, frac):
    """y - true in units of u = ulp(ref) (the spacing above |ref|), and u."""
    y = np.asarray(y, dtype=np.float64)
    ref = np.asarray(ref, dtype=np.float64)
    frac = np.asarray(frac, dtype=np.float64)
    with np.errstate(all="ignore"):
        u = np.spacing(np.abs(ref))
        d = (y - ref) / u - frac          # y - ref is exact when y is near ref
    same = (np.isnan(y) & np.isnan(ref)) | (np.isinf(ref) & (y == ref))
    d = np.where(np.isfinite(ref) & np.isfinite(y), np.abs(d), np.inf)
    return np.where(same, 0.0, d), u


def err_ulps(y, ref, frac):
    """|y - true| in ulps of the true value, true = ref + frac * ulp(ref).

    When the true value lies just below a power of two (ref = 2**k, frac < 0) its ulp is
    half that of ref, and the error counts double.  The ulp of a subnormal or zero is
    2**-1074, so there this is the absolute error in units of 2**-1074.  0 where y is the
    same NaN or infinity as the reference; inf where exactly one of them is NaN or
    infinite.
    """
    d, _ = _error_in_ref_ulps(y, ref, frac)
    ref = np.asarray(ref, dtype=np.float64)
    with np.errstate(all="ignore"):
        below_pow2 = ((np.frexp(np.abs(ref))[0] == 0.5) & (np.asarray(frac) < 0)
                      & (np.abs(ref) > DBL_MIN))
    return np.where(below_pow2, 2.0 * d, d)


def rel_error(y, ref, frac):
    """|y - true| / |true| (meaningful for normal references)."""
    d, u = _error_in_ref_ulps(y, ref, frac)
    with np.errstate(all="ignore"):
        return np.where(d == 0.0, 0.0, d * u / np.abs(np.asarray(ref, dtype=np.float64)))


def measured(name):
    x, ref, frac = (TABLE[f"{name}_{k}"] for k in ("x", "ref", "frac"))
    return x, ref, frac, apply(name, x)


def test_metric_behaves_for_nan_inf_and_zero():
    nan, inf = math.nan, math.inf
    ref = np.array([nan, inf, -inf, 0.0, 1.0, 1.0, 1.0, 1.0])
    frac = np.array([0.0, 0.0, 0.0, 0.25, 0.0, 0.0, 0.0, 0.5])
    y = np.array([nan, inf, -inf, TINY, nan, inf, 1.0 + 2 ** -52, 1.0])
    assert err_ulps(y, ref, frac).tolist() == [0.0, 0.0, 0.0, 0.75, inf, inf, 1.0, 0.5]
    assert err_ulps([1.0], [nan], [0.0])[0] == inf
    assert err_ulps([1e308], [inf], [0.0])[0] == inf
    # true value 1 - 2**-54, just below 1.0 where the ulp is 2**-53: 1 - 2**-53 is 2**-54
    # off, half an ulp (not the quarter of ulp(1.0) = 2**-52)
    assert err_ulps([1.0 - 2 ** -53], [1.0], [-0.25])[0] == 0.5
    assert rel_error([1.0 + 2 ** -52], [1.0], [0.0])[0] == 2 ** -52


def test_reference_table_provenance_and_coverage():
    assert str(TABLE["meta_generator"]) == "tests/gen_special_reference.py"
    assert int(TABLE["meta_dps"]) >= 50
    assert str(TABLE["meta_mpmath_version"])
    assert str(TABLE["meta_date"])
    ranges = {"exp": (-745.13, 709.78), "log": (TINY, 1.7976931348623157e308),
              "erfc": (-6.0, 27.3), "erfcx": (-26.628, 1.7976931348623157e308),
              "norm_cdf": (-38.5, 8.3), "norm_pdf": (-38.5, 38.5)}
    for name, (lo, hi) in ranges.items():
        x = TABLE[f"{name}_x"]
        assert x.min() <= lo and x.max() >= hi, name
        assert 5000 <= x.size <= 100_000, name
        assert np.all(np.abs(TABLE[f"{name}_frac"]) <= 0.5 + 1e-12), name


# --- accuracy against mpmath ---------------------------------------------------------

@pytest.mark.parametrize("name", ["exp", "log"])
def test_exp_log_within_one_ulp(name):
    # reference: mpmath at 50 digits (tests/data/special_reference.npz)
    x, ref, frac, y = measured(name)
    err = err_ulps(y, ref, frac)
    i = int(np.argmax(err))
    print(f"{name}: max {err[i]:.3f} ulp at x={x[i]!r}")
    assert err[i] <= ULP_TOL[name], (x[i], y[i], ref[i])


@pytest.mark.parametrize("name", ["erfc", "erfcx", "norm_cdf", "norm_pdf"])
def test_relative_accuracy(name):
    # reference: mpmath at 50 digits (tests/data/special_reference.npz)
    x, ref, frac, y = measured(name)
    normal = np.abs(ref) >= DBL_MIN
    rel = rel_error(y[normal], ref[normal], frac[normal])
    i = int(np.argmax(rel))
    print(f"{name}: max rel {rel[i]:.3g} at x={x[normal][i]!r}")
    assert rel[i] <= REL_TOL, (x[normal][i], y[normal][i], ref[normal][i])
    # subnormal (or underflowed) true values: absolute error in units of 2**-1074
    if np.any(~normal):
        err = err_ulps(y[~normal], ref[~normal], frac[~normal])
        j = int(np.argmax(err))
        print(f"{name}: subnormal results, max {err[j]:.3f} * 2**-1074"
              f" at x={x[~normal][j]!r}")
        assert err[j] <= SUBNORMAL_ABS_TOL, (x[~normal][j], y[~normal][j], ref[~normal][j])


def test_norm_cdf_tail_beats_rounded_erfc_argument():
    # The reason norm_cdf does not use 0.5 * erfc(-x / sqrt2): with x/sqrt2 rounded the
    # relative error grows like x^2 * 2**-53 in the left tail; ours must stay at 2e-15.
    x, ref, frac = (TABLE[f"norm_cdf_{k}"] for k in ("x", "ref", "frac"))
    tail = (x < -20.0) & (np.abs(ref) >= DBL_MIN)
    naive = np.array([0.5 * math.erfc(-v / math.sqrt(2.0)) for v in x[tail]])
    ours = apply("norm_cdf", x[tail])
    assert np.max(rel_error(naive, ref[tail], frac[tail])) > 1e-14
    assert np.max(rel_error(ours, ref[tail], frac[tail])) <= REL_TOL


# --- special values, as sentences ----------------------------------------------------

nan, inf = math.nan, math.inf


def one(name, v):
    return float(apply(name, np.array([v]))[0])


@pytest.mark.parametrize("name", NAMES)
def test_nan_in_nan_out(name):
    assert math.isnan(one(name, nan))
    assert math.isnan(getattr(special, name)(nan))


def test_exp_special_values():
    assert one("exp", 0.0) == 1.0 and one("exp", -0.0) == 1.0
    assert one("exp", 1.0) == math.e                     # correctly rounded e
    assert one("exp", inf) == inf and one("exp", -inf) == 0.0
    assert one("exp", 709.79) == inf and one("exp", 1e300) == inf      # overflow
    assert one("exp", -745.2) == 0.0 and one("exp", -1e300) == 0.0     # underflow
    assert one("exp", -745.13) == TINY                   # the smallest subnormal
    assert one("exp", 709.782712893384) < inf            # just below log(DBL_MAX)
    assert one("exp", 1e-300) == 1.0 and one("exp", -1e-300) == 1.0


def test_log_special_values():
    assert one("log", 1.0) == 0.0
    assert one("log", 0.0) == -inf and one("log", -0.0) == -inf
    assert math.isnan(one("log", -1.0)) and math.isnan(one("log", -inf))
    assert math.isnan(one("log", -TINY))
    assert one("log", inf) == inf
    for v in (TINY, 1.7976931348623157e308, 0.5 * DBL_MIN):  # reference: mpmath
        assert abs(one("log", v) - float(mpmath.log(v))) <= np.spacing(709.0)
    assert one("log", 2.0) == math.log(2.0)


def test_erfc_special_values():
    assert one("erfc", 0.0) == 1.0 and one("erfc", -0.0) == 1.0
    assert one("erfc", inf) == 0.0 and one("erfc", -inf) == 2.0
    assert one("erfc", 27.3) == 0.0 and one("erfc", 1e300) == 0.0     # underflow
    assert one("erfc", -6.0) == 2.0 and one("erfc", -1e300) == 2.0
    assert one("erfc", 1e-300) == 1.0


def test_erfcx_special_values():
    assert one("erfcx", 0.0) == 1.0 and one("erfcx", -0.0) == 1.0
    assert one("erfcx", inf) == 0.0 and one("erfcx", -inf) == inf
    assert one("erfcx", -26.7) == inf                    # 2 exp(x^2) overflows
    assert one("erfcx", -26.6) < inf
    # largest double: erfcx = 1/(sqrt(pi) x) to 1e-600, a subnormal (reference: mpmath)
    big = 1.7976931348623157e308
    ref = float(1 / (mpmath.sqrt(mpmath.pi) * mpmath.mpf(big)))
    assert abs(one("erfcx", big) - ref) <= SUBNORMAL_ABS_TOL * TINY


def test_norm_cdf_special_values():
    assert one("norm_cdf", 0.0) == 0.5 and one("norm_cdf", -0.0) == 0.5
    assert one("norm_cdf", inf) == 1.0 and one("norm_cdf", -inf) == 0.0
    assert one("norm_cdf", 8.3) == 1.0 and one("norm_cdf", 40.0) == 1.0
    assert one("norm_cdf", -38.6) == 0.0 and one("norm_cdf", -1e300) == 0.0


def test_norm_pdf_special_values():
    assert one("norm_pdf", 0.0) == 1.0 / math.sqrt(2.0 * math.pi)
    assert one("norm_pdf", -0.0) == one("norm_pdf", 0.0)
    assert one("norm_pdf", inf) == 0.0 and one("norm_pdf", -inf) == 0.0
    assert one("norm_pdf", 39.0) == 0.0


def test_norm_cdf_symmetry():
    # published identity: Phi(x) + Phi(-x) = 1
    x = np.linspace(0.0, 8.0, 2001)
    s = apply("norm_cdf", x) + apply("norm_cdf", -x)
    assert np.max(np.abs(s - 1.0)) <= 2 * 2.0 ** -52


def test_two_prod_is_exact():
    # identity: p + e == a*b exactly (checked with Python's exact fractions)
    from fractions import Fraction
    rng = np.random.default_rng(7)
    for a, b in rng.uniform(-1e3, 1e3, (200, 2)):
        p, e = special.two_prod(a, b)
        assert p == a * b
        assert Fraction(p) + Fraction(e) == Fraction(a) * Fraction(b)


# --- the same results whichever way the code is compiled -----------------------------

@pytest.mark.parametrize("name", NAMES)
def test_scalar_call_matches_vector_loop(name):
    # the scalar tier called from Python (no vectorisation) against the prange loop
    x = TABLE[f"{name}_x"][::53]
    fn = getattr(special, name)
    scalar = np.array([fn(float(v)) for v in x])
    np.testing.assert_array_equal(scalar, apply(name, x))


def test_serial_loop_matches_parallel_loop():
    for name, ser in (("norm_cdf", _ser_norm_cdf), ("erfcx", _ser_erfcx)):
        x = TABLE[f"{name}_x"]
        out = np.empty_like(x)
        ser(x, out)
        np.testing.assert_array_equal(out, apply(name, x))


def _libm_calls(asm):
    return sorted(set(re.findall(r"\b(exp|log|erfc|erf|fma)\b", asm)))


@pytest.mark.parametrize("name", NAMES)
def test_loop_has_no_libm_calls_and_is_packed(name):
    # A structural check, not a timing: one libm call in the loop body keeps the whole
    # loop scalar.  (The x86-64 baseline target, tested below, has no FMA instruction and
    # legitimately calls fma; every host that runs this suite here has FMA.)
    fn = LOOPS[name]
    asm = fn.inspect_asm(fn.signatures[0])
    assert _libm_calls(asm) == []
    features = (numba.config.CPU_FEATURES
                or llvmlite.binding.get_host_cpu_features().flatten())
    if "+avx2" in features:
        assert re.search(r"v\w+pd\s.*%[yz]mm", asm), "no packed float64 instructions"


_TARGET_SCRIPT = r"""
import json, sys
import numpy as np
sys.path.insert(0, sys.argv[1])
import test_special as T
res = {}
for name in T.NAMES:
    x, ref, frac, y = T.measured(name)
    normal = np.abs(ref) >= T.DBL_MIN
    res[name] = [float(np.max(T.err_ulps(y, ref, frac))),
                 float(np.max(T.rel_error(y[normal], ref[normal], frac[normal])))]
asm = T._par_norm_cdf.inspect_asm(T._par_norm_cdf.signatures[0])
res["zmm"] = "zmm" in asm
res["ymm"] = "ymm" in asm
res["libm"] = T._libm_calls(asm)
res.update(T.guess_grade_errors())
print(json.dumps(res))
"""


@pytest.mark.parametrize("cpu", ["haswell", "x86-64"])
def test_accuracy_without_avx512(cpu):
    # Compile for a CPU without AVX-512 (haswell: AVX2 + FMA; x86-64: SSE2 only, where
    # the fused multiply-add becomes a libm call) and rerun the accuracy checks.
    if not (sys.platform.startswith("linux") and os.uname().machine == "x86_64"):
        pytest.skip("x86-64 only")
    env = dict(os.environ, NUMBA_CPU_NAME=cpu, NUMBA_CPU_FEATURES="")
    out = subprocess.run([sys.executable, "-c", _TARGET_SCRIPT, str(HERE)], env=env,
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-3000:]
    res = json.loads(out.stdout.strip().splitlines()[-1])
    assert not res["zmm"]                                # really compiled without AVX-512
    assert res["ymm"] == (cpu == "haswell")
    assert res["libm"] == ([] if cpu == "haswell" else ["fma"])
    for name in ULP_TOL:
        assert res[name][0] <= ULP_TOL[name], (cpu, name, res[name])
    for name in ("erfc", "erfcx", "norm_cdf", "norm_pdf"):
        assert res[name][1] <= REL_TOL, (cpu, name, res[name])
    for name, tol in GUESS_GRADE_TOL.items():
        assert res[name] <= tol, (cpu, name, res[name])


@_uncached(loop)
def _par_erfcx_pos(x, out):
    for i in numba.prange(x.size):
        out[i] = special.erfcx_pos(x[i])


def test_erfcx_pos_accuracy_and_agreement_with_erfcx():
    # reference: mpmath at 50 digits (the erfcx rows of tests/data/special_reference.npz
    # with x >= 0).  erfcx_pos is erfcx without the exponential, for arguments known to be
    # non-negative: the same 2e-15 bound, and the same bits as erfcx there.
    x, ref, frac = (TABLE[f"erfcx_{k}"] for k in ("x", "ref", "frac"))
    keep = x >= 0.0
    x, ref, frac = np.ascontiguousarray(x[keep]), ref[keep], frac[keep]
    # the rational function's whole range, both sides of its switch to 1/(sqrt(pi) y)
    for lo, hi in ((0.0, 0.5), (0.5, 4.0), (4.0, 30.0), (30.0, 1e8), (1e8, 1e300)):
        assert np.count_nonzero((x >= lo) & (x < hi)) > 50, (lo, hi)
    y = np.empty_like(x)
    _par_erfcx_pos(x, y)
    normal = np.abs(ref) >= DBL_MIN
    rel = rel_error(y[normal], ref[normal], frac[normal])
    i = int(np.argmax(rel))
    print(f"erfcx_pos: max rel {rel[i]:.3g} at x={x[normal][i]!r} ({x.size} points)")
    assert rel[i] <= REL_TOL, (x[normal][i], y[normal][i], ref[normal][i])
    z = np.empty_like(x)
    _par_erfcx(x, z)
    assert np.array_equal(y.view(np.int64), z.view(np.int64))
    assert special.erfcx_pos(0.0) == 1.0 and special.erfcx_pos(np.inf) == 0.0
    assert np.isnan(special.erfcx_pos(np.nan))
    # a rounding error below zero (reference: mpmath, erfcx(-1e-4) = exp(1e-8) erfc(-1e-4))
    with mpmath.workdps(40):
        want = float(mpmath.exp(mpmath.mpf(-1e-4) ** 2) * mpmath.erfc(mpmath.mpf(-1e-4)))
    assert special.erfcx_pos(-1e-4) == pytest.approx(want, rel=2e-15)


@_uncached(loop)
def _par_guess_grade(x, out_erfcx, out_exp, out_log):
    for i in numba.prange(x.size):
        out_erfcx[i] = special.erfcx_pos_approx(abs(x[i]))
        out_exp[i] = special.exp_approx(x[i])
        out_log[i] = special.log_approx(x[i])


def _guess_grade(x):
    x = np.ascontiguousarray(x, dtype=np.float64)
    outs = tuple(np.empty_like(x) for _ in range(3))
    _par_guess_grade(x, *outs)
    return outs


GUESS_GRADE_TOL = {"erfcx_pos_approx": 1e-7, "exp_approx": 1e-8, "log_approx": 1e-9}


def guess_grade_errors():
    """Max error of each guess-grade function on the mpmath tables: relative for erfcx and
    exp, absolute for log (reference: mpmath at 50 digits, tests/data/special_reference.npz)."""
    x, ref, frac = (TABLE[f"erfcx_{k}"] for k in ("x", "ref", "frac"))
    keep = (x >= 0.0) & (np.abs(ref) >= DBL_MIN)
    for lo, hi in ((0.0, 0.5), (0.5, 4.0), (4.0, 30.0), (30.0, 1e8), (1e8, 1e300)):
        assert np.count_nonzero(keep & (x >= lo) & (x < hi)) > 50, (lo, hi)
    res = {"erfcx_pos_approx": rel_error(_guess_grade(x[keep])[0], ref[keep], frac[keep])}
    x, ref, frac = (TABLE[f"exp_{k}"] for k in ("x", "ref", "frac"))
    keep = np.abs(x) <= 700.0
    assert np.count_nonzero(keep & (x < -600)) > 20 and np.count_nonzero(keep & (x > 600)) > 20
    res["exp_approx"] = rel_error(_guess_grade(x[keep])[1], ref[keep], frac[keep])
    x, ref, frac = (TABLE[f"log_{k}"] for k in ("x", "ref", "frac"))
    keep = (x >= DBL_MIN) & (x < np.inf)
    assert x[keep].min() < 1e-300 and x[keep].max() > 1e300
    res["log_approx"] = np.abs(_guess_grade(x[keep])[2] - ref[keep])  # ref: within 1/2 ulp
    return {k: float(np.max(v)) for k, v in res.items()}


def test_guess_grade_functions_against_mpmath():
    # These serve only initial guesses and the first Householder step of the implied vol,
    # which a full-precision step follows; their bounds are those that step needs.
    errors = guess_grade_errors()
    print("guess-grade max errors:", errors)
    for name, tol in GUESS_GRADE_TOL.items():
        assert errors[name] <= tol, (name, errors[name])
    # outside their ranges: exp clamps to e^+-700, log gives NaN, erfcx 0 at inf
    e, ex, lg = _guess_grade([np.nan, np.inf, -np.inf, 0.0, -1.0, 800.0])
    assert np.isnan(e[0]) and e[1] == 0.0 and e[2] == 0.0
    assert np.isnan(ex[0]) and ex[5] == pytest.approx(math.exp(700.0), rel=1e-8)
    assert ex[2] == pytest.approx(math.exp(-700.0), rel=1e-8) and ex[3] == 1.0
    assert np.all(np.isnan(lg[:5]))
