"""bindings/loader.py: bounded compiled variants, compile notices, warmup."""

import time

import numpy as np
import pyarrow as pa
import pytest

import volsweep
from volsweep import api, loader
from volsweep.kernel import greeks, registry


def _table(n=300):
    rng = np.random.default_rng(3)
    return pa.table(dict(spot=np.full(n, 100.0), strike=rng.uniform(60, 140, n),
                         expiry_years=rng.uniform(0.05, 2.0, n), rate=np.full(n, 0.02),
                         div_yield=np.full(n, 0.01), vol=rng.uniform(0.1, 0.6, n),
                         is_call=rng.random(n) < 0.5))


@pytest.mark.parametrize("model", registry.MODEL_NAMES)
def test_every_greek_set_is_served_by_a_compiled_one(model):
    sets = registry.greek_set_masks(model)
    defined = registry.model(model).greeks
    rng = np.random.default_rng(1)
    for _ in range(200):
        names = [g for g in defined if rng.random() < 0.3]
        want = greeks.greek_mask(names, model)
        served = loader.served_mask(model, want)
        assert served in sets and want & ~served == 0
    assert len(sets) <= len(registry.GREEK_SETS)


def test_an_uncommon_greek_set_gives_the_same_bits_as_the_full_set():
    t = _table()
    few = volsweep.greeks(t, which=["speed", "delta"], units="desk")
    full = volsweep.greeks(t, units="desk")
    for name in ("delta", "speed"):
        assert few.column(name).equals(full.column(name))
    assert few.column_names[-3:] == ["delta", "speed", "status"]


def test_prepared_calls_use_only_the_registry_greek_sets():
    schema = _table(3).schema
    for which in (["delta"], ["gamma", "ultima"], ["vega"], None, ["theta", "rho", "vanna"]):
        prep = api.prepare("greeks", schema, which=which)
        assert prep.mask in registry.greek_set_masks("bsm")


def test_a_slow_load_says_it_is_compiling(monkeypatch, capsys):
    monkeypatch.setattr(loader, "_NOTICE_AFTER", 0.2)
    monkeypatch.setattr(loader, "_touch", lambda model, op, mask: time.sleep(0.5))
    key = ("bsm", "greeks", 0b11)
    loader._LOADED.discard(key)
    spent = loader.load_kernel(*key)
    err = capsys.readouterr().err
    assert spent >= 0.5
    assert "compiling the bsm greeks (Greeks delta,gamma) kernel (once per machine" in err
    assert "compiled in" in err
    assert loader.load_kernel(*key) == 0.0          # once per process
    loader._LOADED.discard(key)


def test_a_fast_load_is_silent(monkeypatch, capsys):
    monkeypatch.setattr(loader, "_touch", lambda model, op, mask: None)
    key = ("bsm", "greeks", 0b101)
    loader._LOADED.discard(key)
    loader.load_kernel(*key)
    assert capsys.readouterr().err == ""
    loader._LOADED.discard(key)


def test_a_failing_load_raises_in_the_caller(monkeypatch):
    def boom(model, op, mask):
        raise RuntimeError("no compiler")
    monkeypatch.setattr(loader, "_touch", boom)
    key = ("bsm", "greeks", 0b1001)
    loader._LOADED.discard(key)
    with pytest.raises(RuntimeError, match="no compiler"):
        loader.load_kernel(*key)
    assert key not in loader._LOADED


def test_warmup_covers_every_variant_a_call_can_use():
    variants = set(loader.kernel_variants())
    for model in registry.MODEL_NAMES:
        for m in registry.greek_set_masks(model):
            assert (model, "greeks", m) in variants and (model, "sweep", m) in variants
            assert (model, "bid_ask", loader.served_mask(model, m | greeks.greek_mask("vega", model))) in variants
        assert (model, "price", 0) in variants and (model, "implied_vol", 0) in variants
