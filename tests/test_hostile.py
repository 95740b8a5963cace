"""Property tests: whatever a feed sends, the public API answers with statuses, not crashes.

Over ``price``, ``implied_vol``, ``greeks``, ``sweep`` and the ``price`` command line:

* data problems (any float: NaN, +-inf, +-0, subnormals, huge, negative; nulls; odd
  call/put words; far-away timestamps) give a documented status, never an exception;
* schema problems (a missing, duplicated or mistyped column) raise ``ValueError`` or
  ``TypeError`` whose message names the column;
* the output has the input's rows in the input's order, and the input (numpy arrays in a
  dict included) is left exactly as it was;
* every status is in the vocabulary, ``ok`` values are finite, other rows are null;
* the chunk layout of the input does not change a bit of the output.

Examples are derandomised (the same ones every run, for reproducible CI: the profile in
tests/conftest.py); set ``VOLSWEEP_HYPOTHESIS_RANDOM=1`` to explore new ones.
"""

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import volsweep
from volsweep.cli import main as cli_main
from volsweep.kernel import registry
from test_fuzz import check_invariants, same_table

# derandomised by the suite's hypothesis profile (tests/conftest.py)
PROPERTY = settings(max_examples=80,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

SPECIAL = [np.nan, np.inf, -np.inf, 0.0, -0.0, 5e-324, 2.2250738585072014e-308, 1e-300,
           1e300, 1.7976931348623157e308, -1.0, -1e-300, -1.7976931348623157e308]
WORDS = ["call", "put", "C", "p", " Call ", "PUT", "x", "", "cal", "\u00e7all", "put\x00"]
GREEKS_TWO = ["delta", "vega"]
SWEEP_FOUR = ("delta", "gamma", "vega", "theta")  # the mask tests/test_sweep.py compiles

# (operation, model) -> (function, keyword arguments, quote columns, primary outputs,
# secondary outputs, extra (status, outputs) pairs)
OPS = {
    "price": (volsweep.price, {}, (), ["price"], [], []),
    "iv": (volsweep.implied_vol, {}, ("premium",), ["iv"], [], []),
    "iv_bid_ask": (volsweep.implied_vol, {}, ("bid", "ask"), ["iv"],
                   ["iv_spread_uncertainty"],
                   [("status_bid", ["iv_bid"]), ("status_ask", ["iv_ask"])]),
    "greeks": (volsweep.greeks, {}, (), [], None, []),
    "greeks_two": (volsweep.greeks, {"which": GREEKS_TWO, "units": "desk"}, (), [],
                   GREEKS_TWO, []),
    "sweep": (volsweep.sweep, {}, ("premium",), ["iv"], None, []),
    "sweep_bid_ask": (volsweep.sweep, {"which": SWEEP_FOUR}, ("bid", "ask"), ["iv"],
                      ["iv_spread_uncertainty", *SWEEP_FOUR],
                      [("status_bid", ["iv_bid"]), ("status_ask", ["iv_ask"])]),
}


def _all_greeks(model):
    return list(registry.model(model).greeks)


def _needs_vol(op):
    return op in ("price", "greeks", "greeks_two")


def _required(op, model):
    """Input columns of one operation, in our default names."""
    cols = [registry.model(model).underlying, "strike", "expiry_years", "rate", "is_call"]
    if _needs_vol(op):
        cols.append("vol")
    cols += list(OPS[op][2])
    return cols


# ------------------------------------------------------------------------- strategies

def _hostile_value():
    return st.one_of(st.sampled_from(SPECIAL), st.none(),
                     st.floats(allow_nan=True, allow_infinity=True, allow_subnormal=True))


@st.composite
def hostile_tables(draw, op, model, min_rows=0, max_rows=24):
    """A pyarrow Table for ``op`` (with an ``id`` column, and ``div_yield`` for BSM):
    plausible market rows from a drawn seed, then hostile values (any float, the special
    values, nulls, odd call/put words) dropped anywhere, and chunk cuts anywhere."""
    n = draw(st.integers(min_rows, max_rows))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    S = rng.lognormal(np.log(100.0), 0.5, n)
    K = S * np.exp(rng.normal(0.0, 0.3, n))
    is_call = rng.random(n) < 0.5
    prem = np.where(is_call, np.maximum(S - K, 0), np.maximum(K - S, 0)) + S * rng.uniform(
        0.001, 0.2, n)
    half = prem * rng.uniform(0.0, 0.05, n)
    plausible = {"spot": S, "forward": S, "strike": K,
                 "expiry_years": rng.uniform(0.01, 3.0, n), "rate": rng.uniform(0, 0.1, n),
                 "div_yield": rng.uniform(0, 0.05, n), "vol": rng.uniform(0.05, 1.0, n),
                 "premium": prem, "bid": prem - half, "ask": prem + half,
                 "shift": rng.uniform(0.0, 0.05, n)}
    names = _required(op, model) + [x.name for x in registry.model(model).extras]
    cols = {"id": np.arange(n)}
    for name in names:
        cols[name] = (list(is_call) if name == "is_call" else list(plausible[name]))
    words = draw(st.booleans())
    if words:
        cols["is_call"] = ["call" if c else "put" for c in cols["is_call"]]
    if n:
        floats = [c for c in names if c != "is_call"]
        damage = draw(st.lists(st.tuples(st.integers(0, n - 1), st.sampled_from(floats),
                                         _hostile_value()), max_size=2 * n))
        for i, name, v in damage:
            cols[name][i] = v
        odd = st.sampled_from(WORDS) if words else st.booleans()
        for i, v in draw(st.lists(st.tuples(st.integers(0, n - 1),
                                            st.one_of(odd, st.none())), max_size=n // 2 + 1)):
            cols["is_call"][i] = v
    table = pa.table({c: (pa.array(v, pa.string() if words else pa.bool_()) if c == "is_call"
                          else pa.array(v, pa.int64() if c == "id" else pa.float64()))
                      for c, v in cols.items()})
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=4)))
    edges = [0, *cuts, n]
    return pa.concat_tables([table.slice(a, b - a) for a, b in zip(edges[:-1], edges[1:])]
                            ) if n else table


