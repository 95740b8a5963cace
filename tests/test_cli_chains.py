"""Command line of the chain operations: volsweep forwards / variance against the Python
functions on the same file, the attach pass, CSV and IPC, and the one-line errors.

These compare the command line with our own Python functions (the operations' accuracy
against outside references is in tests/test_chains.py)."""

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest

import volsweep
from volsweep import data_gen
from volsweep.cli import main


@pytest.fixture(scope="module")
def snap_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("chains") / "snap.parquet"
    snap = data_gen.make_snapshot(n_rows=20_000, n_underlyings=8, seed=5, hidden_carry=True)
    data_gen.write_snapshot(snap, path, row_group_size=3_000)   # groups span row groups
    return path


def _py_equal(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas and values, NaN equal to NaN."""
    if a.schema.remove_metadata() != b.schema.remove_metadata():
        return False
    for x, y in zip(a.columns, b.columns):
        x, y = x.combine_chunks(), y.combine_chunks()
        if pa.types.is_floating(x.type):
            if not (x.is_null().equals(y.is_null()) and np.array_equal(
                    x.fill_null(0).to_numpy(), y.fill_null(0).to_numpy(), equal_nan=True)):
                return False
        elif x.to_pylist() != y.to_pylist():
            return False
    return True


def test_forwards_file_equals_the_function(snap_file, tmp_path, capsys):
    out = tmp_path / "f.parquet"
    assert main(["forwards", str(snap_file), "-o", str(out), "--quotes", "bid-ask",
                 "--batch-rows", "1000"]) == 0
    ref = volsweep.implied_forwards(pq.read_table(snap_file), quotes="bid-ask")
    got = pq.read_table(out)
    assert _py_equal(got, ref)
    err = capsys.readouterr().err
    assert "groups" in err and "ok" in err


def test_forwards_attach_streams_every_row(snap_file, tmp_path):
    out = tmp_path / "a.arrow"
    assert main(["forwards", str(snap_file), "-o", str(out), "--attach",
                 "--drop-columns", "forward", "--batch-rows", "777"]) == 0
    src = pq.read_table(snap_file).drop_columns(["forward"])
    ref = volsweep.implied_forwards(src, attach=True)
    got = feather.read_table(out)
    assert got.column_names == src.column_names + ["forward", "forward_status"]
    assert _py_equal(got, ref)


def test_forwards_attach_refuses_a_clashing_column(snap_file, tmp_path, capsys):
    out = tmp_path / "clash.parquet"
    assert main(["forwards", str(snap_file), "-o", str(out), "--attach"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'forward'" in err[0]
    assert not out.exists()


def test_variance_and_horizons_csv(snap_file, tmp_path):
    out = tmp_path / "v.csv"
    assert main(["variance", str(snap_file), "-o", str(out)]) == 0
    ref = volsweep.model_free_variance(pq.read_table(snap_file))
    got = pcsv.read_csv(out)
    assert got.num_rows == ref.num_rows
    assert got["status"].to_pylist() == ref["status"].to_pylist()
    v, r = (np.asarray(t["variance"].to_pylist(), float) for t in (got, ref))
    assert np.array_equal(v, r, equal_nan=True)       # shortest round-trip text
    out2 = tmp_path / "h.parquet"
    assert main(["variance", str(snap_file), "-o", str(out2), "--days", "30,91",
                 "--extrapolate"]) == 0
    ref2 = volsweep.constant_maturity_variance(ref, days=[30, 91], extrapolate=True)
    assert _py_equal(pq.read_table(out2), ref2)


def test_map_and_by_errors_are_one_line(snap_file, tmp_path, capsys):
    out = tmp_path / "x.parquet"
    assert main(["forwards", str(snap_file), "-o", str(out), "--map", "strike=K"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--map" in err[0] and "'K'" in err[0]
    assert main(["variance", str(snap_file), "-o", str(out), "--by", "underlying,day"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'day'" in err[0]
