"""``volsweep smile IN --underlying NAME -o smile.png``: fit one underlying's smiles and
draw them (needs the ``plot`` extra)."""

from __future__ import annotations

import os
import sys
import textwrap
import time

import pyarrow as pa
import pyarrow.compute as pc

_EPILOG = """\
IN may hold implied vols (an 'iv' column, e.g. the output of volsweep sweep) or quotes
('premium', or 'bid' and 'ask'), which are inverted first with --model.
examples:
  volsweep gen -n 200000 -o snap.parquet
  volsweep smile snap.parquet --underlying KAQU -o smile.png
  volsweep smile vols.parquet --underlying KAQU -o smile.png --arbitrage-free --fits fits.csv
Outputs are model values, not investment advice.
"""


def add_parser(sub) -> None:
    from .cli import _map_args, _model_arg

    p = sub.add_parser(
        "smile", help="fit one underlying's SVI smiles and draw them",
        formatter_class=__import__("argparse").RawDescriptionHelpFormatter,
        description=textwrap.fill(
            "Fit a raw SVI smile per expiry of one underlying of IN (volsweep.fit_smiles) "
            "and draw, per expiry, the market bid/ask vols as bars, the mid vols and the "
            "fitted smile, with arbitrage marked, and a panel of the at-the-money term "
            "structure.  Needs matplotlib: pip install 'volsweep[plot]'.", 88),
        epilog=_EPILOG)
    p.add_argument("input", metavar="IN",
                   help="Parquet file or folder, Arrow IPC file or stream, or .csv file")
    p.add_argument("--underlying", required=True, metavar="NAME",
                   help="the value of the 'underlying' column to draw")
    p.add_argument("-o", "--output", required=True, metavar="PICTURE",
                   help="image file; its format from the name (.png, .svg, .pdf)")
    p.add_argument("--overwrite", action="store_true", help="replace PICTURE if it exists")
    p.add_argument("--arbitrage-free", action="store_true",
                   help="keep every slice free of butterfly arbitrage (fit_smiles' "
                   "arbitrage_free=True)")
    p.add_argument("--expiries", type=int, default=12, metavar="N",
                   help="draw the first N expiries (default: %(default)s; the term-structure "
                   "panel shows them all)")
    p.add_argument("--fits", metavar="OUT", help="also write the fitted slices to OUT "
                   "(.parquet, .csv, .csv.gz, .arrow)")
    _model_arg(p)
    _map_args(p)
    p.set_defaults(func=cmd_smile)


def _rows_of(source, name: str) -> pa.Table:
    """The rows of ``source`` whose 'underlying' is ``name``, batch by batch."""
    from .cli import CliError

    if "underlying" not in source.schema.names:
        raise CliError("IN has no 'underlying' column")
    kept = []
    for batch in source.batches():
        col = batch.column(batch.schema.get_field_index("underlying"))
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        mask = pc.fill_null(pc.equal(col, pa.scalar(name, col.type)), False)
        if pc.any(mask).as_py():
            kept.append(batch.filter(mask))
    if not kept:
        raise CliError(f"IN has no rows with underlying {name!r}")
    return pa.Table.from_batches(kept, schema=source.schema)


def cmd_smile(args) -> int:
    from .atomic_parquet import AtomicWriter, check_output
    from .cli import CliError, _mapping, _planned
    from .file_errors import StreamError
    from .input_files import open_input
    from .plot_smile import PlotUnavailable, _pyplot, draw_smiles
    from .smiles import fit_smiles
    from .api import implied_vol

    try:
        _pyplot()                                 # before any work: is matplotlib there?
    except PlotUnavailable as exc:
        raise CliError(str(exc)) from None
    if os.path.isdir(args.output):
        raise CliError(f"{args.output} is a directory; give a file name for the picture")
    if os.path.exists(args.output) and not args.overwrite:
        raise CliError(f"{args.output} exists (use --overwrite)")
    if args.fits:
        check_output(args.fits, args.overwrite)
    columns = _mapping(args.map)
    t0 = time.perf_counter()
    try:
        source = open_input(args.input)
    except StreamError as exc:
        raise CliError(str(exc)) from None
    rows = _rows_of(source, args.underlying)
    iv_col = columns.get("iv", "iv")
    if iv_col not in rows.column_names:
        quote_cols = {k: v for k, v in columns.items()
                      if k not in ("iv", "iv_bid", "iv_ask", "status")}
        names = rows.column_names
        if "premium" not in quote_cols and "premium" in names and \
                quote_cols.get("bid", "bid") in names and quote_cols.get("ask", "ask") in names:
            quote_cols["premium"] = None    # both quotes: the bid/ask vols draw the bars
        rows = _planned(implied_vol, rows, model=args.model, columns=quote_cols or None,
                        as_of=args.as_of)
        columns = {k: v for k, v in columns.items() if k in ("forward", "spot", "rate",
                                                            "discount", "div_yield",
                                                            "expiry_years", "expiry",
                                                            "as_of", "strike")}
    by = ("underlying", "expiry")
    fits = fit_smiles(rows, model=args.model, by=by, arbitrage_free=args.arbitrage_free,
                      columns=columns or None, as_of=args.as_of)
    time_key = fits.schema.metadata[b"volsweep.smiles.time"].decode()
    print(f"fitted {fits.num_rows:,d} slices of {args.underlying} from {rows.num_rows:,d} "
          f"rows in {time.perf_counter() - t0:.2f} s", file=sys.stderr)
    counts = pc.value_counts(fits.column("status")).to_pylist()
    print("slices: " + ", ".join(f"{c['values']} {c['counts']}" for c in counts),
          file=sys.stderr)
    flagged = [(name, int(pc.sum(fits.column(name)).as_py() or 0))
               for name in ("butterfly_arbitrage", "calendar_arbitrage")]
    print("arbitrage flags: " + ", ".join(f"{n} {c}" for n, c in flagged), file=sys.stderr)
    if args.expiries < 1:
        raise CliError(f"--expiries must be >= 1, got {args.expiries}")
    n_ok = int(pc.sum(pc.equal(fits.column("status"), "ok")).as_py() or 0)
    shown = min(args.expiries, n_ok)
    draw_smiles(rows, fits, args.output, time_key=time_key, max_expiries=shown,
                title=f"{args.underlying}: raw SVI smiles, {shown} of {n_ok} fitted "
                "expiries (model values, not advice)")
    print(f"-> {args.output}", file=sys.stderr)
    if args.fits:
        with AtomicWriter(args.fits, fits.schema) as w:
            w.write(fits)
            w.commit()
        print(f"-> {args.fits}", file=sys.stderr)
    return 0
