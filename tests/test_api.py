"""Table-level API: input types, column mapping, statuses per row, schema errors."""

import datetime as dt
import warnings

import numpy as np
import pyarrow as pa
import pytest

import volsweep
from volsweep import _columns
from volsweep.kernel import black
from volsweep.kernel import status as _status

# Hull, "Options, Futures, and Other Derivatives", worked example (from memory): S=42,
# K=40, r=10%, sigma=20%, T=0.5, no dividends.  Value from mpmath (BSM closed form at 50
# digits on the exact double inputs): 4.7594223928715333950652..., rounded to nearest.
HULL_CALL = 4.759422392871533


def _row_table(**over):
    base = dict(spot=[42.0], strike=[40.0], expiry_years=[0.5], rate=[0.1], vol=[0.2],
                is_call=[True])
    base.update(over)
    return pa.table(base)


def _kernel_bsm(S, K, T, r, q, vol, cp):
    n = len(S)
    out, st = np.empty(n), np.empty(n, np.int8)
    T = np.asarray(T, float)
    D = black.discount_factors(np.asarray(r, float) * np.ones_like(T), T, np.empty(T.shape))
    black.bsm_price(*(np.asarray(a, float) for a in (S, K, T, D, q, vol)),
                    np.asarray(cp, np.int8), out, st)
    return out, st


def test_price_table_matches_handbook_value():
    t = volsweep.price(_row_table())
    assert t.column("status").to_pylist() == ["ok"]
    assert t.column("price")[0].as_py() == pytest.approx(HULL_CALL, rel=1e-14, abs=0)


def test_output_keeps_input_columns_in_order_and_appends_outputs():
    t = _row_table(extra=["x"])
    out = volsweep.price(t)
    assert out.column_names == t.column_names + ["price", "status"]
    assert out.select(t.column_names).equals(t)


def test_dict_input_broadcasts_scalars_and_does_not_mutate():
    spot = np.array([42.0, 42.0, np.nan])
    before = spot.copy()
    out = volsweep.price({"spot": spot, "strike": 40.0, "expiry_years": 0.5, "rate": 0.1,
                          "vol": 0.2, "is_call": np.array([True, False, True])})
    assert np.array_equal(spot, before, equal_nan=True)
    assert out.num_rows == 3
    assert out.column("status").to_pylist() == ["ok", "ok", "missing_input"]
    assert out.column("price")[2].as_py() is None
    # put-call parity (published identity): C - P = S - K e^{-rT}
    c, p = out.column("price")[0].as_py(), out.column("price")[1].as_py()
    assert c - p == pytest.approx(42.0 - 40.0 * np.exp(-0.05), rel=1e-13)


def test_record_batch_and_capsule_stream_inputs():
    t = _row_table()
    batch = t.to_batches()[0]
    assert volsweep.price(batch).column("price").equals(volsweep.price(t).column("price"))

    class Stream:  # any object with the Arrow PyCapsule stream interface
        def __arrow_c_stream__(self, requested_schema=None):
            return t.__arrow_c_stream__(requested_schema)

    assert volsweep.price(Stream()).column("price").equals(volsweep.price(t).column("price"))


def test_multi_chunk_table_processed_chunk_by_chunk():
    rng = np.random.default_rng(3)
    n = 1000
    cols = dict(spot=rng.uniform(50, 150, n), strike=rng.uniform(50, 150, n),
                expiry_years=rng.uniform(0.01, 3, n), rate=rng.uniform(0, 0.08, n),
                vol=rng.uniform(0.05, 1, n), is_call=rng.random(n) < 0.5)
    whole = pa.table(cols)
    chunked = pa.concat_tables([whole.slice(0, 137), whole.slice(137, 500), whole.slice(637)])
    assert chunked.column("spot").num_chunks == 3
    a = volsweep.price(whole)
    b = volsweep.price(chunked)
    assert b.column("price").num_chunks == 3
    assert a.column("price").combine_chunks().equals(b.column("price").combine_chunks())
    ref, _ = _kernel_bsm(cols["spot"], cols["strike"], cols["expiry_years"], cols["rate"],
                         np.zeros(n), cols["vol"], np.where(cols["is_call"], 1, -1))
    assert np.array_equal(a.column("price").to_numpy(), ref)


