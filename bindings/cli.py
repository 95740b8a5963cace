"""Command line: ``volsweep <command>`` (also ``python -m volsweep``).

Commands:
  demo                     build a synthetic snapshot in memory, run it, print a summary
  gen -n N -o FILE         write a synthetic snapshot to Parquet
  price IN -o OUT          price every row of a file (needs a vol column)
  sweep IN -o OUT          implied vols and Greeks for every row of a file or dataset
  backfill SRC DST         sweep every partition of a dataset on Dask, resumably
  bench                    run the benchmark report

IN may be a Parquet file, a folder of Parquet files (hive partitions such as
date=2031-03-14/ add their key as a column), an Arrow IPC file or stream, or a .csv file.
Inputs are streamed in batches (memory stays bounded whatever the size); OUT is Parquet,
written to a temporary file and renamed on success, so a failure leaves no partial OUT.
"""

from __future__ import annotations

import argparse
import os
import sys
import textwrap
import time
from collections import Counter

import pyarrow as pa
import pyarrow.parquet as pq


class CliError(Exception):
    """A user-facing error: printed as one line, exit status 2."""


def _mapping(pairs) -> dict:
    out = {}
    for pair in pairs or ():
        ours, sep, theirs = pair.partition("=")
        if not sep or not ours or not theirs:
            raise CliError(f"--map expects OURS=THEIRS (e.g. strike=K), got {pair!r}")
        out[ours] = theirs
    return out


def _status_summary(tables) -> str:
    from .status_counts import count_statuses, status_table

    counts = {}
    for t in tables:
        count_statuses(t.select(["status"]), counts)
    return status_table(counts)


def _open(args):
    from .input_files import open_input

    if args.batch_rows < 1:
        raise CliError(f"--batch-rows must be >= 1, got {args.batch_rows}")
    return open_input(args.input, args.batch_rows)


def _stream(args, source, transform, out_schema, verb: str, dictionary=None) -> int:
    from .progress import Progress
    from .status_counts import status_table
    from .stream_to_parquet import stream_to_parquet

    res = stream_to_parquet(source, args.output, transform, out_schema,
                            overwrite=args.overwrite, progress=Progress(source.num_rows),
                            dictionary=dictionary)
    rate = res.rows / res.seconds if res.seconds > 0 else 0.0
    print(f"{verb} {res.rows:,d} rows in {res.seconds:.2f} s ({rate / 1e6:.2f} M rows/s) "
          f"-> {args.output}", file=sys.stderr)
    print(status_table(res.statuses), file=sys.stderr)
    return 0


def cmd_demo(args) -> int:
    import volsweep
    from volsweep.data_gen import make_snapshot

    t0 = time.perf_counter()
    snap = make_snapshot(n_rows=args.rows, seed=args.seed)
    t_gen = time.perf_counter() - t0
    print(f"synthetic snapshot: {snap.num_rows:,d} contracts on "
          f"{len(snap.column('underlying').unique()):,d} fictional underlyings "
          f"(generated in {t_gen:.2f} s)")
    print("loading compiled kernels (the first run on a machine compiles them: minutes)",
          flush=True)
    cols = {"vol": "true_vol"}
    quotes = snap.drop_columns(["bid", "ask"])
    steps = (
        ("price (BSM, at the true vol)", lambda t: volsweep.price(t, columns=cols)),
        ("implied vol (from the premium)", lambda t: volsweep.implied_vol(t)),
        ("sweep (iv + all 16 Greeks)", lambda t: volsweep.sweep(t)),
    )
    for label, fn in steps:
        fn(quotes.slice(0, 5000))  # warm-up: loads the row and the parallel kernels
        times, out = [], None
        for _ in range(3):         # the first call also maps fresh output memory
            out = None             # release the last result first, as a loop over
            t0 = time.perf_counter()   # snapshots would: its memory serves the next one
            out = fn(quotes)
            times.append(time.perf_counter() - t0)
        dt = sorted(times)[1]
        print(f"\n{label}: {snap.num_rows / dt / 1e6:,.1f} M contracts/s "
              f"(median of 3 calls; first call {snap.num_rows / times[0] / 1e6:,.1f})")
        print(_status_summary([out]))
    print("Outputs are model values, not investment advice.")
    return 0


def cmd_gen(args) -> int:
    from volsweep.data_gen import make_snapshot, write_snapshot

    if os.path.exists(args.output) and not args.overwrite:
        raise CliError(f"{args.output} exists (use --overwrite)")
    snap = make_snapshot(n_rows=args.rows, seed=args.seed, bad_fraction=args.bad_fraction)
    write_snapshot(snap, args.output)
    print(f"wrote {snap.num_rows:,d} rows to {args.output}")
    return 0


