"""Generate tests/data/black_reference.npz: exact Black-76 / BSM prices by mpmath.

Run by hand (the test suite only reads the table):

    .venv/bin/python tests/gen_black_reference.py

Reference library: mpmath at ``DPS`` decimal digits (every value is recomputed at
``DPS + 40`` digits and the two must agree, so the stored digits are not rounding noise).

Each row holds double inputs and the exact price *of those doubles*: F, K, T, D and vol are
read as exact binary numbers and s = vol * sqrt(T) is formed in mpmath, so the kernel's own
roundings (F/K, vol*sqrt(T), the logarithm, ...) are part of what the test measures.  The
price is stored as a double-double (hi + lo) so the comparison does not add the reference's
own rounding.  The elasticities that set the tolerance are, with theta = +1 call / -1 put,
d1,2 = ln(F/K)/s +- s/2 and V = D theta (F Phi(theta d1) - K Phi(theta d2)):

    e_F = |F dV/dF| / V = D F Phi(theta d1) / V
    e_K = |K dV/dK| / V = D K Phi(theta d2) / V
    e_s = s dV/ds / V   = s D F phi(d1) / V      (vega with respect to total vol)

(the F phi(d1) = K phi(d2) identity makes the phi terms of dV/dF and dV/dK cancel).

BSM rows hold S, K, T, r, q, vol and the discount factor D = exp(-r T) computed by numpy
in double and stored; the exact price uses that same double D (and F = S exp(-q T) / D
exactly), so the comparison is of the kernel, not of numpy's exp.
"""

import datetime
import hashlib
import json
import os
import subprocess
import sys

import mpmath
import numpy as np
from mpmath import mp, mpf

DPS = 60
CHECK_DPS = DPS + 40
SEED = 20261201
HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "data", "black_reference.npz")

T_MIN, T_MAX = 1.0 / 365.0, 30.0
S_MIN, S_MAX = 1e-5, 6.0
H_CORE = 8.0          # core domain: |ln(F/K)| / s <= 8
X_CORE = 16.0         # and |ln(F/K)| <= 16
X_WING = 80.0         # wing: |ln(F/K)| / s > 8, |ln(F/K)| <= 80
WING_FLOOR = 1e-300   # wing: out-of-the-money price >= WING_FLOOR * F
DBL_MIN = 2.2250738585072014e-308


# ---------------------------------------------------------------- exact formulas (mpmath)

def _ncdf(z):
    return mp.erfc(-z / mp.sqrt(2)) / 2


def _npdf(z):
    return mp.exp(-z * z / 2) / mp.sqrt(2 * mp.pi)


def black_exact_mp(F, K, s, D, theta):
    """(V, e_F, e_K, e_s) as mpf for mpf F, K, s > 0, D and theta = +-1."""
    if s == 0:
        v = D * max(theta * (F - K), 0)
        eF = D * F / v if (v > 0) else mpf(0)
        eK = D * K / v if (v > 0) else mpf(0)
        return v, eF, eK, mpf(0)
    x = mp.log(F / K)
    d1 = x / s + s / 2
    d2 = d1 - s
    tF = D * F * _ncdf(theta * d1)
    tK = D * K * _ncdf(theta * d2)
    v = theta * (tF - tK)
    return v, tF / v, tK / v, s * D * F * _npdf(d1) / v


def black_exact(F, K, T, D, vol, cp, dps=DPS):
    """Exact Black-76 price of double inputs, and elasticities: (mpf V, eF, eK, es floats)."""
    with mp.workdps(dps):
        s = mpf(float(vol)) * mp.sqrt(mpf(float(T)))
        v, eF, eK, es = black_exact_mp(mpf(float(F)), mpf(float(K)), s, mpf(float(D)),
                                       int(cp))
        return +v, float(eF), float(eK), float(es)


def bsm_forward_exact(S, T, D, q):
    """F = S exp(-q T) / D from the double inputs (D is the stored double discount)."""
    return mpf(float(S)) * mp.exp(-mpf(float(q)) * mpf(float(T))) / mpf(float(D))


def bsm_exact(S, K, T, D, q, vol, cp, dps=DPS):
    """Exact BSM price of double inputs (spot S, yield q, stored double D)."""
    with mp.workdps(dps):
        F = bsm_forward_exact(S, T, D, q)
        s = mpf(float(vol)) * mp.sqrt(mpf(float(T)))
        v, eF, eK, es = black_exact_mp(F, mpf(float(K)), s, mpf(float(D)), int(cp))
        return +v, float(eF), float(eK), float(es)


def split_dd(v):
    """mpf -> (hi, lo) double-double."""
    hi = float(v)
    with mp.workdps(DPS):
        lo = float(v - mpf(hi))
    return hi, lo


