"""Group operations on the Dask backfill (forwards, variance, smiles): the same results as
the single-process functions, idempotent re-runs, a worker killed mid-run, forwards of a
synthetic history against the forwards it was made from, and the research view."""

import datetime as dt
import importlib
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

import volsweep
from volsweep.cli import main
from volsweep.data_gen import write_history

bf = importlib.import_module("volsweep.dask_backfill")
distributed = pytest.importorskip("distributed")
pytestmark = pytest.mark.dask

from test_backfill import backfill_killing_a_worker  # noqa: E402
from test_stream import assert_bits_equal  # noqa: E402

DATES = [dt.date(2031, 3, 10) + dt.timedelta(days=d) for d in range(5)]
OPERATIONS = ("forwards", "variance", "smiles")


def _history(root, rows=6000, n=10):
    return write_history(root, DATES, rows_per_day=rows, seed=11, n_underlyings=n,
                         row_group_size=2500, hidden_carry=True)


def _parts(dst):
    return sorted(os.path.join(d, f) for d, _, fs in os.walk(dst) for f in fs)


def _single_process(path, operation):
    """The reference: the public functions on the partition's rows, in this process
    (the smiles pipeline written out here step by step, as the README describes it)."""
    t = pq.read_table(path)
    if operation == "forwards":
        return volsweep.implied_forwards(t)
    if operation == "variance":
        return volsweep.model_free_variance(t)
    t = t.drop_columns(["forward", "spot", "div_yield", "premium"])
    chain = volsweep.implied_forwards(t, quotes="bid-ask", attach=True)
    vols = volsweep.implied_vol(chain, model="black76")
    return volsweep.fit_smiles(vols, model="black76")


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Each group operation backfilled on a 2-worker LocalCluster, then run again."""
    tmp = tmp_path_factory.mktemp("bfg")
    src = tmp / "src"
    paths = _history(src)
    for op in OPERATIONS:                       # compile or load in this process first
        _single_process(paths[0], op)
    out = dict(src=str(src), paths=paths)
    for op in OPERATIONS:
        dst = tmp / op
        res = bf.backfill(src, dst, operation=op, n_workers=2)
        mtimes = {p: os.stat(p).st_mtime_ns for p in _parts(dst)}
        again = bf.backfill(src, dst, operation=op, n_workers=2)
        out[op] = dict(dst=str(dst), res=res, again=again, mtimes=mtimes)
    return out


@pytest.mark.parametrize("op", OPERATIONS)
def test_partitions_equal_the_single_process_functions_bit_for_bit(runs, op):
    res = runs[op]["res"]
    assert (res.partitions, res.written, res.skipped) == (len(DATES), len(DATES), 0)
    assert len({pid for pid, _, _ in res.workers}) == 2           # both workers did work
    groups = 0
    for p in runs["paths"]:
        rel = os.path.relpath(os.path.dirname(p), runs["src"])
        got = pq.read_table(os.path.join(runs[op]["dst"], rel, "part-0.parquet"))
        want = _single_process(p, op)
        assert got.num_rows == want.num_rows > 0
        assert_bits_equal(got.replace_schema_metadata(None), want)
        groups += got.num_rows
    assert res.rows_written == groups
    # nothing else in the output: one part per partition, no visible temporary files
    assert [os.path.relpath(p, runs[op]["dst"]) for p in _parts(runs[op]["dst"])] == \
        [os.path.join(os.path.relpath(os.path.dirname(p), runs["src"]), "part-0.parquet")
         for p in runs["paths"]]


@pytest.mark.parametrize("op", OPERATIONS)
def test_rerun_is_a_no_op(runs, op):
    again = runs[op]["again"]
    assert (again.written, again.skipped, again.rows_written) == (0, len(DATES), 0)
    assert {p: os.stat(p).st_mtime_ns for p in _parts(runs[op]["dst"])} == runs[op]["mtimes"]


def test_other_options_recompute_instead_of_skipping(runs, tmp_path):
    src = tmp_path / "src"
    _history(src, rows=2000, n=4)
    first = bf.backfill(src, tmp_path / "f", operation="forwards", n_workers=1)
    again = bf.backfill(src, tmp_path / "f", operation="forwards", n_workers=1,
                        options={"min_pairs": 5})
    assert (first.written, again.written, again.skipped) == (len(DATES), len(DATES), 0)
    assert bf.backfill(src, tmp_path / "f", operation="forwards",
                       options={"min_pairs": 5}).skipped == len(DATES)


def test_worker_killed_mid_run_loses_and_duplicates_nothing(tmp_path):
    src, dst = tmp_path / "src", tmp_path / "dst"
    paths = _history(src)
    res = backfill_killing_a_worker(tmp_path, src, dst, operation="forwards")
    assert res.written + res.skipped == len(DATES) and res.skipped <= 2
    for p in paths:
        rel = os.path.relpath(os.path.dirname(p), src)
        got = pq.read_table(os.path.join(dst, rel, "part-0.parquet"))
        assert_bits_equal(got.replace_schema_metadata(None), _single_process(p, "forwards"))
    assert len(_parts(dst)) == len(DATES)                     # complete, no duplicates
    again = bf.backfill(src, dst, operation="forwards")        # all done: no cluster
    assert (again.written, again.skipped) == (0, len(DATES))


def test_implied_forwards_recover_the_history_s_true_forwards(runs):
    # data_gen records the forward each day's prices were made from (`true_forward`,
    # hidden borrow and cash dividends included).  The quotes' noise (put-call parity,
    # C - P = D (F - K)): a call/put pair's mids pin F to within h_C + h_P over D, its two
    # half-spreads.  A group with 8 or more pairs in the fit must land within the median
    # of that over its pairs; a sparse group (3 to 7 pairs, often far from the money, where
    # the quotes sit on the tick floor and are biased, not just noisy) within 1.5 times
    # the widest pair's
    src = ds.dataset(runs["src"], partitioning="hive").to_table()
    fwd = ds.dataset(runs["forwards"]["dst"], partitioning="hive").to_table()
    checked = visible_off = dense = 0
    ok = fwd.filter(pc.equal(fwd["status"].cast(pa.string()), "ok"))
    for row in ok.to_pylist():
        sel = src.filter(pc.and_(pc.and_(
            pc.equal(src["date"], row["date"]),
            pc.equal(src["underlying"].cast(pa.string()), row["underlying"])),
            pc.equal(src["expiry"], pa.scalar(row["expiry"], src.schema.field("expiry").type))))
        true_f = np.unique(sel["true_forward"].to_numpy())
        assert true_f.size == 1
        half = (sel["ask"].to_numpy() - sel["bid"].to_numpy()) / 2
        K = sel["strike"].to_numpy()
        call = sel["is_call"].to_numpy(zero_copy_only=False)
        pairs = [half[(K == k) & call][0] + half[(K == k) & ~call][0] for k in np.unique(K)
                 if ((K == k) & call).sum() == 1 and ((K == k) & ~call).sum() == 1]
        if row["pairs_used"] >= 8:
            noise = np.nanmedian(pairs) / row["discount"]
            dense += 1
        else:
            noise = 1.5 * np.nanmax(pairs) / row["discount"]
        assert abs(row["forward"] - true_f[0]) < noise, row
        # the forward the visible columns give (S e^{(r-q)T}) misses the truth by more
        visible_off += abs(sel["forward"][0].as_py() - true_f[0]) > noise
        checked += 1
    assert checked >= 0.9 * fwd.num_rows - 3 * len(DATES) and dense > 0.5 * checked
    assert visible_off > 0.3 * checked          # hidden carry matters: the check can fail


def test_term_history_interpolates_the_backfilled_variances(runs):
    # reference: linear interpolation in total variance (numpy) between the expiries that
    # bracket 30 days, from the partition rows themselves
    t = volsweep.term_history(runs["variance"]["dst"], runs["smiles"]["dst"], days=(30,))
    assert t.column_names == ["date", "underlying", "horizon_days", "model_free_vol",
                              "model_free_status", "atm_vol", "atm_status"]
    var = ds.dataset(runs["variance"]["dst"], partitioning="hive").to_table()
    sm = ds.dataset(runs["smiles"]["dst"], partitioning="hive").to_table()
    checked = 0
    for row in t.filter(pc.equal(t["atm_status"].cast(pa.string()), "ok")).to_pylist():
        for table, col, value in ((var, "variance", "model_free_vol"), (sm, "atm_vol", "atm_vol")):
            sel = table.filter(pc.and_(
                pc.equal(table["date"], row["date"]),
                pc.equal(table["underlying"].cast(pa.string()), row["underlying"])))
            sel = sel.filter(pc.equal(sel["status"].cast(pa.string()), "ok"))
            T = sel["expiry_years"].to_numpy()
            v = sel[col].to_numpy()
            v = v if col == "variance" else v * v
            h = 30 / 365
            lo, hi = T[T <= h].max(), T[T >= h].min()
            wl, wh = v[T == lo][0] * lo, v[T == hi][0] * hi
            w = wl if hi == lo else wl + (wh - wl) * (h - lo) / (hi - lo)
            assert row[value] == pytest.approx(np.sqrt(w / h), rel=1e-12)
        checked += 1
    assert checked > 0.5 * t.num_rows


def test_cli_backfill_operation_and_history(runs, tmp_path, capsys):
    assert main(["backfill", runs["src"], runs["forwards"]["dst"], "--operation",
                 "forwards"]) == 0
    assert f"{len(DATES)} already complete" in capsys.readouterr().err
    assert main(["backfill", runs["src"], str(tmp_path / "x"), "--min-pairs", "4"]) == 2
    assert "--min-pairs" in capsys.readouterr().err
    assert main(["backfill", runs["src"], str(tmp_path / "x"), "--operation", "variance",
                 "--map", "strike=K"]) == 2             # schema error before any cluster
    assert "'K'" in capsys.readouterr().err
    out = tmp_path / "term.csv"
    assert main(["history", runs["variance"]["dst"], "--smiles", runs["smiles"]["dst"],
                 "--days", "30,60", "-o", str(out)]) == 0
    import pyarrow.csv as pcsv

    got = pcsv.read_csv(out)
    want = volsweep.term_history(runs["variance"]["dst"], runs["smiles"]["dst"], days=(30, 60))
    assert got.num_rows == want.num_rows
    np.testing.assert_array_equal(got["model_free_vol"].to_numpy(zero_copy_only=False),
                                  want["model_free_vol"].to_numpy(zero_copy_only=False))
    pytest.importorskip("matplotlib")
    pic = tmp_path / "term.png"
    name = want["underlying"][0].as_py()
    assert main(["history", runs["variance"]["dst"], "--smiles", runs["smiles"]["dst"],
                 "-o", str(tmp_path / "t2.parquet"), "--picture", str(pic),
                 "--underlying", name]) == 0
    assert pic.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["history", runs["variance"]["dst"], "-o", str(tmp_path / "t3.parquet"),
                 "--picture", str(tmp_path / "t3.png"), "--underlying", "NOPE"]) == 2


def test_unknown_operation_and_misplaced_options_are_errors(runs, tmp_path):
    with pytest.raises(ValueError, match="unknown operation"):
        bf.backfill(runs["src"], tmp_path / "d", operation="smile")
    with pytest.raises(ValueError, match="unknown option"):
        bf.backfill(runs["src"], tmp_path / "d", operation="forwards",
                    options={"arbitrage_free": True})
    with pytest.raises(ValueError, match="apply to 'sweep'"):
        bf.backfill(runs["src"], tmp_path / "d", operation="forwards", which=["delta"])
    with pytest.raises(ValueError, match="group operations"):
        bf.backfill(runs["src"], tmp_path / "d", by=("underlying",))
