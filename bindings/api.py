"""The public row operations: Arrow-compatible tables in, Arrow tables out.

Every operation returns the input columns, in the input order, plus its outputs; every row
gets a ``status`` (``"ok"`` or the reason it has no value).  Multi-chunk tables and streams
are processed batch by batch, never concatenated.  Schema problems raise ``ValueError`` /
``TypeError`` naming the column before any work is done; data problems never raise.

The operations and the models are the registry's (kernel/registry.py): one code path
serves every model, calling the model's kernels with its inputs in the registry's order.
``prepare`` does everything that depends only on the input schema and the options once
(column plan, checks, output schema) and is cached per schema, so a loop of small calls
pays for it once; the streaming driver calls it once per run.
"""

from __future__ import annotations

import threading

import numpy as np
import pyarrow as pa

from volsweep.kernel import greeks as _greeks
from volsweep.kernel import registry as _registry
from volsweep.kernel.registry import DEFAULT_MODEL

from ._columns import ColumnPlan
from ._input import as_batches
from .loader import launch_guard, load_kernel, served_mask
from ._output import (append, check_no_clash, float_column, new_array, output_schema,
                      status_column, validity_buffer)


def _ok_column(values: np.ndarray, ok: np.ndarray) -> pa.Array:
    """A secondary output (Greek, spread uncertainty): null where the row is not ok, and
    null where its value is not a finite double (an infinite limit, an overflow)."""
    valid = np.isfinite(values)
    valid &= ok
    return float_column(values, valid)


def _greek_columns(names, g, ok, n_nonfinite) -> dict:
    """Greek columns, null where the row is not ok or the Greek is not finite.

    The kernels count the ok rows with a non-finite Greek; when there are none (the usual
    case) every column shares the validity of the row statuses and no column is scanned.
    """
    if n_nonfinite:
        return {name: _ok_column(g[j], ok) for j, name in enumerate(names)}
    validity = validity_buffer(ok)
    return {name: float_column(g[j], ok, validity) for j, name in enumerate(names)}


_QUOTE_OUTPUTS = ("iv_bid", "iv_ask", "iv", "iv_spread_uncertainty", "status_bid",
                  "status_ask")
_VEGA = _greeks.GREEK_NAMES.index("vega")


def _check_units(units):
    if units not in ("raw", "desk"):
        raise ValueError(f"unknown units {units!r}; expected 'raw' or 'desk'")


def _greek_list(which, entry) -> tuple:
    """Validated Greek names of a registry entry, in output order (raises on an unknown
    name or one the entry does not define)."""
    if which is not None and not isinstance(which, str):
        try:
            which = list(which)
        except TypeError:
            raise TypeError(f"which= must be a Greek name, a list of them or None, "
                            f"got {which!r}") from None
    names = _greeks.greek_names(_greeks.greek_mask(which, entry.name))
    if which is None:
        return tuple(g for g in names if g in entry.greeks)
    for g in names:
        if g not in entry.greeks:
            raise ValueError(f"{g} is not defined for model {entry.name!r} with "
                             f"{entry.exercise} exercise (its Greeks: "
                             f"{', '.join(entry.greeks)})")
    return names


