"""Smiles: one raw SVI fit per slice of quotes (``fit_smiles``), and the fitted surface
evaluated at any strike and expiry (``smile_vols``).

The kernel (``volsweep.kernel.svi``) does the numerics; this module reads and checks the
columns, sorts the rows once into slices (skipped when they already are in order), hands
the kernel segment offsets, and assembles the tables.  Schema problems raise before any
work, naming the column; data problems never raise: every slice, and every row of
``smile_vols``, gets a status.
"""

from __future__ import annotations

import json
from collections.abc import Mapping

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from volsweep.kernel import black as _black
from volsweep.kernel import registry as _registry
from volsweep.kernel import svi as _svi
from volsweep.kernel.registry import DEFAULT_MODEL

from ._columns import (OptionError, _is_string_view, _scalar_time, _to_float64, _to_seconds,
                       _years_between)
from ._input import as_batches
from .chain_plan import take_rows
from ._output import new_array
from .loader import launch_guard

# our input names (each may be remapped with columns=)
INPUT_NAMES = ("strike", "forward", "spot", "rate", "discount", "div_yield",
               "expiry_years", "expiry", "as_of", "iv", "iv_bid", "iv_ask", "status")
PARAM_COLUMNS = ("svi_a", "svi_b", "svi_rho", "svi_m", "svi_sigma")
SMILE_COLUMNS = ("expiry_years", "forward") + PARAM_COLUMNS + (
    "rmse_iv", "atm_vol", "atm_skew", "butterfly_arbitrage", "durrleman_min_g",
    "durrleman_min_k", "calendar_arbitrage", "quotes_used", "status")
POINT_COLUMNS = ("smile_vol", "smile_status")
_META_BY = b"volsweep.smiles.by"
_META_TIME = b"volsweep.smiles.time"
_TIME_KEYS = ("expiry", "expiry_years")


def _words(names) -> pa.Array:
    return pa.array(names, pa.string())


_SLICE_WORDS = _words(_svi.SLICE_NAMES)
_POINT_WORDS = _words(_svi.POINT_NAMES)


def _status(codes: np.ndarray, words: pa.Array) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int8), pa.int8()), words)


def _table(data) -> pa.Table:
    schema, batches = as_batches(data)
    return pa.Table.from_batches(list(batches), schema=schema)


def _check_columns(columns) -> dict:
    if columns is None:
        return {}
    if not isinstance(columns, Mapping):
        raise TypeError("columns= must be a dict of {our input name: your column name}, "
                        f"got {type(columns).__name__}")
    for key, value in columns.items():
        if key not in INPUT_NAMES:
            raise OptionError("columns", "{option} names an unknown input {key!r}; known "
                              "inputs: {known}", key=key, known=", ".join(INPUT_NAMES))
        if value is not None and not isinstance(value, str):
            raise TypeError(f"columns[{key!r}] must be a column name (str) or None, got "
                            f"{value!r}")
    return dict(columns)


