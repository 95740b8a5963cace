"""kernel/american.py and exercise= in the bindings: American BSM prices, implied vols and
Greeks (Andersen, Lake & Offengenden 2016).

Outside sources, named beside each check:
* an independent reference written here: Crank-Nicolson finite differences in ln S with a
  Rannacher start, a time grid quadratic in sqrt(time), cell-averaged payoff, the
  Brennan-Schwartz projection for the early-exercise constraint, and Richardson
  extrapolation over two grids (``_reference``); its own convergence is shown in
  ``test_reference_converges``;
* published identities: American >= European; an American call without dividend yield
  is the European call (Merton 1973); with r = 0 and q = 0 the American put is the
  European put;
* a handbook example (Hull, the American put S = K = 50, r = 10%, sigma = 40%, T = 5
  months, about 4.28; recalled from memory, confirmed with the reference).
The reference is our own code but shares nothing with the kernel (a grid method, not the
integral equation).
"""

import math

import numba
import numpy as np
import pyarrow as pa
import pytest

import volsweep
from volsweep.kernel import american as A
from volsweep.kernel import black, greeks as kgreeks
from volsweep.kernel import status as S


# ------------------------------------------------------------------ the reference

@numba.njit(cache=False)
def _cn_grid(spot, K, T, r, q, v, cp, nx, nt):
    """American option values by Crank-Nicolson (see the module docstring) at the spot and
    its two neighbours on the grid in ln S: (V(S e^-dx), V(S), V(S e^dx), dx)."""
    x0 = math.log(spot / K)
    L = 8.0 * v * math.sqrt(T) + abs(r - q - 0.5 * v * v) * T + 0.5
    half = nx // 2
    dx = L / half
    n = 2 * half + 1
    x = np.empty(n)
    V = np.empty(n)
    pay = np.empty(n)
    for j in range(n):
        x[j] = x0 + (j - half) * dx
        a = x[j] - 0.5 * dx
        b = x[j] + 0.5 * dx
        if cp > 0:                  # cell average of (K e^x - K)^+
            lo = max(a, 0.0)
            V[j] = 0.0 if b <= lo else K * ((math.exp(b) - math.exp(lo)) - (b - lo)) / dx
        else:                       # cell average of (K - K e^x)^+
            hi = min(b, 0.0)
            V[j] = 0.0 if hi <= a else K * ((hi - a) - (math.exp(hi) - math.exp(a))) / dx
        pay[j] = max(cp * (K * math.exp(x[j]) - K), 0.0)
    mu = r - q - 0.5 * v * v
    s2 = 0.5 * v * v
    al = s2 / (dx * dx) - mu / (2 * dx)
    be = -2 * s2 / (dx * dx) - r
    ga = s2 / (dx * dx) + mu / (2 * dx)
    lo_d = np.empty(n)
    di = np.empty(n)
    up = np.empty(n)
    rhs = np.empty(n)
    cpr = np.empty(n)
    dpr = np.empty(n)
    tau = 0.0
    for k in range(nt + 2):         # 4 implicit half steps (Rannacher), then CN
        if k < 4:
            t1 = T * ((0.5 * (k + 1)) / nt) ** 2
            theta = 1.0
        else:
            t1 = T * ((k - 1.0) / nt) ** 2
            theta = 0.5
        h = t1 - tau
        tau = t1
        if cp > 0:
            bl = 0.0
            bh = max(K * math.exp(x[n - 1] - q * tau) - K * math.exp(-r * tau), pay[n - 1])
        else:
            bh = 0.0
            bl = max(K * math.exp(-r * tau) - K * math.exp(x[0] - q * tau), pay[0])
        for j in range(1, n - 1):
            rhs[j] = V[j] + (1 - theta) * h * (al * V[j - 1] + be * V[j] + ga * V[j + 1])
            lo_d[j] = -theta * h * al
            di[j] = 1 - theta * h * be
            up[j] = -theta * h * ga
        rhs[1] -= lo_d[1] * bl
        rhs[n - 2] -= up[n - 2] * bh
        # Brennan-Schwartz: eliminate away from the exercise region, then substitute
        # toward it, projecting on the payoff
        if cp < 0:
            cpr[n - 2] = lo_d[n - 2] / di[n - 2]
            dpr[n - 2] = rhs[n - 2] / di[n - 2]
            for j in range(n - 3, 0, -1):
                den = di[j] - up[j] * cpr[j + 1]
                cpr[j] = lo_d[j] / den
                dpr[j] = (rhs[j] - up[j] * dpr[j + 1]) / den
            prev = bl
            for j in range(1, n - 1):
                prev = max(dpr[j] - cpr[j] * prev, pay[j])
                V[j] = prev
        else:
            cpr[1] = up[1] / di[1]
            dpr[1] = rhs[1] / di[1]
            for j in range(2, n - 1):
                den = di[j] - lo_d[j] * cpr[j - 1]
                cpr[j] = up[j] / den
                dpr[j] = (rhs[j] - lo_d[j] * dpr[j - 1]) / den
            prev = bh
            for j in range(n - 2, 0, -1):
                prev = max(dpr[j] - cpr[j] * prev, pay[j])
                V[j] = prev
        V[0] = bl
        V[n - 1] = bh
    return V[half - 1], V[half], V[half + 1], dx


