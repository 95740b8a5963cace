"""Accuracy and behaviour of the Black-76 / BSM price kernel (kernel/black.py).

Accuracy bar: relative error <= 8 ulp * max(1, e_F + e_K + e_s), ulp = 2**-52, where the
e's are the price's elasticities to forward, strike and total vol -- the problem's own
condition number for inputs known to one rounding.  Reference: mpmath (tables written by
tests/gen_black_reference.py, or computed here at 30+ digits for the small cases).
"""

import json
import math
import os

import numba
import numpy as np
import pytest
from mpmath import mp, mpf

from conftest import EPS, assert_within, ulp_error
from gen_black_reference import black_exact, bsm_exact
from volsweep.kernel import black
from volsweep.kernel import status as S

HERE = os.path.dirname(os.path.abspath(__file__))
TABLE = os.path.join(HERE, "data", "black_reference.npz")
ULPS = 8.0


def tolerance_ulp(e_F, e_K, e_s):
    return ULPS * np.maximum(1.0, np.asarray(e_F) + np.asarray(e_K) + np.asarray(e_s))


def b76(F, K, T, D, vol, cp):
    F, K, T, D, vol = (np.array(a, dtype=np.float64)
                       for a in np.broadcast_arrays(F, K, T, D, vol))
    cp = np.array(np.broadcast_to(cp, F.shape), dtype=np.int8)
    price = np.empty(F.shape)
    st = np.empty(F.shape, dtype=np.int8)
    black.black76_price(F, K, T, D, np.zeros(F.shape), vol, cp, price, st)
    return price, st


def bsm(spot, K, T, D, q, vol, cp):
    spot, K, T, D, q, vol = (np.array(a, dtype=np.float64)
                             for a in np.broadcast_arrays(spot, K, T, D, q, vol))
    cp = np.array(np.broadcast_to(cp, spot.shape), dtype=np.int8)
    price = np.empty(spot.shape)
    st = np.empty(spot.shape, dtype=np.int8)
    black.bsm_price(spot, K, T, D, q, vol, cp, price, st)
    return price, st


@pytest.fixture(scope="module")
def table():
    z = np.load(TABLE, allow_pickle=False)
    prov = json.loads(str(z["provenance"]))
    assert prov["reference_library"] == "mpmath" and prov["mp_dps"] >= 50
    return {k: z[k] for k in z.files if k != "provenance"}


def _set(table, name):
    return {k[len(name) + 1:]: v for k, v in table.items() if k.startswith(name + "_")}


def _report(label, ratio, rows, i):
    where = ", ".join(f"{k}={rows[k][i].item()!r}" for k in
                      ("part", "F", "S", "K", "T", "D", "q", "vol", "cp") if k in rows)
    print(f"\n[accuracy] {label}: worst err/tol = {ratio:.3g} at {where}")


# ------------------------------------------------------------ 1, 2: against mpmath tables

@pytest.mark.parametrize("name", ["b76", "b76w"])
def test_black76_matches_mpmath_table(table, name):
    # reference: mpmath (tests/gen_black_reference.py); b76 = core domain, b76w = wing set
    r = _set(table, name)
    price, st = b76(r["F"], r["K"], r["T"], r["D"], r["vol"], r["cp"])
    assert np.all(st == S.OK)
    err = ulp_error(price, r["price_hi"], r["price_lo"])
    tol = tolerance_ulp(r["e_F"], r["e_K"], r["e_s"])
    cols = {k: r[k] for k in ("part", "F", "K", "T", "D", "vol", "cp", "price_hi")}
    ratio = err / tol
    _report(name, ratio.max(), r, int(np.argmax(ratio)))
    assert_within(err, tol, f"black76 {name}", cols)


