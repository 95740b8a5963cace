"""Streaming sweep: inputs of every format, bounded batches, order, atomic output, errors.

The reference for every streamed result is ``volsweep.sweep`` on the whole table in
memory: streaming must not change a single bit.
"""

import datetime as dt
import io
import os

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest

import volsweep
from volsweep.input_files import DEFAULT_BATCH_ROWS, open_input
from volsweep.progress import Progress
from volsweep.stream_to_parquet import stream_to_parquet
from volsweep.sweep_plan import SweepPlan
from volsweep.cli import main
from volsweep.data_gen import make_snapshot, write_history, write_snapshot

ROWS = 12_000


def assert_bits_equal(got: pa.Table, want: pa.Table):
    """Same schema, same validity, same bits (NaN payloads and -0.0 included)."""
    assert got.schema.names == want.schema.names
    assert got.num_rows == want.num_rows
    for name in want.schema.names:
        a, b = got.column(name).combine_chunks(), want.column(name).combine_chunks()
        if pa.types.is_dictionary(a.type):
            a, b = a.dictionary_decode(), b.dictionary_decode()
        assert a.type == b.type, name
        if pa.types.is_floating(a.type):
            assert a.is_valid().equals(b.is_valid()), name
            x = a.fill_null(0.0).to_numpy(zero_copy_only=False).view(np.int64)
            y = b.fill_null(0.0).to_numpy(zero_copy_only=False).view(np.int64)
            bad = np.flatnonzero(x != y)
            assert bad.size == 0, f"{name}: {bad.size} rows differ, first {bad[:5]}"
        else:
            assert a.equals(b), name


@pytest.fixture(scope="module")
def snap():
    return make_snapshot(n_rows=ROWS, seed=11)


@pytest.fixture(scope="module")
def snap_file(snap, tmp_path_factory):
    # small row groups so that a file is many batches
    return write_snapshot(snap, str(tmp_path_factory.mktemp("s") / "snap.parquet"),
                          row_group_size=2500)


def in_memory(table: pa.Table, drop=(), **kw) -> pa.Table:
    """The reference: input columns, then volsweep.sweep's outputs on the whole table."""
    res = volsweep.sweep(table.drop_columns(list(drop)), **kw)
    n_in = table.num_columns - len(drop)
    outs = res.schema.names[n_in:]
    for name in outs:
        table = table.append_column(res.schema.field(name), res.column(name))
    return table


@pytest.mark.parametrize("batch_rows", [1000, 4096, DEFAULT_BATCH_ROWS])
def test_streamed_premium_sweep_equals_in_memory_bit_for_bit(snap, snap_file, tmp_path,
                                                             batch_rows):
    out = tmp_path / "o.parquet"
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "premium",
                 "--batch-rows", str(batch_rows)]) == 0
    got = pq.read_table(out)
    assert_bits_equal(got, in_memory(snap, drop=["bid", "ask"]))
    if batch_rows == 1000:   # batches of at most batch_rows rows: row groups show them
        md = pq.read_metadata(out)
        assert max(md.row_group(i).num_rows for i in range(md.num_row_groups)) == 1000


def test_streamed_bid_ask_sweep_equals_in_memory_bit_for_bit(snap, snap_file, tmp_path):
    out = tmp_path / "o.parquet"
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "bid-ask",
                 "--batch-rows", "3000"]) == 0
    got = pq.read_table(out)
    want = in_memory(snap, drop=["premium"])
    assert_bits_equal(got, want)
    assert {"iv_bid", "iv_ask", "status_bid", "status_ask"} <= set(got.column_names)


def test_greeks_none_and_keep_columns(snap, snap_file, tmp_path):
    out = tmp_path / "o.parquet"
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "premium", "--greeks", "none",
                 "--keep-columns", "underlying,strike", "--units", "desk"]) == 0
    got = pq.read_table(out)
    assert got.column_names == ["underlying", "strike", "iv", "status"]
    ref = volsweep.implied_vol(snap.drop_columns(["bid", "ask"]))
    assert_bits_equal(got.select(["iv", "status"]), ref.select(["iv", "status"]))
    assert main(["sweep", snap_file, "-o", str(out), "--overwrite", "--quotes", "premium",
                 "--greeks", "none", "--keep-columns", "none"]) == 0
    assert pq.read_table(out).column_names == ["iv", "status"]