def _cn(spot, K, T, r, q, v, cp, nx, nt):
    return _cn_grid(spot, K, T, r, q, v, cp, nx, nt)[1]


def _reference_delta_gamma(spot, K, T, r, q, v, cp, n=1000):
    """Delta and gamma from the reference's own grid (second differences in ln S), with
    Richardson extrapolation over two grids as for the price."""
    out = []
    for m in (n, 2 * n):
        a, b, c, dx = _cn_grid(spot, K, T, r, q, v, cp, m, m)
        vx = (c - a) / (2.0 * dx)
        vxx = (c - 2.0 * b + a) / (dx * dx)
        out.append((vx / spot, (vxx - vx) / (spot * spot)))
    return tuple((4.0 * f - c) / 3.0 for c, f in zip(out[0], out[1]))


def _reference(spot, K, T, r, q, v, cp, n=2000):
    """Richardson extrapolation of the (n, n) and (2n, 2n) grids (second order)."""
    a = _cn(spot, K, T, r, q, v, cp, n, n)
    b = _cn(spot, K, T, r, q, v, cp, 2 * n, 2 * n)
    return (4.0 * b - a) / 3.0


def _one(spot, K, T, r, q, v, cp, setting="accurate"):
    st = A.setting(setting)
    H, w = A.work_arrays(st)
    return A.american_price_row(spot, K, T, r, q, v, float(cp), st, H, w)


def _err(value, ref, K):
    """Relative error, against a floor of 1e-3 K for premiums near zero."""
    return abs(value - ref) / max(abs(ref), 1e-3 * K)


# spot, strike, T, r, q, vol, cp: puts and calls, in and out of the money, one day to five
# years, yields below and above the rate (r T / vol^2 up to 4; see the README's accuracy
# note for the low-vol, high-rate, long-expiry corner)
CASES = [
    (100.0, 100.0, 1.0, 0.05, 0.0, 0.2, -1),
    (100.0, 110.0, 0.5, 0.05, 0.02, 0.3, -1),
    (100.0, 90.0, 0.5, 0.05, 0.02, 0.3, -1),
    (80.0, 100.0, 3.0, 0.06, 0.01, 0.4, -1),
    (100.0, 100.0, 5.0, 0.02, 0.04, 0.25, -1),
    (100.0, 120.0, 1.0 / 365.0, 0.05, 0.0, 0.3, -1),
    (100.0, 95.0, 1.0 / 365.0, 0.05, 0.0, 0.3, -1),
    (120.0, 100.0, 0.25, 0.1, 0.12, 0.5, -1),
    (100.0, 60.0, 5.0, 0.05, 0.0, 0.6, -1),
    (100.0, 100.0, 5.0, 0.03, 0.07, 0.25, 1),
    (100.0, 90.0, 1.0, 0.03, 0.07, 0.25, 1),
    (100.0, 120.0, 2.0, 0.02, 0.05, 0.35, 1),
    (130.0, 100.0, 0.5, 0.01, 0.08, 0.3, 1),
    (100.0, 100.0, 1.0 / 365.0, 0.02, 0.06, 0.2, 1),
    (100.0, 105.0, 0.1, 0.05, 0.03, 0.2, 1),
    (100.0, 80.0, 3.0, 0.04, 0.02, 0.3, 1),
]


@pytest.fixture(scope="module")
def references():
    return [_reference(*c) for c in CASES]


def test_reference_converges():
    # the reference's own convergence: halving its steps moves it by well under the 1e-6
    # bar its comparisons use (measured ratios of successive changes: 3-5, so the default
    # grid's own error is a fraction of the change printed here)
    for c in (CASES[0], CASES[9], CASES[4]):
        coarse = _reference(*c, n=1000)
        fine = _reference(*c, n=2000)
        assert _err(coarse, fine, c[1]) < 5e-7, c