@pytest.mark.parametrize("name", ["bsm", "bsmw"])
def test_bsm_matches_mpmath_table(table, name):
    # reference: mpmath, exact price of the double inputs S, K, T, q, vol and of the stored
    # double D = numpy exp(-r T) -- the kernel receives that same D, so this tests the kernel
    r = _set(table, name)
    price, st = bsm(r["S"], r["K"], r["T"], r["D"], r["q"], r["vol"], r["cp"])
    assert np.all(st == S.OK)
    err = ulp_error(price, r["price_hi"], r["price_lo"])
    tol = tolerance_ulp(r["e_F"], r["e_K"], r["e_s"])
    cols = {k: r[k] for k in ("part", "S", "K", "T", "r", "q", "D", "vol", "cp", "price_hi")}
    ratio = err / tol
    _report(name, ratio.max(), r, int(np.argmax(ratio)))
    assert_within(err, tol, f"bsm {name}", cols)


def test_table_covers_the_domain(table):
    # guards the reference table itself: the hard places are really in it
    core, wing = _set(table, "b76"), _set(table, "b76w")
    s = core["vol"] * np.sqrt(core["T"])
    x = np.log(core["F"] / core["K"])
    assert s.min() <= 1.01e-5 and s.max() >= 5.99
    assert np.abs(x).max() > 15.0 and np.all(np.abs(x) <= 16.0 * (1 + 1e-12))
    assert np.all(np.abs(x) <= 8.0 * s * (1 + 1e-12))
    assert (x == 0).sum() >= 50 and ((np.abs(x) > 0) & (np.abs(x) < 1e-12 * s)).sum() > 10
    assert core["T"].min() < 1.01 / 365 and core["T"].max() > 29.0
    ws = wing["vol"] * np.sqrt(wing["T"])
    assert np.all(np.abs(np.log(wing["F"] / wing["K"])) > 8.0 * ws)
    assert (wing["price_hi"] / wing["F"]).min() < 1e-299
    assert (wing["price_hi"] < 1e-307).any()
    assert set(np.unique(core["cp"])) == {-1, 1}
    # the stored elasticities obey theta (e_F - e_K) = 1 (V = theta (D F Phi1 - D K Phi2))
    for r in (core, wing, _set(table, "bsm"), _set(table, "bsmw")):
        resid = np.abs(r["cp"] * (r["e_F"] - r["e_K"]) - 1.0)
        assert np.all(resid <= 1e-12 * (r["e_F"] + r["e_K"])) and np.all(r["e_s"] >= 0)


def test_scalar_black_price_matches_mpmath(table):
    # reference: mpmath table; the scalar tier called from Python on a subsample
    for name in ("b76", "b76w"):
        r = _set(table, name)
        idx = np.arange(0, r["cp"].shape[0], 7)
        got = np.array([black.black_price(r["F"][i], r["K"][i],
                                          r["vol"][i] * math.sqrt(r["T"][i]), r["D"][i],
                                          float(r["cp"][i])) for i in idx])
        err = ulp_error(got, r["price_hi"][idx], r["price_lo"][idx])
        tol = tolerance_ulp(r["e_F"][idx], r["e_K"][idx], r["e_s"][idx])
        assert_within(err, tol, f"black_price {name}",
                      {k: r[k][idx] for k in ("part", "F", "K", "T", "vol", "cp")})


# ------------------------------------------------------------ 3: handbook worked examples

