"""Tests of the synthetic snapshot generator (data_gen)."""

import datetime as dt

import mpmath
import numpy as np
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest

from volsweep import data_gen
from volsweep.data_gen import quotes, svi
from volsweep.data_gen.snapshot import parse_as_of
from volsweep.data_gen.universe import atm_vol, listed_expiries, make_universe, smile_params

N = 200_001          # odd on purpose: the last contract has its call only


def _np(table, name):
    col = table[name].combine_chunks()
    if pa.types.is_dictionary(col.type):
        return col.indices.to_numpy()
    if pa.types.is_timestamp(col.type):
        return col.cast(pa.int64()).to_numpy()
    return col.to_numpy(zero_copy_only=False)


def _same(t1, t2):
    """Table equality that counts NaN == NaN (Table.equals does not)."""
    if t1.schema != t2.schema or t1.num_rows != t2.num_rows:
        return False
    for name in t1.column_names:
        a, b = t1[name].combine_chunks(), t2[name].combine_chunks()
        if pa.types.is_floating(a.type):
            if not np.array_equal(a.to_numpy(), b.to_numpy(), equal_nan=True):
                return False
        elif not a.equals(b):
            return False
    return True


@pytest.fixture(scope="module")
def snap():
    return data_gen.make_snapshot(n_rows=N, seed=7)


@pytest.fixture(scope="module")
def cols(snap):
    c = {name: _np(snap, name) for name in snap.column_names}
    t, s, q, r, k = c["expiry_years"], c["spot"], c["div_yield"], c["rate"], c["strike"]
    c["df"] = s * np.exp(-q * t)        # S e^{-qT}
    c["dk"] = k * np.exp(-r * t)        # K e^{-rT}
    call = c["is_call"]
    c["lower"] = np.maximum(np.where(call, c["df"] - c["dk"], c["dk"] - c["df"]), 0.0)
    c["upper"] = np.where(call, c["df"], c["dk"])
    c["clean"] = c["quote_flag"] == quotes.CLEAN
    return c


# ---------------------------------------------------------------- shape and determinism

def test_same_seed_same_table_other_seed_other_table(snap):
    assert _same(snap, data_gen.make_snapshot(n_rows=N, seed=7))
    other = data_gen.make_snapshot(n_rows=N, seed=8)
    assert not np.array_equal(_np(other, "spot"), _np(snap, "spot"))


@pytest.mark.parametrize("n", [0, 1, 2, 7, 1_001, 40_000])
def test_exact_row_count_and_schema(n):
    t = data_gen.make_snapshot(n_rows=n, seed=1)
    assert t.num_rows == n
    assert t.schema.remove_metadata() == data_gen.SCHEMA
    assert t.schema.metadata[b"volsweep.synthetic"] == b"true"


def test_schema_types_follow_the_data_contract(snap):
    s = snap.schema
    for name in ("spot", "forward", "strike", "expiry_years", "rate", "div_yield", "premium",
                 "bid", "ask", "true_vol", "model_price"):
        assert s.field(name).type == pa.float64(), name
    assert s.field("is_call").type == pa.bool_()
    assert s.field("underlying").type == pa.dictionary(pa.int32(), pa.string())
    assert s.field("quote_flag").type == pa.dictionary(pa.int8(), pa.string())
    assert snap["quote_flag"].chunk(0).dictionary.to_pylist() == list(data_gen.FLAGS)


def test_universe_is_fictional_codes_and_at_least_500_names(snap):
    tickers = snap["underlying"].chunk(0).dictionary.to_pylist()
    assert len(tickers) == len(set(tickers)) == 600
    assert tickers == sorted(tickers)
    assert all(len(x) == 4 and x[2] in "JQXZ" for x in tickers)
    assert np.unique(_np(snap, "underlying")).size >= 500


def test_rows_ordered_by_underlying_expiry_strike_call_first():
    t = data_gen.make_snapshot(n_rows=50_000, seed=3, bad_fraction=0.0)
    u, e, k, c = (_np(t, n) for n in ("underlying", "expiry_years", "strike", "is_call"))
    order = np.lexsort((~c, k, e, u))
    assert np.array_equal(order, np.arange(t.num_rows))
    assert np.all(c[0::2]) and not np.any(c[1::2])
    assert np.array_equal(k[0::2][: k[1::2].size], k[1::2])
    # one contract per (underlying, expiry, strike, type): strikes rise strictly in a slice
    same_slice = (u[2::2] == u[0:-2:2]) & (e[2::2] == e[0:-2:2])
    assert np.all(np.diff(k[0::2])[same_slice] > 0)


# ---------------------------------------------------------------- market realism

def test_clean_rows_have_positive_strike_and_time(cols):
    c = cols["clean"]
    assert np.all(cols["strike"][c] > 0) and np.all(cols["expiry_years"][c] > 0)


