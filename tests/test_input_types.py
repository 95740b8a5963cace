"""Real input types: the Arrow, pandas and polars column types users hand to volsweep.

Each test names its source of truth.  Most compare against "the same values as plain
float64 (or bool, or strings) through the same API": the encoding or type of a column
must not change a single bit of the result, only how the values are stored.  Where a
type carries values that a double cannot hold exactly (decimals, int64 beyond 2**53), the
reference is Python's own conversion to float, correctly rounded (Python language
reference, "Numeric types"), and the README documents the rule.
"""

import datetime as dt
import decimal
import warnings

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pytest

import volsweep

N = 6
STRIKES = [90.0, 95.0, 100.0, 100.0, 105.0, 110.0]
CALLS = [True, False, True, False, True, False]
WORDS = ["call", "put", "C", "P", " Call ", "PUT"]       # call/put words, any case


def _base(**over) -> dict:
    cols = {"spot": [101.5] * N, "strike": STRIKES, "expiry_years": [0.25] * N,
            "rate": [0.031] * N, "is_call": CALLS, "vol": [0.24, 0.22, 0.21, 0.2, 0.25, 0.3]}
    cols.update(over)
    return cols


def _with_expiry(**times) -> dict:
    """``_base()`` with timestamps (``expiry``, maybe ``as_of``) instead of expiry_years."""
    cols = _base()
    del cols["expiry_years"]
    return cols | times


def _outputs(table) -> tuple:
    out = volsweep.price(table)
    return out.column("price").to_pylist(), out.column("status").to_pylist()


REFERENCE = _outputs(pa.table(_base()))   # plain float64 and bool through the same API


def test_reference_rows_are_all_priced():
    # guards every comparison below: a type bug cannot hide behind missing_input rows
    prices, statuses = REFERENCE
    assert statuses == ["ok"] * N and all(p > 0 for p in prices)


# --------------------------------------------------------- dictionary-encoded columns

INDEX_TYPES = [pa.int8(), pa.uint8(), pa.int16(), pa.uint16(), pa.int32(), pa.uint32(),
               pa.int64(), pa.uint64()]
_VIEW = [pa.string_view()] if hasattr(pa, "string_view") else []


@pytest.mark.parametrize("index", INDEX_TYPES, ids=str)
@pytest.mark.parametrize("values", [pa.string(), pa.large_string(), *_VIEW], ids=str)
def test_dictionary_call_put_words_any_index_and_value_type(index, values):
    # source of truth: the same rows with a plain bool is_call, through the same API
    words = pa.array(WORDS).cast(values)
    encoded = pa.DictionaryArray.from_arrays(
        pa.array([0, 1, 2, 3, 4, 5], index), words)
    assert _outputs(pa.table(_base(is_call=encoded))) == REFERENCE


@pytest.mark.parametrize("index", INDEX_TYPES, ids=str)
def test_dictionary_encoded_strike_and_bool_call_put(index):
    # source of truth: the same strikes as plain float64 through the same API
    dictionary = pa.array([110.0, 90.0, 95.0, 100.0, 105.0])
    strike = pa.DictionaryArray.from_arrays(pa.array([1, 2, 3, 3, 4, 0], index), dictionary)
    is_call = pa.DictionaryArray.from_arrays(pa.array([0, 1, 0, 1, 0, 1], index),
                                             pa.array([True, False]))
    assert _outputs(pa.table(_base(strike=strike, is_call=is_call))) == REFERENCE


def test_dictionary_nulls_in_indices_and_in_values_are_missing_input():
    # common practice: a null is a missing value whether the index or the value is null
    strike = pa.DictionaryArray.from_arrays(pa.array([0, None, 1, 1, 2, 0], pa.int8()),
                                            pa.array([90.0, 100.0, None]))
    words = pa.DictionaryArray.from_arrays(pa.array([0, 1, None, 1, 0, 2], pa.uint32()),
                                           pa.array(["call", "put", None]))
    prices, statuses = _outputs(pa.table(_base(strike=strike, is_call=words)))
    assert statuses == ["ok", "missing_input", "missing_input", "ok", "missing_input",
                        "missing_input"]
    assert prices[0] == REFERENCE[0][0] and prices[3] == REFERENCE[0][3]


