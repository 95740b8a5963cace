"""Concurrency: a risk engine calls volsweep from many Python threads at once.

Eight threads run price, implied_vol, greeks and sweep on different tables at the same
time, several rounds, some with one numba thread and some with two: nothing crashes and
every result equals the serial run bit for bit.  Under numba's ``workqueue`` threading
layer (not thread-safe: concurrent launches abort the process) the bindings serialise
kernel launches; a child process checks that, and that its bits equal this layer's.
"""

import os
import subprocess
import sys
import textwrap
import threading
from concurrent.futures import ThreadPoolExecutor

import numba
import pytest

from test_determinism import case_input, golden_inputs, output_digest

N_THREADS = 8
ROUNDS = 3
ROWS = 6000
CASES = ["price_bsm", "iv_bsm", "iv_bid_ask_bsm", "greeks_bsm", "greeks_delta_vega_desk",
         "sweep_bsm", "price_black76", "sweep_bid_ask_black76", "iv_bachelier"]


@pytest.fixture(scope="module")
def jobs():
    """(case, table) pairs, one distinct table per job, with their serial results."""
    out = []
    for k, name in enumerate(CASES):
        fn, kwargs, inp = case_input(name, golden_inputs(ROWS, seed=9000 + k))
        out.append((fn, kwargs, inp, output_digest(inp, fn(inp, **kwargs))))
    return out


def test_eight_threads_at_once_equal_the_serial_run(jobs):
    barrier = threading.Barrier(N_THREADS)

    def work(k):
        fn, kwargs, inp, want = jobs[k % len(jobs)]
        numba.set_num_threads(1 + k % min(2, numba.config.NUMBA_NUM_THREADS))
        barrier.wait()  # all eight start together
        got = []
        for _ in range(ROUNDS):
            got.append(output_digest(inp, fn(inp, **kwargs)))
        return k, want, got

    with ThreadPoolExecutor(N_THREADS) as pool:
        results = list(pool.map(work, range(N_THREADS)))
    for k, want, got in results:
        assert got == [want] * ROUNDS, f"thread {k} ({CASES[k % len(CASES)]})"


def test_same_table_from_eight_threads(jobs):
    # one shared input: the bindings must not write to it or share scratch between calls
    fn, kwargs, inp, want = jobs[CASES.index("iv_bid_ask_bsm")]
    with ThreadPoolExecutor(N_THREADS) as pool:
        got = list(pool.map(lambda _: output_digest(inp, fn(inp, **kwargs)),
                            range(2 * N_THREADS)))
    assert got == [want] * (2 * N_THREADS)


_CHILD = textwrap.dedent("""
    import threading, numba, sys
    sys.path.insert(0, {tests!r})
    from test_determinism import case_input, golden_inputs, output_digest
    jobs = []
    for k, name in enumerate({cases!r}):
        fn, kw, inp = case_input(name, golden_inputs(3000, seed=100 + k))
        jobs.append((fn, kw, inp, output_digest(inp, fn(inp, **kw))))
    assert numba.threading_layer() == "workqueue", numba.threading_layer()
    barrier, bad = threading.Barrier(8), []
    def work(k):
        fn, kw, inp, want = jobs[k % 4]
        barrier.wait()
        for _ in range(3):
            if output_digest(inp, fn(inp, **kw)) != want:
                bad.append(k)
    threads = [threading.Thread(target=work, args=(k,)) for k in range(8)]
    [t.start() for t in threads]
    [t.join() for t in threads]
    print("mismatches", bad)
    print("digests", " ".join(j[3] for j in jobs))
    sys.exit(1 if bad else 0)
""")
_CHILD_CASES = ["price_bsm", "iv_bsm", "greeks_delta_vega_desk", "sweep_bsm"]


def test_workqueue_layer_is_serialised_not_aborted():
    env = dict(os.environ, NUMBA_THREADING_LAYER="workqueue")
    code = _CHILD.format(tests=os.path.dirname(os.path.abspath(__file__)), cases=_CHILD_CASES)
    r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stdout + r.stderr[-2000:]
    # and the bits are those of this process's threading layer
    here = []
    for k, name in enumerate(_CHILD_CASES):
        fn, kw, inp = case_input(name, golden_inputs(3000, seed=100 + k))
        here.append(output_digest(inp, fn(inp, **kw)))
    assert r.stdout.split("digests ")[1].split() == here
