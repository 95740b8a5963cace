"""Generate tests/data/implied_reference.npz: exact implied vols of double premiums, by mpmath.

Run by hand (the test suite only reads the table):

    .venv/bin/python tests/gen_implied_reference.py

Reference library: mpmath at ``DPS`` decimal digits; each root is re-solved at
``CHECK_DPS`` digits and the two must agree to ~1e-40, so the stored digits are not noise.

Each row holds double inputs (F or spot, K, T, D, q, cp) and a double premium: the exact
Black price of an input vol, rounded once to double.  The reference sigma* is the exact
implied vol *of those doubles*: D * theta * (F Phi(theta d1) - K Phi(theta d2)) = premium
solved by mpmath.findroot (Newton, analytic vega) on the exact binary values, sigma* stored
as a double-double (hi + lo).  BSM rows use F = S exp(-q T) / D exactly, with the double D.
The elasticities at sigma* set the tolerance (V the premium, theta = +1 call / -1 put):

    e_F = D F Phi(theta d1) / V,  e_K = D K Phi(theta d2) / V,  e_s = s D F phi(d1) / V

Domain: ln(F/K) in [-16, 16], s = sigma sqrt(T) in [1e-5, 6], out-of-the-money time value
>= 1e-280 F (so up to ~36 standard deviations into the wings), T in [1/365, 30], calls and
puts (in and out of the money), plus the near-underflow BSM case S=1, K=4.45, T=1, r=q=0,
sigma=4% (price ~7.96e-308).  Rows with (1 + e_F + e_K) / e_s >= COND_MAX are skipped.
"""

import datetime
import json
import os
import subprocess
import sys

import mpmath
import numpy as np
from mpmath import mp, mpf

DPS = 60
CHECK_DPS = 100
SEED = 20261202
N_B76 = 2600
N_BSM = 900
HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "data", "implied_reference.npz")

X_MAX, S_MIN, S_MAX = 16.0, 1e-5, 6.0
OTM_FLOOR = 1e-280
T_MIN, T_MAX = 1.0 / 365.0, 30.0
# rows whose time value is below the premium's own rounding carry no vol information
# ((1 + e_F + e_K) / e_s is then ~1e16): kept out of the table, their statuses are tested
# case by case in tests/test_implied.py
COND_MAX = 1e12


def _ncdf(z):
    return mp.erfc(-z / mp.sqrt(2)) / 2


def _npdf(z):
    return mp.exp(-z * z / 2) / mp.sqrt(2 * mp.pi)


def black_mp(F, K, s, D, theta):
    x = mp.log(F / K)
    d1 = x / s + s / 2
    d2 = d1 - s
    tF = D * F * _ncdf(theta * d1)
    tK = D * K * _ncdf(theta * d2)
    return theta * (tF - tK), tF, tK, D * F * _npdf(d1)


def _otm_mp(F, K, s, theta):
    """Undiscounted out-of-the-money value of the pair (put-call parity), and its vega."""
    x = mp.log(F / K)
    th = -1 if x > 0 else 1          # the OTM side: put if F > K, call if F < K
    d1 = x / s + s / 2
    d2 = d1 - s
    return th * (F * _ncdf(th * d1) - K * _ncdf(th * d2)), F * _npdf(d1)


def implied_mp(P, F, K, D, theta, s0):
    """Exact total implied vol of the premium P (all mpf).

    Put-call parity (exact here) turns P into the OTM time value; a damped Newton in
    ln s brings s near the root, then mpmath.findroot (Newton, analytic derivative)
    polishes it to the working precision.
    """
    tv = P / D - max(theta * (F - K), 0)

    def f(u):
        return mp.log(_otm_mp(F, K, mp.exp(u), theta)[0]) - mp.log(tv)

    def fp(u):
        s = mp.exp(u)
        v, vega = _otm_mp(F, K, s, theta)
        return s * vega / v

    u = mp.log(s0)
    for _ in range(60):
        step = f(u) / fp(u)
        u -= max(min(step, 1), -1)
        if abs(step) < mpf(10) ** -20:
            break
    return mp.exp(mp.findroot(f, u, df=fp, solver="newton",
                              tol=mpf(10) ** (-2 * mp.dps + 10), maxsteps=50))


