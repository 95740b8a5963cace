"""Position Greeks and scenario grids (volsweep.position_greeks, volsweep.scenarios).

Outside sources, named beside each check:
* mpmath: closed-form Black-Scholes-Merton, (shifted) Black-76 and Bachelier prices at 40
  digits, written here from the textbook formulas; the scenario P&L of one contract is the
  difference of two such prices times quantity x multiplier;
* Taylor's theorem: for small shocks the P&L is delta dS + 1/2 gamma dS^2 + vega dsigma
  (+ vanna dS dsigma + 1/2 volga dsigma^2) up to terms of the next order; the Greeks are
  mpmath derivatives (mpmath.diff) of the mpmath price, and the residual must shrink at
  the order the theorem says;
* pyarrow: the totals equal pyarrow's own group_by sums of the per-row values.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys

import mpmath
import numba
import numpy as np
import pyarrow as pa
import pytest

import volsweep
from volsweep import risk as vrisk
from volsweep.kernel import registry
from volsweep.kernel import risk as krisk

DAYS = 365.0    # ACT/365F


# ---------------------------------------------------------------- mpmath closed forms

def _N(x):
    return mpmath.ncdf(x)


def mp_black(F, K, T, D, vol, cp):
    """Discounted Black-76 price (mpmath; textbook formula)."""
    F, K, T, D, vol = (mpmath.mpf(v) for v in (F, K, T, D, vol))
    if T <= 0:
        return max(cp * (F - K), 0)
    s = vol * mpmath.sqrt(T)
    if s == 0:
        return D * max(cp * (F - K), 0)
    d1 = mpmath.log(F / K) / s + s / 2
    d2 = d1 - s
    return D * cp * (F * _N(cp * d1) - K * _N(cp * d2))


def mp_price(model, U, K, T, r, vol, cp, extra=0.0):
    """The model's price with D = e^{-rT}; T <= 0: the payoff, undiscounted."""
    U, K, T, r, extra = (mpmath.mpf(v) for v in (U, K, T, r, extra))
    if T <= 0:
        return max(cp * (U - K), 0)
    D = mpmath.exp(-r * T)
    if model == "bsm":                       # extra: dividend yield
        return mp_black(U * mpmath.exp((r - extra) * T), K, T, D, vol, cp)
    if model == "black76":                   # extra: shift
        return mp_black(U + extra, K + extra, T, D, vol, cp)
    s = mpmath.mpf(vol) * mpmath.sqrt(T)     # bachelier
    x = U - K
    if s == 0:
        return D * max(cp * x, 0)
    d = x / s
    return D * (cp * x * _N(cp * d) + s * mpmath.npdf(d))


# ---------------------------------------------------------------- helpers

def _book(model, n=40, seed=5):
    """A small book of contracts on three fictional underlyings of the demo venue."""
    rng = np.random.default_rng(seed)
    und = "spot" if model == "bsm" else "forward"
    if model == "bachelier":
        U = rng.uniform(-0.5, 3.0, n)
        K = U + rng.uniform(-1.0, 1.0, n)
        vol = rng.uniform(0.3, 1.5, n)
    else:
        U = rng.uniform(40.0, 160.0, n)
        K = U * np.exp(rng.uniform(-0.4, 0.4, n))
        vol = rng.uniform(0.08, 0.8, n)
    cols = {"underlying": rng.choice(["KELP", "ORRA", "VANTO"], n).tolist(),
            "id": np.arange(n), und: U, "strike": K,
            "expiry_years": rng.uniform(0.02, 2.0, n), "rate": rng.uniform(-0.01, 0.06, n),
            "is_call": rng.random(n) < 0.5, "vol": vol,
            "quantity": rng.integers(-40, 41, n).astype(float),
            "multiplier": rng.choice([1.0, 10.0, 100.0], n)}
    if model == "bsm":
        cols["div_yield"] = rng.uniform(0.0, 0.04, n)
    if model == "black76":
        cols["shift"] = rng.choice([0.0, 0.0, 5.0], n)
    return pa.table(cols)


def _extra_name(model):
    return {"bsm": "div_yield", "black76": "shift"}.get(model)