# (source, model, inputs, cp, printed value, printed decimals).  Values recalled from
# memory; each re-derived with mpmath (the printed rounding is checked below).
# BSM inputs: S, K, T, r, q, sigma.  Black-76 inputs: F, K, T, r, sigma.
HANDBOOK = [
    ("Hull, Options Futures and Other Derivatives, BSM example (from memory; "
     "re-derived with mpmath)", "bsm", (42.0, 40.0, 0.5, 0.10, 0.0, 0.20), 1, 4.76, 2),
    ("Hull, same example, put (from memory; re-derived with mpmath)",
     "bsm", (42.0, 40.0, 0.5, 0.10, 0.0, 0.20), -1, 0.81, 2),
    ("Hull, delta-hedging example, 20 weeks (from memory; re-derived with mpmath)",
     "bsm", (49.0, 50.0, 20.0 / 52.0, 0.05, 0.0, 0.20), 1, 2.40, 2),
    ("Hull, index option with dividend yield (from memory; re-derived with mpmath)",
     "bsm", (930.0, 900.0, 2.0 / 12.0, 0.08, 0.03, 0.20), 1, 51.83, 2),
    ("Hull, European put, 5 months, vs the binomial American value (from memory; "
     "re-derived with mpmath)", "bsm", (50.0, 50.0, 5.0 / 12.0, 0.10, 0.0, 0.40), -1, 4.08, 2),
    ("Hull, Black's model, futures put (from memory; re-derived with mpmath)",
     "b76", (20.0, 20.0, 4.0 / 12.0, 0.09, 0.25), -1, 1.12, 2),
    ("Haug, The Complete Guide to Option Pricing Formulas, Black-76 call (from memory; "
     "re-derived with mpmath)", "b76", (19.0, 19.0, 0.75, 0.10, 0.28), 1, 1.7011, 4),
    ("Haug, same Black-76 example, put (from memory; re-derived with mpmath)",
     "b76", (19.0, 19.0, 0.75, 0.10, 0.28), -1, 1.7011, 4),
    ("Haug, Black-Scholes call (from memory; re-derived with mpmath)",
     "bsm", (60.0, 65.0, 0.25, 0.08, 0.0, 0.30), 1, 2.1334, 4),
    ("Haug, Merton stock-index put (from memory; re-derived with mpmath)",
     "bsm", (100.0, 95.0, 0.5, 0.10, 0.05, 0.20), -1, 2.4648, 4),
    ("Haug, Garman-Kohlhagen currency call, q = foreign rate (from memory; "
     "re-derived with mpmath)", "bsm", (1.56, 1.60, 0.5, 0.06, 0.08, 0.12), 1, 0.0291, 4),
    ("Haug, generalised BSM put, cost of carry b = r - q = 5% (from memory; "
     "re-derived with mpmath)", "bsm", (75.0, 70.0, 0.5, 0.10, 0.05, 0.35), -1, 4.0870, 4),
]


@pytest.mark.parametrize("source,model,inp,cp,printed,dec", HANDBOOK,
                         ids=[f"{i}-{h[1]}" for i, h in enumerate(HANDBOOK)])
def test_handbook_examples(source, model, inp, cp, printed, dec):
    # source: named in the HANDBOOK list beside each example; reference: mpmath
    if model == "bsm":
        spot, K, T, r, q, vol = inp
        D = float(np.exp(-r * T))
        ref, eF, eK, es = bsm_exact(spot, K, T, D, q, vol, cp, dps=40)
        got, st = bsm([spot], K, T, D, q, vol, cp)
    else:
        F, K, T, r, vol = inp
        D = float(np.exp(-r * T))
        ref, eF, eK, es = black_exact(F, K, T, D, vol, cp, dps=40)
        got, st = b76([F], K, T, D, vol, cp)
    assert st[0] == S.OK
    # the handbook's printed figure is the mpmath value rounded to the printed decimals
    with mp.workdps(40):
        assert abs(ref - mpf(printed)) <= mpf(10) ** -dec / 2, (source, ref, printed)
    with mp.workdps(40):
        lo = float(ref - mpf(float(ref)))
    err = ulp_error(got, float(ref), lo)
    assert_within(err, tolerance_ulp(eF, eK, es), source)


# ------------------------------------------------------------ 4: identities and limits

def _random_rows(n, seed, hmax=8.0):
    rng = np.random.default_rng(seed)
    F = np.exp(rng.uniform(np.log(1e-2), np.log(1e4), n))
    T = np.exp(rng.uniform(np.log(1 / 365), np.log(30.0), n))
    s = np.exp(rng.uniform(np.log(1e-5), np.log(6.0), n))
    h = rng.uniform(-hmax, hmax, n)
    K = F * np.exp(-h * s)
    D = np.exp(-rng.uniform(-0.02, 0.12, n) * T)
    return F, K, T, D, s / np.sqrt(T), s


