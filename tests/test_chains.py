"""Chain operations: implied forwards by put-call parity, the model-free variance strip,
constant-maturity variance (bindings/chains.py, kernel/chains.py).

Outside sources, named at each check:
* Black-76 prices from scipy.special.ndtr, written out here (not our kernel);
* put-call parity, C - P = D (F - K) (a published identity);
* the log-contract integral (2 / (T D)) [int_0^F P/K^2 dK + int_F^inf C/K^2 dK]
  (Demeterfi, Derman, Kamal and Zou 1999; Britten-Jones and Neuberger 2000) computed with
  scipy.integrate.quad, which for a flat smile equals sigma^2;
* numpy's least squares (np.polyfit) as the plain, non-robust fit we must beat.
Invented chains only (fictional underlyings).
"""

import math

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from scipy import integrate
from scipy.special import ndtr

import volsweep
from volsweep.kernel import chains as kchains


# ------------------------------------------------------------------ reference prices

def black(F, K, T, D, vol, call):
    """Black-76 price, scipy.special.ndtr (the outside reference for these tests)."""
    F, K, vol = np.asarray(F, float), np.asarray(K, float), np.asarray(vol, float)
    s = vol * np.sqrt(T)
    d1 = np.log(F / K) / s + 0.5 * s
    d2 = d1 - s
    w = np.where(call, 1.0, -1.0)
    return D * w * (F * ndtr(w * d1) - K * ndtr(w * d2))


def svi_vol(K, F, T, a=0.02, b=0.12, rho=-0.5, m=0.05, sig=0.2):
    """Raw SVI total variance (Gatheral), as an implied vol at strike K."""
    k = np.log(np.asarray(K, float) / F)
    w = a + b * (rho * (k - m) + np.sqrt((k - m) ** 2 + sig ** 2))
    return np.sqrt(w / T)


def chain(F, D, T, strikes, vol=0.25, name="QOXA", expiry_years=None):
    """One expiry's chain, call then put at each strike, premiums at Black prices."""
    K = np.repeat(np.asarray(strikes, float), 2)
    call = np.tile([True, False], len(strikes))
    v = vol(K) if callable(vol) else np.full(K.size, vol)
    return {"underlying": [name] * K.size,
            "expiry_years": np.full(K.size, T if expiry_years is None else expiry_years),
            "strike": K, "is_call": call, "premium": black(F, K, T, D, v, call)}


def table(*chains):
    cols = {}
    for c in chains:
        for k, v in c.items():
            cols.setdefault(k, []).extend(list(v))
    return pa.table(cols)


def rel(a, b):
    return abs(a / b - 1.0)


BY = ("underlying", "expiry_years")


# ------------------------------------------------------------------ exact chains

CASES = [  # F, D, T, strikes
    (103.7, 0.97, 0.5, np.arange(60.0, 160.0, 2.5)),
    (2650.0, 0.995, 0.05, np.arange(2400.0, 2900.0, 10.0)),
    (7.35, 0.88, 3.0, np.arange(2.0, 20.0, 0.5)),
    (48.2, 1.004, 1.2, np.arange(20.0, 90.0, 5.0)),          # a negative rate
]


@pytest.mark.parametrize("F, D, T, strikes", CASES)
def test_exact_mids_give_forward_and_discount_within_1e9(F, D, T, strikes):
    # reference: Black-76 prices from scipy.special.ndtr at a known F and D
    out = volsweep.implied_forwards(table(chain(F, D, T, strikes)), by=BY)
    assert out["status"].to_pylist() == ["ok"]
    assert rel(out["forward"][0].as_py(), F) < 1e-9
    assert rel(out["discount"][0].as_py(), D) < 1e-9
    assert out["pairs_used"][0].as_py() == len(strikes)
    assert out["expiry_years"][0].as_py() == T


@pytest.mark.parametrize("F, D, T, strikes", CASES)
def test_exact_mids_with_given_discount_fit_the_forward_only(F, D, T, strikes):
    # reference: Black-76 (scipy); the discount comes from the rate column
    t = table(chain(F, D, T, strikes))
    t = t.append_column("rate", pa.array(np.full(t.num_rows, -math.log(D) / T)))
    out = volsweep.implied_forwards(t, by=BY)
    assert out["status"].to_pylist() == ["ok"]
    assert rel(out["forward"][0].as_py(), F) < 1e-9
    assert rel(out["discount"][0].as_py(), D) < 1e-14       # e^{-rT} of the given rate