def _mp_pnl_row(model, row, ds, dv, days):
    x = row[_extra_name(model)] if _extra_name(model) else 0.0
    U = row["spot" if model == "bsm" else "forward"]
    cp = 1 if row["is_call"] else -1
    T, r, vol = row["expiry_years"], row["rate"], row["vol"]
    with mpmath.workdps(40):
        base = mp_price(model, U, row["strike"], T, r, vol, cp, x)
        shocked = mp_price(model, mpmath.mpf(U) * (1 + mpmath.mpf(ds)), row["strike"],
                           mpmath.mpf(T) - mpmath.mpf(days) / DAYS, r,
                           mpmath.mpf(vol) + mpmath.mpf(dv), cp, x)
        qm = mpmath.mpf(row["quantity"]) * row["multiplier"]
        return qm * (shocked - base), abs(qm) * (abs(shocked) + abs(base))


# ---------------------------------------------------------------- registry

def test_every_registry_model_has_a_scenario_pricer():
    assert {(n, m.exercise) for n, m in registry.MODELS.items()} <= set(krisk.PRICERS)
    for (name, exercise), p in krisk.PRICERS.items():
        m = registry.model(name, exercise) if exercise != "european" else \
            registry.MODELS[name]
        extras = [x.name for x in m.extras]
        assert set(p.extras) <= set(extras) and len(p.extras) <= 2
        # every extra input the model reads is read by its pricer too
        assert set(extras) == set(p.extras), (name, exercise)


# ---------------------------------------------------------------- against mpmath

@pytest.mark.parametrize("model", ["bsm", "black76", "bachelier"])
@pytest.mark.parametrize("days", [0.0, 3.0])
def test_contract_pnl_is_the_difference_of_two_mpmath_prices(model, days):
    # source: mpmath closed forms (above); one group per contract (by="id")
    book = _book(model)
    ds = [-0.1, -0.01, 0.0, 0.07] if model != "bachelier" else [-0.3, 0.0, 0.2]
    dv = [-0.03, 0.0, 0.05]
    out = volsweep.scenarios(book, model=model, by="id", spot_shocks=ds, vol_shocks=dv,
                             days=days).to_pylist()
    rows = book.to_pylist()
    assert len(out) == len(rows) * len(ds) * len(dv)
    worst = 0.0
    for rec in out:
        row = rows[rec["id"]]
        assert (rec["spot_shock"], rec["vol_shock"]) in [(a, b) for a in ds for b in dv]
        assert rec["rows"] == 1 and rec["rows_left_out"] == 0
        assert rec["rows_shock_invalid"] == 0
        want, scale = _mp_pnl_row(model, row, rec["spot_shock"], rec["vol_shock"], days)
        err = abs(rec["pnl"] - float(want)) / max(float(scale), 1e-300)
        worst = max(worst, err)
    # a few ulps of the prices (their condition numbers are modest on this book)
    assert worst < 2e-13, worst


def test_a_contract_expiring_within_the_shift_is_worth_its_payoff():
    # source: common practice (an option past its expiry is worth its payoff) and mpmath
    # for the base price; expiries of 1 and 2 days, a 5-day shift
    book = pa.table({"id": [0, 1, 2, 3], "spot": [100.0] * 4,
                     "strike": [95.0, 105.0, 95.0, 105.0],
                     "expiry_years": [1 / DAYS, 2 / DAYS, 2 / DAYS, 1 / DAYS],
                     "rate": [0.03] * 4, "is_call": [True, True, False, False],
                     "vol": [0.3] * 4, "quantity": [2.0, -1.0, 3.0, 1.0],
                     "multiplier": [100.0] * 4})
    out = volsweep.scenarios(book, by="id", spot_shocks=[-0.1, 0.1], vol_shocks=[0.0],
                             days=5).to_pylist()
    for rec in out:
        row = book.to_pylist()[rec["id"]]
        cp = 1 if row["is_call"] else -1
        S1 = 100.0 * (1 + rec["spot_shock"])
        payoff = max(cp * (S1 - row["strike"]), 0.0)
        with mpmath.workdps(40):
            base = mp_price("bsm", 100.0, row["strike"], row["expiry_years"], 0.03, 0.3, cp)
            want = 2.0 * 0 + row["quantity"] * 100.0 * (payoff - base)
        assert rec["pnl"] == pytest.approx(float(want), rel=1e-13, abs=1e-10)