def test_expiries_from_days_to_ten_years_plus(cols):
    t = cols["expiry_years"][cols["clean"]]
    days = t * 365.0
    assert np.allclose(days, np.rint(days), rtol=0, atol=1e-9)
    assert t.min() <= 3 / 365 and t.max() >= 10.0
    assert np.mean(t <= 5.5) > 0.95


def test_expiry_timestamp_is_as_of_plus_act365(cols):
    ms = cols["expiry"] - cols["as_of"]
    assert np.array_equal(ms, np.rint(cols["expiry_years"] * 365 * 86400).astype(np.int64) * 1000)


def test_rate_curve_a_few_percent_and_one_per_expiry(cols):
    r, t = cols["rate"], cols["expiry_years"]
    c = cols["clean"]
    assert np.all((r > 0.0) & (r < 0.1))
    # one curve: every contract with the same expiry sees the same rate
    _, inv = np.unique(t[c], return_inverse=True)
    spread = np.zeros(inv.max() + 1)
    np.maximum.at(spread, inv, r[c])
    low = np.full(inv.max() + 1, np.inf)
    np.minimum.at(low, inv, r[c])
    assert np.all(spread - low == 0.0)


def test_forward_column_is_spot_carried_forward(cols):
    c = cols["clean"]
    f = cols["spot"] * np.exp((cols["rate"] - cols["div_yield"]) * cols["expiry_years"])
    assert np.allclose(cols["forward"][c], f[c], rtol=1e-14, atol=0)


def test_strikes_within_range_of_forward(cols):
    c = cols["clean"]
    k = np.log(cols["strike"][c] / cols["forward"][c])
    assert k.min() > np.log(0.1) - 0.05 and k.max() < np.log(3.0) + 0.05
    # both wings are listed: some strikes beyond 2 ATM standard deviations either side
    sd = cols["true_vol"][c] * np.sqrt(cols["expiry_years"][c])
    assert np.mean(k < -2 * sd) > 0.05 and np.mean(k > 2 * sd) > 0.05


def test_clean_quotes_on_the_tick_grid(cols):
    # common practice: 0.01 ticks below 3.00, 0.05 from 3.00
    c = cols["clean"]
    for name in ("premium", "bid", "ask"):
        x = cols[name][c]
        tick = np.where(x < 3.0, 0.01, 0.05)
        n = x / tick
        assert np.allclose(n, np.rint(n), rtol=0, atol=1e-6), name


def test_clean_bid_le_premium_le_ask(cols):
    c = cols["clean"]
    b, p, a = cols["bid"][c], cols["premium"][c], cols["ask"][c]
    assert np.all(b <= p) and np.all(p <= a) and np.all(b < a) and np.all(b > 0)


def test_clean_quotes_inside_no_arbitrage_bounds(cols):
    # common practice (Merton's bounds, from memory): max(S e^{-qT} - K e^{-rT}, 0) <=
    # call <= S e^{-qT};  max(K e^{-rT} - S e^{-qT}, 0) <= put <= K e^{-rT}.
    c = cols["clean"]
    lo, hi = cols["lower"][c], cols["upper"][c]
    for name in ("premium", "bid", "ask", "model_price"):
        x = cols[name][c]
        assert np.all(x >= lo) and np.all(x <= hi), name
    for name in ("premium", "bid", "ask"):          # strictly, so every side has a vol
        x = cols[name][c]
        assert np.all(x > lo) and np.all(x < hi), name


def test_spreads_wider_out_of_the_money_and_short_dated(cols):
    c = cols["clean"] & (cols["premium"] > 0.5)
    rel = (cols["ask"] - cols["bid"])[c] / cols["premium"][c]
    k = np.log(cols["strike"][c] / cols["forward"][c])
    otm = np.where(cols["is_call"][c], k, -k) / (cols["true_vol"][c] * np.sqrt(cols["expiry_years"][c]))
    t = cols["expiry_years"][c]
    assert np.median(rel[otm > 1.5]) > np.median(rel[np.abs(otm) < 0.25])
    assert np.median(rel[(t < 0.05) & (np.abs(otm) < 0.5)]) > np.median(rel[(t > 1) & (np.abs(otm) < 0.5)])


# ---------------------------------------------------------------- model prices

def test_model_put_call_parity(cols):
    # published identity (put-call parity): C - P = S e^{-qT} - K e^{-rT}
    n = cols["is_call"].size // 2
    both = cols["clean"][0:2 * n:2] & cols["clean"][1:2 * n:2]
    c, p = cols["model_price"][0:2 * n:2][both], cols["model_price"][1:2 * n:2][both]
    rhs = (cols["df"] - cols["dk"])[1:2 * n:2][both]
    scale = np.maximum(cols["df"], cols["dk"])[1:2 * n:2][both]
    assert np.max(np.abs(c - p - rhs) / scale) < 1e-14


