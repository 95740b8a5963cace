"""Columns and groups of the chain operations (``implied_forwards``,
``model_free_variance``): which input feeds each logical name, the whole input read into
the few numpy arrays the kernels need, and the rows cut into groups by the ``by``
columns with at most one sort.

A group operation needs every row of a group before it can say anything about it, so the
input is read to the end (only the columns it uses are kept as arrays; with
``attach=True`` the batches too, to append per-row columns to them).  Groups are the
distinct combinations of the ``by`` columns, in ascending order of them (nulls last); a
group is never dropped.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from volsweep.kernel import chains as _kchains
from volsweep.kernel.registry import DEFAULT_MODEL

from ._columns import KNOWN_NAMES, ColumnPlan, OptionError, _scalar_time
from ._input import as_batches

QUOTE_CHOICES = ("auto", "premium", "bid-ask")
_INT64_MAX = np.iinfo(np.int64).max


def _by_names(by) -> tuple:
    if isinstance(by, str):
        by = (by,)
    try:
        names = tuple(by)
    except TypeError:
        raise TypeError(f"by= must be a column name or a sequence of them, got {by!r}") \
            from None
    if not names or not all(isinstance(b, str) for b in names):
        raise TypeError(f"by= must be a column name or a non-empty sequence of them, "
                        f"got {by!r}")
    if len(set(names)) != len(names):
        raise ValueError(f"by= names a column twice: {names!r}")
    return names


@dataclass
class ChainPlan:
    """The column plan of one chain operation on one input schema."""

    by: tuple
    cols: ColumnPlan
    quoted: bool                       # bid/ask (True) or premium (False)
    given_discount: bool               # a rate or discount column is read
    spot: bool = False
    forward: bool = False
    by_index: list = field(default_factory=list)

    @classmethod
    def build(cls, schema: pa.Schema, by, columns, as_of, *, quotes="auto",
              discount="optional", spot="optional", forward="no") -> "ChainPlan":
        """``discount``/``spot``/``forward``: "optional" (read when present), "required"
        or "no" (not read)."""
        by = _by_names(by)
        if quotes not in QUOTE_CHOICES:
            raise OptionError("quotes", "{option} must be one of {choices}, got {value!r}",
                              choices=", ".join(repr(q) for q in QUOTE_CHOICES),
                              value=quotes)
        if columns is not None and not isinstance(columns, Mapping):
            raise TypeError("columns= must be a dict of {our input name: your column name}, "
                            f"got {type(columns).__name__}")
        columns = dict(columns or {})
        names = schema.names
        for key, value in columns.items():
            if key not in KNOWN_NAMES:
                raise OptionError("columns", "{option} names an unknown input {key!r}; known "
                                  "inputs: {known}", key=key, known=", ".join(KNOWN_NAMES))
            if value is not None and not isinstance(value, str):
                raise TypeError(f"columns[{key!r}] must be a column name (str) or None, got "
                                f"{value!r}")
            if value is not None and value not in names:
                raise OptionError("columns", "{option} gives column {value!r} for {key!r}, "
                                  "but the input has no column {value!r}", key=key,
                                  value=value)
        dupes = {n for n in names if names.count(n) > 1}
        for b in by:
            if b not in names:
                raise ValueError(f"by= names column {b!r}, which the input does not have "
                                 f"(its columns: {', '.join(names)})")
            if b in dupes:
                raise ValueError(f"column {b!r} appears more than once in the input")
        plan = ColumnPlan(DEFAULT_MODEL)

        def present(logical):
            col = columns.get(logical, logical)
            if col is None or col not in names:
                return None
            if col in dupes:
                raise ValueError(f"column {col!r} appears more than once in the input")
            return col

        def require(logical, why=""):
            col = present(logical)
            if col is None:
                if logical in columns:
                    raise OptionError("columns", "{option} maps {name!r} to no column, "
                                      "but it is required for {why}", name=logical,
                                      why=why or logical)
                raise ValueError(f"missing column {logical!r}: required for {why or logical}")
            plan.source[logical] = col

        def exclusive(a, b):
            if present(a) and present(b):
                raise ValueError(f"conflicting columns {present(a)!r} and {present(b)!r}: "
                                 f"give one of {a!r} or {b!r}")

        require("strike")
        require("is_call")
        if "expiry" in columns and "expiry_years" in columns:
            exclusive("expiry_years", "expiry")
        if present("expiry") and ("expiry" in columns or not present("expiry_years")):
            require("expiry")
            if isinstance(as_of, str) and as_of in names:
                if as_of in dupes:
                    raise ValueError(f"column {as_of!r} appears more than once in the input")
                plan.source["as_of"] = as_of
            elif as_of is not None:
                plan.as_of_value = _scalar_time(as_of)
            elif present("as_of") is None:
                raise OptionError("as_of", "missing column 'as_of': required for an 'expiry' "
                                  "column (give {option} a time or a column name)")
            else:
                require("as_of")
        else:
            require("expiry_years", "time to expiry ('expiry_years', or 'expiry' + as_of)")
        given = False
        if discount != "no":
            exclusive("rate", "discount")
            if present("discount"):
                require("discount")
                given = True
            elif present("rate") or discount == "required":
                require("rate", "discounting ('rate' or 'discount')")
                given = True
        for name, want in (("spot", spot), ("forward", forward)):
            if want == "required" or (want == "optional" and present(name)):
                require(name)
        has_premium = present("premium") is not None
        has_quote = present("bid") is not None or present("ask") is not None
        if quotes == "premium" or (quotes == "auto" and has_premium and not has_quote):
            require("premium", "the quote (quotes='premium')")
            quoted = False
        elif quotes == "bid-ask" or has_quote:
            require("bid", "a bid/ask quote")
            require("ask", "a bid/ask quote")
            quoted = True
        else:
            raise ValueError("missing column 'premium': the chain operations need 'premium' "
                             "or 'bid' and 'ask'")
        plan.quote = "bid_ask" if quoted else "premium"
        plan._check_types(schema)
        out = cls(by, plan, quoted, given, "spot" in plan.source, "forward" in plan.source)
        out.by_index = [schema.get_field_index(b) for b in by]
        return out

    @property
    def used(self) -> list:
        return list(dict.fromkeys(list(self.by) + list(self.cols.source.values())))


@dataclass
class Chain:
    """The input read for a chain operation: per-row arrays in the kernels' layout (the
    input order when the rows already come grouped, else gathered into group order), the
    group key columns (input order) and the groups."""

    n: int
    K: np.ndarray
    cp: np.ndarray
    bid: np.ndarray          # the premium when not quoted
    ask: np.ndarray
    T: np.ndarray
    D: np.ndarray | None
    spot: np.ndarray | None
    forward: np.ndarray | None
    keys: list               # the by columns, as ChunkedArrays, input order
    starts: np.ndarray       # group starts into order
    order: np.ndarray        # positions in the arrays above, grouped (kernels sort within)
    rows: np.ndarray | None  # input row of each array position (None: the same)
    batches: list | None     # the input batches (kept for attach)
    schema: pa.Schema

    @property
    def groups(self) -> int:
        return len(self.starts) - 1

    def _input_rows(self, positions):
        return positions if self.rows is None else self.rows[positions]

    def key_table(self) -> dict:
        """The by columns' values of each group (from one of its rows)."""
        first = self._input_rows(self.order[self.starts[:-1]])
        return {name: take_rows(col, first) for name, col in self.keys}

    def row_group(self) -> np.ndarray:
        """The group of every row, in input order."""
        g = np.empty(self.n, np.int64)
        g[self._input_rows(self.order)] = np.repeat(np.arange(self.groups, dtype=np.int64),
                                                    np.diff(self.starts))
        return g