def test_black76_with_discount_and_remapped_columns():
    # Haug, "The Complete Guide to Option Pricing Formulas", Black-76 example (from memory;
    # re-derived with mpmath: 1.7010507252362...): F=K=19, T=0.75, r=10%, sigma=28%.
    t = pa.table({"F": [19.0], "K": [19.0], "tau": [0.75], "discount": [np.exp(-0.075)],
                  "sigma": [0.28], "cp": ["C"]})
    out = volsweep.price(t, model="black76", columns={"forward": "F", "strike": "K",
                                                      "expiry_years": "tau", "vol": "sigma",
                                                      "is_call": "cp"})
    assert out.column("price")[0].as_py() == pytest.approx(1.7010507252362, rel=1e-12)


def test_call_put_strings_any_case_and_unknown_word():
    t = _row_table(spot=[42.0] * 6, strike=[40.0] * 6, expiry_years=[0.5] * 6, rate=[0.1] * 6,
                   vol=[0.2] * 6, is_call=["call", "PUT", "c", "p", "Call ", "fwd"])
    out = volsweep.price(t)
    st = out.column("status").to_pylist()
    assert st == ["ok"] * 5 + ["missing_input"]
    p = out.column("price").to_pylist()
    assert p[0] == p[2] == p[4] and p[1] == p[3] and p[0] != p[1]


def test_integer_and_float32_columns_are_upcast():
    t = pa.table({"spot": pa.array([42], pa.int32()), "strike": pa.array([40], pa.int64()),
                  "expiry_years": pa.array([0.5], pa.float32()), "rate": [0.1],
                  "vol": pa.array([0.2], pa.float32()), "is_call": [True]})
    out = volsweep.price(t)
    # float32(0.2) is not 0.2: compare with the kernel on the upcast values
    ref, _ = _kernel_bsm([42.0], [40.0], [0.5], [0.1], [0.0],
                         [float(np.float32(0.2))], [1])
    assert out.column("price")[0].as_py() == ref[0]


def test_expiry_timestamps_with_as_of_act365f():
    as_of = dt.datetime(2026, 3, 2, 16, 0)
    expiry = as_of + dt.timedelta(days=73)  # 73/365 = 0.2 years exactly (ACT/365F)
    base = dict(spot=[42.0], strike=[40.0], rate=[0.1], vol=[0.2], is_call=[True])
    t = pa.table({**base, "expiry": pa.array([expiry], pa.timestamp("us"))})
    a = volsweep.price(t, as_of=as_of)
    b = volsweep.price(pa.table({**base, "expiry_years": [0.2]}))
    assert a.column("price")[0].as_py() == pytest.approx(b.column("price")[0].as_py(), rel=1e-15)
    t2 = t.append_column("as_of", pa.array([as_of], pa.timestamp("s")))
    c = volsweep.price(t2)
    assert c.column("price").equals(a.column("price"))
    # an expired contract (expiry before as_of) is a status, not an error
    late = volsweep.price(t, as_of=expiry + dt.timedelta(days=1))
    assert late.column("status").to_pylist() == ["expired"]


@pytest.mark.parametrize("over, status", [
    (dict(strike=[-1.0]), "bad_strike"),
    (dict(strike=[0.0]), "bad_strike"),
    (dict(spot=[0.0]), "bad_underlying"),
    (dict(vol=[-0.1]), "negative_vol"),
    (dict(expiry_years=[0.0]), "expired"),
    (dict(expiry_years=[-1.0]), "expired"),
    (dict(spot=[np.inf]), "non_finite_input"),
    (dict(rate=[np.nan]), "missing_input"),
    (dict(spot=pa.array([None], pa.float64())), "missing_input"),
    (dict(is_call=pa.array([None], pa.bool_())), "missing_input"),
    (dict(div_yield=[np.nan]), "missing_input"),
    (dict(rate=[-2000.0]), "out_of_range"),  # e^{-rT} overflows
])
def test_bad_row_gets_its_reason_and_a_null_price(over, status):
    good = dict(spot=42.0, strike=40.0, expiry_years=0.5, rate=0.1, vol=0.2, is_call=True,
                div_yield=0.0)
    cols = {}
    for name, value in good.items():
        bad = over.get(name)
        bad = bad[0].as_py() if isinstance(bad, pa.Array) else (value if bad is None else bad[0])
        cols[name] = pa.array([value, bad], pa.bool_() if name == "is_call" else pa.float64())
    out = volsweep.price(pa.table(cols))
    assert out.column("status").to_pylist() == ["ok", status]
    assert out.column("price")[1].as_py() is None
    assert out.column("price")[0].as_py() == pytest.approx(HULL_CALL, rel=1e-14, abs=0)