# ---------------------------------------------------------------- Taylor

def _mp_greeks(model, row):
    """delta, gamma, vega, vanna, volga of one contract: mpmath.diff of the mpmath price."""
    cp = 1 if row["is_call"] else -1
    x = row[_extra_name(model)] if _extra_name(model) else 0.0
    U0 = row["spot" if model == "bsm" else "forward"]

    def f(u, v):
        return mp_price(model, u, row["strike"], row["expiry_years"], row["rate"], v, cp, x)

    with mpmath.workdps(40):
        d = {k: mpmath.diff(f, (U0, row["vol"]), k) for k in
             [(1, 0), (2, 0), (0, 1), (1, 1), (0, 2)]}
    return {k: float(v) for k, v in d.items()}


@pytest.mark.parametrize("model", ["bsm", "black76", "bachelier"])
def test_small_shocks_follow_the_taylor_expansion(model):
    # source: Taylor's theorem, with the Greeks from mpmath (mpmath.diff of the closed
    # form).  Residual of delta dS + 1/2 gamma dS^2 + vega dsig:
    #   spot shocks alone: O(dS^3)                  -> halving h divides it by ~8
    #   vol shocks alone: 1/2 volga dsig^2 + O(h^3) -> by ~4 (second order)
    #   both, with vanna dS dsig + 1/2 volga dsig^2 added: O(h^3) -> by ~8
    book = _book(model, n=6, seed=11)
    rows = book.to_pylist()
    hs = [0.02, 0.01, 0.005]
    base_ds, base_dv = (0.5, 0.05) if model != "bachelier" else (0.5, 0.2)
    checked = 0
    for row in rows:
        g = _mp_greeks(model, row)
        if abs(g[(2, 0)]) < 1e-6 or abs(g[(0, 2)]) < 1e-6:
            continue                          # too far out of the money to see the terms
        checked += 1
        U = row["spot" if model == "bsm" else "forward"]
        qm = row["quantity"] * row["multiplier"] or 1.0
        one = pa.Table.from_pylist([dict(row, quantity=qm, multiplier=1.0)],
                                   schema=book.schema)
        res = {"spot": [], "vol": [], "both": []}
        for h in hs:
            ds, dv = base_ds * h, base_dv * h
            out = volsweep.scenarios(one, model=model, by=(), spot_shocks=[ds, 0.0],
                                     vol_shocks=[dv, 0.0]).column("pnl").to_pylist()
            pnl_both, pnl_spot, pnl_vol = out[0], out[1], out[2]
            dS = U * ds
            t_spot = qm * (g[(1, 0)] * dS + 0.5 * g[(2, 0)] * dS ** 2)
            t_vol = qm * g[(0, 1)] * dv
            res["spot"].append(abs(pnl_spot - t_spot))
            res["vol"].append(abs(pnl_vol - t_vol))
            res["both"].append(abs(pnl_both - t_spot - t_vol
                                   - qm * (g[(1, 1)] * dS * dv + 0.5 * g[(0, 2)] * dv ** 2)))
        for key, order in (("spot", 3), ("vol", 2), ("both", 3)):
            r = res[key]
            for a, b in zip(r, r[1:]):
                assert 2 ** order * 0.75 < a / b < 2 ** order * 1.3, (key, r)
    assert checked >= 3


# ---------------------------------------------------------------- totals and pyarrow

def _bad_rows(book: pa.Table) -> pa.Table:
    """The book with a missing strike, a null quantity, an infinite multiplier and a
    negative vol on four rows."""
    d = book.to_pydict()
    d["strike"][1] = None
    d["quantity"][2] = None
    d["multiplier"][3] = math.inf
    d["vol"][4] = -0.1
    return pa.table(d, schema=book.schema)


