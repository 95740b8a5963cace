"""Command line of the chain operations: ``volsweep forwards`` and ``volsweep variance``.

Groups may span batches and files, so both commands read the whole input first (only the
columns they use are kept: a few arrays of 8 bytes per row, plus the group keys), then
compute every group at once.  ``forwards --attach`` then reads the input a second time,
batch by batch, and writes every row with its group's forward appended, so its output,
like the sweep's, never has to fit in memory at once.
"""

from __future__ import annotations

import argparse
import sys
import textwrap
import time
from collections import Counter

import pyarrow as pa

_EPILOG = """\
groups: one output row per distinct combination of the --by columns (default
  underlying,expiry), in ascending order of them; every group has a status.
examples:
  volsweep forwards snap.parquet -o forwards.parquet
  volsweep forwards snap.parquet -o chain.parquet --attach --drop-columns forward
  volsweep variance snap.parquet -o variance.parquet
  volsweep variance snap.parquet -o vix_like.csv --days 30,91 --extrapolate
Outputs are model values, not investment advice.
"""


def _by_arg(text: str) -> tuple:
    from .cli import CliError

    names = tuple(w.strip() for w in text.split(",") if w.strip())
    if not names:
        raise CliError("--by expects a comma-separated list of columns, e.g. underlying,expiry")
    return names


def _days_arg(text: str) -> list:
    try:
        days = [float(w) for w in text.split(",") if w.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expects numbers of days, e.g. 30,91, got "
                                         f"{text!r}") from None
    if not days or not all(0 < d < float("inf") for d in days):
        raise argparse.ArgumentTypeError(f"expects positive numbers of days, got {text!r}")
    return days


def _read(args, quotes, **plan_options):
    """Open the input, plan its columns, read every batch (progress on stderr)."""
    from .chain_plan import ChainPlan, read_chain
    from .cli import _mapping, _open
    from .progress import Progress

    columns = _mapping(args.map)
    source = _open(args, columns)
    plan = ChainPlan.build(source.schema, _by_arg(args.by), columns, args.as_of,
                           quotes=quotes, **plan_options)
    progress = Progress(source.num_rows)
    try:
        chain = read_chain(plan, source.batches(), source.schema, progress=progress)
    finally:
        progress.close()
    return source, plan, chain


def _drop_arg(text, schema) -> tuple:
    from .cli import CliError

    if not text:
        return ()
    names = tuple(w.strip() for w in text.split(",") if w.strip())
    for name in names:
        if name not in schema.names:
            raise CliError(f"--drop-columns names {name!r}, which the input does not have")
    return names


def _write_table(path, table, overwrite) -> None:
    from .atomic_parquet import AtomicWriter, check_output

    check_output(path, overwrite)
    with AtomicWriter(path, table.schema) as w:
        w.write(table)
        w.commit()


def _group_summary(status_column) -> str:
    from .status_counts import status_table

    words = status_column.to_pylist()
    return status_table({"status": Counter(words)})


def _quotes(args) -> str:
    return args.quotes


def cmd_forwards(args) -> int:
    from . import chains

    t0 = time.perf_counter()
    source, plan, chain = _read(args, _quotes(args))
    res = chains.fit_forwards(chain, plan, args.min_pairs)
    if not args.attach:
        table = chains.forwards_table(chain, res)
        _write_table(args.output, table, args.overwrite)
        seconds = time.perf_counter() - t0
        print(f"forwards of {table.num_rows:,d} groups from {chain.n:,d} rows in "
              f"{seconds:.2f} s -> {args.output}", file=sys.stderr)
        print(_group_summary(table["status"]), file=sys.stderr)
        return 0
    from .progress import Progress
    from .stream_to_parquet import stream_to_parquet

    drop = _drop_arg(args.drop_columns, source.schema)
    kept = pa.schema([f for f in source.schema if f.name not in drop],
                     metadata=source.schema.metadata)
    names = chains.attach_names(kept, plan)
    per_row = chains.row_columns(chain, res, names)
    out_schema = chains.attached_schema(kept, names)
    at = [0]

    def transform(batch):
        a = at[0]
        at[0] = a + batch.num_rows
        if drop:
            batch = batch.drop_columns(list(drop))
        return chains.attach_batch(batch, per_row, a, at[0], out_schema)

    stream_to_parquet(source, args.output, transform, out_schema, overwrite=args.overwrite,
                      progress=Progress(source.num_rows))
    seconds = time.perf_counter() - t0
    print(f"forwards of {chain.groups:,d} groups attached to {chain.n:,d} rows in "
          f"{seconds:.2f} s -> {args.output}", file=sys.stderr)
    print(_group_summary(chains._status_array(res["status"])), file=sys.stderr)
    return 0