def _deep_copy(table: pa.Table) -> pa.Table:
    """A copy in fresh buffers (through the Arrow IPC format), to prove nothing was written."""
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as w:
        w.write_table(table)
    return pa.ipc.open_stream(sink.getvalue()).read_all()


class _Stream:
    """Any object with the Arrow PyCapsule stream interface (as pandas or polars give)."""

    def __init__(self, table):
        self.table = table

    def __arrow_c_stream__(self, requested_schema=None):
        return self.table.__arrow_c_stream__(requested_schema)


def _as_dict_of_numpy(table, masked):
    """The table as a dict of numpy arrays: nulls as NaN (or masked), is_call as bool or
    object strings."""
    out = {}
    for name in table.column_names:
        col = table.column(name).combine_chunks()
        null = col.is_null().to_numpy(zero_copy_only=False)
        if pa.types.is_floating(col.type):
            data = col.fill_null(np.nan).to_numpy(zero_copy_only=False).copy()
            out[name] = np.ma.masked_array(data, mask=null) if masked else data
        elif pa.types.is_boolean(col.type):
            data = col.fill_null(False).to_numpy(zero_copy_only=False).copy()
            out[name] = np.ma.masked_array(data, mask=null) if masked else data
        elif pa.types.is_integer(col.type):
            out[name] = col.to_numpy(zero_copy_only=False).copy()
        else:
            out[name] = np.array(col.to_pylist(), dtype=object)
    return out


def _expected_from_dict(d):
    """What the library should see for a dict input: masked entries are nulls."""
    cols = {}
    for name, v in d.items():
        if isinstance(v, np.ma.MaskedArray):
            cols[name] = pa.array(v.data, mask=np.ma.getmaskarray(v))
        elif v.dtype == object:
            cols[name] = pa.array(list(v))  # all None (or empty): a null column
        else:
            cols[name] = pa.array(v)
    return pa.table(cols)


def _snapshot(d):
    """Bytes, masks and flags of every numpy array in a dict, to prove nothing was written."""
    snap = {}
    for k, v in d.items():
        if isinstance(v, np.ma.MaskedArray):
            snap[k] = (v.data.tobytes(), np.ma.getmaskarray(v).tobytes(), v.flags.writeable)
        elif v.dtype == object:
            snap[k] = (list(v), v.flags.writeable)
        else:
            snap[k] = (v.tobytes(), v.flags.writeable)
    return snap