@pytest.mark.parametrize("model", ["bsm", "bachelier"])
def test_position_totals_equal_pyarrow_group_by_sums(model):
    # source: pyarrow's group_by().aggregate(sum) over the per-row values
    book = _bad_rows(_book(model, n=300, seed=3))
    which = ["delta", "gamma", "vega", "theta"]
    per_row = volsweep.position_greeks(book, by="underlying", which=which, model=model,
                                       per_row=True)
    totals = volsweep.position_greeks(book, by="underlying", which=which, model=model)
    cols = [f"position_{g}" for g in which] + ["cash_delta", "cash_gamma"]
    ref = per_row.group_by("underlying", use_threads=False).aggregate(
        [(c, "sum") for c in cols] + [([], "count_all")])
    ref = {r["underlying"]: r for r in ref.to_pylist()}
    got = totals.to_pylist()
    assert [r["underlying"] for r in got] == list(dict.fromkeys(book["underlying"].to_pylist()))
    for r in got:
        want = ref[r["underlying"]]
        assert r["rows"] == want["count_all"]
        for c in cols:
            assert r[c] == pytest.approx(want[f"{c}_sum"], rel=1e-14, abs=0.0), c
    assert sum(r["rows_left_out"] for r in got) == 4
    statuses = per_row.column("status").to_pylist()
    assert statuses[1:5] == ["missing_input", "missing_input", "non_finite_input",
                             "negative_vol"]


def test_position_and_cash_greeks_per_row():
    # source: the definitions (README): position Greek = Greek x quantity x multiplier,
    # cash delta = delta S q m, cash gamma = gamma S^2 q m; Greeks from volsweep.greeks
    book = _book("bsm", n=50)
    per_row = volsweep.position_greeks(book, which=["delta", "gamma"], per_row=True)
    g = volsweep.greeks(book.drop_columns(["quantity", "multiplier"]),
                        which=["delta", "gamma"])
    q = np.asarray(book["quantity"]) * np.asarray(book["multiplier"])
    S = np.asarray(book["spot"])
    np.testing.assert_array_equal(per_row["position_delta"], np.asarray(g["delta"]) * q)
    np.testing.assert_array_equal(per_row["cash_delta"], np.asarray(g["delta"]) * q * S)
    np.testing.assert_array_equal(per_row["cash_gamma"],
                                  np.asarray(g["gamma"]) * q * S * S)
    assert per_row.column_names[:book.num_columns] == book.column_names


def test_scenario_totals_equal_pyarrow_sums_of_the_contracts():
    # source: pyarrow group_by sums of the one-contract grids
    book = _bad_rows(_book("black76", n=500, seed=9))
    kw = dict(model="black76", spot_shocks=[-0.05, 0.05], vol_shocks=[-0.02, 0.01])
    each = volsweep.scenarios(book, by=("underlying", "id"), **kw)
    per_und = volsweep.scenarios(book, by="underlying", **kw)
    ref = each.group_by(["underlying", "spot_shock", "vol_shock"], use_threads=False) \
        .aggregate([("pnl", "sum"), ("rows_left_out", "sum")])
    ref = {(r["underlying"], r["spot_shock"], r["vol_shock"]): r for r in ref.to_pylist()}
    for r in per_und.to_pylist():
        want = ref[(r["underlying"], r["spot_shock"], r["vol_shock"])]
        assert r["pnl"] == pytest.approx(want["pnl_sum"], rel=1e-12)
        assert r["rows_left_out"] == want["rows_left_out_sum"]
    assert sum(r["rows_left_out"] for r in per_und.to_pylist()) == 4 * 4


# ---------------------------------------------------------------- behaviour

def test_zero_shock_gives_zero_and_the_grid_order_is_documented():
    book = _book("bsm", n=5000, seed=1)
    ds, dv = [0.1, 0.0, -0.1], [0.0, 0.02]
    out = volsweep.scenarios(book, spot_shocks=ds, vol_shocks=dv)
    firsts = list(dict.fromkeys(book["underlying"].to_pylist()))
    assert out["underlying"].to_pylist() == [u for u in firsts for _ in range(6)]
    assert out["spot_shock"].to_pylist() == [a for _ in firsts for a in ds for _ in dv]
    assert out["vol_shock"].to_pylist() == [b for _ in firsts for _ in ds for b in dv]
    zero = [r["pnl"] for r in out.to_pylist() if r["spot_shock"] == 0 and r["vol_shock"] == 0]
    assert zero == [0.0] * len(firsts)
    assert out["rows"].to_pylist()[::6] == [book["underlying"].to_pylist().count(u)
                                            for u in firsts]