def test_fitted_line_satisfies_put_call_parity_on_every_pair():
    # published identity (put-call parity): C - P = D (F - K) at every strike
    F, D, T = 81.0, 0.96, 0.75
    strikes = np.arange(50.0, 120.0, 1.0)
    c = chain(F, D, T, strikes, vol=lambda K: svi_vol(K, F, T))
    out = volsweep.implied_forwards(table(c), by=BY)
    f, d = out["forward"][0].as_py(), out["discount"][0].as_py()
    C, P = c["premium"][0::2], c["premium"][1::2]
    assert np.max(np.abs(C - P - d * (f - strikes))) < 1e-11 * F
    assert out["parity_residual"][0].as_py() < 1e-11 * F


def test_spot_gives_the_implied_yield():
    # common practice: F = S exp((r - q) T), so q = -ln(D F / S) / T
    S, r, q, T = 50.0, 0.03, 0.045, 0.8
    F, D = S * math.exp((r - q) * T), math.exp(-r * T)
    t = table(chain(F, D, T, np.arange(30.0, 75.0, 1.0)))
    t = t.append_column("spot", pa.array(np.full(t.num_rows, S)))
    out = volsweep.implied_forwards(t, by=BY)
    assert out.column_names == ["underlying", "expiry_years", "forward", "discount",
                                "implied_yield", "pairs_used", "parity_residual", "status"]
    assert out["implied_yield"][0].as_py() == pytest.approx(q, abs=1e-9)


# ------------------------------------------------------------------ noisy chains

def noisy_chain(F, D, T, strikes, rng, stale=0.1, tick=0.01, name="QOXA"):
    """Black prices quoted bid/ask on a tick grid (bid floored, ask ceiled around the price
    +- 1% of it, at least a tick), then ``stale`` of the pairs with one side left at
    the price of before the underlying rose 3% (not refreshed after the move)."""
    c = chain(F, D, T, strikes, vol=lambda K: svi_vol(K, F, T), name=name)
    p = c["premium"].copy()
    n = len(strikes)
    bad = rng.choice(n, int(stale * n), replace=False) * 2 + rng.integers(0, 2, int(stale * n))
    K, call = c["strike"][bad], c["is_call"][bad]
    moved = F / 1.03
    p[bad] = black(moved, K, T, D, svi_vol(K, moved, T), call)
    half = np.maximum(0.01 * p, tick)
    bid = np.floor((p - half) / tick) * tick
    ask = np.ceil((p + half) / tick) * tick
    bid = np.where(bid <= 0.0, tick, bid)
    del c["premium"]
    c["bid"], c["ask"] = bid, ask
    return c, bad


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_noisy_chain_with_stale_quotes_lands_within_the_quotes_noise(seed):
    # reference: Black-76 (scipy) at a known F, D; the noise: each pair pins F to within
    # (h_C + h_P) / D (its half-spreads), so the fit must land inside the median of that
    F, D, T = 97.3, 0.975, 0.6
    strikes = np.arange(55.0, 150.0, 1.0)
    c, bad = noisy_chain(F, D, T, strikes, np.random.default_rng(seed))
    out = volsweep.implied_forwards(table(c), by=BY)
    h = (c["ask"] - c["bid"]) / 2
    pair_noise = np.median((h[0::2] + h[1::2]) / D)
    f = out["forward"][0].as_py()
    assert out["status"].to_pylist() == ["ok"]
    assert abs(f - F) < pair_noise
    assert abs(out["discount"][0].as_py() - D) < 0.002
    # the stale pairs are left out: used pairs at most all minus the spoiled ones, plus a
    # few stale quotes too close to the line to tell
    assert out["pairs_used"][0].as_py() <= len(strikes) - len(bad) // 2
    # the plain least-squares line (numpy) through the same quotes misses by more: the
    # check above can fail
    y = (c["bid"][0::2] + c["ask"][0::2]) / 2 - (c["bid"][1::2] + c["ask"][1::2]) / 2
    slope, icpt = np.polyfit(strikes, y, 1)
    assert abs(-icpt / slope - F) > 2 * abs(f - F)


