"""Map, validate and convert input columns into the kernel's float64 / int8 arrays.

A ``ColumnPlan`` is built once per call from the schema (so schema problems raise before
any work is done, naming the column) and then extracts numpy arrays from each record batch.

Logical inputs and the default column names (any of them can be remapped with
``columns={"strike": "K", ...}``):

============== ==================================================================
``spot``       underlying spot price (model ``bsm``)
``forward``    forward / futures price (model ``black76``)
``strike``     strike
``expiry_years`` time to expiry in years; or ``expiry`` (timestamp/date) plus ``as_of``
``rate``       continuously compounded rate; or ``discount`` (discount factor)
``div_yield``  continuous dividend yield / borrow (``bsm``; 0 if absent)
``is_call``    bool, or strings call/put/C/P (any case)
``vol``        volatility (pricing and Greeks)
``premium``    price to invert; or ``bid`` and ``ask``
============== ==================================================================
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

MODELS = ("bsm", "black76")
UNDERLYING = {"bsm": "spot", "black76": "forward"}
KNOWN_NAMES = ("spot", "forward", "strike", "expiry_years", "expiry", "as_of", "rate",
               "discount", "div_yield", "is_call", "vol", "premium", "bid", "ask")
_NS_PER_YEAR = 365.0 * 86400.0 * 1e9  # ACT/365F
_CALL_WORDS = ["call", "c"]
_PUT_WORDS = ["put", "p"]


def check_model(model) -> str:
    if model not in MODELS:
        raise ValueError(f"unknown model {model!r}; expected one of {', '.join(MODELS)}")
    return model


def _readonly(a: np.ndarray) -> np.ndarray:
    # One numba specialisation for every input: all kernel inputs are read-only arrays.
    if a.flags.writeable:
        a = a.view()
        a.flags.writeable = False
    return a


@dataclass
class ColumnPlan:
    """Which source column feeds each logical input; validated against one schema."""

    model: str
    source: dict = field(default_factory=dict)   # logical name -> source column name
    as_of_value: object = None                    # scalar as_of (int64 ns), if given
    quote: str = "none"                           # "premium", "bid_ask" or "none"

    # ------------------------------------------------------------------ building
    @classmethod
    def build(cls, schema: pa.Schema, model: str, columns: dict | None, *, need_vol: bool,
              need_quote: bool, as_of=None) -> "ColumnPlan":
        model = check_model(model)
        columns = dict(columns or {})
        for key, value in columns.items():
            if key not in KNOWN_NAMES:
                raise ValueError(f"columns= maps unknown input {key!r}; known inputs: "
                                 f"{', '.join(KNOWN_NAMES)}")
            if not isinstance(value, str):
                raise TypeError(f"columns[{key!r}] must be a column name (str), got {value!r}")
        names = schema.names
        dupes = sorted({n for n in names if names.count(n) > 1})
        plan = cls(model)

        def present(logical):
            col = columns.get(logical, logical)
            if col in dupes:
                raise ValueError(f"column {col!r} appears more than once in the input")
            return col if col in names else None

        def require(logical, why=""):
            col = present(logical)
            if col is None:
                mapped = columns.get(logical)
                hint = f" (mapped from {logical!r})" if mapped else ""
                raise ValueError(f"missing column {columns.get(logical, logical)!r}{hint}: "
                                 f"required for {why or logical}")
            plan.source[logical] = col
            return col

        def exclusive(a, b):
            if present(a) and present(b):
                raise ValueError(f"conflicting columns {present(a)!r} and {present(b)!r}: "
                                 f"give one of {a!r} or {b!r}")

        und = UNDERLYING[model]
        require(und, f"model {model!r}")
        require("strike")
        require("is_call")
        # Time to expiry: 'expiry_years' when present; 'expiry' (+ as_of) when it is the
        # only one, or when the caller maps 'expiry' explicitly.  Mapping both conflicts.
        if "expiry" in columns and "expiry_years" in columns:
            exclusive("expiry_years", "expiry")
        if present("expiry") and ("expiry" in columns or not present("expiry_years")):
            require("expiry")
            if isinstance(as_of, str) and as_of in names:
                plan.source["as_of"] = as_of
            elif as_of is not None:
                plan.as_of_value = _scalar_ns(as_of)
            else:
                require("as_of", "an 'expiry' column (give as_of= a time or a column)")
        else:
            require("expiry_years", "time to expiry ('expiry_years', or 'expiry' + as_of)")
        exclusive("rate", "discount")
        if present("discount"):
            require("discount")
        else:
            require("rate", "discounting ('rate' or 'discount')")
        if model == "bsm" and present("div_yield"):
            require("div_yield")
        if need_vol:
            require("vol")
        if need_quote:
            if present("premium"):
                exclusive("premium", "bid")
                require("premium")
                plan.quote = "premium"
            elif present("bid") or present("ask"):
                require("bid", "a bid/ask quote")
                require("ask", "a bid/ask quote")
                plan.quote = "bid_ask"
            else:
                raise ValueError(f"missing column {columns.get('premium', 'premium')!r}: "
                                 "implied vol needs 'premium' or 'bid' and 'ask'")
        plan._check_types(schema)
        return plan

    def _check_types(self, schema: pa.Schema) -> None:
        for logical, col in self.source.items():
            t = schema.field(col).type
            if pa.types.is_dictionary(t):
                t = t.value_type
            if logical == "is_call":
                ok = pa.types.is_boolean(t) or pa.types.is_string(t) or pa.types.is_large_string(t)
                want = "bool or strings call/put/C/P"
            elif logical in ("expiry", "as_of"):
                ok = pa.types.is_timestamp(t) or pa.types.is_date(t)
                want = "a timestamp or date"
            else:
                ok = (pa.types.is_floating(t) or pa.types.is_integer(t)
                      or pa.types.is_decimal(t) or pa.types.is_null(t))
                want = "numeric"
            if not ok:
                raise TypeError(f"column {col!r} ({logical}) must be {want}, got {t}")

    # ---------------------------------------------------------------- extraction
    def floats(self, batch: pa.RecordBatch, logical: str) -> np.ndarray:
        return _to_float64(batch.column(self.source[logical]))

    def underlying(self, batch):
        return self.floats(batch, UNDERLYING[self.model])

    def expiry_years(self, batch) -> np.ndarray:
        if "expiry_years" in self.source:
            return self.floats(batch, "expiry_years")
        exp_ns, valid = _to_ns(batch.column(self.source["expiry"]))
        if self.as_of_value is not None:
            ref = np.int64(self.as_of_value)
        else:
            ref, ref_valid = _to_ns(batch.column(self.source["as_of"]))
            valid = valid & ref_valid
        # subtract in integer nanoseconds, then convert: no loss for any date range
        years = (exp_ns - ref).astype(np.float64) / _NS_PER_YEAR
        years[~valid] = np.nan
        return _readonly(years)

    def discount(self, batch, T: np.ndarray) -> np.ndarray:
        if "discount" in self.source:
            return self.floats(batch, "discount")
        r = self.floats(batch, "rate")
        with np.errstate(all="ignore"):
            return _readonly(np.exp(-r * T))

    def div_yield(self, batch) -> np.ndarray:
        if "div_yield" in self.source:
            return self.floats(batch, "div_yield")
        return _readonly(np.zeros(batch.num_rows))

    def call_put(self, batch) -> np.ndarray:
        return _to_call_put(batch.column(self.source["is_call"]))


def _to_float64(arr: pa.Array) -> np.ndarray:
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if arr.type != pa.float64():
        arr = pc.cast(arr, pa.float64(), safe=False)
    if arr.null_count:
        arr = pc.fill_null(arr, np.nan)
    return _readonly(arr.to_numpy(zero_copy_only=False))


def _to_ns(arr: pa.Array):
    """Timestamps/dates as (int64 nanoseconds since the epoch, validity mask)."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_date(arr.type):
        arr = pc.cast(arr, pa.timestamp("s"))
    tz = getattr(arr.type, "tz", None)
    arr = pc.cast(arr, pa.timestamp("ns", tz=tz)).cast(pa.int64())
    valid = pc.is_valid(arr).to_numpy(zero_copy_only=False)
    return pc.fill_null(arr, 0).to_numpy(zero_copy_only=False), valid