def _abs_bound(V, F, K, s, D):
    # 8 ulp * max(V, D F Phi(d1) + D K Phi(d2) + s D F phi(d1)) <= this absolute bound
    return ULPS * EPS * (V + D * F + D * K + s * D * F / math.sqrt(2 * math.pi))


@pytest.mark.parametrize("hmax", [8.0, 40.0])
def test_put_call_parity(hmax):
    # published identity: C - P = D (F - K); tolerance from the accuracy bar of C and P
    # plus the rounding of the two differences
    F, K, T, D, vol, s = _random_rows(100_000, 11 + int(hmax), hmax)
    C, stc = b76(F, K, T, D, vol, 1)
    P, stp = b76(F, K, T, D, vol, -1)
    assert np.all(stc == S.OK) and np.all(stp == S.OK)
    lhs = C - P
    rhs = D * (F - K)
    tol = (_abs_bound(C, F, K, s, D) + _abs_bound(P, F, K, s, D)
           + 2 * EPS * (np.abs(rhs) + np.abs(lhs)))
    assert_within(np.abs(lhs - rhs), tol, "parity", {"F": F, "K": K, "T": T, "vol": vol})


def test_no_arbitrage_bounds():
    # common practice: D max(F-K, 0) <= C <= D F and D max(K-F, 0) <= P <= D K
    F, K, T, D, vol, s = _random_rows(100_000, 5, 12.0)
    for cp, upper in ((1, D * F), (-1, D * K)):
        V, st = b76(F, K, T, D, vol, cp)
        lower = D * np.maximum(cp * (F - K), 0.0)
        slack = _abs_bound(V, F, K, s, D)
        assert np.all(V >= lower - slack), cp
        assert np.all(V <= upper + slack), cp
        assert np.all(V >= 0.0)


def test_deep_in_the_money_is_discounted_forward_minus_strike():
    # common practice: far in the money (h = ln(F/K)/s >> 1) the price is D (F - K) /
    # D (K - F): the time value is below 1e-300 of it
    F = np.array([100.0, 100.0, 1.0, 3e5, 100.0])
    K = np.array([50.0, 99.0, 0.25, 2e5, 99.999])
    D = np.array([0.97, 1.0, 0.5, 1.02, 0.9])
    s = np.abs(np.log(F / K)) / 40.0
    T = np.array([0.25, 1.0, 10.0, 1 / 365, 2.0])
    c, _ = b76(F, K, T, D, s / np.sqrt(T), 1)
    p, _ = b76(K, F, T, D, s / np.sqrt(T), -1)  # the mirror put: K' = F, F' = K
    assert_within(ulp_error(c, D * (F - K)), 2.0, "deep ITM call")
    assert_within(ulp_error(p, D * (F - K)), 2.0, "deep ITM put")


@pytest.mark.parametrize("vary", ["T", "vol"])
def test_short_expiry_and_small_vol_tend_to_discounted_intrinsic(vary):
    # common practice: as T -> 0 or vol -> 0 the price tends to D max(theta (F - K), 0);
    # the time value is at most that of the at-the-money option, D F (2 Phi(s/2) - 1) <=
    # D F s / sqrt(2 pi)
    F, D = 100.0, 0.99
    Ks = np.array([50.0, 80.0, 99.0, 99.99, 100.0, 100.01, 101.0, 120.0, 300.0])
    small = 10.0 ** -np.arange(2.0, 21.0)
    for cp in (1, -1):
        for K in Ks:
            T = small if vary == "T" else np.full(small.shape, 0.5)
            vol = np.full(small.shape, 0.3) if vary == "T" else small
            V, st = b76(F, K, T, D, vol, cp)
            assert np.all(st == S.OK)
            s = vol * np.sqrt(T)
            intrinsic = D * max(cp * (F - K), 0.0)
            tv = V - intrinsic
            noise = _abs_bound(V, F, K, s, D) + EPS * intrinsic  # the bar, and V - intrinsic
            bound = D * F * s / math.sqrt(2 * math.pi)
            assert np.all(tv >= -noise), (cp, K)
            assert np.all(tv <= bound + noise), (cp, K)
            if K != F:  # beyond ~40 standard deviations the time value is invisible
                far = np.abs(np.log(F / K)) / s > 40
                assert far[-1]
                assert_within(ulp_error(V[far], intrinsic), 2.0, f"limit cp={cp} K={K}")


