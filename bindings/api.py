"""The public operations: Arrow-compatible tables in, Arrow tables out.

Every operation returns the input columns, in the input order, plus its outputs; every row
gets a ``status`` (``"ok"`` or the reason it has no value).  Multi-chunk tables and streams
are processed batch by batch, never concatenated.  Schema problems raise ``ValueError`` /
``TypeError`` naming the column before any work is done; data problems never raise.
"""

from __future__ import annotations

import contextlib
import threading

import numba
import numpy as np
import pyarrow as pa

from volsweep.kernel import black as _black
from volsweep.kernel import greeks as _greeks
from volsweep.kernel import implied as _implied
from volsweep.kernel import status as _status
from volsweep.kernel import sweep as _sweep
from volsweep.kernel._jit import BLOCK as _BLOCK

from ._columns import ColumnPlan, check_model
from ._input import as_batches
from ._output import (append, check_no_clash, float_column, new_array, output_schema,
                      status_column, validity_buffer)


_LAUNCH_LOCK = threading.Lock()
_workqueue = None  # is numba's threading layer "workqueue"?  Known after the first launch


def _probe_threading_layer() -> bool:
    """Start numba's threading layer with the smallest parallel kernel (discount factors:
    quick to load from the cache, and most calls need it anyway) and say whether it is
    ``workqueue``, which is not thread-safe and aborts the process on a nested parallel
    launch."""
    global _workqueue
    with _LAUNCH_LOCK:
        if _workqueue is None:
            # more than one block: one block or less runs the row loop without a launch
            n = _BLOCK + 1
            _black.discount_factors(np.zeros(n), np.ones(n), np.empty(n))
            _workqueue = numba.threading_layer() == "workqueue"
    return _workqueue


@contextlib.contextmanager
def _kernel_launch():
    """Serialise kernel launches when numba's threading layer is not thread-safe.

    ``omp`` and ``tbb`` take parallel launches from several Python threads at once;
    ``workqueue`` aborts the process on concurrent launches, so under it one call at a
    time runs the kernels.
    """
    if _workqueue is False or not _probe_threading_layer():
        yield
        return
    with _LAUNCH_LOCK:
        yield


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


def _run(data, plan_kwargs, outputs, compute) -> pa.Table:
    """Shared driver: plan the columns once, then ``compute(plan, batch)`` per batch.

    ``outputs`` is the tuple of output names, or a function of the plan giving it.
    """
    schema, batches = as_batches(data)
    plan = ColumnPlan.build(schema, **plan_kwargs)
    if callable(outputs):
        outputs = outputs(plan)
    check_no_clash(schema, outputs)
    out_schema = output_schema(schema, outputs)
    out = []
    for b in batches:
        with _kernel_launch():
            cols = compute(plan, b)
        out.append(append(b, out_schema, cols))
    return pa.Table.from_batches(out, schema=out_schema)


def _forward_inputs(plan: ColumnPlan, batch: pa.RecordBatch):
    T = plan.expiry_years(batch)
    return (plan.underlying(batch), plan.floats(batch, "strike"), T, plan.discount(batch, T),
            plan.div_yield(batch) if plan.model == "bsm" else None, plan.call_put(batch))


