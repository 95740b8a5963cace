"""``volsweep risk IN -o OUT``: the P&L of a book of positions under a grid of spot and
vol shocks, per group, by full revaluation (``volsweep.scenarios``); with ``--heatmap
DIR`` also one P&L heat map per group (needs the ``plot`` extra)."""

from __future__ import annotations

import sys
import textwrap
import time

_EPILOG = """\
shocks: a comma-separated list (0.05 = +5%% for spot, 0.01 = one vol point) or a range
  FROM:TO:STEP (both ends included); write negative values with '=':
  --spot-shocks=-0.1:0.1:0.01  --vol-shocks=-0.03,0,0.03
examples:
  volsweep risk book.parquet -o grid.parquet --by underlying
  volsweep risk book.csv -o grid.csv --map quantity=qty --days 1 --heatmap pictures/
Outputs are model values, not investment advice.
"""


def _shock_list(text: str, flag: str) -> list:
    from .cli import CliError

    text = text.strip()
    try:
        if text.count(":") == 2:
            lo, hi, step = (float(x) for x in text.split(":"))
            if not step > 0 or hi < lo:
                raise ValueError
            n = int(round((hi - lo) / step))
            if abs(lo + n * step - hi) > 1e-9 * max(1.0, abs(hi)) or n > 100_000:
                raise ValueError
            return [round(lo + k * step, 12) for k in range(n + 1)]
        return [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise CliError(f"{flag} expects numbers separated by commas, or FROM:TO:STEP with "
                       f"TO reached in whole steps, got {text!r}") from None


def _by_list(text: str, schema, flag: str = "--by") -> tuple:
    from .cli import CliError

    words = tuple(w.strip() for w in text.split(",") if w.strip())
    if words == ("none",):
        return ()
    for w in words:
        if w not in schema.names:
            raise CliError(f"{flag} names column {w!r}, which the input does not have "
                           f"(columns: {', '.join(schema.names)})")
    return words


def cmd_risk(args) -> int:
    from . import cli
    from ._columns import numeric_columns
    from .atomic_parquet import AtomicWriter, check_output, dictionary_columns
    from .input_files import open_input
    from .progress import Progress
    from .risk import DEFAULT_SPOT_SHOCKS, DEFAULT_VOL_SHOCKS, POSITION_INPUTS, run_scenarios
    from .status_counts import status_table, unreadable_lines

    columns = cli._mapping(args.map)
    spot = (_shock_list(args.spot_shocks, "--spot-shocks") if args.spot_shocks
            else list(DEFAULT_SPOT_SHOCKS))
    vol = (_shock_list(args.vol_shocks, "--vol-shocks") if args.vol_shocks
           else list(DEFAULT_VOL_SHOCKS))
    if args.heatmap:
        from .plot_risk import INSTALL_HINT
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            raise cli.CliError(INSTALL_HINT) from None
    if args.batch_rows < 1:
        raise cli.CliError(f"--batch-rows must be >= 1, got {args.batch_rows}")
    check_output(args.output, args.overwrite)     # before any reading or planning
    # the position inputs are read as numbers too (a CSV column of them stays numeric)
    numbers = numeric_columns({k: v for k, v in columns.items() if k not in POSITION_INPUTS})
    numbers |= {columns.get(k, k) for k in POSITION_INPUTS} - {None}
    source = open_input(args.input, args.batch_rows, numbers=numbers)
    by = _by_list(args.by, source.schema)
    t0 = time.perf_counter()
    progress = Progress(source.num_rows)
    try:
        res = cli._planned(run_scenarios, source.schema, source.batches(), model=args.model,
                           by=by, spot_shocks=spot, vol_shocks=vol, days=args.days,
                           columns=columns, as_of=args.as_of, progress=progress,
                           exercise=args.exercise)
    finally:
        progress.close()
    grid = res.table
    with AtomicWriter(args.output, grid.schema,
                      dictionary=dictionary_columns(grid.schema)) as w:
        w.write(grid)
        w.commit()
    seconds = time.perf_counter() - t0
    n_rows = sum(res.statuses.values())
    n_groups = grid.num_rows // max(1, len(spot) * len(vol))
    print(f"revalued {n_rows:,d} positions x {len(spot) * len(vol)} scenarios "
          f"({len(spot)} spot x {len(vol)} vol, {args.days:g} days) into {n_groups:,d} "
          f"groups in {seconds:.2f} s -> {args.output}", file=sys.stderr)
    lines = [status_table({"status": res.statuses})] if res.statuses else []
    invalid = int(sum(grid["rows_shock_invalid"].to_pylist())) if grid.num_rows else 0
    if invalid:
        lines.append(f"  {invalid:,d} (row, scenario) pairs without a value at the shocked "
                     "inputs (a vol shocked below zero, a price not a finite double): "
                     "counted in rows_shock_invalid")
    lines += unreadable_lines(source.unreadable, source.schema)
    if lines:
        print("\n".join(lines), file=sys.stderr)
    if args.heatmap:
        from .plot_risk import write_heatmaps

        paths = write_heatmaps(grid, by, args.heatmap, model=args.model, days=args.days)
        print(f"wrote {len(paths):,d} heat maps to {args.heatmap}", file=sys.stderr)
    return 0


def add_parser(sub) -> None:
    """The ``risk`` subcommand (registered by cli.build_parser)."""
    import argparse

    from . import cli

    p = sub.add_parser(
        "risk", help="P&L of a book under spot x vol shocks, per group, by full revaluation",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Revalue every position of IN (the model's inputs plus quantity, and "
            "multiplier, 1 if absent) under each spot and vol shock, and write the summed "
            "P&L per group and scenario to OUT: the --by columns, spot_shock, vol_shock, "
            "pnl, rows, rows_left_out (bad status) and rows_shock_invalid.  Reads the "
            "whole input (a group operation).", 88),
        epilog=_EPILOG)
    cli._io_args(p)
    cli._model_arg(p)
    cli._exercise_arg(p)
    p.add_argument("--by", default="underlying", metavar="LIST",
                   help="group columns, comma-separated, or none for the whole book "
                   "(default: underlying)")
    p.add_argument("--spot-shocks", metavar="LIST",
                   help="relative shocks of the model's underlying (default: -0.1:0.1:0.01)")
    p.add_argument("--vol-shocks", metavar="LIST",
                   help="absolute vol shocks, in the model's vol units (default: "
                   "-0.03:0.03:0.01)")
    p.add_argument("--days", type=float, default=0.0, metavar="N",
                   help="calendar days the valuation moves forward (default: 0)")
    p.add_argument("--heatmap", metavar="DIR",
                   help="also write one P&L heat map (PNG) per group into DIR (needs "
                   "matplotlib: pip install 'volsweep[plot]')")
    cli._map_args(p)
    p.set_defaults(func=cmd_risk)
