"""Our file discovery and read-ahead against pyarrow.dataset's own.

    .venv/bin/python -m benchmarks.bench_read_ahead                 # 4M rows, 8 partitions
    .venv/bin/python -m benchmarks.bench_read_ahead --rows 2e6 --repeats 3

* **Discovery**: a hive folder of ``--partitions`` x ``--files`` small Parquet files.
  ``ours``: ``input_files.data_files`` (os.walk, hidden and _ names skipped, sorted by
  path component) then ``ds.dataset(files, partitioning="hive", partition_base_dir=...)``;
  ``dataset``: ``ds.dataset(root, partitioning="hive")`` and its ``.files``.  Taking
  turns, medians; also says whether the two list the same files in the same order.
* **Read-ahead**, one child process per reader and run: the batches of a hive dataset of
  ``--rows`` rows (all Greeks swept per batch, a consumer slower than the reader, as in
  ``volsweep sweep``).  ``ours``: ``open_input`` (each file's own streaming reader, one
  batch ahead in a thread); ``scanner``: ``dataset.to_batches`` with pyarrow's default
  read-ahead (16 batches, 4 files); ``scanner-1``: the same with 1 batch and 1 file
  ahead.  Peak RSS (``VmHWM``) above the child's own after loading the kernels and
  sweeping one batch, wall time, and a digest of the rows in the order read.

Datasets are HBOX synthetic snapshots (invented data), written to a temporary folder.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

MODES = ("ours", "scanner", "scanner-1")


def _batches(mode: str, root: str, batch_rows: int):
    import pyarrow.dataset as ds

    from volsweep.input_files import open_input

    if mode == "ours":
        return open_input(root, batch_rows).batches()
    ahead = {"scanner": {}, "scanner-1": dict(batch_readahead=1, fragment_readahead=1)}[mode]
    return ds.dataset(root, format="parquet", partitioning="hive").to_batches(
        batch_size=batch_rows, **ahead)


def _peak_rss() -> int:
    """This process's peak resident set in bytes: VmHWM, which starts afresh at exec.
    (``ru_maxrss`` does not: a child started by a parent holding 600 MiB reports at least
    that much.)"""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmHWM in /proc/self/status (Linux only)")


def child(mode: str, root: str, batch_rows: int) -> None:
    """Sweep every batch of ``root`` read by ``mode``; print peak RSS figures as JSON.

    The base is the peak after loading the kernels on 1,000 rows of the first file,
    before ``mode``'s reader starts."""
    from volsweep.sweep_plan import SweepPlan

    first = _batches("ours", root, 1000)
    small = next(first)
    first.close()
    plan = SweepPlan.build(small.schema, quotes="premium")
    plan.transform(small)                               # kernels loaded
    base = _peak_rss()
    digest = hashlib.sha256()
    rows = 0
    t0 = time.perf_counter()
    for b in _batches(mode, root, batch_rows):
        plan.transform(b)
        digest.update(b.column("strike").to_numpy().tobytes())
        rows += b.num_rows
    seconds = time.perf_counter() - t0
    peak = _peak_rss()
    print(json.dumps(dict(base=base, peak=peak, seconds=seconds, rows=rows,
                          digest=digest.hexdigest()[:16])))


def _run_child(mode, root, batch_rows) -> dict:
    r = subprocess.run([sys.executable, "-m", "benchmarks.bench_read_ahead", "--child", mode,
                        root, "--batch-rows", str(batch_rows)],
                       capture_output=True, text=True, check=True)
    return json.loads(r.stdout.strip().splitlines()[-1])


def discovery(root: str, repeats: int):
    import pyarrow.dataset as ds

    from volsweep.input_files import data_files

    def ours():
        files = data_files(root)
        ds.dataset(files, format="parquet", partitioning="hive", partition_base_dir=root)
        return files

    def dataset():
        return ds.dataset(root, format="parquet", partitioning="hive").files

    times = {"ours": [], "dataset": []}
    lists = {}
    for _ in range(repeats):
        for name, fn in (("ours", ours), ("dataset", dataset)):
            t0 = time.perf_counter()
            lists[name] = fn()
            times[name].append(time.perf_counter() - t0)
    same = [os.path.abspath(p) for p in lists["ours"]] == \
        [os.path.abspath(p) for p in lists["dataset"]]
    return {k: statistics.median(v) for k, v in times.items()}, len(lists["ours"]), same


def _write_folder(root, partitions, files, rows=64):
    import pyarrow as pa
    import pyarrow.parquet as pq

    t = pa.table({"x": list(range(rows))})
    for p in range(partitions):
        folder = os.path.join(root, f"day={p:05d}")
        os.makedirs(folder)
        for f in range(files):
            pq.write_table(t, os.path.join(folder, f"part-{f}.parquet"))
        if p % 10 == 0:                       # what both must skip: a hidden temporary
            open(os.path.join(folder, ".part-0.parquet.tmp-1-ab"), "wb").close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--child", nargs=2, metavar=("MODE", "ROOT"), help=argparse.SUPPRESS)
    ap.add_argument("--rows", type=float, default=4e6)
    ap.add_argument("--days", type=int, default=8)
    ap.add_argument("--batch-rows", type=int, default=1 << 18)
    ap.add_argument("--partitions", type=int, default=500)
    ap.add_argument("--files", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child[0], args.child[1], args.batch_rows)
        return 0
    from volsweep.data_gen import write_history

    tmp = tempfile.mkdtemp(prefix="volsweep-bench-ahead-")
    try:
        folder = os.path.join(tmp, "many")
        _write_folder(folder, args.partitions, args.files)
        t, n, same = discovery(folder, max(args.repeats, 7))
        print(f"discovery, {n:,d} files in {args.partitions:,d} hive folders "
              f"(medians of {max(args.repeats, 7)}, taking turns)")
        for name in ("ours", "dataset"):
            print(f"  {name:<8s} {t[name] * 1e3:8.1f} ms")
        print(f"  dataset / ours = {t['dataset'] / t['ours']:.2f}; same files, same order: "
              f"{'yes' if same else 'NO'}")

        hist = os.path.join(tmp, "hist")
        days = [dt.date(2031, 3, 10) + dt.timedelta(days=d) for d in range(args.days)]
        write_history(hist, days, rows_per_day=int(args.rows) // args.days, seed=3,
                      n_underlyings=200)
        res = {m: [] for m in MODES}
        for _ in range(args.repeats):
            for m in MODES:                     # taking turns
                res[m].append(_run_child(m, hist, args.batch_rows))
        rows = res["ours"][0]["rows"]
        print(f"\nread-ahead behind a sweep (all Greeks), {rows:,d} rows in {args.days} files, "
              f"batches of {args.batch_rows:,d}; medians of {args.repeats} child processes; "
              f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
        print(f"  {'reader':<10s} {'peak RSS':>10s} {'above base':>11s} {'wall':>8s} "
              f"{'rows/s':>9s}  order")
        want = res["ours"][0]["digest"]
        for m in MODES:
            peak = statistics.median(r["peak"] for r in res[m]) / 2 ** 20
            above = statistics.median(r["peak"] - r["base"] for r in res[m]) / 2 ** 20
            sec = statistics.median(r["seconds"] for r in res[m])
            order = "same" if all(r["digest"] == want for r in res[m]) else "DIFFERS"
            print(f"  {m:<10s} {peak:7.0f} MiB {above:7.0f} MiB {sec:7.2f}s "
                  f"{rows / sec / 1e6:7.2f} M  {order}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
