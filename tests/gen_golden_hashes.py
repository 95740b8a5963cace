"""Record the golden output hashes of tests/test_determinism.py for this CPU model:

    .venv/bin/python tests/gen_golden_hashes.py [--only-this-cpu]

The hashes are an extra check per CPU model (the in-test comparisons of
test_determinism.py run on any CPU).  The record of the running CPU model is written or
replaced; the records of other CPU models are kept, unless ``--only-this-cpu`` (use it when
the outputs are meant to change, e.g. a kernel rewrite: the other models' records are then
stale; each is re-added by running this on that model).  Say in the commit message why the
numbers changed.  tests/data/golden_hashes.json keeps per CPU model the volsweep commit,
the library versions and the date.
"""

import argparse
import datetime as dt
import json
import pathlib
import subprocess
import sys

import llvmlite
import numba
import numpy as np
import pyarrow as pa

sys.path.insert(0, str(pathlib.Path(__file__).parent))
from test_determinism import GOLDEN, N_ROWS, SEED, cases, host_cpu, run_case  # noqa: E402

WHAT = "sha256 of the outputs of each operation on test_determinism.golden_inputs()"


def _commit() -> str:
    root = pathlib.Path(__file__).parent.parent
    try:
        head = subprocess.run(["git", "rev-parse", "HEAD"], cwd=root, capture_output=True,
                              text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no", "--",
                                "kernel", "bindings"],
                               cwd=root, capture_output=True, text=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return head + (" (+ uncommitted kernel/bindings changes)" if dirty else "")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only-this-cpu", action="store_true",
                    help="drop the records of other CPU models (outputs meant to change)")
    args = ap.parse_args(argv)
    cpus = {}
    if GOLDEN.exists() and not args.only_this_cpu:
        old = json.loads(GOLDEN.read_text())
        if old.get("rows") == N_ROWS and old.get("seed") == SEED:
            cpus = old.get("cpus", {})
    cpus[host_cpu()] = {
        "commit": _commit(),
        "generated": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "versions": {"numba": numba.__version__, "llvmlite": llvmlite.__version__,
                     "numpy": np.__version__, "pyarrow": pa.__version__,
                     "python": sys.version.split()[0]},
        "hashes": {name: run_case(name) for name in cases()},
    }
    record = {"what": WHAT, "rows": N_ROWS, "seed": SEED,
              "cpus": dict(sorted(cpus.items()))}
    GOLDEN.parent.mkdir(exist_ok=True)
    GOLDEN.write_text(json.dumps(record, indent=2) + "\n")
    print(f"wrote {len(cases())} hashes for {host_cpu()!r} to {GOLDEN} "
          f"(records: {', '.join(record['cpus'])})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
