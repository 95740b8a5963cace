"""Command line: gen, price and demo, and their one-line errors."""

import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from volsweep.cli import main


def _same_values(a: pa.Table, b: pa.Table) -> bool:
    """Table equality with NaN equal to NaN (Table.equals treats NaN as unequal)."""
    if a.schema != b.schema:
        return False
    for x, y in zip(a.columns, b.columns):
        x, y = x.combine_chunks(), y.combine_chunks()
        if pa.types.is_floating(x.type):
            if not (x.is_null().equals(y.is_null())
                    and np.array_equal(x.fill_null(0).to_numpy(), y.fill_null(0).to_numpy(),
                                       equal_nan=True)):
                return False
        elif not x.equals(y):
            return False
    return True


@pytest.fixture(scope="module")
def snap_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("cli") / "snap.parquet"
    assert main(["gen", "-n", "5000", "-o", str(path), "--seed", "3"]) == 0
    return path


def test_gen_writes_requested_rows(snap_file):
    assert pq.read_metadata(snap_file).num_rows == 5000


def test_price_keeps_rows_order_and_columns(snap_file, tmp_path):
    out = tmp_path / "priced.parquet"
    assert main(["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol"]) == 0
    src, res = pq.read_table(snap_file), pq.read_table(out)
    assert res.num_rows == src.num_rows
    assert res.column_names == src.column_names + ["price", "status"]
    assert _same_values(res.select(src.column_names), src)


def test_price_refuses_existing_output_without_overwrite(snap_file, tmp_path, capsys):
    out = tmp_path / "exists.parquet"
    out.write_bytes(b"keep me")
    assert main(["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "exists" in err[0]
    assert out.read_bytes() == b"keep me"
    assert main(["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol",
                 "--overwrite"]) == 0
    assert pq.read_metadata(out).num_rows == 5000


def test_missing_column_is_a_one_line_error_and_no_output(snap_file, tmp_path, capsys):
    out = tmp_path / "none.parquet"
    assert main(["price", str(snap_file), "-o", str(out)]) == 2  # no 'vol' column
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'vol'" in err[0]
    assert not out.exists()
    assert not list(tmp_path.glob("*.tmp-*"))


def test_unreadable_input_is_a_one_line_error(tmp_path, capsys):
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"not parquet")
    assert main(["price", str(bad), "-o", str(tmp_path / "o.parquet")]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_bad_map_argument(snap_file, tmp_path):
    assert main(["price", str(snap_file), "-o", str(tmp_path / "o.parquet"),
                 "--map", "vol"]) == 2


def test_empty_file_gives_empty_output(tmp_path):
    t = pa.table({"spot": pa.array([], pa.float64()), "strike": pa.array([], pa.float64()),
                  "expiry_years": pa.array([], pa.float64()), "rate": pa.array([], pa.float64()),
                  "vol": pa.array([], pa.float64()), "is_call": pa.array([], pa.bool_())})
    src, out = tmp_path / "e.parquet", tmp_path / "eo.parquet"
    pq.write_table(t, src)
    assert main(["price", str(src), "-o", str(out)]) == 0
    res = pq.read_table(out)
    assert res.num_rows == 0 and res.column_names[-2:] == ["price", "status"]


def test_module_entry_point_runs_a_small_demo():
    r = subprocess.run([sys.executable, "-m", "volsweep", "demo", "-n", "20000"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "contracts/s" in r.stdout and "ok" in r.stdout


def test_importing_the_product_does_not_import_benchmarks():
    code = ("import sys, volsweep, volsweep.cli; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] == 'benchmarks'))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"


def test_bench_runs_the_report_as_a_child_process(monkeypatch):
    import os

    calls = []

    def fake_run(cmd, cwd=None, **kw):
        calls.append((cmd, cwd))
        return subprocess.CompletedProcess(cmd, 3)

    monkeypatch.setattr(subprocess, "run", fake_run)
    assert main(["bench", "--rows", "1000"]) == 3          # the report's exit status
    (cmd, cwd), = calls
    assert cmd == [sys.executable, "-m", "benchmarks.report", "--rows", "1000"]
    assert os.path.isfile(os.path.join(cwd, "benchmarks", "report.py"))
