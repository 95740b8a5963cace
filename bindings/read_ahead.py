"""Run an iterator one item ahead in a thread, so the next record batch is decoded while
this one is computed (Arrow's readers release the GIL while they decode)."""

from __future__ import annotations

import queue
import threading


def read_ahead(iterator, depth: int = 1, name: str = "volsweep-reader"):
    """Yield the items of ``iterator``, produced at most ``depth`` items ahead in a thread.

    Memory stays bounded: the thread waits while ``depth`` items are unclaimed.  Errors
    surface in order; closing the generator (an exception or Ctrl-C downstream) stops the
    thread."""
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def produce():
        try:
            for item in iterator:
                while not stop.is_set():
                    try:
                        q.put((True, item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
        except BaseException as exc:   # handed over in order, raised by the consumer
            q.put((False, exc))
            return
        q.put((True, done))

    thread = threading.Thread(target=produce, name=name, daemon=True)
    thread.start()
    try:
        while True:
            ok, item = q.get()
            if not ok:
                raise item
            if item is done:
                return
            yield item
    finally:
        stop.set()
        while thread.is_alive():      # unblock a producer waiting on a full queue
            try:
                q.get_nowait()
            except queue.Empty:
                pass
            thread.join(0.05)
