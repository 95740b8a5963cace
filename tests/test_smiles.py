"""fit_smiles and smile_vols (kernel/svi.py, bindings/smiles.py).

Outside sources, named beside each check:
* the raw SVI formula (Gatheral, 2004), evaluated with numpy in this file, never with the
  code under test;
* Durrleman's condition g(k) as written by Gatheral and Jacquier (2014), differentiated
  here with mpmath (mpmath.diff of w(k)), not with the kernel's analytic derivatives;
* their published example of butterfly arbitrage, (a, b, m, rho, sigma) = (-0.0410,
  0.1331, 0.3586, 0.3060, 0.4153), T = 1, with min g about -0.033 near k about 0.88
  (values recalled from memory; the test confirms them with mpmath before using them);
* calendar arbitrage as total variance falling with T at fixed log-moneyness (Gatheral
  and Jacquier 2014), the crossing checked here with numpy;
* F = S e^{(r - q) T} (common practice).
"""

import math

import mpmath
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

import volsweep
from volsweep.kernel import svi

GJ = dict(a=-0.0410, b=0.1331, rho=0.3060, m=0.3586, sigma=0.4153)   # their example, T=1


def svi_w(k, a, b, rho, m, sigma):
    """Raw SVI total variance (Gatheral 2004), numpy, independent of the kernel."""
    x = np.asarray(k, float) - m
    return a + b * (rho * x + np.sqrt(x * x + sigma * sigma))


def chain(slices, n=60, width=1.5, forward=100.0, underlying="ZUXA"):
    """Rows of exact SVI vols: slices = [(T, params dict), ...]."""
    cols = {"underlying": [], "expiry_years": [], "forward": [], "strike": [], "iv": []}
    for T, p in slices:
        k = np.linspace(-width, width, n)
        iv = np.sqrt(svi_w(k, **p) / T)
        cols["underlying"] += [underlying] * n
        cols["expiry_years"] += [T] * n
        cols["forward"] += [forward] * n
        cols["strike"] += list(forward * np.exp(k))
        cols["iv"] += list(iv)
    return pa.table(cols)


BY = ("underlying", "expiry_years")
SLICES = [
    (0.08, dict(a=0.002, b=0.04, rho=-0.6, m=0.02, sigma=0.05)),
    (0.5, dict(a=0.01, b=0.12, rho=-0.4, m=0.05, sigma=0.2)),
    (2.0, dict(a=0.05, b=0.2, rho=-0.3, m=-0.1, sigma=0.5)),
    (1.0, GJ),
]


def g_mpmath(k, p, T=1.0):
    """Durrleman's g (Gatheral and Jacquier 2014) with mpmath derivatives of w."""
    a, b, rho, m, s = (mpmath.mpf(p[x]) for x in ("a", "b", "rho", "m", "sigma"))

    def w(x):
        return a + b * (rho * (x - m) + mpmath.sqrt((x - m) ** 2 + s * s))

    with mpmath.workdps(30):
        k = mpmath.mpf(k)
        w0, w1, w2 = w(k), mpmath.diff(w, k, 1), mpmath.diff(w, k, 2)
        return float((1 - k * w1 / (2 * w0)) ** 2 - w1 ** 2 / 4 * (1 / w0 + mpmath.mpf(1) / 4)
                     + w2 / 2)


def row(t, i):
    return {c: t.column(c)[i].as_py() for c in t.column_names}


