"""Historical backfill on Dask: every partition of a Parquet dataset, in parallel.

``backfill(src, dst)`` finds the partitions of ``src`` (the leaf folders holding data
files, e.g. hive folders ``date=2031-03-14/``; a flat folder is one partition), runs one
Dask task per partition, and writes ``dst/<same relative folder>/part-0.parquet``: for
the sweep, the partition's rows, in order (its files in name order), with implied vols
and Greeks; for a group operation (``operation="forwards"``, ``"variance"``,
``"smiles"``; see ``group_backfill.py``), one row per group of the partition.

Commit protocol: a task writes a hidden temporary file in the partition's folder, fsyncs
it and renames it to ``part-0.parquet``; the rename is the commit.  A partition whose
``part-0.parquet`` exists with the source's row count and was made with the same options
(recorded in its schema metadata) is complete and is skipped, so a
re-run after a crash (or a task Dask runs twice after losing a worker) resumes without
duplicating anything.  Hidden temporary files left by a killed worker are ignored by
dataset readers and removed by the next run.

Workers: by default a ``LocalCluster`` with one single-threaded worker process per core,
started with ``NUMBA_NUM_THREADS=1`` (one kernel thread per worker: no
oversubscription) and the parent's ``NUMBA_CACHE_DIR`` (compiled kernels are loaded from
the shared cache, not compiled again).  ``scheduler="tcp://host:8786"`` uses a running
cluster instead; its workers must see ``src`` and ``dst`` at the same paths, and each
task caps numba's threads at cores / worker threads.

Dask is imported only here, and only when ``backfill`` is called.
"""

from __future__ import annotations

import os
import time
from collections import Counter
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.parquet as pq

from volsweep.kernel.registry import DEFAULT_MODEL
from ._columns import OptionError, numeric_columns
from .atomic_parquet import stale_temps
from .file_errors import StreamError, one_line
from .group_backfill import (GROUP_OPERATIONS, complete as group_complete, group_options,
                             group_stamp, run_group, stamped_rows, write_group_table)
from .input_files import DEFAULT_BATCH_ROWS, data_files, open_input
from .status_counts import count_statuses
from .stream_to_parquet import stream_to_parquet
from .sweep_plan import SWEEP_STAMP_KEY, SweepPlan

PART_NAME = "part-0.parquet"
CONNECT_TIMEOUT = "10s"      # to reach a running scheduler given by address


@dataclass
class Partition:
    rel: str                  # folder relative to src ("." for a flat dataset)
    files: list               # absolute paths of its data files, in read order


@dataclass
class BackfillResult:
    partitions: int
    written: int
    skipped: int
    rows_written: int
    rows_skipped: int
    seconds: float
    statuses: dict = field(default_factory=dict)
    high_vols: Counter = field(default_factory=Counter)   # vol column -> rows above the bound
    unreadable: Counter = field(default_factory=Counter)  # column -> CSV cells read as null
    schema: object = None         # the input schema (of the first partition)
    workers: list = field(default_factory=list)    # per task: (pid, numba threads, compiled)
    kernels: set = field(default_factory=set)      # kernel source hashes the tasks ran
    task_seconds: float = 0.0     # first written task's start to the last one's end

    @property
    def rows(self) -> int:
        return self.rows_written + self.rows_skipped


def find_partitions(src) -> list[Partition]:
    """Leaf folders of ``src`` holding data files, in lexicographic order."""
    src = os.path.abspath(os.fspath(src))
    if not os.path.isdir(src):
        raise StreamError(f"cannot read {src}: not a directory (backfill reads a "
                          "partitioned dataset folder)")
    groups: dict[str, list] = {}
    for path in data_files(src):
        groups.setdefault(os.path.relpath(os.path.dirname(path), src), []).append(path)
    if not groups:
        raise StreamError(f"cannot read {src}: no data files in the directory")
    nested = [r for r in groups if r != "." and any(o != r and o.startswith(r + os.sep)
                                                    for o in groups)]
    if nested or ("." in groups and len(groups) > 1):
        where = nested[0] if nested else "."
        raise StreamError(f"cannot read {src}: folder {where!r} holds data files and "
                          "sub-folders with data files; partitions must be leaves")
    return [Partition(rel, files) for rel, files in sorted(groups.items(),
                                                           key=lambda kv: kv[0].split(os.sep))]


