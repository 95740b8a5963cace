"""Command line: ``volsweep <command>`` (also ``python -m volsweep``).

Commands:
  demo                     build a synthetic snapshot in memory, run it, print a summary
  gen -n N -o FILE         write a synthetic snapshot to Parquet
  price IN -o OUT          price every row of a Parquet file (needs a vol column)
  bench                    run the benchmark report
"""

from __future__ import annotations

import argparse
import os
import sys
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
    counts = Counter()
    for t in tables:
        vc = t.column("status").combine_chunks().dictionary_decode().value_counts()
        for item in vc:
            counts[item["values"].as_py()] += item["counts"].as_py()
    total = sum(counts.values()) or 1
    return "\n".join(f"  {name:<20s}{n:>12,d}  {100.0 * n / total:6.2f}%"
                     for name, n in counts.most_common())


def _stream_parquet(src: str, dst: str, overwrite: bool, transform) -> tuple[int, float, list]:
    """Read ``src`` batch by batch, write ``transform(batch)`` to ``dst`` atomically."""
    if os.path.exists(dst) and not overwrite:
        raise CliError(f"{dst} exists (use --overwrite)")
    try:
        reader = pq.ParquetFile(src)
    except (OSError, pa.ArrowException) as exc:
        raise CliError(f"cannot read {src}: {exc}") from None
    tmp = f"{dst}.tmp-{os.getpid()}"
    writer = None
    rows, statuses = 0, []
    t0 = time.perf_counter()
    try:
        for batch in reader.iter_batches(batch_size=1 << 20):
            out = transform(pa.Table.from_batches([batch]))
            if writer is None:
                writer = pq.ParquetWriter(tmp, out.schema)
            writer.write_table(out)
            statuses.append(out.select(["status"]))
            rows += out.num_rows
        if writer is None:  # empty file: still write the output schema
            out = transform(reader.schema_arrow.empty_table())
            writer = pq.ParquetWriter(tmp, out.schema)
        writer.close()
        writer = None
        os.replace(tmp, dst)
    finally:
        if writer is not None:
            writer.close()
        if os.path.exists(tmp):
            os.remove(tmp)
    return rows, time.perf_counter() - t0, statuses


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
        fn(quotes.slice(0, 1000))  # JIT warm-up (loads the cache)
        t0 = time.perf_counter()
        out = fn(quotes)
        dt = time.perf_counter() - t0
        print(f"\n{label}: {snap.num_rows / dt / 1e6:,.1f} M contracts/s")
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
    import volsweep

    cols = _mapping(args.map)
    rows, dt, statuses = _stream_parquet(
        args.input, args.output, args.overwrite,
        lambda t: volsweep.price(t, model=args.model, columns=cols, as_of=args.as_of))
    print(f"priced {rows:,d} rows in {dt:.2f} s -> {args.output}", file=sys.stderr)
    print(_status_summary(statuses), file=sys.stderr)
    return 0


def cmd_bench(args) -> int:
    # benchmarks/ lives beside bindings/ in a source checkout (it is not installed)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    if not os.path.isdir(os.path.join(root, "benchmarks")):
        raise CliError("volsweep bench needs a source checkout (benchmarks/ not found)")
    sys.path.insert(0, root)
    from benchmarks import report

    return report.main(rows=args.rows)


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

    pr = sub.add_parser("price", help="price every row of a Parquet file")
    pr.add_argument("input")
    pr.add_argument("-o", "--output", required=True)
    pr.add_argument("--model", default="bsm", choices=["bsm", "black76"])
    pr.add_argument("--map", action="append", metavar="OURS=THEIRS",
                    help="use column THEIRS for input OURS (repeatable)")
    pr.add_argument("--as-of", help="valuation time when expiries are timestamps")
    pr.add_argument("--overwrite", action="store_true")
    pr.set_defaults(func=cmd_price)

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
    except (ValueError, TypeError) as exc:
        print(f"volsweep: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("volsweep: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