def _scalar_ns(value) -> int:
    """A scalar as_of (datetime, date, numpy datetime64, ISO string, Arrow scalar) in ns."""
    if isinstance(value, pa.Scalar):
        value = value.as_py()
    if isinstance(value, str):
        try:
            value = np.datetime64(value)
        except ValueError:
            raise ValueError(f"as_of={value!r} is neither a column nor a timestamp") from None
    if isinstance(value, _dt.datetime) and value.tzinfo is not None:
        value = value.astimezone(_dt.timezone.utc).replace(tzinfo=None)
    if isinstance(value, (_dt.date, np.datetime64)):
        return int(np.datetime64(value, "ns").astype(np.int64))
    raise TypeError(f"as_of must be a timestamp, date or column name, got {type(value).__name__}")


def _to_call_put(arr: pa.Array) -> np.ndarray:
    """+1 call, -1 put, 0 for null or an unrecognised word (gives status missing_input)."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_boolean(arr.type):
        cp = pc.if_else(arr, pa.scalar(1, pa.int8()), pa.scalar(-1, pa.int8()))
    else:
        words = pc.utf8_lower(pc.utf8_trim_whitespace(arr))
        cp = pc.if_else(pc.is_in(words, pa.array(_CALL_WORDS)), pa.scalar(1, pa.int8()),
                        pc.if_else(pc.is_in(words, pa.array(_PUT_WORDS)),
                                   pa.scalar(-1, pa.int8()), pa.scalar(0, pa.int8())))
    cp = pc.fill_null(cp, pa.scalar(0, pa.int8()))
    return _readonly(cp.to_numpy(zero_copy_only=False).astype(np.int8, copy=False))
