"""Accuracy and behaviour of the Bachelier (normal) model (kernel/bachelier.py) and of
shifted Black-76 (the ``shift`` input of the Black-76 kernels).

Accuracy bars (ulp = 2**-52), as for Black-76: a price within 8 ulp * max(1, e_F + e_K +
e_s), an implied normal vol within 8 ulp * max(1, (1 + e_F + e_K) / e_s), e_* the
premium's elasticities (tests/gen_bachelier_reference.py).  References: mpmath tables
written by tests/gen_bachelier_reference.py, or mpmath here for small cases.
"""

import math
import os

import numpy as np
import pytest
from mpmath import mp, mpf
from scipy.special import ndtr

from conftest import EPS, assert_within, load_reference, ulp_error
from volsweep.kernel import bachelier as B
from volsweep.kernel import black, greeks as G, implied
from volsweep.kernel import status as S

HERE = os.path.dirname(os.path.abspath(__file__))
TABLE = os.path.join(HERE, "data", "bachelier_reference.npz")
ULPS = 8.0
ALL = G.greek_mask(None, "bachelier")


def _f64(*arrays):
    arrays = np.broadcast_arrays(*(np.atleast_1d(np.asarray(a, dtype=np.float64))
                                   for a in arrays))
    return [np.ascontiguousarray(a) for a in arrays]


def price(F, K, T, D, vol, cp):
    F, K, T, D, vol = _f64(F, K, T, D, vol)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, np.int8), F.shape))
    p, st = np.empty(F.shape), np.empty(F.shape, np.int8)
    B.price(F, K, T, D, vol, cp, p, st)
    return p, st


def iv(premium, F, K, T, D, cp):
    premium, F, K, T, D = _f64(premium, F, K, T, D)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, np.int8), F.shape))
    v, st = np.empty(F.shape), np.empty(F.shape, np.int8)
    B.implied_vol(premium, F, K, T, D, cp, v, st)
    return v, st


def greeks(F, K, T, D, vol, cp, mask=ALL):
    F, K, T, D, vol = _f64(F, K, T, D, vol)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, np.int8), F.shape))
    out = np.empty((bin(mask).count("1"), F.shape[0]))
    st = np.empty(F.shape, np.int8)
    n_bad = B.greeks(F, K, T, D, vol, cp, mask, out, st)
    return dict(zip(G.greek_names(mask), out)), st, n_bad


@pytest.fixture(scope="module")
def table():
    return load_reference(TABLE)


def _set(table, name):
    return {k[len(name) + 1:]: v for k, v in table.items() if k.startswith(name + "_")}


# ------------------------------------------------------------ against mpmath tables

@pytest.mark.parametrize("name", ["core", "wing"])
def test_price_matches_mpmath_table(table, name):
    # source: mpmath (exact Bachelier price of the double inputs, gen_bachelier_reference.py)
    r = _set(table, name)
    p, st = price(r["F"], r["K"], r["T"], r["D"], r["vol"], r["cp"])
    assert (st == S.OK).all()
    err = ulp_error(p, r["price_hi"], r["price_lo"])
    tol = ULPS * np.maximum(1.0, r["e_F"] + r["e_K"] + r["e_s"])
    worst = assert_within(err, tol, f"bachelier price {name}",
                          {k: r[k] for k in ("F", "K", "T", "D", "vol", "cp", "price_hi")})
    print(f"\n[accuracy] bachelier price {name}: {len(err)} rows, worst err/tol = {worst:.3g}")


@pytest.mark.parametrize("name", ["ivcore", "ivwing"])
def test_implied_normal_vol_matches_mpmath_table(table, name):
    # source: mpmath (exact implied normal vol of the double premium)
    r = _set(table, name)
    v, st = iv(r["premium"], r["F"], r["K"], r["T"], r["D"], r["cp"])
    assert int((st != S.OK).sum()) == 0, "every row of the table is solvable"
    err = ulp_error(v, r["iv_hi"], r["iv_lo"])
    with np.errstate(divide="ignore"):
        tol = ULPS * np.maximum(1.0, (1.0 + r["e_F"] + r["e_K"]) / r["e_s"])
    worst = assert_within(err, tol, f"bachelier iv {name}",
                          {k: r[k] for k in ("F", "K", "T", "D", "cp", "premium", "iv_hi")})
    print(f"\n[accuracy] bachelier iv {name}: {len(err)} rows, worst err/tol = {worst:.3g}")