def test_model_price_against_mpmath(cols):
    # reference: mpmath at 30 digits, BSM on spot with dividend yield
    mpmath.mp.dps = 30
    rows = np.random.default_rng(11).choice(np.flatnonzero(cols["clean"]), 300, replace=False)
    for i in rows:
        s, k, t, r, q, v = (mpmath.mpf(float(cols[n][i])) for n in
                            ("spot", "strike", "expiry_years", "rate", "div_yield", "true_vol"))
        sig = v * mpmath.sqrt(t)
        d1 = (mpmath.log(s / k) + (r - q) * t) / sig + sig / 2
        d2 = d1 - sig
        if cols["is_call"][i]:
            ref = s * mpmath.exp(-q * t) * mpmath.ncdf(d1) - k * mpmath.exp(-r * t) * mpmath.ncdf(d2)
        else:
            ref = k * mpmath.exp(-r * t) * mpmath.ncdf(-d2) - s * mpmath.exp(-q * t) * mpmath.ncdf(-d1)
        err = abs(float(ref) - cols["model_price"][i]) / float(max(s, k))
        assert err < 1e-13, (i, err)


# ---------------------------------------------------------------- smiles

def _surface(seed=5):
    """SVI parameters of every listed (underlying, expiry) slice of a universe."""
    uni = make_universe(600, seed)
    days, tier_max, is_long = listed_expiries(np.datetime64("2031-03-14"))
    t = (days - np.datetime64("2031-03-14")).astype(np.int64) / 365.0
    listed = (uni.tier[:, None] <= tier_max[None, :]) & (~is_long[None, :] | uni.has_long[:, None])
    u, e = np.nonzero(listed)
    return uni, u, t[e], smile_params(uni, u, t[e])


def test_svi_total_variance_positive_and_atm_matches():
    uni, u, t, (a, b, rho, m, sig) = _surface()
    k = np.linspace(-4.0, 4.0, 401)[None, :]
    w = svi.total_variance(k, a[:, None], b[:, None], rho[:, None], m[:, None], sig[:, None])
    wmin = svi.min_total_variance(a, b, rho, sig)
    assert np.all(w > 0) and np.all(wmin > 0)
    assert np.all(w.min(axis=1) >= wmin * (1 - 1e-12))      # closed-form minimum is a minimum
    w0 = atm_vol(uni, u, t) ** 2 * t
    assert np.allclose(svi.total_variance(0.0, a, b, rho, m, sig), w0, rtol=1e-12, atol=0)
    lvl = np.sqrt(w0 / t)
    assert lvl.min() > 0.1 and lvl.max() < 1.1


def test_svi_smiles_free_of_butterfly_arbitrage_and_inside_lee_bound():
    uni, u, t, (a, b, rho, m, sig) = _surface(seed=6)
    # Lee's moment formula (from memory): the wing slope of total variance is at most 2
    assert np.all(b * (1 + np.abs(rho)) <= 2.0)
    assert np.all(b >= 0) and np.all(np.abs(rho) < 1) and np.all(sig > 0)
    # Gatheral and Jacquier (2014): no butterfly arbitrage where g(k) >= 0
    sd = (atm_vol(uni, u, t) * np.sqrt(t))[:, None]
    k = np.concatenate([np.linspace(-10.0, 10.0, 201) * sd,
                        np.broadcast_to(np.linspace(-5.0, 5.0, 201), (t.size, 201))], axis=1)
    g = svi.butterfly_density(k, a[:, None], b[:, None], rho[:, None], m[:, None], sig[:, None])
    assert np.all(g >= 0)


def test_svi_density_detects_an_arbitrage():
    # a smile with a wing slope far beyond Lee's bound must show g < 0 somewhere
    k = np.linspace(-3.0, 3.0, 601)
    g = svi.butterfly_density(k, 0.01, 3.0, -0.9, 0.0, 0.05)
    assert g.min() < 0


def test_true_vol_is_the_svi_vol_of_the_row(cols):
    c = cols["clean"]
    w = cols["true_vol"][c] ** 2 * cols["expiry_years"][c]
    assert np.all(np.isfinite(w)) and np.all(w > 0)
    assert 0.1 < np.median(cols["true_vol"][c]) < 1.0


# ---------------------------------------------------------------- bad quotes

