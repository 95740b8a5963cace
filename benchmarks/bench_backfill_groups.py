"""Group operations on the Dask backfill against the same work in one process.

For each operation (forwards, variance, smiles) over a synthetic history: the
single-process throughput (partitions read, run through ``group_backfill.run_group`` and
written atomically, one after the other, with numba limited to one thread, as a worker
runs) against a backfill on a LocalCluster of ``--workers`` single-threaded workers
(cluster start included, and without it: the time from the first task's start to the
last task's end).  Taking turns, medians of ``--repeats``.  The target (issue): cluster
throughput >= 0.7 x single-process throughput x workers.

    python -m benchmarks.bench_backfill_groups [--days 65] [--rows 20000] [--workers 2]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import shutil
import statistics
import tempfile
import time


def _history(root, days, rows, n):
    from volsweep.data_gen import write_history

    dates = [dt.date(2031, 3, 10) + dt.timedelta(d) for d in range(int(days * 7 / 5) + 7)]
    dates = [d for d in dates if d.weekday() < 5][:days]
    return write_history(root, dates, rows_per_day=rows, seed=5, n_underlyings=n,
                         hidden_carry=True)


def _single(src, dst, op):
    import numba

    from volsweep import dask_backfill as bf
    from volsweep.group_backfill import group_options

    saved = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        opts = group_options(op)
        t0 = time.perf_counter()
        for part in bf.find_partitions(src):
            bf.group_partition(part, dst, op, opts, 1 << 18)
        return time.perf_counter() - t0
    finally:
        numba.set_num_threads(saved)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--days", type=int, default=65)
    p.add_argument("--rows", type=int, default=20_000)
    p.add_argument("--underlyings", type=int, default=24)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--ops", default="forwards,variance,smiles")
    args = p.parse_args(argv)

    import volsweep
    from volsweep import dask_backfill as bf

    tmp = tempfile.mkdtemp(prefix="vs-bfg-")
    try:
        src = os.path.join(tmp, "src")
        paths = _history(src, args.days, args.rows, args.underlyings)
        print(f"history: {len(paths)} partitions x {args.rows:,d} rows, "
              f"load {os.getloadavg()[0]:.2f}")
        for op in args.ops.split(","):
            _single(src, os.path.join(tmp, "warm"), op)         # compile/load first
            shutil.rmtree(os.path.join(tmp, "warm"))
            single, cluster, tasks = [], [], []
            for r in range(args.repeats):
                d1 = os.path.join(tmp, f"{op}-s{r}")
                single.append(_single(src, d1, op))
                d2 = os.path.join(tmp, f"{op}-c{r}")
                t0 = time.perf_counter()
                res = bf.backfill(src, d2, operation=op, n_workers=args.workers)
                cluster.append(time.perf_counter() - t0)
                assert res.written == len(paths)
                tasks.append(res.task_seconds)
                shutil.rmtree(d1)
                shutil.rmtree(d2)
            s, c, k = (statistics.median(x) for x in (single, cluster, tasks))
            print(f"{op:9s} single {len(paths) / s:7.2f} partitions/s   cluster "
                  f"{len(paths) / c:7.2f} (tasks only {len(paths) / k:7.2f})   ratio to "
                  f"{args.workers} x single: {s / c / args.workers:.2f} "
                  f"(tasks only {s / k / args.workers:.2f})   load {os.getloadavg()[0]:.2f}")
        print(f"volsweep {volsweep.__version__}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