def test_directory_dataset_keeps_file_order_and_adds_partition_key(tmp_path):
    dates = [dt.date(2031, 3, 10), dt.date(2031, 3, 11), dt.date(2031, 3, 12)]
    root = tmp_path / "hist"
    paths = write_history(root, dates, rows_per_day=3000, seed=5, n_underlyings=40,
                          row_group_size=700)
    out = tmp_path / "o.parquet"
    assert main(["sweep", str(root), "-o", str(out), "--quotes", "premium",
                 "--batch-rows", "1000"]) == 0
    got = pq.read_table(out)
    src = pa.concat_tables([pq.read_table(p) for p in paths])
    assert got.num_rows == src.num_rows
    # rows in file order, then row order: compare the input columns one to one
    assert_bits_equal(got.select(src.column_names), src)
    days = got.column("date").to_pylist()
    assert days == sorted(days) and len(set(days)) == 3
    want = in_memory(src, drop=["bid", "ask"])
    assert_bits_equal(got.select(want.column_names), want)


def test_ipc_file_ipc_stream_and_csv_inputs(snap, tmp_path):
    small = snap.slice(0, 5000).drop_columns(["bid", "ask"])
    ipc_file, ipc_stream = tmp_path / "a.arrow", tmp_path / "a.arrows"
    with pa.ipc.new_file(ipc_file, small.schema) as w:
        w.write_table(small.combine_chunks())          # one big record batch
    with pa.ipc.new_stream(ipc_stream, small.schema) as w:
        w.write_table(small, max_chunksize=1700)
    want = in_memory(small)
    for path in (ipc_file, ipc_stream):
        src = open_input(str(path), batch_rows=999)
        assert all(b.num_rows <= 999 for b in src.batches())   # big batches are re-chunked
        out = tmp_path / (path.name + ".parquet")
        assert main(["sweep", str(path), "-o", str(out), "--batch-rows", "999"]) == 0
        assert_bits_equal(pq.read_table(out), want)
    # CSV: the reference is the same text parsed whole by pyarrow (floats round-trip
    # through text, timestamps and dictionaries come back as parsed by pyarrow.csv)
    csv = tmp_path / "a.csv"
    plain = small.drop_columns(["underlying", "quote_flag", "as_of", "expiry"])
    pcsv.write_csv(plain, csv)
    out = tmp_path / "csv.parquet"
    assert main(["sweep", str(csv), "-o", str(out)]) == 0
    assert_bits_equal(pq.read_table(out), in_memory(pcsv.read_csv(csv)))


def test_csv_with_call_put_words_and_remapped_names(tmp_path):
    # a hand-written file: the first put and call are the classic at-the-money example
    # (S = K = 100, T = 1, r = 5%, BSM price 10.4506 / 5.5735 at 20% vol, common practice)
    csv = tmp_path / "q.csv"
    csv.write_text("S,K,T,r,type,mid\n100,100,1,0.05,C,10.4506\n100,100,1,0.05,P,5.5735\n"
                   "100,100,1,0.05,C,-1\n")
    out = tmp_path / "q.parquet"
    assert main(["sweep", str(csv), "-o", str(out), "--map", "spot=S", "--map", "strike=K",
                 "--map", "expiry_years=T", "--map", "rate=r", "--map", "is_call=type",
                 "--map", "premium=mid"]) == 0
    got = pq.read_table(out)
    assert got.column_names[:6] == ["S", "K", "T", "r", "type", "mid"]
    iv = got.column("iv").to_pylist()
    assert abs(iv[0] - 0.2) < 1e-4 and abs(iv[1] - 0.2) < 1e-4 and iv[2] is None
    assert got.column("status").to_pylist() == ["ok", "ok", "premium_too_low"]