def cmd_price(args) -> int:
    from .api import prepare
    from .atomic_parquet import dictionary_columns

    source = _open(args)
    priced = prepare("price", source.schema, model=args.model, columns=_mapping(args.map),
                     as_of=args.as_of)
    return _stream(args, source, priced, priced.out_schema, "priced",
                   dictionary_columns(priced.out_schema))


def _greeks_arg(text: str):
    """--greeks all | none | delta,vega,... -> the ``which`` of volsweep.sweep."""
    words = [w.strip() for w in text.split(",") if w.strip()]
    if words == ["all"]:
        return None
    if words == ["none"]:
        return []
    if not words or "all" in words or "none" in words:
        raise CliError(f"--greeks expects all, none or a comma-separated list, got {text!r}")
    return words


def _keep_arg(text: str):
    words = [w.strip() for w in text.split(",") if w.strip()]
    if words == ["all"]:
        return None
    if words == ["none"]:
        return []
    if not words:
        raise CliError("--keep-columns expects all, none or a comma-separated list")
    return words


def _sweep_options(args) -> dict:
    which = _greeks_arg(args.greeks)
    # with no Greeks the units do not matter; pass raw (see the report on api.sweep)
    units = "raw" if which == [] else args.units
    return dict(model=args.model, which=which, units=units, columns=_mapping(args.map),
                as_of=args.as_of, quotes=args.quotes, keep=_keep_arg(args.keep_columns))


def cmd_sweep(args) -> int:
    from .sweep_plan import SweepPlan

    options = _sweep_options(args)
    source = _open(args)
    plan = SweepPlan.build(source.schema, **options)
    return _stream(args, source, plan.transform, plan.out_schema, "swept", plan.dictionary)


def cmd_backfill(args) -> int:
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise CliError("volsweep backfill needs Dask: pip install 'volsweep[dask]'") from None
    from .dask_backfill import backfill
    from .progress import Progress
    from .status_counts import status_table

    if args.batch_rows < 1:
        raise CliError(f"--batch-rows must be >= 1, got {args.batch_rows}")
    if args.workers is not None and args.workers < 1:
        raise CliError(f"--workers must be >= 1, got {args.workers}")
    from .dask_backfill import find_partitions

    total = len(find_partitions(args.src))
    res = backfill(args.src, args.dst, scheduler=args.scheduler, n_workers=args.workers,
                   batch_rows=args.batch_rows, progress=Progress(total, unit="partitions"),
                   **_sweep_options(args))
    print(f"backfill: {res.partitions:,d} partitions ({res.written:,d} written, "
          f"{res.skipped:,d} already complete), {res.rows_written:,d} rows written in "
          f"{res.seconds:.1f} s -> {args.dst}", file=sys.stderr)
    if res.statuses:
        print(status_table(res.statuses), file=sys.stderr)
    return 0


def cmd_bench(args) -> int:
    import subprocess

    # benchmarks/ lives beside bindings/ in a source checkout (it is not installed); the
    # report runs as its own process there, so the product never imports it
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    if not os.path.isdir(os.path.join(root, "benchmarks")):
        raise CliError("volsweep bench needs a source checkout (benchmarks/ not found)")
    cmd = [sys.executable, "-m", "benchmarks.report", "--rows", str(args.rows)]
    return subprocess.run(cmd, cwd=root).returncode


_SWEEP_EPILOG = """\
quotes: 'auto' inverts 'premium' if the input has it, else 'bid' and 'ask' (then the
  outputs are iv_bid, iv_ask, iv of the mid, iv_spread_uncertainty and per-side statuses);
  when the input has both, choose one with --quotes premium or --quotes bid-ask.
examples:
  volsweep sweep snap.parquet -o vols.parquet --quotes premium --greeks delta,vega
  volsweep sweep history/ -o vols.parquet --quotes bid-ask --keep-columns underlying,strike
  volsweep sweep quotes.csv -o vols.parquet --map strike=K --map premium=mid --units desk
Outputs are model values, not investment advice.
"""


def _default_batch_rows() -> int:
    from .input_files import DEFAULT_BATCH_ROWS

    return DEFAULT_BATCH_ROWS


def _io_args(p) -> None:
    p.add_argument("input", metavar="IN",
                   help="Parquet file or folder, Arrow IPC file or stream, or .csv file")
    p.add_argument("-o", "--output", required=True, metavar="OUT", help="Parquet file to write")
    p.add_argument("--overwrite", action="store_true", help="replace OUT if it exists")
    p.add_argument("--batch-rows", type=int, default=_default_batch_rows(), metavar="N",
                   help="rows per batch: bounds memory (default: %(default)s)")


def _map_args(p) -> None:
    p.add_argument("--map", action="append", metavar="OURS=THEIRS",
                   help="use column THEIRS for input OURS, e.g. strike=K (repeatable)")
    p.add_argument("--as-of", help="valuation time when expiries are timestamps (a time, or "
                   "the name of a column)")