def _checked(fn, *args):
    v, eF, eK, es = fn(*args, dps=DPS)
    w = fn(*args, dps=CHECK_DPS)[0]
    with mp.workdps(DPS):
        rel = abs(v - w) / abs(w) if w != 0 else abs(v)
    assert rel < mpf(10) ** -35, (fn.__name__, args, rel)
    return v, eF, eK, es


# ---------------------------------------------------------------- sampling

def _logu(rng, lo, hi, n):
    return np.exp(rng.uniform(np.log(lo), np.log(hi), n))


def _market(rng, n, f_lo=1e-2, f_hi=1e4):
    F = _logu(rng, f_lo, f_hi, n)
    T = _logu(rng, T_MIN, T_MAX, n)
    r = rng.uniform(-0.02, 0.12, n)
    D = np.exp(-r * T)
    return F, T, r, D


def _core_points(rng):
    """(name, s, h) sample parts of the core domain, dense where it is hard."""
    parts = []
    n = 700                                    # bulk: log-uniform s, uniform h
    s = _logu(rng, S_MIN, S_MAX, n)
    hm = np.minimum(H_CORE, X_CORE / s)
    parts.append(("bulk", s, rng.uniform(-1, 1, n) * hm))
    n = 200                                    # tiny total vol
    s = _logu(rng, S_MIN, 1e-3, n)
    parts.append(("tiny_s", s, rng.uniform(-H_CORE, H_CORE, n)))
    n = 250                                    # near the money, |h| down to 1e-16
    s = _logu(rng, S_MIN, S_MAX, n)
    parts.append(("near_atm", s, rng.choice([-1.0, 1.0], n) * _logu(rng, 1e-16, 1e-1, n)))
    n = 50                                     # at the money exactly (K = F)
    parts.append(("atm", _logu(rng, S_MIN, S_MAX, n), np.zeros(n)))
    n = 200                                    # large |ln(F/K)| at large s
    s = _logu(rng, 2.0, S_MAX, n)
    x = rng.uniform(8.0, np.minimum(X_CORE, H_CORE * s))
    parts.append(("large_x", s, rng.choice([-1.0, 1.0], n) * x / s))
    n = 150                                    # just inside |h| = 8
    s = _logu(rng, S_MIN, 2.0, n)
    parts.append(("edge_h", s, rng.choice([-1.0, 1.0], n) * H_CORE
                  * (1 - _logu(rng, 1e-16, 1e-3, n))))
    n = 50                                     # the ends of the s range
    s = rng.choice([S_MIN, S_MAX], n)
    hm = np.minimum(H_CORE, X_CORE / s)
    parts.append(("edge_s", s, rng.uniform(-1, 1, n) * hm))
    n = 150                                    # the kernel's core/wing switch, |h| = s/2
    s = _logu(rng, S_MIN, 5.5, n)
    parts.append(("switch", s, rng.choice([-1.0, 1.0], n) * 0.5 * s
                  * (1 + rng.uniform(-1, 1, n) * _logu(rng, 1e-15, 1e-3, n))))
    return parts


def _rows_black(rng, parts):
    cols = {k: [] for k in ("F", "K", "T", "D", "vol", "cp", "part")}
    for name, s, h in parts:
        n = s.shape[0]
        if name == "scale":
            F, T, _, D = _market(rng, n, 1e-150, 1e150)
        else:
            F, T, _, D = _market(rng, n)
        K = F * np.exp(-(h * s))
        K = np.where(h == 0, F, K)
        vol = s / np.sqrt(T)
        for cp in (1, -1):
            cols["F"].append(F)
            cols["K"].append(K)
            cols["T"].append(T)
            cols["D"].append(D)
            cols["vol"].append(vol)
            cols["cp"].append(np.full(n, cp))
            cols["part"].append(np.full(n, name))
    return {k: np.concatenate(v) for k, v in cols.items()}


def _wing_h(rng, n):
    s = _logu(rng, S_MIN, S_MAX, n)
    h = rng.choice([-1.0, 1.0], n) * np.sqrt(rng.uniform(64.0, 1450.0, n))
    keep = np.abs(h * s) <= X_WING
    return s[keep], h[keep]


def _price_table(rows, exact_fn, args):
    n = rows["cp"].shape[0]
    hi = np.empty(n)
    lo = np.empty(n)
    eF = np.empty(n)
    eK = np.empty(n)
    es = np.empty(n)
    for i in range(n):
        v, eF[i], eK[i], es[i] = _checked(exact_fn, *(rows[a][i] for a in args))
        hi[i], lo[i] = split_dd(v)
    rows.update(price_hi=hi, price_lo=lo, e_F=eF, e_K=eK, e_s=es)
    return rows