# ------------------------------------------------------------------ exact smiles
def test_exact_svi_vols_reproduced_at_and_between_quotes():
    # source: raw SVI formula (Gatheral 2004), numpy in this file
    data = chain([s for s in SLICES if s[1] is not GJ])
    fits = volsweep.fit_smiles(data, model="black76", by=BY)
    assert fits.column("status").to_pylist() == ["ok"] * 3
    for i, (T, p) in enumerate(sorted((s for s in SLICES if s[1] is not GJ),
                                      key=lambda s: s[0])):
        r = row(fits, i)
        assert r["expiry_years"] == T and r["quotes_used"] == 60
        assert r["rmse_iv"] <= 1e-7
        k = np.linspace(-1.5, 1.5, 60)
        mid = 0.5 * (k[1:] + k[:-1])
        fitted = np.array([r[c] for c in ("svi_a", "svi_b", "svi_rho", "svi_m", "svi_sigma")])
        for kk, tol in ((k, 1e-7), (mid, 1e-6)):
            got = np.sqrt(svi_w(kk, *fitted) / T)
            want = np.sqrt(svi_w(kk, **p) / T)
            assert np.max(np.abs(got - want)) <= tol
    # and through smile_vols, at the quotes and between them, at each slice's expiry
    k = np.linspace(-1.5, 1.5, 119)
    T, p = SLICES[1]
    pts = volsweep.smile_vols(fits, {"underlying": ["ZUXA"] * k.size, "expiry_years": T,
                                     "forward": 100.0, "strike": 100.0 * np.exp(k)})
    want = np.sqrt(svi_w(k, **p) / T)
    assert set(pts.column("smile_status").to_pylist()) == {"ok"}
    assert np.max(np.abs(pts.column("smile_vol").to_numpy() - want)) <= 1e-6


def test_exact_svi_with_negative_a_is_reproduced():
    # source: raw SVI formula (Gatheral 2004); the published example has a < 0
    fits = volsweep.fit_smiles(chain([(1.0, GJ)]), model="black76", by=BY)
    r = row(fits, 0)
    assert r["status"] == "ok" and r["rmse_iv"] <= 1e-7
    for name, key in (("svi_a", "a"), ("svi_b", "b"), ("svi_rho", "rho"), ("svi_m", "m"),
                      ("svi_sigma", "sigma")):
        assert r[name] == pytest.approx(GJ[key], abs=1e-6), name


# ------------------------------------------------------------------ arbitrage
def test_published_butterfly_example_confirmed_with_mpmath():
    # Gatheral and Jacquier (2014), values from memory: min g ~ -0.033 near k ~ 0.88.
    # Confirmed here with mpmath derivatives on a fine grid, independently of the kernel.
    ks = np.linspace(0.5, 1.3, 161)
    gs = [g_mpmath(k, GJ) for k in ks]
    i = int(np.argmin(gs))
    assert gs[i] == pytest.approx(-0.033, abs=0.001)
    assert ks[i] == pytest.approx(0.88, abs=0.02)


def test_published_example_is_flagged_and_arbitrage_free_removes_it():
    # Gatheral and Jacquier (2014) example, from memory; g checked with mpmath
    data = chain([(1.0, GJ)])
    r = row(volsweep.fit_smiles(data, model="black76", by=BY), 0)
    assert r["butterfly_arbitrage"] is True
    assert r["durrleman_min_g"] == pytest.approx(-0.033, abs=0.001)
    assert r["durrleman_min_k"] == pytest.approx(0.88, abs=0.01)
    # the reported minimum is g's value there (mpmath), and no smaller g nearby
    assert r["durrleman_min_g"] == pytest.approx(g_mpmath(r["durrleman_min_k"], GJ), abs=1e-9)
    near = [g_mpmath(r["durrleman_min_k"] + d, GJ) for d in (-0.01, -0.001, 0.001, 0.01)]
    assert min(near) >= r["durrleman_min_g"] - 1e-12

    free = row(volsweep.fit_smiles(data, model="black76", by=BY, arbitrage_free=True), 0)
    assert free["status"] == "ok"
    assert free["butterfly_arbitrage"] is False
    assert free["durrleman_min_g"] >= 0.0
    p = {"a": free["svi_a"], "b": free["svi_b"], "rho": free["svi_rho"], "m": free["svi_m"],
         "sigma": free["svi_sigma"]}
    # g >= 0 over the checked range (the quotes' k: [-1.5, 1.5]), by mpmath on a grid of
    # our own (offset from the kernel's), and w > 0
    ks = np.linspace(-1.5, 1.5, 157)
    assert min(g_mpmath(k, p) for k in ks) >= -1e-12
    assert np.all(svi_w(ks, **p) > 0)
    assert free["rmse_iv"] > r["rmse_iv"]          # the cost in fit
    assert free["rmse_iv"] < 0.05


