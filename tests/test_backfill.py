"""Dask backfill: same results as a single-machine run, idempotent re-runs, a worker killed
mid-run, worker threads and kernel loading.  Each test starts a small LocalCluster of
worker processes (a few seconds on 2 cores)."""

import datetime as dt
import importlib
import os
import signal
import sys
import threading

import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from volsweep.atomic_parquet import temp_path
from volsweep.input_files import open_input
from volsweep.stream_to_parquet import stream_to_parquet
from volsweep.sweep_plan import SWEEP_STAMP_KEY, SweepPlan
from volsweep.cli import main
from volsweep.data_gen import write_history

# the module behind volsweep.backfill (the function, as users call it)
bf = importlib.import_module("volsweep.dask_backfill")

distributed = pytest.importorskip("distributed")
pytestmark = pytest.mark.dask

from test_stream import assert_bits_equal  # noqa: E402

DATES = [dt.date(2031, 3, 10) + dt.timedelta(days=d) for d in range(6)]
OPTS = dict(quotes="premium")


def _history(root, rows=4000):
    return write_history(root, DATES, rows_per_day=rows, seed=9, n_underlyings=40,
                         row_group_size=1500)


def _single_machine(src_file, dst_file):
    """The reference: the same partition streamed in this process."""
    source = open_input(src_file, batch_rows=1000)
    plan = SweepPlan.build(source.schema, **OPTS)
    stream_to_parquet(source, dst_file, plan.transform, plan.out_schema)
    return pq.read_table(dst_file)


def _check_against_single_machine(paths, src, dst, tmp_path):
    for p in paths:
        rel = os.path.relpath(os.path.dirname(p), src)
        got = pq.read_table(os.path.join(dst, rel, "part-0.parquet"))
        assert got.num_rows == pq.read_metadata(p).num_rows
        want = _single_machine(p, str(tmp_path / f"ref-{rel}.parquet"))
        assert_bits_equal(got, want)
    # nothing else in the output: no duplicate parts, no visible temporary files
    files = sorted(os.path.relpath(os.path.join(d, f), dst)
                   for d, _, fs in os.walk(dst) for f in fs)
    assert files == sorted(os.path.join(os.path.relpath(os.path.dirname(p), src),
                                        "part-0.parquet") for p in paths)
    assert ds.dataset(dst, partitioning="hive").count_rows() == \
        sum(pq.read_metadata(p).num_rows for p in paths)


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    """A backfill on our default LocalCluster (2 worker processes), then a re-run."""
    tmp = tmp_path_factory.mktemp("bf")
    src, dst = tmp / "src", tmp / "dst"
    paths = _history(src)
    # compile here (or load from the cache) first: the workers must then load, not compile
    _single_machine(paths[0], str(tmp / "warm.parquet"))
    env_before = {k: os.environ.get(k) for k in bf.worker_environ()}
    res = bf.backfill(src, dst, n_workers=2, batch_rows=1000, **OPTS)
    env_after = {k: os.environ.get(k) for k in bf.worker_environ()}
    mtimes = {p: os.stat(p).st_mtime_ns for p in _parts(dst)}
    again = bf.backfill(src, dst, n_workers=2, batch_rows=1000, **OPTS)
    return dict(src=str(src), dst=str(dst), paths=paths, res=res, again=again, mtimes=mtimes,
                env=(env_before, env_after))


def _parts(dst):
    return sorted(os.path.join(d, f) for d, _, fs in os.walk(dst) for f in fs)


def test_local_cluster_equals_single_machine(first_run, tmp_path):
    res = first_run["res"]
    assert (res.partitions, res.written, res.skipped) == (len(DATES), len(DATES), 0)
    assert res.rows_written == sum(pq.read_metadata(p).num_rows for p in first_run["paths"])
    assert len({pid for pid, _, _ in res.workers}) == 2           # both workers did work
    _check_against_single_machine(first_run["paths"], first_run["src"], first_run["dst"],
                                  tmp_path)


def test_rerun_is_a_no_op(first_run):
    again = first_run["again"]
    assert (again.written, again.skipped, again.rows_written) == (0, len(DATES), 0)
    assert again.rows_skipped == first_run["res"].rows_written
    assert {p: os.stat(p).st_mtime_ns for p in _parts(first_run["dst"])} == first_run["mtimes"]


def test_workers_run_one_numba_thread(first_run):
    assert {threads for _, threads, _ in first_run["res"].workers} == {1}
    before, after = first_run["env"]
    assert before == after                    # the workers' settings do not leak into ours