class _Reader:
    """Finds our inputs among the table's columns (``columns=`` remaps them)."""

    def __init__(self, table: pa.Table, columns: dict):
        self.table = table
        self.columns = columns
        names = table.schema.names
        for key, value in columns.items():
            if value is not None and value not in names:
                raise OptionError("columns", "{option} gives column {value!r} for {key!r}, "
                                  "but the input has no column {value!r}", key=key,
                                  value=value)
        dupes = {n for n in names if names.count(n) > 1}
        self.dupes = dupes

    def name(self, logical: str):
        col = self.columns.get(logical, logical)
        if col is None or col not in self.table.schema.names:
            return None
        if col in self.dupes:
            raise ValueError(f"column {col!r} appears more than once in the input")
        return col

    def require(self, logical: str, why: str) -> str:
        col = self.name(logical)
        if col is None:
            if logical in self.columns:
                raise OptionError("columns", "{option} maps {name!r} to no column, but it "
                                  "is required for {why}", name=logical, why=why)
            raise OptionError("columns", "missing column {name!r}: required for {why} "
                              "(map another column with {option})", name=logical, why=why)
        return col

    def floats(self, logical: str, col: str) -> np.ndarray:
        t = self.table.schema.field(col).type
        v = t
        while pa.types.is_dictionary(v):
            v = v.value_type
        if not (pa.types.is_floating(v) or pa.types.is_integer(v) or pa.types.is_decimal(v)
                or pa.types.is_null(v)):
            raise TypeError(f"column {col!r} ({logical}) must be numeric, got {t}")
        arr = self.table.column(col)
        if arr.num_chunks == 1 and t == pa.float64() and not arr.null_count:
            return arr.chunk(0).to_numpy()
        return np.concatenate([_to_float64(c) for c in arr.chunks]) if arr.num_chunks \
            else np.empty(0)

    def years(self, as_of) -> np.ndarray:
        """Time to expiry: ``expiry_years``, else ``expiry`` and ``as_of`` (ACT/365F)."""
        col = self.name("expiry_years")
        if col is not None:
            return self.floats("expiry_years", col)
        exp = self.require("expiry", "time to expiry ('expiry_years', or 'expiry' + as_of)")
        for c in (exp,):
            t = self.table.schema.field(c).type
            if not (pa.types.is_timestamp(t) or pa.types.is_date(t)):
                raise TypeError(f"column {c!r} (expiry) must be a timestamp or date, got {t}")
        arr = self.table.column(exp).combine_chunks()
        exp_s, exp_ns, valid = _to_seconds(arr)
        if isinstance(as_of, str) and as_of in self.table.schema.names:
            ref_s, ref_ns, ref_valid = _to_seconds(self.table.column(as_of).combine_chunks())
            valid = valid & ref_valid
        elif as_of is not None:
            ref_s, ref_ns = (np.int64(v) for v in _scalar_time(as_of))
        else:
            col = self.name("as_of")
            if col is None:
                raise OptionError("as_of", "missing column 'as_of': required for an "
                                  "'expiry' column (give {option} a time or a column name)")
            ref_s, ref_ns, ref_valid = _to_seconds(self.table.column(col).combine_chunks())
            valid = valid & ref_valid
        return _years_between(exp_s, exp_ns, ref_s, ref_ns, valid)

    def forward(self, model, T) -> np.ndarray:
        """The ``forward`` column when present, else (a model on spot) S e^{-qT} / D."""
        col = self.name("forward")
        if col is not None:
            return self.floats("forward", col)
        if model.underlying != "spot":
            self.require("forward", f"model {model.name!r}")
        S = self.floats("spot", self.require("spot", "the forward (give 'forward', or "
                                             "'spot' with 'rate' or 'discount')"))
        dcol = self.name("discount")
        if dcol is not None and self.name("rate") is not None:
            raise ValueError(f"conflicting columns {self.name('rate')!r} and {dcol!r}: give "
                             "one of 'rate' or 'discount'")
        if dcol is not None:
            D = self.floats("discount", dcol)
        else:
            r = self.floats("rate", self.require("rate", "the forward from the spot ('rate' "
                                                  "or 'discount')"))
            D = _black.discount_factors(r, T, np.empty(len(T)))
        qcol = self.name("div_yield")
        q = self.floats("div_yield", qcol) if qcol is not None else 0.0
        with np.errstate(all="ignore"):
            return S * np.exp(-q * T) / D


