"""Write Parquet atomically: to a hidden temporary file beside the target, fsynced, then
renamed over the target, so the target is either the complete new file or untouched.

The temporary file is named ``.NAME.tmp-PID-XXXX`` (dataset readers skip names starting
with '.'); ``stale_temps`` finds those a killed process left behind.  On any exception,
``KeyboardInterrupt`` included, the writer removes its temporary file.
"""

from __future__ import annotations

import glob
import os
import queue
import secrets
import threading

import pyarrow as pa
import pyarrow.parquet as pq

from .file_errors import StreamError

PARQUET_COMPRESSION = "snappy"     # pyarrow's default: fast, modest ratio


def temp_path(dst: str) -> str:
    """Hidden temporary name beside ``dst`` (dataset readers skip names starting with '.')."""
    folder, name = os.path.split(os.path.abspath(dst))
    return os.path.join(folder, f".{name}.tmp-{os.getpid()}-{secrets.token_hex(4)}")


def stale_temps(dst: str) -> list[str]:
    folder, name = os.path.split(os.path.abspath(dst))
    return glob.glob(os.path.join(glob.escape(folder), f".{glob.escape(name)}.tmp-*"))


def _fsync_dir(folder: str) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


class AtomicParquetWriter:
    """Write Parquet to a temporary file; ``commit()`` renames it over ``dst``.

    Used as a context manager: leaving the block without ``commit()`` (an exception, a
    ``KeyboardInterrupt``) removes the temporary file and leaves ``dst`` untouched.

    ``dictionary``: the columns to dictionary-encode (None: all; see
    ``dictionary_columns``).

    ``background=True`` writes in a thread (Parquet encoding releases the GIL), so the
    next batch is computed while this one is encoded; at most one batch waits in between.
    """

    def __init__(self, dst: str, schema: pa.Schema, compression: str = PARQUET_COMPRESSION,
                 dictionary: list | None = None, background: bool = False):
        self.dst = os.path.abspath(dst)
        self.tmp = temp_path(self.dst)
        self.schema = schema
        self.committed = False
        self._writer = self._queue = self._thread = self._error = None
        try:
            # write_batch_size: values encoded per inner step (default 1024); 64k: ~12% less CPU
            self._writer = pq.ParquetWriter(self.tmp, schema, compression=compression,
                                            use_dictionary=True if dictionary is None
                                            else list(dictionary), write_batch_size=1 << 16)
            if background:
                self._queue = queue.Queue(maxsize=1)
                self._thread = threading.Thread(target=self._drain, name="volsweep-writer",
                                                daemon=True)
                self._thread.start()
        except BaseException:    # Ctrl-C while the file is being created
            self.abort()
            raise

    def _write_now(self, batch) -> None:
        if isinstance(batch, pa.Table):
            self._writer.write_table(batch)
        else:
            self._writer.write_batch(batch)

    def _drain(self) -> None:
        while True:
            batch = self._queue.get()
            if batch is None:
                return
            if self._error is None:
                try:
                    self._write_now(batch)
                except BaseException as exc:   # handed to the producer on its next call
                    self._error = exc

    def _check(self) -> None:
        if self._error is not None:
            raise self._error

    def write(self, batch) -> None:
        if self._thread is None:
            self._write_now(batch)
            return
        self._check()
        self._queue.put(batch)

    def _stop(self) -> None:
        if self._thread is not None and self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()

    def commit(self) -> None:
        self._stop()
        self._check()
        self._writer.close()
        with open(self.tmp, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(self.tmp, self.dst)
        _fsync_dir(os.path.dirname(self.dst))
        self.committed = True

    def abort(self) -> None:
        if self._thread is not None:
            self._error = self._error or RuntimeError("aborted")   # skip what is queued
            self._stop()
        try:
            if self._writer is not None:
                self._writer.close()
        except Exception:   # the file is being thrown away
            pass
        try:
            os.remove(self.tmp)
        except FileNotFoundError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if not self.committed:
            self.abort()
        return False


def dictionary_columns(schema: pa.Schema) -> list:
    """Columns worth Parquet dictionary encoding: all but the floats.  Floats (computed
    vols and Greeks above all) are nearly all distinct, and trying a dictionary on them
    first costs more than the rest of the write (1M swept rows: 1.2 s -> 0.45 s)."""
    return [f.name for f in schema if not pa.types.is_floating(f.type)]


def check_output(dst: str, overwrite: bool) -> None:
    """Refuse an existing ``dst`` (unless ``overwrite``) or a missing/unwritable folder."""
    if os.path.isdir(dst):
        raise StreamError(f"{dst} is a directory; give a file name for the output")
    if os.path.exists(dst) and not overwrite:
        raise StreamError(f"{dst} exists (use --overwrite)")
    folder = os.path.dirname(os.path.abspath(dst))
    if not os.path.isdir(folder):
        raise StreamError(f"cannot write {dst}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise StreamError(f"cannot write {dst}: folder {folder} is not writable")
