"""Generate tests/data/special_reference.npz: high-precision reference values for
kernel/special.py, computed with mpmath (the independent reference library).

    .venv/bin/python tests/gen_special_reference.py          # ~1-2 minutes

For every function the file holds ``<name>_x`` (float64 arguments), ``<name>_ref`` (the
true value rounded to the nearest double) and ``<name>_frac`` ((true - ref) / ulp(ref),
in [-1/2, 1/2]).  Keeping the residual in units of ulp(ref) rather than as a second
double keeps it exact for subnormal results, where a double-double tail would underflow.
The error of a computed value y, in ulps of the true value, is then
``(y - ref) / ulp(ref) - frac``.

Provenance (mpmath version, digits, date, seed, generator commit) is stored in the file
under ``meta_*``.  A sample is recomputed at higher precision as a self-check.
"""

import datetime
import math
import pathlib
import subprocess
import sys

import mpmath
import numpy as np

DPS = 50
CHECK_DPS = 80
SEED = 20261201
OUT = pathlib.Path(__file__).with_name("data") / "special_reference.npz"

SUBNORMAL_MIN = 2.0 ** -1074
DBL_MIN = 2.0 ** -1022


def ulp(v):
    """Spacing of doubles at |v| (2**-1074 for subnormals and zero)."""
    v = abs(v)
    if v < DBL_MIN:
        return SUBNORMAL_MIN
    m, e = math.frexp(v)
    return math.ldexp(1.0, e - 53)


# --- reference functions, evaluated at the exact double argument --------------------

def _erfcx_mp(x):
    if x > 1e4:
        # asymptotic series 1/(x sqrt(pi)) sum (-1)^n (2n-1)!! / (2x^2)^n; at x > 1e4 the
        # terms fall by (2n-1)/2e8 per step, so 12 terms are far beyond 50 digits
        t = mpmath.mpf(1)
        s = mpmath.mpf(1)
        q = 1 / (2 * x * x)
        for n in range(1, 12):
            t *= -(2 * n - 1) * q
            s += t
        return s / (x * mpmath.sqrt(mpmath.pi))
    return mpmath.erfc(x) * mpmath.exp(x * x)


REFERENCE = {
    "exp": mpmath.exp,
    "log": mpmath.log,
    "erfc": mpmath.erfc,
    "erfcx": _erfcx_mp,
    "norm_cdf": mpmath.ncdf,
    "norm_pdf": mpmath.npdf,
}


# --- argument grids: a uniform sweep of each range, denser where it is hard ----------

def _logu(rng, lo, hi, n):
    return np.exp(rng.uniform(math.log(lo), math.log(hi), n))


def _near(rng, points, n, rel=1e-12):
    """n arguments within a few ulps to `rel` of the given break points."""
    p = rng.choice(np.asarray(points, dtype=float), n)
    step = rng.choice([0.0, 1.0, -1.0], n) * _logu(rng, 1e-16, rel, n)
    return p * (1.0 + step)