def test_workers_load_kernels_from_cache(first_run):
    # each task counts the volsweep kernels its process compiled during the task
    # (numba dispatcher cache misses); the parent process compiled or loaded them first
    from volsweep.kernel._cache import kernel_source_hash

    if first_run["res"].kernels != {kernel_source_hash().hex()[:16]}:
        pytest.skip("kernel/ was edited while the test ran: the workers imported other "
                    "kernel sources than this process, so they had to compile")
    assert sum(compiled for _, _, compiled in first_run["res"].workers) == 0


def test_partial_output_resumes(tmp_path):
    """A crash that left some partitions done, one stale temporary file and one truncated
    part (a non-atomic writer's leftovers) resumes without duplicating anything."""
    src, dst = tmp_path / "src", tmp_path / "dst"
    paths = _history(src, rows=2000)
    done = os.path.join(dst, "date=2031-03-10")
    os.makedirs(done)
    _single_machine(paths[0], os.path.join(done, "part-0.parquet"))
    before = os.stat(os.path.join(done, "part-0.parquet")).st_mtime_ns
    stale_dir = os.path.join(dst, "date=2031-03-11")
    os.makedirs(stale_dir)
    with open(temp_path(os.path.join(stale_dir, "part-0.parquet")), "wb") as f:
        f.write(b"half a file")
    short_dir = os.path.join(dst, "date=2031-03-12")
    os.makedirs(short_dir)
    pq.write_table(pq.read_table(paths[2]).slice(0, 10), os.path.join(short_dir,
                                                                      "part-0.parquet"))
    res = bf.backfill(src, dst, n_workers=1, batch_rows=1000, **OPTS)
    assert (res.written, res.skipped) == (len(DATES) - 1, 1)
    assert os.stat(os.path.join(done, "part-0.parquet")).st_mtime_ns == before
    assert os.listdir(stale_dir) == ["part-0.parquet"]       # the stale temp is gone
    _check_against_single_machine(paths, str(src), str(dst), tmp_path)