def test_large_vol_tends_to_discounted_forward_for_calls():
    # common practice: as vol -> inf a call tends to D F (and a put to D K), increasingly
    F = np.array([100.0, 100.0, 100.0, 1e-3])
    K = np.array([100.0, 50.0, 1000.0, 1e3])
    D = 0.95
    s = np.array([1.0, 3.0, 10.0, 20.0, 40.0, 100.0, 1e3, 1e6, 1e100])
    for f, k in zip(F, K):
        for cp, limit in ((1, D * f), (-1, D * k)):
            V, st = b76(f, k, 1.0, D, s, cp)
            assert np.all(st == S.OK)
            assert np.all(np.diff(V) >= -8 * EPS * V[1:]), (f, k, cp, V)
            big = s >= 40 + 2 * abs(math.log(f / k))
            assert_within(ulp_error(V[big], limit), 4.0, f"large vol F={f} K={k} cp={cp}")


def _noise(F, K, T, D, vol, cp, V):
    # the accuracy bar as an absolute allowance, elasticities by mpmath at 30 digits
    e = np.array([sum(black_exact(F, k, T, D, v, cp, dps=30)[1:])
                  for k, v in np.broadcast(K, vol)])
    return tolerance_ulp(e, 0.0, 0.0) * EPS * V


@pytest.mark.parametrize("cp", [1, -1])
def test_monotone_in_vol(cp):
    # common practice: calls and puts increase with vol; fine grid, ulp-level noise allowed
    F, T, D = 100.0, 0.5, 0.98
    vol = np.geomspace(1e-4, 4.0, 400)
    for K in (40.0, 90.0, 99.9, 100.0, 100.1, 110.0, 250.0):
        V, _ = b76(F, K, T, D, vol, cp)
        ok = V > 1e-290
        v, p = vol[ok], V[ok]
        allow = _noise(F, K, T, D, v, cp, p)
        assert np.all(np.diff(p) >= -(allow[1:] + allow[:-1])), (K, cp)


@pytest.mark.parametrize("cp", [1, -1])
def test_monotone_in_strike(cp):
    # common practice: calls decrease and puts increase with the strike; fine grids across
    # the money and across the kernel's core/wing switch (|ln(F/K)| = s^2/2)
    F, T, D = 100.0, 0.25, 0.99
    for vol in (0.002, 0.2, 1.5, 5.0):
        s = vol * math.sqrt(T)
        x = [np.linspace(-8 * s, 8 * s, 401),
             np.linspace(-1e-12, 1e-12, 41)]
        for c in (-s * s / 2, s * s / 2):
            x.append(c * (1 + np.linspace(-1e-9, 1e-9, 41)))
            x.append(c * (1 + np.linspace(-1e-3, 1e-3, 41)))
        K = np.unique(F * np.exp(-np.concatenate(x)))
        V, _ = b76(F, K, T, D, vol, cp)
        ok = V > 1e-290
        k, p = K[ok], V[ok]
        allow = _noise(F, k, T, D, vol, cp, p)
        step = np.diff(p) * -cp
        assert np.all(step >= -(allow[1:] + allow[:-1])), (vol, cp)


# ------------------------------------------------------------ 5: statuses, row by row

GOOD = dict(F=100.0, K=95.0, T=0.5, D=0.98, vol=0.25, cp=1)
NAN, INF = np.nan, np.inf