def grids(rng):
    ln2 = math.log(2.0)
    k = rng.integers(-1074, 1024, 1500).astype(float)
    g = {}
    g["exp"] = np.concatenate([
        [-745.1332191019411, -745.13, -708.3964185322641, 709.782712893384, 709.78],
        rng.uniform(-745.13, 709.78, 8000),
        rng.uniform(-1.0, 1.0, 2500),
        _logu(rng, 1e-300, 0.5, 750), -_logu(rng, 1e-300, 0.5, 750),
        rng.uniform(709.0, 709.78, 500),                 # near overflow
        rng.uniform(-745.13, -708.39, 2000),             # subnormal results
        (k + 0.5) * ln2 * (1.0 + rng.uniform(-1e-13, 1e-13, 1500)),  # reduction edges
    ])
    bits = rng.integers(0x0010000000000000, 0x7FEFFFFFFFFFFFFF, 8000, dtype=np.int64)
    sub_bits = rng.integers(1, 0x0010000000000000, 2000, dtype=np.int64)
    g["log"] = np.concatenate([
        [2.0 ** -1074, 2.0 ** -1022, 1.7976931348623157e308],
        bits.view(np.float64),                           # all normal doubles
        sub_bits.view(np.float64),                       # all subnormal doubles
        1.0 + _logu(rng, 1e-16, 0.4, 1500), 1.0 - _logu(rng, 1e-16, 0.3, 1500),
        _near(rng, [math.sqrt(2.0), math.sqrt(0.5)], 1500, 1e-10)
        * np.ldexp(1.0, rng.integers(-1000, 1000, 1500)),
        np.ldexp(1.0 + rng.uniform(-1e-10, 1e-10, 1500), rng.integers(-1070, 1023, 1500)),
    ])
    g["erfc"] = np.concatenate([
        [-6.0, 0.0, 26.5, 27.0, 27.3],
        rng.uniform(-6.0, 27.3, 8000),
        _near(rng, [0.46875, -0.46875, 4.0, -4.0], 1500),
        _logu(rng, 1e-300, 0.5, 1000), -_logu(rng, 1e-300, 0.5, 1000),
        rng.uniform(25.0, 27.3, 1500),                   # near and into underflow
        rng.uniform(-6.0, -0.4, 1500),
        rng.uniform(0.4, 6.0, 1500),
    ])
    g["erfcx"] = np.concatenate([
        [-26.628, -26.0, 0.0, 1e300, 1.7976931348623157e308],
        rng.uniform(-26.628, 30.0, 7000),
        _logu(rng, 30.0, 1.7976931348623157e308, 3000),
        _near(rng, [0.46875, -0.46875, 4.0, -4.0, 1e8], 2000),
        _logu(rng, 1e-300, 0.5, 750), -_logu(rng, 1e-300, 0.5, 750),
        rng.uniform(-26.628, -20.0, 1250),               # towards overflow
        rng.uniform(0.4, 6.0, 1250),
    ])
    brk = 0.46875 * math.sqrt(2.0)
    g["norm_cdf"] = np.concatenate([
        [-38.5, -37.5, 0.0, 8.3],
        rng.uniform(-38.5, 8.3, 8000),
        _near(rng, [brk, -brk, 4.0 * math.sqrt(2.0), -4.0 * math.sqrt(2.0)], 1500),
        _logu(rng, 1e-300, 0.7, 1000), -_logu(rng, 1e-300, 0.7, 1000),
        rng.uniform(-38.5, -30.0, 2500),                 # far left tail, into underflow
        rng.uniform(3.0, 8.3, 2000),
    ])
    g["norm_pdf"] = np.concatenate([
        [-38.5, 0.0, 38.5],
        rng.uniform(-38.5, 38.5, 6500),
        rng.uniform(-3.0, 3.0, 1500),
    ])
    return g


def reference(name, x, dps):
    with mpmath.workdps(dps):
        fn = REFERENCE[name]
        ref = np.empty(x.size)
        frac = np.empty(x.size)
        for i, xi in enumerate(x):
            v = fn(mpmath.mpf(float(xi)))
            r = float(v)
            if math.isinf(r):
                ref[i], frac[i] = r, 0.0
                continue
            f = float((v - mpmath.mpf(r)) / ulp(r))
            if abs(f) > 0.5 + 1e-12:        # float() did not round to nearest: fix up
                r = float(mpmath.mpf(r) + mpmath.sign(f) * ulp(r))
                f = float((v - mpmath.mpf(r)) / ulp(r))
            assert abs(f) <= 0.5 + 1e-12, (name, xi, f)
            ref[i], frac[i] = r, f
    return ref, frac


def main():
    rng = np.random.default_rng(SEED)
    data = {}
    for name, x in grids(rng).items():
        x = np.unique(x[np.isfinite(x)])
        ref, frac = reference(name, x, DPS)
        # self-check: a sample at higher precision must agree to ~1e-6 ulp
        idx = rng.choice(x.size, 200, replace=False)
        ref2, frac2 = reference(name, x[idx], CHECK_DPS)
        assert np.array_equal(ref[idx], ref2), name
        assert np.max(np.abs(frac[idx] - frac2)) < 1e-6, name
        data[f"{name}_x"], data[f"{name}_ref"], data[f"{name}_frac"] = x, ref, frac
        print(f"{name}: {x.size} points on [{x.min():.6g}, {x.max():.6g}]")
    OUT.parent.mkdir(exist_ok=True)
    try:
        commit = subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True,
                                text=True, cwd=OUT.parent).stdout.strip()
    except OSError:
        commit = "unknown"
    data["meta_generator"] = np.array("tests/gen_special_reference.py")
    data["meta_mpmath_version"] = np.array(mpmath.__version__)
    data["meta_dps"] = np.array(DPS)
    data["meta_check_dps"] = np.array(CHECK_DPS)
    data["meta_seed"] = np.array(SEED)
    data["meta_date"] = np.array(datetime.datetime.now(datetime.timezone.utc)
                                 .strftime("%Y-%m-%dT%H:%M:%SZ"))
    data["meta_commit"] = np.array(commit or "unknown")
    data["meta_python"] = np.array(sys.version.split()[0])
    np.savez_compressed(OUT, **data)
    print(f"wrote {OUT} ({OUT.stat().st_size / 1e6:.2f} MB)")


if __name__ == "__main__":
    main()