def test_given_discount_noisy_chain_within_noise():
    # reference: Black-76 (scipy); discount from the rate column
    F, D, T = 97.3, 0.975, 0.6
    strikes = np.arange(55.0, 150.0, 1.0)
    c, _ = noisy_chain(F, D, T, strikes, np.random.default_rng(9))
    t = table(c)
    t = t.append_column("discount", pa.array(np.full(t.num_rows, D)))
    out = volsweep.implied_forwards(t, by=BY)
    h = (c["ask"] - c["bid"]) / 2
    assert abs(out["forward"][0].as_py() - F) < np.median((h[0::2] + h[1::2]) / D)


def test_attached_forwards_make_call_and_put_vols_agree():
    # reference: the chain is made from one SVI smile (scipy Black prices), so the call
    # and the put at one strike have one vol; on the implied forward and discount their
    # mid vols must agree within the quotes' vol uncertainty (iv_spread_uncertainty)
    F, D, T = 97.3, 0.975, 0.6
    strikes = np.arange(70.0, 130.0, 1.0)
    c, bad = noisy_chain(F, D, T, strikes, np.random.default_rng(4), stale=0.05)
    t = table(c)
    withf = volsweep.implied_forwards(t, by=BY, attach=True)
    assert withf.column_names == t.column_names + ["forward", "discount", "forward_status"]
    assert withf.select(t.column_names).equals(t)          # input kept, rows in order
    iv = volsweep.implied_vol(withf, model="black76")
    clean = np.ones(len(strikes), bool)
    clean[bad // 2] = False
    vc, vp = (np.asarray(iv["iv"].to_pylist()[j::2], float) for j in (0, 1))
    uc, up = (np.asarray(iv["iv_spread_uncertainty"].to_pylist()[j::2], float)
              for j in (0, 1))
    gap = np.abs(vc - vp)[clean]
    assert np.all(gap <= (uc + up)[clean])
    # on a forward 0.5% off, many pairs disagree beyond their uncertainty
    off = t.append_column("forward", pa.array(np.full(t.num_rows, F * 1.005))).append_column(
        "discount", pa.array(np.full(t.num_rows, D)))
    iv2 = volsweep.implied_vol(off, model="black76")
    vc2, vp2 = (np.asarray(iv2["iv"].to_pylist()[j::2], float) for j in (0, 1))
    assert np.mean((np.abs(vc2 - vp2) > uc + up)[clean]) > 0.5


# ------------------------------------------------------------------ groups and statuses

def test_every_group_gets_a_row_in_key_order_with_its_status():
    # statuses are our own words (kernel/chains.py NAMES); prices from Black-76 (scipy)
    ok = chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0), name="KIZO")
    few = chain(100.0, 0.98, 0.5, [95.0, 100.0], name="BAXE")
    expired = chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0), name="DUJA",
                    expiry_years=0.0)
    wild = chain(100.0, 0.5, 0.1, np.arange(80.0, 121.0, 5.0), name="FEQI")   # r = 693%
    mixed = chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0), name="GOZU")
    mixed["underlying"] = ["GOZU"] * len(mixed["strike"])
    t = table(ok, few, expired, wild, mixed)
    # GOZU's rows disagree on the time when grouped by underlying only
    T = t["expiry_years"].to_numpy().copy()
    T[-1] = 0.6
    t = t.set_column(1, "expiry_years", pa.array(T))
    before = t.to_pydict()
    out = volsweep.implied_forwards(t, by="underlying")
    assert t.to_pydict() == before                        # input not mutated
    assert out["underlying"].to_pylist() == ["BAXE", "DUJA", "FEQI", "GOZU", "KIZO"]
    assert out["status"].to_pylist() == ["too_few_pairs", "expired",
                                         "discount_out_of_range", "inconsistent_inputs", "ok"]
    assert out["forward"].null_count == 4 and out["forward"][4].is_valid
    assert out["pairs_used"].to_pylist()[0] == 2


def test_missing_time_bad_discount_and_nulls_group_last():
    c = chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0), name="KIZO")
    n = len(c["strike"])
    t = table(c, dict(c, underlying=["LEXO"] * n), dict(c, underlying=[None] * n))
    T = t["expiry_years"].to_numpy().copy()
    T[n:2 * n] = np.nan                                    # LEXO: no time
    disc = np.full(t.num_rows, 0.98)
    disc[:n] = -1.0                                        # KIZO: a bad discount
    t = t.set_column(1, "expiry_years", pa.array(T)).append_column("discount",
                                                                   pa.array(disc))
    out = volsweep.implied_forwards(t, by="underlying")
    assert out["underlying"].to_pylist() == ["KIZO", "LEXO", None]
    assert out["status"].to_pylist() == ["bad_discount", "missing_time", "ok"]