def test_sliced_dictionary_and_run_end_encoded_columns():
    # source of truth: the same values as plain columns, sliced the same way
    strike = pa.array(STRIKES * 2).dictionary_encode()
    runs = pc.run_end_encode(pa.array([0.25] * (2 * N)))
    words = pa.array(WORDS * 2).dictionary_encode()
    t = pa.table(_base(spot=[101.5] * 2 * N, strike=strike, expiry_years=runs,
                       rate=[0.031] * 2 * N, is_call=words,
                       vol=[0.24, 0.22, 0.21, 0.2, 0.25, 0.3] * 2))
    assert _outputs(t.slice(N, N)) == REFERENCE
    assert _outputs(t.slice(3, N))[0][3:] == REFERENCE[0][:3]


def test_polars_categorical_and_enum_columns():
    # source of truth: the same words as plain strings through the same API; a polars
    # Categorical or Enum reaches Arrow as dictionary<string_view, uint32 / uint8>
    plain = pl.DataFrame(_base(is_call=WORDS))
    lower = [w.strip().lower() for w in WORDS]
    for is_call in (pl.col("is_call").cast(pl.Categorical),
                    pl.Series("is_call", lower).cast(pl.Enum(["call", "c", "put", "p"]))):
        df = plain.with_columns(is_call)
        assert _outputs(df) == REFERENCE
    df = plain.with_columns(pl.Series("underlying", ["ZOXI"] * N).cast(pl.Categorical))
    out = volsweep.price(df)
    assert out.column("underlying").to_pylist() == ["ZOXI"] * N   # carried through
    assert out.column("price").to_pylist() == REFERENCE[0]


# ------------------------------------------------------- strings, floats, decimals

@pytest.mark.parametrize("values", [pa.string(), pa.large_string(), *_VIEW], ids=str)
def test_call_put_words_as_string_large_string_and_string_view(values):
    # source of truth: the same rows with a plain bool is_call, through the same API
    assert _outputs(pa.table(_base(is_call=pa.array(WORDS).cast(values)))) == REFERENCE


def test_float16_and_float32_columns():
    # source of truth: the same values as float64 (every float16/float32 value is exactly
    # a double: IEEE 754 widening is exact), chosen representable so that no row is
    # missing and a float16 bug would show in the prices
    f16 = pa.array(np.array(STRIKES, np.float16))
    f32 = pa.array(np.array([0.25] * N, np.float32))
    vol16 = np.array([0.24, 0.22, 0.21, 0.2, 0.25, 0.3], np.float16)
    t = pa.table(_base(strike=f16, expiry_years=f32, vol=pa.array(vol16)))
    want = _outputs(pa.table(_base(vol=vol16.astype(np.float64).tolist())))
    assert want[1] == ["ok"] * N
    assert _outputs(t) == want


@pytest.mark.parametrize("dtype", [pa.decimal32(9, 4), pa.decimal64(18, 6),
                                   pa.decimal128(38, 10), pa.decimal256(50, 20)], ids=str)
def test_decimal_strikes_are_the_correctly_rounded_double(dtype):
    # source of truth: Python's float(Decimal), correctly rounded (Python docs); the
    # strike 123.4567 is one that Arrow's own decimal -> double cast misses by an ulp
    texts = ["123.4567", "95.0001", "100", "99.9999", "0.0003", "105.25"]
    strike = pa.array([decimal.Decimal(x) for x in texts], dtype)
    want = [float(decimal.Decimal(x)) for x in texts]
    out = volsweep.price(pa.table(_base(strike=strike)))
    ref = volsweep.price(pa.table(_base(strike=want)))
    assert out.column("price").to_pylist() == ref.column("price").to_pylist()
    assert ref.column("status").to_pylist() == ["ok"] * N


def test_int64_beyond_2_53_rounds_to_the_nearest_double():
    # source of truth: Python's int -> float conversion (round half to even, correctly
    # rounded); 2**53 + 1 is the first integer a double cannot hold
    big = [2 ** 53 + 1, 2 ** 53 + 3, 2 ** 62 + 1, 100, -(2 ** 63), 2 ** 63 - 1]
    strike = pa.array(big, pa.int64())
    spot = [float(x) for x in big]
    assert spot[0] == 2.0 ** 53 and spot[1] == 2.0 ** 53 + 4
    out = volsweep.price(pa.table(_base(strike=strike, spot=big)))
    ref = volsweep.price(pa.table(_base(strike=spot, spot=spot)))
    assert out.column("price").to_pylist() == ref.column("price").to_pylist()
    assert out.column("status").to_pylist() == ref.column("status").to_pylist()
    assert out.column("status").to_pylist()[:4] == ["ok"] * 4