# (sentence, overrides, expected status); the price is NaN unless the status is ok
SENTENCES = [
    ("a NaN strike gives missing_input and a NaN price", dict(K=NAN), S.MISSING_INPUT),
    ("a NaN forward gives missing_input", dict(F=NAN), S.MISSING_INPUT),
    ("a NaN expiry gives missing_input", dict(T=NAN), S.MISSING_INPUT),
    ("a NaN discount factor gives missing_input", dict(D=NAN), S.MISSING_INPUT),
    ("a NaN vol gives missing_input", dict(vol=NAN), S.MISSING_INPUT),
    ("a missing call/put flag (0) gives missing_input", dict(cp=0), S.MISSING_INPUT),
    ("a NaN beside an inf gives missing_input", dict(K=NAN, F=INF), S.MISSING_INPUT),
    ("a zero forward gives bad_underlying", dict(F=0.0), S.BAD_UNDERLYING),
    ("a negative forward gives bad_underlying", dict(F=-5.0), S.BAD_UNDERLYING),
    ("a zero strike gives bad_strike", dict(K=0.0), S.BAD_STRIKE),
    ("a negative strike gives bad_strike", dict(K=-1.0), S.BAD_STRIKE),
    ("a negative vol gives negative_vol", dict(vol=-0.2), S.NEGATIVE_VOL),
    ("T = 0 gives expired", dict(T=0.0), S.EXPIRED),
    ("T < 0 gives expired", dict(T=-0.1), S.EXPIRED),
    ("an infinite forward gives non_finite_input", dict(F=INF), S.NON_FINITE_INPUT),
    ("an infinite strike gives non_finite_input", dict(K=INF), S.NON_FINITE_INPUT),
    ("an infinite expiry gives non_finite_input", dict(T=INF), S.NON_FINITE_INPUT),
    ("an infinite discount factor gives non_finite_input (as every +-inf input does)",
     dict(D=INF), S.NON_FINITE_INPUT),
    ("a -inf discount factor gives non_finite_input", dict(D=-INF), S.NON_FINITE_INPUT),
    ("an infinite vol gives non_finite_input", dict(vol=INF), S.NON_FINITE_INPUT),
    ("a -inf vol gives non_finite_input", dict(vol=-INF), S.NON_FINITE_INPUT),
    ("a zero discount factor gives out_of_range", dict(D=0.0), S.OUT_OF_RANGE),
    ("a negative discount factor gives out_of_range", dict(D=-0.5), S.OUT_OF_RANGE),
    ("vol = 0 with T > 0 gives ok and the discounted intrinsic", dict(vol=0.0), S.OK),
    ("vol = 0 for an out-of-the-money put gives ok and 0", dict(vol=0.0, cp=-1), S.OK),
    ("a discount factor above 1 (negative rate) gives ok", dict(D=1.01), S.OK),
]


def _rows_with(cases, base):
    cols = {k: [] for k in base}
    for _, over, _ in cases:
        for k in cols:
            cols[k].append(over.get(k, base[k]))
    return {k: np.array(v) for k, v in cols.items()}


def _interleave_with_good(bad, rng):
    """good, bad, good, bad, ..., good: good rows are random valid rows."""
    n = len(next(iter(bad.values())))
    g = {"F": rng.uniform(50, 150, n + 1), "K": rng.uniform(50, 150, n + 1),
         "T": rng.uniform(0.1, 2, n + 1), "D": rng.uniform(0.9, 1, n + 1),
         "vol": rng.uniform(0.1, 0.5, n + 1), "q": rng.uniform(0, 0.05, n + 1),
         "spot": rng.uniform(50, 150, n + 1), "cp": rng.choice([-1, 1], n + 1)}
    out = {}
    for k in bad:
        col = np.empty(2 * n + 1, dtype=np.int8 if k == "cp" else np.float64)
        col[0::2] = g[k]
        col[1::2] = bad[k]
        out[k] = col
    return out