def test_table_covers_the_domain(table):
    # guards the reference table itself: the hard places are really in it
    core, wing = _set(table, "core"), _set(table, "wing")
    d = (core["F"] - core["K"]) / (core["vol"] * np.sqrt(core["T"]))
    assert (d == 0).sum() >= 40 and np.abs(d).max() > 7.9
    assert (core["K"] == 0).sum() > 100 and (core["K"] < 0).sum() > 100
    assert (core["F"] < 0).sum() > 100
    dw = np.abs(wing["F"] - wing["K"]) / (wing["vol"] * np.sqrt(wing["T"]))
    assert dw.max() > 37.0 and dw.min() >= 8.0 - 1e-9
    ivw = _set(table, "ivwing")
    assert (np.abs(ivw["F"] - ivw["K"]) / (ivw["vol"] * np.sqrt(ivw["T"]))).max() > 37.0
    assert set(np.unique(core["cp"])) == {-1, 1}


# ------------------------------------------------------------ worked values and identities

def test_worked_example():
    # source: a worked value from public write-ups of the normal model (F = 30, K = 50,
    # T = 100/365, normal vol 20, no discounting -> call 0.112604141934456), re-derived
    # here with mpmath at 40 digits
    with mp.workdps(40):
        s = mpf(20) * mp.sqrt(mpf(100) / 365)
        d = mpf(-20) / s
        ref = float(-20 * mp.ncdf(d) + s * mp.npdf(d))
    assert abs(ref - 0.112604141934456) < 1e-15
    p, st = price(30.0, 50.0, 100.0 / 365.0, 1.0, 20.0, 1)
    assert st[0] == S.OK
    assert abs(p[0] - ref) <= 8 * EPS * ref * 10      # e_K + e_s ~ 10 there
    v, st = iv(p, 30.0, 50.0, 100.0 / 365.0, 1.0, 1)
    assert st[0] == S.OK and abs(v[0] - 20.0) <= 1e-13 * 20.0


def test_put_call_parity():
    # source: put-call parity (published identity): C - P = D (F - K), any sign of F, K
    rng = np.random.default_rng(3)
    n = 400
    F = rng.uniform(-5, 5, n)
    K = rng.uniform(-5, 5, n)
    T = rng.uniform(0.01, 10, n)
    D = np.exp(-rng.uniform(-0.02, 0.1, n) * T)
    vol = rng.uniform(0.01, 3, n)
    c, _ = price(F, K, T, D, vol, 1)
    p, _ = price(F, K, T, D, vol, -1)
    scale = np.maximum(np.abs(c), np.abs(p)) + D * np.abs(F - K)
    assert np.all(np.abs((c - p) - D * (F - K)) <= 8 * EPS * scale)


def test_at_the_money_identity():
    # source: published identity, at the money C = P = D sigma sqrt(T) / sqrt(2 pi)
    for f in (0.0, -0.0125, 3.5, 1e6):
        T, D, vol = 0.75, 0.97, 0.012
        ref = D * vol * math.sqrt(T) / math.sqrt(2 * math.pi)
        for cp in (1, -1):
            p, st = price(f, f, T, D, vol, cp)
            assert st[0] == S.OK and abs(p[0] - ref) <= 4 * EPS * ref
            v, st = iv(p, f, f, T, D, cp)
            assert st[0] == S.OK and abs(v[0] - vol) <= 8 * EPS * vol


def test_iv_round_trip_dense_sweep():
    # consistency of price and inversion over d = (F-K)/s in [-38, 38] and any sign:
    # every solvable row is ok and returns the vol to a few ulps of the inversion's
    # condition (sized from the mpmath-checked tables above; this adds density)
    rng = np.random.default_rng(11)
    n = 20000
    d = rng.uniform(-38, 38, n)
    s = np.exp(rng.uniform(np.log(1e8), np.log(1e12), n))
    K = rng.uniform(-2, 2, n) * s
    F = K + d * s
    T = np.ones(n)
    vol = s
    cp = rng.choice(np.array([-1, 1], np.int8), n)
    p, st = price(F, K, T, 1.0, vol, cp)
    v, st2 = iv(p, F, K, T, 1.0, cp)
    tv = p - np.maximum(cp * (F - K), 0.0)
    solvable = (st == S.OK) & (tv > 0) & (p > 1e-300)
    assert (st2[solvable] == S.OK).all()
    rel = np.abs(v / vol - 1.0)
    # the premium carries the price's error (<= 8 ulp (e_F + e_K + e_s)) and a rounding,
    # the inversion divides them by e_s (elasticities in double, scipy's ndtr)
    with np.errstate(all="ignore"):
        N = ndtr(cp * d)
        eFK = (np.abs(F) + np.abs(K)) * N / p
        es = s * np.exp(-0.5 * d * d) / math.sqrt(2 * math.pi) / p
        tol = 24 * EPS * np.maximum(1.0, (1.0 + eFK + es) / es)
    assert_within(rel[solvable] / EPS, tol[solvable] / EPS, "round trip")
    assert np.abs(d[solvable]).max() > 37