# ------------------------------------------------------------------ time zones

ZONES = ["UTC", "America/New_York", "Asia/Tokyo", "+05:30"]


@pytest.mark.parametrize("zone", ZONES)
def test_time_zone_aware_expiry_and_as_of_columns(zone):
    # common practice: an instant is the same instant in every zone; Arrow stores an
    # aware timestamp as UTC, so the time to expiry must not depend on the zone shown
    expiry_utc = [dt.datetime(2031, 6, 20, 20, 0) + dt.timedelta(hours=h) for h in range(N)]
    as_of_utc = dt.datetime(2031, 3, 14, 16, 30)
    naive = pa.table(_with_expiry(expiry=pa.array(expiry_utc, pa.timestamp("us")),
                                  as_of=pa.array([as_of_utc] * N, pa.timestamp("ms"))))
    aware = naive.set_column(naive.column_names.index("expiry"), "expiry",
                             naive.column("expiry").cast(pa.timestamp("us", zone)))
    aware = aware.set_column(aware.column_names.index("as_of"), "as_of",
                             aware.column("as_of").cast(pa.timestamp("ms", zone)))
    assert str(aware.schema.field("expiry").type.tz) == zone
    want = volsweep.price(naive)
    assert want.column("status").to_pylist() == ["ok"] * N
    assert volsweep.price(aware).column("price").equals(want.column("price"))


def test_aware_and_naive_scalar_as_of_follow_the_utc_rule_without_warnings():
    # the rule (README): an aware time is converted to UTC, a naive one is UTC.
    # source of truth: the same instant written as naive UTC, through the same API
    t = pa.table(_with_expiry(
        expiry=pa.array([dt.datetime(2031, 6, 20, 20)] * N, pa.timestamp("s", "UTC"))))
    want = volsweep.price(t, as_of=dt.datetime(2031, 3, 14, 15, 30)).column("price")
    same_instant = ["2031-03-14T15:30:00", "2031-03-14T15:30Z", "2031-03-14T16:30:00+01:00",
                    "2031-03-14T10:30-05:00", "2031-03-15T00:30:00.000+0900",
                    "2031-03-14 15:30:00",
                    dt.datetime(2031, 3, 14, 16, 30, tzinfo=dt.timezone(dt.timedelta(hours=1))),
                    pd.Timestamp("2031-03-14 11:30", tz="America/New_York"),
                    np.datetime64("2031-03-14T15:30"),
                    pa.scalar(dt.datetime(2031, 3, 14, 15, 30), pa.timestamp("us", "UTC"))]
    with warnings.catch_warnings():
        warnings.simplefilter("error")             # numpy warns on zones it is handed
        for as_of in same_instant:
            got = volsweep.price(t, as_of=as_of).column("price")
            assert got.equals(want), as_of
    assert not volsweep.price(t, as_of="2031-03-14T15:30+01:00").column("price").equals(want)


# --------------------------------------------------------------------- pandas

def test_pandas_nullable_dtypes():
    # source of truth: the same values as numpy float64 / bool with the NA rows dropped,
    # through the same API; an NA is a missing input (common practice)
    df = pd.DataFrame({
        "spot": pd.array([101.5, 101.5, None, 101.5, 101.5, 101.5], dtype="Float64"),
        "strike": pd.array([90, 95, 100, 100, 105, 110], dtype="Int64"),
        "expiry_years": pd.array([0.25] * N, dtype="Float32"),
        "rate": [0.031] * N,
        "is_call": pd.array([True, False, True, None, True, False], dtype="boolean"),
        "vol": pd.array([0.24, 0.22, 0.21, 0.2, 0.25, 0.3], dtype="Float64"),
    })
    prices, statuses = _outputs(df)
    assert statuses == ["ok", "ok", "missing_input", "missing_input", "ok", "ok"]
    keep = [0, 1, 4, 5]
    assert [prices[i] for i in keep] == [REFERENCE[0][i] for i in keep]
    # float32 0.25 is exact, so the reference's float64 0.25 is the same number


def test_pandas_string_and_categorical_call_put():
    # source of truth: the same rows with a plain bool is_call, through the same API
    for dtype in ("string", "category", object):
        df = pd.DataFrame(_base(is_call=pd.array(WORDS, dtype=dtype)))
        assert _outputs(df) == REFERENCE, dtype