def test_status_sentences_black76():
    rows = _rows_with(SENTENCES, GOOD)
    allrows = _interleave_with_good(rows, np.random.default_rng(3))
    args = [allrows[k] for k in ("F", "K", "T", "D", "vol", "cp")]
    price, st = b76(*args)
    for j, (sentence, over, want) in enumerate(SENTENCES):
        i = 2 * j + 1
        assert st[i] == want, sentence
        if want != S.OK:
            assert np.isnan(price[i]), sentence
    # vol = 0: exactly the discounted intrinsic
    for j, (sentence, over, want) in enumerate(SENTENCES):
        if over.get("vol") == 0.0:
            r = {k: rows[k][j] for k in rows}
            intrinsic = r["D"] * max(r["cp"] * (r["F"] - r["K"]), 0.0)
            assert_within(ulp_error(price[2 * j + 1], intrinsic), 1.0, sentence)
    # the bad rows do not affect their neighbours: the good rows priced alone, bit for bit
    good_alone, st_alone = b76(*[a[0::2] for a in args])
    assert np.all(st[0::2] == S.OK) and np.all(st_alone == S.OK)
    assert np.array_equal(price[0::2].view(np.uint64), good_alone.view(np.uint64))


BSM_GOOD = dict(spot=100.0, K=95.0, T=0.5, D=0.98, q=0.02, vol=0.25, cp=1)
BSM_SENTENCES = [
    ("a NaN spot gives missing_input", dict(spot=NAN), S.MISSING_INPUT),
    ("a NaN dividend yield gives missing_input", dict(q=NAN), S.MISSING_INPUT),
    ("an infinite dividend yield gives non_finite_input", dict(q=INF), S.NON_FINITE_INPUT),
    ("a missing call/put flag (0) gives missing_input", dict(cp=0), S.MISSING_INPUT),
    ("a zero spot gives bad_underlying", dict(spot=0.0), S.BAD_UNDERLYING),
    ("a NaN strike gives missing_input", dict(K=NAN), S.MISSING_INPUT),
    ("a negative vol gives negative_vol", dict(vol=-0.1), S.NEGATIVE_VOL),
    ("T = 0 gives expired", dict(T=0.0), S.EXPIRED),
    ("a zero discount factor gives out_of_range", dict(D=0.0), S.OUT_OF_RANGE),
    ("a forward that overflows (S e^{-qT}/D = inf) gives out_of_range",
     dict(spot=1e300, D=1e-10), S.OUT_OF_RANGE),
    ("a forward that overflows through a negative yield gives out_of_range",
     dict(spot=1e10, q=-100.0, T=10.0), S.OUT_OF_RANGE),
    ("a forward that underflows to 0 gives out_of_range",
     dict(spot=1e-300, q=100.0, T=10.0), S.OUT_OF_RANGE),
    ("vol = 0 with T > 0 gives ok", dict(vol=0.0), S.OK),
]


def test_status_sentences_bsm():
    rows = _rows_with(BSM_SENTENCES, BSM_GOOD)
    allrows = _interleave_with_good(rows, np.random.default_rng(4))
    args = [allrows[k] for k in ("spot", "K", "T", "D", "q", "vol", "cp")]
    price, st = bsm(*args)
    for j, (sentence, over, want) in enumerate(BSM_SENTENCES):
        i = 2 * j + 1
        assert st[i] == want, sentence
        assert np.isnan(price[i]) == (want != S.OK), sentence
    good_alone, st_alone = bsm(*[a[0::2] for a in args])
    assert np.all(st[0::2] == S.OK) and np.all(st_alone == S.OK)
    assert np.array_equal(price[0::2].view(np.uint64), good_alone.view(np.uint64))


# ------------------------------------------------------------ 6: serial vs parallel

def _mixed_batch(table):
    r = _set(table, "b76")
    w = _set(table, "b76w")
    F, K, T, D, vol, _ = _random_rows(20_000, 9, 30.0)
    cp = np.where(np.arange(F.shape[0]) % 3 == 0, -1, 1).astype(np.int8)
    bad = _rows_with(SENTENCES, GOOD)
    cols = [np.concatenate([r[k], w[k], a, bad[k]])
            for k, a in zip(("F", "K", "T", "D", "vol", "cp"), (F, K, T, D, vol, cp))]
    cols[-1] = cols[-1].astype(np.int8)
    perm = np.random.default_rng(1).permutation(cols[0].shape[0])
    return [np.ascontiguousarray(c[perm]) for c in cols]


def _bits(a):
    return np.ascontiguousarray(a).view(np.uint64 if a.dtype == np.float64 else np.uint8)