def _model_arg(p) -> None:
    """--model: the registry's models, each with its underlying and one-line doc."""
    from volsweep.kernel.registry import MODELS

    lines = "; ".join(f"{m.name}: {m.doc}, on {m.underlying}"
                      + "".join(f" with {x.name}" for x in m.extras) for m in MODELS.values())
    p.add_argument("--model", default="bsm", choices=list(MODELS),
                   help=f"{lines.replace('%', '%%')} (default: %(default)s)")


def _sweep_args(p) -> None:
    import volsweep

    _model_arg(p)
    p.add_argument("--quotes", default="auto", choices=["auto", "premium", "bid-ask"],
                   help="which quote to invert (default: auto)")
    p.add_argument("--greeks", default="all", metavar="LIST",
                   help="all, none, or a comma-separated list of: "
                   f"{', '.join(volsweep.GREEK_NAMES)} (default: all)")
    p.add_argument("--units", default="raw", choices=["raw", "desk"],
                   help="Greeks per 1.00 of vol/rate and per year (raw), or per vol point, "
                   "per 1%% and per day (desk)")
    p.add_argument("--keep-columns", default="all", metavar="LIST",
                   help="input columns copied to the output: all, none, or a "
                   "comma-separated list (default: all)")
    _map_args(p)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="volsweep", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = p.add_subparsers(dest="command", required=True)

    d = sub.add_parser("demo", help="price a synthetic snapshot in memory and summarise")
    d.add_argument("-n", "--rows", type=int, default=1_000_000)
    d.add_argument("--seed", type=int, default=7)
    d.set_defaults(func=cmd_demo)

    g = sub.add_parser("gen", help="write a synthetic snapshot to Parquet")
    g.add_argument("-n", "--rows", type=int, default=1_000_000)
    g.add_argument("-o", "--output", required=True)
    g.add_argument("--seed", type=int, default=0)
    g.add_argument("--bad-fraction", type=float, default=0.01)
    g.add_argument("--overwrite", action="store_true")
    g.set_defaults(func=cmd_gen)

    pr = sub.add_parser("price", help="price every row of a file (needs a vol column)",
                        description="Price every row of IN (Parquet file or folder, Arrow IPC, "
                        "CSV) into the Parquet file OUT, streaming batch by batch.")
    _io_args(pr)
    _model_arg(pr)
    _map_args(pr)
    pr.set_defaults(func=cmd_price)

    sw = sub.add_parser(
        "sweep", help="implied vols and Greeks for every row of a file or dataset",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Invert every quote of IN into an implied volatility and compute the Greeks at "
            "that vol, streaming batch by batch with bounded memory, into the Parquet file "
            "OUT (written to a temporary file, renamed on success).  OUT has every input "
            "row, in order, every input column (see --keep-columns), then the outputs.", 88),
        epilog=_SWEEP_EPILOG)
    _io_args(sw)
    _sweep_args(sw)
    sw.set_defaults(func=cmd_sweep)

    bf = sub.add_parser(
        "backfill", help="sweep every partition of a dataset on Dask, resumably",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Sweep every partition of the Parquet dataset SRC (leaf folders such as "
            "date=2031-03-14/) into DST/<same folder>/part-0.parquet, one Dask task per "
            "partition.  Partitions already complete in DST are skipped: a re-run after a "
            "crash resumes and never duplicates rows.  Needs the dask extra.", 88),
        epilog=_SWEEP_EPILOG)
    bf.add_argument("src", metavar="SRC", help="partitioned Parquet dataset folder")
    bf.add_argument("dst", metavar="DST", help="output dataset folder (created if missing)")
    bf.add_argument("--scheduler", metavar="ADDRESS",
                    help="address of a running Dask scheduler (default: a local cluster of "
                    "one single-threaded worker process per core)")
    bf.add_argument("--workers", type=int, metavar="N",
                    help="worker processes of the local cluster (default: one per core)")
    bf.add_argument("--batch-rows", type=int, default=_default_batch_rows(), metavar="N",
                    help="rows per batch (default: %(default)s)")
    _sweep_args(bf)
    bf.set_defaults(func=cmd_backfill)

    b = sub.add_parser("bench", help="benchmark report (source checkout)")
    b.add_argument("-n", "--rows", type=int, default=2_000_000)
    b.set_defaults(func=cmd_bench)
    return p


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except CliError as exc:
        print(f"volsweep: error: {exc}", file=sys.stderr)
        return 2
    except (ValueError, TypeError, OSError) as exc:
        text = (str(exc).strip() or type(exc).__name__).splitlines()[0]
        print(f"volsweep: error: {text}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("volsweep: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
