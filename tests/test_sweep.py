"""sweep(): one pass from quotes to implied vols and Greeks.

The fused pass must agree with the two separate steps (implied_vol, then greeks at that
vol), row by row, including the statuses of rows that have no implied vol.
"""

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

import volsweep
from volsweep.data_gen import make_snapshot

WHICH = ("delta", "gamma", "vega", "theta")  # one mask per model keeps compile time down


@pytest.fixture(scope="module")
def snap():
    return make_snapshot(n_rows=4000, seed=11, bad_fraction=0.05)


def _close(a, b):
    a, b = a.to_numpy(zero_copy_only=False), b.to_numpy(zero_copy_only=False)
    both = ~np.isnan(a) & ~np.isnan(b)
    assert np.array_equal(np.isnan(a), np.isnan(b))
    scale = np.maximum(np.abs(a[both]), 1e-300)
    return np.max(np.abs(a[both] - b[both]) / scale, initial=0.0)


@pytest.mark.parametrize("model", ["bsm", "black76"])
def test_sweep_equals_implied_vol_then_greeks(snap, model):
    t = snap.drop_columns(["bid", "ask"])
    if model == "black76":
        t = t.drop_columns(["spot", "div_yield"])   # a yield column is not read by black76
    fused = volsweep.sweep(t, model=model, which=WHICH)
    iv = volsweep.implied_vol(t, model=model)
    assert fused.column("status").to_pylist() == iv.column("status").to_pylist()
    assert fused.column("iv").equals(iv.column("iv"))
    g = volsweep.greeks(iv.drop_columns(["status"]).rename_columns(
        [c if c != "iv" else "vol" for c in iv.column_names[:-1]]), model=model, which=WHICH)
    ok = pc.equal(fused.column("status"), "ok")
    for name in WHICH:
        # same scalar code at the same vol; allow for FMA contraction choices
        assert _close(fused.filter(ok).column(name), g.filter(ok).column(name)) <= 4e-16 * 8
        assert fused.filter(pc.invert(ok)).column(name).null_count == \
            fused.num_rows - pc.sum(ok).as_py()


def test_sweep_from_bid_ask_has_greeks_at_the_mid(snap):
    fused = volsweep.sweep(snap.drop_columns(["premium"]), which=WHICH)
    iv = volsweep.implied_vol(snap.drop_columns(["premium"]))
    assert fused.column_names[-len(WHICH) - 7:] == [
        "iv_bid", "iv_ask", "iv", "iv_spread_uncertainty", "status_bid", "status_ask",
        *WHICH, "status"]
    for c in ("iv", "iv_bid", "iv_ask", "status", "status_bid", "status_ask"):
        assert fused.column(c).to_pylist() == iv.column(c).to_pylist(), c
    # crossed and zero-bid quotes have no mid vol, so no Greeks
    bad = pc.is_in(fused.column("status"), pa.array(["crossed_quote", "zero_bid"]))
    assert pc.sum(bad).as_py() > 0
    assert fused.filter(bad).column("delta").null_count == pc.sum(bad).as_py()


def test_sweep_desk_units_scale_the_raw_greeks(snap):
    t = snap.drop_columns(["bid", "ask"]).slice(0, 500)
    raw = volsweep.sweep(t, which=WHICH)
    desk = volsweep.sweep(t, which=WHICH, units="desk")
    ok = pc.equal(raw.column("status"), "ok")
    r = raw.filter(ok)
    d = desk.filter(ok)
    # desk units (README): vega per vol point, theta per calendar day
    np.testing.assert_allclose(d.column("vega").to_numpy(), r.column("vega").to_numpy() / 100,
                               rtol=1e-15)
    np.testing.assert_allclose(d.column("theta").to_numpy(), r.column("theta").to_numpy() / 365,
                               rtol=1e-15)
    assert d.column("delta").equals(r.column("delta"))