def _dense_codes(col: pa.ChunkedArray) -> np.ndarray:
    """int64 codes that order the rows as the column's values sort (nulls last, equal
    values equal codes)."""
    arr = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    if pa.types.is_dictionary(arr.type):
        # rank the (small) dictionary, then gather by the indices
        ranks = _dense_codes(pa.chunked_array([arr.dictionary]))
        idx = arr.indices
        if not idx.null_count:
            return ranks[idx.to_numpy(zero_copy_only=False)]
        codes = np.full(len(arr), ranks.max(initial=-1) + 1, np.int64)
        valid = np.asarray(pc.is_valid(idx).to_numpy(zero_copy_only=False), bool)
        ix = pc.fill_null(idx, 0).to_numpy(zero_copy_only=False).astype(np.int64)
        codes[valid] = ranks[ix[valid]]
        return codes
    t = arr.type
    if (pa.types.is_timestamp(t) or pa.types.is_date(t) or pa.types.is_integer(t)) \
            and not arr.null_count:
        v = arr.cast(pa.int64()) if not pa.types.is_integer(t) or t != pa.int64() else arr
        v = v.to_numpy(zero_copy_only=False)
        if v.size < 2 or np.all(v[1:] >= v[:-1]):        # sorted: ranks by the changes
            codes = np.zeros(v.size, np.int64)
            np.cumsum(v[1:] != v[:-1], out=codes[1:])
            return codes
    ranks = pc.rank(arr, sort_keys="ascending", tiebreaker="dense")     # nulls last
    return ranks.to_numpy(zero_copy_only=False).astype(np.int64) - 1


def _plain_strings(col: pa.ChunkedArray) -> pa.ChunkedArray:
    """String views (polars' strings and Categoricals) as large strings, which every
    compute function takes; dictionaries keep their indices.  Other columns as they are."""
    t = col.type
    if pa.types.is_dictionary(t) and _is_string_view(t.value_type):
        return pa.chunked_array(
            [pa.DictionaryArray.from_arrays(c.indices, c.dictionary.cast(pa.large_string()))
             for c in col.chunks],
            type=pa.dictionary(t.index_type, pa.large_string()))
    if _is_string_view(t):
        return col.cast(pa.large_string())
    return col


def _is_ok(col: pa.ChunkedArray) -> np.ndarray:
    """True where the status word is "ok" (a dictionary column through its dictionary)."""
    parts = []
    for chunk in col.chunks:
        if pa.types.is_dictionary(chunk.type):
            hit = np.asarray(pc.fill_null(pc.equal(chunk.dictionary, "ok"), False)
                             .to_numpy(zero_copy_only=False), bool)
            idx = chunk.indices
            if not hit.size:
                parts.append(np.zeros(len(chunk), bool))
            elif not idx.null_count:
                parts.append(hit[idx.to_numpy(zero_copy_only=False)])
            else:
                valid = np.asarray(pc.is_valid(idx).to_numpy(zero_copy_only=False), bool)
                ix = pc.fill_null(idx, 0).to_numpy(zero_copy_only=False)
                parts.append(hit[ix] & valid)
        else:
            parts.append(np.asarray(pc.fill_null(pc.equal(chunk, "ok"), False)
                                    .to_numpy(zero_copy_only=False), bool))
    return np.concatenate(parts) if parts else np.zeros(0, bool)


def _changes(col: pa.ChunkedArray) -> np.ndarray:
    """bool per pair of neighbouring rows: True where the value changes (nulls equal each
    other, NaNs each other)."""
    arr = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    if pa.types.is_dictionary(arr.type):
        idx = arr.indices
        if not idx.null_count and len(pc.unique(arr.dictionary)) == len(arr.dictionary):
            ix = idx.to_numpy(zero_copy_only=False)    # distinct entries: compare indices
            return ix[1:] != ix[:-1]
        c = _dense_codes(pa.chunked_array([arr]))
        return c[1:] != c[:-1]
    t = arr.type
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_timestamp(t) \
            or pa.types.is_date(t):
        if pa.types.is_timestamp(t) or pa.types.is_date(t):
            arr = arr.cast(pa.int64())
        v = arr.to_numpy(zero_copy_only=False)
        if arr.null_count:
            valid = np.asarray(pc.is_valid(arr).to_numpy(zero_copy_only=False), bool)
            v = np.where(valid, v, 0)
            return (v[1:] != v[:-1]) & ~(np.isnan(v[1:]) & np.isnan(v[:-1])) \
                | (valid[1:] != valid[:-1])
        if v.dtype.kind == "f":
            return (v[1:] != v[:-1]) & ~(np.isnan(v[1:]) & np.isnan(v[:-1]))
        return v[1:] != v[:-1]
    c = _dense_codes(pa.chunked_array([arr]))
    return c[1:] != c[:-1]