def solve_row(P, F, K, T, D, theta, s0):
    """(sigma* hi, lo, e_F, e_K, e_s) for double inputs (python floats)."""
    out = []
    for dps in (DPS, CHECK_DPS):
        with mp.workdps(dps):
            Pm, Fm, Km, Dm = mpf(P), mpf(F), mpf(K), mpf(D)
            s = implied_mp(Pm, Fm, Km, Dm, theta, mpf(s0))
            sig = s / mp.sqrt(mpf(T))
            v, tF, tK, vega = black_mp(Fm, Km, s, Dm, theta)
            out.append((sig, tF / v, tK / v, s * vega / v))
    (a, eF, eK, es), (b, _, _, _) = out
    with mp.workdps(CHECK_DPS):
        assert abs(a - b) <= abs(b) * mpf(10) ** (-40), (P, F, K, T, D, theta)
        hi = float(b)
        lo = float(b - mpf(hi))
    return hi, lo, float(eF), float(eK), float(es)


def _draw_b76(rng, n):
    rows = []
    while len(rows) < n:
        x = rng.uniform(-X_MAX, X_MAX) if rng.random() < 0.7 else rng.normal(0, 0.3)
        x = float(np.clip(x, -X_MAX, X_MAX))
        s = float(np.exp(rng.uniform(np.log(S_MIN), np.log(S_MAX))))
        F = float(np.exp(rng.uniform(np.log(1e-2), np.log(1e4))))
        K = float(F * np.exp(-x))
        T = float(np.exp(rng.uniform(np.log(T_MIN), np.log(T_MAX))))
        vol = s / np.sqrt(T)
        D = float(np.exp(-rng.uniform(-0.02, 0.12) * T)) if rng.random() < 0.8 else 1.0
        theta = 1 if rng.random() < 0.5 else -1
        rows.append((F, K, T, D, float(vol), theta))
    return rows


def _price_double(F, K, T, D, vol, theta):
    with mp.workdps(DPS):
        s = mpf(vol) * mp.sqrt(mpf(T))
        v, tF, tK, _ = black_mp(mpf(F), mpf(K), s, mpf(D), theta)
        intrinsic = mpf(D) * max(theta * (mpf(F) - mpf(K)), 0)
        otm = (v - intrinsic) / mpf(D)
        return float(v), float(otm / mpf(min(F, K))), float(otm / mpf(F)), float(s)


def _accept(P, F, K, D, theta, otm_rel_F):
    if not (otm_rel_F >= OTM_FLOOR):
        return False
    intrinsic = D * max(theta * (F - K), 0.0)
    upper = D * (F if theta > 0 else K)
    # strictly between intrinsic and the upper bound, exactly (mpmath)
    with mp.workdps(DPS):
        lo = mpf(D) * max(theta * (mpf(F) - mpf(K)), 0)
        hi = mpf(D) * (mpf(F) if theta > 0 else mpf(K))
        return bool(mpf(P) > lo and mpf(P) < hi) and intrinsic >= 0 and upper > 0


