"""data_gen with hidden carry: true forwards the visible columns do not give, and labelled
stale or outlying quotes (data_gen/carry.py)."""

import numpy as np
import pyarrow as pa
import pytest

from volsweep import data_gen
from volsweep.data_gen import carry


@pytest.fixture(scope="module")
def snap():
    return data_gen.make_snapshot(n_rows=60_000, seed=8, hidden_carry=True,
                                  off_parity_fraction=0.03)


def _np(t, name):
    col = t[name].combine_chunks()
    if pa.types.is_dictionary(col.type):
        return col.indices.to_numpy()
    return col.to_numpy(zero_copy_only=False)


def test_schema_and_the_default_is_unchanged(snap):
    assert snap.schema.remove_metadata() == data_gen.CHAIN_SCHEMA
    assert snap["parity_flag"].chunk(0).dictionary.to_pylist() == list(data_gen.PARITY_FLAGS)
    plain = data_gen.make_snapshot(n_rows=60_000, seed=8)
    assert plain.schema.remove_metadata() == data_gen.SCHEMA
    # the hidden-carry draws come from a stream of their own: the names, spots and rates
    # are the same (the strikes follow the true forward, so rows do not line up)
    def levels(t):
        ok = _np(t, "quote_flag") == 0
        return (dict(zip(t["underlying"].to_pylist(), _np(t, "spot"))),
                set(zip(_np(t, "expiry_years")[ok], _np(t, "rate")[ok])))
    assert levels(plain) == levels(snap)


def test_forward_column_is_spot_carried_forward_and_true_forward_differs(snap):
    s, r, q, t = (_np(snap, n) for n in ("spot", "rate", "div_yield", "expiry_years"))
    clean = _np(snap, "quote_flag") == 0
    assert np.allclose(_np(snap, "forward")[clean], (s * np.exp((r - q) * t))[clean],
                       rtol=1e-14, atol=0)
    ratio = _np(snap, "true_forward")[clean] / _np(snap, "forward")[clean]
    assert np.mean(np.abs(ratio - 1) > 1e-3) > 0.2      # many names hide borrow/dividends
    assert np.mean(ratio == 1.0) > 0.1                  # some do not
    assert np.all(ratio <= 1.0 + 1e-15)                 # borrow and dividends lower it


def test_model_prices_satisfy_parity_on_the_true_forward(snap):
    # published identity (put-call parity): C - P = D (F - K), F the true forward
    m = _np(snap, "model_price")
    F, K = _np(snap, "true_forward"), _np(snap, "strike")
    D = np.exp(-_np(snap, "rate") * _np(snap, "expiry_years"))
    clean = _np(snap, "quote_flag") == 0
    n = m.size // 2 * 2
    both = clean[0:n:2] & clean[1:n:2]
    lhs = (m[0:n:2] - m[1:n:2])[both]
    rhs = (D * (F - K))[0:n:2][both]
    assert np.max(np.abs(lhs - rhs) / F[0:n:2][both]) < 1e-13


def test_off_parity_quotes_labelled_one_side_per_pair(snap):
    flag = _np(snap, "parity_flag")
    n = flag.size // 2 * 2
    assert not np.any((flag[0:n:2] > 0) & (flag[1:n:2] > 0))
    share = np.mean(flag > 0)
    assert 0.025 < share < 0.035
    assert np.count_nonzero(flag == carry.STALE) > 0 and np.count_nonzero(flag == carry.OUTLIER) > 0
    # spoiled rows were clean quotes and stay well-formed (bid <= premium <= ask)
    spoiled = flag > 0
    assert np.all(_np(snap, "quote_flag")[spoiled] == 0)
    b, p, a = (_np(snap, x)[spoiled] for x in ("bid", "premium", "ask"))
    assert np.all((b <= p) & (p <= a))
    # and differ from the model price by more than the clean quotes do, typically
    m = _np(snap, "model_price")
    clean = (flag == 0) & (_np(snap, "quote_flag") == 0)
    off = np.abs(_np(snap, "premium") - m)
    assert np.median(off[flag == carry.OUTLIER]) > 5 * np.median(off[clean])