def test_bad_quotes_are_left_out_of_the_pairs():
    # a crossed quote, a zero bid, a one-sided quote: each pair is left out
    F, D, T = 100.0, 0.98, 0.5
    strikes = np.arange(80.0, 121.0, 2.0)
    c = chain(F, D, T, strikes)
    p = c.pop("premium")
    bid, ask = p - 0.01, p + 0.01
    bid[0], ask[0] = ask[0] + 0.05, bid[0]               # crossed
    bid[3] = 0.0                                          # zero bid
    ask[4] = np.nan                                       # one-sided
    c["bid"], c["ask"] = bid, ask
    out = volsweep.implied_forwards(table(c), by=BY)
    assert out["pairs_used"][0].as_py() == len(strikes) - 3
    assert rel(out["forward"][0].as_py(), F) < 1e-6


def test_forward_not_positive():
    # C - P rising in K: a line whose forward is negative
    K = np.arange(10.0, 20.0, 1.0)
    t = pa.table({"underlying": ["ZOXE"] * 20, "expiry_years": [1.0] * 20,
                  "strike": np.repeat(K, 2), "is_call": [True, False] * 10,
                  "premium": np.ravel(np.column_stack([np.full(10, 1.0), 1.0 + 0.9 * (K + 5)]))})
    out = volsweep.implied_forwards(t, by=BY)
    assert out["status"].to_pylist() == ["forward_not_positive"]


def test_shuffled_and_chunked_inputs_give_the_same_groups():
    rng = np.random.default_rng(3)
    chains_ = [noisy_chain(100.0 + i, 0.97, 0.25 * (1 + i % 3), np.arange(70.0, 140.0, 2.0),
                           rng, name=f"Q{i % 4}XA")[0] for i in range(12)]
    t = table(*chains_)
    plain = volsweep.implied_forwards(t, by=BY)
    shuffled = t.take(pa.array(rng.permutation(t.num_rows)))
    assert volsweep.implied_forwards(shuffled, by=BY).equals(plain)
    chunked = pa.Table.from_batches(t.to_batches(max_chunksize=37))
    assert volsweep.implied_forwards(chunked, by=BY).equals(plain)
    assert plain.num_rows == len({(c["underlying"][0], c["expiry_years"][0]) for c in chains_})


def test_expiry_timestamps_and_dictionary_keys():
    import datetime as dt
    c = chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0))
    n = len(c["strike"])
    t = pa.table({"underlying": pa.array(c["underlying"]).dictionary_encode(),
                  "expiry": pa.array([dt.datetime(2031, 9, 12, 20)] * n,
                                     pa.timestamp("ms", tz="UTC")),
                  "strike": c["strike"], "is_call": c["is_call"], "premium": c["premium"]})
    out = volsweep.implied_forwards(t, as_of="2031-03-14T20:00:00Z")
    assert out.column_names[:3] == ["underlying", "expiry", "expiry_years"]
    assert out.schema.field("underlying").type == t.schema.field("underlying").type
    assert out["expiry_years"][0].as_py() == pytest.approx(182 / 365, abs=1e-15)


def test_schema_errors_name_the_column():
    t = table(chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0)))
    with pytest.raises(ValueError, match="'strike'"):
        volsweep.implied_forwards(t.drop_columns(["strike"]), by=BY)
    with pytest.raises(ValueError, match="'expiry'"):
        volsweep.implied_forwards(t)                       # default by= needs 'expiry'
    with pytest.raises(volsweep.OptionError, match="columns="):
        volsweep.implied_forwards(t, by=BY, columns={"strike": "K"})
    with pytest.raises(ValueError, match="'forward'"):
        volsweep.implied_forwards(t.append_column("forward", pa.array([1.0] * t.num_rows)),
                                  by=BY, attach=True)
    with pytest.raises(ValueError, match="min_pairs"):
        volsweep.implied_forwards(t, by=BY, min_pairs=1)


def test_empty_input_gives_empty_table_with_the_columns():
    t = table(chain(100.0, 0.98, 0.5, np.arange(80.0, 121.0, 5.0))).slice(0, 0)
    out = volsweep.implied_forwards(t, by=BY)
    assert out.num_rows == 0
    assert out.column_names == ["underlying", "expiry_years", "forward", "discount",
                                "pairs_used", "parity_residual", "status"]


