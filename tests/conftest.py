"""Shared test helpers: an error metric in ulps that behaves for NaN, inf and zero."""

import numpy as np

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