class _KillOnSecondTask(distributed.WorkerPlugin):
    """Kills its worker process (SIGKILL, no clean-up) a moment after the worker starts
    its second task, once per test (the marker file), so a partition is in flight."""

    def __init__(self, marker):
        self.marker = marker
        self.started = 0

    def setup(self, worker):
        self.started = 0

    def transition(self, key, start, finish, **kwargs):
        if finish != "executing":
            return
        self.started += 1
        if self.started != 2:
            return
        try:
            os.close(os.open(self.marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
        except FileExistsError:
            return
        with open(self.marker, "w") as f:
            f.write(str(os.getpid()))
        threading.Timer(0.02, os.kill, (os.getpid(), signal.SIGKILL)).start()


def backfill_killing_a_worker(tmp_path, src, dst, **options):
    """A backfill on a 2-worker LocalCluster (reached by address, as `volsweep backfill
    --scheduler ADDRESS` does) whose worker is killed as it starts its second task;
    checks that a worker really died and returns the result."""
    import cloudpickle

    cloudpickle.register_pickle_by_value(sys.modules[__name__])
    marker = str(tmp_path / "killed")
    env = bf.worker_environ()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0", env=env, silence_logs=50) as cluster, \
            distributed.Client(cluster) as client:
        client.register_plugin(_KillOnSecondTask(marker))
        before = set(client.run(os.getpid).values())
        res = bf.backfill(src, dst, scheduler=cluster.scheduler_address, **options)
        after = set(client.run(os.getpid).values())
    killed = int(open(marker).read())
    assert killed in before and killed not in after          # a worker really died
    return res


def test_worker_killed_mid_run_loses_and_duplicates_nothing(tmp_path):
    src, dst = tmp_path / "src", tmp_path / "dst"
    paths = _history(src)
    res = backfill_killing_a_worker(tmp_path, src, dst, batch_rows=1000, **OPTS)
    # a partition the dead worker had committed before its result reached the scheduler
    # is found complete by the rescheduled task and skipped, not written twice
    assert res.written + res.skipped == len(DATES) and res.skipped <= 2
    assert res.rows == sum(pq.read_metadata(p).num_rows for p in paths)
    _check_against_single_machine(paths, str(src), str(dst), tmp_path)
    again = bf.backfill(src, dst, **OPTS)                     # no cluster needed: all done
    assert (again.written, again.skipped) == (0, len(DATES))


def test_cli_backfill_and_errors(first_run, tmp_path, capsys):
    # the finished backfill again, through the command line: nothing to do, no cluster
    assert main(["backfill", first_run["src"], first_run["dst"], "--quotes", "premium"]) == 0
    err = capsys.readouterr().err
    assert f"{len(DATES)} already complete" in err and "0 rows written" in err
    assert main(["backfill", str(tmp_path / "nope"), str(tmp_path / "d")]) == 2
    assert capsys.readouterr().err.startswith("volsweep: error: cannot read")
    assert main(["backfill", first_run["src"], str(tmp_path / "d"), "--quotes", "premium",
                 "--map", "strike=K"]) == 2                  # schema error before any cluster
    assert "'K'" in capsys.readouterr().err
    assert main(["backfill", first_run["src"], os.path.join(first_run["src"], "out"),
                 "--quotes", "premium"]) == 2
    assert "inside" in capsys.readouterr().err


def test_unreachable_scheduler_is_a_one_line_error(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(bf, "CONNECT_TIMEOUT", "1s")
    src = tmp_path / "src"
    _history(src, rows=200)
    assert main(["backfill", str(src), str(tmp_path / "dst"), "--quotes", "premium",
                 "--scheduler", "tcp://127.0.0.1:9"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("volsweep: error: cannot reach the Dask")


def test_bad_partition_is_a_one_line_error_naming_it(tmp_path, capsys):
    src = tmp_path / "src"
    paths = _history(src, rows=300)
    bad = paths[3]
    pq.write_table(pq.read_table(bad).drop_columns(["strike"]), bad)
    dst = tmp_path / "dst"
    assert main(["backfill", str(src), str(dst), "--quotes", "premium", "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "date=2031-03-13" in err[0] and "'strike'" in err[0], err
    assert not os.path.exists(os.path.join(dst, "date=2031-03-13", "part-0.parquet"))
    assert not [f for d, _, fs in os.walk(dst) for f in fs if f.startswith(".")]


def test_other_options_recompute_instead_of_skipping(tmp_path):
    src, dst = tmp_path / "src", tmp_path / "dst"
    paths = _history(src, rows=300)[:1]
    for p in _history(src, rows=300)[1:]:
        os.remove(p)
        os.rmdir(os.path.dirname(p))
    first = bf.backfill(src, dst, n_workers=1, **OPTS)
    again = bf.backfill(src, dst, n_workers=1, units="desk", **OPTS)   # same columns
    assert (first.written, again.written, again.skipped) == (1, 1, 0)
    out = pq.read_table(os.path.join(dst, "date=2031-03-10", "part-0.parquet"))
    source = open_input(paths[0])
    plan = SweepPlan.build(source.schema, units="desk", **OPTS)
    assert out.schema.metadata[SWEEP_STAMP_KEY] == plan.stamp
    assert bf.backfill(src, dst, units="desk", **OPTS).skipped == 1


def test_a_later_partition_s_option_error_keeps_the_flag_typed(tmp_path, capsys):
    # the error is raised on a worker and comes back through Dask (pickled): it must
    # still name --map, not columns=
    src = tmp_path / "src"
    paths = _history(src, rows=300)
    for p in paths:
        t = pq.read_table(p)
        name = "strike" if p == paths[3] else "K"
        pq.write_table(t.rename_columns([name if c == "strike" else c for c in t.column_names]),
                       p)
    assert main(["backfill", str(src), str(tmp_path / "dst"), "--quotes", "premium",
                 "--workers", "1", "--map", "strike=K", "--greeks", "delta"]) == 2
    # (on a cold cache a worker may first say it compiles a kernel)
    err = [ln for ln in capsys.readouterr().err.splitlines() if "error" in ln]
    assert len(err) == 1, err
    assert ("partition date=2031-03-13: --map gives column 'K' for 'strike', but the input "
            "has no column 'K'") in err[0]


def test_a_partition_counts_vols_above_the_bound_and_unreadable_cells(tmp_path):
    # with r = q = 0 an at-the-money call is worth S (2 N(s/2) - 1) (published closed
    # form): a premium of 99 on S = 100 is a vol of 5.15, above the bound of 5
    part = tmp_path / "src" / "date=2031-03-10"
    part.mkdir(parents=True)
    (part / "q.csv").write_text("spot,strike,expiry_years,rate,is_call,premium\n"
                                "100,100,1,0,true,99\n100,n.a.,1,0,true,10\n"
                                "100,100,1,0,true,10\n")
    (p,) = bf.find_partitions(tmp_path / "src")
    res = bf.sweep_partition(p, str(tmp_path / "dst"), dict(OPTS, columns=None, which=[],
                                                           model="bsm", units="raw",
                                                           as_of=None, keep=None), 1000)
    assert res["state"] == "written" and res["rows"] == 3
    assert res["high_vols"] == {"iv": 1} and res["unreadable"] == {"strike": 1}
    assert res["statuses"]["status"] == {"ok": 2, "missing_input": 1}