def _input_priority(plan, batch, und, K, T, q, cp, vol, *statuses) -> None:
    """Restore the documented input-status priority on rows the kernel flagged (in place).

    The kernels see the discount factor e^{-rT}, not the rate: an infinite rate gives D = 0
    or inf (out_of_range), and an infinite rate or time times a zero gives D = NaN
    (missing_input).  The README promises missing_input for a null/NaN input and then
    non_finite_input for a +-inf one (the discount factor excepted: out_of_range).  Only
    rows that already have a non-ok status can be affected, so only those are examined.
    """
    # a bool mask for np.flatnonzero (on int8 it takes a slow generic path: 3.4 ms per 2M
    # rows against 0.2 ms), built pairwise (logical_or.reduce over a list stacks it first)
    flagged = statuses[0] != 0
    for st in statuses[1:]:
        flagged |= st != 0
    bad = np.flatnonzero(flagged)
    if not len(bad):
        return
    raw = [und, K, T]
    if "rate" in plan.source:
        raw.append(plan.floats(batch, "rate"))
    else:
        raw.append(plan.floats(batch, "discount"))
    if vol is not None:
        raw.append(vol)
    if q is not None:
        raw.append(q)
    vals = np.stack([a[bad] for a in raw])
    missing = np.isnan(vals).any(axis=0) | (cp[bad] == 0)
    if "rate" not in plan.source:
        vals[3] = 0.0  # an infinite discount factor is out_of_range, as documented
    nonfinite = np.isinf(vals).any(axis=0) & ~missing
    for st in statuses:
        sub = st[bad]
        sub[missing] = _status.MISSING_INPUT
        sub[nonfinite] = _status.NON_FINITE_INPUT
        st[bad] = sub