def test_bad_rows_contribute_nothing_and_are_counted():
    good = _book("bsm", n=200, seed=4)
    bad = _bad_rows(good)
    kw = dict(by="underlying", spot_shocks=[-0.05, 0.05], vol_shocks=[0.01])
    out = volsweep.scenarios(bad, **kw).to_pylist()
    keep = np.ones(200, bool)
    keep[1:5] = False
    ref = volsweep.scenarios(good.filter(pa.array(keep)), **kw).to_pylist()
    for r, w in zip(out, ref):
        assert r["underlying"] == w["underlying"]
        assert r["pnl"] == pytest.approx(w["pnl"], rel=1e-13)
        assert r["rows"] == w["rows"] + r["rows_left_out"]
    assert sum(r["rows_left_out"] for r in out) == 4 * 2


def test_a_vol_shocked_below_zero_is_counted_per_scenario():
    book = pa.table({"underlying": ["KELP"] * 3, "spot": [100.0] * 3,
                     "strike": [90.0, 100.0, 110.0], "expiry_years": [0.5] * 3,
                     "rate": [0.02] * 3, "is_call": [True] * 3, "vol": [0.01, 0.2, 0.3],
                     "quantity": [1.0, 1.0, 1.0]})
    out = volsweep.scenarios(book, spot_shocks=[0.0], vol_shocks=[-0.05, 0.0]).to_pylist()
    assert [r["rows_shock_invalid"] for r in out] == [1, 0]
    alone = volsweep.scenarios(book.slice(1), spot_shocks=[0.0],
                               vol_shocks=[-0.05]).to_pylist()
    assert out[0]["pnl"] == pytest.approx(alone[0]["pnl"], rel=1e-15)
    # every row without a value: the P&L is null, the counts say why
    none = volsweep.scenarios(book.slice(0, 1), spot_shocks=[0.0],
                              vol_shocks=[-0.05]).to_pylist()
    assert none[0]["pnl"] is None and none[0]["rows_shock_invalid"] == 1


def test_missing_quantity_is_a_schema_error_in_the_users_terms():
    book = _book("bsm", n=3).drop_columns(["quantity"])
    for fn in (volsweep.scenarios, volsweep.position_greeks):
        with pytest.raises(volsweep.OptionError, match="quantity.*columns="):
            fn(book)
    with pytest.raises(volsweep.OptionError, match="'qty'"):
        volsweep.scenarios(book, columns={"quantity": "qty"})
    renamed = _book("bsm", n=3).rename_columns(
        ["qty" if c == "quantity" else c for c in _book("bsm", n=3).column_names])
    a = volsweep.scenarios(renamed, columns={"quantity": "qty"})
    b = volsweep.scenarios(_book("bsm", n=3))
    assert a.equals(b)


def test_options_are_checked():
    book = _book("bsm", n=3)
    with pytest.raises(ValueError, match="> -1"):
        volsweep.scenarios(book, spot_shocks=[-1.0])
    with pytest.raises(ValueError, match="empty"):
        volsweep.scenarios(book, vol_shocks=[])
    with pytest.raises(ValueError, match="days"):
        volsweep.scenarios(book, days=-1)
    with pytest.raises(ValueError, match="nope"):
        volsweep.scenarios(book, by="nope")
    with pytest.raises(TypeError):
        volsweep.scenarios(book, spot_shocks="0.1")


def test_input_is_not_mutated_and_batches_do_not_change_the_bits():
    book = _bad_rows(_book("bsm", n=9000, seed=8))
    arrays = {c: np.asarray(book[c]).copy() for c in ("spot", "strike", "vol")}
    whole = volsweep.scenarios(book)
    chunked = volsweep.scenarios(pa.Table.from_batches(book.to_batches(max_chunksize=1000)))
    assert whole.equals(chunked)
    for c, a in arrays.items():
        np.testing.assert_array_equal(np.asarray(book[c]), a)