def _call(op, model, data, **kw):
    fn, kwargs, *_ = OPS[op]
    return fn(data, model=model, **{**kwargs, **kw})


def _check(op, model, inp, out):
    _, _, _, primary, secondary, extra = OPS[op]
    if secondary is None:
        secondary = _all_greeks(model)
    check_invariants(inp, out, primary, secondary)
    for status, values in extra:
        check_invariants(inp, out, values, status=status)
    assert np.array_equal(out.column("id").to_numpy(), np.arange(inp.num_rows))


# ----------------------------------------------------------------- data problems

@pytest.mark.parametrize("model", registry.MODEL_NAMES)
@pytest.mark.parametrize("op", list(OPS))
@PROPERTY
@given(data=st.data())
def test_data_problems_give_statuses_never_exceptions(op, model, data):
    table = data.draw(hostile_tables(op, model))
    before = _deep_copy(table)
    form = data.draw(st.sampled_from(["table", "batch", "reader", "stream", "dict",
                                      "masked"]))
    if form in ("dict", "masked"):
        d = _as_dict_of_numpy(table, masked=form == "masked")
        snap = _snapshot(d)
        out = _call(op, model, d)
        assert _snapshot(d) == snap, "a numpy input array was modified"
        inp = _expected_from_dict(d)
    else:
        arg = {"table": table,
               "batch": table.combine_chunks().to_batches()[0] if table.num_rows else table,
               "reader": pa.RecordBatchReader.from_batches(table.schema, table.to_batches()),
               "stream": _Stream(table)}[form]
        out = _call(op, model, arg)
        assert same_table(table, before)
        inp = table
    _check(op, model, inp, out)
    # the chunk layout changes nothing: one chunk gives the same bits
    whole = _call(op, model, inp.combine_chunks())
    assert same_table(out.combine_chunks(), whole.combine_chunks())


@pytest.mark.parametrize("op", ["price", "iv", "greeks_two"])
def test_empty_and_one_row_inputs(op):
    for model in registry.MODEL_NAMES:
        cols = _required(op, model)
        empty = pa.table({c: pa.array([], pa.bool_() if c == "is_call" else pa.float64())
                          for c in cols})
        for data in (empty, empty.to_batches()[0] if empty.to_batches() else empty,
                     {c: np.array([], bool if c == "is_call" else float) for c in cols},
                     {c: [] for c in cols}):
            out = _call(op, model, data)
            assert out.num_rows == 0
            assert out.column_names[:len(cols)] == cols
        one = {c: (True if c == "is_call" else 1.0) for c in cols}  # scalars: one row
        out = _call(op, model, one)
        assert out.num_rows == 1
        _check(op, model, pa.table({"id": [0], **{c: [v] for c, v in one.items()}}),
               _call(op, model, {"id": [0], **one}))


@settings(PROPERTY, max_examples=300)
@given(expiry=st.one_of(st.datetimes(), st.none()),
       as_of=st.datetimes(),
       unit=st.sampled_from(["s", "ms", "us", "date"]),
       as_column=st.booleans())
def test_any_timestamp_gives_a_status(expiry, as_of, unit, as_column):
    """Expiries and valuation times anywhere in years 1-9999 (beyond the 1677-2262 range
    of nanosecond timestamps): never an exception; an expiry before as_of is expired."""
    typ = pa.date32() if unit == "date" else pa.timestamp(unit)
    exp_v = expiry.date() if (unit == "date" and expiry is not None) else expiry
    t = pa.table({"spot": [42.0], "strike": [40.0], "rate": [0.05], "vol": [0.2],
                  "is_call": [True], "expiry": pa.array([exp_v], typ)})
    if as_column:
        t = t.append_column("valued", pa.array([as_of], pa.timestamp("us")))
        out = volsweep.price(t, as_of="valued")
    else:
        out = volsweep.price(t, as_of=as_of)
    status = out.column("status")[0].as_py()
    if expiry is None:
        assert status == "missing_input"
        return
    exp_t = dt.datetime.combine(exp_v, dt.time()) if unit == "date" else expiry
    if unit != "date":  # the column keeps the unit's precision
        exp_t = pa.scalar(expiry, typ).as_py()
    span = (exp_t - as_of).total_seconds()
    if span <= 0:
        assert status == "expired"
    else:
        assert status in ("ok", "out_of_range")
        if status == "ok":
            assert out.column("price")[0].as_py() >= 0.0