def test_slices_whose_total_variances_cross_are_flagged_for_calendar_arbitrage():
    # definition (Gatheral and Jacquier 2014): w(k, T) must not fall with T at fixed k
    early = (0.5, dict(a=0.02, b=0.10, rho=-0.5, m=0.0, sigma=0.2))
    crossing = (1.0, dict(a=0.03, b=0.05, rho=-0.9, m=0.0, sigma=0.2))
    later = (2.0, dict(a=0.08, b=0.15, rho=-0.5, m=0.0, sigma=0.3))
    k = np.linspace(-1.5, 1.5, 301)
    assert np.any(svi_w(k, **crossing[1]) < svi_w(k, **early[1]))      # they do cross
    assert np.all(svi_w(k, **later[1]) > svi_w(k, **crossing[1]))
    fits = volsweep.fit_smiles(chain([early, crossing, later]), model="black76", by=BY)
    assert fits.column("calendar_arbitrage").to_pylist() == [False, True, False]
    fits = volsweep.fit_smiles(chain([early, later]), model="black76", by=BY)
    assert fits.column("calendar_arbitrage").to_pylist() == [False, False]


def test_calendar_check_stays_within_one_underlying():
    # same smiles on two fictional names: the second name's first slice has no earlier
    # expiry, whatever the first name's last slice holds
    hi = (0.5, dict(a=0.2, b=0.1, rho=0.0, m=0.0, sigma=0.2))
    lo = (1.0, dict(a=0.01, b=0.1, rho=0.0, m=0.0, sigma=0.2))
    data = pa.concat_tables([chain([hi], underlying="ZUXA"), chain([lo], underlying="ZUXB")])
    fits = volsweep.fit_smiles(data, model="black76", by=BY)
    assert fits.column("calendar_arbitrage").to_pylist() == [False, False]


# ------------------------------------------------------------------ bad input
def test_every_slice_gets_a_status_and_none_is_dropped():
    good = chain([SLICES[1]])
    n = good.num_rows

    def variant(name, **change):
        cols = {c: good.column(c).to_numpy(zero_copy_only=False).copy()
                for c in good.column_names}
        cols["underlying"] = np.array([name] * n, object)
        for c, fn in change.items():
            cols[c] = fn(cols[c])
        return pa.table(cols)

    few = variant("ZUXF").slice(0, 4)
    parts = [
        variant("ZUXA"),
        few,
        variant("ZUXN", iv=lambda x: np.full(n, np.nan)),
        variant("ZUXD", forward=lambda x: np.full(n, -1.0)),
        variant("ZUXE", expiry_years=lambda x: np.full(n, 0.0)),
        variant("ZUXI", iv=lambda x: np.where(np.arange(n) % 2 == 0, np.inf, x)),
    ]
    data = pa.concat_tables(parts)
    before = {c: data.column(c).to_numpy(zero_copy_only=False).copy()
              for c in data.column_names}
    fits = volsweep.fit_smiles(data, model="black76", by=BY)
    for c in data.column_names:                                 # input untouched
        np.testing.assert_array_equal(data.column(c).to_numpy(zero_copy_only=False),
                                      before[c])
    got = dict(zip(fits.column("underlying").to_pylist(), fits.column("status").to_pylist()))
    assert got == {"ZUXA": "ok", "ZUXF": "too_few_quotes", "ZUXN": "no_quotes",
                   "ZUXD": "bad_forward", "ZUXE": "bad_expiry", "ZUXI": "ok"}
    used = dict(zip(fits.column("underlying").to_pylist(),
                    fits.column("quotes_used").to_pylist()))
    assert used["ZUXI"] == n // 2 and used["ZUXF"] == 4 and used["ZUXN"] == 0
    bad = fits.filter(pc.not_equal(fits.column("status"), "ok"))
    for c in ("svi_a", "rmse_iv", "atm_vol", "butterfly_arbitrage", "calendar_arbitrage"):
        assert bad.column(c).null_count == bad.num_rows, c