def build():
    rng = np.random.default_rng(SEED)
    cols = {k: [] for k in ("F", "K", "T", "D", "cp", "premium", "iv_hi", "iv_lo",
                            "e_F", "e_K", "e_s", "vol_in")}
    bsm = {k: [] for k in ("spot", "K", "T", "D", "q", "cp", "premium", "iv_hi", "iv_lo",
                           "e_F", "e_K", "e_s", "vol_in")}
    for F, K, T, D, vol, theta in _draw_b76(rng, 4 * N_B76):
        if len(cols["F"]) >= N_B76:
            break
        P, _, otmF, s = _price_double(F, K, T, D, vol, theta)
        if not _accept(P, F, K, D, theta, otmF):
            continue
        hi, lo, eF, eK, es = solve_row(P, F, K, T, D, theta, s)
        if not (1 + eF + eK) / es < COND_MAX:
            continue
        for k, v in zip(cols, (F, K, T, D, theta, P, hi, lo, eF, eK, es, vol)):
            cols[k].append(v)
    specials = [(1.0, 4.45, 1.0, 0.0, 0.0, 0.04, 1)]      # near-underflow case
    draws = []
    while len(draws) < 4 * N_BSM:
        Sp = float(np.exp(rng.uniform(np.log(1.0), np.log(1e3))))
        x = float(np.clip(rng.uniform(-X_MAX, X_MAX) if rng.random() < 0.6
                          else rng.normal(0, 0.3), -X_MAX, X_MAX))
        K = float(Sp * np.exp(-x))
        T = float(np.exp(rng.uniform(np.log(T_MIN), np.log(T_MAX))))
        s = float(np.exp(rng.uniform(np.log(S_MIN), np.log(S_MAX))))
        r = float(rng.uniform(-0.02, 0.12))
        q = float(rng.uniform(0.0, 0.08))
        draws.append((Sp, K, T, r, q, s / np.sqrt(T), 1 if rng.random() < 0.5 else -1))
    for j, (Sp, K, T, r, q, vol, theta) in enumerate(specials + draws):
        if len(bsm["spot"]) >= N_BSM:
            break
        floor = 0 if j < len(specials) else OTM_FLOOR
        D = float(np.exp(-r * T))
        with mp.workdps(DPS):
            Fm = mpf(Sp) * mp.exp(-mpf(q) * mpf(T)) / mpf(D)
            s = mpf(vol) * mp.sqrt(mpf(T))
            v, _, _, _ = black_mp(Fm, mpf(K), s, mpf(D), theta)
            lo_b = mpf(D) * max(theta * (Fm - mpf(K)), 0)
            hi_b = mpf(D) * (Fm if theta > 0 else mpf(K))
            P = float(v)
            otmF = (v - lo_b) / mpf(D) / Fm
            ok = mpf(P) > lo_b and mpf(P) < hi_b and otmF >= floor
        if not ok:
            continue
        out = []
        for dps in (DPS, CHECK_DPS):
            with mp.workdps(dps):
                Fm = mpf(Sp) * mp.exp(-mpf(q) * mpf(T)) / mpf(D)
                sm = implied_mp(mpf(P), Fm, mpf(K), mpf(D), theta, s)
                vv, tF, tK, vega = black_mp(Fm, mpf(K), sm, mpf(D), theta)
                out.append((sm / mp.sqrt(mpf(T)), tF / vv, tK / vv, sm * vega / vv))
        with mp.workdps(CHECK_DPS):
            assert abs(out[0][0] - out[1][0]) <= out[1][0] * mpf(10) ** (-40)
            hi = float(out[1][0])
            lo = float(out[1][0] - mpf(hi))
        if not (1 + out[0][1] + out[0][2]) / out[0][3] < COND_MAX:
            continue
        vals = (Sp, K, T, D, q, theta, P, hi, lo, float(out[0][1]), float(out[0][2]),
                float(out[0][3]), vol)
        for k, v in zip(bsm, vals):
            bsm[k].append(v)
    return cols, bsm


def _git_commit():
    try:
        return subprocess.run(["git", "rev-parse", "HEAD"], cwd=HERE, capture_output=True,
                              text=True, check=True).stdout.strip()
    except Exception:  # noqa: BLE001 - provenance only
        return "unknown"


def main():
    cols, bsm = build()
    prov = {
        "reference_library": "mpmath",
        "mpmath_version": mpmath.__version__,
        "mp_dps": DPS,
        "check_dps": CHECK_DPS,
        "date": datetime.date.today().isoformat(),
        "generator": "tests/gen_implied_reference.py",
        "generator_commit": _git_commit(),
        "seed": SEED,
        "python": sys.version.split()[0],
        "method": "mpmath.findroot (Newton, analytic vega) on the exact double premium",
    }
    arrays = {f"b76_{k}": np.asarray(v, dtype=np.int8 if k == "cp" else np.float64)
              for k, v in cols.items()}
    arrays.update({f"bsm_{k}": np.asarray(v, dtype=np.int8 if k == "cp" else np.float64)
                   for k, v in bsm.items()})
    np.savez_compressed(OUT, provenance=json.dumps(prov), **arrays)
    print(f"wrote {OUT}: {len(cols['F'])} Black-76 rows, {len(bsm['spot'])} BSM rows")


if __name__ == "__main__":
    main()