def _slices(key_table, keys, n_surface_keys, skey, n):
    """(row order or None when already in order, first row of each slice, surface code per
    slice): slices ordered by the surface keys, then the time key; rows by strike within.

    Already in order (the usual case: chains arrive sorted) is found without sorting: the
    runs of equal keys, then the keys of the runs' first rows ranked (one per slice)."""
    if n == 0:
        return None, np.zeros(0, np.int64), np.zeros(0, np.int64)
    change = np.zeros(n - 1, bool)
    for k in keys:
        change |= _changes(key_table.column(k))
    starts = np.r_[0, np.flatnonzero(change) + 1].astype(np.int64)
    heads = pa.table({k: take_rows(key_table.column(k), starts) for k in keys})
    m = len(starts)
    s_codes = _combine([_dense_codes(heads.column(k)) for k in keys[:n_surface_keys]], m)
    codes = _combine([s_codes, _dense_codes(heads.column(keys[-1]))], m)
    within = np.ones(n - 1, bool)
    within[starts[1:] - 1] = False                  # pairs inside one run
    if np.all(codes[1:] > codes[:-1]) and np.all(~within | (skey[1:] >= skey[:-1])):
        return None, starts, s_codes
    # not in order: codes for every row, one stable sort
    s_codes = _combine([_dense_codes(key_table.column(k)) for k in keys[:n_surface_keys]], n)
    codes = _combine([s_codes, _dense_codes(key_table.column(keys[-1]))], n)
    order = np.lexsort((skey, codes))
    sc = codes[order]
    starts = np.flatnonzero(np.r_[True, sc[1:] != sc[:-1]]).astype(np.int64)
    return order, starts, s_codes[order][starts]


def _combine(codes: list, n: int) -> np.ndarray:
    """One int64 code per row ordering rows by the tuple of ``codes``."""
    out = np.zeros(n, np.int64)
    for c in codes:
        width = int(c.max(initial=0)) + 1
        if out.size and (int(out.max()) + 1) * width >= 2 ** 62:
            _, out = np.unique(out, return_inverse=True)
            out = out.astype(np.int64)
        out = out * width + c
    return out


def _resolve_by(by, names) -> tuple:
    if isinstance(by, str):
        by = (by,)
    try:
        by = tuple(by)
    except TypeError:
        raise TypeError(f"by= must be a column name or a sequence of them, got {by!r}") \
            from None
    if not by or not all(isinstance(b, str) for b in by):
        raise TypeError(f"by= must be a column name or a non-empty sequence of them, got {by!r}")
    if len(set(by)) != len(by):
        raise ValueError(f"by= names a column twice: {by!r}")
    if by == ("underlying", "expiry") and "expiry" not in names and "expiry_years" in names:
        by = ("underlying", "expiry_years")      # the same slices, keyed by the years
    for b in by:
        if b not in names:
            raise ValueError(f"by= names column {b!r}, which the input does not have")
    return by


def _surface_and_time(by) -> tuple:
    """(the by columns that name a surface, the time key): the time key is the by column
    named expiry or expiry_years, else the last one."""
    time = next((b for b in by if b in _TIME_KEYS), by[-1])
    return tuple(b for b in by if b != time), time