def test_timestamp_years_match_act365f_far_from_the_epoch():
    # ACT/365F (common practice): years = days / 365; 3000-01-01 is 374,913 days after
    # 1973-06-01 (proleptic Gregorian calendar, datetime arithmetic).
    as_of = dt.datetime(1973, 6, 1)
    t = pa.table({"spot": [42.0], "strike": [40.0], "rate": [0.0], "vol": [0.0],
                  "is_call": [True], "div_yield": [0.0],
                  "expiry": pa.array([dt.datetime(3000, 1, 1)], pa.timestamp("s"))})
    days = (dt.datetime(3000, 1, 1) - as_of).days
    ref = volsweep.price({"spot": 42.0, "strike": 40.0, "rate": 0.0, "vol": 0.0,
                          "is_call": True, "expiry_years": days / 365.0})
    got = volsweep.price(t, as_of=as_of)
    assert got.column("status").to_pylist() == ["ok"]
    assert got.column("price").equals(ref.column("price"))


def test_readme_zero_vol_at_the_strike_has_null_infinite_greeks():
    # README: at F == K with zero vol the row is ok, the Greeks that are infinite in the
    # limit are null and the others are the limits.  Common practice (the limit of
    # N(d1) as d1 -> 0): delta -> w e^{-qT} / 2; vega -> A sqrt(T) / sqrt(2 pi).
    t = {"forward": [100.0, 100.0], "strike": 100.0, "expiry_years": 1.0, "rate": 0.0,
         "vol": 0.0, "is_call": np.array([True, False])}
    out = volsweep.greeks(t, model="black76")
    assert out.column("status").to_pylist() == ["ok", "ok"]
    for name in ("gamma", "speed", "zomma", "color", "dual_gamma"):
        assert out.column(name).null_count == 2, name
    assert out.column("delta").to_pylist() == pytest.approx([0.5, -0.5], rel=1e-15)
    assert out.column("vega").to_pylist() == pytest.approx([100 / np.sqrt(2 * np.pi)] * 2,
                                                           rel=1e-15)
    assert out.column("theta").null_count == 0


def test_readme_price_that_overflows_is_out_of_range():
    # a put struck at the largest double, discount factor e^{0.05} > 1: D K overflows
    t = {"spot": 100.0, "strike": 1.7976931348623157e308, "expiry_years": 1.0,
         "rate": -0.05, "vol": 0.2, "is_call": False}
    out = volsweep.price(t)
    assert out.column("status").to_pylist() == ["out_of_range"]
    assert out.column("price").null_count == 1
    g = volsweep.greeks(t, which=GREEKS_TWO)
    assert g.column("status").to_pylist() == ["ok"]
    assert np.isfinite(g.column("delta")[0].as_py())


def test_readme_infinite_rate_or_time_is_non_finite_input():
    # the kernel sees only e^{-rT}; the README promises non_finite_input for a +-inf input
    out = volsweep.price({"spot": 42.0, "strike": 40.0, "vol": 0.2, "is_call": True,
                          "expiry_years": [0.5, np.inf, 0.0, 0.5, 0.5],
                          "rate": [np.inf, 0.0, np.inf, -np.inf, 0.1],
                          "div_yield": [0.0, 0.0, 0.0, 0.0, -np.inf]})
    assert out.column("status").to_pylist() == ["non_finite_input"] * 5
    out = volsweep.price({"spot": 42.0, "strike": -1.0, "vol": 0.2, "is_call": True,
                          "expiry_years": 0.5, "rate": 0.1, "div_yield": [np.nan, np.inf]})
    assert out.column("status").to_pylist() == ["missing_input", "non_finite_input"]


# ----------------------------------------------------------------- schema problems

def _good_table(op, model, n=3):
    cols = {}
    for c in _required(op, model):
        cols[c] = pa.array([True, False, True][:n] if c == "is_call" else [1.0] * n)
    return pa.table(cols)


_WRONG_TYPES = {
    "float": [pa.array(["1.0"] * 3), pa.array([True] * 3), pa.array([[1.0]] * 3),
              pa.array([b"1"] * 3), pa.array([dt.datetime(2030, 1, 1)] * 3)],
    "is_call": [pa.array([1, 0, 1], pa.int8()), pa.array([1.0] * 3), pa.array([b"C"] * 3),
                pa.array([dt.date(2030, 1, 1)] * 3)],
}