def test_statuses_from_implied_vol_pick_the_quotes():
    data = chain([SLICES[1]])
    n = data.num_rows
    status = pa.array(["ok" if i % 3 else "premium_too_low" for i in range(n)]) \
        .dictionary_encode()
    iv = data.column("iv").to_numpy().copy()
    iv[np.arange(n) % 3 == 0] = 5.0                  # junk on the rows that are not ok
    data = data.set_column(data.column_names.index("iv"), "iv", pa.array(iv)) \
        .append_column("status", status)
    r = row(volsweep.fit_smiles(data, model="black76", by=BY), 0)
    assert r["quotes_used"] == n - len(range(0, n, 3))
    assert r["rmse_iv"] <= 1e-7                      # source: raw SVI formula, numpy


def test_all_bad_statuses_give_no_quotes():
    data = chain([SLICES[1]]).append_column("status", pa.array(["zero_bid"] * 60))
    assert row(volsweep.fit_smiles(data, model="black76", by=BY), 0)["status"] == "no_quotes"


def test_order_of_rows_does_not_matter_and_output_is_sorted():
    data = chain(SLICES[:3])
    perm = np.random.default_rng(5).permutation(data.num_rows)
    a = volsweep.fit_smiles(data, model="black76", by=BY)
    b = volsweep.fit_smiles(data.take(pa.array(perm)), model="black76", by=BY)
    assert a.equals(b)
    assert a.column("expiry_years").to_pylist() == [0.08, 0.5, 2.0]


def test_spreads_weight_the_quotes():
    # an exact smile (raw SVI formula, numpy) with one stale quote 10 vol points off: with
    # a wide bid/ask spread on that quote it hardly moves the fit
    T, p = SLICES[1]
    data = chain([SLICES[1]])
    iv = data.column("iv").to_numpy().copy()
    iv[20] += 0.10
    spread = np.full(iv.size, 0.002)
    spread[20] = 0.5
    noisy = data.set_column(data.column_names.index("iv"), "iv", pa.array(iv))
    weighted = noisy.append_column("iv_bid", pa.array(iv - spread / 2)) \
        .append_column("iv_ask", pa.array(iv + spread / 2))
    k = np.linspace(-1.5, 1.5, 60)
    want = np.sqrt(svi_w(k, **p) / T)

    def worst(table):
        r = row(volsweep.fit_smiles(table, model="black76", by=BY), 0)
        fitted = [r[c] for c in ("svi_a", "svi_b", "svi_rho", "svi_m", "svi_sigma")]
        got = np.sqrt(svi_w(k, *fitted) / T)
        return np.max(np.abs(np.delete(got - want, 20)))
    assert worst(weighted) < 1e-3
    assert worst(weighted) < worst(noisy) / 5


def test_forward_from_spot_rate_and_yield():
    # F = S e^{(r - q) T} (common practice)
    T, p = SLICES[1]
    data = chain([SLICES[1]])
    S, r, q = 95.0, 0.03, 0.01
    F = S * math.exp((r - q) * T)
    k = np.log(data.column("strike").to_numpy() / 100.0)
    spot_data = pa.table({"underlying": data.column("underlying"),
                          "expiry_years": data.column("expiry_years"),
                          "spot": np.full(60, S), "rate": np.full(60, r),
                          "div_yield": np.full(60, q), "strike": F * np.exp(k),
                          "iv": data.column("iv")})
    fit = row(volsweep.fit_smiles(spot_data, by=BY), 0)
    assert fit["forward"] == pytest.approx(F, rel=1e-14)
    assert fit["rmse_iv"] <= 1e-7


def test_empty_input_gives_the_empty_table():
    data = chain([SLICES[1]]).slice(0, 0)
    fits = volsweep.fit_smiles(data, model="black76", by=BY)
    assert fits.num_rows == 0
    assert fits.column_names == ["underlying", "expiry_years", "forward", "svi_a", "svi_b",
                                 "svi_rho", "svi_m", "svi_sigma", "rmse_iv", "atm_vol",
                                 "atm_skew", "butterfly_arbitrage", "durrleman_min_g",
                                 "durrleman_min_k", "calendar_arbitrage", "quotes_used",
                                 "status"]


