"""The chain operations: one row per group of an option chain (``by=`` columns, by default
each underlying's expiry), never per contract.

* ``implied_forwards``: each group's forward and discount factor implied by put-call
  parity (a robust weighted line through C - P against the strike), or with
  ``attach=True`` the input with each row's group forward (and discount) appended, ready
  for ``implied_vol(..., model="black76")``;
* ``model_free_variance``: each group's model-free implied variance from its
  out-of-the-money strip around the forward;
* ``constant_maturity_variance``: per underlying, the variance at fixed horizons
  (30 days, ...), linear in total variance between the bracketing expiries.

The methods, and their sources, are in the docstring of ``volsweep.kernel.chains``.
Schema problems raise before any work is done (naming the column); data problems never
raise: every group gets a ``status``, and a group without a value has null outputs.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from volsweep.kernel import chains as _kchains

from .chain_plan import ChainPlan, _by_names, group_rows, read_chain, read_input
from .loader import launch_guard

GROUP_STATUS = pa.array(_kchains.NAMES, type=pa.string())
_STATUS_TYPE = pa.dictionary(pa.int8(), pa.string())
FORWARD_OUTPUTS = ("expiry_years", "forward", "discount", "implied_yield", "pairs_used",
                   "parity_residual", "status")
VARIANCE_OUTPUTS = ("expiry_years", "forward", "discount", "variance", "strikes_used",
                    "status")
HORIZON_OUTPUTS = ("horizon_days", "horizon_years", "variance", "vol", "near_expiry_years",
                   "far_expiry_years", "status")
_FORWARDS_CHOICES = ("implied", "columns")


def _status_array(codes: np.ndarray) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(np.asarray(codes, np.int8), pa.int8()),
                                          GROUP_STATUS)


def _floats(values, ok) -> pa.Array:
    values = np.asarray(values, np.float64)
    return pa.array(values, pa.float64(), mask=~(np.asarray(ok) & np.isfinite(values)))


def _check_rate_range(rate_range):
    try:
        lo, hi = (float(x) for x in rate_range)
    except (TypeError, ValueError):
        raise TypeError(f"rate_range= must be two numbers (lowest, highest rate), got "
                        f"{rate_range!r}") from None
    if not lo <= hi:
        raise ValueError(f"rate_range= must be (lowest, highest) with lowest <= highest, got "
                         f"{rate_range!r}")
    return lo, hi


def _check_min_pairs(min_pairs):
    if isinstance(min_pairs, bool) or not isinstance(min_pairs, (int, np.integer)) \
            or min_pairs < 2:
        raise ValueError(f"min_pairs= must be an integer >= 2, got {min_pairs!r}")
    return int(min_pairs)


def _fit(chain, plan, min_pairs, rate_lo, rate_hi, sorted_out=None):
    with launch_guard():
        return _kchains.forwards(chain.starts, chain.order, chain.K, chain.cp, chain.bid,
                                 chain.ask, chain.T, chain.D, quoted=plan.quoted,
                                 min_pairs=min_pairs, rate_range=(rate_lo, rate_hi),
                                 idx_out=sorted_out, own_order=True)


def _group_spot(chain, fit):
    """Per group the spot (one value per group, or the group becomes
    inconsistent_inputs) and the implied yield -ln(D F / S) / T."""
    G = chain.groups
    s = chain.spot[chain.order]          # grouped
    lo = np.full(G, np.nan)
    hi = np.full(G, np.nan)
    if len(s):
        starts = chain.starts[:-1]
        nonempty = np.diff(chain.starts) > 0
        finite = np.where(np.isfinite(s), s, np.nan)
        with np.errstate(invalid="ignore"):
            lo[nonempty] = np.fmin.reduceat(finite, starts[nonempty])
            hi[nonempty] = np.fmax.reduceat(finite, starts[nonempty])
    status = fit["status"].copy()
    differ = np.abs(hi - lo) > 1e-12 * np.abs(lo)
    bad = (status == _kchains.OK) & differ
    status[bad] = _kchains.INCONSISTENT_INPUTS
    with np.errstate(invalid="ignore", divide="ignore"):
        y = -np.log(fit["discount"] * fit["forward"] / lo) / fit["T"]
    return y, status


def implied_forwards(data, by=("underlying", "expiry"), columns=None, as_of=None, *,
                     quotes="auto", attach=False, min_pairs=3, rate_range=(-0.2, 1.0)):
    """Forward and discount factor of every group implied by put-call parity.

    Reads ``strike``, ``is_call``, the quote (``bid`` and ``ask``, or ``premium``; see
    ``quotes``) and the time to expiry; with a ``rate`` or ``discount`` column the
    discount is taken from it and only the forward is fitted; with ``spot``, the implied
    yield is given too.  Returns one row per group, in ascending order of the ``by``
    columns (nulls last): the ``by`` columns, ``expiry_years``, ``forward``,
    ``discount``, ``implied_yield`` (with ``spot`` only), ``pairs_used``,
    ``parity_residual`` and ``status``.  With ``attach=True`` returns the input instead,
    every row in order, with its group's ``forward``, the fitted ``discount`` (when no
    rate or discount was given) and the group's ``forward_status`` appended.
    """
    by = _by_names(by)
    lo, hi = _check_rate_range(rate_range)
    min_pairs = _check_min_pairs(min_pairs)
    schema, batches = read_input(data)
    plan = ChainPlan.build(schema, by, columns, as_of, quotes=quotes)
    names = attach_names(schema, plan) if attach else None
    chain = read_chain(plan, batches, schema, keep_batches=attach)
    res = fit_forwards(chain, plan, min_pairs, lo, hi)
    if not attach:
        return forwards_table(chain, res)
    per_row = row_columns(chain, res, names)
    out_schema = attached_schema(schema, names)
    out = []
    at = 0
    for batch in chain.batches:
        e = at + batch.num_rows
        out.append(attach_batch(batch, per_row, at, e, out_schema))
        at = e
    return pa.Table.from_batches(out, schema=out_schema)


def fit_forwards(chain, plan, min_pairs=3, rate_lo=-0.2, rate_hi=1.0) -> dict:
    """The kernel's per-group results, plus ``implied_yield`` (with a spot column) and the
    final ``status``."""
    fit = _fit(chain, plan, min_pairs, rate_lo, rate_hi)
    fit["implied_yield"] = None
    if plan.spot:
        fit["implied_yield"], fit["status"] = _group_spot(chain, fit)
    return fit


def forwards_table(chain, fit) -> pa.Table:
    ok = fit["status"] == _kchains.OK
    cols = chain.key_table()
    cols["expiry_years"] = _floats(fit["T"], np.isfinite(fit["T"]))
    cols["forward"] = _floats(fit["forward"], ok)
    cols["discount"] = _floats(fit["discount"], ok)
    if fit["implied_yield"] is not None:
        cols["implied_yield"] = _floats(fit["implied_yield"], ok)
    cols["pairs_used"] = pa.array(fit["pairs_used"], pa.int64())
    cols["parity_residual"] = _floats(fit["residual"], ok)
    cols["status"] = _status_array(fit["status"])
    return pa.table(cols)


def attach_names(schema, plan) -> tuple:
    """The columns ``attach=True`` appends (``discount`` only when it is fitted); an input
    column of the same name is an error."""
    names = ("forward",) + (() if plan.given_discount else ("discount",)) + \
        ("forward_status",)
    for name in names:
        if name in schema.names:
            raise ValueError(f"input already has a column named {name!r}, which attach=True "
                             "adds; rename or drop it first")
    return names


def attached_schema(schema, names) -> pa.Schema:
    for name in names:
        schema = schema.append(pa.field(name, _STATUS_TYPE if name == "forward_status"
                                        else pa.float64()))
    return schema


def row_columns(chain, fit, names) -> dict:
    """Per row, in input order: each group's forward, discount and status, and ``ok``."""
    ok = fit["status"] == _kchains.OK
    g = chain.row_group()
    return {"forward": np.where(ok, fit["forward"], np.nan)[g],
            "discount": np.where(ok, fit["discount"], np.nan)[g],
            "forward_status": fit["status"][g], "ok": ok[g], "names": names}


