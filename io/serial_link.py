"""The serial link: reads bytes, stamps host receive times, hands them to the capture first and
then to a bounded queue for the estimator; reopens with back-off when the port vanishes. Ports
are opened by pyserial URL (a device path, a pty path, `loop://`, `socket://HOST:PORT`, ...)
without the input flush pyserial does on open, so nothing that arrived before the open is thrown
away.

Who reads: a background thread, always, for ports without a plain descriptor. For a posix serial
port or pty whose consumer asked for it (`share_reads`, as the live loop does), the consumer reads
the port itself in `take` while it is waiting for bytes anyway, and the thread only opens the port
and reads what the consumer has left waiting for `watch_s` (while it estimates a long batch, or
is held up), so nothing waits in the kernel much longer than that. One thread wakes per frame
instead of two, without handing Python's interpreter lock between them (at 10 kHz, 52-55 us of
CPU per frame against 59-62). Every read and its hand-over happen under one lock, so chunks keep
the order they were read in whoever read them.
"""

from __future__ import annotations

import os
import queue
import select
import threading
import time
from collections.abc import Callable

from fieldvane.io.capture import EVENT_LINK_OPEN, EVENT_LOST, Chunk
from fieldvane.io.worker_thread import WorkerThread

DEFAULT_MAX_QUEUED_BYTES = 16 * 1024 * 1024
# With shared reads, the thread reads what the consumer left in the port this long (s): the kernel
# holds at most about this much of the stream (6 KB at 10 kHz) whatever the consumer is doing.
DEFAULT_WATCH_S = 0.01


def _poller(fd: int):
    """Return a poll object watching fd for bytes (poll, not select: select cannot take a descriptor of 1024
    or more, as in a process with many files open). One per thread: a poll object is not shared."""
    poller = select.poll()
    poller.register(fd, select.POLLIN | select.POLLPRI)
    return poller


def _readable(poller, timeout: float | None) -> bool:
    """Return True if the polled descriptor has bytes (or news: a hang-up, an error) within timeout s; False if
    it was closed meanwhile."""
    try:
        events = poller.poll(None if timeout is None else max(0, int(timeout * 1000 + 0.999)))
    except (OSError, ValueError):
        return False
    return bool(events) and not any(ev & select.POLLNVAL for _fd, ev in events)


class ChunkQueue:
    """A FIFO of Chunks bounded in bytes: a put that would overflow it is refused (and counted).

    After a refusal the next accepted chunk is preceded by an EVENT_LOST chunk, so the consumer
    knows the stream has a hole there (the decoder resynchronises). Event chunks hold no bytes
    and are never refused. The hand-off is queue.SimpleQueue (in C): a chunk wakes the consumer
    without Python-level condition variables, a few microseconds per chunk at 10 kHz.
    """

    def __init__(self, max_bytes: int = DEFAULT_MAX_QUEUED_BYTES):
        self.max_bytes = max_bytes
        self._items: queue.SimpleQueue[Chunk] = queue.SimpleQueue()
        self._bytes = 0
        self._lock = threading.Lock()
        self._hole = 0
        self.chunks_dropped = 0
        self.bytes_dropped = 0

    @property
    def queued_bytes(self) -> int:
        """Return the number of bytes waiting in the queue."""
        return self._bytes

    def put(self, chunk: Chunk) -> bool:
        """Queue chunk without blocking; return False (counted as dropped) if it would overflow."""
        n = len(chunk.data)
        with self._lock:
            if n and self._bytes + n > self.max_bytes:
                self.chunks_dropped += 1
                self.bytes_dropped += n
                self._hole += n
                return False
            if self._hole:
                self._items.put(Chunk(chunk.host_time_ns, b"", EVENT_LOST, self._hole))
                self._hole = 0
            self._bytes += n
            self._items.put(chunk)
            return True

    def _taken(self, n: int) -> None:
        """Count n bytes as handed to the consumer."""
        if n:
            with self._lock:
                self._bytes -= n

    def clear(self) -> tuple[int, int]:
        """Empty the queue; return (chunks, bytes) that were waiting (from the consumer's thread, as get)."""
        with self._lock:
            chunks = 0
            while True:
                try:
                    self._items.get_nowait()
                except queue.Empty:
                    break
                chunks += 1
            n, self._bytes = self._bytes, 0
            return chunks, n

    def get(self, timeout: float | None = None) -> Chunk | None:
        """Return the oldest chunk, waiting up to timeout s; None if nothing arrived."""
        try:
            if timeout is not None and timeout <= 0:
                chunk = self._items.get_nowait()
            else:
                chunk = self._items.get(timeout=timeout)
        except queue.Empty:
            return None
        self._taken(len(chunk.data))
        return chunk

    def get_many(self, timeout: float | None = None, limit: int = 4096) -> list[Chunk]:
        """Return up to `limit` waiting chunks, oldest first, waiting up to timeout s for the first ([] if none)."""
        first = self.get(timeout)
        if first is None:
            return []
        out = [first]
        get = self._items.get_nowait
        while len(out) < limit:
            try:
                out.append(get())
            except queue.Empty:
                break
        self._taken(sum(len(c.data) for c in out[1:]))
        return out

    def __len__(self) -> int:
        return self._items.qsize()