def test_schema_problems_raise_naming_the_column():
    data = chain([SLICES[1]])
    with pytest.raises(volsweep.OptionError, match="'iv'"):
        volsweep.fit_smiles(data.drop_columns(["iv"]), model="black76", by=BY)
    with pytest.raises(ValueError, match="'forward'"):
        volsweep.fit_smiles(data.drop_columns(["forward"]), model="black76", by=BY)
    with pytest.raises(ValueError, match="'expiry_date'"):
        volsweep.fit_smiles(data, model="black76", by=("underlying", "expiry_date"))
    # the default by= keys the slices by expiry_years when there is no expiry column
    assert volsweep.fit_smiles(data, model="black76").equals(
        volsweep.fit_smiles(data, model="black76", by=BY))
    with pytest.raises(ValueError, match="lognormal"):
        volsweep.fit_smiles(data, model="bachelier", by=BY)
    with pytest.raises(volsweep.OptionError, match="'K'"):
        volsweep.fit_smiles(data, model="black76", by=BY, columns={"strike": "K"})


def test_expiry_timestamps_and_as_of():
    # the default by=("underlying", "expiry") with timestamps and an as_of time
    data = chain([SLICES[1]])
    as_of = np.datetime64("2031-03-14T20:00:00")
    T = SLICES[1][0]
    expiry = as_of + np.timedelta64(int(round(T * 365 * 86400)), "s")
    with_ts = data.drop_columns(["expiry_years"]).append_column(
        "expiry", pa.array(np.full(60, expiry).astype("datetime64[ms]")))
    r = row(volsweep.fit_smiles(with_ts, model="black76", as_of="2031-03-14T20:00:00Z"), 0)
    assert r["expiry_years"] == pytest.approx(T, abs=1e-9)
    assert r["rmse_iv"] <= 1e-7


# ------------------------------------------------------------------ smile_vols
def test_smile_vols_interpolates_total_variance_in_time_and_extrapolates_flat_vol():
    # linear in T at fixed k between expiries, constant vol outside (our documented
    # rule); expected values from the raw SVI formula with numpy
    s1, s2 = SLICES[1], SLICES[2]
    fits = volsweep.fit_smiles(chain([s1, s2]), model="black76", by=BY)
    k = np.array([-0.7, 0.0, 0.4])
    T = np.array([0.2, 0.5, 1.25, 2.0, 3.0])
    kk, TT = np.meshgrid(k, T)
    pts = volsweep.smile_vols(fits, {"underlying": ["ZUXA"] * kk.size,
                                     "expiry_years": TT.ravel(), "forward": 100.0,
                                     "strike": 100.0 * np.exp(kk.ravel())})
    w1, w2 = svi_w(kk.ravel(), **s1[1]), svi_w(kk.ravel(), **s2[1])
    t = TT.ravel()
    u = np.clip((t - s1[0]) / (s2[0] - s1[0]), 0, 1)
    w = np.where(t < s1[0], w1 * t / s1[0], np.where(t > s2[0], w2 * t / s2[0],
                                                    (1 - u) * w1 + u * w2))
    assert np.max(np.abs(pts.column("smile_vol").to_numpy() - np.sqrt(w / t))) <= 1e-7


def test_smile_vols_statuses():
    fits = volsweep.fit_smiles(chain([SLICES[1]]), model="black76", by=BY)
    pts = volsweep.smile_vols(fits, {
        "underlying": ["ZUXA", "ZUXA", "ZUXA", "ZUXA", "QOJI", None],
        "expiry_years": [0.5, None, 0.5, -1.0, 0.5, 0.5],
        "forward": [100.0, 100.0, 100.0, 100.0, 100.0, 100.0],
        "strike": [100.0, 100.0, -5.0, 100.0, 100.0, 100.0]})
    assert pts.column("smile_status").to_pylist() == [
        "ok", "missing_input", "bad_input", "bad_input", "no_smile", "no_smile"]
    assert pts.column("smile_vol").null_count == 5


def test_smile_vols_interpolates_the_forward_when_absent():
    # ln F linear in T between the fitted expiries (our documented rule), numpy here
    s1, s2 = SLICES[1], SLICES[2]
    d1, d2 = chain([s1], forward=100.0), chain([s2], forward=104.0)
    fits = volsweep.fit_smiles(pa.concat_tables([d1, d2]), model="black76", by=BY)
    T = 1.25
    F = math.exp(math.log(100.0) + (math.log(104.0) - math.log(100.0)) * (T - 0.5) / 1.5)
    a = volsweep.smile_vols(fits, {"underlying": ["ZUXA"], "expiry_years": [T],
                                   "strike": [90.0]})
    b = volsweep.smile_vols(fits, {"underlying": ["ZUXA"], "expiry_years": [T],
                                   "strike": [90.0], "forward": [F]})
    assert a.column("smile_vol")[0].as_py() == pytest.approx(b.column("smile_vol")[0].as_py(),
                                                            rel=1e-12)


