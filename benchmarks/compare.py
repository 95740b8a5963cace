"""Before/after: the same benchmark cases on two checkouts, taking turns round by round.

    .venv/bin/python -m benchmarks.compare BEFORE_ROOT [--after ROOT] [--sections small,kernel]
        [--rows N] [--rounds R] [--small-rounds R] [--calls C]

Each checkout runs in its own long-lived child process (its ``ROOT/.venv/bin/python``, with
volsweep installed editable from that checkout), importing these benchmark cases
(``benchmarks._cases``) from this checkout, so both sides run the same benchmark code
against their own volsweep.  Each round every child times each of its cases once, one
child after the other (the first alternates from round to round, with a pause between
turns so neither sees the other's threads still spinning); the figures are medians over
rounds.  The machines are shared and noisy: read the ratios.

Sections:

* ``small``: table-level call against the discount factors + kernel into fresh outputs on
  the same columns (100 and 10,000 rows; ``calls`` calls per timing), per model and
  operation (price, implied vol, sweep), with numba at 1 and at 2 threads (on a busy
  2-core machine a parallel launch can wait milliseconds for its second thread); the
  overhead above the kernel in microseconds;
* ``quotes``: table-level implied vols of bid/ask quotes (the one-pass kernel after, three
  implied-vol passes, a vega pass and the quote statuses in numpy before), per model;
* ``kernel``: section 1 of the report (kernel throughput, 1 and 2 threads, every model,
  bid/ask one pass against three implied-vol passes and a vega pass).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SMALL_SIZES = (100, 10_000)


# ---------------------------------------------------------------- child side

def _setup(msg) -> dict:
    import numba

    from benchmarks import _cases

    runs = {}
    for spec in _cases.models().values():
        if msg["section"] == "kernel":
            d = _cases.make_data(msg["rows"])
            for case, fn in _cases.kernel_runs(spec, d).items():
                runs[f"{spec.name} {case}"] = fn
        elif msg["section"] == "quotes":
            snap, _ = _cases.snapshot(msg["rows"], quote="bid_ask")
            import volsweep
            runs[f"{spec.name} implied_vol"] = (
                lambda snap=snap, name=spec.name: volsweep.implied_vol(snap, model=name))
        else:
            for n in msg["sizes"]:
                snap, col = _cases.snapshot(n)
                for case, fn in _cases.repeated(_cases.table_runs(spec, snap, col),
                                                msg["calls"]).items():
                    runs[f"{spec.name} {n} {case}"] = fn
    for fn in runs.values():
        fn()                      # compile or load from the cache, outside the timing
    import volsweep
    return {"cases": list(runs), "volsweep": os.path.dirname(volsweep.__file__),
            "threads": numba.config.NUMBA_NUM_THREADS}, runs


def child() -> None:
    """Serve one JSON request per stdin line: setup, threads, round, quit."""
    import numba

    runs = {}
    for line in sys.stdin:
        msg = json.loads(line)
        if msg["op"] == "setup":
            reply, runs = _setup(msg)
        elif msg["op"] == "threads":
            numba.set_num_threads(msg["n"])
            reply = {}
        elif msg["op"] == "round":
            reply = {}
            for key, fn in runs.items():
                t0 = time.perf_counter()
                fn()
                reply[key] = time.perf_counter() - t0
        else:
            return
        print(json.dumps(reply), flush=True)


# ---------------------------------------------------------------- parent side

class Checkout:
    """A child process running ``child()`` with the volsweep of checkout ``root``."""

    def __init__(self, label: str, root: str):
        self.label, self.root = label, os.path.abspath(root)
        python = os.path.join(self.root, ".venv", "bin", "python")
        env = dict(os.environ)
        env.setdefault("NUMBA_CACHE_DIR", os.path.expanduser("~/.cache/volsweep/numba"))
        env["PYTHONPATH"] = ROOT          # this checkout's benchmarks, their volsweep
        self.proc = subprocess.Popen([python, "-c", "from benchmarks.compare import child; "
                                      "child()"], cwd=ROOT, env=env, stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True)

    def ask(self, **msg) -> dict:
        self.proc.stdin.write(json.dumps(msg) + "\n")
        self.proc.stdin.flush()
        line = self.proc.stdout.readline()
        if not line:
            raise RuntimeError(f"the {self.label} child ({self.root}) exited")
        return json.loads(line)

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.stdin.write(json.dumps({"op": "quit"}) + "\n")
            self.proc.stdin.close()
            self.proc.wait()


def take_turns(sides, rounds: int, pause: float = 0.02) -> list:
    """Per side, {case: [seconds per round]} over ``rounds`` rounds, the sides taking turns."""
    times = [dict() for _ in sides]
    for r in range(rounds):
        print(f"\r  round {r + 1}/{rounds}", end="", file=sys.stderr, flush=True)
        order = range(len(sides)) if r % 2 == 0 else reversed(range(len(sides)))
        for i in order:
            time.sleep(pause)
            for key, t in sides[i].ask(op="round").items():
                times[i].setdefault(key, []).append(t)
    print(file=sys.stderr)
    return times


def medians(times) -> list:
    return [{k: statistics.median(v) for k, v in t.items()} for t in times]


def paired_speedup(times, key) -> float | None:
    """The median over rounds of (first side's time / last side's time) in the same round:
    the last side's speed relative to the first, each round compared with itself, so that
    the drift of a shared machine from round to round cancels."""
    if key not in times[0] or key not in times[-1]:
        return None
    return statistics.median(b / a for b, a in zip(times[0][key], times[-1][key]))


def rounds_per_thread_count(sides, threads, rounds: int):
    """(threads, the raw times of ``take_turns``) for each numba thread count."""
    for th in threads:
        for side in sides:
            side.ask(op="threads", n=th)
        yield th, take_turns(sides, rounds)


def _start(sides, **setup) -> None:
    for side in sides:
        info = side.ask(op="setup", **setup)
        print(f"  {side.label}: volsweep from {info['volsweep']}, {len(info['cases'])} cases")


def small_section(sides, rounds: int, calls: int, sizes=SMALL_SIZES, threads=(1, 2)) -> dict:
    """Microseconds per call: {(model, n, op, threads): [(table, kernel) per side]}."""
    print(f"\nSmall batches, {' against '.join(s.label for s in sides)} taking turns "
          f"({rounds} rounds of {calls} calls; microseconds per call, median)")
    _start(sides, section="small", sizes=list(sizes), calls=calls)
    found, best = {}, {}
    for th, raw in rounds_per_thread_count(sides, threads, rounds):
        med = medians(raw)
        least = [{k: min(v) for k, v in t.items()} for t in raw]
        for key in med[0]:
            if key.endswith(" kernel"):
                continue
            model, n, op = key.split(" ", 2)
            found[(model, int(n), op, th)] = [
                (t[key] / calls * 1e6, t[key + " kernel"] / calls * 1e6) if key in t else None
                for t in med]
            best[(model, int(n), op, th)] = [
                (t[key] - t[key + " kernel"]) / calls * 1e6 if key in t else None
                for t in least]
    labels = [s.label for s in sides]
    print(f"  {'model':8s} {'rows':>6s} {'op':12s} {'thr':>3s} "
          + " ".join(f"{lab + ' table':>14s} {'kernel':>7s} {'above':>7s}" for lab in labels)
          + "   above: after - before")
    for (model, n, op, th), per in found.items():
        cells = " ".join("" if v is None else f"{v[0]:14.1f} {v[1]:7.1f} {v[0] - v[1]:7.1f}"
                         for v in per)
        delta = ("" if None in per else
                 f"   {(per[-1][0] - per[-1][1]) - (per[0][0] - per[0][1]):+7.1f}")
        print(f"  {model:8s} {n:>6,d} {op:12s} {th:>3d} {cells}{delta}")
    print("  best round (least time of any round, table and kernel each; microseconds above "
          "the kernel): " + "; ".join(
              f"{model} {n} {op} {th}t " + " -> ".join(f"{v:.1f}" for v in per if v is not None)
              for (model, n, op, th), per in best.items()))
    return found


def kernel_section(sides, rows: int, rounds: int, threads=(1, 2)) -> dict:
    """Contracts/s: {(model, threads, case): [per side, None where a side lacks it]}."""
    print(f"\nKernels, {rows:,} rows, {' against '.join(s.label for s in sides)} taking "
          f"turns ({rounds} rounds; M contracts/s, median)")
    _start(sides, section="kernel", rows=rows)
    found, paired = {}, {}
    for th, raw in rounds_per_thread_count(sides, threads, rounds):
        med = medians(raw)
        for key in dict.fromkeys(k for t in med for k in t):
            model, case = key.split(" ", 1)
            found[(model, th, case)] = [rows / t[key] if key in t else None for t in med]
            paired[(model, th, case)] = paired_speedup(raw, key)
    labels = [s.label for s in sides]
    print(f"  {'model':8s} {'thr':>3s} {'case':12s} "
          + " ".join(f"{lab:>8s}" for lab in labels) + f"  {labels[-1]}/{labels[0]}"
          "  paired by round")
    for (model, th, case), per in found.items():
        cells = " ".join("       -" if v is None else f"{v / 1e6:8.1f}" for v in per)
        ratio = ("" if None in per else
                 f"  {per[-1] / per[0]:12.3f}  {paired[(model, th, case)]:15.3f}")
        print(f"  {model:8s} {th:>3d} {case:12s} {cells}{ratio}")
    for model in dict.fromkeys(m for m, _, _ in found):
        for th in threads:
            one, old = found.get((model, th, "bid/ask")), found.get((model, th, "bid/ask 3+1"))
            if one and old and one[-1] and old[-1]:
                print(f"  {model} {th} thread(s): bid/ask in one pass {one[-1] / 1e6:.1f} M/s "
                      f"against 3 iv passes + a vega pass {old[-1] / 1e6:.1f} M/s: "
                      f"x{one[-1] / old[-1]:.2f}")
    return found


def quotes_section(sides, rows: int, rounds: int, threads=(1, 2)) -> dict:
    """Table-level ``implied_vol`` on bid/ask quotes: {model: [contracts/s per side]}."""
    print(f"\nBid/ask quotes, table-level implied_vol (iv of bid, ask, mid, spread "
          f"uncertainty, statuses), {rows:,} rows, {' against '.join(s.label for s in sides)} "
          f"taking turns ({rounds} rounds; M contracts/s, median)")
    _start(sides, section="quotes", rows=rows)
    found = {}
    for th, raw in rounds_per_thread_count(sides, threads, rounds):
        med = medians(raw)
        for key in med[0]:
            found[(key.split(" ")[0], th)] = [rows / t[key] for t in med] + [
                paired_speedup(raw, key)]
    for (model, th), per in found.items():
        print(f"  {model:8s} {th} thread(s): " + "  ".join(
            f"{s.label} {v / 1e6:6.1f}" for s, v in zip(sides, per))
            + f"   {sides[-1].label}/{sides[0].label} {per[1] / per[0]:.3f} (paired by "
            f"round: {per[2]:.3f})")
    return found


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("before", help="checkout to compare against (with its own .venv)")
    ap.add_argument("--after", default=ROOT, help="checkout measured as 'after' (default: "
                    "this one)")
    ap.add_argument("--sections", default="small,kernel,quotes")
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--rounds", type=int, default=15)
    ap.add_argument("--small-rounds", type=int, default=60)
    ap.add_argument("--calls", type=int, default=20)
    ap.add_argument("--small-threads", default="1,2", help="numba threads of the small "
                    "section, comma-separated")
    ap.add_argument("--quote-rows", type=int, default=500_000)
    ap.add_argument("--kernel-threads", default="1,2", help="numba threads of the kernel "
                    "and quotes sections, comma-separated")
    args = ap.parse_args(argv)
    print(f"volsweep before/after, {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    for label, root in (("before", args.before), ("after", args.after)):
        head = subprocess.run(["git", "-C", root, "log", "-1", "--format=%h %s"],
                              capture_output=True, text=True).stdout.strip()
        print(f"  {label}: {os.path.abspath(root)} at {head[:90]}")
    for section in args.sections.split(","):
        sides = [Checkout("before", args.before), Checkout("after", args.after)]
        try:
            if section == "small":
                small_section(sides, args.small_rounds, args.calls,
                              threads=[int(t) for t in args.small_threads.split(",")])
            elif section == "quotes":
                quotes_section(sides, args.quote_rows, args.rounds,
                               threads=[int(t) for t in args.kernel_threads.split(",")])
            elif section == "kernel":
                kernel_section(sides, args.rows, args.rounds,
                               threads=[int(t) for t in args.kernel_threads.split(",")])
            else:
                raise SystemExit(f"unknown section {section!r}")
        finally:
            for side in sides:
                side.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
