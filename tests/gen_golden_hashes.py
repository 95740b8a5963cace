"""Record the golden output hashes of tests/test_determinism.py (one command):

    .venv/bin/python tests/gen_golden_hashes.py

Run it only when outputs are meant to change (a kernel rewrite), on the machine type CI
uses, and say in the commit message why the numbers changed.  It writes
tests/data/golden_hashes.json with the volsweep commit, the library versions and the CPU.
"""

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


def main() -> int:
    hashes = {name: run_case(name) for name in cases()}
    record = {
        "what": "sha256 of the outputs of each operation on test_determinism.golden_inputs()",
        "rows": N_ROWS, "seed": SEED,
        "commit": _commit(),
        "generated": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "versions": {"numba": numba.__version__, "llvmlite": llvmlite.__version__,
                     "numpy": np.__version__, "pyarrow": pa.__version__,
                     "python": sys.version.split()[0]},
        "host_cpu": host_cpu(),
        "hashes": hashes,
    }
    GOLDEN.parent.mkdir(exist_ok=True)
    GOLDEN.write_text(json.dumps(record, indent=2) + "\n")
    print(f"wrote {len(hashes)} hashes to {GOLDEN}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
