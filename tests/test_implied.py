"""Accuracy and behaviour of the implied-volatility kernel (kernel/implied.py).

Accuracy bar: with sigma* the exact implied vol of the double inputs (mpmath, 60 digits,
tables written by tests/gen_implied_reference.py),

    |sigma_hat - sigma*| / sigma* <= 8 ulp * max(1, (1 + e_F + e_K) / e_s),  ulp = 2**-52,

e_F, e_K, e_s the premium's elasticities to forward, strike and total vol: an input known
to one rounding moves sigma by about that much, so this is the attainable accuracy.
"""

import json
import math
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from mpmath import mp, mpf
from scipy.special import ndtr

from conftest import EPS, assert_within, ulp_error
from volsweep.kernel import black, implied
from volsweep.kernel import status as S

HERE = os.path.dirname(os.path.abspath(__file__))
TABLE = os.path.join(HERE, "data", "implied_reference.npz")
ULPS = 8.0


def tolerance_ulp(e_F, e_K, e_s):
    with np.errstate(divide="ignore", invalid="ignore"):
        return ULPS * np.maximum(1.0, (1.0 + np.asarray(e_F) + np.asarray(e_K))
                                 / np.asarray(e_s))


def _f64(*arrays):
    arrays = np.broadcast_arrays(*(np.atleast_1d(a) for a in arrays))
    return [np.ascontiguousarray(a, dtype=np.float64) for a in arrays]


def iv76(premium, F, K, T, D, cp):
    premium, F, K, T, D = _f64(premium, F, K, T, D)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, dtype=np.int8), F.shape))
    iv = np.empty(F.shape)
    stt = np.empty(F.shape, dtype=np.int8)
    implied.black76_iv(premium, F, K, T, D, np.zeros(F.shape), cp, iv, stt)
    return iv, stt


def ivbsm(premium, spot, K, T, D, q, cp):
    premium, spot, K, T, D, q = _f64(premium, spot, K, T, D, q)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, dtype=np.int8), spot.shape))
    iv = np.empty(spot.shape)
    stt = np.empty(spot.shape, dtype=np.int8)
    implied.bsm_iv(premium, spot, K, T, D, q, cp, iv, stt)
    return iv, stt


def price76(F, K, T, D, vol, cp):
    F, K, T, D, vol = _f64(F, K, T, D, vol)
    cp = np.ascontiguousarray(np.broadcast_to(np.asarray(cp, dtype=np.int8), F.shape))
    p = np.empty(F.shape)
    stt = np.empty(F.shape, dtype=np.int8)
    black.black76_price(F, K, T, D, np.zeros(F.shape), vol, cp, p, stt)
    return p, stt


def elasticities(F, K, T, D, vol, cp, price):
    """e_F, e_K, e_s of a Black-76 premium in double (only used to size tolerances)."""
    s = vol * np.sqrt(T)
    x = np.log(F / K)
    d1 = x / s + s / 2
    d2 = d1 - s
    th = np.where(cp > 0, 1.0, -1.0)
    eF = D * F * ndtr(th * d1) / price
    eK = D * K * ndtr(th * d2) / price
    es = s * D * F * np.exp(-0.5 * d1 * d1) / math.sqrt(2 * math.pi) / price
    return eF, eK, es


@pytest.fixture(scope="module")
def table():
    z = np.load(TABLE, allow_pickle=False)
    prov = json.loads(str(z["provenance"]))
    assert prov["reference_library"] == "mpmath" and prov["mp_dps"] >= 50
    return {k: z[k] for k in z.files if k != "provenance"}


# ------------------------------------------------------------ accuracy against mpmath

def test_black76_matches_mpmath_reference(table):
    # source: mpmath (exact implied vol of the double premium, tests/gen_implied_reference.py)
    t = {k[4:]: v for k, v in table.items() if k.startswith("b76_")}
    iv, stt = iv76(t["premium"], t["F"], t["K"], t["T"], t["D"], t["cp"])
    assert (stt == S.OK).all(), "every row of the table is solvable"
    err = ulp_error(iv, t["iv_hi"], t["iv_lo"])
    tol = tolerance_ulp(t["e_F"], t["e_K"], t["e_s"])
    worst = assert_within(err, tol, "Black-76 implied vol vs mpmath",
                          {"F": t["F"], "K": t["K"], "T": t["T"], "D": t["D"],
                           "cp": t["cp"], "premium": t["premium"], "ref": t["iv_hi"]})
    print(f"Black-76 rows: {len(err)}, worst err/tol = {worst:.3f}")