# ------------------------------------------------------------------ the variance strip

def log_contract_variance(F, D, T, vol_of_K):
    """(2 / (T D)) [int_0^F P / K^2 dK + int_F^inf C / K^2 dK] by scipy.integrate.quad,
    with Black-76 prices (scipy) at vol_of_K(K): the model-free implied variance."""
    put = integrate.quad(lambda K: black(F, K, T, D, vol_of_K(K), False) / K ** 2, 1e-9 * F,
                         F, limit=400, epsabs=0, epsrel=1e-12)[0]
    call = integrate.quad(lambda K: black(F, K, T, D, vol_of_K(K), True) / K ** 2, F,
                          np.inf, limit=400, epsabs=0, epsrel=1e-12)[0]
    return 2.0 / (T * D) * (put + call)


def dense_chain(F, D, T, vol_of_K, step):
    """A dense listed grid (``step`` apart) out to the strikes whose out-of-the-money
    price falls below 1e-10 of the forward on either side."""
    lo = F
    while black(F, lo, T, D, vol_of_K(lo), False) > 1e-10 * F and lo > 2 * step:
        lo *= 0.9
    hi = F
    while black(F, hi, T, D, vol_of_K(hi), True) > 1e-10 * F:
        hi *= 1.1
    strikes = np.arange(math.ceil(lo / step) * step, hi, step)
    return chain(F, D, T, strikes, vol=vol_of_K)


@pytest.mark.parametrize("T, vol", [(0.1, 0.2), (0.5, 0.3), (2.0, 0.45)])
def test_strip_matches_log_contract_integral_flat_smile(T, vol):
    # reference: the log-contract integral by scipy.integrate.quad over Black-76 prices,
    # which for a flat smile equals sigma^2 (Demeterfi et al. 1999)
    F, D = 100.0, math.exp(-0.03 * T)
    flat = lambda K: np.full(np.shape(K), vol)        # noqa: E731
    ref = log_contract_variance(F, D, T, flat)
    assert ref == pytest.approx(vol ** 2, rel=1e-8)
    t = table(dense_chain(F, D, T, flat, step=0.5))
    out = volsweep.model_free_variance(t, by=BY)
    assert out["status"].to_pylist() == ["ok"]
    assert rel(out["variance"][0].as_py(), ref) < 2e-3
    assert rel(out["forward"][0].as_py(), F) < 1e-9


@pytest.mark.parametrize("T", [0.25, 1.0])
def test_strip_matches_log_contract_integral_svi_smile(T):
    # reference: the log-contract integral by scipy.integrate.quad over Black-76 prices on
    # a raw SVI smile (Gatheral), forward and discount given as columns
    F, D = 100.0, math.exp(-0.02 * T)
    smile = lambda K: svi_vol(K, F, T, a=0.02 * T, b=0.15 * math.sqrt(T))   # noqa: E731
    ref = log_contract_variance(F, D, T, smile)
    c = dense_chain(F, D, T, smile, step=0.5)
    t = table(c).append_column("forward", pa.array(np.full(len(c["strike"]), F)))
    t = t.append_column("discount", pa.array(np.full(t.num_rows, D)))
    out = volsweep.model_free_variance(t, by=BY, forwards="columns")
    assert out["status"].to_pylist() == ["ok"]
    assert rel(out["variance"][0].as_py(), ref) < 2e-3
    implied = volsweep.model_free_variance(t.drop_columns(["forward", "discount"]), by=BY)
    assert rel(implied["variance"][0].as_py(), ref) < 2e-3


def test_strip_error_shrinks_on_a_finer_grid():
    # reference: the integral (scipy quad); a midpoint-type rule's error falls with h^2
    F, D, T, vol = 100.0, 0.99, 0.25, 0.3
    flat = lambda K: np.full(np.shape(K), vol)        # noqa: E731
    ref = log_contract_variance(F, D, T, flat)
    errs = []
    for step in (5.0, 2.5):
        out = volsweep.model_free_variance(table(dense_chain(F, D, T, flat, step)), by=BY)
        errs.append(rel(out["variance"][0].as_py(), ref))
    assert errs[1] < errs[0] / 3