def test_zero_vol_prices_discounted_intrinsic():
    # common practice: with no volatility the option is worth its discounted forward intrinsic
    out = volsweep.price(_row_table(vol=[0.0]))
    fwd = 42.0 * np.exp(0.05)
    assert out.column("status").to_pylist() == ["ok"]
    assert out.column("price")[0].as_py() == pytest.approx(np.exp(-0.05) * (fwd - 40.0), rel=1e-14)


def test_status_is_dictionary_encoded():
    out = volsweep.price(_row_table())
    assert pa.types.is_dictionary(out.schema.field("status").type)


def test_every_kernel_status_code_is_in_the_vocabulary():
    # status_column skips Arrow's index bounds check: every code the kernel can write must
    # be a valid index of the vocabulary (and the vocabulary must be the kernel's names)
    from volsweep._output import STATUS_VOCABULARY
    assert STATUS_VOCABULARY.to_pylist() == list(_status.NAMES)
    codes = [v for k, v in vars(_status).items() if k.isupper() and isinstance(v, int)
             and k not in ("NONFINITE_GREEK_FLAG", "INPUT_PROBLEMS")]
    assert codes and all(0 <= c < len(_status.NAMES) for c in codes)
    out = volsweep.price(_row_table()).column("status").combine_chunks()
    out.validate(full=True)


def test_boolean_call_put_with_nulls_and_slice_offsets():
    # True = call, False = put, null = missing (README); sliced arrays start mid-byte
    rng = np.random.default_rng(3)
    flags = rng.random(203) < 0.5
    arr = pa.array(flags, mask=rng.random(203) < 0.2)
    for off, length in ((0, 203), (1, 150), (5, 3), (9, 0), (13, 190)):
        piece = arr.slice(off, length)
        want = [0 if v is None else (1 if v else -1) for v in piece.to_pylist()]
        got = _columns._to_call_put(piece)
        assert got.dtype == np.int8 and got.tolist() == want, (off, length)


def test_empty_input_gives_empty_output_with_schema():
    t = _row_table().slice(0, 0)
    out = volsweep.price(t)
    assert out.num_rows == 0
    assert out.column_names[-2:] == ["price", "status"]


@pytest.mark.parametrize("table, kwargs, exc, word", [
    (_row_table().drop_columns(["strike"]), {}, ValueError, "strike"),
    (_row_table().drop_columns(["rate"]), {}, ValueError, "rate"),
    (_row_table().append_column("discount", pa.array([0.9])), {}, ValueError, "discount"),
    (_row_table(strike=["40"]), {}, TypeError, "strike"),
    (_row_table(is_call=[1]), {}, TypeError, "is_call"),
    (_row_table(), {"model": "heston"}, ValueError, "heston"),
    (_row_table(), {"columns": {"strike": "K"}}, ValueError, "K"),
    (_row_table(), {"columns": {"strik": "K"}}, ValueError, "strik"),
    (_row_table(), {"model": "black76"}, ValueError, "forward"),
    (_row_table(price=[1.0]), {}, ValueError, "price"),
])
def test_schema_problems_raise_naming_the_column(table, kwargs, exc, word):
    with pytest.raises(exc, match=word):
        volsweep.price(table, **kwargs)


def test_unsupported_input_type_raises_type_error():
    with pytest.raises(TypeError):
        volsweep.price([1, 2, 3])


def test_expiry_years_preferred_over_timestamps_unless_expiry_is_mapped():
    as_of = dt.datetime(2026, 3, 2)
    t = pa.table(dict(spot=[42.0], strike=[40.0], rate=[0.1], vol=[0.2], is_call=[True],
                      expiry_years=[0.5],
                      expiry=pa.array([as_of + dt.timedelta(days=73)], pa.timestamp("s"))))
    half = volsweep.price(t, as_of=as_of).column("price")[0].as_py()
    assert half == pytest.approx(HULL_CALL, rel=1e-14, abs=0)
    mapped = volsweep.price(t, as_of=as_of, columns={"expiry": "expiry"})
    assert mapped.column("price")[0].as_py() < half  # 0.2 years, not 0.5
    with pytest.raises(ValueError, match="expiry"):
        volsweep.price(t, as_of=as_of, columns={"expiry": "expiry", "expiry_years": "expiry_years"})


# ----------------------------------------------------------------- implied_vol, greeks

def _quote_table(**over):
    base = dict(spot=[42.0], strike=[40.0], expiry_years=[0.5], rate=[0.1], is_call=[True],
                premium=[HULL_CALL])
    base.update(over)
    return pa.table(base)