def test_greeks_against_mpmath_derivatives():
    # source: mpmath, numerical derivatives (mp.diff) of the exact Bachelier price at 40
    # digits, with D = exp(-r T) and the rate held fixed while T moves
    cases = [(1.3, 0.9, 0.7, 0.04, 0.6, 1), (-0.02, 0.015, 2.0, -0.01, 0.011, -1),
             (0.0, 0.0, 0.25, 0.03, 0.2, 1), (100.0, 104.0, 1.5, 0.02, 9.0, -1),
             (5.0, -3.0, 0.1, 0.05, 4.0, 1)]
    names = G.greek_names(ALL)
    for F, K, T, r, vol, cp in cases:
        D = math.exp(-r * T)
        g, st, n_bad = greeks(F, K, T, D, vol, cp)
        assert st[0] == S.OK and n_bad == 0
        with mp.workdps(40):
            def V(f=mpf(F), k=mpf(K), t=mpf(T), rr=mpf(r), sig=mpf(vol)):
                s = sig * mp.sqrt(t)
                d = (f - k) / s
                return mp.exp(-rr * t) * (cp * (f - k) * mp.ncdf(cp * d) + s * mp.npdf(d))
            ref = {
                "delta": mp.diff(lambda f: V(f=f), F),
                "gamma": mp.diff(lambda f: V(f=f), F, 2),
                "vega": mp.diff(lambda v: V(sig=v), vol),
                "theta": -mp.diff(lambda t: V(t=t), T),
                "rho": mp.diff(lambda x: V(rr=x), r),
                "vanna": mp.diff(lambda f, v: V(f=f, sig=v), (F, vol), (1, 1)),
                "volga": mp.diff(lambda v: V(sig=v), vol, 2),
                "charm": -mp.diff(lambda f, t: V(f=f, t=t), (F, T), (1, 1)),
                "veta": -mp.diff(lambda v, t: V(sig=v, t=t), (vol, T), (1, 1)),
                "speed": mp.diff(lambda f: V(f=f), F, 3),
                "zomma": mp.diff(lambda f, v: V(f=f, sig=v), (F, vol), (2, 1)),
                "color": -mp.diff(lambda f, t: V(f=f, t=t), (F, T), (2, 1)),
                "ultima": mp.diff(lambda v: V(sig=v), vol, 3),
                "dual_delta": mp.diff(lambda k: V(k=k), K),
                "dual_gamma": mp.diff(lambda k: V(k=k), K, 2),
            }
        for name in names:
            want = float(ref[name])
            scale = max(abs(want), 1e-14 * max(1.0, abs(float(V()))))
            assert abs(g[name][0] - want) <= 1e-12 * scale, (name, F, K, g[name][0], want)


def test_zero_vol_limits():
    # behaviour (the limits as vol -> 0+, as for Black-76): intrinsic value away from the
    # strike; at the strike delta = cp D / 2 and gamma infinite (reported, row ok)
    g, st, n_bad = greeks([1.0, 0.5, 0.7], [0.5, 1.0, 0.7], 1.0, 0.9, 0.0, 1)
    assert (st == S.OK).all() and n_bad == 1
    assert g["delta"].tolist()[:2] == [0.9, 0.0] and g["delta"][2] == pytest.approx(0.45, rel=1e-15)
    assert g["gamma"][0] == 0.0 and np.isinf(g["gamma"][2])
    assert g["vega"][2] == pytest.approx(0.9 / math.sqrt(2 * math.pi), rel=1e-15)


# ------------------------------------------------------------ statuses, as sentences

def test_negative_and_zero_forwards_and_strikes_are_data():
    p, st = price([-1.0, 0.0, 0.0, -3.0], [0.0, 0.0, -2.0, -3.5], 1.0, 1.0, 0.5, [1, -1, 1, 1])
    assert (st == S.OK).all() and np.all(p > 0)