def fit_smiles(data, model: str = DEFAULT_MODEL, by=("underlying", "expiry"),
               arbitrage_free: bool = False, columns: dict | None = None, *,
               as_of=None) -> pa.Table:
    """One raw SVI smile (Gatheral, 2004) per slice of quotes, fitted by the
    quasi-explicit method (De Marco and Martini, 2009), with arbitrage flags.

    ``data``: the output of ``implied_vol`` or ``sweep`` (``iv``; ``status``, when present,
    picks the rows with status ok; ``iv_bid`` and ``iv_ask``, when present, weight each
    quote by 1 / (iv_ask - iv_bid)), with ``strike``, the time to expiry (``expiry_years``,
    or ``expiry`` and ``as_of``) and the forward (a ``forward`` column, such as implied
    forwards attached to the chain, or, for a model on spot, ``spot``, ``rate`` or
    ``discount``, and ``div_yield``).  ``by``: the columns whose values make one slice.
    ``arbitrage_free``: keep every slice free of butterfly arbitrage (see
    ``volsweep.kernel.svi``).  Returns one row per slice: see the README.
    """
    entry = _registry.model(model)
    if entry.vol != "lognormal":
        raise ValueError(f"fit_smiles fits smiles of lognormal implied vols; model "
                         f"{entry.name!r} gives {entry.vol} vols")
    columns = _check_columns(columns)
    table = _table(data)
    names = table.schema.names
    by = _resolve_by(by, names)
    reader = _Reader(table, columns)
    if any(x.name == "shift" for x in entry.extras) and reader.name("shift") is not None:
        raise ValueError("fit_smiles fits smiles in ln(K/F); a 'shift' column (shifted "
                         "Black-76) is not supported: drop it or map it to no column")
    n = table.num_rows
    strike = reader.floats("strike", reader.require("strike", "the log-moneyness"))
    iv = reader.floats("iv", reader.require("iv", "the smile (the output of implied_vol)"))
    T = reader.years(as_of)
    F = reader.forward(entry, T)
    ok = np.isfinite(iv)
    scol = reader.name("status")
    if scol is not None:
        st = _plain_strings(table.column(scol))
        vt = st.type.value_type if pa.types.is_dictionary(st.type) else st.type
        if not (pa.types.is_string(vt) or pa.types.is_large_string(vt)):
            raise TypeError(f"column {scol!r} (status) must hold status words, got {st.type}")
        ok &= _is_ok(st)
    bcol, acol = reader.name("iv_bid"), reader.name("iv_ask")
    if bcol is not None and acol is not None:
        with np.errstate(all="ignore"):
            spread = np.subtract(reader.floats("iv_ask", acol), reader.floats("iv_bid", bcol),
                                 out=new_array(n))
    else:
        spread = new_array(n)
        spread.fill(np.nan)
    with np.errstate(all="ignore"):
        lnk = np.log(np.divide(strike, F, out=new_array(n)), out=new_array(n))

    # one sort into slices (skipped when the rows are already in order)
    surface_keys, time_key = _surface_and_time(by)
    key_table = table.select(list(dict.fromkeys(by)))
    key_table = pa.table([_plain_strings(c) for c in key_table.columns],
                         names=key_table.column_names).unify_dictionaries()
    keys = list(surface_keys) + [time_key]
    skey = np.where(np.isnan(strike), np.inf, strike)
    order, starts, surface = _slices(key_table, keys, len(surface_keys), skey, n)
    if order is not None:
        lnk, iv, spread, ok, F, T = (x[order] for x in (lnk, iv, spread, ok, F, T))
    offsets = np.r_[starts, n].astype(np.int64)
    with launch_guard():
        # work arrays (one per row) from Arrow's pool, which reuses freed memory (fresh
        # pages cost more to map than the fit of a slice; see bindings/_output.py)
        work = tuple(new_array(n) for _ in range(3))
        out = _svi.fit_slices(offsets, lnk, iv, spread, ok.view(np.int8), F, T, surface,
                              work=work,
                              arbitrage_free=bool(arbitrage_free))
    first_rows = starts if order is None else order[starts]
    return _smiles_table(table, by, time_key, first_rows, out)