def test_implied_vol_inverts_the_handbook_price():
    out = volsweep.implied_vol(_quote_table())
    assert out.column_names[-2:] == ["iv", "status"]
    assert out.column("status").to_pylist() == ["ok"]
    assert out.column("iv")[0].as_py() == pytest.approx(0.2, rel=1e-13)


@pytest.mark.parametrize("premium, status", [
    (1.0, "premium_too_low"),          # intrinsic is S - K e^{-rT} = 3.95
    (-0.5, "premium_too_low"),
    (42.0, "premium_too_high"),        # a call is worth less than the spot (common practice)
    (np.nan, "missing_input"),
    (np.inf, "non_finite_input"),
])
def test_implied_vol_status_per_row(premium, status):
    out = volsweep.implied_vol(_quote_table(spot=[42.0, 42.0], strike=[40.0, 40.0],
                                            expiry_years=[0.5, 0.5], rate=[0.1, 0.1],
                                            is_call=[True, True], premium=[HULL_CALL, premium]))
    assert out.column("status").to_pylist() == ["ok", status]
    assert out.column("iv")[1].as_py() is None
    assert out.column("iv")[0].as_py() == pytest.approx(0.2, rel=1e-13)


def test_implied_vol_from_bid_ask_gives_three_vols_and_statuses():
    # the Hull example's put at 20%, from mpmath (BSM closed form at 50 digits on the
    # exact double inputs, not parity from HULL_CALL): 0.80859937290009365311..., rounded
    # to nearest
    put = 0.8085993729000936
    t = pa.table(dict(spot=[42.0] * 4, strike=[40.0] * 4, expiry_years=[0.5] * 4,
                      rate=[0.1] * 4, is_call=[True, False, True, True],
                      bid=[HULL_CALL - 0.05, put - 0.02, 5.0, 0.0],
                      ask=[HULL_CALL + 0.05, put + 0.02, 4.9, 4.8]))
    out = volsweep.implied_vol(t)
    assert out.column_names[-7:] == ["iv_bid", "iv_ask", "iv", "iv_spread_uncertainty",
                                     "status_bid", "status_ask", "status"]
    assert out.column("status").to_pylist() == ["ok", "ok", "crossed_quote", "zero_bid"]
    assert out.column("status_bid").to_pylist() == ["ok", "ok", "crossed_quote", "zero_bid"]
    assert out.column("status_ask").to_pylist() == ["ok", "ok", "crossed_quote", "ok"]
    iv_b, iv, iv_a = (out.column(c).to_pylist() for c in ("iv_bid", "iv", "iv_ask"))
    assert iv_b[0] < iv[0] < iv_a[0] and iv_b[1] < iv[1] < iv_a[1]
    assert iv[0] == pytest.approx(0.2, abs=1e-6)  # the mid is the model price
    assert iv[2] is None and iv[3] is None and iv_b[3] is None and iv_a[3] is not None
    # half-spread / vega: 0.05 / (S sqrt(T) phi(d1)) for the call, to first order
    g = volsweep.greeks(_row_table(), which="vega")
    unc = out.column("iv_spread_uncertainty")[0].as_py()
    assert unc == pytest.approx(0.05 / g.column("vega")[0].as_py(), rel=1e-6)


def test_implied_vol_needs_a_quote_column():
    with pytest.raises(ValueError, match="premium"):
        volsweep.implied_vol(_quote_table().drop_columns(["premium"]))
    with pytest.raises(ValueError, match="ask"):
        volsweep.implied_vol(_quote_table().drop_columns(["premium"]).append_column(
            "bid", pa.array([1.0])))


def test_greeks_handbook_example_in_desk_units():
    # Hull, "Options, Futures, and Other Derivatives": S=49, K=50, r=5%, sigma=20%,
    # T=20 weeks (from memory: delta 0.522, gamma 0.066, theta -4.31/yr, vega 12.1 per
    # unit vol, rho 8.91 per unit rate; re-derived with mpmath in tests/test_greeks.py).
    t = volsweep.greeks({"spot": 49.0, "strike": 50.0, "expiry_years": 20 / 52, "rate": 0.05,
                         "vol": 0.2, "is_call": True},
                        which=["delta", "gamma", "theta", "vega", "rho"], units="desk")
    row = t.to_pylist()[0]
    assert row["status"] == "ok"
    assert round(row["delta"], 3) == 0.522 and round(row["gamma"], 3) == 0.066
    assert round(row["theta"] * 365, 2) == -4.31
    assert round(row["vega"] * 100, 1) == 12.1 and round(row["rho"] * 100, 2) == 8.91


