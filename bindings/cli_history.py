"""``volsweep history VARIANCE -o OUT``: constant-maturity vols per day and underlying from
backfilled chain results (``volsweep.term_history``); with ``--picture`` a chart of a few
underlyings (needs the ``plot`` extra)."""

from __future__ import annotations

import argparse
import os
import sys
import textwrap

_EPILOG = """\
examples:
  volsweep backfill history/ var/ --operation variance
  volsweep backfill history/ smiles/ --operation smiles
  volsweep history var/ --smiles smiles/ --days 30,91 -o term.parquet
  volsweep history var/ --smiles smiles/ -o term.csv --picture term.png --underlying KAQU,TOXI
Outputs are model values, not investment advice.
"""


def add_parser(sub) -> None:
    p = sub.add_parser(
        "history", help="constant-maturity vols per day from backfilled variances and smiles",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Read the partitions that 'volsweep backfill --operation variance' wrote to "
            "VARIANCE (and, with --smiles, those of --operation smiles), and write per "
            "partition (day), underlying and horizon the model-free vol and the ATM vol at "
            "fixed horizons, linear in total variance between the bracketing expiries.", 88),
        epilog=_EPILOG)
    p.add_argument("variance", metavar="VARIANCE", help="backfilled variance dataset folder")
    p.add_argument("--smiles", metavar="DIR", help="backfilled smiles dataset folder")
    p.add_argument("--days", default="30", metavar="LIST",
                   help="horizons in calendar days, comma-separated (default: 30)")
    p.add_argument("-o", "--output", required=True, metavar="OUT",
                   help="table to write: .parquet, .csv, .csv.gz, or Arrow IPC "
                   ".arrow/.feather/.ipc")
    p.add_argument("--overwrite", action="store_true", help="replace OUT (and PICTURE)")
    p.add_argument("--picture", metavar="PNG",
                   help="also draw the first horizon for the --underlying names")
    p.add_argument("--underlying", metavar="LIST",
                   help="underlyings to draw, comma-separated (default: the first three)")
    p.set_defaults(func=cmd_history)


def _days(text: str) -> tuple:
    from .cli import CliError

    try:
        days = tuple(float(w) for w in text.split(",") if w.strip())
    except ValueError:
        days = ()
    if not days or not all(d > 0 for d in days):
        raise CliError(f"--days expects positive numbers separated by commas, got {text!r}")
    return days


def cmd_history(args) -> int:
    import pyarrow as pa

    from .atomic_parquet import AtomicWriter, check_output
    from .cli import CliError
    from .history_view import draw, term_history

    check_output(args.output, args.overwrite)
    if args.picture:
        if os.path.exists(args.picture) and not args.overwrite:
            raise CliError(f"{args.picture} exists (use --overwrite)")
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            raise CliError("--picture needs matplotlib: pip install 'volsweep[plot]'") from None
    try:
        table = term_history(args.variance, args.smiles, days=_days(args.days))
    except (ValueError, pa.ArrowInvalid) as exc:
        raise CliError(str(exc)) from None
    with AtomicWriter(args.output, table.schema) as writer:
        writer.write(table)
        writer.commit()
    print(f"history: {table.num_rows:,d} rows -> {args.output}", file=sys.stderr)
    if args.picture:
        names = sorted(set(table["underlying"].cast(pa.string()).drop_null().to_pylist()))
        want = ([w.strip() for w in args.underlying.split(",") if w.strip()]
                if args.underlying else names[:3])
        missing = [w for w in want if w not in names]
        if missing or not want:
            raise CliError(f"--underlying: no rows for {', '.join(missing) or 'any name'}")
        draw(table, want, args.picture)
        print(f"-> {args.picture}", file=sys.stderr)
    return 0