def test_bsm_matches_mpmath_reference(table):
    # source: mpmath (F = S exp(-qT)/D exactly, exact implied vol of the double premium)
    t = {k[4:]: v for k, v in table.items() if k.startswith("bsm_")}
    iv, stt = ivbsm(t["premium"], t["spot"], t["K"], t["T"], t["D"], t["q"], t["cp"])
    assert (stt == S.OK).all()
    err = ulp_error(iv, t["iv_hi"], t["iv_lo"])
    tol = tolerance_ulp(t["e_F"], t["e_K"], t["e_s"])
    worst = assert_within(err, tol, "BSM implied vol vs mpmath",
                          {"spot": t["spot"], "K": t["K"], "T": t["T"], "q": t["q"],
                           "cp": t["cp"], "premium": t["premium"], "ref": t["iv_hi"]})
    print(f"BSM rows: {len(err)}, worst err/tol = {worst:.3f}")


def test_near_underflow_bsm_quote_gives_four_percent(table):
    # source: mpmath price of S=1, K=4.45, T=1, r=q=0, sigma=4% (~7.96e-308), rounded to
    # double, inverted; the table stores the exact implied vol of that double
    t = {k[4:]: v for k, v in table.items() if k.startswith("bsm_")}
    i = np.flatnonzero((t["spot"] == 1.0) & (t["K"] == 4.45) & (t["T"] == 1.0))
    assert i.size == 1
    i = int(i[0])
    assert 7.9e-308 < t["premium"][i] < 8.0e-308
    iv, stt = ivbsm(t["premium"][i], 1.0, 4.45, 1.0, 1.0, 0.0, 1)
    assert stt[0] == S.OK
    tol = tolerance_ulp(t["e_F"][i], t["e_K"][i], t["e_s"][i])
    assert ulp_error(iv[0], t["iv_hi"][i], t["iv_lo"][i]) <= tol
    assert abs(iv[0] / 0.04 - 1.0) <= tol * EPS + abs(t["iv_hi"][i] / 0.04 - 1.0)


def test_at_the_money_tiny_premium_is_solved_within_the_accuracy_bar():
    # source: mpmath; at F = K the normalised Black price is erf(s / (2 sqrt 2)) exactly,
    # so s = 2 sqrt2 erfinv(P / F).  The bar is the attainable accuracy of the inputs as
    # doubles (8 ulp x the condition number, which grows as 1/p here because it counts the
    # rounding of F and K); with F and K exact the solver does better than the bar but is
    # not exact at tiny premiums (measured ~9e-9 relative at p = 3e-9).
    for p in (1e-20, 1e-12, 3e-9, 1e-5, 0.3):
        iv, stt = iv76(p, 1.0, 1.0, 1.0, 1.0, 1)
        with mp.workdps(40):
            ref = 2 * mp.sqrt(2) * mp.erfinv(mpf(p))
            err = abs(mpf(iv[0]) / ref - 1)
        assert stt[0] == S.OK
        assert err <= 8 * EPS * max(1.0, 1.0 / p), p


# ------------------------------------------------------------ round trips (hypothesis)

_rt = st.tuples(
    st.floats(-16.0, 16.0),                          # ln(F/K)
    st.floats(math.log(1e-5), math.log(6.0)),        # ln s
    st.floats(math.log(1e-2), math.log(1e4)),        # ln F
    st.floats(math.log(1.0 / 365), math.log(30.0)),  # ln T
    st.floats(0.3, 1.2),                             # D
    st.sampled_from([1, -1]),
)