def attach_batch(batch, per_row, a, e, schema) -> pa.RecordBatch:
    """``batch`` (input rows a..e) with the attached columns appended."""
    ok = per_row["ok"][a:e]
    extra = {"forward": lambda: _floats(per_row["forward"][a:e], ok),
             "discount": lambda: _floats(per_row["discount"][a:e], ok),
             "forward_status": lambda: _status_array(per_row["forward_status"][a:e])}
    arrays = list(batch.columns) + [extra[n]() for n in per_row["names"]]
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _variance(chain, plan, forwards, min_pairs=3, rate_range=(-0.2, 1.0)):
    """(per-group arrays T, forward, discount, variance, strikes_used, status)."""
    if forwards == "implied":
        fit = _fit(chain, plan, min_pairs, *rate_range)
        T, F, D, st = fit["T"], fit["forward"], fit["discount"], fit["status"]
    else:
        D = chain.D
        with launch_guard():
            given = _kchains.group_inputs(chain.starts, chain.order, chain.T, D,
                                          chain.forward)
        T, F, D, st = given["T"], given["forward"], given["discount"], given["status"]
    with launch_guard():
        var = _kchains.strip_variance(chain.starts, chain.order, chain.K, chain.cp,
                                      chain.bid, chain.ask, chain.T, F, D, T, st,
                                      quoted=plan.quoted, own_order=True)
    return T, F, D, var