def test_greeks_default_is_all_of_the_model():
    bsm = volsweep.greeks(_row_table())
    assert bsm.column_names[-len(volsweep.GREEK_NAMES) - 1:] == list(volsweep.GREEK_NAMES) + [
        "status"]
    b76 = volsweep.greeks(_row_table().rename_columns(
        ["forward", "strike", "expiry_years", "rate", "vol", "is_call"]), model="black76")
    assert "div_rho" not in b76.column_names and "delta" in b76.column_names


def test_greeks_bad_rows_are_null_and_unknown_names_raise():
    out = volsweep.greeks(_row_table(vol=[-1.0]), which="delta")
    assert out.column("status").to_pylist() == ["negative_vol"]
    assert out.column("delta")[0].as_py() is None
    with pytest.raises(ValueError, match="deltoid"):
        volsweep.greeks(_row_table(), which="deltoid")
    with pytest.raises(ValueError, match="units"):
        volsweep.greeks(_row_table(), units="bps")


def test_a_mapping_to_a_missing_column_raises_naming_it():
    # behaviour: {"premium": "mid"} without a "mid" column must not fall back to bid/ask
    t = pa.table({"spot": [100.0], "strike": [100.0], "expiry_years": [0.5], "rate": [0.02],
                  "is_call": [True], "bid": [5.0], "ask": [5.2]})
    with pytest.raises(ValueError, match="'mid'"):
        volsweep.implied_vol(t, columns={"premium": "mid"})
    assert volsweep.implied_vol(t).num_rows == 1                     # unmapped: bid/ask


# ------------------------------------------------- inputs the model does not read

def _b76_table(**extra):
    t = _row_table().rename_columns(["forward", "strike", "expiry_years", "rate", "vol",
                                     "is_call"])
    for name, values in extra.items():
        t = t.append_column(name, pa.array(values))
    return t


def test_an_input_of_another_model_mapped_explicitly_is_an_error():
    # behaviour (README, "Inputs a model does not read"): a mapped forward under bsm, or
    # a mapped dividend yield under black76, would be silently ignored
    with pytest.raises(ValueError, match=r"columns= gives column 'F' for 'forward'.*'bsm'"):
        volsweep.price(_row_table(F=[42.0]), columns={"forward": "F"})
    with pytest.raises(ValueError, match=r"'q' for 'div_yield'.*'black76'"):
        volsweep.price(_b76_table(q=[0.02]), model="black76", columns={"div_yield": "q"})


def test_an_unread_extra_input_present_by_name_warns_unless_mapped_to_no_column():
    from volsweep._columns import IgnoredInputWarning

    t = _b76_table(div_yield=[0.02])
    with pytest.warns(IgnoredInputWarning, match=r"'div_yield'.*columns=\{'div_yield': None\}"):
        volsweep.prepare("price", t.schema, model="black76")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        quiet = volsweep.price(t, model="black76", columns={"div_yield": None})
        # another model's underlying present by name is common (chains carry both)
        volsweep.price(_row_table(forward=[43.0]))
    # the yield is not read: same price as without the column (same API, same values)
    assert quiet.column("price").equals(volsweep.price(_b76_table(), model="black76")
                                        .column("price"))


def test_mapping_an_input_to_no_column():
    # columns={name: None}: no column for that input, even where one has its name
    t = _row_table(div_yield=[0.05])
    none = volsweep.price(t, columns={"div_yield": None}).column("price")
    assert none.equals(volsweep.price(_row_table()).column("price"))     # default 0
    assert not none.equals(volsweep.price(t).column("price"))
    both = _row_table(discount=[0.95])                         # rate and discount: choose
    out = volsweep.price(both, columns={"rate": None})
    assert out.column("price").equals(volsweep.price(_row_table(discount=[0.95]).drop_columns(
        ["rate"])).column("price"))
    with pytest.raises(ValueError, match="columns= maps 'strike' to no column"):
        volsweep.price(t, columns={"strike": None})


def test_option_errors_name_the_python_argument():
    from volsweep._columns import OptionError

    t = _row_table().drop_columns(["expiry_years"]).append_column(
        "expiry", pa.array([dt.datetime(2031, 1, 1)]))
    with pytest.raises(OptionError, match=r"give as_of= a time"):
        volsweep.price(t)
    with pytest.raises(OptionError, match=r"as_of= 'soon' is neither a column"):
        volsweep.price(t, as_of="soon")
    with pytest.raises(OptionError, match=r"columns= names an unknown input 'strik'") as exc:
        volsweep.price(t, columns={"strik": "K"})
    assert exc.value.render({"columns": "--map", "unmap": ""}).startswith(
        "--map names an unknown input 'strik'")