@settings(max_examples=600, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_rt, min_size=20, max_size=20))
def test_round_trip_price_iv_price(rows):
    # source: common practice (invert our own price), against the bar of this file at that
    # point (the price kernel's own rounding has fitted inside it with a wide margin:
    # worst 0.38 of the bar over 85k random points)
    x, ls, lF, lT, D, cp = (np.array(c) for c in zip(*rows))
    F = np.exp(lF)
    K = F * np.exp(-x)
    T = np.exp(lT)
    vol = np.exp(ls) / np.sqrt(T)
    p, pst = price76(F, K, T, D, vol, cp)
    intrinsic = D * np.maximum(np.where(cp > 0, F - K, K - F), 0.0)
    upper = D * np.where(cp > 0, F, K)
    otm = (p - intrinsic) / D
    keep = (pst == S.OK) & (p > intrinsic) & (p < upper) & (otm >= 1e-280 * F)
    if not keep.any():
        return
    F, K, T, D, vol, cp, p = (a[keep] for a in (F, K, T, D, vol, cp, p))
    iv, stt = iv76(p, F, K, T, D, cp)
    assert (stt == S.OK).all()
    eF, eK, es = elasticities(F, K, T, D, vol, cp, p)
    tol = tolerance_ulp(eF, eK, es)
    assert_within(ulp_error(iv, vol), tol, "round trip",
                  {"F": F, "K": K, "T": T, "D": D, "vol": vol, "cp": cp})


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
def test_put_call_parity_consistency():
    # source: put-call parity (published identity): the call and the put of one strike,
    # priced from one vol, imply the same vol where both are well conditioned
    rng = np.random.default_rng(7)
    n = 4000
    F = np.exp(rng.uniform(np.log(1.0), np.log(1e3), n))
    K = F * np.exp(-rng.uniform(-3.0, 3.0, n))
    T = np.exp(rng.uniform(np.log(1 / 365), np.log(10.0), n))
    vol = np.exp(rng.uniform(np.log(0.02), np.log(1.5), n))
    D = np.exp(-0.03 * T)
    pc, _ = price76(F, K, T, D, vol, 1)
    pp, _ = price76(F, K, T, D, vol, -1)
    ivc, stc = iv76(pc, F, K, T, D, 1)
    ivp, stp = iv76(pp, F, K, T, D, -1)
    eFc, eKc, esc = elasticities(F, K, T, D, vol, np.ones(n), pc)
    eFp, eKp, esp = elasticities(F, K, T, D, vol, -np.ones(n), pp)
    kc = (1 + eFc + eKc) / esc
    kp = (1 + eFp + eKp) / esp
    well = (stc == S.OK) & (stp == S.OK) & (kc < 1e3) & (kp < 1e3)
    assert well.sum() > n // 10
    # each side within its own bar of the common vol
    tc = tolerance_ulp(eFc, eKc, esc)
    tp = tolerance_ulp(eFp, eKp, esp)
    assert_within(ulp_error(ivc[well], ivp[well]), (tc + tp)[well], "call vs put iv")


# ------------------------------------------------------------ no failure on solvable rows

def test_every_solvable_row_is_ok_on_a_dense_sweep():
    # source: common practice (a premium strictly between intrinsic and the upper bound
    # has exactly one implied vol); prices from our kernel, including far outside the
    # accuracy domain (|ln F/K| up to 600, s up to 30)
    xs = np.concatenate([-np.geomspace(1e-12, 600, 60), [0.0], np.geomspace(1e-12, 600, 60)])
    ss = np.geomspace(1e-6, 30.0, 80)
    X, Sg = np.meshgrid(xs, ss)
    X, Sg = X.ravel(), Sg.ravel()
    F = np.full(X.shape, 100.0)
    K = F * np.exp(-X)
    for cp in (1, -1):
        p, pst = price76(F, K, 1.0, 0.95, Sg, cp)
        intrinsic = 0.95 * np.maximum(cp * (F - K), 0.0)
        upper = 0.95 * (F if cp > 0 else K)
        solvable = (pst == S.OK) & (p > intrinsic) & (p < upper) & (p - intrinsic > 1e-300)
        iv, stt = iv76(p[solvable], F[solvable], K[solvable], 1.0, 0.95, cp)
        bad = stt != S.OK
        assert not bad.any(), (cp, X[solvable][bad][:5], Sg[solvable][bad][:5])
        assert np.isfinite(iv).all() and (iv > 0).all()


# ------------------------------------------------------------ statuses, row by row

def _one(premium, F=100.0, K=100.0, T=1.0, D=1.0, cp=1):
    iv, stt = iv76(premium, F, K, T, D, cp)
    return iv[0], int(stt[0])


def test_a_premium_equal_to_intrinsic_gives_no_time_value():
    iv, s = _one(20.0, F=120.0, K=100.0)
    assert s == S.NO_TIME_VALUE and math.isnan(iv)


def test_a_zero_premium_out_of_the_money_gives_no_time_value():
    assert _one(0.0, F=100.0, K=130.0)[1] == S.NO_TIME_VALUE


def test_a_premium_below_discounted_intrinsic_is_too_low():
    iv, s = _one(np.nextafter(0.5 * 20.0, 0.0), F=120.0, K=100.0, D=0.5)
    assert s == S.PREMIUM_TOO_LOW and math.isnan(iv)


def test_a_negative_premium_is_too_low():
    assert _one(-1e-3, F=100.0, K=130.0)[1] == S.PREMIUM_TOO_LOW
    assert _one(-1e-3, F=100.0, K=130.0, cp=-1)[1] == S.PREMIUM_TOO_LOW


