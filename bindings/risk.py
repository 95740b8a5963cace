"""Position risk: position and cash Greeks with totals per key, and spot x vol scenario
grids by full revaluation (``volsweep.position_greeks``, ``volsweep.scenarios``).

Group operations: they read the whole input (every batch), group the rows by the ``by``
columns and return one row per group (``position_greeks``) or per group and scenario
(``scenarios``), groups in the order of their first row in the input.  A row with a bad
status contributes nothing and is counted in its group; no group is dropped.

Position inputs, beside the model's usual inputs (mapped with ``columns=`` like them):
``quantity`` (signed contracts held; required) and ``multiplier`` (units of underlying
per contract; 1 where the column is absent).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from volsweep.kernel import registry as _registry
from volsweep.kernel import risk as _risk
from volsweep.kernel import status as _status
from volsweep.kernel.registry import DEFAULT_MODEL

from ._columns import ColumnPlan, OptionError, _to_float64, _value_type
from ._input import as_batches
from ._output import status_column
from .api import prepare
from .loader import launch_guard, load_kernel

# position inputs: name -> (default when the column is absent (None: required), doc)
POSITION_INPUTS = {"quantity": (None, "signed contracts held"),
                   "multiplier": (1.0, "units of underlying per contract")}

# the default grid: spot -10% .. +10% by 1%, vol -3 .. +3 points (147 scenarios)
DEFAULT_SPOT_SHOCKS = tuple(k / 100 for k in range(-10, 11))
DEFAULT_VOL_SHOCKS = tuple(k / 100 for k in range(-3, 4))
_DAYS_PER_YEAR = 365.0          # ACT/365F, as the expiry columns
_COUNT_COLUMNS = ("rows", "rows_left_out")


# ------------------------------------------------------------------ inputs

def _split_columns(columns):
    """``columns=`` split into the model's inputs (for the column plan) and the position
    inputs."""
    if columns is None:
        return None, {}
    if not isinstance(columns, Mapping):
        raise TypeError("columns= must be a dict of {our input name: your column name}, "
                        f"got {type(columns).__name__}")
    own = set(POSITION_INPUTS)
    rest = {k: v for k, v in columns.items() if k not in own}
    pos = {k: v for k, v in columns.items() if k in own}
    for key, value in pos.items():
        if value is not None and not isinstance(value, str):
            raise TypeError(f"columns[{key!r}] must be a column name (str) or None, got "
                            f"{value!r}")
    return rest, pos


def _position_sources(schema: pa.Schema, pos: dict) -> dict:
    """position input -> source column, checked against ``schema``."""
    names = schema.names
    out = {}
    for name, (default, doc) in POSITION_INPUTS.items():
        col = pos.get(name, name)
        if col is None:                               # mapped to no column
            if default is None:
                raise OptionError("columns", "{option} maps {name!r} to no column, but it "
                                  "is required for position risk", name=name)
            continue
        if col not in names:
            if name in pos:
                raise OptionError("columns", "{option} gives column {value!r} for {key!r}, "
                                  "but the input has no column {value!r}", key=name,
                                  value=col)
            if default is None:
                raise OptionError("columns", "missing column {name!r} ({doc}): required for "
                                  "position risk; name your column with {option}",
                                  name=name, doc=doc)
            continue
        if names.count(col) > 1:
            raise ValueError(f"column {col!r} appears more than once in the input")
        t = _value_type(schema.field(col).type)
        if not (pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_decimal(t)
                or pa.types.is_null(t)):
            raise TypeError(f"column {col!r} ({name}) must be numeric, got {t}")
        out[name] = col
    return out


def _check_by(by, schema: pa.Schema, reserved) -> tuple:
    if isinstance(by, str):
        by = (by,)
    try:
        by = tuple(by)
    except TypeError:
        raise TypeError(f"by= must be a column name or a list of them, got {by!r}") from None
    for col in by:
        if not isinstance(col, str):
            raise TypeError(f"by= must name columns (str), got {col!r}")
        if col not in schema.names:
            raise ValueError(f"by= names column {col!r}, which the input does not have")
        if schema.names.count(col) > 1:
            raise ValueError(f"column {col!r} appears more than once in the input")
        if col in reserved:
            raise ValueError(f"by= column {col!r} has the name of an output column; rename "
                             "it first")
    if len(set(by)) != len(by):
        raise ValueError(f"by= names a column twice: {by!r}")
    return by


def _float_input(batch: pa.RecordBatch, col: str) -> np.ndarray:
    arr = batch.column(col)
    if arr.type == pa.float64() and not arr.null_count:
        return arr.to_numpy()
    return _to_float64(arr)


def _position_arrays(batch, sources):
    q = _float_input(batch, sources["quantity"])
    m = (_float_input(batch, sources["multiplier"]) if "multiplier" in sources
         else np.ones(batch.num_rows))
    return q, m


def position_status(status: np.ndarray, q: np.ndarray, m: np.ndarray) -> np.ndarray:
    """The row status with the position inputs folded in, in the priority of
    kernel/status.py: a null/NaN quantity or multiplier is missing_input, a +-inf one
    non_finite_input (unless the row is already missing_input), and an ok row whose
    quantity x multiplier is not a finite double out_of_range."""
    with np.errstate(all="ignore"):
        qm = q * m
    st = np.asarray(status, np.int8)
    nan = np.isnan(q) | np.isnan(m)
    inf = np.isinf(q) | np.isinf(m)
    st = np.where(inf & (st != _status.MISSING_INPUT), np.int8(_status.NON_FINITE_INPUT), st)
    st = np.where(nan, np.int8(_status.MISSING_INPUT), st)
    st = np.where((st == _status.OK) & ~np.isfinite(qm), np.int8(_status.OUT_OF_RANGE), st)
    return st.astype(np.int8)


# ------------------------------------------------------------------ groups

def _plain_keys(arr) -> pa.Array:
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    from .chain_plan import _rankable

    while pa.types.is_dictionary(arr.type) or pa.types.is_run_end_encoded(arr.type):
        if pa.types.is_dictionary(arr.type):   # (decoding lacks view values, as polars')
            arr = pa.DictionaryArray.from_arrays(arr.indices, _rankable(arr.dictionary))
        arr = (arr.dictionary_decode() if pa.types.is_dictionary(arr.type)
               else pc.run_end_decode(arr))
    if pa.types.is_floating(arr.type):   # -0.0 + 0.0 is +0.0: one key, as -0.0 == 0.0
        arr = pc.add(arr.cast(pa.float64()), 0.0)
    return arr


def group_ids(keys: list, n: int):
    """(group id per row, first row of each group): groups numbered in the order of their
    first row; a null key is a key of its own.  No keys: one group of every row."""
    if not keys:
        return np.zeros(n, np.int64), np.zeros(1 if n else 0, np.int64)
    codes, cards = [], []
    for arr in keys:
        enc = pc.dictionary_encode(_plain_keys(arr), null_encoding="encode")
        codes.append(enc.indices.to_numpy(zero_copy_only=False).astype(np.int64))
        cards.append(len(enc.dictionary))
    if len(codes) == 1:
        code = codes[0]
    elif math.prod(cards) < 2 ** 62:
        code = codes[0]
        for c, card in zip(codes[1:], cards[1:]):
            code = code * card + c
    else:
        code = np.unique(np.stack(codes, axis=1), axis=0, return_inverse=True)[1].ravel()
    _, first, inv = np.unique(code, return_index=True, return_inverse=True)
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return rank[inv.ravel()].astype(np.int64), first[order].astype(np.int64)


def _key_columns(by, key_arrays, rows_idx) -> dict:
    from .chain_plan import take_rows

    return {name: take_rows(arr, rows_idx) for name, arr in zip(by, key_arrays)}


def _chunked(parts, field_type) -> pa.ChunkedArray:
    return pa.chunked_array(parts, type=field_type)


def _counts(gid, n_groups, left_out) -> tuple:
    rows = np.bincount(gid, minlength=n_groups).astype(np.int64)
    out = np.bincount(gid, weights=left_out, minlength=n_groups).astype(np.int64)
    return rows, out


# ------------------------------------------------------------------ position Greeks

def _grouped(keys: dict, schema: pa.Schema, by, st: np.ndarray):
    """(key arrays, group id per row, first row per group, rows and rows left out per
    group) of the rows whose statuses are ``st``."""
    key_arrays = [_chunked(keys[c], schema.field(c).type) for c in by]
    gid, first = group_ids(key_arrays, len(st))
    rows, left_out = _counts(gid, len(first), st != _status.OK)
    return key_arrays, gid, first, rows, left_out


def _greek_request(which):
    if which is None or isinstance(which, str):
        return which
    try:
        return list(which)
    except TypeError:
        raise TypeError(f"which= must be a Greek name, a list of them or None, got "
                        f"{which!r}") from None


def position_greeks(data, by=("underlying",), which=None, model: str = DEFAULT_MODEL,
                    units: str = "raw", columns: dict | None = None, *, as_of=None,
                    per_row: bool = False, exercise: str | None = None) -> pa.Table:
    """Position Greeks (Greek x quantity x multiplier), cash delta and cash gamma, summed
    per ``by`` key.

    Reads what ``greeks`` reads plus ``quantity`` and ``multiplier`` (see the module
    docstring).  Returns one row per group (in the order of its first row): the ``by``
    columns, ``rows``, ``rows_left_out`` (rows with a bad status, which contribute
    nothing), then ``position_<greek>`` for each Greek of ``which`` and ``cash_delta``,
    ``cash_gamma`` (where delta, gamma are asked for).  ``per_row=True`` returns the
    per-row values instead: every input column, the same value columns and ``status``.
    ``exercise``: as for ``greeks`` (American exercise: ``model="bsm"``).
    """
    schema, batches = as_batches(data)
    rest, pos = _split_columns(columns)
    plan = ColumnPlan.build(schema, model=model, columns=rest, need_vol=True,
                            need_quote=False, as_of=as_of, exercise=exercise)
    sources = _position_sources(schema, pos)
    mapped = {v for v in (rest or {}).values() if v is not None and v in schema.names}
    used = list(dict.fromkeys(list(plan.source.values()) + sorted(mapped)))
    sub_schema = pa.schema([schema.field(c) for c in used])
    prep = prepare("greeks", sub_schema, model=model, which=_greek_request(which),
                   units=units, columns=rest, as_of=as_of, exercise=exercise)
    names = prep.greeks
    values = [f"position_{g}" for g in names]
    values += [c for g, c in (("delta", "cash_delta"), ("gamma", "cash_gamma")) if g in names]
    reserved = set(values) | set(_COUNT_COLUMNS) | {"status"}
    by = _check_by(by, schema, reserved if not per_row else ())
    if per_row:
        for c in values + ["status"]:
            if c in schema.names:
                raise ValueError(f"input already has a column named {c!r}, which is an "
                                 "output; rename or drop it first")
    underlying = _registry.model(model).underlying
    out_batches, cols, st_parts, keys = [], {c: [] for c in values}, [], {c: [] for c in by}
    for batch in batches:
        g = prep(batch.select(used))
        q, m = _position_arrays(batch, sources)
        kernel_st = g.column("status").indices.to_numpy(zero_copy_only=False)
        st = position_status(kernel_st, q, m)
        ok = st == _status.OK
        with np.errstate(all="ignore"):
            qm = q * m
            per = {}
            for name in names:
                per[name] = _to_float64(g.column(name)) * qm
            U = plan.floats(batch, underlying)
            if "delta" in names:
                per["cash_delta"] = per["delta"] * U
            if "gamma" in names:
                per["cash_gamma"] = per["gamma"] * U * U
        batch_cols = {}
        for name, v in per.items():
            col = name if name.startswith("cash_") else f"position_{name}"
            valid = ok & np.isfinite(v)
            batch_cols[col] = pa.array(v, pa.float64(), mask=~valid)
            cols[col].append(batch_cols[col])
        st_parts.append(st)
        for c in by:
            keys[c].append(batch.column(c))
        if per_row:
            arrays = list(batch.columns) + [batch_cols[c] for c in values]
            arrays.append(status_column(st))
            out_batches.append(pa.RecordBatch.from_arrays(
                arrays, names=schema.names + values + ["status"]))
    if per_row:
        out_schema = schema
        for c in values:
            out_schema = out_schema.append(pa.field(c, pa.float64()))
        out_schema = out_schema.append(pa.field("status", status_column(
            np.zeros(0, np.int8)).type))
        return pa.Table.from_batches(out_batches, schema=out_schema)
    st = np.concatenate(st_parts) if st_parts else np.zeros(0, np.int8)
    n = len(st)
    key_arrays, gid, first, rows, left_out = _grouped(keys, schema, by, st)
    n_groups = len(first)
    out = _key_columns(by, key_arrays, first)
    out["rows"] = pa.array(rows, pa.int64())
    out["rows_left_out"] = pa.array(left_out, pa.int64())
    for c in values:
        arr = pa.chunked_array(cols[c], pa.float64())
        v = arr.to_numpy() if n else np.zeros(0)      # nulls come out as NaN
        has = ~np.isnan(v)
        total = np.bincount(gid, weights=np.where(has, v, 0.0), minlength=n_groups)
        n_has = np.bincount(gid, weights=has, minlength=n_groups)
        # null where no ok row, or where an ok row has no finite value (an infinite limit)
        valid = (n_has > 0) & (n_has == rows - left_out)
        out[c] = pa.array(total, pa.float64(), mask=~valid)
    return pa.table(out)


# ------------------------------------------------------------------ scenarios

def _shocks(values, what: str) -> np.ndarray:
    if isinstance(values, (int, float)):
        values = (values,)
    if isinstance(values, (str, bytes)):
        raise TypeError(f"{what}= must be a list of numbers, got {values!r}")
    try:
        arr = np.asarray([float(v) for v in values], np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"{what}= must be a list of numbers, got {values!r}") from None
    if arr.size == 0:
        raise ValueError(f"{what}= is empty: give at least one shock (0 for none)")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{what}= must be finite numbers, got {values!r}")
    return arr


class ScenarioResult:
    """The grid (``table``) and the status counts of the input rows (``statuses``:
    status name -> rows)."""

    def __init__(self, table: pa.Table, statuses: Counter):
        self.table = table
        self.statuses = statuses


def run_scenarios(schema, batches, *, model, by, spot_shocks, vol_shocks, days, columns,
                  as_of, progress, exercise=None) -> ScenarioResult:
    """``scenarios`` over (schema, batches), with the status counts of the rows."""
    european = _registry.model(model)
    ds = _shocks(DEFAULT_SPOT_SHOCKS if spot_shocks is None else spot_shocks, "spot_shocks")
    dv = _shocks(DEFAULT_VOL_SHOCKS if vol_shocks is None else vol_shocks, "vol_shocks")
    if european.vol == "lognormal" and np.any(ds <= -1.0):
        raise ValueError(f"spot_shocks= must be > -1 (-100%) under model {model!r}, whose "
                         f"underlying is positive; got {min(ds)!r}")
    try:
        days = float(days)
    except (TypeError, ValueError):
        raise TypeError(f"days= must be a number, got {days!r}") from None
    if not (math.isfinite(days) and days >= 0.0):
        raise ValueError(f"days= must be a finite number >= 0, got {days!r}")
    rest, pos = _split_columns(columns)
    plan = ColumnPlan.build(schema, model=model, columns=rest, need_vol=True,
                            need_quote=False, as_of=as_of, exercise=exercise)
    entry = plan.entry          # the registry entry with the exercise style asked for
    pricer = _risk.pricer_of(entry.name, entry.exercise)
    sources = _position_sources(schema, pos)
    out_names = ("spot_shock", "vol_shock", "pnl", "rows", "rows_left_out",
                 "rows_shock_invalid")
    by = _check_by(by, schema, out_names)
    by_name = {x.name: x for x in entry.extras}
    read = [by_name[name] for name in pricer.extras]          # as X1, X2
    load_kernel(entry.name, "price", exercise=entry.exercise)
    parts = {k: [] for k in ("U", "K", "T", "D", "X1", "X2", "vol", "cp", "st", "w")}
    keys = {c: [] for c in by}
    for batch in batches:
        T = plan.expiry_years(batch)
        U = plan.floats(batch, entry.underlying)
        K = plan.floats(batch, "strike")
        D = plan.discount(batch, T)
        extras = {x.name: plan.extra(batch, x) for x in entry.extras}
        vol = plan.floats(batch, "vol")
        cp = plan.call_put(batch)
        n = batch.num_rows
        price, st = np.empty(n), np.empty(n, np.int8)
        with launch_guard():
            entry.kernels["price"](U, K, T, D, *extras.values(), vol, cp, price, st)
        q, m = _position_arrays(batch, sources)
        parts["U"].append(U)
        parts["K"].append(K)
        parts["T"].append(T)
        parts["D"].append(D)
        for j, key in enumerate(("X1", "X2")):
            parts[key].append(extras[read[j].name] if j < len(read) else np.zeros(n))
        parts["vol"].append(vol)
        parts["cp"].append(cp)
        parts["st"].append(position_status(st, q, m))
        with np.errstate(all="ignore"):
            parts["w"].append(q * m)
        for c in by:
            keys[c].append(batch.column(c))
    arrays = {k: (np.concatenate(v) if len(v) != 1 else v[0]) if v else
              np.zeros(0, np.int8 if k in ("cp", "st") else np.float64)
              for k, v in parts.items()}
    st = arrays["st"]
    n = len(st)
    key_arrays, gid, first, rows, left_out = _grouped(keys, schema, by, st)
    n_groups = len(first)
    order = None
    if n and np.any(gid[1:] < gid[:-1]):
        order = np.argsort(gid, kind="stable")
    sorted_ = {k: (v[order] if order is not None else v) for k, v in arrays.items()}
    g_sorted = gid[order] if order is not None else gid
    nsc = len(ds) * len(dv)
    pnl = np.empty((n_groups, nsc))
    bad = np.empty((n_groups, nsc), np.int64)
    load_kernel_scenarios(entry.name, entry.exercise)
    with launch_guard():
        _risk.scenario_pnl(entry.name, sorted_["U"], sorted_["K"], sorted_["T"],
                           sorted_["D"], sorted_["X1"], sorted_["X2"], sorted_["vol"],
                           sorted_["cp"],
                           (sorted_["st"] == _status.OK).astype(np.int8), sorted_["w"],
                           g_sorted, ds, dv, days / _DAYS_PER_YEAR, pnl, bad,
                           progress=None if progress is None else progress.update,
                           exercise=entry.exercise)
    rep = np.repeat(first, nsc)
    out = _key_columns(by, key_arrays, rep)
    out["spot_shock"] = pa.array(np.tile(np.repeat(ds, len(dv)), n_groups), pa.float64())
    out["vol_shock"] = pa.array(np.tile(dv, len(ds) * n_groups), pa.float64())
    rows_r = np.repeat(rows, nsc)
    left_r = np.repeat(left_out, nsc)
    bad_r = bad.ravel()
    flat = pnl.ravel()
    # null where no row contributed, or where the sum overflowed (not a finite double)
    out["pnl"] = pa.array(flat, pa.float64(),
                          mask=((rows_r - left_r - bad_r) <= 0) | ~np.isfinite(flat))
    out["rows"] = pa.array(rows_r, pa.int64())
    out["rows_left_out"] = pa.array(left_r, pa.int64())
    out["rows_shock_invalid"] = pa.array(bad_r, pa.int64())
    counts = np.bincount(st, minlength=len(_status.NAMES)) if n else []
    statuses = Counter({_status.NAMES[c]: int(k) for c, k in enumerate(counts) if k})
    fields = [schema.field(c) for c in by] + [
        pa.field(c, pa.int64() if c.startswith("rows") else pa.float64()) for c in out_names]
    return ScenarioResult(pa.table(out, schema=pa.schema(fields)), statuses)


_SCENARIO_LOADED: set = set()


def load_kernel_scenarios(model: str, exercise: str = "european") -> None:
    """Compile (or load) the model's scenario loops once per process, on a few rows, with
    a note on stderr when that takes long (a compile)."""
    if (model, exercise) in _SCENARIO_LOADED:
        return
    import sys
    import time

    t0 = time.perf_counter()
    n = 3
    ones = np.ones(n)
    with launch_guard():
        _risk.scenario_pnl(model, ones, ones, ones, ones, np.zeros(n), np.zeros(n),
                           0.2 * ones, np.ones(n, np.int8), np.ones(n, np.int8), ones,
                           np.zeros(n, np.int64), [0.0], [0.0], 0.0, np.empty((1, 1)),
                           np.empty((1, 1), np.int64), exercise=exercise)
    took = time.perf_counter() - t0
    if took > 2.0:
        print(f"volsweep: compiled the {model} ({exercise}) scenario kernels in {took:.0f} s "
              "(once per machine)", file=sys.stderr)
    _SCENARIO_LOADED.add((model, exercise))


def scenarios(data, model: str = DEFAULT_MODEL, by=("underlying",),
              spot_shocks=None, vol_shocks=None, days=0.0,
              columns: dict | None = None, *, as_of=None, progress=None,
              exercise: str | None = None) -> pa.Table:
    """P&L of every group under a grid of spot and vol shocks, by full revaluation.

    One row per (group, spot shock, vol shock), groups in the order of their first row,
    shocks in the order given (spot outer): the ``by`` columns, ``spot_shock``,
    ``vol_shock``, ``pnl`` = sum of quantity x multiplier x (price at the shocked inputs
    - price at the base inputs), ``rows``, ``rows_left_out`` (bad status: nothing
    contributed) and ``rows_shock_invalid`` (no value at the shocked inputs).
    ``spot_shocks``: relative (0.05 = +5%) on the model's underlying input (None:
    -10% to +10% by 1%); ``vol_shocks``: absolute (0.01 = one vol point; a normal vol's
    units under bachelier; None: -0.03 to +0.03 by 0.01); ``days``: calendar days the
    valuation moves forward (>= 0).  ``progress``: None, or an object whose
    ``update(n)`` is told of the rows revalued (e.g. a tqdm bar).  ``exercise``: as for
    ``price``: "american" or "european" for every row, or None for each row's style from
    an ``exercise`` column (European without one); American rows are revalued by the
    American price (``model="bsm"``), a boundary solve per revaluation.
    """
    schema, batches = as_batches(data)
    return run_scenarios(schema, batches, model=model, by=by, spot_shocks=spot_shocks,
                         vol_shocks=vol_shocks, days=days, columns=columns, as_of=as_of,
                         progress=progress, exercise=exercise).table
