"""Command line: ``volsweep <command>`` (also ``python -m volsweep``).

Commands:
  demo                     build a synthetic snapshot in memory, run it, print a summary
  gen -n N -o FILE         write a synthetic snapshot to Parquet
  price IN -o OUT          price every row of a file (needs a vol column)
  sweep IN -o OUT          implied vols and Greeks for every row of a file or dataset
  backfill SRC DST         sweep (or --operation forwards/variance/smiles) every partition
                           of a dataset on Dask, resumably
  risk IN -o OUT           P&L of a book under spot x vol shocks per group (full revaluation)
  forwards IN -o OUT       implied forward and discount per expiry (put-call parity)
  variance IN -o OUT       model-free implied variance per expiry, or at fixed horizons
  smile IN --underlying NAME -o PICTURE   fit one underlying's SVI smiles and draw them
  history VARIANCE -o OUT  constant-maturity vols per day from backfilled chain results
  bench                    run the benchmark report

IN may be a Parquet file, a folder of Parquet files (hive partitions such as
date=2031-03-14/ add their key as a column), an Arrow IPC file or stream, or a .csv file.
Inputs are streamed in batches (memory stays bounded whatever the size); OUT is written in
the format its name says (.parquet, .csv, .csv.gz, .arrow, .feather, .ipc) to a temporary
file and renamed on success, so a failure leaves no partial OUT.
"""

from __future__ import annotations

import argparse
import os
import sys
import textwrap
import time
import warnings
from collections import Counter

import pyarrow as pa
import pyarrow.parquet as pq

from volsweep.kernel.registry import DEFAULT_MODEL


class CliError(Exception):
    """A user-facing error: printed as one line, exit status 2."""


# the flags that set the options an OptionError names (bindings/_columns.py)
CLI_WORDS = {"columns": "--map", "as_of": "--as-of", "quotes": "--quotes",
             "keep": "--keep-columns", "exercise": "--exercise ",
             "unmap": "--map {name}="}


def _mapping(pairs) -> dict:
    """--map OURS=THEIRS ... as ``columns=``; ``OURS=`` (nothing after '=') maps the input
    to no column."""
    out = {}
    for pair in pairs or ():
        ours, sep, theirs = pair.partition("=")
        if not sep or not ours:
            raise CliError(f"--map expects OURS=THEIRS (e.g. strike=K), or OURS= for no "
                           f"column, got {pair!r}")
        out[ours] = theirs or None
    return out


def _in_our_words(message) -> str:
    """An error's or warning's text, with the flags the user typed where it names an
    option (``--map`` for ``columns=``), as one line."""
    from ._columns import Worded

    text = message.render(CLI_WORDS) if isinstance(message, Worded) else str(message)
    return (text.strip() or type(message).__name__).splitlines()[0]


def _say_warnings(caught) -> None:
    """Warnings raised while planning (an input column the model does not read), as lines
    of our own on stderr."""
    for w in caught:
        print(f"volsweep: warning: {_in_our_words(w.message)}", file=sys.stderr)