def test_prices_match_the_reference(references):
    # outside source: the Crank-Nicolson reference above
    errs = [_err(_one(*c), ref, c[1]) for c, ref in zip(CASES, references)]
    assert max(errs) <= 1e-6, (max(errs), CASES[int(np.argmax(errs))])


def test_fast_setting_is_within_its_documented_error(references):
    # outside source: the reference; the fast setting's documented bar is 1e-5
    errs = [_err(_one(*c, setting="fast"), ref, c[1]) for c, ref in zip(CASES, references)]
    assert max(errs) <= 1e-5, max(errs)


def test_hull_american_put():
    # Hull, "Options, Futures, and Other Derivatives": American put S = K = 50, r = 10%,
    # sigma = 40%, T = 5 months: about 4.28 (from memory); confirmed with the reference
    p = _one(50.0, 50.0, 5.0 / 12.0, 0.1, 0.0, 0.4, -1)
    assert abs(p - 4.28) < 0.01
    assert _err(p, _reference(50.0, 50.0, 5.0 / 12.0, 0.1, 0.0, 0.4, -1), 50.0) <= 1e-6


# ------------------------------------------------------------------ identities

def _grid(n=400, seed=11):
    rng = np.random.default_rng(seed)
    spot = np.full(n, 100.0)
    K = rng.uniform(50.0, 160.0, n)
    T = np.exp(rng.uniform(np.log(1 / 365), np.log(5.0), n))
    r = rng.uniform(-0.01, 0.1, n)
    q = rng.uniform(-0.01, 0.1, n)
    vol = rng.uniform(0.1, 0.8, n)
    cp = np.where(rng.random(n) < 0.5, 1, -1).astype(np.int8)
    return spot, K, T, r, q, vol, cp


def _kernel_price(spot, K, T, r, q, vol, cp, exercise=1.0):
    n = len(spot)
    D = np.exp(-r * T)
    p, st = np.empty(n), np.empty(n, np.int8)
    A.price(spot, K, T, D, q, np.full(n, exercise), vol, cp, p, st)
    return p, st, D


def _european(spot, K, T, D, q, vol, cp):
    n = len(spot)
    p, st = np.empty(n), np.empty(n, np.int8)
    black.bsm_price(spot, K, T, D, q, vol, cp, p, st)
    return p, st


def test_american_is_at_least_european_and_intrinsic():
    # published identity: early exercise is a right, never an obligation
    spot, K, T, r, q, vol, cp = _grid()
    p, st, D = _kernel_price(spot, K, T, r, q, vol, cp)
    e, _ = _european(spot, K, T, D, q, vol, cp)
    ok = st == S.OK
    assert ok.sum() > 300
    assert np.all(p[ok] >= e[ok] * (1 - 1e-14))
    assert np.all(p[ok] >= np.maximum(cp * (spot - K), 0.0)[ok])


def test_call_without_yield_is_the_european_call():
    # published identity (Merton 1973): an American call on a stock without dividends is
    # never exercised early
    spot, K, T, r, q, vol, cp = _grid()
    r = np.abs(r)
    q = np.zeros_like(q)
    cp = np.ones_like(cp)
    p, st, D = _kernel_price(spot, K, T, r, q, vol, cp)
    e, _ = _european(spot, K, T, D, q, vol, cp)
    assert np.all(st == S.OK)
    np.testing.assert_allclose(p, e, rtol=4e-16, atol=0)


def test_put_with_zero_rate_and_yield_is_the_european_put():
    # published identity: with r = 0 and q = 0 nothing is gained by exercising early
    spot, K, T, r, q, vol, cp = _grid()
    z = np.zeros_like(r)
    cp = -np.ones_like(cp)
    p, st, D = _kernel_price(spot, K, T, z, z, vol, cp)
    e, _ = _european(spot, K, T, D, z, vol, cp)
    assert np.all(st == S.OK)
    np.testing.assert_allclose(p, e, rtol=4e-16, atol=0)