def cmd_variance(args) -> int:
    from . import chains

    t0 = time.perf_counter()
    given = args.forwards == "columns"
    source, plan, chain = _read(args, _quotes(args),
                                discount="required" if given else "optional", spot="no",
                                forward="required" if given else "no")
    table = chains.variance_table(chain, plan, args.forwards)
    what = "variance"
    if args.days:
        keep = _by_arg(args.by)[:-1]          # the underlying: the --by columns but the last
        if not keep:
            from .cli import CliError
            raise CliError("--days needs a --by column besides the expiry (e.g. "
                           "underlying,expiry)")
        per_expiry = table
        table = chains.constant_maturity_variance(per_expiry, args.days, keep,
                                                  extrapolate=args.extrapolate)
        what = "constant-maturity variance"
    _write_table(args.output, table, args.overwrite)
    seconds = time.perf_counter() - t0
    print(f"{what}: {table.num_rows:,d} rows from {chain.n:,d} input rows in {seconds:.2f} s "
          f"-> {args.output}", file=sys.stderr)
    print(_group_summary(table["status"]), file=sys.stderr)
    return 0


def _common(p) -> None:
    from .cli import _io_args, _map_args

    _io_args(p)
    p.add_argument("--by", default="underlying,expiry", metavar="LIST",
                   help="the columns whose distinct values make a group "
                   "(default: underlying,expiry)")
    p.add_argument("--quotes", default="auto", choices=["auto", "premium", "bid-ask"],
                   help="the quote read: auto takes bid and ask when present (their spreads "
                   "weight the fit), else premium")
    _map_args(p)


def add_parser(sub) -> None:
    """Register ``forwards`` and ``variance`` on the ``volsweep`` subcommands."""
    f = sub.add_parser(
        "forwards", help="implied forward and discount per expiry from put-call parity",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Fit each group's forward and discount factor (each underlying's expiry) to "
            "its calls and puts by put-call parity, robustly, and write one row per group "
            "to OUT; with --attach, every input row with its group's forward instead.  The "
            "whole input is read first: groups may span batches and files.", 88),
        epilog=_EPILOG)
    _common(f)
    f.add_argument("--attach", action="store_true",
                   help="write the input rows with forward, discount (when fitted) and "
                   "forward_status appended")
    f.add_argument("--drop-columns", metavar="LIST",
                   help="with --attach: input columns left out of OUT, e.g. a forward column "
                   "of your own that the attached one replaces")
    f.add_argument("--min-pairs", type=int, default=3, metavar="N",
                   help="fewest strikes with a usable call and put a group needs (default 3)")
    f.set_defaults(func=cmd_forwards)

    v = sub.add_parser(
        "variance", help="model-free implied variance per expiry, or at fixed horizons",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Compute each group's model-free implied variance from its out-of-the-money "
            "strip around the forward and write one row per group to OUT; with --days, the "
            "variance at those horizons per underlying instead (linear in total variance "
            "between the bracketing expiries).  The whole input is read first.", 88),
        epilog=_EPILOG)
    _common(v)
    v.add_argument("--forwards", default="implied", choices=["implied", "columns"],
                   help="each group's forward and discount: implied by put-call parity "
                   "(default), or read from the forward and rate/discount columns")
    v.add_argument("--days", type=_days_arg, metavar="LIST",
                   help="horizons in calendar days, e.g. 30,91: write the constant-maturity "
                   "variance per underlying (the --by columns but the last, the expiry)")
    v.add_argument("--extrapolate", action="store_true",
                   help="with --days: beyond the first or last expiry, carry its variance "
                   "(status extrapolated) instead of leaving the horizon empty")
    v.set_defaults(func=cmd_variance)