def model_free_variance(data, by=("underlying", "expiry"), columns=None, as_of=None, *,
                        forwards="implied", quotes="auto"):
    """Model-free implied variance of every group from its out-of-the-money strip.

    ``forwards="implied"``: each group's forward and discount from ``implied_forwards``
    (default options; a ``rate`` or ``discount`` column fixes the discount);
    ``forwards="columns"``: from the ``forward`` and ``rate`` (or ``discount``) columns,
    one value per group.  Returns one row per group, in ascending order of the ``by``
    columns: the ``by`` columns, ``expiry_years``, ``forward``, ``discount``,
    ``variance`` (annualised), ``strikes_used`` and ``status``.
    """
    by = _by_names(by)
    if forwards not in _FORWARDS_CHOICES:
        raise ValueError(f"forwards= must be one of {', '.join(map(repr, _FORWARDS_CHOICES))}, "
                         f"got {forwards!r}")
    schema, batches = read_input(data)
    given = forwards == "columns"
    plan = ChainPlan.build(schema, by, columns, as_of, quotes=quotes,
                           discount="required" if given else "optional", spot="no",
                           forward="required" if given else "no")
    chain = read_chain(plan, batches, schema)
    return variance_table(chain, plan, forwards)


def variance_table(chain, plan, forwards) -> pa.Table:
    T, F, D, var = _variance(chain, plan, forwards)
    ok = var["status"] == _kchains.OK
    cols = chain.key_table()
    cols["expiry_years"] = _floats(T, np.isfinite(T))
    cols["forward"] = _floats(F, ok)
    cols["discount"] = _floats(D, ok)
    cols["variance"] = _floats(var["variance"], ok)
    cols["strikes_used"] = pa.array(var["strikes_used"], pa.int64())
    cols["status"] = _status_array(var["status"])
    return pa.table(cols)


def _days(days) -> np.ndarray:
    if isinstance(days, (int, float, np.integer, np.floating)) and not isinstance(days, bool):
        days = (days,)
    try:
        d = np.array([float(x) for x in days], np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"days= must be a number of days or a sequence of them, got "
                        f"{days!r}") from None
    if d.size == 0 or not np.all((d > 0) & np.isfinite(d)):
        raise ValueError(f"days= must be positive finite numbers of days, got {days!r}")
    return d


def constant_maturity_variance(variances, days=(30,), by=("underlying",), *,
                               extrapolate=False):
    """Variance at fixed horizons per underlying, linear in total variance between the
    expiries that bracket each horizon.

    ``variances``: a table with the ``by`` columns, ``expiry_years`` and ``variance``
    (annualised), such as ``model_free_variance``'s result; where it has a ``status``
    column, only rows whose status is ``ok`` are used.  ``days``: the horizons in
    calendar days (ACT/365F: years = days / 365).  Returns one row per group and
    horizon, groups in ascending order of the ``by`` columns, horizons in the order
    given: the ``by`` columns, ``horizon_days``, ``horizon_years``, ``variance``,
    ``vol``, ``near_expiry_years``, ``far_expiry_years`` and ``status``.
    """
    by = _by_names(by)
    d = _days(days)
    schema, batches = read_input(variances)
    for name in by + ("expiry_years", "variance"):
        if name not in schema.names:
            raise ValueError(f"missing column {name!r}: constant_maturity_variance reads the "
                             f"by= columns, 'expiry_years' and 'variance'")
    table = pa.Table.from_batches(list(batches), schema=schema)
    n = table.num_rows
    T = pc.fill_null(table["expiry_years"].cast(pa.float64()), np.nan).to_numpy()
    V = pc.fill_null(table["variance"].cast(pa.float64()), np.nan).to_numpy()
    ok = np.isfinite(T) & np.isfinite(V) & (T > 0) & (V > 0)
    if "status" in schema.names:
        st = table["status"]
        if pa.types.is_dictionary(st.type):
            st = st.cast(st.type.value_type)
        ok &= pc.fill_null(pc.equal(st.cast(pa.string()), "ok"), False).to_numpy(
            zero_copy_only=False)
    keys = [table[b] for b in by]
    starts, order, _ = group_rows(keys, n)
    # within each group, by time (stable): one more sort of this small table
    grp = np.empty(n, np.int64)
    grp[order] = np.repeat(np.arange(len(starts) - 1), np.diff(starts))
    Tk = np.where(np.isfinite(T), T, np.inf)
    order = np.lexsort((Tk, grp)).astype(np.int64)
    with launch_guard():
        res = _kchains.horizon_variance(starts, T[order], V[order], ok[order], d / 365.0,
                                        extrapolate=extrapolate)
    H = d.size
    G = len(starts) - 1
    first = order[starts[:-1]]
    cols = {b: table[b].take(pa.array(np.repeat(first, H), pa.int64())) for b in by}
    cols["horizon_days"] = pa.array(np.tile(d, G))
    cols["horizon_years"] = pa.array(np.tile(d / 365.0, G))
    has = np.isfinite(res["variance"])
    cols["variance"] = _floats(res["variance"], has)
    with np.errstate(invalid="ignore"):
        cols["vol"] = _floats(np.sqrt(res["variance"]), has)
    cols["near_expiry_years"] = _floats(res["near_expiry_years"],
                                        np.isfinite(res["near_expiry_years"]))
    cols["far_expiry_years"] = _floats(res["far_expiry_years"],
                                       np.isfinite(res["far_expiry_years"]))
    cols["status"] = _status_array(res["status"])
    return pa.table(cols)