class SerialLink:
    """Reads a port in a background thread into a bounded ChunkQueue; reconnects with back-off."""

    def __init__(self, url: str, baudrate: int = 115200, read_timeout: float = 0.05,
                 chunk_size: int = 4096, max_queued_bytes: int = DEFAULT_MAX_QUEUED_BYTES,
                 reconnect_min_s: float = 0.05, reconnect_max_s: float = 2.0,
                 opener: Callable[[], object] | None = None,
                 clock: Callable[[], int] = time.time_ns, capture=None,
                 watch_s: float = DEFAULT_WATCH_S, **serial_kwargs):
        self.url = url
        self.baudrate = baudrate
        self.read_timeout = read_timeout
        self.chunk_size = chunk_size
        self.reconnect_min_s = reconnect_min_s
        self.reconnect_max_s = reconnect_max_s
        self._opener = opener or self._default_opener
        self._serial_kwargs = serial_kwargs
        self._clock = clock
        self.queue = ChunkQueue(max_queued_bytes)
        self.capture = capture          # a CaptureThread: gets every chunk before the queue does
        self.connected = threading.Event()
        self._stop = threading.Event()
        self._state = threading.Condition()
        self._waiting = 0               # threads in wait_for (only they need a notification per read)
        self._port = None
        self._fd: int | None = None
        self._pollers = None            # two poll objects on _fd while it is open
        self._direct = False            # read the port's descriptor with os.read (a posix serial port)
        self._wake = threading.Event()   # the port closed or a stop: the thread's wait in _watch ends
        self._io = threading.Lock()     # held by whoever reads the port, until the chunk is handed on
        self._generation = 0            # counts opens and closes: a read checks it still has the same port
        self.watch_s = watch_s
        self._shared = False            # the consumer reads the port in take() (share_reads)
        self._consumer_waiting = False  # the consumer is in take()'s wait for the port
        self._consumer_at = 0.0         # time.monotonic() the consumer last left take()
        self._in_hand = b""             # bytes read and not yet given to the capture
        self.consumer_reading = False   # the consumer is reading the port in take(): bytes between port and capture
        self.interrupt_deferred = False  # a Ctrl-C that came meanwhile, raised once the bytes are handed on
        self._thread: WorkerThread | None = None
        self.opens = 0
        self.open_failures = 0
        self.disconnects = 0
        self.bytes_read = 0
        self.chunks_read = 0
        self.last_error: str | None = None

    def _default_opener(self):
        return open_port(self.url, baudrate=self.baudrate, timeout=0, **self._serial_kwargs)

    def attach_capture(self, capture) -> None:
        """Give every chunk read from now on to capture.put() first (before the start only)."""
        if self._thread is not None:
            raise RuntimeError("attach the capture before the link starts")
        self.capture = capture

    def share_reads(self) -> None:
        """Let the consumer read a plain posix port itself in take() (before the start; other ports ignore it)."""
        if self._thread is not None:
            raise RuntimeError("share the reads before the link starts")
        self._shared = True

    @property
    def reads_shared(self) -> bool:
        """Return True while the consumer reads the port itself (shared reads on a plain posix port)."""
        return self._shared and self._direct and self._port is not None

    def _prepare(self, port) -> int | None:
        """Return a file descriptor to wait on (port made non-blocking), or None to block in read."""
        try:
            fd = port.fileno()
        except Exception:
            fd = None
        if isinstance(fd, int) and fd >= 0:
            if port.timeout != 0:
                port.timeout = 0
            # A plain posix serial port or pty: read its descriptor directly (pyserial's read() adds a second
            # select and a Python loop per chunk, time the link's thread held the interpreter from the estimator).
            self._direct = type(port).__module__ == "serial.serialposix" and type(port).__name__ == "Serial"
            return fd
        if port.timeout is None or port.timeout == 0:
            port.timeout = self.read_timeout
        return None

    def _read_some(self, port, fd: int | None) -> bytes:
        """Return the bytes available now (waiting at most read_timeout s for the first one)."""
        if fd is not None:
            # Wait for readability ourselves, then take everything there in one read: a
            # socket:// port's in_waiting only says "at least one byte".
            if not _readable(_poller(fd), self.read_timeout):
                return b""
            if not self._direct:
                return port.read(self.chunk_size)
            try:
                data = os.read(fd, self.chunk_size)
            except BlockingIOError:
                return b""
            if not data:            # as pyserial says it: readable but empty is a vanished device
                raise OSError("device reports readiness to read but returned no data (device disconnected?)")
            return data
        data = port.read(1)
        if data:
            waiting = port.in_waiting
            if waiting:
                data += port.read(min(waiting, self.chunk_size))
        return data

    def start(self) -> "SerialLink":
        """Start the reader thread (it opens the port, retrying with back-off); return self."""
        if self._thread is not None:
            raise RuntimeError("link already started")
        self._thread = WorkerThread(self._run, name=f"fieldvane-link {self.url}")
        self._thread.start()
        return self

    @property
    def started(self) -> bool:
        """Return True once start() has been called."""
        return self._thread is not None

    def stop(self, timeout: float = 2.0) -> bool:
        """Stop the reader thread and close the port; return True if the thread ended in time."""
        self._stop.set()
        self._wake.set()
        port = self._port
        if port is not None:
            try:
                port.cancel_read()
            except Exception:
                pass
        if self._thread is None:
            return True
        return self._thread.join(timeout)

    def get(self, timeout: float | None = None) -> Chunk | None:
        """Return the next received Chunk (host_time_ns, bytes), or None after timeout s."""
        return self.queue.get(timeout)

    def get_many(self, timeout: float | None = None, limit: int = 4096) -> list[Chunk]:
        """Return every received Chunk waiting (up to limit), waiting up to timeout s for the first."""
        return self.queue.get_many(timeout, limit)

    def wait_for(self, predicate: Callable[["SerialLink"], bool], timeout: float) -> bool:
        """Return True once predicate(link) holds after an open, disconnect or read (False on timeout)."""
        with self._state:
            self._waiting += 1
            try:
                return self._state.wait_for(lambda: predicate(self), timeout)
            finally:
                self._waiting -= 1

    def counters(self) -> dict[str, int]:
        """Return opens, open_failures, disconnects, bytes/chunks read, dropped and queued counts."""
        return {"opens": self.opens, "open_failures": self.open_failures,
                "disconnects": self.disconnects, "bytes_read": self.bytes_read,
                "chunks_read": self.chunks_read, "chunks_dropped": self.queue.chunks_dropped,
                "bytes_dropped": self.queue.bytes_dropped, "queued_bytes": self.queue.queued_bytes,
                "connected": int(self.connected.is_set())}

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()

    def _notify(self) -> None:
        # Counters are updated before this test: a waiter registered after it sees them in its predicate.
        if self._waiting:
            with self._state:
                self._state.notify_all()

    def take(self, timeout: float | None = None, limit: int = 4096) -> list[Chunk]:
        """Return every received Chunk waiting (up to limit), waiting up to timeout s for the first; with shared
        reads the wait is on the port itself, and what it brings is read here (capture first, then the queue).
        From one consumer thread."""
        queue = self.queue
        pollers, generation = self._pollers, self._generation
        if len(queue) or not (self._shared and self._direct and pollers is not None):
            return queue.get_many(timeout, limit)
        self._consumer_waiting = True
        try:
            with self._io:          # what the thread read just before it saw us waiting is in the queue now
                if len(queue):
                    return queue.get_many(0, limit)
            ready = _readable(pollers[0], timeout)
        finally:
            self._consumer_waiting = False
            self._consumer_at = time.monotonic()
        if ready:
            with self._io:
                if generation == self._generation:
                    self._read_in_consumer()     # (readiness asked again: the thread may have read it meanwhile)
        return queue.get_many(0, limit)

    def _read_in_consumer(self) -> None:
        """_read_waiting in the consumer's thread, which takes Ctrl-C: a signal handler that would interrupt it sets
        interrupt_deferred instead (LiveLoop's does), and the KeyboardInterrupt comes once every byte read is in
        the capture and the queue -- raised between a read and its hand-off it lost them, or gave them twice."""
        self.consumer_reading = True
        try:
            self._read_waiting()
        finally:
            self.consumer_reading = False
        if self.interrupt_deferred:
            self.interrupt_deferred = False
            raise KeyboardInterrupt

    def _handoff(self, data: bytes) -> None:
        """Stamp, count and hand on one read (the capture first: it must see every byte); caller holds _io."""
        chunk = Chunk(self._clock(), data)
        self.bytes_read += len(data)
        self.chunks_read += 1
        if self.capture is not None:
            self.capture.put(chunk)
        self._in_hand = b""
        self.queue.put(chunk)

    def _read_waiting(self) -> None:
        """Read everything waiting in a plain posix port now, handing each read on; caller holds _io.

        A vanished device (readable but empty, or an error) closes the port here and is counted as a
        disconnect; the thread reopens it."""
        if self._pollers is None:
            return
        fd, poller = self._fd, self._pollers[1]
        read = 0
        try:
            while read < 1024 * 1024:
                # Readiness first: a tty set up for non-blocking reads (VMIN = VTIME = 0) answers an empty read
                # with no bytes, not EAGAIN, and that must not look like the device going away.
                if not _readable(poller, 0):
                    break
                try:
                    self._in_hand = data = os.read(fd, self.chunk_size)
                except BlockingIOError:
                    break
                if not data:        # as pyserial says it: readable but empty is a vanished device
                    raise OSError("device reports readiness to read but returned no data (device disconnected?)")
                self._handoff(data)
                read += len(data)
        except OSError as exc:
            if not self._stop.is_set():
                self.disconnects += 1
                self.last_error = f"read failed: {exc}"
            self._close_port_locked()
            read = read or -1
        except BaseException:
            # A second Ctrl-C (KeyboardInterrupt in the loop's thread, which reads now) between a read and the
            # capture: the bytes go to the capture all the same before the interrupt goes on.
            if self._in_hand and self.capture is not None:
                self.capture.put(Chunk(self._clock(), self._in_hand))
                self.bytes_read += len(self._in_hand)
            self._in_hand = b""
            raise
        finally:
            if read:
                self._notify()

    def _run(self) -> None:
        delay = self.reconnect_min_s
        try:
            while not self._stop.is_set():
                if self._port is None:
                    port = None
                    try:
                        port = self._opener()
                        fd = self._prepare(port)
                    except Exception as exc:
                        self._close(port)
                        self.open_failures += 1
                        self.last_error = f"open failed: {exc}"
                        self._notify()
                        self._stop.wait(delay)
                        delay = min(delay * 2, self.reconnect_max_s)
                        continue
                    delay = self.reconnect_min_s
                    opened = Chunk(self._clock(), b"", EVENT_LINK_OPEN)
                    with self._io:
                        self._port, self._fd = port, fd
                        # (the consumer's, and the one for reads under _io)
                        self._pollers = None if fd is None else (_poller(fd), _poller(fd))
                        self._generation += 1
                        self.opens += 1
                        if self.capture is not None:
                            self.capture.put(opened)
                        self.queue.put(opened)
                    self.connected.set()
                    self._notify()
                    if self._stop.is_set():
                        break
                try:
                    if self._shared and self._direct and self._fd is not None:
                        self._watch()
                        continue
                    data = self._read_some(self._port, self._fd)
                except Exception as exc:            # the port vanished (EIO, socket closed...), or an odd error
                    if self._stop.is_set():
                        break
                    self.disconnects += 1
                    self.last_error = f"read failed: {exc}"
                    self._close_port()
                    self._notify()
                    self._stop.wait(delay)
                    continue
                if data:
                    with self._io:
                        self._handoff(bytes(data))
                    self._notify()
        finally:
            if self._shared and self._direct:
                with self._io:              # what arrived during the loop's last batch: into the capture too
                    self._read_waiting()
            self._close_port()
            self._notify()

    def _watch(self) -> None:
        """With shared reads: wait watch_s (or until the port closes), then read what the consumer has left in
        the port (it is busy)."""
        self._wake.wait(self.watch_s)
        self._wake.clear()
        if self._port is None:                     # the consumer found it gone: reopen after the usual pause
            self._stop.wait(self.reconnect_min_s)
            return
        if self._stop.is_set() or self._consumer_waiting or time.monotonic() - self._consumer_at < self.watch_s:
            return
        with self._io:
            self._read_waiting()
        if self._port is None:
            self._stop.wait(self.reconnect_min_s)

    def _close_port(self) -> None:
        with self._io:
            self._close_port_locked()

    def _close_port_locked(self) -> None:
        port, self._port, self._fd, self._pollers = self._port, None, None, None
        self._generation += 1
        self._wake.set()
        self.connected.clear()
        self._close(port)

    @staticmethod
    def _close(port) -> None:
        if port is not None:
            try:
                port.close()
            except Exception:
                pass


def open_port(url: str, **kwargs):
    """Return an open pyserial port for url, opened without discarding bytes already waiting.

    pyserial empties the input buffer when it opens a port (posix ports, socket://, loop://);
    bytes a sensor sent in that instant would vanish uncounted. The flush is skipped here, so
    they are read like any others.
    """
    import serial

    port = serial.serial_for_url(url, do_not_open=True, **kwargs)
    keep = lambda: None  # noqa: E731 -- stands in for the flush during open() only
    port._reset_input_buffer = keep
    port.reset_input_buffer = keep
    try:
        port.open()
    finally:
        for name in ("_reset_input_buffer", "reset_input_buffer"):
            try:
                delattr(port, name)
            except AttributeError:
                pass
    return port