def _call_put(plan: ColumnPlan, batch) -> np.ndarray:
    """+1 call, -1 put, 0 missing; a plain bool column without nulls straight from its
    bitmap (the column plan's general path otherwise)."""
    col = batch.column(plan.index["is_call"])
    if col.type == pa.bool_() and not col.null_count and len(col):
        bits = np.unpackbits(np.frombuffer(col.buffers()[1], np.uint8), bitorder="little",
                             count=col.offset + len(col))[col.offset:].view(np.int8)
        cp = np.left_shift(bits, 1)
        cp -= 1
        return cp
    return plan.call_put(batch)


def _cat(parts, dtype=np.float64):
    if not parts:
        return np.empty(0, dtype)
    if len(parts) == 1:
        return parts[0]
    return np.concatenate(parts)


def read_chain(plan: ChainPlan, batches, schema, *, keep_batches=False, progress=None) -> Chain:
    """Read every batch into the arrays of ``plan`` and cut the rows into groups."""
    c = plan.cols
    parts = {k: [] for k in ("K", "cp", "bid", "ask", "T", "D", "spot", "forward")}
    keys = [[] for _ in plan.by]
    kept = [] if keep_batches else None
    n = 0
    for batch in batches:
        T = c.expiry_years(batch)
        parts["T"].append(T)
        parts["K"].append(c.floats(batch, "strike"))
        parts["cp"].append(_call_put(c, batch))
        if plan.quoted:
            parts["bid"].append(c.floats(batch, "bid"))
            parts["ask"].append(c.floats(batch, "ask"))
        else:
            parts["bid"].append(c.floats(batch, "premium"))
        if plan.given_discount:
            parts["D"].append(c.discount(batch, T))
        if plan.spot:
            parts["spot"].append(c.floats(batch, "spot"))
        if plan.forward:
            parts["forward"].append(c.floats(batch, "forward"))
        for j, i in enumerate(plan.by_index):
            keys[j].append(batch.column(i))
        if kept is not None:
            kept.append(batch)
        n += batch.num_rows
        if progress is not None:
            progress.update(batch.num_rows)
    arr = {k: _cat(v, np.int8 if k == "cp" else np.float64) for k, v in parts.items()
           if v}
    key_cols = [(name, pa.chunked_array(k, type=schema.field(name).type))
                for name, k in zip(plan.by, keys)]
    starts, order, grouped = group_rows([col for _, col in key_cols], n)
    rows = None
    if not grouped:
        # rows in group order, so that each group's rows lie together in memory
        arr = {k: v[order] for k, v in arr.items()}
        rows = order
        order = np.arange(n, dtype=np.int64)
    arr.setdefault("K", np.empty(0))
    arr.setdefault("cp", np.empty(0, np.int8))
    arr.setdefault("bid", np.empty(0))
    arr.setdefault("T", np.empty(0))
    bid = arr["bid"]
    ask = arr["ask"] if plan.quoted and "ask" in arr else bid
    return Chain(n, arr["K"], arr["cp"], bid, ask, arr["T"],
                 arr.get("D", np.empty(0)) if plan.given_discount else None,
                 arr.get("spot", np.empty(0)) if plan.spot else None,
                 arr.get("forward", np.empty(0)) if plan.forward else None,
                 key_cols, starts, order, rows, kept, schema)


