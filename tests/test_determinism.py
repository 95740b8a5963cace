"""Determinism: the same inputs give the same bits, whatever the threads, chunks or form.

* Golden hashes: sha256 of every output (float64 bytes, validity, status codes) of each
  operation on a fixed input set, stored in tests/data/golden_hashes.json by
  tests/gen_golden_hashes.py.  A change means the numbers changed: if it is intended
  (a kernel rewrite), regenerate and explain the change in the commit message.
* numba thread counts 1 and 2 give identical bits.
* Chunk layouts (1-row, 7-row and 1000-row chunks, one chunk) and input forms (Table,
  RecordBatchReader, dict of numpy arrays) give identical bits.
"""

import hashlib
import json
import pathlib

import llvmlite.binding as llvm
import numba
import numpy as np
import pyarrow as pa
import pytest

import volsweep

GOLDEN = pathlib.Path(__file__).parent / "data" / "golden_hashes.json"
REGENERATE = ".venv/bin/python tests/gen_golden_hashes.py"
N_ROWS = 10_000  # crosses the sweep's 2048-row blocks and every vector remainder
SEED = 7001
SWEEP_FOUR = ("delta", "gamma", "vega", "theta")  # the mask tests/test_sweep.py compiles

SPECIAL = [np.nan, np.inf, -np.inf, 0.0, -0.0, 5e-324, 1e-300, 1e300, -1.0]


def golden_inputs(n=N_ROWS, seed=SEED) -> pa.Table:
    """Fixed inputs, portable bit for bit: uniform doubles from PCG64 (a stable stream),
    turned into market values with +, *, / and floor only (correctly rounded everywhere),
    plus special values and nulls at fixed positions."""
    u = np.random.default_rng(seed).random((12, n))

    def grid(row, lo, hi, steps):
        return lo + np.floor(u[row] * steps) * ((hi - lo) / steps)

    spot = grid(0, 20.0, 180.0, 16000)
    strike = spot * grid(1, 0.5, 1.6, 1100)
    T = grid(2, 1.0, 3650.0, 3649) / 365.0
    rate = grid(3, -0.02, 0.10, 1200)
    q = grid(4, 0.0, 0.06, 600)
    vol = grid(5, 0.01, 2.0, 199)
    is_call = u[6] < 0.5
    intrinsic = np.where(is_call, np.maximum(spot - strike, 0.0),
                         np.maximum(strike - spot, 0.0))
    prem = intrinsic + spot * grid(7, 0.0, 0.25, 2500)
    half = prem * grid(8, 0.0, 0.05, 50)
    cols = {"spot": spot, "forward": spot, "strike": strike, "expiry_years": T, "rate": rate,
            "div_yield": q, "vol": vol, "premium": prem, "bid": prem - half, "ask": prem + half}
    masks = {}
    for j, (name, v) in enumerate(cols.items()):
        v = v.copy()
        pos = np.arange(j, n, 97)
        v[pos] = np.resize(SPECIAL, len(pos))
        cols[name] = v
        masks[name] = np.zeros(n, bool)
        masks[name][np.arange(j + 50, n, 211)] = True
    table = {name: pa.array(v, mask=masks[name]) for name, v in cols.items()}
    table["is_call"] = pa.array(is_call, mask=np.arange(n) % 331 == 5)
    return pa.table(table)


def cases():
    """name -> (function, kwargs, columns to drop): the operations the hashes cover."""
    def b76(drop):
        return ["spot", "div_yield", *drop]

    def bsm(drop):
        return ["forward", *drop]

    return {
        "price_bsm": (volsweep.price, {}, bsm(["premium", "bid", "ask"])),
        "price_black76": (volsweep.price, {"model": "black76"}, b76(["premium", "bid", "ask"])),
        "iv_bsm": (volsweep.implied_vol, {}, bsm(["vol", "bid", "ask"])),
        "iv_black76": (volsweep.implied_vol, {"model": "black76"}, b76(["vol", "bid", "ask"])),
        "iv_bid_ask_bsm": (volsweep.implied_vol, {}, bsm(["vol", "premium"])),
        "greeks_bsm": (volsweep.greeks, {}, bsm(["premium", "bid", "ask"])),
        "greeks_black76": (volsweep.greeks, {"model": "black76"},
                           b76(["premium", "bid", "ask"])),
        "greeks_delta_vega_desk": (volsweep.greeks, {"which": ["delta", "vega"],
                                                     "units": "desk"},
                                   bsm(["premium", "bid", "ask"])),
        "sweep_bsm": (volsweep.sweep, {}, bsm(["vol", "bid", "ask"])),
        "sweep_bid_ask_black76": (volsweep.sweep, {"model": "black76", "which": SWEEP_FOUR},
                                  b76(["vol", "premium"])),
        "price_bachelier": (volsweep.price, {"model": "bachelier"},
                            b76(["premium", "bid", "ask"])),
        "iv_bachelier": (volsweep.implied_vol, {"model": "bachelier"},
                         b76(["vol", "bid", "ask"])),
        "sweep_bid_ask_bachelier": (volsweep.sweep, {"model": "bachelier",
                                                     "which": SWEEP_FOUR},
                                    b76(["vol", "premium"])),
    }


