"""The registry: every model and every operation volsweep knows, as plain data.

Everything that lists models or operations derives from these two tables: the bindings'
dispatch and column plan (``volsweep.api``, ``volsweep._columns``), ``volsweep.warmup()``,
the CLI's ``--model`` choices and help, the benchmark report's cases and the README's
tables (``tests/test_registry.py`` checks the README against them).  Adding a model is its
kernels plus one ``Model`` entry in ``MODELS`` (DEVELOPERS.md, "Adding a model").

Kernel calling convention, the same for every model (``U`` is the model's underlying
input, ``extras`` its extra inputs in ``Model.extras`` order, all float64 arrays of one
length n; ``cp`` int8 call/put signs, +1 call, -1 put, 0 missing; outputs preallocated):

===============  ===========================================================================
operation        kernel signature
===============  ===========================================================================
``price``        ``(U, K, T, D, *extras, vol, cp, price, status)``
``implied_vol``  ``(premium, U, K, T, D, *extras, cp, iv, status)``
``greeks``       ``(U, K, T, D, *extras, vol, cp, mask, out, status)`` -> n non-finite
``sweep``        ``(premium, U, K, T, D, *extras, cp, mask, iv, out, status)`` -> n non-finite
``bid_ask``      ``(bid, ask, U, K, T, D, *extras, cp, mask, iv_bid, iv_ask, iv, unc, out,
                 status_bid, status_ask, status)`` -> n non-finite (``mask`` must hold vega)
===============  ===========================================================================

No Arrow and no bindings here: this module imports the kernels only.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field

from . import bachelier as _bachelier
from . import black as _black
from . import greeks as _greeks
from . import implied as _implied
from . import quotes as _quotes
from . import sweep as _sweep


@dataclass(frozen=True)
class Input:
    """An input column of a model beyond the common ones (strike, expiry, rate, call/put)."""

    name: str           # default column name (the data contract's)
    default: float      # value when the column is absent
    doc: str


@dataclass(frozen=True)
class Model:
    name: str
    doc: str                       # one line
    underlying: str                # "spot" or "forward": the column the Greeks differentiate
    extras: tuple                  # of Input, in kernel argument order (after D)
    greeks: tuple                  # the Greeks it defines, in GREEK_NAMES order
    kernels: dict = field(repr=False)   # operation -> kernel entry point (see above)
    exercise: str = "european"
    vol: str = "lognormal"         # the vol input: "lognormal" (per year^1/2) or "normal"
    #                                (price units per year^1/2)
    units: dict = field(default_factory=dict)  # Greek -> (raw, desk) unit where it differs
    #                                            from GREEKS (e.g. a normal vol's)


@dataclass(frozen=True)
class Operation:
    """A public row operation of ``volsweep`` (Arrow table in, same rows plus outputs)."""

    name: str
    needs: str                     # "vol" (a vol column) or "quote" (premium, or bid and ask)
    outputs: tuple                 # output columns (symbolic: "<greeks>", "<iv>")
    doc: str


# What each Greek is, and its units: raw (the analytic derivative) and desk (raw times
# greeks.DESK_SCALE).  "underlying" is the model's underlying input (spot or forward).
GREEKS = {
    "delta": ("dV/dU", "per 1 of underlying", "per 1 of underlying"),
    "gamma": ("d2V/dU2", "per 1 of underlying, squared", "per 1 of underlying, squared"),
    "vega": ("dV/dsigma", "per 1.00 of vol", "per vol point"),
    "theta": ("-dV/dT", "per year", "per calendar day"),
    "rho": ("dV/dr", "per 1.00 of rate", "per 1% of rate"),
    "div_rho": ("dV/dq", "per 1.00 of yield", "per 1% of yield"),
    "vanna": ("d2V/dU dsigma", "per 1 of underlying per 1.00 of vol",
              "per 1 of underlying per vol point"),
    "volga": ("d2V/dsigma2", "per 1.00 of vol, squared", "per vol point, squared"),
    "charm": ("-d2V/dU dT", "per 1 of underlying per year",
              "per 1 of underlying per calendar day"),
    "veta": ("-d2V/dsigma dT", "per 1.00 of vol per year", "per vol point per calendar day"),
    "speed": ("d3V/dU3", "per 1 of underlying, cubed", "per 1 of underlying, cubed"),
    "zomma": ("d3V/dU2 dsigma", "per 1 of underlying squared per 1.00 of vol",
              "per 1 of underlying squared per vol point"),
    "color": ("-d3V/dU2 dT", "per 1 of underlying squared per year",
              "per 1 of underlying squared per calendar day"),
    "ultima": ("d3V/dsigma3", "per 1.00 of vol, cubed", "per vol point, cubed"),
    "dual_delta": ("dV/dK", "per 1 of strike", "per 1 of strike"),
    "dual_gamma": ("d2V/dK2", "per 1 of strike, squared", "per 1 of strike, squared"),
}
assert tuple(GREEKS) == _greeks.GREEK_NAMES


def _normal_vol_units():
    """The units of the Greeks taken against a normal vol (price units per year^1/2):
    GREEKS' wording with "normal vol" for "vol"; the desk scale (1/100 per order in the
    vol) is the same."""
    out = {}
    for name, (_, raw, desk) in GREEKS.items():
        if "vol" in raw:
            out[name] = (raw.replace("of vol", "of normal vol"),
                         desk.replace("vol point", "0.01 of normal vol"))
    return out


def _all_but(*names):
    return tuple(g for g in _greeks.GREEK_NAMES if g not in names)


_DIV_YIELD = Input("div_yield", 0.0, "continuous dividend yield / borrow, per year")
_SHIFT = Input("shift", 0.0, "displacement of shifted Black-76, priced as the lognormal "
                             "model of forward + shift and strike + shift")

MODELS = {
    "bsm": Model(
        name="bsm",
        doc="Black-Scholes-Merton: European options on a spot price with a continuous "
            "dividend yield",
        underlying="spot",
        extras=(_DIV_YIELD,),
        greeks=_greeks.GREEK_NAMES,
        kernels={"price": _black.bsm_price, "implied_vol": _implied.bsm_iv,
                 "greeks": _greeks.bsm_greeks, "sweep": _sweep.bsm_sweep,
                 "bid_ask": _quotes.bsm_bid_ask},
    ),
    "black76": Model(
        name="black76",
        doc="Black-76: European options on a forward or futures price (lognormal, "
            "optionally shifted)",
        underlying="forward",
        extras=(_SHIFT,),
        greeks=_all_but("div_rho"),
        kernels={"price": _black.black76_price, "implied_vol": _implied.black76_iv,
                 "greeks": _greeks.black76_greeks, "sweep": _sweep.black76_sweep,
                 "bid_ask": _quotes.black76_bid_ask},
    ),
    "bachelier": Model(
        name="bachelier",
        doc="Bachelier: European options on a forward or futures price of any sign "
            "(normal model; vol in price units per year^1/2)",
        underlying="forward",
        extras=(),
        greeks=_all_but("div_rho"),
        vol="normal",
        units=_normal_vol_units(),
        kernels={"price": _bachelier.price, "implied_vol": _bachelier.implied_vol,
                 "greeks": _bachelier.greeks, "sweep": _bachelier.sweep,
                 "bid_ask": _bachelier.bid_ask},
    ),
}

# American exercise: kernels of their own (kernel/american.py) and one entry per model that
# has them, beside the European entry of the same name.  The bindings choose the entry by
# the ``exercise=`` argument or an ``exercise`` column; MODELS stays the European table.
# Imported by name, not with a relative import: greeks.py imports this module, and the
# kernel cache keys a module on the sources of every kernel module it imports (_cache.py),
# so a relative import here would recompile every Greeks loop on each edit of american.py
# (none of which calls it).
_american = importlib.import_module(f"{__package__}.american")

_EXERCISE = Input("exercise", 1.0, "exercise style per row: american or european (any "
                                   "case); absent: the exercise= argument")

AMERICAN = {
    "bsm": Model(
        name="bsm",
        doc="Black-Scholes-Merton with American exercise: options on a spot price with a "
            "continuous dividend yield, exercisable any time up to expiry",
        underlying="spot",
        extras=(_DIV_YIELD, _EXERCISE),
        greeks=_american.AMERICAN_GREEKS,
        kernels={"price": _american.price, "implied_vol": _american.implied_vol,
                 "greeks": _american.greeks, "sweep": _american.sweep,
                 "bid_ask": _american.bid_ask},
        exercise="american",
    ),
}
EXERCISES = ("european", "american")

MODEL_NAMES = tuple(MODELS)
DEFAULT_MODEL = "bsm"     # the model of every function and command that is not told one


OPERATIONS = {
    "price": Operation("price", "vol", ("price", "status"),
                       "model prices at the volatility in the vol column"),
    "implied_vol": Operation("implied_vol", "quote", ("<iv>", "status"),
                             "implied volatilities of premiums, or of bid, ask and mid"),
    "greeks": Operation("greeks", "vol", ("<greeks>", "status"),
                        "analytic Greeks at the volatility in the vol column"),
    "sweep": Operation("sweep", "quote", ("<iv>", "<greeks>", "status"),
                       "implied vol from the quote, then the Greeks at that vol, one pass"),
}

KERNEL_OPERATIONS = ("price", "implied_vol", "greeks", "sweep", "bid_ask")

# The Greek sets the per-set loops (Greeks, sweep, bid/ask) are compiled for, per model
# (each restricted to the Greeks the model defines; None: all of them).  Any other set is
# served by the smallest of these that holds it and the extra Greeks are dropped, so the
# number of compiled variants is bounded and ``volsweep.warmup()`` can load them all.
GREEK_SETS = (("vega",), ("delta", "gamma", "vega", "theta", "rho"), None)


def greek_set_masks(name, exercise="european") -> tuple:
    """Masks of ``GREEK_SETS`` for model ``name``, smallest first, without repeats."""
    m = model(name, exercise)
    masks = {_greeks.greek_mask(m.greeks if s is None else
                                tuple(g for g in s if g in m.greeks), name)
             for s in GREEK_SETS}
    return tuple(sorted(masks, key=lambda k: (bin(k).count("1"), k)))


def model(name, exercise="european") -> Model:
    """The registry entry of ``name`` with this exercise style ("european": ``MODELS``,
    "american": ``AMERICAN``); ValueError naming the known ones otherwise."""
    if exercise == "american":
        if name in AMERICAN:
            return AMERICAN[name]
        model(name)                     # an unknown model is said as such
        raise ValueError(f"model {name!r} has no American exercise; American exercise: "
                         f"{', '.join(AMERICAN)}")
    if exercise != "european":
        raise ValueError(f"unknown exercise {exercise!r}; expected one of "
                         f"{', '.join(EXERCISES)}")
    try:
        return MODELS[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown model {name!r}; expected one of "
                         f"{', '.join(MODEL_NAMES)}") from None


def _check():
    for m in list(MODELS.values()) + list(AMERICAN.values()):
        assert set(m.kernels) == set(KERNEL_OPERATIONS), m.name
        assert m.underlying in ("spot", "forward"), m.name
        assert all(g in GREEKS for g in m.greeks), m.name
        assert set(m.units) <= set(m.greeks), m.name
        assert m.vol in ("lognormal", "normal"), m.name
        assert m.exercise in EXERCISES, m.name
    for name, m in AMERICAN.items():
        assert name in MODELS and m.name == name and m.exercise == "american", name


_check()