# ------------------------------------------------------------------ demo data
def test_demo_snapshot_end_to_end():
    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(20_000, seed=4, n_underlyings=6)
    vols = volsweep.implied_vol(snap.drop_columns(["bid", "ask"]))
    fits = volsweep.fit_smiles(vols)
    assert set(fits.column("status").to_pylist()) <= set(svi.SLICE_NAMES)
    n_slices = len(set(zip(snap.column("underlying").to_pylist(),
                           snap.column("expiry").to_pylist())))
    assert fits.num_rows == n_slices
    ok = fits.filter(pc.equal(fits.column("status"), "ok"))
    assert ok.num_rows > 0.8 * n_slices
    pts = volsweep.smile_vols(fits, vols.select(["underlying", "expiry", "as_of", "strike",
                                                 "forward", "true_vol"]))
    good = pc.equal(pts.column("smile_status"), "ok")
    err = np.abs(pc.subtract(pts.column("smile_vol"), pts.column("true_vol"))
                 .filter(good).to_numpy())
    # the quotes come from SVI smiles (data_gen) rounded to ticks: near the money the
    # fitted vols are close to the generating ones
    assert np.median(err) < 0.01


# ------------------------------------------------------------------ the picture command
def test_smile_command_draws_a_picture(tmp_path, capsys):
    pytest.importorskip("matplotlib")
    from volsweep.cli import main
    from volsweep.data_gen import make_snapshot, write_snapshot

    snap = make_snapshot(20_000, seed=4, n_underlyings=6)
    name = snap.column("underlying")[0].as_py()
    src = write_snapshot(snap, str(tmp_path / "snap.parquet"))
    out = tmp_path / "smile.png"
    fits = tmp_path / "fits.csv"
    assert main(["smile", src, "--underlying", name, "-o", str(out), "--expiries", "3",
                 "--fits", str(fits)]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "arbitrage flags:" in capsys.readouterr().err
    assert fits.stat().st_size > 0
    # an existing picture is not replaced without --overwrite
    assert main(["smile", src, "--underlying", name, "-o", str(out)]) == 2
    assert main(["smile", src, "--underlying", "NOPE", "-o", str(tmp_path / "x.png")]) == 2


def test_smile_command_without_matplotlib_says_how_to_install(tmp_path, capsys, monkeypatch):
    import builtins

    from volsweep.cli import main

    real = builtins.__import__

    def no_matplotlib(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError("no matplotlib here")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_matplotlib)
    assert main(["smile", "missing.parquet", "--underlying", "KAQU",
                 "-o", str(tmp_path / "s.png")]) == 2
    assert "volsweep[plot]" in capsys.readouterr().err


def test_hostile_values_never_raise_and_every_key_gets_one_row():
    # arbitrary junk in every column (NaN, inf, zero, negative, huge), null keys
    rng = np.random.default_rng(9)
    n = 3000
    junk = np.array([np.nan, np.inf, -np.inf, 0.0, -1.0, 1e300, 5e-324])

    def col(good):
        x = good.copy()
        bad = rng.random(n) < 0.15
        x[bad] = rng.choice(junk, bad.sum())
        return x

    names = np.array(["ZUXA", "ZUXB", "ZUXC", None], object)[rng.integers(0, 4, n)]
    T = rng.choice([0.1, 0.5, 1.0, np.nan], n)
    data = pa.table({
        "underlying": pa.array(list(names)), "expiry_years": col(T),
        "forward": col(np.full(n, 100.0)), "strike": col(100 * np.exp(rng.normal(0, 0.3, n))),
        "iv": col(rng.uniform(0.1, 0.6, n)),
        "iv_bid": col(rng.uniform(0.05, 0.1, n)), "iv_ask": col(rng.uniform(0.6, 0.7, n)),
        "status": pa.array(rng.choice(["ok", "ok", "ok", "zero_bid", None], n)).dictionary_encode()})
    fits = volsweep.fit_smiles(data, model="black76", by=BY)
    keys = set(zip(data.column("underlying").to_pylist(),
                   [None if x != x else x for x in data.column("expiry_years").to_pylist()]))
    got = list(zip(fits.column("underlying").to_pylist(),
                   [None if x is None or x != x else x
                    for x in fits.column("expiry_years").to_pylist()]))
    assert fits.num_rows == len(keys) == len(set(got))
    assert set(fits.column("status").to_pylist()) <= set(svi.SLICE_NAMES)
    ok = fits.filter(pc.equal(fits.column("status"), "ok"))
    for c in ("svi_a", "svi_b", "svi_rho", "svi_m", "svi_sigma", "rmse_iv"):
        assert ok.column(c).null_count == 0 and np.all(np.isfinite(ok.column(c).to_numpy()))
    pts = volsweep.smile_vols(fits, data.drop_columns(["iv", "iv_bid", "iv_ask", "status"]))
    assert pts.num_rows == n
    assert set(pts.column("smile_status").to_pylist()) <= set(svi.POINT_NAMES)


def test_polars_and_pandas_inputs_give_the_same_fits():
    pl = pytest.importorskip("polars")
    data = pa.concat_tables([chain([SLICES[1]]), chain([SLICES[2]], underlying="ZUXB")])
    data = data.append_column("status", pa.array(["ok"] * data.num_rows))
    want = volsweep.fit_smiles(data, model="black76", by=BY)
    frame = pl.from_arrow(data).with_columns(pl.col("underlying").cast(pl.Categorical),
                                             pl.col("status").cast(pl.Categorical))
    for got in (volsweep.fit_smiles(frame, model="black76", by=BY),
                volsweep.fit_smiles(data.to_pandas(), model="black76", by=BY)):
        assert got.column("underlying").to_pylist() == ["ZUXA", "ZUXB"]
        for c in ("svi_a", "svi_b", "svi_rho", "svi_m", "svi_sigma", "status"):
            assert got.column(c).to_pylist() == want.column(c).to_pylist(), c
    pts = volsweep.smile_vols(want, frame.select(["underlying", "expiry_years", "strike"]))
    assert set(pts.column("smile_status").to_pylist()) == {"ok"}


def test_results_do_not_depend_on_the_number_of_threads():
    # the same bits on 1 thread as on all of them (160 slices: several parallel tasks),
    # and for a surface fitted alone as among the others
    import numba

    data = pa.concat_tables([chain(SLICES, underlying=f"ZU{i:02d}") for i in range(40)])
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = volsweep.fit_smiles(data, model="black76", by=BY)
    finally:
        numba.set_num_threads(before)
    assert one.num_rows == 160
    assert volsweep.fit_smiles(data, model="black76", by=BY).equals(one)
    alone = volsweep.fit_smiles(chain(SLICES, underlying="ZU07"), model="black76", by=BY)
    assert alone.drop_columns(["underlying"]).equals(
        one.slice(28, 4).drop_columns(["underlying"]))


def test_forwards_attached_by_implied_forwards():
    # a chain without forwards or rates: implied_forwards(attach=True) gives each row its
    # group's forward and discount, implied_vol (black76) the vols, fit_smiles the smiles.
    # A consistency check of our own functions (no outside source): the ATM vols agree
    # with fits on the generator's own forwards.
    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(60_000, seed=2, n_underlyings=8)
    raw = snap.drop_columns(["forward", "spot", "rate", "div_yield", "premium"])
    vols = volsweep.implied_vol(volsweep.implied_forwards(raw, attach=True), model="black76")
    fits = volsweep.fit_smiles(vols, model="black76").to_pandas()
    ref = volsweep.fit_smiles(volsweep.implied_vol(snap.drop_columns(["premium"]))).to_pandas()
    j = fits.merge(ref, on=["underlying", "expiry"], suffixes=("", "_ref"))
    j = j[(j.status == "ok") & (j.status_ref == "ok")]
    assert len(j) > 0.5 * len(ref)
    assert np.median(np.abs(j.atm_vol - j.atm_vol_ref)) < 0.005