def case_input(name, table=None):
    fn, kwargs, drop = cases()[name]
    t = golden_inputs() if table is None else table
    return fn, kwargs, t.drop_columns(drop)


def output_digest(inp: pa.Table, out: pa.Table) -> str:
    """sha256 over the outputs: per column its name, validity bytes and values (float64
    bytes with nulls as 0.0, or int8 status codes)."""
    h = hashlib.sha256()
    for name in out.column_names[inp.num_columns:]:
        col = out.column(name).combine_chunks()
        h.update(name.encode())
        h.update(col.is_valid().to_numpy(zero_copy_only=False).astype(np.uint8).tobytes())
        if pa.types.is_dictionary(col.type):
            h.update(col.dictionary.to_pylist().__repr__().encode())
            h.update(col.indices.to_numpy(zero_copy_only=False).astype(np.int8).tobytes())
        else:
            h.update(col.fill_null(0.0).to_numpy(zero_copy_only=False).tobytes())
    return h.hexdigest()


def run_case(name, table=None):
    fn, kwargs, inp = case_input(name, table)
    return output_digest(inp, fn(inp, **kwargs))


def host_cpu() -> str:
    return llvm.get_host_cpu_name()


# ---------------------------------------------------------------------------- tests

@pytest.fixture(scope="module")
def golden():
    if not GOLDEN.exists():
        pytest.fail(f"{GOLDEN} is missing: run `{REGENERATE}`")
    return json.loads(GOLDEN.read_text())


@pytest.mark.parametrize("name", list(cases()))
def test_golden_hash(name, golden):
    if golden["host_cpu"] != host_cpu():
        # FMA contraction and vector widths are chosen per CPU: the bits are per machine type
        pytest.skip(f"hashes recorded on {golden['host_cpu']!r}, this CPU is {host_cpu()!r}; "
                    f"run `{REGENERATE}` to record this machine type")
    got = run_case(name)
    assert got == golden["hashes"][name], (
        f"outputs of {name!r} changed bit for bit (recorded at commit {golden['commit']}). "
        f"If the change is intended, regenerate with `{REGENERATE}` and explain the change "
        "in the commit message; otherwise a change made results depend on something they "
        "must not.")


@pytest.mark.skipif(numba.config.NUMBA_NUM_THREADS < 2, reason="needs 2 numba threads")
@pytest.mark.parametrize("name", list(cases()))
def test_thread_counts_give_identical_bits(name):
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = run_case(name)
        numba.set_num_threads(2)
        two = run_case(name)
    finally:
        numba.set_num_threads(before)
    assert one == two


def _rechunk(t: pa.Table, size: int) -> pa.Table:
    return pa.Table.from_batches(t.combine_chunks().to_batches(max_chunksize=size), t.schema)


@pytest.mark.parametrize("name", list(cases()))
def test_chunk_layouts_and_input_forms_give_identical_bits(name):
    fn, kwargs, inp = case_input(name)
    whole = fn(inp, **kwargs)
    want = output_digest(inp, whole)
    for size in (1000, 4096):
        t = _rechunk(inp, size)
        assert t.column(0).num_chunks == -(-inp.num_rows // size)
        assert output_digest(t, fn(t, **kwargs)) == want, f"chunks of {size}"
    reader = pa.RecordBatchReader.from_batches(inp.schema, _rechunk(inp, 3000).to_batches())
    assert output_digest(inp, fn(reader, **kwargs)) == want, "RecordBatchReader"
    # small chunks (each kernel launch costs ~1 ms, so on a prefix): 7-row chunks run the
    # vector loops' remainder code, 1-row chunks nothing but
    for size, rows in ((7, 700), (1, 60)):
        head = inp.slice(0, rows)
        t = _rechunk(head, size)
        assert output_digest(t, fn(t, **kwargs)) == output_digest(
            head, whole.slice(0, rows)), f"chunks of {size}"


def test_dict_of_numpy_gives_the_table_bits():
    fn, kwargs, inp = case_input("price_bsm")
    d = {c: inp.column(c).combine_chunks().to_numpy(zero_copy_only=False)
         for c in inp.column_names}
    # nulls become NaN in a dict: compare with the table whose nulls are NaN too
    nan_table = pa.table({c: pa.array(v) for c, v in d.items()})
    got = volsweep.price(d)
    assert output_digest(nan_table, got) == output_digest(nan_table, volsweep.price(nan_table))