def _wing_filter(rows, fwd):
    """Keep geometric points whose out-of-the-money price is >= WING_FLOOR * F and normal."""
    n = rows["cp"].shape[0] // 2
    otm_hi = np.where(np.log(fwd[:n] / rows["K"][:n]) < 0, rows["price_hi"][:n],
                      rows["price_hi"][n:])
    keep = (otm_hi >= WING_FLOOR * fwd[:n]) & (otm_hi >= 4 * DBL_MIN)
    keep = keep | (rows["part"][:n] == "example")
    keep2 = np.concatenate([keep, keep])
    return {k: v[keep2] for k, v in rows.items()}


def black_core(rng):
    parts = _core_points(rng)
    n = 50
    s = _logu(rng, S_MIN, S_MAX, n)
    parts.append(("scale", s, rng.uniform(-1, 1, n) * np.minimum(H_CORE, X_CORE / s)))
    rows = _rows_black(rng, parts)
    return _price_table(rows, black_exact, ("F", "K", "T", "D", "vol", "cp"))


def black_wing(rng):
    s, h = _wing_h(rng, 900)
    rows = _rows_black(rng, [("wing", s, h)])
    # F = 1, K = 4.45, s = 0.04, D = 1 (price about 8e-308, near underflow)
    ex = {"F": 1.0, "K": 4.45, "T": 1.0, "D": 1.0, "vol": 0.04}
    for cp in (1, -1):
        for k, v in ex.items():
            rows[k] = np.append(rows[k], v)
        rows["cp"] = np.append(rows["cp"], cp)
        rows["part"] = np.append(rows["part"], "example")
    # _wing_filter pairs row i with row i + n: put the two example rows in the two halves
    m = rows["cp"].shape[0]
    order = np.r_[0:(m - 2) // 2, m - 2, (m - 2) // 2:m - 2, m - 1]
    rows = {k: v[order] for k, v in rows.items()}
    rows = _price_table(rows, black_exact, ("F", "K", "T", "D", "vol", "cp"))
    return _wing_filter(rows, rows["F"])


def _rows_bsm(rng, parts):
    cols = {k: [] for k in ("S", "K", "T", "r", "q", "D", "vol", "cp", "part")}
    for name, s, h in parts:
        n = s.shape[0]
        S, T, r, D = _market(rng, n)
        q = rng.uniform(-0.05, 0.12, n)
        Fd = S * np.exp(-q * T) / D
        K = Fd * np.exp(-(h * s))
        if name == "atm_spot":
            K = S.copy()
        elif name == "atm_fwd":
            K = Fd
        vol = s / np.sqrt(T)
        for cp in (1, -1):
            for k, v in (("S", S), ("K", K), ("T", T), ("r", r), ("q", q), ("D", D),
                         ("vol", vol), ("cp", np.full(n, cp)), ("part", np.full(n, name))):
                cols[k].append(v)
    return {k: np.concatenate(v) for k, v in cols.items()}


def _bsm_fwd_float(rows):
    with mp.workdps(DPS):
        return np.array([float(bsm_forward_exact(S, T, D, q)) for S, T, D, q
                         in zip(rows["S"], rows["T"], rows["D"], rows["q"])])


def bsm_core(rng):
    n = 500
    s = _logu(rng, S_MIN, S_MAX, n)
    parts = [("bulk", s, rng.uniform(-1, 1, n) * np.minimum(H_CORE, X_CORE / s))]
    n = 100
    s = _logu(rng, S_MIN, 1e-3, n)
    parts.append(("tiny_s", s, rng.uniform(-H_CORE, H_CORE, n)))
    n = 60
    parts.append(("atm_spot", _logu(rng, 1e-2, 2.0, n), np.zeros(n)))
    n = 60
    parts.append(("atm_fwd", _logu(rng, S_MIN, S_MAX, n), np.zeros(n)))
    rows = _rows_bsm(rng, parts)
    rows = _price_table(rows, bsm_exact, ("S", "K", "T", "D", "q", "vol", "cp"))
    # K = S: keep only points inside the core domain
    fwd = _bsm_fwd_float(rows)
    x = np.log(fwd / rows["K"])
    s = rows["vol"] * np.sqrt(rows["T"])
    keep = (np.abs(x) <= H_CORE * s) & (np.abs(x) <= X_CORE)
    return {k: v[keep] for k, v in rows.items()}


def bsm_wing(rng):
    s, h = _wing_h(rng, 300)
    rows = _rows_bsm(rng, [("wing", s, h)])
    # S = 1, K = 4.45, T = 1, r = q = 0, sigma = 4%: call about 7.96e-308
    ex = {"S": 1.0, "K": 4.45, "T": 1.0, "r": 0.0, "q": 0.0, "D": 1.0, "vol": 0.04}
    for cp in (1, -1):
        for k, v in ex.items():
            rows[k] = np.append(rows[k], v)
        rows["cp"] = np.append(rows["cp"], cp)
        rows["part"] = np.append(rows["part"], "example")
    m = rows["cp"].shape[0]
    order = np.r_[0:(m - 2) // 2, m - 2, (m - 2) // 2:m - 2, m - 1]
    rows = {k: v[order] for k, v in rows.items()}
    rows = _price_table(rows, bsm_exact, ("S", "K", "T", "D", "q", "vol", "cp"))
    return _wing_filter(rows, _bsm_fwd_float(rows))


GRID = {
    "seed": SEED,
    "T": "log-uniform in [1/365, 30] years; vol = s / sqrt(T) rounded to double",
    "s": "total vol s = vol*sqrt(T) in [1e-5, 6]; log-uniform unless stated",
    "x": "x = ln(F/K); K = F*exp(-h*s) rounded to double; exact x taken from the doubles",
    "F": "log-uniform in [1e-2, 1e4] (part 'scale': [1e-150, 1e150])",
    "D": "exp(-r*T), r uniform in [-0.02, 0.12], numpy double, stored",
    "cp": "every geometric point appears as a call (+1) and a put (-1)",
    "black76_core": {
        "domain": "|x| <= 16 and |x|/s <= 8",
        "bulk": "700 points, h uniform in +-min(8, 16/s)",
        "tiny_s": "200, s log-uniform in [1e-5, 1e-3], h uniform in [-8, 8]",
        "near_atm": "250, |h| log-uniform in [1e-16, 1e-1]",
        "atm": "50, K = F",
        "large_x": "200, s in [2, 6], |x| uniform in [8, min(16, 8 s)]",
        "edge_h": "150, s in [1e-5, 2], |h| = 8 (1 - delta), delta log-uniform [1e-16, 1e-3]",
        "edge_s": "50, s in {1e-5, 6}",
        "switch": "150, |h| = s/2 (1 + delta), |delta| log-uniform [1e-15, 1e-3]",
        "scale": "50, as bulk with F in [1e-150, 1e150]",
    },
    "black76_wing": {
        "domain": "|x|/s > 8, |x| <= 80, out-of-the-money price >= 1e-300*F and normal",
        "wing": "900 draws, h^2 uniform in [64, 1450], s log-uniform; filtered by domain",
        "example": "F=1, K=4.45, s=0.04, D=1 (price about 8e-308)",
    },
    "bsm_core": {
        "inputs": "S as F above, q uniform in [-0.05, 0.12], r and D as above",
        "domain": "as black76_core for F = S exp(-qT)/D",
        "bulk": "500", "tiny_s": "100, s in [1e-5, 1e-3]",
        "atm_spot": "60, K = S (kept where inside the domain)", "atm_fwd": "60, K = double F",
    },
    "bsm_wing": {
        "domain": "as black76_wing",
        "wing": "300 draws",
        "example": "S=1, K=4.45, T=1, r=q=0, sigma=0.04 (call about 7.96e-308)",
    },
}


def _git_head():
    try:
        return subprocess.run(["git", "rev-parse", "HEAD"], cwd=HERE, capture_output=True,
                              text=True, check=True).stdout.strip()
    except Exception:
        return "unknown"


def main():
    mp.dps = DPS
    rng = np.random.default_rng(SEED)
    sets = {"b76": black_core(rng), "b76w": black_wing(rng),
            "bsm": bsm_core(rng), "bsmw": bsm_wing(rng)}
    with open(os.path.abspath(__file__), "rb") as fh:
        src_hash = hashlib.sha256(fh.read()).hexdigest()
    prov = {
        "generator": "tests/gen_black_reference.py",
        "generator_sha256": src_hash,
        "git_head_at_generation": _git_head(),
        "date_utc": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "reference_library": "mpmath",
        "mpmath_version": mpmath.__version__,
        "mp_dps": DPS,
        "check_dps": CHECK_DPS,
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "grid": GRID,
        "counts": {k: int(v["cp"].shape[0]) for k, v in sets.items()},
    }
    out = {"provenance": np.array(json.dumps(prov, indent=1))}
    for name, rows in sets.items():
        for k, v in rows.items():
            v = np.asarray(v)
            if k == "cp":
                v = v.astype(np.int8)
            elif k == "part":
                v = v.astype("U12")
            else:
                v = v.astype(np.float64)
            out[f"{name}_{k}"] = v
    os.makedirs(os.path.dirname(OUT), exist_ok=True)
    np.savez_compressed(OUT, **out)
    print(json.dumps(prov["counts"]), "->", OUT)


if __name__ == "__main__":
    main()