def test_strip_statuses():
    good = chain(100.0, 0.98, 0.5, np.arange(60.0, 150.0, 2.5), name="KIZO")
    above = chain(100.0, 0.98, 0.5, np.arange(60.0, 150.0, 2.5), name="LEXO")
    t = table(good, above)
    # LEXO: forward given below every strike that is quoted
    fwd = np.r_[np.full(len(good["strike"]), 100.0), np.full(len(above["strike"]), 10.0)]
    t = t.append_column("forward", pa.array(fwd)).append_column(
        "discount", pa.array(np.full(t.num_rows, 0.98)))
    out = volsweep.model_free_variance(t, by=BY, forwards="columns")
    assert out["status"].to_pylist() == ["ok", "too_few_strikes"]
    # a forward fit that fails passes its status on
    few = table(chain(100.0, 0.98, 0.5, [95.0, 100.0]))
    assert volsweep.model_free_variance(few, by=BY)["status"].to_pylist() == ["too_few_pairs"]


def test_strip_stops_after_two_strikes_without_a_quote():
    # exchange-style truncation: two missing out-of-the-money quotes in a row end the
    # strip; a single gap is bridged
    F, D, T = 100.0, 0.98, 0.5
    strikes = np.arange(70.0, 131.0, 2.5)
    c = chain(F, D, T, strikes)
    p = c["premium"]
    K = c["strike"]
    put = ~c["is_call"]
    p[put & (K == 85.0)] = 0.0                 # one gap: bridged
    p[put & ((K == 77.5) | (K == 75.0))] = 0.0  # two in a row: the strip ends above them
    c["premium"] = p
    t = table(c)
    t = t.append_column("forward", pa.array(np.full(t.num_rows, F))).append_column(
        "discount", pa.array(np.full(t.num_rows, D)))
    out = volsweep.model_free_variance(t, by=BY, forwards="columns")
    used = strikes[((strikes > 77.5) & (strikes != 85.0)) | (strikes >= 100.0)]
    assert out["strikes_used"][0].as_py() == used.size
    # the rule written out (puts below K0 = 100, calls above, their average at K0; each
    # strike weighs half the distance between its neighbours in the strip)
    call, put = c["premium"][0::2], c["premium"][1::2]
    q = np.array([put[strikes == k][0] if k < 100.0 else call[strikes == k][0] if k > 100.0
                  else 0.5 * (put[strikes == k][0] + call[strikes == k][0]) for k in used])
    dk = np.r_[used[1] - used[0], (used[2:] - used[:-2]) / 2, used[-1] - used[-2]]
    expected = 2.0 / (T * D) * np.sum(dk / used ** 2 * q)
    assert out["variance"][0].as_py() == pytest.approx(expected, rel=1e-12)


# ------------------------------------------------------------------ constant maturity

def test_constant_maturity_is_linear_in_total_variance():
    # the definition, written out: w = var * T linear in T between the bracketing expiries
    t = pa.table({"underlying": ["KIZO"] * 3 + ["LEXO"] * 2,
                  "expiry_years": [10 / 365, 24 / 365, 52 / 365, 0.5, 1.0],
                  "variance": [0.09, 0.0784, 0.0729, 0.04, 0.05],
                  "status": ["ok"] * 5})
    out = volsweep.constant_maturity_variance(t, days=[30, 7, 52])
    assert out.column_names == ["underlying", "horizon_days", "horizon_years", "variance",
                                "vol", "near_expiry_years", "far_expiry_years", "status"]
    T1, T2, v1, v2, tau = 24 / 365, 52 / 365, 0.0784, 0.0729, 30 / 365
    w = v1 * T1 + (v2 * T2 - v1 * T1) * (tau - T1) / (T2 - T1)
    assert out["variance"][0].as_py() == pytest.approx(w / tau, rel=1e-14)
    assert out["vol"][0].as_py() == pytest.approx(math.sqrt(w / tau), rel=1e-14)
    assert out["status"].to_pylist() == ["ok", "before_first_expiry", "ok",
                                         "before_first_expiry", "before_first_expiry",
                                         "before_first_expiry"]
    assert out["variance"][2].as_py() == pytest.approx(0.0729, rel=1e-14)   # an expiry
    ext = volsweep.constant_maturity_variance(t, days=7, extrapolate=True)
    assert ext["status"].to_pylist() == ["extrapolated", "extrapolated"]
    assert ext["variance"].to_pylist() == [0.09, 0.04]