def price(data, model: str = "bsm", columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Model prices of European options.

    ``model="bsm"``: Black-Scholes-Merton on ``spot`` with continuous ``div_yield``;
    ``model="black76"``: Black-76 on ``forward``.  Adds ``price`` (null where the row has no
    price) and ``status``.  ``columns`` maps our input names to yours, e.g.
    ``{"strike": "K"}``; ``as_of`` is the valuation time when expiries are timestamps.
    """

    def compute(plan, batch):
        und, K, T, D, q, cp = _forward_inputs(plan, batch)
        vol = plan.floats(batch, "vol")
        n = batch.num_rows
        p = new_array(n)
        st = new_array(n, np.int8)
        if plan.model == "bsm":
            _black.bsm_price(und, K, T, D, q, vol, cp, p, st)
        else:
            _black.black76_price(und, K, T, D, vol, cp, p, st)
        _input_priority(plan, batch, und, K, T, q, cp, vol, st)
        return {"price": float_column(p, st == 0), "status": status_column(st)}

    return _run(data, dict(model=model, columns=columns, need_vol=True, need_quote=False,
                           as_of=as_of), ("price", "status"), compute)


_INPUT_PROBLEM = np.int8(_status.OUT_OF_RANGE)  # codes 1..7 are input problems


def _iv_kernel(plan, premium, und, K, T, D, q, cp):
    n = len(premium)
    iv = new_array(n)
    st = new_array(n, np.int8)
    if plan.model == "bsm":
        _implied.bsm_iv(premium, und, K, T, D, q, cp, iv, st)
    else:
        _implied.black76_iv(premium, und, K, T, D, cp, iv, st)
    return iv, st


def _quote_problems(bid, ask, st_bid, st_ask, st_mid, ivs):
    """Overlay the quote's own problems on the per-side statuses (in place).

    Input problems (codes 1..7) keep priority.  A crossed quote (bid > ask) has no vol on
    either side nor at the mid; a zero bid has no bid vol and no meaningful mid.
    """
    with np.errstate(invalid="ignore"):
        crossed = bid > ask
        zero_bid = (bid <= 0.0) & ~crossed
    for st in (st_bid, st_ask, st_mid):
        quote_level = (st == 0) | (st > _INPUT_PROBLEM)
        st[crossed & quote_level] = _status.CROSSED_QUOTE
    for st in (st_bid, st_mid):
        quote_level = (st == 0) | (st > _INPUT_PROBLEM)
        st[zero_bid & quote_level] = _status.ZERO_BID
    for iv, st in zip(ivs, (st_bid, st_ask, st_mid)):
        iv[st != 0] = np.nan


def _sweep_kernel(plan, premium, und, K, T, D, q, cp, mask):
    n = len(premium)
    iv = new_array(n)
    out = new_array((bin(mask).count("1"), n))
    st = new_array(n, np.int8)
    if plan.model == "bsm":
        n_nonfinite = _sweep.bsm_sweep(premium, und, K, T, D, q, cp, mask, iv, out, st)
    else:
        n_nonfinite = _sweep.black76_sweep(premium, und, K, T, D, cp, mask, iv, out, st)
    return iv, (out, n_nonfinite), st


def _iv_columns(plan, batch, und, K, T, D, q, cp, names=()):
    """Implied-vol outputs of one batch, with the Greeks in ``names`` at the (mid) vol.

    Returns (columns, Greeks array in raw units or None, mid status, number of ok rows
    with a non-finite Greek).
    """
    mask = _greeks.greek_mask(names, plan.model) if names else 0

    def solve(premium):
        if not names:
            iv, st = _iv_kernel(plan, premium, und, K, T, D, q, cp)
            return iv, (None, 0), st
        return _sweep_kernel(plan, premium, und, K, T, D, q, cp, mask)

    if plan.quote == "premium":
        iv, (g, n_nonfinite), st = solve(plan.floats(batch, "premium"))
        _input_priority(plan, batch, und, K, T, q, cp, None, st)
        return {"iv": float_column(iv, st == 0)}, g, st, n_nonfinite
    bid, ask = plan.floats(batch, "bid"), plan.floats(batch, "ask")
    mid, half_spread = _mid_and_half_spread(bid, ask)
    iv_b, st_b = _iv_kernel(plan, bid, und, K, T, D, q, cp)
    iv_a, st_a = _iv_kernel(plan, ask, und, K, T, D, q, cp)
    iv_m, (g, n_nonfinite), st_m = solve(mid)
    _input_priority(plan, batch, und, K, T, q, cp, None, st_b, st_a, st_m)
    _quote_problems(bid, ask, st_b, st_a, st_m, (iv_b, iv_a, iv_m))
    if "vega" in names:
        vega = g[names.index("vega")]
    else:
        (vega,), _, _ = _greek_values(plan, ("vega",), und, K, T, D, q, iv_m, cp)
    with np.errstate(all="ignore"):
        unc = half_spread / vega
    ok = st_m == 0
    cols = {"iv_bid": float_column(iv_b, st_b == 0), "iv_ask": float_column(iv_a, st_a == 0),
            "iv": float_column(iv_m, ok), "iv_spread_uncertainty": _ok_column(unc, ok),
            "status_bid": status_column(st_b), "status_ask": status_column(st_a)}
    return cols, g, st_m, n_nonfinite


def _mid_and_half_spread(bid, ask):
    """0.5 (bid + ask) and 0.5 (ask - bid), without overflow for quotes near 1.8e308."""
    with np.errstate(all="ignore"):
        mid = 0.5 * (bid + ask)
        half_spread = 0.5 * (ask - bid)
        over = np.isinf(mid) & np.isfinite(bid) & np.isfinite(ask)
        if over.any():
            mid[over] = 0.5 * bid[over] + 0.5 * ask[over]
        over = np.isinf(half_spread) & np.isfinite(bid) & np.isfinite(ask)
        if over.any():
            half_spread[over] = 0.5 * ask[over] - 0.5 * bid[over]
    return mid, half_spread


def _iv_outputs(plan):
    if plan.quote == "premium":
        return ("iv",)
    return ("iv_bid", "iv_ask", "iv", "iv_spread_uncertainty", "status_bid", "status_ask")


def implied_vol(data, model: str = "bsm", columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Implied volatilities from market prices.

    From a ``premium`` column: adds ``iv`` and ``status``.  From ``bid`` and ``ask``: adds
    ``iv_bid``, ``iv_ask`` and ``iv`` (from the mid), each with its own status
    (``status_bid``, ``status_ask``, and ``status`` for the mid), and
    ``iv_spread_uncertainty``, the half-spread divided by the vega at the mid vol.
    """

    def compute(plan, batch):
        und, K, T, D, q, cp = _forward_inputs(plan, batch)
        cols, _, st, _ = _iv_columns(plan, batch, und, K, T, D, q, cp)
        cols["status"] = status_column(st)
        return cols

    return _run(data, dict(model=model, columns=columns, need_vol=False, need_quote=True,
                           as_of=as_of), lambda plan: _iv_outputs(plan) + ("status",), compute)


def _greek_values(plan, which, und, K, T, D, q, vol, cp, units="raw"):
    """Greeks named in ``which`` (already validated) -> (out[n_req, n], status, number of
    ok rows with a non-finite Greek)."""
    mask = _greeks.greek_mask(which, plan.model)
    n = len(K)
    out = new_array((bin(mask).count("1"), n))
    st = new_array(n, np.int8)
    if plan.model == "bsm":
        n_nonfinite = _greeks.bsm_greeks(und, K, T, D, q, vol, cp, mask, out, st)
    else:
        n_nonfinite = _greeks.black76_greeks(und, K, T, D, vol, cp, mask, out, st)
    if units == "desk":
        out *= _greeks.desk_factors(mask)[:, None]
    return out, st, n_nonfinite


def _greek_list(which, model) -> tuple:
    """Validated Greek names, in output order (raises on an unknown name)."""
    if which is not None and not isinstance(which, str):
        try:
            which = list(which)
        except TypeError:
            raise TypeError(f"which= must be a Greek name, a list of them or None, "
                            f"got {which!r}") from None
    return _greeks.greek_names(_greeks.greek_mask(which, model))


def _check_units(units):
    if units not in ("raw", "desk"):
        raise ValueError(f"unknown units {units!r}; expected 'raw' or 'desk'")


def greeks(data, model: str = "bsm", which=None, units: str = "raw",
           columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Analytic Greeks at the volatility in the ``vol`` column.

    ``which``: a Greek name or a list of them (None: all the model has; see
    ``GREEK_NAMES``).  ``units="raw"``: per 1.00 of vol, rate and yield, theta per year;
    ``units="desk"``: per vol point, per 1%, per calendar day.  Adds one column per Greek and
    ``status``.  Derivatives are against the spot for ``bsm`` and the forward for ``black76``.
    """
    _check_units(units)
    names = _greek_list(which, check_model(model))

    def compute(plan, batch):
        und, K, T, D, q, cp = _forward_inputs(plan, batch)
        vol = plan.floats(batch, "vol")
        out, st, n_nonfinite = _greek_values(plan, names, und, K, T, D, q, vol, cp, units)
        _input_priority(plan, batch, und, K, T, q, cp, vol, st)
        cols = _greek_columns(names, out, st == 0, n_nonfinite)
        cols["status"] = status_column(st)
        return cols

    return _run(data, dict(model=model, columns=columns, need_vol=True, need_quote=False,
                           as_of=as_of), names + ("status",), compute)


def sweep(data, model: str = "bsm", which=None, units: str = "raw",
          columns: dict | None = None, *, as_of=None) -> pa.Table:
    """Implied vol from the quote, then the Greeks at that vol, in one kernel pass.

    Takes ``premium`` (or ``bid`` and ``ask``: the Greeks are at the mid vol) and adds the
    implied-vol outputs of ``implied_vol`` followed by the Greeks of ``greeks``.  Rows
    without an implied vol get null Greeks and the implied-vol status.
    """
    _check_units(units)
    names = _greek_list(which, check_model(model))

    def compute(plan, batch):
        und, K, T, D, q, cp = _forward_inputs(plan, batch)
        cols, g, st, n_nonfinite = _iv_columns(plan, batch, und, K, T, D, q, cp, names)
        if units == "desk":
            g *= _greeks.desk_factors(_greeks.greek_mask(names, plan.model))[:, None]
        cols.update(_greek_columns(names, g, st == 0, n_nonfinite))
        cols["status"] = status_column(st)
        return cols

    return _run(data, dict(model=model, columns=columns, need_vol=False, need_quote=True,
                           as_of=as_of), lambda plan: _iv_outputs(plan) + names + ("status",),
                compute)