def _smiles_table(table, by, time_key, first_rows, out) -> pa.Table:
    st = out["status"]
    ok = st == _svi.OK
    cols, fields = [], []
    for b in by:
        col = take_rows(table.column(b), first_rows)
        cols.append(col)
        fields.append(table.schema.field(b))
    have_values = np.isfinite(out["forward"])

    def floats(x, valid):
        return pa.array(x, pa.float64(), mask=~valid)

    def flag(x):
        return pa.array(x == 1, pa.bool_(), mask=x < 0)

    named = {"expiry_years": floats(out["expiry_years"], have_values),
             "forward": floats(out["forward"], have_values)}
    for j, name in enumerate(PARAM_COLUMNS):
        named[name] = floats(out["params"][:, j], ok)
    named["rmse_iv"] = floats(out["rmse_iv"], ok)
    named["atm_vol"] = floats(out["atm_vol"], ok & np.isfinite(out["atm_vol"]))
    named["atm_skew"] = floats(out["atm_skew"], ok & np.isfinite(out["atm_skew"]))
    named["butterfly_arbitrage"] = flag(out["butterfly"])
    named["durrleman_min_g"] = floats(out["min_g"], ok & np.isfinite(out["min_g"]))
    named["durrleman_min_k"] = floats(out["min_g_k"], ok & np.isfinite(out["min_g_k"]))
    named["calendar_arbitrage"] = flag(out["calendar"])
    named["quotes_used"] = pa.array(out["quotes_used"], pa.int64())
    named["status"] = _status(st, _SLICE_WORDS)
    for name in SMILE_COLUMNS:
        if name in by:
            if name in ("expiry_years", "forward"):
                continue                   # the by column gives it (same value per slice)
            raise ValueError(f"by= names column {name!r}, which is an output of fit_smiles")
        cols.append(named[name])
        fields.append(pa.field(name, named[name].type))
    meta = {_META_BY: json.dumps(list(by)).encode(), _META_TIME: time_key.encode()}
    return pa.Table.from_arrays(cols, schema=pa.schema(fields, metadata=meta))


# ----------------------------------------------------------------- fitted surface
def _smiles_parts(smiles: pa.Table):
    """(surface key names, time key, smiles table) of a ``fit_smiles`` result."""
    meta = smiles.schema.metadata or {}
    if _META_BY not in meta:
        raise ValueError("smiles must be a table returned by fit_smiles (its schema "
                         "metadata names the by columns)")
    by = tuple(json.loads(meta[_META_BY].decode()))
    time_key = meta[_META_TIME].decode()
    missing = [c for c in by + SMILE_COLUMNS if c not in smiles.schema.names]
    if missing:
        raise ValueError(f"smiles lacks the fit_smiles column(s) {', '.join(missing)}")
    return tuple(b for b in by if b != time_key), time_key, smiles


def _key_rows(table: pa.Table, keys) -> list:
    """Python tuples of the key values, one per row (via each column's distinct values)."""
    if not keys:
        return [()] * table.num_rows
    parts = []
    for k in keys:
        col = _plain_strings(table.column(k)).combine_chunks()
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        enc = pc.dictionary_encode(col)
        values = enc.dictionary.to_pylist() + [None]
        idx = pc.fill_null(enc.indices, len(values) - 1).to_numpy(zero_copy_only=False)
        parts.append((values, idx))
    return parts