def test_constant_maturity_statuses_and_unusable_rows():
    t = pa.table({"underlying": ["KIZO", "KIZO", "LEXO"], "expiry_years": [0.1, 0.2, 0.3],
                  "variance": [0.04, None, 0.05], "status": ["ok", "ok", "too_few_pairs"]})
    out = volsweep.constant_maturity_variance(t, days=[30, 365])
    assert out["status"].to_pylist() == ["before_first_expiry", "after_last_expiry",
                                         "no_expiries", "no_expiries"]
    assert out["variance"].null_count == 4


# ------------------------------------------------------------------ kernel sentences

def test_median_by_selection_against_numpy():
    # reference: numpy.median
    rng = np.random.default_rng(0)
    for m in (1, 2, 3, 10, 101, 1000):
        v = rng.normal(size=m)
        v[rng.integers(0, m, m // 3)] = 0.5       # ties
        ref = np.median(v)
        assert kchains._median(v.copy(), 0, m) == ref


def test_merge_sort_of_rows_against_numpy_stable_sort():
    # reference: numpy's stable argsort by strike (NaN last): rows of one strike keep
    # their order
    rng = np.random.default_rng(1)
    for n in (1, 2, 7, 400, 1000):
        K = rng.integers(0, 30, n).astype(float)
        K[rng.integers(0, n, n // 20)] = np.nan
        idx = rng.permutation(n).astype(np.int64)
        key = np.where(np.isnan(K[idx]), np.inf, K[idx])
        ref = idx[np.argsort(key, kind="stable")]
        got = idx.copy()
        kchains._sort_rows(got, 0, n, K, np.empty(n), np.empty(n), np.empty(n, np.int64))
        assert np.array_equal(got, ref)


def test_readme_lists_every_group_status_in_order():
    # our own documentation against kernel/chains.py NAMES (no outside source involved)
    from pathlib import Path
    import re
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    rows = re.findall(r"^\| (\d+) \| `(\w+)` \| [^|]+\|\s*$",
                      text.split("### Chain outputs and group statuses")[1].split("\n### ")[0],
                      flags=re.M)
    assert [(int(c), w) for c, w in rows] == list(enumerate(kchains.NAMES))


def test_many_key_combinations_group_by_sorting_and_keep_every_group():
    # more key combinations than counting can hold: the sort path; every row its own group
    rng = np.random.default_rng(5)
    n = 300
    t = pa.table({"a": rng.permutation(n).astype(float), "b": rng.permutation(n) * 1.5,
                  "strike": np.full(n, 100.0), "is_call": rng.random(n) < 0.5,
                  "premium": np.full(n, 1.0), "expiry_years": np.full(n, 0.5)})
    out = volsweep.implied_forwards(t, by=("a", "b"))
    assert out.num_rows == n
    assert out["a"].to_pylist() == sorted(t["a"].to_pylist())
    assert set(out["status"].to_pylist()) == {"too_few_pairs"}
    assert volsweep.implied_forwards(t.take(pa.array(rng.permutation(n))),
                                     by=("a", "b")).equals(out)


def test_tick_grid_ties_do_not_collapse_the_scale():
    # reference: Black-76 (scipy).  Mids on a 0.005 grid sit a quarter tick above or
    # below the true line; when more than half sit on one side, a MAD of 0 would keep
    # only those.  Every clean pair must be used.
    F, D, T = 97.3, 0.975, 0.6
    strikes = np.arange(55.0, 150.0, 1.0)
    c, bad = noisy_chain(F, D, T, strikes, np.random.default_rng(3))
    out = volsweep.implied_forwards(table(c), by=BY)
    n_bad_pairs = len(set((bad // 2).tolist()))
    assert out["pairs_used"][0].as_py() >= len(strikes) - n_bad_pairs
    assert out["parity_residual"][0].as_py() > 0.001        # the quarter ticks


def test_kernel_entry_checks_its_arguments():
    K = np.array([90.0, 90.0, 110.0, 110.0])
    cp = np.array([1, -1, 1, -1])                      # int64 codes are accepted
    p = np.array([12.0, 2.0, 3.0, 12.5])
    T = np.full(4, 0.5)
    out = kchains.forwards([0, 4], np.arange(4), K, cp, p, p, T, quoted=False, min_pairs=2)
    assert kchains.NAMES[out["status"][0]] == "ok"
    with pytest.raises(ValueError, match="order"):
        kchains.forwards([0, 4], np.array([0, 1, 2, 4]), K, cp, p, p, T, quoted=False)
    with pytest.raises(ValueError, match="starts"):
        kchains.forwards([0, 5], np.arange(4), K, cp, p, p, T, quoted=False)
