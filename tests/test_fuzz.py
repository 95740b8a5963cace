"""Fuzz run: over a million hostile rows through every table-level operation.

The rows mix plausible market data with the values a feed can send: NaN, +-inf, +-0,
subnormals, 1e300 and the largest double, negatives, nulls (Arrow validity masks) and
call/put words in every spelling, spread over uneven chunks.  Every operation must keep
every row, in order, give each a status from the documented vocabulary, a finite value
wherever the status is ``ok`` and a null wherever it is not, and leave its input alone.
The status sentences of the README ("a null or NaN input gives missing_input", ...) are
checked on the rows that were damaged on purpose.
"""

import numpy as np
import pyarrow as pa
import pytest

import volsweep
from volsweep.kernel.status import NAMES

N_ROWS = 1 << 20          # rows per fuzz table (1,048,576), every CI run
SEED = 20260601

HOSTILE = np.array([np.nan, np.inf, -np.inf, 0.0, -0.0, 5e-324, 2.2250738585072014e-308,
                    1e-300, 1e-12, 1e12, 1e300, 1.7976931348623157e308, -1.0, -1e300])
CALL_PUT_WORDS = np.array(["call", "put", "C", "P", "CALL", " Put ", "c", "p", "x", "",
                           "calls", "\u00e7all", "put\x00"], dtype=object)
GREEKS_BSM = list(volsweep.GREEK_NAMES)
GREEKS_B76 = [g for g in volsweep.GREEK_NAMES if g != "div_rho"]


def _damage(rng, values, p_hostile, p_null):
    """Replace a fraction of ``values`` by hostile doubles and nulls; return (array, masks)."""
    n = len(values)
    v = values.copy()
    hostile = rng.random(n) < p_hostile
    v[hostile] = rng.choice(HOSTILE, int(hostile.sum()))
    null = rng.random(n) < p_null
    return pa.array(v, mask=null), v, null


def hostile_table(n=N_ROWS, seed=SEED, words=False):
    """A fuzz table (and, for the status checks, the raw values and null masks)."""
    rng = np.random.default_rng(seed)
    S = rng.lognormal(np.log(100.0), 1.0, n)
    K = S * np.exp(rng.normal(0.0, 0.5, n))
    T = np.exp(rng.uniform(np.log(1e-4), np.log(30.0), n))
    r = rng.uniform(-0.05, 0.2, n)
    q = rng.uniform(0.0, 0.1, n)
    vol = np.exp(rng.uniform(np.log(0.01), np.log(3.0), n))
    is_call = rng.random(n) < 0.5
    intrinsic = np.where(is_call, np.maximum(S - K, 0.0), np.maximum(K - S, 0.0))
    prem = intrinsic + S * rng.uniform(0.0, 0.3, n) ** 2
    half = prem * rng.uniform(0.0, 0.1, n)
    cols, raw = {"id": pa.array(np.arange(n))}, {}
    for name, values, p in (("spot", S, 0.1), ("strike", K, 0.1), ("expiry_years", T, 0.1),
                            ("rate", r, 0.05), ("div_yield", q, 0.05), ("vol", vol, 0.1),
                            ("premium", prem, 0.1), ("bid", prem - half, 0.1),
                            ("ask", prem + half, 0.1)):
        cols[name], v, null = _damage(rng, values, p, 0.02)
        raw[name] = np.where(null, np.nan, v)
    cp_null = rng.random(n) < 0.02
    if words:
        w = np.where(is_call, "call", "put").astype(object)
        odd = rng.random(n) < 0.1
        w[odd] = rng.choice(CALL_PUT_WORDS, int(odd.sum()))
        cols["is_call"] = pa.array(list(w), pa.string(), mask=cp_null)
        # (not np.char: numpy strings drop a trailing NUL, so "put\x00" would read "put")
        known = np.array([x.strip(" ").lower() in ("call", "c", "put", "p") for x in w])
        raw["cp_missing"] = cp_null | ~known
    else:
        cols["is_call"] = pa.array(is_call, mask=cp_null)
        raw["cp_missing"] = cp_null
    table = pa.table(cols)
    # uneven chunks, an empty one among them: results must not depend on the layout
    cuts = np.sort(rng.choice(np.arange(1, n), 6, replace=False))
    edges = [0, *cuts.tolist(), n]
    pieces = [table.slice(a, b - a) for a, b in zip(edges[:-1], edges[1:])]
    pieces.insert(3, table.slice(0, 0))
    return pa.concat_tables(pieces), raw


@pytest.fixture(scope="module")
def fuzz():
    return hostile_table()