# ------------------------------------------------------------------ grouping

def _rankable(values: pa.Array) -> pa.Array:
    """``values`` in a type ``pc.rank`` sorts: the view types (``string_view``,
    ``binary_view``) as their large counterparts, same values."""
    if pa.types.is_string_view(values.type):
        return values.cast(pa.large_string())
    if pa.types.is_binary_view(values.type):
        return values.cast(pa.large_binary())
    return values


def take_rows(col, rows) -> pa.ChunkedArray:
    """``col.take(rows)``, also for the view types, which pyarrow's take lacks (taken
    through their large counterparts, same values, same type out)."""
    idx = pa.array(rows, pa.int64())
    t = col.type
    if pa.types.is_string_view(t) or pa.types.is_binary_view(t):
        return _rankable(col).take(idx).cast(t)
    return col.take(idx)


def _ranked(values: pa.Array, indices: np.ndarray, null_rows: np.ndarray | None):
    """int64 order codes of dictionary ``indices`` into ``values`` (ascending; nulls last)."""
    rank = pc.rank(_rankable(values), sort_keys="ascending", tiebreaker="dense").to_numpy(
        zero_copy_only=False).astype(np.int64)
    if np.array_equal(rank, np.arange(1, len(rank) + 1)):
        codes = indices.astype(np.int64)       # a sorted dictionary: the indices order
    else:
        codes = rank[indices]
    if null_rows is not None:
        codes[null_rows] = _INT64_MAX
    return codes