def smile_vols(smiles, data, columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Implied vols of the fitted surfaces at each row's strike and expiry.

    ``smiles``: the result of ``fit_smiles``; ``data``: rows with the surface columns of
    its ``by`` (all but the expiry, e.g. ``underlying``), ``strike``, the time to expiry
    (``expiry_years``, or ``expiry`` and ``as_of``) and optionally ``forward`` (else the
    forward is interpolated from the fitted slices: ln F linear in T).  Adds
    ``smile_vol`` and ``smile_status``.  See the README for the interpolation in time
    and the extrapolation.
    """
    if not isinstance(smiles, pa.Table):
        smiles = _table(smiles)
    keys, _, smiles = _smiles_parts(smiles)
    columns = _check_columns(columns)
    table = _table(data)
    for name in POINT_COLUMNS:
        if name in table.schema.names:
            raise ValueError(f"input already has a column named {name!r}, which is an "
                             "output; rename or drop it first")
    for k in keys:
        if k not in table.schema.names:
            raise OptionError("columns", "missing column {name!r}: the smiles are keyed by "
                              "it", name=k)
    reader = _Reader(table, columns)
    n = table.num_rows
    strike = reader.floats("strike", reader.require("strike", "the log-moneyness"))
    T = reader.years(as_of)

    # the fitted slices, grouped by surface, each surface's slices by time
    ok_rows = np.flatnonzero(pc.fill_null(pc.equal(smiles.column("status"), "ok"), False)
                             .to_numpy(zero_copy_only=False))
    fitted = pa.Table.from_arrays([take_rows(c, ok_rows) for c in smiles.columns],
                                  schema=smiles.schema)   # (filter lacks string_view)
    fk = _key_rows(fitted, keys)
    nf = fitted.num_rows
    slice_keys = [tuple(v[idx[r]] for v, idx in fk) for r in range(nf)] if keys \
        else [()] * nf
    t_sl = fitted.column("expiry_years").to_numpy(zero_copy_only=False)
    f_sl = fitted.column("forward").to_numpy(zero_copy_only=False)
    params = np.column_stack([fitted.column(c).to_numpy(zero_copy_only=False)
                              for c in PARAM_COLUMNS]) if nf else np.zeros((0, 5))
    surfaces: dict = {}
    for r, key in enumerate(slice_keys):
        surfaces.setdefault(key, []).append(r)
    order, first, count = [], [], []
    for key, rows in surfaces.items():
        rows = sorted(rows, key=lambda r: t_sl[r])
        # one slice per expiry time: a repeated time keeps the first
        kept = [r for i, r in enumerate(rows) if i == 0 or t_sl[r] > t_sl[rows[i - 1]]]
        first.append(len(order))
        count.append(len(kept))
        order += kept
    order = np.asarray(order, np.int64)
    ids = {key: i for i, key in enumerate(surfaces)}

    # each row's surface
    dk = _key_rows(table, keys)
    if keys:
        combos = np.column_stack([idx for _, idx in dk])
        uniq, inverse = np.unique(combos, axis=0, return_inverse=True)
        lookup = np.array([ids.get(tuple(dk[j][0][u[j]] for j in range(len(keys))), -1)
                           for u in uniq], np.int64)
        row_surface = lookup[inverse.ravel()] if n else np.zeros(0, np.int64)
    else:
        row_surface = np.full(n, 0 if ids else -1, np.int64)

    fcol = reader.name("forward")
    if fcol is not None:
        F = reader.floats("forward", fcol)
    else:
        F = _interpolated_forwards(row_surface, T, first, count, t_sl[order], f_sl[order])
    missing = np.isnan(strike) | np.isnan(F)
    bad = ~missing & ~((strike > 0) & (strike < np.inf) & (F > 0) & (F < np.inf))
    with np.errstate(all="ignore"):
        lnk = np.log(strike / F)
    lnk[missing] = np.nan          # the kernel's missing_input
    lnk[bad] = np.inf              # its bad_input
    with launch_guard():
        w, st = _svi.surface_points(np.asarray(first, np.int64), np.asarray(count, np.int64),
                                    t_sl[order], params[order], row_surface, lnk, T)
    with np.errstate(all="ignore"):
        vol = np.sqrt(w / T)
    good = st == _svi.POINT_OK
    out = table.append_column("smile_vol", pa.array(vol, pa.float64(), mask=~good))
    return out.append_column("smile_status", _status(st, _POINT_WORDS))


def _interpolated_forwards(row_surface, T, first, count, t_sl, f_sl) -> np.ndarray:
    """ln F linear in T between a surface's fitted expiries, extended along the nearest
    segment beyond them (with one expiry: its forward)."""
    F = np.full(len(T), np.nan)
    for s, (j0, nj) in enumerate(zip(first, count)):
        rows = np.flatnonzero(row_surface == s)
        if not rows.size:
            continue
        ts, lf = t_sl[j0:j0 + nj], np.log(f_sl[j0:j0 + nj])
        t = T[rows]
        if nj == 1:
            F[rows] = f_sl[j0]
            continue
        val = np.interp(t, ts, lf)
        lo_slope = (lf[1] - lf[0]) / (ts[1] - ts[0])
        hi_slope = (lf[-1] - lf[-2]) / (ts[-1] - ts[-2])
        val = np.where(t < ts[0], lf[0] + lo_slope * (t - ts[0]), val)
        val = np.where(t > ts[-1], lf[-1] + hi_slope * (t - ts[-1]), val)
        F[rows] = np.exp(val)
    return F