def test_status_sentences():
    nan, inf = math.nan, math.inf
    # a null forward is missing_input; an infinite strike non_finite_input; a negative vol
    # negative_vol; an expired option expired; a zero discount factor out_of_range
    _, st = price([nan, 1.0, 1.0, 1.0, 1.0], [1.0, inf, 1.0, 1.0, 1.0],
                  [1.0, 1.0, 1.0, 0.0, 1.0], [1.0, 1.0, 1.0, 1.0, 0.0],
                  [0.2, 0.2, -0.1, 0.2, 0.2], 1)
    assert st.tolist() == [S.MISSING_INPUT, S.NON_FINITE_INPUT, S.NEGATIVE_VOL, S.EXPIRED,
                           S.OUT_OF_RANGE]
    # F - K beyond the largest double is out_of_range
    _, st = price(1.5e308, -1.5e308, 1.0, 1.0, 0.2, 1)
    assert st[0] == S.OUT_OF_RANGE
    # implied vol: a premium below intrinsic is premium_too_low; equal to it no_time_value;
    # a negative premium premium_too_low; NaN premium missing_input; no upper bound
    _, st = iv([0.4, 0.5, -0.1, nan, 1e6], 1.5, 1.0, 1.0, 1.0, 1)
    assert st.tolist() == [S.PREMIUM_TOO_LOW, S.NO_TIME_VALUE, S.PREMIUM_TOO_LOW,
                           S.MISSING_INPUT, S.OK]


# ------------------------------------------------------------ shifted Black-76

def _b76(F, K, T, D, shift, vol, cp):
    F, K, T, D, shift, vol = _f64(F, K, T, D, shift, vol)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, np.int8), F.shape))
    p, st = np.empty(F.shape), np.empty(F.shape, np.int8)
    black.black76_price(F, K, T, D, shift, vol, cp, p, st)
    return p, st


def test_shifted_black76_is_black76_of_shifted_values():
    # source: identity, shifted Black-76 of (F, K, s) == Black-76 of (F + s, K + s)
    rng = np.random.default_rng(5)
    n = 300
    sh = rng.uniform(0.005, 0.03, n)
    F = rng.uniform(-0.004, 0.04, n)
    K = rng.uniform(-0.004, 0.04, n)
    T = rng.uniform(0.1, 10, n)
    D = np.exp(-0.01 * T)
    vol = rng.uniform(0.05, 0.6, n)
    cp = rng.choice(np.array([-1, 1], np.int8), n)
    ps, st = _b76(F, K, T, D, sh, vol, cp)
    p0, st0 = _b76(F + sh, K + sh, T, D, 0.0, vol, cp)
    assert (st == S.OK).all() and np.array_equal(ps, p0)
    # implied vol and Greeks, the same identity
    ivs, ivst = np.empty(n), np.empty(n, np.int8)
    implied.black76_iv(ps, F, K, T, D, sh, cp, ivs, ivst)
    iv0, _ = np.empty(n), None
    implied.black76_iv(ps, F + sh, K + sh, T, D, np.zeros(n), cp, iv0, np.empty(n, np.int8))
    assert (ivst == S.OK).all() and np.array_equal(ivs, iv0)
    mask = G.greek_mask(("delta", "vega"), "black76")
    gs, g0 = np.empty((2, n)), np.empty((2, n))
    G.black76_greeks(F, K, T, D, sh, vol, cp, mask, gs, np.empty(n, np.int8))
    G.black76_greeks(F + sh, K + sh, T, D, np.zeros(n), vol, cp, mask, g0,
                     np.empty(n, np.int8))
    assert np.array_equal(gs, g0)


def test_shifted_status_sentences():
    # with a nonzero shift, forward + shift <= 0 or strike + shift <= 0 is
    # shifted_not_positive; with shift 0 they stay bad_underlying / bad_strike; a NaN
    # shift is missing_input
    _, st = _b76([-0.02, 0.01, -0.01, 0.01, 0.01], [0.01, -0.03, 0.01, -0.01, 0.01], 1.0,
                 1.0, [0.01, 0.02, 0.0, 0.0, math.nan], 0.2, 1)
    assert st.tolist() == [S.SHIFTED_NOT_POSITIVE, S.SHIFTED_NOT_POSITIVE, S.BAD_UNDERLYING,
                           S.BAD_STRIKE, S.MISSING_INPUT]
    assert S.NAMES[S.SHIFTED_NOT_POSITIVE] == "shifted_not_positive"