def test_bits_do_not_depend_on_the_thread_count():
    book = _book("bsm", n=20000, seed=2)
    was = numba.get_num_threads()
    try:
        outs = []
        for k in sorted({1, was}):
            numba.set_num_threads(k)
            outs.append(volsweep.scenarios(book))
    finally:
        numba.set_num_threads(was)
    code = ("import sys, pyarrow as pa, volsweep; sys.path.insert(0, 'tests');"
            "from test_risk import _book;"
            "t = volsweep.scenarios(_book('bsm', n=20000, seed=2));"
            "sys.stdout.buffer.write(t['pnl'].to_numpy().tobytes())")
    env = dict(os.environ, NUMBA_NUM_THREADS="3")
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    three = subprocess.run([sys.executable, "-c", code], env=env, cwd=root,
                           capture_output=True, check=True).stdout
    for t in outs:
        assert t.equals(outs[0])
    assert three == outs[0]["pnl"].to_numpy().tobytes()


def test_empty_input_gives_an_empty_grid_with_the_schema():
    book = _book("bsm", n=0)
    out = volsweep.scenarios(book)
    assert out.num_rows == 0
    assert out.column_names == ["underlying", "spot_shock", "vol_shock", "pnl", "rows",
                                "rows_left_out", "rows_shock_invalid"]
    tot = volsweep.position_greeks(book, which="delta")
    assert tot.num_rows == 0 and "cash_delta" in tot.column_names


# ---------------------------------------------------------------- command line

def _cli(*argv):
    from volsweep.cli import main
    return main(list(argv))


def test_cli_writes_the_grid_of_the_python_function(tmp_path, capsys):
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    book = _bad_rows(_book("black76", n=400, seed=6))
    src = tmp_path / "book.csv"
    pcsv.write_csv(book.rename_columns(["qty" if c == "quantity" else c
                                        for c in book.column_names]), src)
    out = tmp_path / "grid.parquet"
    rc = _cli("risk", str(src), "-o", str(out), "--model", "black76", "--map", "quantity=qty",
              "--spot-shocks=-0.1:0.1:0.05", "--vol-shocks=-0.01,0,0.01", "--days", "1",
              "--by", "underlying,is_call")
    assert rc == 0
    got = pq.read_table(out)
    want = volsweep.scenarios(book, model="black76", by=("underlying", "is_call"),
                              spot_shocks=[-0.1, -0.05, 0.0, 0.05, 0.1],
                              vol_shocks=[-0.01, 0.0, 0.01], days=1)
    assert got.column_names == want.column_names
    for c in ("spot_shock", "vol_shock", "pnl", "rows", "rows_left_out",
              "rows_shock_invalid"):
        assert got[c].to_pylist() == want[c].to_pylist(), c
    err = capsys.readouterr().err
    assert "missing_input" in err and "non_finite_input" in err


def test_cli_names_the_missing_quantity_with_its_flag(tmp_path, capsys):
    import pyarrow.parquet as pq

    src = tmp_path / "book.parquet"
    pq.write_table(_book("bsm", n=5).drop_columns(["quantity"]), src)
    assert _cli("risk", str(src), "-o", str(tmp_path / "g.parquet")) == 2
    err = capsys.readouterr().err
    assert "quantity" in err and "--map" in err and "columns=" not in err
    assert not (tmp_path / "g.parquet").exists()


