"""Streaming sweep: peak memory against dataset size, and Parquet -> Parquet throughput
against a plain read + write of the same file.

    .venv/bin/python -m benchmarks.bench_stream                      # 2M and 20M rows
    .venv/bin/python -m benchmarks.bench_stream --sizes 2e6,8e6 --repeats 5
    .venv/bin/python -m pytest benchmarks/bench_stream.py --benchmark-only

* **Peak RSS**: ``volsweep sweep IN -o OUT --quotes premium`` (every Greek) runs in a
  child process per dataset size; its peak resident set (``ru_maxrss`` from ``wait4``)
  is reported beside the peak of a child that only loads volsweep and its kernels and
  sweeps 1,000 rows (the fixed cost).  Target: <= 1 GiB at 20M rows, flat in size.
* **Throughput**, in this process, warm, on the smallest dataset: ``sweep`` (the
  streaming driver with the sweep transform), ``plain`` (the same driver and writer with
  no transform: read + write only) and ``pyarrow`` (``pq.read_table`` + ``pq.write_table``
  with pyarrow's defaults), taking turns; medians.  Target: sweep >= 0.5 x plain.  Note
  that the sweep writes the inputs *and* 18 computed columns, plain only the inputs.

Datasets are HBOX synthetic snapshots (invented data), generated once into ``--data-dir``
one million rows at a time (never whole in memory) and reused by later runs.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

import pyarrow.parquet as pq

DEFAULT_SIZES = (2_000_000, 20_000_000)
CHUNK = 1_000_000


def make_dataset(path: str, rows: int, chunk: int = CHUNK) -> str:
    """A Parquet file of ``rows`` synthetic rows, written chunk by chunk (reused if there)."""
    from volsweep.data_gen import make_snapshot

    if os.path.exists(path) and pq.read_metadata(path).num_rows == rows:
        return path
    tmp = path + ".partial"
    writer = None
    try:
        for i, start in enumerate(range(0, rows, chunk)):
            t = make_snapshot(n_rows=min(chunk, rows - start), seed=1000 + i)
            if writer is None:
                writer = pq.ParquetWriter(tmp, t.schema, compression="zstd")
            writer.write_table(t, row_group_size=128 * 1024)
        writer.close()
        writer = None
        os.replace(tmp, path)
    finally:
        if writer is not None:
            writer.close()
        if os.path.exists(tmp):
            os.remove(tmp)
    return path


def _child_peak_rss(argv) -> tuple[int, float]:
    """(peak RSS in bytes, seconds) of a child process running ``argv``."""
    t0 = time.perf_counter()
    p = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(p.pid, 0)
    dt = time.perf_counter() - t0
    p.returncode = os.waitstatus_to_exitcode(status)
    err = p.stderr.read().decode()
    p.stderr.close()
    if p.returncode != 0:
        raise RuntimeError(f"{argv} failed ({p.returncode}): {err.strip()[-500:]}")
    return usage.ru_maxrss * 1024, dt      # Linux: KiB


_FIXED = """
import volsweep, pyarrow.parquet as pq, sys
t = pq.ParquetFile(sys.argv[1]).read_row_group(0).slice(0, 1000).drop_columns(["bid", "ask"])
volsweep.sweep(t)
"""


def peak_rss(paths, out_dir):
    rows = []
    fixed, _ = _child_peak_rss([sys.executable, "-c", _FIXED, paths[0]])
    for path in paths:
        out = os.path.join(out_dir, "swept.parquet")
        peak, dt = _child_peak_rss([sys.executable, "-m", "volsweep", "sweep", path, "-o", out,
                                    "--quotes", "premium", "--overwrite"])
        n = pq.read_metadata(path).num_rows
        rows.append((n, peak, dt))
        os.remove(out)
    return fixed, rows


def throughput(path, out_dir, repeats=5, which=None):
    from volsweep.atomic_parquet import dictionary_columns
    from volsweep.input_files import open_input
    from volsweep.stream_to_parquet import stream_to_parquet
    from volsweep.sweep_plan import SweepPlan

    src = open_input(path)
    plan = SweepPlan.build(src.schema, quotes="premium", which=which)
    out = os.path.join(out_dir, "t.parquet")

    def sweep():
        stream_to_parquet(src, out, plan.transform, plan.out_schema, overwrite=True,
                          dictionary=plan.dictionary)

    def plain():
        stream_to_parquet(src, out, lambda b: b, src.schema, overwrite=True,
                          dictionary=dictionary_columns(src.schema))

    def pyarrow_whole():
        pq.write_table(pq.read_table(path), out)

    batches = list(src.batches())

    def compute():                            # the sweep's work alone: no read, no write
        for b in batches:
            plan.transform(b)

    impls = {"sweep": sweep, "plain": plain, "pyarrow": pyarrow_whole, "compute": compute}
    sweep()                                   # warm-up: kernels loaded, file cached
    times = {k: [] for k in impls}
    cpu = {k: [] for k in impls}
    for _ in range(repeats):
        for name, fn in impls.items():        # taking turns: load changes hit all alike
            t0, c0 = time.perf_counter(), time.process_time()
            fn()
            times[name].append(time.perf_counter() - t0)
            cpu[name].append(time.process_time() - c0)
    os.remove(out)
    n = pq.read_metadata(path).num_rows
    return n, ({k: statistics.median(v) for k, v in times.items()},
               {k: statistics.median(v) for k, v in cpu.items()})


def _mib(b):
    return b / 2 ** 20


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default=",".join(str(s) for s in DEFAULT_SIZES),
                    help="dataset sizes in rows, comma-separated (default: %(default)s)")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--data-dir", default=os.path.join(tempfile.gettempdir(),
                                                       "volsweep-bench-stream"))
    ap.add_argument("--keep-data", action="store_true", help="keep the generated inputs")
    ap.add_argument("--skip-rss", action="store_true", help="throughput only")
    ap.add_argument("--greeks", default="all",
                    help="Greeks of the throughput run: all, none or a list (default: all)")
    args = ap.parse_args(argv)
    sizes = sorted(int(float(s)) for s in args.sizes.split(","))
    os.makedirs(args.data_dir, exist_ok=True)
    paths = []
    for n in sizes:
        t0 = time.perf_counter()
        paths.append(make_dataset(os.path.join(args.data_dir, f"hbox-{n}.parquet"), n))
        print(f"dataset {n:>12,d} rows: {os.path.getsize(paths[-1]) / 1e6:8.1f} MB "
              f"({time.perf_counter() - t0:.1f} s)", flush=True)
    out_dir = tempfile.mkdtemp(prefix="volsweep-bench-out-", dir=args.data_dir)
    try:
        fixed, rss = peak_rss(paths, out_dir) if not args.skip_rss else (0, [])
        print("\npeak RSS of `volsweep sweep IN -o OUT --quotes premium` (all Greeks)")
        print(f"  {'rows':>12s} {'peak RSS':>12s} {'above fixed':>12s} {'wall':>8s} "
              f"{'rows/s':>10s}")
        print(f"  {'(fixed)':>12s} {_mib(fixed):9.0f} MiB {'':>12s}   load kernels, 1k rows")
        for n, peak, dt in rss:  # noqa: B007
            print(f"  {n:>12,d} {_mib(peak):9.0f} MiB {_mib(peak - fixed):8.0f} MiB "
                  f"{dt:7.1f}s {n / dt / 1e6:7.2f} M")
        if len(rss) > 1:  # fixed cost: importing volsweep and loading (or compiling) kernels
            (n0, p0, _), (n1, p1, _) = rss[0], rss[-1]
            print(f"  {n1 / n0:.0f}x the rows -> {p1 / p0:.2f}x the peak RSS")
        which = None if args.greeks == "all" else [] if args.greeks == "none" \
            else args.greeks.split(",")
        n, (t, cpu) = throughput(paths[0], out_dir, args.repeats, which)
        print(f"\nParquet -> Parquet, {n:,d} rows, medians of {args.repeats} (taking turns); "
              f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
        for name, label in (("sweep", f"sweep (iv + Greeks: {args.greeks})"),
                            ("plain", "plain read + write, same driver and writer"),
                            ("pyarrow", "pq.read_table + pq.write_table"),
                            ("compute", "compute only (batches in memory, no I/O)")):
            print(f"  {label:<44s} {t[name]:7.3f} s {n / t[name] / 1e6:7.2f} M rows/s "
                  f"(CPU {cpu[name]:.2f} s)")
        print(f"  sweep / plain   = {t['plain'] / t['sweep']:.2f}  (target >= 0.5)")
        print(f"  sweep / pyarrow = {t['pyarrow'] / t['sweep']:.2f}")
        print(f"  CPU: sweep {cpu['sweep'] / cpu['plain']:.1f}x plain, of which the compute "
              f"{cpu['compute'] / cpu['plain']:.1f}x; on a busy machine the wall-clock ratio "
              "follows the CPU ratio")
    finally:
        shutil.rmtree(out_dir, ignore_errors=True)
        if not args.keep_data:
            shutil.rmtree(args.data_dir, ignore_errors=True)
    return 0


# ------------------------------------------------------------------ pytest-benchmark
def test_stream_sweep_parquet(benchmark, tmp_path):
    from volsweep.input_files import open_input
    from volsweep.stream_to_parquet import stream_to_parquet
    from volsweep.sweep_plan import SweepPlan

    path = make_dataset(str(tmp_path / "in.parquet"), 500_000)
    src = open_input(path)
    plan = SweepPlan.build(src.schema, quotes="premium")
    out = str(tmp_path / "out.parquet")
    benchmark(lambda: stream_to_parquet(src, out, plan.transform, plan.out_schema,
                                        overwrite=True, dictionary=plan.dictionary))


if __name__ == "__main__":
    sys.exit(main())
