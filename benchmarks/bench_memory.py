"""Peak memory of table-level calls: peak RSS against the size of inputs plus outputs.

Each call runs in its own child process (peak RSS is a per-process high-water mark): the
child loads the kernels with a small warm-up call, records its resident size, builds the
input table from numpy (zero-copy into Arrow), makes one call on it and reports

    ratio = (peak RSS - RSS before the inputs existed) / (input bytes + output bytes)

A ratio near 1 means no copies beyond the result itself; the target is about 2 or less.

    .venv/bin/python benchmarks/bench_memory.py            # 10M rows
    .venv/bin/python benchmarks/bench_memory.py --rows 2000000 --only price sweep
"""

import argparse
import json
import os
import subprocess
import sys
import textwrap

CALLS = {  # name -> (call on table t, input columns)
    "price": ("volsweep.price(t)", "spot strike expiry_years rate div_yield vol is_call"),
    "implied_vol (premium)": ("volsweep.implied_vol(t)",
                              "spot strike expiry_years rate div_yield is_call premium"),
    "implied_vol (bid/ask)": ("volsweep.implied_vol(t)",
                              "spot strike expiry_years rate div_yield is_call bid ask"),
    "greeks (all 16)": ("volsweep.greeks(t)",
                        "spot strike expiry_years rate div_yield vol is_call"),
    "greeks (delta, vega)": ("volsweep.greeks(t, which=['delta', 'vega'])",
                             "spot strike expiry_years rate div_yield vol is_call"),
    "sweep (iv + all 16)": ("volsweep.sweep(t)",
                            "spot strike expiry_years rate div_yield is_call premium"),
}

_CHILD = textwrap.dedent("""
    import gc, json, sys
    import numpy as np, pyarrow as pa
    import volsweep

    def status(key):  # bytes, from /proc/self/status
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) * 1024

    def reset_peak():  # Linux >= 4.0: writing 5 to clear_refs resets VmHWM to VmRSS
        try:
            with open("/proc/self/clear_refs", "w") as f:
                f.write("5")
            return True
        except OSError:
            return False

    def table(n, cols, seed=1):
        rng = np.random.default_rng(seed)
        spot = rng.uniform(50.0, 150.0, n)
        strike = spot * rng.uniform(0.7, 1.3, n)
        is_call = rng.random(n) < 0.5
        data = {"spot": spot, "strike": strike, "is_call": is_call}
        for c in cols:
            if c in ("premium", "bid", "ask"):
                prem = np.where(is_call, np.maximum(spot - strike, 0),
                                np.maximum(strike - spot, 0)) + spot * rng.uniform(0.01, 0.1, n)
                data[c] = prem * {"premium": 1.0, "bid": 0.99, "ask": 1.01}[c]
            elif c not in data:
                lo, hi = {"expiry_years": (0.05, 2.0), "rate": (0.0, 0.06),
                          "div_yield": (0.0, 0.03), "vol": (0.1, 0.6)}[c]
                data[c] = rng.uniform(lo, hi, n)
        return pa.table({c: data[c] for c in cols})

    n, expr, cols = int(sys.argv[1]), sys.argv[2], sys.argv[3].split()
    t = table(1000, cols)
    eval(expr)  # load the compiled kernels
    del t
    gc.collect()
    base = status("VmRSS")
    t = table(n, cols)
    gc.collect()
    with_inputs = status("VmRSS")
    exact = reset_peak()
    out = eval(expr)
    peak = status("VmHWM")
    out_bytes = out.nbytes - out.select(cols).nbytes
    print(json.dumps({"rows": n, "input_bytes": t.nbytes, "output_bytes": out_bytes,
                      "base_rss": base, "rss_with_inputs": with_inputs, "peak": peak,
                      "peak_reset": exact}))
""")


def measure(rows: int, expr: str, cols: str) -> dict:
    r = subprocess.run([sys.executable, "-c", _CHILD, str(rows), expr, cols],
                       capture_output=True,
                       text=True, env=dict(os.environ))
    if r.returncode != 0:
        raise RuntimeError(f"child failed ({r.returncode}): {r.stderr[-2000:]}")
    m = json.loads(r.stdout.strip().splitlines()[-1])
    used = m["peak"] - m["base_rss"]
    m["ratio"] = used / (m["input_bytes"] + m["output_bytes"])
    return m


def main(rows: int = 10_000_000, only=None) -> int:
    print(f"Peak memory of one table-level call, {rows:,d} rows (child process per call)")
    print(f"  {'call':<24s}{'inputs':>10s}{'outputs':>10s}{'peak - base':>13s}{'ratio':>8s}")
    worst = 0.0
    for name, (expr, cols) in CALLS.items():
        if only and not any(o in name for o in only):
            continue
        m = measure(rows, expr, cols)
        if not m["peak_reset"]:
            print("  (peak RSS could not be reset: it includes building the inputs)")
        worst = max(worst, m["ratio"])
        mib = 1 << 20
        print(f"  {name:<24s}{m['input_bytes'] / mib:8.0f} M{m['output_bytes'] / mib:8.0f} M"
              f"{(m['peak'] - m['base_rss']) / mib:11.0f} M{m['ratio']:8.2f}")
    print(f"  worst ratio {worst:.2f} (MiB; ratio = extra peak RSS / (inputs + outputs))")
    return 0


if __name__ == "__main__":
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=10_000_000)
    p.add_argument("--only", nargs="*", help="substrings of the call names to run")
    a = p.parse_args()
    sys.exit(main(a.rows, a.only))
