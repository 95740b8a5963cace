"""Command line: gen, price and demo, and their one-line errors."""

import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.feather as feather
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
    # the printed rates say what they are: table-level, after an untimed first call,
    # and how they relate to the README's kernel-level figures
    flat = " ".join(r.stdout.split())
    assert "Table-level calls" in flat and "after one untimed call" in flat
    assert "kernel-level" in flat


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


def _error(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("volsweep: error: "), err
    return err[0]


def test_errors_name_the_flags_typed_not_python_arguments(snap_file, tmp_path, capsys):
    out = str(tmp_path / "o.parquet")
    price = ["price", str(snap_file), "-o", out, "--map", "vol=true_vol"]
    cases = [
        (price + ["--map", "strik=K"], "--map names an unknown input 'strik'"),
        (price + ["--map", "strike=K"], "--map gives column 'K' for 'strike'"),
        (price + ["--map", "forward=forward"], "--map gives column 'forward' for 'forward', "
                                               "which model 'bsm' does not read"),
        (price + ["--map", "expiry=expiry", "--map", "expiry_years=", "--map", "as_of="],
         "give --as-of a time or a column name"),
        (price + ["--map", "expiry=expiry", "--as-of", "soon"],
         "--as-of 'soon' is neither a column"),
        (["sweep", str(snap_file), "-o", out], "choose the quote to invert with --quotes"),
        (["sweep", str(snap_file), "-o", out, "--quotes", "premium", "--keep-columns", "x"],
         "--keep-columns names column 'x'"),
        (["gen", "-n", "-5", "-o", out], "-n/--rows must be >= 0"),
        (["demo", "-n", "0"], "-n/--rows must be >= 1"),
    ]
    for argv, words in cases:
        assert main(argv) == 2, argv
        err = _error(capsys)
        assert words in err, (argv, err)
        assert "columns=" not in err and "as_of=" not in err and "n_rows" not in err


def test_an_aware_as_of_is_converted_to_utc_without_a_warning(snap_file, tmp_path, capsys):
    # the rule (README): an ISO time with a zone is that instant in UTC; one without a
    # zone is UTC.  Source of truth: the same instant written in UTC, same command.
    import warnings

    outs = []
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for k, as_of in enumerate(["2031-03-14T20:00:00", "2031-03-14T21:00:00+01:00",
                                   "2031-03-14T15:00-05:00", "2031-03-14T20:00Z"]):
            out = tmp_path / f"o{k}.parquet"
            assert main(["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol",
                         "--map", "expiry=expiry", "--as-of", as_of]) == 0
            outs.append(pq.read_table(out).column("price"))
    assert "Warning" not in capsys.readouterr().err
    assert all(o.equals(outs[0]) for o in outs[1:])
    assert outs[0].null_count < len(outs[0])


def test_an_extra_input_the_model_does_not_read_is_said_on_stderr(snap_file, tmp_path,
                                                                    capsys):
    # the snapshot has spot, forward and div_yield; Black-76 reads the forward alone
    out = tmp_path / "o.parquet"
    argv = ["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol", "--model",
            "black76"]
    assert main(argv) == 0
    warned = [ln for ln in capsys.readouterr().err.splitlines() if "warning" in ln]
    assert warned == ["volsweep: warning: column 'div_yield' is not read: model 'black76' has "
                      "no input 'div_yield' (model 'bsm' has); map it to no column to say "
                      "so (--map div_yield=)"]
    assert main(argv + ["--overwrite", "--map", "div_yield="]) == 0
    assert "warning" not in capsys.readouterr().err


@pytest.mark.parametrize("name, read", [
    ("o.parquet", pq.read_table),
    ("o.csv", lambda p: pcsv.read_csv(p)),
    ("o.csv.gz", lambda p: pcsv.read_csv(p)),
    ("o.arrow", lambda p: pa.ipc.open_file(p).read_all()),
    ("o.feather", lambda p: feather.read_table(p)),
    ("o.IPC", lambda p: pa.ipc.open_file(p).read_all()),
])
def test_output_format_follows_the_name(snap_file, tmp_path, name, read):
    # source of truth: the Parquet output of the same command (floats round-trip through
    # CSV text: Arrow writes the shortest decimal that reads back to the same double)
    ref = tmp_path / "ref.parquet"
    argv = ["price", str(snap_file), "--map", "vol=true_vol", "--batch-rows", "700"]
    assert main(argv + ["-o", str(ref)]) == 0
    assert main(argv + ["-o", str(tmp_path / name)]) == 0
    got, want = read(str(tmp_path / name)), pq.read_table(ref)
    assert got.num_rows == want.num_rows == 5000
    for col in ("strike", "price"):
        a = got.column(col).to_numpy()
        assert np.array_equal(a, want.column(col).to_numpy(), equal_nan=True), col
    assert got.column("status").to_pylist() == want.column("status").to_pylist()
    assert not list(tmp_path.glob(".*tmp-*"))


def test_an_output_name_of_no_known_format_is_refused(snap_file, tmp_path, capsys):
    for name in ("o.txt", "o", "o.json"):
        out = tmp_path / name
        assert main(["price", str(snap_file), "-o", str(out), "--map", "vol=true_vol"]) == 2
        assert "cannot tell the format" in _error(capsys)
        assert not out.exists()
    assert main(["gen", "-n", "10", "-o", str(tmp_path / "g.xlsx")]) == 2
    assert "cannot tell the format" in _error(capsys)


def test_gen_writes_the_format_its_name_says(tmp_path):
    assert main(["gen", "-n", "300", "-o", str(tmp_path / "g.csv")]) == 0
    assert pcsv.read_csv(tmp_path / "g.csv").num_rows == 300


def test_vols_above_the_plausibility_bound_are_counted(tmp_path, capsys):
    # a vol of 20 meant as 20%: computed as given, and counted in the summary
    t = pa.table({"spot": [100.0] * 4, "strike": [100.0] * 4, "expiry_years": [1.0] * 4,
                  "rate": [0.0] * 4, "is_call": [True] * 4, "vol": [0.2, 20.0, 5.0, 5.5]})
    src, out = tmp_path / "v.parquet", tmp_path / "p.parquet"
    pq.write_table(t, src)
    assert main(["price", str(src), "-o", str(out)]) == 0
    err = capsys.readouterr().err
    assert "2 rows with 'vol' above 5 (500% a year)" in err
    assert pq.read_table(out).column("status").to_pylist() == ["ok"] * 4
    # implied vols: with r = q = 0 an at-the-money call is worth S (2 N(s/2) - 1), s the
    # total vol (published closed form), so a premium of 99 on S = 100 is a vol of
    # 2 N^-1(0.995) = 5.15 and 90 one of 3.29 (scipy.stats.norm.ppf)
    q = t.drop_columns(["vol"]).append_column("premium", pa.array([10.0, 99.0, 90.0, 99.5]))
    pq.write_table(q, src)
    assert main(["sweep", str(src), "-o", str(out), "--overwrite", "--greeks", "none"]) == 0
    assert "2 rows with 'iv' above 5" in capsys.readouterr().err
    iv = pq.read_table(out).column("iv").to_pylist()
    assert iv[1] == pytest.approx(5.1517, abs=1e-3) and iv[2] == pytest.approx(3.2897, abs=1e-3)
