"""The capture's own bounded buffer and writer thread: the link's reader hands every chunk here
first, without waiting; a slow or failing disk loses bytes only here, counted exactly and marked
in the capture, and never slows the link or the estimator."""

from __future__ import annotations

import collections
import threading
import time

from fieldvane.io.capture import EVENT_LINK_OPEN, EVENT_LOST, CaptureWriter, Chunk
from fieldvane.io.worker_thread import WorkerThread

DEFAULT_CAPTURE_BUFFER_BYTES = 64 * 1024 * 1024
MAX_BATCH_BYTES = 256 * 1024          # bytes handed to the writer at once (what a forced stop may leave in flight)
# Chunks handed to the writer at once: it frames each in Python (about 1.5 us), holding the interpreter, and lets go
# of it in the file write after them. 350 chunks at once (50 ms at 10 kHz) held the live loop up for 0.2 ms (the
# switch interval) at a time; 64 hold it at most about 0.1 ms.
MAX_BATCH_CHUNKS = 64
# The writer wakes when this much is buffered or after WRITE_INTERVAL_S, not at every chunk: at 10 kHz a wake-up per
# frame took the interpreter from the live loop thousands of times a second; the bytes are as safe in this buffer.
WAKE_BYTES = 64 * 1024
WRITE_INTERVAL_S = 0.05


