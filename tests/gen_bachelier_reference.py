"""Generate tests/data/bachelier_reference.npz: exact Bachelier prices and implied normal
vols by mpmath.

Run by hand (the test suite only reads the table):

    .venv/bin/python tests/gen_bachelier_reference.py

Reference library: mpmath at ``DPS`` decimal digits; every value is recomputed at
``CHECK_DPS`` digits and the two must agree to 35 digits.  Each row holds double inputs
and the exact result *of those doubles* (s = vol sqrt(T) formed in mpmath), stored as a
double-double (hi + lo).  With x = F - K, s = sigma sqrt(T), d = x/s, theta = +1 call /
-1 put and V = D (theta x Phi(theta d) + s phi(d)), the elasticities that size the
tolerances are

    e_F = |F dV/dF| / V = D |F| Phi(theta d) / V
    e_K = |K dV/dK| / V = D |K| Phi(theta d) / V
    e_s = s dV/ds / V   = D s phi(d) / V.

Price sets: ``core`` (|d| <= 8, forwards and strikes of any sign and scale, zero
included, at-the-money rows exact), ``wing`` (8 < |d| <= 38, at scales where the price
is a normal double).  Implied-vol sets: ``ivcore`` and ``ivwing``, the same domains: the
premium is the double nearest the exact price, the reference the exact implied normal vol
of that double premium (root of the exact time value in ln u, u = |x| / s, by mpmath's
findroot on a bracket).
"""

import datetime
import json
import os
import subprocess

import mpmath
import numpy as np
from mpmath import mp, mpf

DPS = 60
CHECK_DPS = DPS + 30
SEED = 20270114
HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "data", "bachelier_reference.npz")


def price_mp(F, K, s, D, theta):
    """(V, e_F, e_K, e_s) as mpf."""
    x = F - K
    if s == 0:
        v = D * max(theta * x, 0)
        return v, mpf(0), mpf(0), mpf(0)
    d = x / s
    N = mp.ncdf(theta * d)
    v = D * (theta * x * N + s * mp.npdf(d))
    return v, D * abs(F) * N / v, D * abs(K) * N / v, D * s * mp.npdf(d) / v


def price_exact(F, K, T, D, vol, cp, dps=DPS):
    with mp.workdps(dps):
        s = mpf(float(vol)) * mp.sqrt(mpf(float(T)))
        v, eF, eK, es = price_mp(mpf(float(F)), mpf(float(K)), s, mpf(float(D)), int(cp))
        return +v, float(eF), float(eK), float(es)


def iv_exact(P, F, K, T, D, cp, dps=DPS):
    """Exact implied normal vol of the double premium P (mpf)."""
    with mp.workdps(dps + 10):
        F, K, D, P, T = (mpf(float(a)) for a in (F, K, D, P, T))
        x = F - K
        tv = P / D - max(int(cp) * x, 0)
        if x == 0:
            return +(tv * mp.sqrt(2 * mp.pi) / mp.sqrt(T))
        lv = mp.log(tv / abs(x))

        def f(t):                                   # ln psi(e^t) - ln v, decreasing
            u = mp.exp(t)
            return mp.log(mp.npdf(u) / u - mp.ncdf(-u)) - lv

        a, b = mpf(-80), mpf(5)                     # bisection, then Newton in t
        for _ in range(60):
            m = (a + b) / 2
            a, b = (m, b) if f(m) > 0 else (a, m)
        t = (a + b) / 2
        for _ in range(12):
            u = mp.exp(t)
            psi = mp.npdf(u) / u - mp.ncdf(-u)
            t = t - f(t) / (-mp.npdf(u) / (u * psi))  # d ln psi(e^t) / dt = -phi / (u psi)
        return +(abs(x) / mp.exp(t) / mp.sqrt(T))


def split_dd(v):
    hi = float(v)
    with mp.workdps(DPS):
        lo = float(v - mpf(hi))
    return hi, lo


def _logu(rng, lo, hi, n):
    return np.exp(rng.uniform(np.log(lo), np.log(hi), n))