def _order_key(col: pa.ChunkedArray) -> np.ndarray:
    """int64 codes of one key column whose order is the column's ascending order, equal
    codes for equal values, nulls last."""
    t = col.type
    n = len(col)
    if n == 0:
        return np.empty(0, np.int64)
    if pa.types.is_dictionary(t):
        if col.num_chunks > 1:
            col = col.unify_dictionaries()
        values = col.chunk(0).dictionary if col.num_chunks else pa.array([], t.value_type)
        indices = pa.chunked_array([ch.indices for ch in col.chunks])
        nulls = None
        if col.null_count:
            nulls = ~pc.is_valid(col).to_numpy(zero_copy_only=False)
            indices = pc.fill_null(indices, 0)
        idx = indices.to_numpy()                # any integer type indexes the ranks
        if pa.types.is_dictionary(values.type):
            raise TypeError("a by= column of nested dictionaries is not supported")
        return _ranked(values, idx, nulls)
    if pa.types.is_boolean(t) or pa.types.is_integer(t) or pa.types.is_temporal(t):
        if pa.types.is_uint64(t):                   # may not fit in int64
            return _order_key(col.dictionary_encode())
        if pa.types.is_date32(t) or pa.types.is_time32(t):
            ints = col.cast(pa.int32()).cast(pa.int64())
        else:
            ints = col.cast(pa.int64())
        out = np.array(pc.fill_null(ints, 0).to_numpy(), np.int64) if col.null_count \
            else np.asarray(ints.to_numpy(), np.int64)
        if col.null_count:
            out[~pc.is_valid(col).to_numpy(zero_copy_only=False)] = _INT64_MAX
        return out
    if pa.types.is_floating(t):
        x = pc.fill_null(col.cast(pa.float64()), np.nan).to_numpy()
        x = np.where(x == 0.0, 0.0, x)          # -0.0 and 0.0 are one value
        bits = x.view(np.int64)
        codes = np.where(bits < 0, np.int64(-_INT64_MAX) - bits, bits)   # order-preserving
        codes[np.isnan(x)] = _INT64_MAX
        return codes
    enc = col.dictionary_encode()
    return _order_key(enc)


def group_rows(key_cols, n: int):
    """(starts, order, grouped): the rows grouped by the key columns, groups in ascending
    key order (nulls last), rows of a group in input order; ``grouped``: the rows already
    came grouped in that order (as a snapshot sorted by underlying and expiry does; then
    ``order`` is the identity and nothing was sorted).  Otherwise each key is turned into
    dense ranks and the rows are grouped by a counting sort on the combined rank (one
    ``np.lexsort`` when the combinations are too many for counting)."""
    if n == 0:
        return np.zeros(1, np.int64), np.empty(0, np.int64), True
    keys = [_order_key(c) for c in key_cols]
    starts = _kchains.segment(keys)
    if starts is not None:
        return starts, np.arange(n, dtype=np.int64), True
    code = np.zeros(n, np.int64)
    n_codes = 1
    for col in key_cols:
        rank, size = _dense_key(col)
        if n_codes * size > max(8 * n, 1 << 20):
            order = np.lexsort(keys[::-1])          # stable: input order within a group
            starts = _kchains.segment([k[order] for k in keys])
            return starts, order.astype(np.int64, copy=False), False
        code *= size
        code += rank
        n_codes *= size
    starts, order = _kchains.counting_groups(code, n_codes)
    return starts, order, False


def _dense_key(col: pa.ChunkedArray):
    """(codes 0..size-1 in the column's ascending order, nulls last; size)."""
    if not pa.types.is_dictionary(col.type):
        col = col.dictionary_encode()
    col = col.unify_dictionaries() if col.num_chunks > 1 else col
    values = col.chunk(0).dictionary if col.num_chunks else pa.array([], col.type.value_type)
    size = len(values) + 1                       # + the null code
    rank = pc.rank(_rankable(values), sort_keys="ascending", tiebreaker="dense").to_numpy(
        zero_copy_only=False).astype(np.int64) - 1
    indices = pa.chunked_array([ch.indices for ch in col.chunks])
    if col.null_count:
        nulls = ~pc.is_valid(col).to_numpy(zero_copy_only=False)
        codes = rank[pc.fill_null(indices, 0).to_numpy()]
        codes[nulls] = size - 1
    else:
        codes = rank[indices.to_numpy()]
    return codes, size


def read_input(data):
    """(schema, batches) of any accepted input (see volsweep's ``data``)."""
    return as_batches(data)