def test_two_boundary_case_is_out_of_range_and_negative_rates_otherwise_european():
    # a put with q < r <= 0 has two exercise boundaries (Battauz, De Donno & Sbuelz 2015):
    # outside the method, so a status, not a number; with q >= r, r <= 0 it is European
    spot = np.array([100.0, 100.0, 100.0, 100.0])
    K = np.array([100.0, 100.0, 100.0, 100.0])
    T = np.ones(4)
    r = np.array([-0.01, -0.01, -0.02, 0.01])
    q = np.array([-0.03, 0.01, -0.01, -0.01])
    vol = np.full(4, 0.2)
    cp = np.array([-1, -1, 1, 1], np.int8)
    p, st, D = _kernel_price(spot, K, T, r, q, vol, cp)
    e, _ = _european(spot, K, T, D, q, vol, cp)
    assert list(st) == [S.OUT_OF_RANGE, S.OK, S.OUT_OF_RANGE, S.OK]
    assert np.isnan(p[0]) and np.isnan(p[2])
    assert p[1] == e[1] and p[3] == e[3]
    assert A.american_bsm_price(100.0, 100.0, 1.0, -0.01, -0.03, 0.2, -1.0) != \
        A.american_bsm_price(100.0, 100.0, 1.0, -0.01, -0.03, 0.2, -1.0)   # NaN


def test_deep_in_the_money_put_is_its_exercise_value():
    # common practice: below the exercise boundary the put is worth K - S
    p = _one(40.0, 100.0, 1.0, 0.08, 0.0, 0.2, -1)
    assert p == 60.0


def test_zero_vol_is_the_deterministic_value():
    # published identity: at zero vol the best exercise time of the forward path;
    # a put with q > r: max over t of K e^{-rt} - S e^{-qt}, here interior
    spot, K, T, r, q = 100.0, 101.0, 2.0, 0.01, 0.05
    t = np.linspace(0, T, 200001)
    best = np.max(K * np.exp(-r * t) - spot * np.exp(-q * t))
    assert abs(_one(spot, K, T, r, q, 0.0, -1) - best) < 1e-9


def test_scalar_price_for_jitted_callers():
    # the scalar entry point (scenario revaluation) gives the row kernel's value, and is
    # callable from other numba code
    @numba.njit
    def two(s):
        return A.american_bsm_price(s, 100.0, 1.0, 0.05, 0.0, 0.2, -1.0)

    assert two(100.0) == _one(100.0, 100.0, 1.0, 0.05, 0.0, 0.2, -1)


# ------------------------------------------------------------------ implied vol

def _iv(premium, spot, K, T, r, q, cp, exercise=1.0):
    n = len(spot)
    D = np.exp(-r * T)
    iv, st = np.empty(n), np.empty(n, np.int8)
    A.implied_vol(premium, spot, K, T, D, q, np.full(n, exercise), cp, iv, st)
    return iv, st


def test_implied_vols_of_reference_prices_come_back(references):
    # outside source: the reference's prices; their implied vols within what the price
    # accuracy allows (the price bar of test_prices_match_the_reference, twice, over vega)
    c = np.array(CASES)
    spot, K, T, r, q, vol = (c[:, j] for j in range(6))
    cp = c[:, 6].astype(np.int8)
    iv, st = _iv(np.array(references), spot, K, T, r, q, cp)
    vega = np.array([(_one(*cs[:5], cs[5] + 1e-4, cs[6]) - _one(*cs[:5], cs[5] - 1e-4,
                      cs[6])) / 2e-4 for cs in CASES])
    with np.errstate(divide="ignore"):       # vega 0 in the exercise region
        allowed = 2e-6 * np.maximum(np.array(references), 1e-3 * K) / vega
    ok = st == S.OK
    # rows whose time value is below 1e-4 of the premium (deep in the money: 1 day, or at
    # the edge of the exercise region) may have no vol, with status no_time_value
    lower = np.array([A._deterministic(*cs[:5], float(cs[6])) for cs in CASES])
    thin = np.array(references) - lower < 1e-4 * np.array(references)
    assert np.all(ok | (thin & (st == S.NO_TIME_VALUE))), list(zip(st, thin))
    assert ok.sum() >= len(CASES) - 2
    assert np.all(np.abs(iv[ok] - vol[ok]) <= allowed[ok]), np.abs(iv - vol) / allowed


def test_implied_vol_round_trip_on_a_grid():
    # the kernel's own prices back to their vols: every solvable row ok (0 not ok)
    spot, K, T, r, q, vol, cp = _grid(300, seed=5)
    r, q = np.abs(r), np.abs(q)
    p, st, D = _kernel_price(spot, K, T, r, q, vol, cp)
    lower = np.array([A._deterministic(*a, float(c)) for a, c in
                      zip(zip(spot, K, T, r, q), cp)])
    solvable = (st == S.OK) & (p - lower > 1e-6 * K)
    iv, sti = _iv(p, spot, K, T, r, q, cp)
    assert np.all(sti[solvable] == S.OK), np.unique(sti[solvable], return_counts=True)
    rel = np.abs(iv[solvable] - vol[solvable]) / vol[solvable]
    assert np.max(rel) < 1e-6