def test_empty_input_gives_empty_output_with_the_output_schema(snap, tmp_path):
    empty = tmp_path / "e.parquet"
    pq.write_table(snap.slice(0, 0).drop_columns(["bid", "ask"]), empty)
    out = tmp_path / "eo.parquet"
    assert main(["sweep", str(empty), "-o", str(out)]) == 0
    got = pq.read_table(out)
    assert got.num_rows == 0 and got.column_names[-1] == "status" and "iv" in got.column_names


@pytest.mark.parametrize("command", [["sweep", "--quotes", "premium"],
                                     ["price", "--map", "vol=true_vol"]])
def test_the_operation_is_prepared_once_per_run(snap_file, tmp_path, monkeypatch, command):
    import volsweep.api

    calls = []
    real = volsweep.api.prepare

    def counting(*args, **kw):
        calls.append(args[0])
        return real(*args, **kw)

    monkeypatch.setattr(volsweep.api, "prepare", counting)
    out = tmp_path / "o.parquet"
    assert main([command[0], snap_file, "-o", str(out), "--batch-rows", "1000"]
                + command[1:]) == 0
    assert pq.read_metadata(out).num_rows == ROWS          # twelve batches
    assert calls == [command[0]]


# ------------------------------------------------------------------- atomic output
class _Boom(Exception):
    pass


def _failing_after(n_batches, exc):
    plan_holder = {}

    def transform(batch):
        plan_holder["n"] = plan_holder.get("n", 0) + 1
        if plan_holder["n"] > n_batches:
            raise exc
        return plan_holder["plan"].transform(batch)
    return plan_holder, transform


@pytest.mark.parametrize("exc", [_Boom("disk on fire"), KeyboardInterrupt()])
@pytest.mark.parametrize("existing", [False, True])
def test_failure_or_interrupt_leaves_no_partial_output(snap_file, tmp_path, exc, existing):
    out = tmp_path / "o.parquet"
    if existing:
        out.write_bytes(b"previous result")
    src = open_input(snap_file, batch_rows=1000)
    holder, transform = _failing_after(3, exc)
    holder["plan"] = SweepPlan.build(src.schema, quotes="premium")
    with pytest.raises(type(exc)):
        stream_to_parquet(src, str(out), transform, holder["plan"].out_schema, overwrite=True)
    assert holder["n"] == 4                     # it did write three batches first
    if existing:
        assert out.read_bytes() == b"previous result"
    else:
        assert not out.exists()
    assert os.listdir(tmp_path) == (["o.parquet"] if existing else [])


# ------------------------------------------------------------------------- errors
def _one_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("volsweep: error: ")
    return err[0]


def test_error_unreadable_inputs(tmp_path, capsys):
    out = tmp_path / "o.parquet"
    garbage = tmp_path / "g.parquet"
    garbage.write_bytes(b"PAR1 but not really a parquet file")
    text = tmp_path / "t.bin"
    text.write_bytes(b"hello")
    empty_dir = tmp_path / "empty"
    empty_dir.mkdir()
    truncated = tmp_path / "trunc.parquet"
    pq.write_table(pa.table({"x": np.arange(1000.0)}), truncated)
    truncated.write_bytes(truncated.read_bytes()[:-40])
    for bad in (tmp_path / "missing.parquet", garbage, text, empty_dir, truncated):
        assert main(["sweep", str(bad), "-o", str(out)]) == 2, bad
        assert "cannot read" in _one_error_line(capsys)
        assert not out.exists()


def test_error_bad_csv_row_past_the_first_block(tmp_path, capsys):
    csv = tmp_path / "q.csv"
    rows = "".join("100,100,1,0.05,true,10.45\n" for _ in range(60000))
    csv.write_text("spot,strike,expiry_years,rate,is_call,premium\n" + rows + "100,oops\n")
    out = tmp_path / "o.parquet"
    assert main(["sweep", str(csv), "-o", str(out), "--batch-rows", "100"]) == 2
    err = _one_error_line(capsys)
    assert f"cannot read {csv}: line 60002: Expected 6 columns, got 2" in err
    assert not out.exists() and os.listdir(tmp_path) == ["q.csv"]