class Prepared:
    """One operation prepared for one input schema: call it on record batches of that
    schema.  ``out_schema``: the input fields followed by ``outputs``; ``used``: the input
    columns the operation reads."""

    def __init__(self, operation, schema, model, which, units, columns, as_of,
                 exercise=None):
        op = _registry.OPERATIONS.get(operation)
        if op is None:
            raise ValueError(f"unknown operation {operation!r}; expected one of "
                             f"{', '.join(_registry.OPERATIONS)}")
        self.operation = operation
        _registry.model(model)
        if operation in ("greeks", "sweep"):
            _check_units(units)
        elif which is not None or units != "raw":
            raise ValueError(f"which= and units= apply to greeks and sweep, not {operation}")
        self.units = units
        self.in_schema = schema
        self.plan = ColumnPlan.build(schema, model=model, columns=columns,
                                     need_vol=op.needs == "vol",
                                     need_quote=op.needs == "quote", as_of=as_of,
                                     exercise=exercise)
        # the registry entry: the model with the exercise style the call asked for
        self.model = self.plan.entry
        names = ()
        if operation in ("greeks", "sweep"):
            names = _greek_list(which, self.model)
        self.greeks = names
        quotes = self.plan.quote == "bid_ask"
        outputs = ()
        if operation == "price":
            outputs = ("price",)
        elif op.needs == "quote":
            outputs = _QUOTE_OUTPUTS if quotes else ("iv",)
        self.outputs = outputs + names + ("status",)
        check_no_clash(schema, self.outputs)
        self.out_schema = output_schema(schema, self.outputs)
        self.used = list(dict.fromkeys(self.plan.source.values()))
        kind = "bid_ask" if quotes else operation
        if kind == "sweep" and not names:      # no Greeks: the implied-vol kernel alone
            kind = "implied_vol"
        self.mask = 0
        if names or quotes:
            # the compiled Greek set serving the request (the bid/ask kernel needs vega)
            want = _greeks.greek_mask(names, model) if names else 0
            self.mask = served_mask(model, want | ((1 << _VEGA) if quotes else 0),
                                    self.model.exercise)
        served = _greeks.greek_names(self.mask)
        self.rows = [served.index(g) for g in names]          # rows of out to keep
        self.desk = ([_greeks.DESK_SCALE[g] for g in names] if units == "desk" else None)
        self._compute = getattr(self, "_" + kind)
        # says so on stderr if it compiles
        load_kernel(self.model.name, kind, self.mask, self.model.exercise)

    def __call__(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        if not isinstance(batch, pa.RecordBatch):
            raise TypeError(f"a prepared {self.operation} takes a pyarrow.RecordBatch, got "
                            f"{type(batch).__name__}")
        if not batch.schema.equals(self.in_schema):
            raise ValueError(f"this {self.operation} was prepared for another schema: "
                             "call prepare() with this batch's schema")
        with launch_guard():
            cols = self._compute(batch)
        return append(batch, self.out_schema, cols)

    # ------------------------------------------------------------ per operation
    def _inputs(self, batch):
        """The model's kernel inputs (U, K, T, D, *extras) and the call/put signs."""
        plan = self.plan
        T = plan.expiry_years(batch)
        inputs = (plan.floats(batch, self.model.underlying), plan.floats(batch, "strike"), T,
                  plan.discount(batch, T)) + tuple(plan.extra(batch, x)
                                                   for x in self.model.extras)
        return inputs, plan.call_put(batch)

    def _greek_out(self, g, n_nonfinite, ok) -> dict:
        """Output columns of the requested Greeks from the served set's rows ``g``."""
        picked = [g[j] for j in self.rows]
        if self.desk is not None:
            for row, factor in zip(picked, self.desk):
                row *= factor
        return _greek_columns(self.greeks, picked, ok, n_nonfinite)

    def _price(self, batch):
        inputs, cp = self._inputs(batch)
        n = batch.num_rows
        p, st = new_array(n), new_array(n, np.int8)
        self.model.kernels["price"](*inputs, self.plan.floats(batch, "vol"), cp, p, st)
        return {"price": float_column(p, st == 0), "status": status_column(st)}

    def _implied_vol(self, batch):
        inputs, cp = self._inputs(batch)
        n = batch.num_rows
        iv, st = new_array(n), new_array(n, np.int8)
        self.model.kernels["implied_vol"](self.plan.floats(batch, "premium"), *inputs, cp,
                                          iv, st)
        return {"iv": float_column(iv, st == 0), "status": status_column(st)}

    def _greeks(self, batch):
        inputs, cp = self._inputs(batch)
        n = batch.num_rows
        out, st = new_array((bin(self.mask).count("1"), n)), new_array(n, np.int8)
        n_nonfinite = self.model.kernels["greeks"](*inputs, self.plan.floats(batch, "vol"),
                                                   cp, self.mask, out, st)
        cols = self._greek_out(out, n_nonfinite, st == 0)
        cols["status"] = status_column(st)
        return cols

    def _sweep(self, batch):
        inputs, cp = self._inputs(batch)
        n = batch.num_rows
        iv, st = new_array(n), new_array(n, np.int8)
        out = new_array((bin(self.mask).count("1"), n))
        n_nonfinite = self.model.kernels["sweep"](self.plan.floats(batch, "premium"), *inputs,
                                                  cp, self.mask, iv, out, st)
        ok = st == 0
        cols = {"iv": float_column(iv, ok)}
        cols.update(self._greek_out(out, n_nonfinite, ok))
        cols["status"] = status_column(st)
        return cols

    def _bid_ask(self, batch):
        inputs, cp = self._inputs(batch)
        n = batch.num_rows
        iv_b, iv_a, iv, unc = (new_array(n) for _ in range(4))
        st_b, st_a, st = (new_array(n, np.int8) for _ in range(3))
        out = new_array((bin(self.mask).count("1"), n))
        n_nonfinite = self.model.kernels["bid_ask"](
            self.plan.floats(batch, "bid"), self.plan.floats(batch, "ask"), *inputs, cp,
            self.mask, iv_b, iv_a, iv, unc, out, st_b, st_a, st)
        ok = st == 0
        cols = {"iv_bid": float_column(iv_b, st_b == 0), "iv_ask": float_column(iv_a, st_a == 0),
                "iv": float_column(iv, ok), "iv_spread_uncertainty": _ok_column(unc, ok),
                "status_bid": status_column(st_b), "status_ask": status_column(st_a)}
        if self.greeks:
            cols.update(self._greek_out(out, n_nonfinite, ok))
        cols["status"] = status_column(st)
        return cols


_PREPARED: list = []          # recent (options key, schema, Prepared), newest last
_PREPARED_MAX = 64
_PREPARED_LOCK = threading.Lock()


def _freeze(value):
    if isinstance(value, dict):
        return tuple(sorted((k, _freeze(v)) for k, v in value.items()))
    if isinstance(value, (list, tuple)):
        return tuple(_freeze(v) for v in value)
    return value


def prepare(operation: str, schema: pa.Schema, *, model: str = DEFAULT_MODEL, which=None,
            units: str = "raw", columns: dict | None = None, as_of=None,
            exercise: str | None = None) -> Prepared:
    """The operation ``operation`` ("price", "implied_vol", "greeks" or "sweep") prepared
    for input batches of ``schema`` with these options: the column plan, every schema check
    and the output schema, done once.  Cached per (schema, options): a service calling
    ``price`` on many small batches of one schema builds it once.  Raises as the operation
    would on a schema problem."""
    try:
        key = (operation, model, _freeze(which), units, _freeze(columns), as_of, exercise)
        hash(key)
    except TypeError:            # an unhashable option (e.g. an exotic as_of): no caching
        key = None
    if key is not None:
        # schemas compared by equals (one C call) rather than hashed (a walk of the schema)
        for k, sch, prep in reversed(_PREPARED):
            if k == key and sch.equals(schema, check_metadata=True):
                return prep
    prep = Prepared(operation, schema, model, which, units, columns, as_of, exercise)
    if key is not None:
        with _PREPARED_LOCK:
            _PREPARED.append((key, schema, prep))
            del _PREPARED[:-_PREPARED_MAX]
    return prep


def _run(operation, data, **options) -> pa.Table:
    schema, batches = as_batches(data)
    prep = prepare(operation, schema, **options)
    return pa.Table.from_batches([prep(b) for b in batches], schema=prep.out_schema)


def price(data, model: str = DEFAULT_MODEL, columns: dict | None = None, *,
          as_of=None, exercise: str | None = None) -> pa.Table:
    """Model prices at the volatility in the ``vol`` column.

    ``model``: a name of the registry (``volsweep.MODELS``: each model's underlying column,
    ``spot`` or ``forward``, and its optional extra inputs).  Adds ``price`` (null where the
    row has no price) and ``status``.  ``columns`` maps our input names to yours, e.g.
    ``{"strike": "K"}``; ``as_of`` is the valuation time when expiries are timestamps.
    ``exercise``: "american" or "european" for every row (``model="bsm"`` only for
    American); None (the default): each row's style from an ``exercise`` column if the
    input has one, else European.
    """
    return _run("price", data, model=model, columns=columns, as_of=as_of,
                exercise=exercise)


def implied_vol(data, model: str = DEFAULT_MODEL, columns: dict | None = None, *,
                as_of=None, exercise: str | None = None) -> pa.Table:
    """Implied volatilities from market prices.

    From a ``premium`` column: adds ``iv`` and ``status``.  From ``bid`` and ``ask``: adds
    ``iv_bid``, ``iv_ask`` and ``iv`` (from the mid), each with its own status
    (``status_bid``, ``status_ask``, and ``status`` for the mid), and
    ``iv_spread_uncertainty``, the half-spread divided by the vega at the mid vol, all from
    one kernel pass.  ``exercise`` as in ``price``: American premiums are inverted on the
    American price.
    """
    return _run("implied_vol", data, model=model, columns=columns, as_of=as_of,
                exercise=exercise)


def greeks(data, model: str = DEFAULT_MODEL, which=None, units: str = "raw",
           columns: dict | None = None, *, as_of=None,
           exercise: str | None = None) -> pa.Table:
    """Analytic Greeks at the volatility in the ``vol`` column.

    ``which``: a Greek name or a list of them (None: all the model has; see
    ``GREEK_NAMES``).  ``units="raw"``: per 1.00 of vol, rate and yield, theta per year;
    ``units="desk"``: per vol point, per 1%, per calendar day.  Adds one column per Greek and
    ``status``.  Derivatives are against the model's underlying (its ``underlying`` in
    ``volsweep.MODELS``: spot or forward).  ``exercise`` as in ``price``; American
    exercise has delta, gamma, vega, theta, rho and div_rho.
    """
    return _run("greeks", data, model=model, which=which, units=units, columns=columns,
                as_of=as_of, exercise=exercise)


def sweep(data, model: str = DEFAULT_MODEL, which=None, units: str = "raw",
          columns: dict | None = None, *, as_of=None,
          exercise: str | None = None) -> pa.Table:
    """Implied vol from the quote, then the Greeks at that vol, in one kernel pass.

    Takes ``premium`` (or ``bid`` and ``ask``: the Greeks are at the mid vol) and adds the
    implied-vol outputs of ``implied_vol`` followed by the Greeks of ``greeks``.  Rows
    without an implied vol get null Greeks and the implied-vol status.  ``exercise`` as in
    ``price``.
    """
    return _run("sweep", data, model=model, which=which, units=units, columns=columns,
                as_of=as_of, exercise=exercise)