def test_bad_fraction_and_kinds(cols):
    flags = cols["quote_flag"]
    n_bad = np.count_nonzero(flags != quotes.CLEAN)
    assert n_bad == round(0.01 * N)
    counts = np.bincount(flags, minlength=len(quotes.FLAGS))
    assert np.all(counts[1:] > 0)
    share = counts[1:] / n_bad
    want = np.array([quotes.BAD_MIX[k] for k in range(1, len(quotes.FLAGS))])
    assert np.allclose(share, want / want.sum(), atol=0.01)


def test_each_bad_kind_shows_its_defect(cols):
    f = cols["quote_flag"]
    p, b, a = cols["premium"], cols["bid"], cols["ask"]
    cr = f == quotes.CROSSED
    assert np.all(b[cr] > a[cr])
    bi = f == quotes.BELOW_INTRINSIC
    assert np.all(p[bi] < cols["lower"][bi]) and np.all(a[bi] < cols["lower"][bi])
    assert np.all(p[bi] > 0) and np.all(b[bi] <= p[bi]) and np.all(p[bi] <= a[bi])
    zb = f == quotes.ZERO_BID
    assert np.all(b[zb] == 0) and np.all(a[zb] > 0)
    na = f == quotes.NAN
    assert np.all(np.isnan(p[na]) & np.isnan(b[na]) & np.isnan(a[na]))
    bs = f == quotes.BAD_STRIKE
    assert np.all(cols["strike"][bs] <= 0)
    ex = f == quotes.EXPIRED
    assert np.all(cols["expiry_years"][ex] <= 0) and np.all(cols["expiry"][ex] <= cols["as_of"][ex])
    # and no clean row shows any of these defects
    c = cols["clean"]
    assert not np.any(np.isnan(p[c]) | np.isnan(b[c]) | np.isnan(a[c]))
    assert np.all(b[c] > 0) and np.all(b[c] <= a[c]) and np.all(p[c] > cols["lower"][c])


@pytest.mark.parametrize("frac", [0.0, 0.1])
def test_bad_fraction_is_configurable(frac):
    t = data_gen.make_snapshot(n_rows=30_000, seed=2, bad_fraction=frac)
    assert np.count_nonzero(_np(t, "quote_flag")) == round(frac * 30_000)


def test_expected_status_covers_every_flag():
    assert set(quotes.EXPECTED_STATUS) == set(data_gen.FLAGS)
    # every expected status is a word the kernel writes (kernel/status.py)
    from volsweep.kernel.status import NAMES
    assert set(quotes.EXPECTED_STATUS.values()) <= set(NAMES)


# ---------------------------------------------------------------- time and files

def test_as_of_parsing():
    assert parse_as_of(None) == data_gen.DEFAULT_AS_OF
    assert parse_as_of("2031-05-02") == np.datetime64("2031-05-02T20:00:00")
    assert parse_as_of(dt.date(2031, 5, 2)) == np.datetime64("2031-05-02T20:00:00")
    aware = dt.datetime(2031, 5, 2, 22, 0, tzinfo=dt.timezone(dt.timedelta(hours=2)))
    assert parse_as_of(aware) == np.datetime64("2031-05-02T20:00:00")
    t = data_gen.make_snapshot(n_rows=10, as_of="2031-05-02T15:30:00")
    assert t["as_of"][0].value == np.datetime64("2031-05-02T15:30:00", "ms").astype(np.int64)


def test_parquet_round_trip(snap, tmp_path):
    path = data_gen.write_snapshot(snap, tmp_path / "snap.parquet", row_group_size=50_000)
    back = pq.read_table(path)
    assert _same(back, snap)
    assert back.schema.metadata[b"volsweep.venue"] == snap.schema.metadata[b"volsweep.venue"]
    assert pq.ParquetFile(path).metadata.num_row_groups == 5


def test_history_partitioned_by_date(tmp_path):
    dates = ["2031-03-12", dt.date(2031, 3, 10), "2031-03-11"]
    paths = data_gen.write_history(tmp_path, dates, rows_per_day=5_000, seed=4)
    assert [p.split("/")[-2] for p in map(str, paths)] == \
        ["date=2031-03-10", "date=2031-03-11", "date=2031-03-12"]
    table = pads.dataset(tmp_path, partitioning="hive").to_table()
    assert table.num_rows == 15_000
    assert sorted(set(table["date"].to_pylist())) == ["2031-03-10", "2031-03-11", "2031-03-12"]
    days = list(data_gen.make_history(dates, rows_per_day=5_000, seed=4))
    first = data_gen.make_snapshot(n_rows=5_000, seed=4, as_of="2031-03-10")
    assert days[0][0] == dt.date(2031, 3, 10) and _same(days[0][1], first)
    s0, s1 = _np(days[0][1], "spot"), _np(days[1][1], "spot")
    assert not np.array_equal(s0, s1)
    assert days[0][1]["underlying"].chunk(0).dictionary.equals(days[1][1]["underlying"].chunk(0).dictionary)