def _planned(build, *args, **kwargs):
    """``build(*args, **kwargs)`` (a column plan), its warnings said on stderr."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        plan = build(*args, **kwargs)
    _say_warnings(caught)
    return plan


def _status_summary(tables) -> str:
    from .status_counts import count_statuses, status_table

    counts = {}
    for t in tables:
        count_statuses(t.select(["status"]), counts)
    return status_table(counts)


def _open(args, columns: dict):
    from ._columns import numeric_columns
    from .atomic_parquet import check_output
    from .input_files import open_input

    if args.batch_rows < 1:
        raise CliError(f"--batch-rows must be >= 1, got {args.batch_rows}")
    check_output(args.output, args.overwrite)     # before any reading or planning
    return open_input(args.input, args.batch_rows, numbers=numeric_columns(columns))


def _summary(statuses, high_vols, unreadable, schema) -> str:
    """The closing summary: statuses, vols above the bound, cells read as missing."""
    from .status_counts import high_vol_lines, status_table, unreadable_lines

    lines = [status_table(statuses)] if statuses else []
    return "\n".join(lines + high_vol_lines(high_vols) + unreadable_lines(unreadable, schema))


def _stream(args, source, transform, out_schema, verb: str, dictionary=None,
            vol_columns=()) -> int:
    from .progress import Progress
    from .stream_to_parquet import stream_to_parquet

    res = stream_to_parquet(source, args.output, transform, out_schema,
                            overwrite=args.overwrite, progress=Progress(source.num_rows),
                            dictionary=dictionary, vol_columns=vol_columns)
    rate = res.rows / res.seconds if res.seconds > 0 else 0.0
    print(f"{verb} {res.rows:,d} rows in {res.seconds:.2f} s ({rate / 1e6:.2f} M rows/s) "
          f"-> {args.output}", file=sys.stderr)
    print(_summary(res.statuses, res.high_vols, source.unreadable, source.schema),
          file=sys.stderr)
    return 0


_DEMO_CALLS = 5


def cmd_demo(args) -> int:
    import numba

    import volsweep
    from volsweep.data_gen import make_snapshot

    t0 = time.perf_counter()
    snap = make_snapshot(n_rows=_rows_arg(args, 1), seed=args.seed)
    t_gen = time.perf_counter() - t0
    print(f"synthetic snapshot: {snap.num_rows:,d} contracts on "
          f"{len(snap.column('underlying').unique()):,d} fictional underlyings "
          f"(generated in {t_gen:.2f} s)")
    print("loading compiled kernels (the first run on a machine compiles them: minutes)",
          flush=True)
    t0 = time.perf_counter()
    volsweep.warmup(models=DEFAULT_MODEL)
    print(f"kernels ready in {time.perf_counter() - t0:.1f} s")
    cols = {"vol": "true_vol"}
    quotes = snap.drop_columns(["bid", "ask"])
    steps = (
        ("price (BSM, at the true vol)", lambda t: volsweep.price(t, columns=cols)),
        ("implied vol (from the premium)", lambda t: volsweep.implied_vol(t)),
        ("sweep (iv + all 16 Greeks)", lambda t: volsweep.sweep(t)),
    )
    print("\n" + textwrap.fill(
        f"Table-level calls (Arrow in and out) on {numba.get_num_threads()} threads; each "
        f"rate is the median of {_DEMO_CALLS} calls after one untimed call, which maps "
        "fresh output memory (in a new process that first call runs several times "
        "slower).", 88))
    for label, fn in steps:
        out = fn(quotes)           # untimed: the output memory, then reused by later calls
        times = []
        for _ in range(_DEMO_CALLS):
            out = None             # release the last result first, as a loop over
            t0 = time.perf_counter()   # snapshots would: its memory serves the next one
            out = fn(quotes)
            times.append(time.perf_counter() - t0)
        rates = sorted(snap.num_rows / t / 1e6 for t in times)
        print(f"\n{label}: {rates[len(rates) // 2]:,.1f} M contracts/s "
              f"(range {rates[0]:,.1f}-{rates[-1]:,.1f})")
        print(_status_summary([out]))
    print("\n" + textwrap.fill(
        "The README's Speed figures are kernel-level rates on 2M rows (make bench); "
        "table-level calls run at about 0.7-1.0 of them, and less on a busy machine.", 88))
    _demo_chains(min(snap.num_rows, 200_000), args.seed)
    print("Outputs are model values, not investment advice.")
    return 0


def _demo_chains(rows: int, seed: int) -> None:
    """Chain operations on a snapshot whose prices hide borrow and dividends."""
    import numpy as np
    import pyarrow.compute as pc

    import volsweep
    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(n_rows=rows, seed=seed, hidden_carry=True)
    print(f"\nChains: {snap.num_rows:,d} contracts whose prices come from forwards with "
          "hidden borrow and dividends, some quotes stale or outlying")
    t0 = time.perf_counter()
    fwd = volsweep.implied_forwards(snap, quotes="bid-ask")
    t_fwd = time.perf_counter() - t0
    ok = pc.equal(fwd["status"].cast("string"), "ok").to_numpy(zero_copy_only=False)
    # the true forward of each group: the snapshot's rows are ordered by the same keys
    truth = snap.group_by(["underlying", "expiry"], use_threads=False).aggregate(
        [("true_forward", "max"), ("forward", "max")])
    key = lambda t: [f"{u}|{e}" for u, e in zip(t["underlying"].to_pylist(),  # noqa: E731
                                                   t["expiry"].to_pylist())]
    where = dict(zip(key(truth), range(truth.num_rows)))
    idx = np.array([where[k] for k in key(fwd)])
    true_f = truth["true_forward_max"].to_numpy()[idx]
    seen_f = truth["forward_max"].to_numpy()[idx]
    got = fwd["forward"].to_numpy(zero_copy_only=False).astype(float)
    hidden = ok & (np.abs(seen_f / true_f - 1) > 1e-4)
    err_i = np.abs(got / true_f - 1)[hidden]
    err_v = np.abs(seen_f / true_f - 1)[hidden]
    print(f"implied_forwards: {fwd.num_rows:,d} expiries in {t_fwd:.2f} s, {ok.sum():,d} ok; "
          f"on the {hidden.sum():,d} where S e^((r-q)T) misses the true forward by more "
          f"than 1 bp, median relative error {np.median(err_v):.1e} from the visible "
          f"columns, {np.median(err_i):.1e} implied from the quotes")
    chain = volsweep.implied_forwards(snap.drop_columns(["forward", "spot", "div_yield",
                                                         "premium"]),
                                      quotes="bid-ask", attach=True)
    vols = volsweep.implied_vol(chain, model="black76")
    t0 = time.perf_counter()
    fits = volsweep.fit_smiles(vols, model="black76")
    t_fit = time.perf_counter() - t0
    fit_ok = pc.equal(fits["status"].cast("string"), "ok")
    rmse = fits.filter(fit_ok)["rmse_iv"].to_numpy()
    bfly = pc.sum(pc.fill_null(fits["butterfly_arbitrage"], False)).as_py()
    print(f"fit_smiles (raw SVI per expiry, Black-76 vols on the implied forwards): "
          f"{fits.num_rows:,d} slices in {t_fit:.2f} s, {pc.sum(fit_ok).as_py():,d} ok, "
          f"median rmse {100 * np.median(rmse):.2f} vol points, {bfly} with butterfly "
          "arbitrage flagged")
    print(_status_summary([fits]))


def _rows_arg(args, least: int) -> int:
    if args.rows < least:
        raise CliError(f"-n/--rows must be >= {least}, got {args.rows}")
    return args.rows


def cmd_gen(args) -> int:
    from volsweep.data_gen import make_snapshot, write_snapshot

    from .atomic_parquet import AtomicWriter, check_output, output_format

    check_output(args.output, args.overwrite)
    if not 0.0 <= args.bad_fraction <= 1.0:
        raise CliError(f"--bad-fraction must be between 0 and 1, got {args.bad_fraction}")
    snap = make_snapshot(n_rows=_rows_arg(args, 0), seed=args.seed,
                         bad_fraction=args.bad_fraction, hidden_carry=args.hidden_carry)
    if output_format(args.output) == "parquet":
        write_snapshot(snap, args.output)       # the snapshot's own row groups and codec
    else:
        with AtomicWriter(args.output, snap.schema) as w:
            w.write(snap)
            w.commit()
    print(f"wrote {snap.num_rows:,d} rows to {args.output}")
    return 0


def cmd_price(args) -> int:
    from .api import prepare
    from .atomic_parquet import dictionary_columns

    columns = _mapping(args.map)
    source = _open(args, columns)
    priced = _planned(prepare, "price", source.schema, model=args.model, columns=columns,
                      as_of=args.as_of, exercise=args.exercise)
    return _stream(args, source, priced, priced.out_schema, "priced",
                   dictionary_columns(priced.out_schema), (priced.plan.source["vol"],))


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
    source = _open(args, options["columns"])
    plan = _planned(SweepPlan.build, source.schema, exercise=args.exercise, **options)
    return _stream(args, source, plan.transform, plan.out_schema, "swept", plan.dictionary,
                   plan.vol_columns)


def cmd_backfill(args) -> int:
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise CliError("volsweep backfill needs Dask: pip install 'volsweep[dask]'") from None
    from .dask_backfill import backfill
    from .progress import Progress

    if args.batch_rows < 1:
        raise CliError(f"--batch-rows must be >= 1, got {args.batch_rows}")
    if args.workers is not None and args.workers < 1:
        raise CliError(f"--workers must be >= 1, got {args.workers}")
    from .dask_backfill import find_partitions

    parts = find_partitions(args.src)
    options = _sweep_options(args)
    if args.operation != "sweep":
        options = dict(columns=options["columns"], as_of=options["as_of"],
                       quotes=options["quotes"], operation=args.operation,
                       by=_backfill_by(args.by), options=_group_extra(args))
    elif args.by or args.min_pairs is not None or args.arbitrage_free:
        raise CliError("--by, --min-pairs and --arbitrage-free apply to the group "
                       "operations (--operation forwards, variance or smiles)")
    res = _planned(backfill, args.src, args.dst, scheduler=args.scheduler,
                   n_workers=args.workers, batch_rows=args.batch_rows,
                   progress=Progress(len(parts), unit="partitions"), **options)
    print(f"backfill: {res.partitions:,d} partitions ({res.written:,d} written, "
          f"{res.skipped:,d} already complete), {res.rows_written:,d} rows written in "
          f"{res.seconds:.1f} s -> {args.dst}", file=sys.stderr)
    summary = _summary(res.statuses, res.high_vols, res.unreadable, res.schema)
    if summary:
        print(summary, file=sys.stderr)
    return 0


def _backfill_by(text):
    if text is None:
        return None
    words = tuple(w.strip() for w in text.split(",") if w.strip())
    if not words:
        raise CliError("--by expects a comma-separated list of column names")
    return words


def _group_extra(args) -> dict:
    extra = {}
    if args.min_pairs is not None:
        if args.operation != "forwards":
            raise CliError("--min-pairs applies to --operation forwards")
        extra["min_pairs"] = args.min_pairs
    if args.arbitrage_free:
        if args.operation != "smiles":
            raise CliError("--arbitrage-free applies to --operation smiles")
        extra["arbitrage_free"] = True
    return extra


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
    p.add_argument("-o", "--output", required=True, metavar="OUT",
                   help="file to write, in the format its name says: .parquet, .csv, "
                   ".csv.gz, or Arrow IPC .arrow/.feather/.ipc")
    p.add_argument("--overwrite", action="store_true", help="replace OUT if it exists")
    p.add_argument("--batch-rows", type=int, default=_default_batch_rows(), metavar="N",
                   help="rows per batch: bounds memory (default: %(default)s)")


def _map_args(p) -> None:
    p.add_argument("--map", action="append", metavar="OURS=THEIRS",
                   help="use column THEIRS for input OURS, e.g. strike=K; OURS= for no "
                   "column (repeatable)")
    p.add_argument("--as-of", help="valuation time when expiries are timestamps: the name of "
                   "a column, or an ISO 8601 time (with a zone such as Z or +01:00, "
                   "converted to UTC; without one, taken as UTC)")


def _model_arg(p) -> None:
    """--model: the registry's models, each with its underlying and one-line doc."""
    from volsweep.kernel.registry import DEFAULT_MODEL, MODELS

    lines = "; ".join(f"{m.name}: {m.doc}, on {m.underlying}"
                      + "".join(f" with {x.name}" for x in m.extras) for m in MODELS.values())
    p.add_argument("--model", default=DEFAULT_MODEL, choices=list(MODELS),
                   help=f"{lines.replace('%', '%%')} (default: %(default)s)")