@pytest.mark.parametrize("model", ["bsm", "black76"])
@pytest.mark.parametrize("op", ["price", "iv", "iv_bid_ask", "greeks_two", "sweep"])
@settings(PROPERTY, max_examples=150)
@given(data=st.data())
def test_schema_damage_raises_naming_the_column(op, model, data):
    table = _good_table(op, model)
    victim = data.draw(st.sampled_from(_required(op, model)))
    damage = data.draw(st.sampled_from(["missing", "duplicated", "mistyped"]))
    rename = data.draw(st.booleans())  # the caller's own column name, mapped with columns=
    name = f"their {victim}" if rename else victim
    columns = {victim: name} if rename else None
    if rename:
        table = table.rename_columns([name if c == victim else c for c in table.column_names])
    if damage == "missing":
        table = table.drop_columns([name])
    elif damage == "duplicated":
        table = pa.Table.from_arrays([*table.columns, table.column(name)],
                                     names=[*table.column_names, name])
    else:
        kind = "is_call" if victim == "is_call" else "float"
        wrong = data.draw(st.sampled_from(_WRONG_TYPES[kind]))
        table = table.set_column(table.column_names.index(name), name, wrong)
    form = data.draw(st.sampled_from(["table", "dict"]))
    if form == "dict":
        if damage == "duplicated":
            return  # a dict cannot hold a name twice
        table = {c: table.column(c).to_numpy(zero_copy_only=False) for c in table.column_names}
    with pytest.raises((ValueError, TypeError)) as exc:
        _call(op, model, table, columns=columns)
    assert repr(name) in str(exc.value) or name in str(exc.value)


@pytest.mark.parametrize("value, word", [
    ({1.0, 2.0, 3.0}, "set"),
    ((x for x in [1.0, 2.0, 3.0]), "generator"),
    (np.array([1 + 2j, 0j, 1j]), "cannot convert"),
    (np.array([[1.0], [2.0], [3.0]]), "1-D"),
    ([1.0, "2", 3.0], "numeric"),  # numpy makes it a string array
    (np.array(["a", "b", "c"]), "numeric"),
])
def test_dict_values_that_are_not_columns_raise_naming_it(value, word):
    d = {"spot": [42.0] * 3, "strike": value, "expiry_years": 0.5, "rate": 0.1, "vol": 0.2,
         "is_call": True}
    with pytest.raises((TypeError, ValueError), match=word) as exc:
        volsweep.price(d)
    assert "strike" in str(exc.value)


def test_dict_oddities_that_are_data_not_schema():
    # big-endian, strided, float16 and masked numpy arrays and a float16 scalar give the
    # bits of the same values as plain float64 arrays (float16 widened exactly: 0.3 is
    # 0.300048828125 in float16, 2.1 is 2.099609375), and are not written to; an all-None
    # column is data
    spot = np.array([42.0, 43.0, 44.0], dtype=">f8")
    strike = np.array([40.0, 0.0, 41.0, 0.0, 42.0, 0.0])[::2]
    expiry = np.array([0.3, 0.5, 2.1], dtype=np.float16)
    vol = np.ma.masked_array([0.2, 0.2, 0.2], mask=[False, True, False])
    odd = {"spot": spot, "strike": strike, "expiry_years": expiry, "rate": np.float16(0.3),
           "vol": vol, "is_call": [True, True, False]}
    keep = _snapshot({k: odd[k] for k in ("spot", "strike", "expiry_years", "vol")})
    plain = {"spot": np.array([42.0, 43.0, 44.0]), "strike": np.array([40.0, 41.0, 42.0]),
             "expiry_years": np.array([0.300048828125, 0.5, 2.099609375]),
             "rate": 0.300048828125, "vol": np.array([0.2, np.nan, 0.2]),
             "is_call": [True, True, False]}
    out = volsweep.price(odd)
    ref = volsweep.price(plain)
    assert _snapshot({k: odd[k] for k in ("spot", "strike", "expiry_years", "vol")}) == keep
    assert out.column("status").to_pylist() == ["ok", "missing_input", "ok"]
    assert ref.column("status").to_pylist() == ["ok", "missing_input", "ok"]
    assert out.column("price").equals(ref.column("price"))
    # an all-None column is data, not schema: every row missing_input
    out = volsweep.price({**odd, "div_yield": None})
    assert out.column("status").to_pylist() == ["missing_input"] * 3
    out = volsweep.price({**odd, "is_call": [None, True, False]})
    assert out.column("status").to_pylist() == ["missing_input", "missing_input", "ok"]


