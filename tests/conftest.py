"""Shared test settings and helpers.

* hypothesis: one settings profile for the whole suite, loaded here before any test module
  is imported, so every property test inherits it: derandomised (the same examples every
  run, no example database), so CI is reproducible.  ``VOLSWEEP_HYPOTHESIS_RANDOM=1``
  loads a random profile instead, to explore new examples.
* mpmath: every test starts at mpmath's default precision (53 bits, 15 digits) and leaves
  it there, so a test that sets ``mp.dps`` cannot change the references of a test in
  another file; tests that need more digits use ``mpmath.workdps``.
* an error metric in ulps that behaves for NaN, inf and zero.
"""

import os

import mpmath
import numpy as np
import pytest
from hypothesis import settings

HYPOTHESIS_RANDOM = bool(os.environ.get("VOLSWEEP_HYPOTHESIS_RANDOM"))
settings.register_profile("volsweep", derandomize=True, database=None, deadline=None)
settings.register_profile("volsweep-random", derandomize=False, deadline=None)
settings.load_profile("volsweep-random" if HYPOTHESIS_RANDOM else "volsweep")


def pytest_collection_modifyitems(config, items):
    """Refuse a property test that overrides the profile's derandomisation (it would make
    CI irreproducible), unless new examples were asked for."""
    if HYPOTHESIS_RANDOM:
        return
    loose = sorted({item.nodeid.split("[")[0] for item in items
                    if (s := getattr(getattr(item, "obj", None),
                                     "_hypothesis_internal_use_settings", None)) is not None
                    and not (s.derandomize and s.database is None)})
    if loose:
        raise pytest.UsageError("hypothesis tests not derandomised (set neither derandomize "
                                "nor database; see tests/conftest.py): " + ", ".join(loose))


MPMATH_DEFAULT_PREC = 53  # mpmath's own default (mp.dps = 15)


@pytest.fixture(autouse=True)
def _mpmath_default_precision():
    """Each test starts and ends at mpmath's default precision (no leak between files)."""
    mpmath.mp.prec = MPMATH_DEFAULT_PREC
    yield
    mpmath.mp.prec = MPMATH_DEFAULT_PREC


EPS = 2.0 ** -52  # the ulp of 1.0 in float64: the unit of every tolerance in the tests


def ulp_error(got, ref, ref_lo=0.0, floor=0.0):
    """Elementwise relative error |got - (ref + ref_lo)| / max(|ref|, floor), in units of EPS.

    ``ref_lo`` is the low part of a double-double reference (0 for a plain double), so the
    reference's own rounding is not counted.  ``floor`` > 0 turns the error into an absolute
    one below ``floor`` (for results allowed to underflow).

    Special values: NaN vs NaN -> 0; NaN vs anything else -> inf; equal infinities -> 0,
    any other pair involving an infinity -> inf; reference 0 (with floor 0) -> 0 if got is
    +-0, else inf.  +0 and -0 are equal.
    """
    got = np.asarray(got, dtype=np.float64)
    ref = np.asarray(ref, dtype=np.float64)
    lo = np.asarray(ref_lo, dtype=np.float64)
    with np.errstate(all="ignore"):
        # got - ref is exact when the two are within a factor 2 (Sterbenz)
        err = np.abs((got - ref) - lo) / np.maximum(np.abs(ref), floor) / EPS
    gn, rn = np.isnan(got), np.isnan(ref)
    inf = np.isinf(got) | np.isinf(ref)
    err = np.where(inf | gn | rn, np.inf, err)
    err = np.where((got == ref) & (lo == 0), 0.0, err)
    err = np.where(gn & rn, 0.0, err)
    return err


def worst_ratio(err, tol):
    """(worst err/tol, its index); NaN ratios count as inf."""
    ratio = np.asarray(err, dtype=np.float64) / np.asarray(tol, dtype=np.float64)
    ratio = np.where(np.isnan(ratio), np.inf, ratio)
    if ratio.size == 0:
        return 0.0, -1
    i = int(np.argmax(ratio))
    return float(ratio.flat[i]), i


def assert_within(err, tol, label="", columns=None, show=5):
    """Assert err <= tol elementwise; on failure list the worst rows with their ``columns``.

    Returns the worst ratio err/tol (for reporting when it passes).
    """
    err = np.broadcast_to(np.asarray(err, dtype=np.float64), np.shape(err))
    tol = np.broadcast_to(np.asarray(tol, dtype=np.float64), err.shape)
    ratio = np.where(np.isnan(err / tol), np.inf, err / tol)
    bad = ~(ratio <= 1.0)
    if bad.any():
        order = np.argsort(-ratio, kind="stable")[:show]
        lines = [f"{label}: {int(bad.sum())} of {ratio.size} beyond tolerance, "
                 f"worst err/tol = {ratio.max():.4g}"]
        for i in order:
            cols = ", ".join(f"{k}={np.asarray(v)[i].item()!r}"
                             for k, v in (columns or {}).items())
            lines.append(f"  row {i}: err={err[i]:.4g} ulp, tol={tol[i]:.4g} ulp; {cols}")
        raise AssertionError("\n".join(lines))
    return float(ratio.max()) if ratio.size else 0.0


def load_reference(path):
    """The arrays of an mpmath reference table (tests/gen_*.py), after checking its
    provenance: mpmath at 50 digits or more."""
    import json

    z = np.load(path, allow_pickle=False)
    prov = json.loads(str(z["provenance"]))
    assert prov["reference_library"] == "mpmath" and prov["mp_dps"] >= 50
    return {k: z[k] for k in z.files if k != "provenance"}