def _exercise_arg(p) -> None:
    """--exercise: the exercise style of every row (the registry's American entries)."""
    from volsweep.kernel.registry import AMERICAN, EXERCISES

    p.add_argument("--exercise", type=str.lower, choices=list(EXERCISES), default=None,
                   help="exercise style of every row: american (models "
                   f"{', '.join(AMERICAN)}) or european; default: each row's style from an "
                   "'exercise' column (american/european) if IN has one, else european")


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
    g.add_argument("-o", "--output", required=True,
                   help=".parquet, .csv, .csv.gz, .arrow, .feather or .ipc")
    g.add_argument("--seed", type=int, default=0)
    g.add_argument("--bad-fraction", type=float, default=0.01)
    g.add_argument("--hidden-carry", action="store_true",
                   help="price from forwards with borrow costs and cash dividends the columns "
                   "do not show, with 2%% stale or outlying quotes (adds true_forward and "
                   "parity_flag): the data volsweep forwards is for")
    g.add_argument("--overwrite", action="store_true")
    g.set_defaults(func=cmd_gen)

    pr = sub.add_parser("price", help="price every row of a file (needs a vol column)",
                        description="Price every row of IN (Parquet file or folder, Arrow IPC, "
                        "CSV) into the Parquet file OUT, streaming batch by batch.")
    _io_args(pr)
    _model_arg(pr)
    _exercise_arg(pr)
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
    _exercise_arg(sw)
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
    bf.add_argument("--operation", default="sweep",
                    choices=["sweep", "forwards", "variance", "smiles"],
                    help="sweep: every row (default); forwards, variance, smiles: one row "
                    "per group of --by per partition (implied_forwards, "
                    "model_free_variance, fit_smiles on implied forwards)")
    bf.add_argument("--by", metavar="LIST",
                    help="group columns of the group operations (default: underlying,expiry)")
    bf.add_argument("--min-pairs", type=int, metavar="N",
                    help="forwards: fewest two-sided strikes a group's fit uses (default: 3)")
    bf.add_argument("--arbitrage-free", action="store_true",
                    help="smiles: keep every fitted slice free of butterfly arbitrage")
    _sweep_args(bf)
    bf.set_defaults(func=cmd_backfill)

    from . import cli_risk
    cli_risk.add_parser(sub)
    from .cli_chains import add_parser as _add_chain_commands
    _add_chain_commands(sub)                  # forwards, variance
    from .cli_smiles import add_parser as _add_smile_command
    _add_smile_command(sub)                   # smile
    from .cli_history import add_parser as _add_history_command
    _add_history_command(sub)                 # history

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
        print(f"volsweep: error: {_in_our_words(exc)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("volsweep: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