def test_a_premium_at_the_upper_bound_is_too_high():
    # calls are worth less than D F, puts less than D K (common practice: no-arbitrage bounds)
    assert _one(0.5 * 100.0, F=100.0, K=80.0, D=0.5)[1] == S.PREMIUM_TOO_HIGH
    assert _one(0.5 * 80.0, F=100.0, K=80.0, D=0.5, cp=-1)[1] == S.PREMIUM_TOO_HIGH
    # the comparison is exact: 0.9 * 100 rounds to 90.0, below the exact D F
    assert _one(0.9 * 100.0, F=100.0, K=80.0, D=0.9)[1] == S.OK
    assert _one(np.nextafter(0.9 * 100.0, 1e3), F=100.0, K=80.0, D=0.9)[1] == S.PREMIUM_TOO_HIGH
    assert _one(1e6, F=100.0, K=80.0)[1] == S.PREMIUM_TOO_HIGH


def test_the_largest_premium_below_the_upper_bound_is_ok():
    iv, s = _one(np.nextafter(100.0, 0.0), F=100.0, K=80.0)
    assert s == S.OK and np.isfinite(iv) and iv > 10.0


def test_the_smallest_premium_above_intrinsic_is_ok():
    iv, s = _one(np.nextafter(20.0, 100.0), F=120.0, K=100.0)
    assert s == S.OK and 0.0 < iv < 1.0


def test_a_nan_premium_gives_missing_input():
    iv, s = _one(np.nan)
    assert s == S.MISSING_INPUT and math.isnan(iv)


def test_an_infinite_premium_gives_non_finite_input():
    assert _one(np.inf)[1] == S.NON_FINITE_INPUT
    assert _one(-np.inf)[1] == S.NON_FINITE_INPUT


def test_model_input_problems_are_reported_as_by_the_price_kernel():
    cases = [  # (F, K, T, D, cp) -> input_status
        (np.nan, 100.0, 1.0, 1.0, 1), (100.0, 100.0, 1.0, 1.0, 0),
        (-1.0, 100.0, 1.0, 1.0, 1), (100.0, 0.0, 1.0, 1.0, 1), (100.0, 100.0, 0.0, 1.0, 1),
        (100.0, 100.0, 1.0, -0.5, 1), (np.inf, 100.0, 1.0, 1.0, 1),
    ]
    F, K, T, D, cp = (np.array(c) for c in zip(*cases))
    iv, stt = iv76(np.full(F.shape, 5.0), F, K, T, D, cp.astype(np.int8))
    _, want = price76(F, K, T, D, np.zeros(F.shape), cp.astype(np.int8))
    assert (stt == want).all() and (stt != S.OK).all() and np.isnan(iv).all()


def test_bsm_dividend_yield_problems_are_reported():
    iv, stt = ivbsm([5.0, 5.0, 5.0], 100.0, 100.0, 1.0, 1.0, [np.nan, np.inf, 0.02], 1)
    assert list(stt) == [S.MISSING_INPUT, S.NON_FINITE_INPUT, S.OK]
    assert np.isnan(iv[:2]).all() and np.isfinite(iv[2])


def test_a_time_value_that_underflows_gives_no_time_value():
    # 1e-320 on a forward of 1e300: time value per forward ~1e-620, not a double
    assert _one(1e-320, F=1e300, K=1e300)[1] == S.NO_TIME_VALUE


def test_a_subnormal_premium_far_out_of_the_money_is_ok():
    iv, s = _one(1e-310, F=1.0, K=30.0)
    assert s == S.OK and np.isfinite(iv)
    p, _ = price76(1.0, 30.0, 1.0, 1.0, iv, 1)
    assert abs(p[0] / 1e-310 - 1) < 1e-6   # subnormal premium: ~14 significant digits


def test_statuses_row_by_row_in_one_call():
    prem = np.array([5.0, np.nan, -1.0, 100.0, 20.0, 8.0])
    F = np.array([100.0, 100.0, 100.0, 100.0, 120.0, 100.0])
    K = np.array([100.0, 100.0, 100.0, 80.0, 100.0, 100.0])
    cp = np.array([1, 1, 1, 1, 1, 0], np.int8)
    iv, stt = iv76(prem, F, K, 1.0, 1.0, cp)
    assert list(stt) == [S.OK, S.MISSING_INPUT, S.PREMIUM_TOO_LOW, S.PREMIUM_TOO_HIGH,
                         S.NO_TIME_VALUE, S.MISSING_INPUT]
    assert np.isfinite(iv[0]) and np.isnan(iv[1:]).all()


def test_scalar_tier_matches_the_loop():
    s, stt = implied.black_total_vol(7.5, 100.0, 110.0, 0.98, 1.0)
    iv, st2 = iv76(7.5, 100.0, 110.0, 2.0, 0.98, 1)
    assert stt == st2[0] == S.OK and s / math.sqrt(2.0) == iv[0]