def test_implied_vol_statuses():
    spot = np.full(6, 100.0)
    K = np.array([120.0, 120.0, 120.0, 120.0, 120.0, 80.0])
    T = np.ones(6)
    r = np.full(6, 0.05)
    q = np.zeros(6)
    cp = np.array([-1, -1, -1, -1, -1, 1], np.int8)
    premium = np.array([19.0, 20.0, 120.0, np.nan, np.inf, 100.0])
    iv, st = _iv(premium, spot, K, T, r, q, cp)
    # below the exercise value, at it (nothing to invert), at the strike (the put's bound),
    # missing, infinite, a call at the spot (its bound)
    assert list(st) == [S.PREMIUM_TOO_LOW, S.NO_TIME_VALUE, S.PREMIUM_TOO_HIGH,
                        S.MISSING_INPUT, S.NON_FINITE_INPUT, S.PREMIUM_TOO_HIGH]
    assert np.all(np.isnan(iv))


def test_american_iv_is_below_the_european_iv_of_the_same_premium():
    # published identity: American >= European at every vol, so the vol that reaches a
    # premium is smaller for the American option
    spot, K, T, r, q, vol, cp = _grid(200, seed=8)
    r, q = np.abs(r), np.abs(q)
    p, st, D = _kernel_price(spot, K, T, r, q, vol, cp)
    a, sa = _iv(p, spot, K, T, r, q, cp)
    e, se = _iv(p, spot, K, T, r, q, cp, exercise=0.0)
    both = (sa == S.OK) & (se == S.OK)
    assert both.sum() > 150
    assert np.all(a[both] <= e[both] * (1 + 1e-12))


# ------------------------------------------------------------------ Greeks

GREEK_CASES = [
    (100.0, 100.0, 1.0, 0.05, 0.0, 0.25, -1),
    (100.0, 110.0, 0.5, 0.06, 0.02, 0.3, -1),
    (100.0, 95.0, 2.0, 0.02, 0.06, 0.3, 1),
]


def _greeks(c):
    spot, K, T, r, q, vol, cp = (np.array([x]) for x in c)
    mask = kgreeks.greek_mask(list(A.AMERICAN_GREEKS), "bsm")
    out, st = np.empty((6, 1)), np.empty(1, np.int8)
    A.greeks(spot, K, T, np.exp(-r * T), q, np.ones(1), vol, cp.astype(np.int8), mask, out,
             st)
    assert st[0] == S.OK
    return dict(zip(A.AMERICAN_GREEKS, out[:, 0]))


@pytest.mark.parametrize("case", GREEK_CASES)
def test_greeks_match_finite_differences_of_the_reference(case):
    # outside source: the Crank-Nicolson reference: delta and gamma from its grid, the
    # others by central differences of its prices
    spot, K, T, r, q, v, cp = case

    def ref(**kw):
        a = dict(spot=spot, K=K, T=T, r=r, q=q, v=v)
        a.update(kw)
        return _reference(a["spot"], a["K"], a["T"], a["r"], a["q"], a["v"], cp, n=1000)

    g = _greeks(case)

    def fd(name, h):
        key = {"vega": "v", "theta": "T", "rho": "r", "div_rho": "q"}[name]
        base = dict(spot=spot, v=v, T=T, r=r, q=q)[key]
        up, dn = ref(**{key: base + h}), ref(**{key: base - h})
        return (dn - up) / (2.0 * h) if name == "theta" else (up - dn) / (2.0 * h)

    steps = {"vega": 1e-3, "theta": 1e-3, "rho": 1e-3, "div_rho": 1e-3}
    scale = {"delta": 1.0, "gamma": 1.0 / spot, "vega": spot * math.sqrt(T),
             "theta": spot, "rho": spot * T, "div_rho": spot * T}
    want = dict(zip(("delta", "gamma"), _reference_delta_gamma(*case)))
    for name, h in steps.items():
        # Richardson over steps h and 2h (central differences are second order)
        want[name] = (4.0 * fd(name, h) - fd(name, 2.0 * h)) / 3.0
    for name in A.AMERICAN_GREEKS:
        assert abs(g[name] - want[name]) <= 1e-4 * scale[name], (name, g[name], want[name])