def _source_rows(files) -> int | None:
    try:
        return sum(pq.read_metadata(f).num_rows for f in files)
    except Exception:   # not Parquet (IPC, CSV): completeness is the file's existence
        return None


def _complete_rows(target: str, files, stamp: bytes) -> int | None:
    """Rows of a committed ``target`` if it is complete for ``files`` and was made with the
    same options (``stamp``), else None (then it is made again and replaced atomically)."""
    rows = stamped_rows(target, SWEEP_STAMP_KEY, stamp)
    if rows is None:
        return None
    want = _source_rows(files)
    return rows if want is None or want == rows else None


def _limit_threads() -> int:
    """numba threads for this task: ``NUMBA_NUM_THREADS`` when set (1 under our
    LocalCluster), else cores divided by the worker's threads, so a worker never
    oversubscribes.  Set per task: numba may have been imported before the variable was."""
    import numba

    want = os.environ.get("NUMBA_NUM_THREADS", "")
    if want.isdigit() and int(want) > 0:
        want = int(want)
    else:
        try:
            from distributed import get_worker

            want = max(1, (os.cpu_count() or 1) // max(1, get_worker().state.nthreads))
        except Exception:   # not on a worker (a plain call): leave numba's default
            return numba.get_num_threads()
    numba.set_num_threads(min(want, numba.config.NUMBA_NUM_THREADS))
    return numba.get_num_threads()


def _misses() -> int:
    """Compilations so far in this process among volsweep's kernels (cache misses)."""
    import gc

    from numba.core.registry import CPUDispatcher

    # type(), not isinstance(): isinstance asks an object for its __class__, which some
    # objects alive in the process (numpy's NpzFile attribute bags) answer with an error
    return sum(o.stats.cache_misses.total() for o in gc.get_objects()
               if issubclass(type(o), CPUDispatcher)
               and getattr(o.py_func, "__module__", "").startswith("volsweep.kernel"))


def sweep_partition(part: Partition, dst_root: str, options: dict, batch_rows: int) -> dict:
    """One task: sweep one partition into ``dst_root/<rel>/part-0.parquet`` (or skip it)."""
    threads = _limit_threads()
    out_dir = os.path.normpath(os.path.join(dst_root, part.rel))
    target = os.path.join(out_dir, PART_NAME)
    from volsweep.kernel._cache import kernel_source_hash

    info = dict(rel=part.rel, pid=os.getpid(), threads=threads, compiled=0,
                kernel=kernel_source_hash().hex()[:16], start=time.time())
    try:
        source = _open_partition(part, batch_rows, options)
        plan = SweepPlan.build(source.schema, **options)
        done = _complete_rows(target, part.files, plan.stamp)
        if done is not None:
            return dict(info, state="skipped", rows=done, statuses={})
        os.makedirs(out_dir, exist_ok=True)
        before = _misses()
        res = stream_to_parquet(source, target, plan.transform, plan.out_schema,
                                overwrite=True, dictionary=plan.dictionary,
                                vol_columns=plan.vol_columns)
    except OptionError as exc:
        raise exc.within(f"partition {part.rel}") from None
    except (ValueError, TypeError, OSError) as exc:
        raise StreamError(f"partition {part.rel}: {one_line(exc)}") from None
    info["compiled"] = _misses() - before
    return dict(info, state="written", rows=res.rows, statuses=res.statuses, end=time.time(),
                high_vols=res.high_vols, unreadable=source.unreadable)


def _open_partition(part: Partition, batch_rows: int, options: dict):
    """One partition's files as one input (CSV numeric inputs read as numbers)."""
    return open_input(os.path.dirname(part.files[0]), batch_rows, files=part.files,
                      partitioning=None, numbers=numeric_columns(options["columns"]))


def _clean_temps(dst_root: str, parts) -> None:
    for part in parts:
        for tmp in stale_temps(os.path.join(dst_root, part.rel, PART_NAME)):
            try:
                os.remove(tmp)
            except FileNotFoundError:
                pass


def worker_environ() -> dict:
    """Environment for our LocalCluster's worker processes (set before they start)."""
    env = {"NUMBA_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
           "MKL_NUM_THREADS": "1"}
    if os.environ.get("NUMBA_CACHE_DIR"):
        env["NUMBA_CACHE_DIR"] = os.environ["NUMBA_CACHE_DIR"]
    return env


def group_partition(part: Partition, dst_root: str, operation: str, options: dict,
                    batch_rows: int) -> dict:
    """One task of a group operation: the whole partition through ``run_group`` into
    ``dst_root/<rel>/part-0.parquet`` (or skip it when complete)."""
    threads = _limit_threads()
    target = os.path.join(os.path.normpath(os.path.join(dst_root, part.rel)), PART_NAME)
    from volsweep.kernel._cache import kernel_source_hash

    info = dict(rel=part.rel, pid=os.getpid(), threads=threads, compiled=0,
                kernel=kernel_source_hash().hex()[:16], start=time.time())
    try:
        stamp = group_stamp(operation, options, _source_rows(part.files))
        done = group_complete(target, stamp)
        if done is not None:
            return dict(info, state="skipped", rows=done, statuses={})
        source = _open_partition(part, batch_rows, options)
        table = pa.Table.from_batches(list(source.batches()), source.schema)
        before = _misses()
        out = run_group(table, operation, options)
        os.makedirs(os.path.dirname(target), exist_ok=True)
        write_group_table(out, target, stamp)
    except OptionError as exc:
        raise exc.within(f"partition {part.rel}") from None
    except (ValueError, TypeError, OSError) as exc:
        raise StreamError(f"partition {part.rel}: {one_line(exc)}") from None
    info["compiled"] = _misses() - before
    counts: dict = {}
    count_statuses(out, counts)
    return dict(info, state="written", rows=out.num_rows, statuses=counts, end=time.time(),
                unreadable=source.unreadable)


def backfill(src, dst, *, operation="sweep", model=DEFAULT_MODEL, which=None, units="raw",
             columns=None, as_of=None, quotes="auto", keep=None, by=None, options=None,
             scheduler=None, n_workers=None, batch_rows=DEFAULT_BATCH_ROWS,
             progress=None) -> BackfillResult:
    """Run ``operation`` over every partition of the dataset ``src`` into the same
    partitions under ``dst``.

    ``operation``: ``"sweep"`` (every row, as ``volsweep.sweep``), or a group operation:
    ``"forwards"`` (``implied_forwards``), ``"variance"`` (``model_free_variance``),
    ``"smiles"`` (forwards implied and attached, Black-76 implied vols on them, then
    ``fit_smiles``), one output row per group of ``by`` (default underlying, expiry).
    ``model``, ``which``, ``units``, ``keep``: as for ``volsweep.sweep`` (sweep only).
    ``columns``, ``as_of``, ``quotes``: as for the operation.  ``options``: further
    keyword options of a group operation (e.g. ``{"min_pairs": 4}``,
    ``{"arbitrage_free": True}``).  ``scheduler``: address of a running Dask scheduler,
    or a ``distributed.Client``; None starts a LocalCluster of ``n_workers`` (default:
    one per core) single-threaded worker processes.  ``progress``: a
    ``progress.Progress`` counting partitions, or None.

    Returns a ``BackfillResult`` (partitions written and skipped, rows, status counts).
    Schema problems in the first partition raise before any cluster is started.
    """
    t0 = time.perf_counter()
    src = os.path.abspath(os.fspath(src))
    dst = os.path.abspath(os.fspath(dst))
    if dst == src or dst.startswith(src + os.sep):
        raise StreamError(f"the output {dst} must not be inside the input {src}")
    if operation != "sweep" and operation not in GROUP_OPERATIONS:
        raise ValueError(f"unknown operation {operation!r}; expected one of "
                         f"{', '.join(('sweep',) + GROUP_OPERATIONS)}")
    parts = find_partitions(src)
    if operation == "sweep":
        if by is not None or options:
            raise ValueError("by and options apply to the group operations, not to 'sweep'")
        options = dict(model=model, which=which, units=units, columns=columns, as_of=as_of,
                       quotes=quotes, keep=keep)
        schema = _open_partition(parts[0], batch_rows, options).schema
        plan = SweepPlan.build(schema, **options)       # schema errors now
        stamp_of = lambda part: plan.stamp  # noqa: E731
        complete = _complete_rows
        task = dict(fn=sweep_partition, options=options)
    else:
        if model != DEFAULT_MODEL or which is not None or units != "raw" or keep is not None:
            raise ValueError(f"model, which, units and keep apply to 'sweep', not to "
                             f"{operation!r}")
        options = group_options(operation, by, columns, as_of, dict(options or {},
                                                                     quotes=quotes))
        schema = _open_partition(parts[0], batch_rows, options).schema
        run_group(schema.empty_table(), operation, options)   # schema errors now
        stamp_of = lambda part: group_stamp(operation, options,  # noqa: E731
                                            _source_rows(part.files))
        complete = lambda target, files, stamp: group_complete(target, stamp)  # noqa: E731
        task = dict(fn=group_partition, operation=operation, options=options)
    os.makedirs(dst, exist_ok=True)
    _clean_temps(dst, parts)
    # complete partitions are skipped here (no cluster at all for a finished backfill) and
    # again inside each task, for a task that Dask runs a second time
    results = []
    todo = []
    for part in parts:
        rows = complete(os.path.join(dst, part.rel, PART_NAME), part.files, stamp_of(part))
        if rows is None:
            todo.append(part)
        else:
            results.append(dict(rel=part.rel, state="skipped", rows=rows, statuses={}))
    if progress is not None:
        progress.update(len(results))
    if todo:
        results += _run_tasks(todo, dst, task, batch_rows, scheduler, n_workers, progress)
    elif progress is not None:
        progress.close()
    _clean_temps(dst, parts)
    statuses: dict = {}
    high_vols, unreadable = Counter(), Counter()
    for r in results:
        for col, counts in r["statuses"].items():
            statuses.setdefault(col, Counter()).update(counts)
        high_vols.update(r.get("high_vols", {}))
        unreadable.update(r.get("unreadable", {}))
    written = [r for r in results if r["state"] == "written"]
    skipped = [r for r in results if r["state"] == "skipped"]
    return BackfillResult(
        partitions=len(parts), written=len(written), skipped=len(skipped),
        rows_written=sum(r["rows"] for r in written), rows_skipped=sum(r["rows"] for r in skipped),
        seconds=time.perf_counter() - t0, statuses=statuses, high_vols=high_vols,
        unreadable=unreadable, schema=schema,
        workers=[(r["pid"], r["threads"], r["compiled"]) for r in results if "pid" in r],
        kernels={r["kernel"] for r in results if "kernel" in r},
        task_seconds=(max(r["end"] for r in written) - min(r["start"] for r in written)
                      if written else 0.0))


def _run_tasks(todo, dst, task, batch_rows, scheduler, n_workers, progress) -> list:
    import distributed   # the optional dependency: only here

    saved = {k: os.environ.get(k) for k in list(worker_environ()) + ["PYTHONHASHSEED"]}
    results = []
    try:
        client, cluster = _connect(distributed, scheduler, n_workers)
    except BaseException:
        _restore_environ(saved)
        raise
    try:
        kwargs = dict(task)
        fn = kwargs.pop("fn")
        futures = client.map(fn, todo, dst_root=dst, batch_rows=batch_rows, pure=False,
                             **kwargs)
        # with_results: gathered through this client even when the process has another
        for _, result in distributed.as_completed(futures, with_results=True):
            results.append(result)
            if progress is not None:
                progress.update(1)
    finally:
        if progress is not None:
            progress.close()
        if cluster is not None:
            client.close()
            cluster.close()
        elif not isinstance(scheduler, distributed.Client):
            client.close()
        _restore_environ(saved)
    return results


def _connect(distributed, scheduler, n_workers):
    """(client, cluster we own or None)."""
    if isinstance(scheduler, distributed.Client):
        return scheduler, None
    if scheduler is not None:
        try:
            return distributed.Client(scheduler, timeout=CONNECT_TIMEOUT), None
        except (OSError, TimeoutError) as exc:
            raise StreamError(f"cannot reach the Dask scheduler at {scheduler}: "
                              f"{one_line(exc)}") from None
    import dask

    env = worker_environ()
    n = n_workers or os.cpu_count() or 1
    # pre-spawn-environ is set before each worker process starts (and again when a nanny
    # restarts a lost worker), so numba reads NUMBA_NUM_THREADS=1 at import; the nanny
    # sets it in our own os.environ to do so, which we undo once the cluster is up.
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env}):
        cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                           dashboard_address=":0", env=env, silence_logs=50)
    return distributed.Client(cluster), cluster


def _restore_environ(saved: dict) -> None:
    for k, v in saved.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v