def sample(rng, n, d_lo, d_hi, scale_lo, scale_hi):
    """Rows (F, K, T, D, vol, cp) with |d| in [d_lo, d_hi] (d = 0 for a few)."""
    L = _logu(rng, scale_lo, scale_hi, n)             # price scale
    s = L * _logu(rng, 1e-3, 10.0, n)                 # total normal vol
    d = rng.choice([-1.0, 1.0], n) * rng.uniform(d_lo, d_hi, n)
    if d_lo == 0.0:
        d[: n // 20] = 0.0                            # at the money exactly
        d[n // 20: n // 10] *= _logu(rng, 1e-14, 1e-3, n // 10 - n // 20)
    kind = rng.integers(0, 4, n)                      # strike: 0, negative, positive, tiny
    K = np.where(kind == 0, 0.0, L * rng.uniform(0.0, 3.0, n))
    K = np.where(kind == 1, -K, K)
    K = np.where(kind == 3, L * rng.uniform(-1e-3, 1e-3, n), K)
    F = K + d * s
    F = np.where(d == 0.0, K, F)
    T = _logu(rng, 1.0 / 365.0, 30.0, n)
    vol = s / np.sqrt(T)
    r = rng.uniform(-0.02, 0.10, n)
    D = np.exp(-r * T)
    cp = rng.choice(np.array([-1, 1], np.int8), n)
    return F, K, T, D, vol, cp


def _checked(fn, *args):
    out = fn(*args, dps=DPS)
    v = out[0] if isinstance(out, tuple) else out
    w = fn(*args, dps=CHECK_DPS)
    w = w[0] if isinstance(w, tuple) else w
    with mp.workdps(DPS):
        assert abs(v - w) <= abs(w) * mpf(10) ** -35, (fn.__name__, args)
    return out


def price_set(rows, floor=1e-300):
    F, K, T, D, vol, cp = rows
    out = {k: [] for k in ("F", "K", "T", "D", "vol", "cp", "price_hi", "price_lo",
                           "e_F", "e_K", "e_s")}
    for i in range(len(F)):
        v, eF, eK, es = _checked(price_exact, F[i], K[i], T[i], D[i], vol[i], cp[i])
        if not float(v) > floor:
            continue
        hi, lo = split_dd(v)
        for k, val in (("F", F[i]), ("K", K[i]), ("T", T[i]), ("D", D[i]), ("vol", vol[i]),
                       ("cp", cp[i]), ("price_hi", hi), ("price_lo", lo), ("e_F", eF),
                       ("e_K", eK), ("e_s", es)):
            out[k].append(val)
    return {k: np.array(v, dtype=np.int8 if k == "cp" else np.float64)
            for k, v in out.items()}


def iv_set(rows, floor=1e-300):
    p = price_set(rows, floor)
    P = p["price_hi"]
    out = {k: [] for k in ("F", "K", "T", "D", "cp", "premium", "vol", "iv_hi", "iv_lo",
                           "e_F", "e_K", "e_s")}
    for i in range(len(P)):
        F, K, T, D, cp = (p[k][i] for k in ("F", "K", "T", "D", "cp"))
        with mp.workdps(DPS):
            tv = mpf(float(P[i])) / mpf(float(D)) - max(int(cp) * (mpf(float(F))
                                                                   - mpf(float(K))), 0)
        if not tv > 0:
            continue                                    # no time value left in the double
        iv = _checked(iv_exact, P[i], F, K, T, D, cp)
        _, eF, eK, es = price_exact(F, K, T, D, float(iv), cp)
        hi, lo = split_dd(iv)
        for k, val in (("F", F), ("K", K), ("T", T), ("D", D), ("cp", cp), ("premium", P[i]),
                       ("vol", p["vol"][i]), ("iv_hi", hi), ("iv_lo", lo), ("e_F", eF),
                       ("e_K", eK), ("e_s", es)):
            out[k].append(val)
    return {k: np.array(v, dtype=np.int8 if k == "cp" else np.float64)
            for k, v in out.items()}


def main():
    rng = np.random.default_rng(SEED)
    mp.dps = DPS
    sets = {
        "core": price_set(sample(rng, 1200, 0.0, 8.0, 1e-4, 1e4)),
        "wing": price_set(sample(rng, 600, 8.0, 38.0, 1e9, 1e14)),
        "ivcore": iv_set(sample(rng, 1000, 0.0, 8.0, 1e-4, 1e4)),
        "ivwing": iv_set(sample(rng, 500, 8.0, 38.0, 1e9, 1e14)),
    }
    try:
        commit = subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True,
                                cwd=HERE).stdout.strip()
    except OSError:
        commit = "unknown"
    prov = {"reference_library": "mpmath", "mpmath_version": mpmath.__version__,
            "mp_dps": DPS, "check_dps": CHECK_DPS, "seed": SEED,
            "date": datetime.date.today().isoformat(), "generator": "tests/gen_bachelier_reference.py",
            "generator_commit": commit,
            "grid": "core/ivcore: |d| <= 8 (5% at the money, 5% |d| in 1e-14..1e-3), "
                    "scale 1e-4..1e4; wing/ivwing: 8 < |d| <= 38, scale 1e9..1e14; "
                    "s = scale * 1e-3..10, T 1/365..30 y, r -2%..10%, strikes 0, "
                    "negative, positive, tiny; prices > 1e-300",
            "rows": {k: int(len(v["F"])) for k, v in sets.items()}}
    arrays = {f"{name}_{k}": v for name, cols in sets.items() for k, v in cols.items()}
    np.savez_compressed(OUT, provenance=json.dumps(prov), **arrays)
    print(json.dumps(prov, indent=1))


if __name__ == "__main__":
    main()