@pytest.mark.skipif(numba.config.NUMBA_NUM_THREADS < 2, reason="needs 2 numba threads")
def test_serial_and_parallel_are_bit_identical(table):
    F, K, T, D, vol, cp = _mixed_batch(table)
    spot, q = F * 0.97, np.full(F.shape, 0.01)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        p1, s1 = b76(F, K, T, D, vol, cp)
        b1, t1 = bsm(spot, K, T, D, q, vol, cp)
        numba.set_num_threads(2)
        p2, s2 = b76(F, K, T, D, vol, cp)
        b2, t2 = bsm(spot, K, T, D, q, vol, cp)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(_bits(p1), _bits(p2)) and np.array_equal(s1, s2)
    assert np.array_equal(_bits(b1), _bits(b2)) and np.array_equal(t1, t2)


def test_batch_size_and_slices_do_not_change_results(table):
    # vector bodies, remainders and misaligned starts must give the same bits (contiguous
    # views only: a strided view would compile a second specialisation, ~10 s cold)
    F, K, T, D, vol, cp = _mixed_batch(table)
    cols = (F, K, T, D, vol, cp)
    full, st = b76(*cols)
    for start in (0, 1, 3, 5):
        for n in (1, 2, 3, 7, 8, 9, 15, 16, 17, 31, 33, 63, 64, 65, 127, 1000, 4097):
            sl = slice(start, start + n)
            out = np.empty(n)
            ost = np.empty(n, dtype=np.int8)
            F_, K_, T_, D_, vol_, cp_ = (c[sl] for c in cols)        # views, not copies
            black.black76_price(F_, K_, T_, D_, np.zeros(n), vol_, cp_, out, ost)
            assert np.array_equal(_bits(out), _bits(full[sl])), (start, n)
            assert np.array_equal(ost, st[sl]), (start, n)


def test_overflowing_price_is_out_of_range_not_inf():
    # behaviour: a price that is not a finite double is not a value.  A put struck at the
    # largest double with D > 1 (negative rates) is worth D*K = inf: status out_of_range.
    big = 1.7976931348623157e308
    F, K, T, D, vol = (np.array([v, v]) for v in (100.0, big, 1.0, 1.5, 0.2))
    K[1] = 90.0                                   # an ordinary row beside it
    price, st = np.empty(2), np.empty(2, np.int8)
    black.black76_price(F, K, T, D, np.zeros(2), vol, np.array([-1, -1], np.int8), price, st)
    assert st[0] == S.OUT_OF_RANGE and np.isnan(price[0])
    assert st[1] == S.OK and np.isfinite(price[1])


def test_discount_factors_within_one_ulp_of_mpmath():
    # reference: mpmath at 40 digits, exp(-r T) of the double product r*T as given
    import mpmath
    rng = np.random.default_rng(17)
    r = np.concatenate([rng.uniform(-0.05, 0.25, 400),
                        [0.0, -0.0, np.nan, np.inf, -2000.0, 0.05, 30.0]])
    T = np.concatenate([np.exp(rng.uniform(np.log(1e-4), np.log(50.0), 400)),
                        [1.0, 2.0, 1.0, 1.0, 1.0, np.inf, 30.0]])
    D = black.discount_factors(r, T, np.empty(r.size))
    with mpmath.workdps(40):
        for ri, ti, di in zip(r[:-5], T[:-5], D[:-5]):
            ref = mpmath.exp(-mpmath.mpf(float(ri * ti)))
            assert abs(mpmath.mpf(di) - ref) <= np.spacing(float(ref)), (ri, ti)
    # the inputs' problems travel in the factor (kernel/status.py): NaN rate -> NaN
    # (missing_input), infinite rate or time -> +inf (non_finite_input), e^{-rT} that
    # overflows -> 0 (out_of_range)
    assert np.isnan(D[-5]) and D[-4] == np.inf and D[-3] == 0.0 and D[-2] == np.inf
    assert D[-1] == pytest.approx(np.exp(-900.0))
