"""Determinism: the same inputs give the same bits, whatever the threads, batches, chunks or
input form, on whatever x86-64 CPU the suite runs.

Every check below compares, on the running CPU and bit for bit, each way of computing an
operation's outputs on a fixed input set (``golden_inputs``: 10,000 rows with special
values and nulls) with the plain call on the whole table (the ``reference`` fixture):

* numba thread counts 1, 2 and 3, in a child process started with NUMBA_NUM_THREADS=3
  (so a one-core machine runs it too; the parallel loops split 5 blocks unevenly);
* batch sizes: chunks of 1000, 2047, 2048, 2049 and 4096 rows (either side of the
  kernels' 2048-row block: the serial row loop, the parallel loop, a one-row last block),
  7-row chunks (the vector loops' remainder code) and 1-row chunks;
* input forms: Table, RecordBatch, RecordBatchReader, an Arrow PyCapsule stream and a dict
  of numpy arrays;
* and that the comparisons see something: every case has ok rows and problem rows, and
  no two cases give the same digest.

Extra, per CPU model: golden hashes (sha256 of every output: float64 bytes, validity,
status codes and words) in tests/data/golden_hashes.json, one record per CPU model
(llvmlite's host CPU name: FMA contraction and vector widths are chosen per CPU, so the
bits are per CPU model), written by tests/gen_golden_hashes.py.  A CPU without a record
skips only that test.  A change means the numbers changed: if it is intended (a kernel
rewrite), regenerate and explain the change in the commit message.
"""

import hashlib
import json
import os
import pathlib
import subprocess
import sys
import textwrap
from collections import Counter

import llvmlite.binding as llvm
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
def reference():
    """name -> (input, output, digest) of the plain whole-table call, on this CPU."""
    ref = {}
    for name in cases():
        fn, kwargs, inp = case_input(name)
        out = fn(inp, **kwargs)
        ref[name] = (inp, out, output_digest(inp, out))
    return ref


@pytest.fixture(scope="module")
def golden():
    if not GOLDEN.exists():
        pytest.fail(f"{GOLDEN} is missing: run `{REGENERATE}`")
    return json.loads(GOLDEN.read_text())


@pytest.mark.parametrize("name", list(cases()))
def test_cases_have_ok_and_problem_rows(name, reference):
    # a comparison of all-null outputs would prove nothing
    inp, out, _ = reference[name]
    counts = Counter(out.column("status").to_pylist())
    assert counts["ok"] >= 0.3 * inp.num_rows, counts
    assert len(counts) >= 4, counts


def test_cases_give_distinct_digests(reference):
    digests = [d for _, _, d in reference.values()]
    assert len(set(digests)) == len(digests)


@pytest.mark.parametrize("name", list(cases()))
def test_golden_hash_of_this_cpu_model(name, golden, reference):
    record = golden["cpus"].get(host_cpu())
    if record is None:
        pytest.skip(f"no golden hashes recorded for this CPU model ({host_cpu()!r}; recorded: "
                    f"{sorted(golden['cpus'])}); the in-test comparisons of this file ran. "
                    f"`{REGENERATE}` adds a record for this CPU model")
    assert reference[name][2] == record["hashes"][name], (
        f"outputs of {name!r} changed bit for bit on {host_cpu()!r} (recorded at commit "
        f"{record['commit']}). If the change is intended, regenerate with `{REGENERATE}` "
        "and explain the change in the commit message; otherwise a change made results "
        "depend on something they must not.")


_CHILD = textwrap.dedent("""
    import json, sys
    sys.path.insert(0, {tests!r})
    import numba
    from test_determinism import cases, run_case
    digests = {{}}
    for n in (1, 2, 3):
        numba.set_num_threads(n)
        digests[n] = {{name: run_case(name) for name in cases()}}
    print(json.dumps(digests))
""")


def test_thread_counts_give_identical_bits(reference):
    # in a child process with 3 numba threads available, whatever this machine's core count
    # (the kernels are loaded from the cache the reference just filled)
    code = _CHILD.format(tests=str(pathlib.Path(__file__).parent))
    env = dict(os.environ, NUMBA_NUM_THREADS="3")
    r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    got = json.loads(r.stdout.strip().splitlines()[-1])
    want = {name: d for name, (_, _, d) in reference.items()}
    assert sorted(got) == ["1", "2", "3"]
    for n, digests in got.items():
        assert digests == want, f"{n} numba threads"


def _rechunk(t: pa.Table, size: int) -> pa.Table:
    return pa.Table.from_batches(t.combine_chunks().to_batches(max_chunksize=size), t.schema)


class _Stream:
    """Any object with the Arrow PyCapsule stream interface (as pandas or polars give)."""

    def __init__(self, table):
        self.table = table

    def __arrow_c_stream__(self, requested_schema=None):
        return self.table.__arrow_c_stream__(requested_schema)


@pytest.mark.parametrize("name", list(cases()))
def test_batch_sizes_chunk_layouts_and_input_forms_give_identical_bits(name, reference):
    fn, kwargs, _ = case_input(name)
    inp, whole, want = reference[name]
    for size in (1000, 2047, 2048, 2049, 4096):
        t = _rechunk(inp, size)
        assert t.column(0).num_chunks == -(-inp.num_rows // size)
        assert output_digest(t, fn(t, **kwargs)) == want, f"chunks of {size}"
    one = inp.combine_chunks()
    assert output_digest(inp, fn(one.to_batches()[0], **kwargs)) == want, "RecordBatch"
    reader = pa.RecordBatchReader.from_batches(inp.schema, _rechunk(inp, 3000).to_batches())
    assert output_digest(inp, fn(reader, **kwargs)) == want, "RecordBatchReader"
    assert output_digest(inp, fn(_Stream(_rechunk(inp, 2500)), **kwargs)) == want, "stream"
    # small chunks (each kernel launch costs ~1 ms, so on a prefix): 7-row chunks run the
    # vector loops' remainder code, 1-row chunks nothing but
    for size, rows in ((7, 700), (1, 60)):
        head = inp.slice(0, rows)
        t = _rechunk(head, size)
        assert output_digest(t, fn(t, **kwargs)) == output_digest(
            head, whole.slice(0, rows)), f"chunks of {size}"


@pytest.mark.parametrize("name", list(cases()))
def test_dict_of_numpy_gives_the_table_bits(name):
    fn, kwargs, inp = case_input(name)
    d = {c: inp.column(c).combine_chunks().to_numpy(zero_copy_only=False)
         for c in inp.column_names}
    # nulls become NaN (None in the is_call object array) in a dict: compare with the
    # table built from those arrays, whose nulls are NaN too
    nan_table = pa.table({c: pa.array(v, from_pandas=True) if v.dtype == object
                          else pa.array(v) for c, v in d.items()})
    assert output_digest(nan_table, fn(d, **kwargs)) == output_digest(
        nan_table, fn(nan_table, **kwargs))
