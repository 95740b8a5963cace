"""Group operations on the Dask backfill against the same work in one process.

For each operation (forwards, variance, smiles) over a synthetic history: the
single-process throughput (partitions read, run through ``group_backfill.run_group`` and
written atomically, one after the other, with numba limited to one thread, as a worker
runs) against a backfill on a LocalCluster of ``--workers`` single-threaded workers:
one the backfill starts and stops itself (``n_workers``: its start included), and one
already running, passed as ``scheduler=`` (as a researcher running several backfills
would), with the tasks alone (first task's start to last task's end) beside it.  Taking
turns, medians of ``--repeats``.  The target (issue): cluster throughput >= 0.7 x
single-process throughput x workers.

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

    import distributed

    import volsweep
    from volsweep import dask_backfill as bf

    tmp = tempfile.mkdtemp(prefix="vs-bfg-")
    cluster = distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1,
                                       processes=True, dashboard_address=":0",
                                       env=bf.worker_environ(), silence_logs=50)
    client = distributed.Client(cluster)
    try:
        src = os.path.join(tmp, "src")
        paths = _history(src, args.days, args.rows, args.underlyings)
        print(f"history: {len(paths)} partitions x {args.rows:,d} rows, "
              f"load {os.getloadavg()[0]:.2f}")
        for op in args.ops.split(","):
            _single(src, os.path.join(tmp, "warm"), op)         # compile/load first
            shutil.rmtree(os.path.join(tmp, "warm"))
            bf.backfill(src, os.path.join(tmp, "warm"), operation=op, scheduler=client)
            shutil.rmtree(os.path.join(tmp, "warm"))              # workers loaded too
            times = {"single": [], "own": [], "running": [], "tasks": []}
            for r in range(args.repeats):
                d = os.path.join(tmp, f"{op}-{r}")
                times["single"].append(_single(src, d + "s", op))
                t0 = time.perf_counter()
                res = bf.backfill(src, d + "o", operation=op, n_workers=args.workers)
                times["own"].append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                res = bf.backfill(src, d + "r", operation=op, scheduler=client)
                times["running"].append(time.perf_counter() - t0)
                times["tasks"].append(res.task_seconds)
                assert res.written == len(paths)
                for x in "sor":
                    shutil.rmtree(d + x)
            med = {k: statistics.median(v) for k, v in times.items()}
            rate = {k: len(paths) / v for k, v in med.items()}
            ratio = {k: med["single"] / v / args.workers for k, v in med.items()}
            print(f"{op:9s} partitions/s: single {rate['single']:6.2f} | own cluster "
                  f"{rate['own']:6.2f} ({ratio['own']:.2f}) | running cluster "
                  f"{rate['running']:6.2f} ({ratio['running']:.2f}) | tasks alone "
                  f"{rate['tasks']:6.2f} ({ratio['tasks']:.2f})   (ratio to {args.workers} "
                  f"x single)   load {os.getloadavg()[0]:.2f}", flush=True)
        print(f"volsweep {volsweep.__version__}")
    finally:
        client.close()
        cluster.close()
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
