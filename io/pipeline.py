"""The threads of replay's pipeline: a recording read ahead, the filter's next input prepared, estimates written behind.

The compiled parser, filter and formatter release Python's lock, so on two cores these stages run
side by side: the next block is read while the current one is estimated (the first while the
calibration loads), and each stretch of estimates is built and written while the filter goes on.
Each helper hands its error to the thread that waits for it, where the work would have failed in a
plain loop.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterable, Iterator

from fieldvane.io.worker_thread import WorkerThread

_END = object()


class ReadAhead:
    """The items of an iterable, produced by a daemon thread up to `depth` ahead; its error is raised to the
    consumer where the item it failed on would have come. close() stops the thread (also on early exit)."""

    def __init__(self, iterable: Iterable, depth: int = 1, name: str = "fieldvane-read"):
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = WorkerThread(self._work, iterable, name=name)
        self._thread.start()

    def _put(self, entry) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(entry, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def _work(self, iterable: Iterable) -> None:
        try:
            for item in iterable:
                if self._stop.is_set() or not self._put((item, None)):
                    return
            self._put((_END, None))
        except BaseException as exc:           # handed to the consumer
            self._put((_END, exc))

    def __iter__(self) -> Iterator:
        try:
            while True:
                item, error = self._queue.get()
                if item is _END:
                    if error is not None:
                        raise error
                    return
                yield item
        finally:
            self.close()

    def close(self, timeout: float = 5.0) -> None:
        """Stop producing and wait (up to timeout s) for the thread to end."""
        self._stop.set()
        while True:                            # unblock a producer waiting on a full queue
            try:
                self._queue.get_nowait()
            except queue.Empty:
                break
        if not self._thread.is_current():
            self._thread.join(timeout)


class Background:
    """function(*args) run in a daemon thread; result() waits for it and returns its value or raises its error."""

    def __init__(self, function, *args, name: str = "fieldvane-work"):
        self._value = self._error = None

        def run():
            try:
                self._value = function(*args)
            except BaseException as exc:       # handed to the thread that asks for the result
                self._error = exc

        self._thread = WorkerThread(run, name=name)
        self._thread.start()

    def result(self):
        """Wait for the work; return its value or raise its error."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._value

    def wait(self) -> None:
        """Wait for the work to end, whatever its outcome (the clean-up after another failure)."""
        self._thread.join()


class WriteBehind:
    """Writes one block while the next is read and estimated; at most one write waits, and they run in order."""

    def __init__(self):
        self._job: Background | None = None

    def submit(self, write, *args) -> None:
        """Wait for the previous write (raising its error), then start write(*args) in the background."""
        self.finish()
        self._job = Background(write, *args, name="fieldvane-write")

    def finish(self, raise_error: bool = True) -> None:
        """Wait for the write in progress; raise the error it met (when raise_error). Without raise_error (the clean-up
        after a failure) it waits through one Ctrl-C, so the file is not closed under a running write, and gives up
        at the next (a write stuck on a dead file system; the output is then dropped as after any failure)."""
        interrupts = 0
        while self._job is not None:
            job = self._job
            try:
                job.result()
            except KeyboardInterrupt:
                interrupts += 1
                if raise_error or interrupts > 1:
                    raise
                continue
            except BaseException:
                self._job = None            # the write's own error: it has ended
                if raise_error:
                    raise
                continue
            self._job = None