@pytest.mark.parametrize("where", [5, 60000])        # in the first block, and far past it
def test_csv_cells_that_are_not_numbers_are_missing_data(tmp_path, capsys, where):
    # behaviour: data problems never raise.  Source of truth: the same file with those
    # cells empty (a null, as pyarrow.csv reads an empty cell), through the same command
    rows = ["100,100,1,0.05,true,10.45"] * 60010
    bad, blank = rows.copy(), rows.copy()
    bad[where], blank[where] = "100,n.a.,1,0.05,true,10.45", "100,,1,0.05,true,10.45"
    bad[where + 3], blank[where + 3] = "100,100,1,-,true,10.45", "100,100,1,,true,10.45"
    past = where > 1000     # a word in is_call's first block makes it a column of words
    if past:
        bad[where + 4], blank[where + 4] = "100,100,1,0.05,maybe,10.45", "100,100,1,0.05,,10.45"
    head = "spot,strike,expiry_years,rate,is_call,premium\n"
    for name, lines in (("bad", bad), ("blank", blank)):
        (tmp_path / f"{name}.csv").write_text(head + "\n".join(lines) + "\n")
        assert main(["sweep", str(tmp_path / f"{name}.csv"), "-o",
                     str(tmp_path / f"{name}.parquet"), "--batch-rows", "7000"]) == 0
    err = capsys.readouterr().err
    assert "2 cells not numbers: read as missing ('strike' 1, 'rate' 1)" in err
    assert ("1 cell not true/false: read as missing ('is_call' 1)" in err) == past
    got, want = pq.read_table(tmp_path / "bad.parquet"), pq.read_table(tmp_path / "blank.parquet")
    assert got.num_rows == 60010
    assert_bits_equal(got, want)
    status = got.column("status").to_pylist()
    missing = [where, where + 3] + ([where + 4] if past else [])
    assert [status[i] for i in missing] == ["missing_input"] * len(missing)
    assert status.count("ok") == 60010 - len(missing)


def test_error_missing_column(snap, tmp_path, capsys):
    src = tmp_path / "s.parquet"
    pq.write_table(snap.slice(0, 100).drop_columns(["strike"]), src)
    out = tmp_path / "o.parquet"
    assert main(["sweep", str(src), "-o", str(out), "--quotes", "premium"]) == 2
    assert "'strike'" in _one_error_line(capsys)
    full = tmp_path / "f.parquet"
    pq.write_table(snap.slice(0, 100), full)
    assert main(["sweep", str(full), "-o", str(out), "--map", "premium=mid"]) == 2
    assert "'mid'" in _one_error_line(capsys)      # a mapped quote is never silently bid/ask
    assert main(["sweep", str(full), "-o", str(out), "--quotes", "premium",
                 "--keep-columns", "nope"]) == 2
    assert "'nope'" in _one_error_line(capsys)
    assert not out.exists()


def test_error_ambiguous_quote_and_bad_options(snap_file, tmp_path, capsys):
    out = tmp_path / "o.parquet"
    assert main(["sweep", snap_file, "-o", str(out)]) == 2          # premium and bid/ask
    assert "--quotes" in _one_error_line(capsys)
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "premium",
                 "--greeks", "delta,wobble"]) == 2
    assert "wobble" in _one_error_line(capsys)
    assert main(["sweep", snap_file, "-o", str(out), "--batch-rows", "0"]) == 2
    _one_error_line(capsys)
    assert not out.exists()