def same_table(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas and values, NaN bits included (Table.equals says NaN != NaN)."""
    if a.schema != b.schema:
        return False
    for x, y in zip(a.columns, b.columns):
        x, y = x.combine_chunks(), y.combine_chunks()
        if pa.types.is_floating(x.type):
            if not x.is_null().equals(y.is_null()):
                return False
            xb = x.fill_null(0).to_numpy(zero_copy_only=False).view(np.uint64)
            yb = y.fill_null(0).to_numpy(zero_copy_only=False).view(np.uint64)
            if not np.array_equal(xb, yb):
                return False
        elif not x.equals(y):
            return False
    return True


def check_invariants(inp: pa.Table, out: pa.Table, values, secondary=(), status="status"):
    """The hostile-input contract, for one status column and the outputs it governs.

    ``values``: primary outputs (null exactly when not ok, finite when ok).  ``secondary``:
    Greeks and the spread uncertainty (null when not ok; when present, finite).
    Returns the status codes.
    """
    assert out.num_rows == inp.num_rows
    assert out.column_names[:inp.num_columns] == inp.column_names
    assert same_table(out.select(inp.column_names), inp)     # same rows, same order
    st = out.column(status)
    assert pa.types.is_dictionary(st.type)
    st = st.combine_chunks()
    assert st.null_count == 0
    if len(st):
        assert st.dictionary.to_pylist() == list(NAMES)
    codes = st.indices.to_numpy(zero_copy_only=False)
    assert codes.min(initial=0) >= 0 and codes.max(initial=0) < len(NAMES)
    ok = codes == 0
    for name in (*values, *secondary):
        col = out.column(name).combine_chunks()
        assert col.type == pa.float64()
        valid = col.is_valid().to_numpy(zero_copy_only=False)
        x = col.fill_null(0.0).to_numpy()
        assert not (valid & ~ok).any(), f"{name}: value on a row whose {status} is not ok"
        assert np.isfinite(x[valid]).all(), f"{name}: NaN or inf on an ok row"
        if name in values:
            assert valid[ok].all(), f"{name}: null on an ok row"
    return codes


def _input_sentences(raw, codes, model, need_vol, quote=None):
    """README: a null/NaN required input (or an unknown call/put) gives missing_input; else
    a +-inf one gives non_finite_input.  Input problems take priority over quote problems:
    a NaN / infinite ``quote`` column gives those statuses only on rows whose other inputs
    are valid.  Returns the rows whose inputs (quote included) are all finite."""
    names = ["spot", "strike", "expiry_years", "rate"] + (["vol"] if need_vol else [])
    if model == "bsm":
        names.append("div_yield")
    vals = np.stack([raw[c] for c in names])
    missing = np.isnan(vals).any(axis=0) | raw["cp_missing"]
    nonfinite = np.isinf(vals).any(axis=0) & ~missing
    assert (codes[missing] == NAMES.index("missing_input")).all()
    assert (codes[nonfinite] == NAMES.index("non_finite_input")).all()
    clean = ~missing & ~nonfinite
    if quote is not None:
        valid_inputs = clean & ~np.isin(codes, [3, 4, 5, 6, 7])
        q = raw[quote]
        assert (codes[valid_inputs & np.isnan(q)] == NAMES.index("missing_input")).all()
        assert (codes[valid_inputs & np.isinf(q)] == NAMES.index("non_finite_input")).all()
        clean &= np.isfinite(q)
    assert not np.isin(codes[clean], [1, 2]).any()
    return clean


def _ids_in_order(out):
    ids = out.column("id").to_numpy()
    assert np.array_equal(ids, np.arange(len(ids)))


def _as_black76(t):
    t = t.drop_columns(["div_yield"])
    return t.rename_columns(["forward" if c == "spot" else c for c in t.column_names])


def test_price_bsm(fuzz):
    t, raw = fuzz
    inp = t.drop_columns(["premium", "bid", "ask"])
    out = volsweep.price(inp)
    codes = check_invariants(inp, out, ["price"])
    _ids_in_order(out)
    _input_sentences(raw, codes, "bsm", need_vol=True)
    assert (codes == 0).mean() > 0.2  # the plausible rows still price


def test_price_black76_with_call_put_words():
    t, raw = hostile_table(n=N_ROWS // 4, seed=SEED + 1, words=True)
    inp = _as_black76(t.drop_columns(["premium", "bid", "ask"]))
    out = volsweep.price(inp, model="black76")
    codes = check_invariants(inp, out, ["price"])
    _input_sentences(raw, codes, "black76", need_vol=True)


def test_implied_vol_from_premium(fuzz):
    t, raw = fuzz
    inp = t.drop_columns(["vol", "bid", "ask"])
    out = volsweep.implied_vol(inp)
    codes = check_invariants(inp, out, ["iv"])
    clean = _input_sentences(raw, codes, "bsm", need_vol=False, quote="premium")
    inputs_ok = clean & ~np.isin(codes, [3, 4, 5, 6, 7])
    assert (codes[inputs_ok & (raw["premium"] < 0)] == NAMES.index("premium_too_low")).all()
    assert (codes == 0).mean() > 0.1


def test_implied_vol_from_bid_ask(fuzz):
    t, raw = fuzz
    inp = t.drop_columns(["vol", "premium"])
    out = volsweep.implied_vol(inp)
    mid = check_invariants(inp, out, ["iv"], ["iv_spread_uncertainty"])
    bid = check_invariants(inp, out, ["iv_bid"], status="status_bid")
    ask = check_invariants(inp, out, ["iv_ask"], status="status_ask")
    _input_sentences(raw, bid, "bsm", need_vol=False, quote="bid")
    _input_sentences(raw, ask, "bsm", need_vol=False, quote="ask")
    b, a = raw["bid"], raw["ask"]
    with np.errstate(invalid="ignore"):
        raw = dict(raw, mid=0.5 * b + 0.5 * a)  # NaN for -inf/+inf, as the library's mid
    clean = _input_sentences(raw, mid, "bsm", need_vol=False, quote="mid")
    clean &= np.isfinite(b) & np.isfinite(a) & ~np.isin(mid, [3, 4, 5, 6, 7])
    crossed = clean & (b > a)
    zero_bid = clean & (b <= 0) & ~crossed
    for codes in (bid, ask, mid):
        assert (codes[crossed] == NAMES.index("crossed_quote")).all()
    assert (bid[zero_bid] == NAMES.index("zero_bid")).all()
    assert (mid[zero_bid] == NAMES.index("zero_bid")).all()


def test_greeks_all_bsm(fuzz):
    t, raw = fuzz
    inp = t.drop_columns(["premium", "bid", "ask"])
    out = volsweep.greeks(inp)
    codes = check_invariants(inp, out, [], GREEKS_BSM)
    _input_sentences(raw, codes, "bsm", need_vol=True)
    # same statuses as pricing the same rows (one validation for every operation), except
    # where the price itself overflows (a put struck near 1.8e308 with D > 1) while its
    # Greeks do not
    priced = volsweep.price(inp).column("status").combine_chunks().indices.to_numpy()
    differ = codes != priced
    assert ((codes[differ] == 0) & (priced[differ] == NAMES.index("out_of_range"))).all()


def test_greeks_black76_desk_units(fuzz):
    t, raw = fuzz
    inp = _as_black76(t.drop_columns(["premium", "bid", "ask"])).slice(0, N_ROWS // 4)
    out = volsweep.greeks(inp, model="black76", units="desk")
    codes = check_invariants(inp, out, [], GREEKS_B76)
    _input_sentences({k: v[:N_ROWS // 4] for k, v in raw.items()}, codes, "black76", True)


def test_sweep_from_premium(fuzz):
    t, raw = fuzz
    inp = t.drop_columns(["vol", "bid", "ask"]).slice(0, N_ROWS // 2)
    out = volsweep.sweep(inp)
    codes = check_invariants(inp, out, ["iv"], GREEKS_BSM)
    _input_sentences({k: v[:N_ROWS // 2] for k, v in raw.items()}, codes, "bsm", False,
                     quote="premium")
    # the fused pass gives the statuses and vols of implied_vol
    iv = volsweep.implied_vol(inp)
    assert out.column("status").equals(iv.column("status"))
    assert out.column("iv").equals(iv.column("iv"))


def test_inputs_untouched_after_every_operation(fuzz):
    # runs after the operations above on the same module-scoped table: its buffers must
    # still hold the generated values (the outputs share those buffers zero-copy)
    t, raw = fuzz
    for name in ("spot", "strike", "expiry_years", "rate", "div_yield", "vol", "premium",
                 "bid", "ask"):
        got = t.column(name).combine_chunks().fill_null(np.nan).to_numpy()
        assert np.array_equal(got.view(np.uint64), raw[name].view(np.uint64)), name


def test_price_and_implied_vol_bachelier(fuzz):
    # the normal model on the same hostile rows: the same input sentences; forwards and
    # strikes of any sign are data (never bad_underlying / bad_strike)
    t, raw = fuzz
    n = N_ROWS // 4
    sub = {k: v[:n] for k, v in raw.items()}
    inp = _as_black76(t.drop_columns(["premium", "bid", "ask"])).slice(0, n)
    out = volsweep.price(inp, model="bachelier")
    codes = check_invariants(inp, out, ["price"])
    _ids_in_order(out)
    _input_sentences(sub, codes, "bachelier", need_vol=True)
    assert not np.isin(codes, [NAMES.index("bad_underlying"), NAMES.index("bad_strike")]).any()
    assert (codes == 0).mean() > 0.2
    inp = _as_black76(t.drop_columns(["vol", "bid", "ask"])).slice(0, n)
    out = volsweep.implied_vol(inp, model="bachelier")
    codes = check_invariants(inp, out, ["iv"])
    _input_sentences(sub, codes, "bachelier", need_vol=False, quote="premium")
    assert (codes == 0).mean() > 0.1
