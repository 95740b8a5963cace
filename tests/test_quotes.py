"""kernel/quotes.py: bid, ask and mid implied vols, Greeks at the mid and the quote
statuses in one pass, against the same answers computed side by side."""

import numpy as np
import pytest

from volsweep.kernel import greeks, implied, registry
from volsweep.kernel import status as S

MODELS = registry.MODEL_NAMES


def _chain(model, n=6000, seed=5):
    rng = np.random.default_rng(seed)
    U = np.full(n, 100.0)
    K = 100.0 * np.exp(rng.uniform(-1.0, 1.0, n))
    T = np.exp(rng.uniform(np.log(0.02), np.log(3.0), n))
    D = np.exp(-0.03 * T)
    m = registry.model(model)
    vol = rng.uniform(0.1, 0.8, n) * (U if m.vol == "normal" else 1.0)  # same moneyness
    cp = np.where(rng.random(n) < 0.5, 1, -1).astype(np.int8)
    extras = tuple(np.full(n, 0.01) for _ in m.extras)
    p, st = np.empty(n), np.empty(n, np.int8)
    m.kernels["price"](U, K, T, D, *extras, vol, cp, p, st)
    spread = p * rng.uniform(0.0, 0.2, n)
    return (U, K, T, D) + extras, cp, p - spread, p + spread


def _bid_ask(model, inputs, cp, bid, ask, names=("vega",)):
    n = len(cp)
    mask = greeks.greek_mask(names, model)
    outs = [np.empty(n) for _ in range(4)] + [np.empty((len(names), n))] + \
        [np.empty(n, np.int8) for _ in range(3)]
    registry.model(model).kernels["bid_ask"](bid, ask, *inputs, cp, mask, *outs)
    return outs


def _iv(model, premium, inputs, cp):
    n = len(cp)
    iv, st = np.empty(n), np.empty(n, np.int8)
    registry.model(model).kernels["implied_vol"](premium, *inputs, cp, iv, st)
    return iv, st


@pytest.mark.parametrize("model", MODELS)
def test_one_pass_equals_each_side_solved_alone_bit_for_bit(model):
    inputs, cp, bid, ask = _chain(model)
    bid[:50] = 0.0                                  # zero bids
    bid[50:100], ask[50:100] = ask[50:100] + 1.0, bid[50:100]   # crossed
    iv_b, iv_a, iv, unc, out, st_b, st_a, st = _bid_ask(model, inputs, cp, bid, ask,
                                                        ("delta", "vega"))
    ref_b, rst_b = _iv(model, bid, inputs, cp)
    ref_a, rst_a = _iv(model, ask, inputs, cp)
    ref_m, rst_m = _iv(model, 0.5 * (bid + ask), inputs, cp)
    plain = (np.arange(len(cp)) >= 100) & (bid > 0.0)   # deep wings price to 0: zero bids
    assert (st_b[bid <= 0.0] == S.ZERO_BID).all() and (st[bid <= 0.0] == S.ZERO_BID).all()
    for got, ref in ((iv_b, ref_b), (iv_a, ref_a), (iv, ref_m)):
        assert np.array_equal(got[plain], ref[plain], equal_nan=True)
    for got, ref in ((st_b, rst_b), (st_a, rst_a), (st, rst_m)):
        assert np.array_equal(got[plain], ref[plain])
    # Greeks at the mid vol, as the Greeks kernel gives them at that vol
    n = len(cp)
    g, gst = np.empty((2, n)), np.empty(n, np.int8)
    registry.model(model).kernels["greeks"](*inputs, ref_m, cp,
                                            greeks.greek_mask(("delta", "vega"), model), g, gst)
    ok = st == S.OK
    assert np.array_equal(out[:, ok], g[:, ok])
    assert np.array_equal(unc[ok], (0.5 * ask[ok] - 0.5 * bid[ok]) / g[1, ok])
    assert np.isnan(unc[~ok]).all() and np.isnan(iv[~ok]).all()


@pytest.mark.parametrize("model", MODELS)
def test_quote_status_sentences(model):
    inputs, cp, bid, ask = _chain(model, n=8)
    inputs = tuple(a.copy() for a in inputs)
    cases = [
        ("a crossed quote is crossed_quote on bid, ask and mid", dict(bid=2.0, ask=1.0),
         (S.CROSSED_QUOTE,) * 3),
        ("a zero bid is zero_bid on the bid and the mid; the ask keeps its vol",
         dict(bid=0.0), (S.ZERO_BID, S.OK, S.ZERO_BID)),
        ("a negative bid is zero_bid as well", dict(bid=-1.0), (S.ZERO_BID, S.OK, S.ZERO_BID)),
        ("an input problem outranks a crossed quote", dict(bid=2.0, ask=1.0, strike=np.nan),
         (S.MISSING_INPUT,) * 3),
        ("a missing bid is missing_input on the bid and the mid only", dict(bid=np.nan),
         (S.MISSING_INPUT, S.OK, S.MISSING_INPUT)),
        ("an ask above the upper bound keeps the bid's vol", dict(ask=1e6),
         (S.OK, S.PREMIUM_TOO_HIGH, S.PREMIUM_TOO_HIGH) if model != "bachelier"
         else (S.OK,) * 3),     # the normal model's premium has no upper bound
    ]
    for j, (sentence, over, want) in enumerate(cases):
        b, a = bid.copy(), ask.copy()
        b[j] = over.get("bid", b[j])
        a[j] = over.get("ask", a[j])
        ins = [x.copy() for x in inputs]
        if "strike" in over:
            ins[1][j] = over["strike"]
        iv_b, iv_a, iv, unc, out, st_b, st_a, st = _bid_ask(model, ins, cp, b, a)
        assert (st_b[j], st_a[j], st[j]) == want, sentence
        for v, s in ((iv_b, st_b), (iv_a, st_a), (iv, st)):
            assert np.isfinite(v[j]) == (s[j] == S.OK), sentence


def test_mask_without_vega_is_refused():
    inputs, cp, bid, ask = _chain("black76", n=4)
    n = 4
    outs = [np.empty(n) for _ in range(4)] + [np.empty((1, n))] + \
        [np.empty(n, np.int8) for _ in range(3)]
    with pytest.raises(ValueError, match="vega"):
        registry.model("black76").kernels["bid_ask"](
            bid, ask, *inputs, cp, greeks.greek_mask(("delta",), "black76"), *outs)