class CaptureThread:
    """Feeds a CaptureWriter from a bounded FIFO in its own thread; counts every byte.

    Accounting (ints, see counters()): bytes_in = bytes_written + bytes_lost + bytes_buffered
    (+ bytes_in_flight while a write is under way), bytes_lost = lost_overflow (buffer full: the
    disk is too slow) + lost_disk (writes failed: disk full, I/O error) + lost_abandoned (not
    written when the run was stopped by force). Problems are queued as events for the caller
    to report (this thread never prints or calls back).
    """

    def __init__(self, writer: CaptureWriter, max_buffered_bytes: int = DEFAULT_CAPTURE_BUFFER_BYTES):
        if max_buffered_bytes <= 0:
            raise ValueError("max_buffered_bytes must be positive")
        self.writer = writer
        self.max_buffered_bytes = int(max_buffered_bytes)
        self._wake_bytes = min(WAKE_BYTES, max(1, self.max_buffered_bytes // 2))
        self._items: collections.deque[Chunk] = collections.deque()
        self._bytes = 0
        self._overflow_pending = 0          # refused bytes not yet marked in the stream
        self._cond = threading.Condition()
        self._stop = False
        self._abandon = False
        self._in_flight = 0
        self._more = False                  # the last batch left chunks behind: take them without waiting
        self.bytes_in = 0
        self.lost_overflow = 0
        self.lost_abandoned = 0
        self.overflow_events = 0
        self.failing = False                # the last write failed
        self.failures = 0                   # separate stretches of failed writes
        self._events: collections.deque[tuple[str, str]] = collections.deque(maxlen=1000)
        self._thread = WorkerThread(self._run, name="fieldvane-capture")
        self._started = False

    # -- producer side (the link's reader thread): never blocks, never raises

    def put(self, chunk: Chunk) -> bool:
        """Queue a chunk for writing; return False (bytes counted lost, marked) if the buffer is full."""
        n = len(chunk.data)
        with self._cond:
            self.bytes_in += n
            if self._stop:
                self.lost_abandoned += n
                return False
            if n and self._bytes + n > self.max_buffered_bytes:
                if not self._overflow_pending:
                    self.overflow_events += 1
                    self._events.append(("overflow", f"capture buffer full ({self.max_buffered_bytes} "
                                                     "bytes): the disk is too slow, bytes are being lost"))
                self._overflow_pending += n
                self.lost_overflow += n
                return False
            if self._overflow_pending:
                self._items.append(Chunk(chunk.host_time_ns, b"", EVENT_LOST, self._overflow_pending))
                self._overflow_pending = 0
            self._items.append(chunk)
            self._bytes += n
            if self._bytes >= self._wake_bytes:
                self._cond.notify()
            return True

    def mark_link_open(self, host_time_ns: int) -> None:
        """Queue a link-open marker (never refused: it holds no bytes)."""
        self.put(Chunk(host_time_ns, b"", EVENT_LINK_OPEN))

    # -- control

    def start(self) -> "CaptureThread":
        """Start the writer thread (once); return self."""
        if not self._started:
            self._started = True
            self._thread.start()
        return self

    @property
    def started(self) -> bool:
        """Return True once start() was called."""
        return self._started

    def close(self, timeout: float) -> bool:
        """Write what is buffered, close the writer; return True if done within timeout s."""
        with self._cond:
            self._stop = True
            self._cond.notify_all()
        if not self._started:
            self._run()
            return True
        return self._thread.join(timeout)

    def abandon(self) -> int:
        """Give up on the buffered bytes (counted lost); return the bytes still being written."""
        with self._cond:
            self._stop = self._abandon = True
            while self._items:
                self.lost_abandoned += len(self._items.popleft().data)
            self._bytes = 0
            self._cond.notify_all()
            return self._in_flight

    def join(self, timeout: float) -> bool:
        """Wait for the writer thread to end; return True if it did."""
        if self._started:
            return self._thread.join(timeout)
        return True

    def events(self) -> list[tuple[str, str]]:
        """Return and forget the queued events: ('overflow'|'failed'|'resumed', message)."""
        out = []
        while self._events:
            try:
                out.append(self._events.popleft())
            except IndexError:
                break
        return out

    @property
    def bytes_lost(self) -> int:
        """Return every received byte that is not in the capture (overflow, failed writes, abandoned)."""
        return self.lost_overflow + self.writer.bytes_lost + self.lost_abandoned

    @property
    def buffered_bytes(self) -> int:
        """Return the bytes waiting to be written."""
        return self._bytes

    def counters(self) -> dict:
        """Return the capture's counters (ints): bytes in/written/lost (by cause)/buffered, files."""
        w = self.writer
        return {"bytes_in": self.bytes_in, "bytes": w.bytes_written, "bytes_lost": self.bytes_lost,
                "lost_overflow": self.lost_overflow, "lost_disk": w.bytes_lost,
                "lost_abandoned": self.lost_abandoned, "buffered": self._bytes,
                "in_flight": self._in_flight, "write_errors": w.write_errors,
                "records": w.records_written, "files": len(w.files), "failing": int(self.failing)}

    # -- the writer thread

    def _take(self) -> list[Chunk] | None:
        with self._cond:
            waited = self._more
            while not self._stop and self._bytes < self._wake_bytes and not (waited and self._items):
                self._cond.wait(WRITE_INTERVAL_S)
                waited = True
            if not self._items:
                return None
            batch, size = [], 0
            while self._items and (not batch or (size + len(self._items[0].data) <= MAX_BATCH_BYTES
                                                  and len(batch) < MAX_BATCH_CHUNKS)):
                c = self._items.popleft()
                batch.append(c)
                size += len(c.data)
            self._more = bool(self._items)
            self._bytes -= size
            self._in_flight = size
            return batch

    def _run(self) -> None:
        try:
            while True:
                batch = self._take()
                if batch is None:
                    break
                try:
                    self.writer.write_chunks(batch)
                except OSError:
                    if not self.failing:
                        self.failing = True
                        self.failures += 1
                        self._events.append(("failed", f"capture write failed: {self.writer.last_error}; "
                                                       "raw bytes are being lost"))
                except Exception as exc:     # never let the thread die silently
                    self.writer.bytes_lost += sum(len(c.data) for c in batch)
                    self.failing = True
                    self._events.append(("failed", f"capture write failed: {exc!r}"))
                else:
                    if self.failing:
                        self.failing = False
                        self._events.append(("resumed", "capture writes succeed again"))
                finally:
                    with self._cond:
                        self._in_flight = 0
                if self._abandon:
                    break
        finally:
            with self._cond:
                if self._overflow_pending and not self._abandon:
                    self._items.append(Chunk(time.time_ns(), b"", EVENT_LOST, self._overflow_pending))
                    self._overflow_pending = 0
                rest = list(self._items)
                self._items.clear()
            if self._abandon and self.lost_abandoned:
                # Mark the abandoned tail too, if the disk lets us in the time left.
                rest = [Chunk(time.time_ns(), b"", EVENT_LOST, self.lost_abandoned)]
            if rest:
                try:
                    self.writer.write_chunks(rest)
                except OSError:
                    pass
            try:
                self.writer.close()
            except OSError as exc:
                self._events.append(("failed", f"capture close failed: {exc.strerror or exc}"))