def test_exercise_region_greeks():
    # common practice: below the put's boundary V = K - S: delta -1, the rest 0
    g = _greeks((40.0, 100.0, 1.0, 0.08, 0.0, 0.2, -1))
    assert g["delta"] == -1.0 and g["gamma"] == 0.0 and g["theta"] == 0.0


# ------------------------------------------------------------------ bindings

def _table(n=12, exercise=None):
    rng = np.random.default_rng(2)
    cols = dict(spot=np.full(n, 100.0), strike=rng.uniform(80, 120, n),
                expiry_years=rng.uniform(0.1, 2.0, n), rate=np.full(n, 0.04),
                div_yield=np.full(n, 0.03), vol=rng.uniform(0.15, 0.5, n),
                is_call=rng.random(n) < 0.5)
    if exercise is not None:
        cols["exercise"] = exercise
    return pa.table(cols)


def test_exercise_column_mixes_styles_row_by_row():
    words = ["american", "European", "AMERICAN", " european ", None, "bermudan"] * 2
    t = _table(exercise=words)
    before = t.to_pydict()
    out = volsweep.price(t)
    assert t.to_pydict() == before                       # input not mutated
    assert out.num_rows == t.num_rows
    amer = volsweep.price(t.drop(["exercise"]), exercise="american")
    euro = volsweep.price(t.drop(["exercise"]))
    status = out.column("status").to_pylist()
    for i, w in enumerate(words):
        if w is None or w.strip().lower() not in ("american", "european"):
            assert status[i] == "missing_input" and out.column("price")[i].as_py() is None
            continue
        want = amer if w.strip().lower() == "american" else euro
        assert out.column("price")[i].as_py() == want.column("price")[i].as_py(), i


def test_exercise_argument_and_column_together_is_an_error():
    t = _table(exercise=["american"] * 12)
    with pytest.raises(volsweep.OptionError, match="exercise"):
        volsweep.price(t, exercise="european")
    out = volsweep.price(t, exercise="european", columns={"exercise": None})
    assert out.column("status").to_pylist() == ["ok"] * 12


def test_american_needs_a_model_that_has_it():
    t = _table().rename_columns(["forward", "strike", "expiry_years", "rate", "div_yield",
                                 "vol", "is_call"]).drop(["div_yield"])
    with pytest.raises(ValueError, match="no American exercise"):
        volsweep.price(t, model="black76", exercise="american")
    with pytest.raises(ValueError, match="unknown exercise"):
        volsweep.price(_table(), exercise="bermudan")


def test_american_greeks_are_the_six_it_defines():
    t = _table()
    g = volsweep.greeks(t, exercise="American")
    assert g.column_names[-7:] == list(A.AMERICAN_GREEKS) + ["status"]
    with pytest.raises(ValueError, match="vanna is not defined"):
        volsweep.greeks(t, which=["vanna"], exercise="american")
    few = volsweep.greeks(t, which=["vega", "delta"], exercise="american", units="desk")
    full = volsweep.greeks(t, exercise="american", units="desk")
    for name in ("vega", "delta"):
        assert few.column(name).equals(full.column(name))


def test_sweep_and_bid_ask_quotes_with_american_exercise():
    t = _table()
    prices = volsweep.price(t, exercise="american").column("price")
    quotes = t.drop(["vol"]).append_column("premium", prices)
    sw = volsweep.sweep(quotes, exercise="american", which=["delta", "vega"])
    assert sw.column("status").to_pylist() == ["ok"] * 12
    np.testing.assert_allclose(sw.column("iv").to_numpy(), t.column("vol").to_numpy(),
                               rtol=1e-7)
    ba = quotes.drop(["premium"]).append_column(
        "bid", pa.compute.multiply(prices, 0.99)).append_column(
        "ask", pa.compute.multiply(prices, 1.01))
    out = volsweep.implied_vol(ba, exercise="american")
    assert out.column("status").to_pylist() == ["ok"] * 12
    iv = out.column("iv").to_numpy()
    assert np.all(out.column("iv_bid").to_numpy() < iv)
    assert np.all(out.column("iv_ask").to_numpy() > iv)


def test_cli_exercise_flag(tmp_path):
    import pyarrow.parquet as pq
    from volsweep.cli import main

    src = tmp_path / "in.parquet"
    pq.write_table(_table(), src)
    out = tmp_path / "out.parquet"
    assert main(["price", str(src), "-o", str(out), "--exercise", "american"]) == 0
    got = pq.read_table(out).column("price")
    assert got.equals(volsweep.price(_table(), exercise="american").column("price"))