def test_error_existing_output_without_overwrite(snap_file, tmp_path, capsys):
    out = tmp_path / "o.parquet"
    out.write_bytes(b"keep me")
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "premium"]) == 2
    assert "exists" in _one_error_line(capsys)
    assert out.read_bytes() == b"keep me"
    assert main(["sweep", snap_file, "-o", str(tmp_path / "nodir" / "o.parquet"),
                 "--quotes", "premium"]) == 2
    assert "does not exist" in _one_error_line(capsys)


def test_output_column_clash_is_an_error(snap, tmp_path, capsys):
    src = tmp_path / "s.parquet"
    pq.write_table(snap.slice(0, 100).drop_columns(["bid", "ask"])
                   .append_column("iv", pa.array(np.zeros(100))), src)
    out = tmp_path / "o.parquet"
    assert main(["sweep", str(src), "-o", str(out)]) == 2
    assert "'iv'" in _one_error_line(capsys)


# ----------------------------------------------------------------------- progress
class _Tty(io.StringIO):
    def isatty(self):
        return True


def test_progress_bar_only_on_a_terminal():
    tty, pipe = _Tty(), io.StringIO()
    for s in (tty, pipe):
        p = Progress(1000, stream=s)
        for _ in range(10):
            p.update(100)
        p.close()
    assert "rows/s" in tty.getvalue() and "ETA" in tty.getvalue()
    assert "1,000/1,000" in tty.getvalue()
    assert pipe.getvalue() == ""


def test_summary_on_stderr_when_not_a_terminal(snap_file, tmp_path, capsys):
    out = tmp_path / "o.parquet"
    assert main(["sweep", snap_file, "-o", str(out), "--quotes", "premium"]) == 0
    cap = capsys.readouterr()
    assert cap.out == ""
    assert "\r" not in cap.err                       # no progress bar off a terminal
    lines = cap.err.strip().splitlines()
    assert lines[0].startswith(f"swept {ROWS:,d} rows")
    counts = {ln.split()[0]: int(ln.split()[1].replace(",", "")) for ln in lines[2:]}
    st = pq.read_table(out).column("status").to_pylist()
    assert counts == {k: st.count(k) for k in set(st)}


def test_error_folder_whose_files_differ(snap, tmp_path, capsys):
    root = tmp_path / "d"
    root.mkdir()
    base = snap.slice(0, 3000).drop_columns(["bid", "ask"])
    pq.write_table(base, root / "a.parquet")
    pq.write_table(base.drop_columns(["strike"]), root / "b.parquet")
    out = tmp_path / "o.parquet"
    assert main(["sweep", str(root), "-o", str(out)]) == 2
    line = _one_error_line(capsys)
    assert "b.parquet" in line and "'strike'" in line
    assert not out.exists()


def test_ctrl_c_on_the_command_line_leaves_nothing(snap, tmp_path):
    import signal
    import subprocess
    import sys
    import time

    big = tmp_path / "big.parquet"
    with pq.ParquetWriter(big, snap.schema) as w:
        for _ in range(120):                    # 1.44M rows: a second or more to sweep
            w.write_table(snap)
    out = tmp_path / "o.parquet"
    p = subprocess.Popen([sys.executable, "-m", "volsweep", "sweep", str(big), "-o", str(out),
                          "--quotes", "premium", "--batch-rows", "20000"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not list(tmp_path.glob(".o.parquet.tmp-*")) and p.poll() is None \
            and time.monotonic() < deadline:
        time.sleep(0.005)
    p.send_signal(signal.SIGINT)                # the run has started writing
    _, err = p.communicate(timeout=120)
    assert p.returncode == 130, err
    assert err.strip().splitlines()[-1] == "volsweep: interrupted"
    assert not out.exists() and sorted(os.listdir(tmp_path)) == ["big.parquet"]


def test_importing_volsweep_does_not_import_dask():
    import subprocess
    import sys

    code = ("import sys, volsweep, volsweep.cli, volsweep.input_files, volsweep.sweep_plan, "
            "volsweep.stream_to_parquet; "
            "assert callable(volsweep.backfill); "
            "print(sorted(m for m in ('dask', 'distributed') if m in sys.modules))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"