def test_cli_heat_maps_one_per_group(tmp_path):
    pytest.importorskip("matplotlib")
    import pyarrow.parquet as pq

    src = tmp_path / "book.parquet"
    pq.write_table(_book("bsm", n=300), src)
    rc = _cli("risk", str(src), "-o", str(tmp_path / "g.arrow"), "--heatmap",
              str(tmp_path / "maps"), "--spot-shocks=-0.05,0,0.05", "--vol-shocks=0,0.01")
    assert rc == 0
    names = sorted(p.name for p in (tmp_path / "maps").iterdir())
    assert names == ["risk_KELP.png", "risk_ORRA.png", "risk_VANTO.png"]
    for n in names:
        assert (tmp_path / "maps" / n).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_heat_map_without_matplotlib_says_how_to_install(tmp_path, capsys, monkeypatch):
    import builtins

    import pyarrow.parquet as pq

    real = builtins.__import__

    def no_matplotlib(name, *a, **k):
        if name.split(".")[0] == "matplotlib":
            raise ImportError(name)
        return real(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", no_matplotlib)
    src = tmp_path / "book.parquet"
    pq.write_table(_book("bsm", n=5), src)
    assert _cli("risk", str(src), "-o", str(tmp_path / "g.parquet"), "--heatmap",
                str(tmp_path / "maps")) == 2
    assert "volsweep[plot]" in capsys.readouterr().err


def test_null_keys_are_a_group_and_progress_is_told_of_every_row():
    book = _book("bsm", n=5000, seed=12)
    und = book["underlying"].to_pylist()
    und[7] = None
    und[4000] = None
    book = book.set_column(0, "underlying", pa.array(und))
    seen = []

    class Count:
        def update(self, n):
            seen.append(n)

    out = volsweep.scenarios(book, spot_shocks=[0.01], vol_shocks=[0.0], progress=Count())
    assert sum(seen) == book.num_rows
    keys = out["underlying"].to_pylist()
    assert keys == list(dict.fromkeys(und)) and None in keys
    assert out["rows"].to_pylist()[keys.index(None)] == 2
    tot = volsweep.position_greeks(book, by=(), which=["delta"])
    assert tot.column_names == ["rows", "rows_left_out", "position_delta", "cash_delta"]
    assert tot["rows"].to_pylist() == [5000]
    two = volsweep.position_greeks(book, by=["underlying", "is_call"], which="vega")
    assert sum(two["rows"].to_pylist()) == 5000
    assert two.num_rows == len(set(zip(und, book["is_call"].to_pylist())))


# ---------------------------------------------------------------- hostile input

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_SPECIAL = [np.nan, np.inf, -np.inf, 0.0, -0.0, 5e-324, 1e-300, 1e300, -1.0]


@settings(max_examples=80, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_hostile_books_keep_every_row_counted(data):
    # every row is in exactly one group; pnl is finite or null; nothing raises
    model = data.draw(st.sampled_from(["bsm", "black76", "bachelier"]))
    n = data.draw(st.integers(0, 30))
    book = _book(model, n=max(n, 1), seed=data.draw(st.integers(0, 1000))).slice(0, n)
    d = book.to_pydict()
    numeric = [c for c in d if c not in ("underlying", "id", "is_call")]
    for _ in range(data.draw(st.integers(0, 12)) if n else 0):
        col = data.draw(st.sampled_from(numeric))
        d[col][data.draw(st.integers(0, n - 1))] = data.draw(
            st.one_of(st.sampled_from(_SPECIAL), st.none(),
                      st.floats(allow_nan=True, allow_infinity=True)))
    book = pa.table(d, schema=book.schema)
    before = book.to_pydict()
    dv = data.draw(st.lists(st.floats(-1.0, 1.0), min_size=1, max_size=3))
    out = volsweep.scenarios(book, model=model, spot_shocks=[-0.5, 0.0, 0.5], vol_shocks=dv,
                             days=data.draw(st.sampled_from([0.0, 1.0, 400.0])))
    assert book.to_pydict().keys() == before.keys()
    groups = list(dict.fromkeys(d["underlying"]))
    assert out.num_rows == len(groups) * 3 * len(dv)
    for r in out.to_pylist():
        assert 0 <= r["rows_left_out"] + r["rows_shock_invalid"] <= r["rows"]
        assert r["pnl"] is None or math.isfinite(r["pnl"])
        if r["rows_left_out"] + r["rows_shock_invalid"] == r["rows"]:
            assert r["pnl"] is None
    assert sum(out["rows"].to_pylist()[::3 * len(dv)]) == n
    tot = volsweep.position_greeks(book, model=model, which=["delta", "gamma"])
    assert sum(tot["rows"].to_pylist()) == n
    for r in tot.to_pylist():
        for c in ("position_delta", "cash_gamma"):
            assert r[c] is None or math.isfinite(r[c])


def test_an_overflowing_contribution_is_counted_not_summed():
    book = pa.table({"underlying": ["KELP"] * 2, "spot": [100.0] * 2,
                     "strike": [100.0, 100.0], "expiry_years": [0.5] * 2,
                     "rate": [0.02] * 2, "is_call": [True, True], "vol": [0.2, 0.2],
                     "quantity": [1e305, 1.0], "multiplier": [100.0, 1.0]})
    out = volsweep.scenarios(book, spot_shocks=[0.5], vol_shocks=[0.0]).to_pylist()
    assert out[0]["rows_shock_invalid"] == 1
    alone = volsweep.scenarios(book.slice(1), spot_shocks=[0.5], vol_shocks=[0.0])
    assert out[0]["pnl"] == alone["pnl"].to_pylist()[0]


def test_american_rows_are_revalued_by_the_american_price():
    # outside source: the Crank-Nicolson reference of tests/test_american.py (Richardson
    # extrapolated; its convergence is shown there), at the base and every shocked point
    from test_american import _reference

    S, K, T, r, q, v = 100.0, 100.0, 0.5, 0.05, 0.0, 0.3
    book = pa.table({"underlying": ["KELP", "KELP"], "spot": [S, S], "strike": [K, K],
                     "expiry_years": [T, T], "rate": [r, r], "div_yield": [q, q],
                     "is_call": [False, False], "vol": [v, v], "quantity": [3.0, 3.0],
                     "multiplier": [100.0, 100.0], "exercise": ["American", "european"]})
    ds, dv = [-0.05, 0.05], [0.0, 0.02]
    out = volsweep.scenarios(book, by=("exercise",), spot_shocks=ds, vol_shocks=dv)
    assert out["exercise"].to_pylist() == ["American"] * 4 + ["european"] * 4
    base = _reference(S, K, T, r, q, v, -1, n=1000)
    am = out.slice(0, 4).to_pylist()
    for row in am:
        want = 300.0 * (_reference(S * (1 + row["spot_shock"]), K, T, r, q,
                                   v + row["vol_shock"], -1, n=1000) - base)
        assert abs(row["pnl"] - want) <= 300.0 * 2e-6 * K, (row, want)
    # the European row is the European grid (the same book without the column)
    eu = volsweep.scenarios(book.slice(1).drop_columns(["exercise"]), by=(),
                            spot_shocks=ds, vol_shocks=dv)
    assert out.slice(4)["pnl"].to_pylist() == eu["pnl"].to_pylist()
    # and the American put's early exercise shows: its loss on the rise is larger
    assert am[2]["pnl"] < out.slice(4).to_pylist()[2]["pnl"]
    # exercise= for every row, and position Greeks through the American Greeks
    every = volsweep.scenarios(book.drop_columns(["exercise"]), by=(), spot_shocks=ds,
                               vol_shocks=dv, exercise="american")
    np.testing.assert_allclose(every["pnl"].to_numpy(),
                               2 * out.slice(0, 4)["pnl"].to_numpy(), rtol=1e-12)
    pg = volsweep.position_greeks(book, by=("exercise",), which=["delta"])
    g = volsweep.greeks(book.select(["spot", "strike", "expiry_years", "rate", "div_yield",
                                     "is_call", "vol", "exercise"]), which=["delta"])
    assert pg["position_delta"].to_pylist() == [300.0 * d for d in g["delta"].to_pylist()]


def test_a_book_with_columns_named_like_greek_outputs_is_read(tmp_path):
    # a risk book often carries its own delta or price column: not an input, carried along
    book = _book("bsm", n=20).append_column("delta", pa.array(np.ones(20)))
    book = book.append_column("price", pa.array(np.ones(20)))
    per_row = volsweep.position_greeks(book, which=["delta"], per_row=True)
    assert per_row["delta"].to_pylist() == [1.0] * 20
    ref = volsweep.position_greeks(book.drop_columns(["delta", "price"]), which=["delta"])
    assert volsweep.position_greeks(book, which=["delta"]).equals(ref)
    import pyarrow.parquet as pq
    pq.write_table(book, tmp_path / "b.parquet")
    from volsweep.cli import main
    assert main(["risk", str(tmp_path / "b.parquet"), "-o", str(tmp_path / "g.csv"),
                 "--by", "none", "--spot-shocks=0.1", "--vol-shocks=0"]) == 0
    got = (tmp_path / "g.csv").read_text().splitlines()
    assert got[0].startswith('"spot_shock","vol_shock","pnl","rows"') and len(got) == 2