def test_input_already_holding_an_output_name_raises_naming_it():
    for op, name in (("price", "price"), ("iv_bid_ask", "status_ask"),
                     ("greeks_two", "vega"), ("sweep", "iv")):
        t = _good_table(op, "bsm").append_column(name, pa.array([0.0] * 3))
        with pytest.raises(ValueError, match=name):
            _call(op, "bsm", t)


def test_duplicated_as_of_column_and_bad_arguments():
    t = pa.table({"spot": [42.0], "strike": [40.0], "rate": [0.1], "vol": [0.2],
                  "is_call": [True], "expiry": pa.array([dt.datetime(2031, 1, 1)])})
    now = pa.array([dt.datetime(2030, 1, 1)])
    dup = pa.Table.from_arrays([*t.columns, now, now], names=[*t.column_names, "t0", "t0"])
    with pytest.raises(ValueError, match="t0"):
        volsweep.price(dup, as_of="t0")
    with pytest.raises(TypeError, match="columns"):
        volsweep.price(t, as_of=now[0], columns="strike")
    with pytest.raises(ValueError, match="NaT"):
        volsweep.price(t, as_of=np.datetime64("NaT"))
    with pytest.raises(TypeError, match="which"):
        volsweep.greeks(t.append_column("x", pa.array([1.0])), which=3, as_of=now[0])


# ----------------------------------------------------------------- command line

@settings(PROPERTY, max_examples=20)
@given(data=st.data())
def test_cli_price_keeps_every_hostile_row(data, tmp_path_factory):
    table = data.draw(hostile_tables("price", "bsm", min_rows=1, max_rows=40))
    d = tmp_path_factory.mktemp("cli")
    src, dst = d / "in.parquet", d / "out.parquet"
    pq.write_table(table, src)
    assert cli_main(["price", str(src), "-o", str(dst)]) == 0
    out = pq.read_table(dst)
    _check("price", "bsm", pq.read_table(src), out)
    assert same_table(out, volsweep.price(pq.read_table(src)))


@pytest.mark.parametrize("damage, word", [
    ("drop", "strike"), ("string", "strike"), ("dup", "strike"), ("int_call", "is_call")])
def test_cli_schema_damage_is_a_one_line_error_naming_the_column(damage, word, tmp_path,
                                                                 capsys):
    t = _good_table("price", "bsm")
    if damage == "drop":
        t = t.drop_columns(["strike"])
    elif damage == "string":
        t = t.set_column(1, "strike", pa.array(["40"] * 3))
    elif damage == "dup":
        t = pa.Table.from_arrays([*t.columns, t.column("strike")],
                                 names=[*t.column_names, "strike"])
    else:
        t = t.set_column(t.column_names.index("is_call"), "is_call", pa.array([1, 0, 1]))
    src, dst = tmp_path / "in.parquet", tmp_path / "out.parquet"
    pq.write_table(t, src)
    assert cli_main(["price", str(src), "-o", str(dst)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    if damage != "dup":  # pyarrow refuses such a Parquet file before volsweep sees a schema
        assert word in err[0]
    assert not dst.exists()


def test_cli_sweep_of_hostile_rows_equals_the_in_memory_sweep(tmp_path):
    from test_fuzz import hostile_table

    t, _ = hostile_table(n=20_000, seed=77)
    src, dst = tmp_path / "h.parquet", tmp_path / "hs.parquet"
    pq.write_table(t.drop_columns(["vol"]), src)
    assert cli_main(["sweep", str(src), "-o", str(dst), "--quotes", "bid-ask", "--greeks",
                     ",".join(SWEEP_FOUR), "--batch-rows", "777"]) == 0
    inp = pq.read_table(src)
    out = pq.read_table(dst)
    check_invariants(inp, out, ["iv"], ["iv_spread_uncertainty", *SWEEP_FOUR])
    ref = volsweep.sweep(inp.drop_columns(["premium"]), which=SWEEP_FOUR)
    assert same_table(out.select(ref.column_names), ref)
