"""Emitter: streams a SimulatedRun as wire frames or CSV lines to a pty, a TCP client or a file.

The emitter plays the sensor electronics: it runs in its own thread (`start()` / `stop()`, or
`run()` in the caller's thread), paced by the sample rate in real time or as fast as the sink
takes the bytes, and can inject faults (bit flips, garbage bytes, a pause) for tests and demos.

Real time means the sensor does not wait for anyone: when a pty has no reader (its buffer is full)
or no TCP client is connected, records are dropped and counted, and receivers see sequence gaps.
As fast as possible (`realtime=False`) waits for the sink instead, so nothing is dropped.
A pty or TCP sink stays open after the run's end until the emitter is stopped.
"""

from __future__ import annotations

import errno
import fcntl
import os
import select
import socket
import struct
import termios
import threading
import time
import tty
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator

import numpy as np

from .frames import (TRUTH_COLUMNS, csv_header_line, csv_line, encode_frame, interleave_xy,
                     metadata_lines, time_to_ns)
from .scenario import SimulatedRun

FORMATS = ("binary", "csv")
_POLL_S = 0.05                 # how often blocked waits look at the stop event
_PARTIAL_WRITE_LIMIT_S = 1.0   # real time: give up on the rest of a half-written record after this


# ----- records --------------------------------------------------------------------------

def preamble(run: SimulatedRun, fmt: str, include_truth: bool = False) -> bytes:
    """Return what a receiver gets first on a new connection: CSV metadata + header, or one 0x00.

    The 0x00 before the first frame is what wire_format.md recommends: whatever partial bytes
    the receiver held are then ended before the first frame arrives.
    """
    if fmt == "csv":
        extra = TRUTH_COLUMNS if include_truth else ()
        return metadata_lines(run.metadata()) + csv_header_line(run.channels, extra)
    return b"\x00"


def encode_records(run: SimulatedRun, fmt: str = "binary", pass_index: int = 0,
                   include_truth: bool = False,
                   zero_before_each: bool = False) -> Iterator[tuple[float, bytes]]:
    """Yield (t in s since the stream's start, bytes) per sample: one wire frame or one CSV line.

    A probe's missing values (run.missing) are NaN in a frame and empty fields in a CSV line.

    pass_index > 0 continues a repeated run: seq and time go on from the previous pass.
    zero_before_each puts a 0x00 before every frame too (wire_format.md allows it), so a frame
    that loses its delimiter spoils only itself.
    """
    if fmt not in FORMATS:
        raise ValueError(f"format: must be one of {', '.join(FORMATS)}, got {fmt!r}")
    n_total = run.n_samples or (int(run.seq[-1]) + 1 if len(run) else 0)
    seq_offset = pass_index * n_total
    t_offset = pass_index * n_total / run.sample_rate_hz
    lead = b"\x00" if zero_before_each and fmt == "binary" else b""
    for i in range(len(run)):
        t = float(run.t[i]) + t_offset
        if fmt == "binary":
            rec = lead + encode_frame(int(run.seq[i]) + seq_offset, time_to_ns(t), int(run.status[i]),
                                      run.f[i, 0], run.f[i, 1], interleave_xy(run.z[i]))
        else:
            extra = ((*run.u[i], run.b_nT[i]) if include_truth else ())
            missing = None if run.missing is None else run.missing[i]
            rec = csv_line(t, run.f[i, 0], run.f[i, 1], run.z[i], extra, missing)
        yield t, rec


# ----- faults ---------------------------------------------------------------------------

@dataclass(frozen=True)
class FaultPlan:
    """Faults to inject, by record number in the stream (0-based, counting across repeats).

    bit_flips_at / bit_flip_every: flip one random bit of those records (never the final
    delimiter). garbage_at / garbage_every: send garbage_len random bytes before those records,
    ended by the record delimiter when garbage_delimited (else the next record is lost with it).
    pause_at: stop sending for pause_s seconds before that record (the link stalls; nothing lost).
    """

    bit_flips_at: tuple[int, ...] = ()
    bit_flip_every: int = 0
    garbage_at: tuple[int, ...] = ()
    garbage_every: int = 0
    garbage_len: int = 16
    garbage_delimited: bool = True
    pause_at: int | None = None
    pause_s: float = 0.0
    seed: int = 0

    def flips(self, k: int) -> bool:
        """Return True when record k gets a bit flip."""
        return k in self.bit_flips_at or (self.bit_flip_every > 0 and k % self.bit_flip_every
                                          == self.bit_flip_every - 1)

    def garbage_before(self, k: int) -> bool:
        """Return True when garbage goes out just before record k."""
        return k in self.garbage_at or (self.garbage_every > 0 and k % self.garbage_every
                                        == self.garbage_every - 1)


def flip_bit(record: bytes, rng: np.random.Generator) -> bytes:
    """Return record with one random bit flipped, its last byte (the delimiter) left alone."""
    if len(record) < 2:
        return record
    data = bytearray(record)
    pos = int(rng.integers(0, len(data) - 1))
    data[pos] ^= 1 << int(rng.integers(0, 8))
    return bytes(data)


def garbage(n: int, fmt: str, delimited: bool, rng: np.random.Generator) -> bytes:
    """Return n random bytes holding no record delimiter, plus the delimiter when delimited."""
    delim = 0x00 if fmt == "binary" else 0x0A
    data = rng.integers(0, 255, size=n, dtype=np.uint8)
    data[data >= delim] += 1           # maps 0..254 onto 0..255 without the delimiter value
    return bytes(data) + (bytes([delim]) if delimited else b"")


# ----- sinks ----------------------------------------------------------------------------

class Sink:
    """Where the bytes go. send() returns True when the whole chunk went out, False if dropped."""

    description = "sink"
    holds_open = False     # True: stays open after the run's end until the emitter is stopped

    def begin(self, preamble_bytes: bytes) -> None:
        """Remember / send what every new receiver gets first."""

    def send(self, data: bytes, wait: bool, stop: threading.Event) -> bool:
        """Send data; wait=False drops it (returns False) when the receiver is not ready."""
        raise NotImplementedError

    def finish(self, stop: threading.Event, timeout_s: float = 5.0) -> None:
        """Let the receiver take what was sent (bounded by timeout_s) before closing."""

    def wait_for_reader(self, stop: threading.Event) -> bool:
        """Block until a receiver is there (a file always is); returns False if stop was set first."""
        return not stop.is_set()

    def close(self) -> None:
        """Release the sink's files, descriptors or sockets."""


class FileSink(Sink):
    """Writes everything to a file (binary frames or CSV text, byte for byte)."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._fh = open(self.path, "wb")
        self.description = f"file {self.path}"

    def begin(self, preamble_bytes: bytes) -> None:
        """Write the preamble at the start of the file."""
        self._fh.write(preamble_bytes)

    def send(self, data: bytes, wait: bool, stop: threading.Event) -> bool:
        """Append data to the file; returns True."""
        self._fh.write(data)
        return True

    def finish(self, stop: threading.Event, timeout_s: float = 5.0) -> None:
        """Flush the file."""
        self._fh.flush()

    def close(self) -> None:
        """Close the file."""
        if not self._fh.closed:
            self._fh.close()


def _write_fd(fd: int, data: bytes, wait: bool, stop: threading.Event,
              clock: Callable[[], float] = time.monotonic) -> bool:
    """Write all of data to a non-blocking fd; without wait, drop it if the fd is not writable now."""
    view = memoryview(data)
    started = False
    deadline = None
    while view:
        try:
            n = os.write(fd, view)
        except BlockingIOError:
            n = 0
        if n:
            started = True
            view = view[n:]
            continue
        if not wait and not started:
            return False
        if not wait:
            # Half a record is out: finish it so the receiver's framing stays sane, within limits.
            deadline = deadline or clock() + _PARTIAL_WRITE_LIMIT_S
            if clock() > deadline:
                return False
        if stop.is_set():
            return False
        select.select([], [fd], [], _POLL_S)
    return True


class PtySink(Sink):
    """A pseudo-terminal pair: bytes go to the master; readers open `path` (the slave, raw mode).

    The slave stays open here too, so the pty (and its raw settings) lives while readers come and
    go; like a real serial device it stays there after the run's end (until the emitter stops):
    a reader blocked in a read would otherwise lose what it had gathered when the pty vanished.
    """

    holds_open = True

    def __init__(self):
        self.master_fd, self.slave_fd = os.openpty()
        tty.setraw(self.slave_fd)
        os.set_blocking(self.master_fd, False)
        self.path = os.ttyname(self.slave_fd)
        self.description = f"pty {self.path}"
        self._closed = False

    def begin(self, preamble_bytes: bytes) -> None:
        """Queue the preamble for the first reader."""
        if preamble_bytes:
            _write_fd(self.master_fd, preamble_bytes, True, threading.Event())

    def send(self, data: bytes, wait: bool, stop: threading.Event) -> bool:
        """Write data to the master side; without wait, drop it when the pty buffer is full."""
        return _write_fd(self.master_fd, data, wait, stop)

    def wait_for_reader(self, stop: threading.Event) -> bool:
        """Block until some process opens the slave side; returns False if stop was set first.

        Our own hold on the slave is let go meanwhile: while no process holds the slave, polling
        the master reports a hang-up (Linux, macOS), which ends when a reader opens it. The pty
        keeps its raw settings while the master is open.
        """
        os.close(self.slave_fd)
        poller = select.poll()
        poller.register(self.master_fd, select.POLLHUP)
        try:
            while not stop.is_set():
                if not any(ev & select.POLLHUP for _fd, ev in poller.poll(0)):
                    return True
                stop.wait(_POLL_S)
            return False
        finally:
            self.slave_fd = os.open(self.path, os.O_RDWR | os.O_NOCTTY)

    def unread_bytes(self) -> int:
        """Return the number of bytes sent but not yet read on the slave side."""
        buf = fcntl.ioctl(self.slave_fd, termios.FIONREAD, struct.pack("i", 0))
        return struct.unpack("i", buf)[0]

    def finish(self, stop: threading.Event, timeout_s: float = 5.0) -> None:
        """Wait (at most timeout_s) until a reader has taken every byte sent."""
        deadline = time.monotonic() + timeout_s
        while not stop.is_set() and time.monotonic() < deadline:
            if self.unread_bytes() == 0:
                return
            stop.wait(_POLL_S)

    def close(self) -> None:
        """Close both ends of the pty."""
        if not self._closed:
            self._closed = True
            for fd in (self.master_fd, self.slave_fd):
                try:
                    os.close(fd)
                except OSError:
                    pass


class TcpSink(Sink):
    """A TCP server on host:port (127.0.0.1 by default) serving one client at a time.

    port=0 picks a free port (see `.port`). Each new client first gets the preamble; when a
    client goes away the server accepts the next one. After the run's end the connection stays
    open (silent) until the emitter is stopped, like a pty, so no reader loses bytes to a close.
    """

    holds_open = True

    def __init__(self, port: int = 0, host: str = "127.0.0.1"):
        self._server = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._server.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            self._server.bind((host, int(port)))
        except OSError:
            self._server.close()
            raise
        self._server.listen(1)
        self._server.setblocking(False)
        self.host, self.port = self._server.getsockname()[:2]
        self.description = f"tcp {self.host}:{self.port}"
        self._client: socket.socket | None = None
        self._preamble = b""
        self.clients_served = 0
        self.disconnects = 0

    def begin(self, preamble_bytes: bytes) -> None:
        """Remember the preamble sent to each new client."""
        self._preamble = preamble_bytes

    def wait_for_reader(self, stop: threading.Event) -> bool:
        """Block until a client connects (it is accepted on the first send); False if stop was set first."""
        while not stop.is_set():
            if self._client is not None or select.select([self._server], [], [], _POLL_S)[0]:
                return True
        return False

    def _accept(self, wait: bool, stop: threading.Event) -> bool:
        while self._client is None:
            try:
                conn, _addr = self._server.accept()
            except BlockingIOError:
                if not wait or stop.is_set():
                    return False
                select.select([self._server], [], [], _POLL_S)
                continue
            conn.setblocking(False)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._client = conn
            self.clients_served += 1
            if self._preamble and not self._send_client(self._preamble, True, stop):
                return False
        return True

    def _send_client(self, data: bytes, wait: bool, stop: threading.Event) -> bool:
        try:
            return _write_fd(self._client.fileno(), data, wait, stop)
        except (BrokenPipeError, ConnectionResetError, ConnectionAbortedError):
            self._drop_client()
            return False
        except OSError as exc:
            if exc.errno in (errno.EPIPE, errno.ECONNRESET, errno.ENOTCONN):
                self._drop_client()
                return False
            raise

    def _drop_client(self) -> None:
        if self._client is not None:
            self._client.close()
            self._client = None
            self.disconnects += 1

    def send(self, data: bytes, wait: bool, stop: threading.Event) -> bool:
        """Send to the client (accepting one first; without wait, drop when none is connected)."""
        if not self._accept(wait, stop):
            return False
        return self._send_client(data, wait, stop)

    def close(self) -> None:
        """Close the client connection and the server socket."""
        if self._client is not None:
            self._client.close()
            self._client = None
        self._server.close()


def open_sink(spec: str) -> Sink:
    """Return the sink for 'pty', 'tcp:PORT' (127.0.0.1) or 'file:PATH' (ValueError otherwise)."""
    if spec == "pty":
        return PtySink()
    if spec.startswith("tcp:"):
        text = spec[4:]
        try:
            port = int(text)
        except ValueError:
            raise ValueError(f"tcp:PORT needs a port number, got {text!r}") from None
        if not 0 <= port <= 65535:
            raise ValueError(f"tcp port must be 0..65535, got {port}")
        return TcpSink(port)
    if spec.startswith("file:") and len(spec) > 5:
        return FileSink(spec[5:])
    raise ValueError(f"unknown destination {spec!r}: use pty, tcp:PORT or file:PATH")


# ----- the emitter ----------------------------------------------------------------------

@dataclass
class EmitStats:
    """Counters of one emitter: records sent/dropped, bytes sent, passes done, faults injected."""

    records_sent: int = 0
    records_dropped: int = 0
    bytes_sent: int = 0
    passes: int = 0
    bit_flips: int = 0
    garbage_bursts: int = 0
    pauses: int = 0
    injected: list = field(default_factory=list)   # (record number, fault name)


class Emitter:
    """Streams a SimulatedRun into a sink from a thread; `stop_event` ends it early.

    realtime=True paces records by their sample times (dropping what the sink cannot take now);
    False sends as fast as the sink takes them. repeat=True loops the run (seq and time go on)
    until stopped. zero_before_each sends a 0x00 before every frame as well as after it.
    `sent_all` is set once every record went out; the emitter then closes the
    sink and ends, except for a sink that holds open (pty, TCP), which waits for stop() first.
    """

    def __init__(self, run: SimulatedRun, sink: Sink, fmt: str = "binary", realtime: bool = True,
                 faults: FaultPlan | None = None, repeat: bool = False, include_truth: bool = False,
                 zero_before_each: bool = False, clock: Callable[[], float] = time.monotonic,
                 drain_timeout_s: float = 5.0):
        if fmt not in FORMATS:
            raise ValueError(f"format: must be one of {', '.join(FORMATS)}, got {fmt!r}")
        self.run_data, self.sink, self.fmt = run, sink, fmt
        self.realtime, self.repeat, self.include_truth = realtime, repeat, include_truth
        self.zero_before_each = zero_before_each
        self.faults = faults or FaultPlan()
        self.clock = clock
        self.drain_timeout_s = drain_timeout_s
        self.stop_event = threading.Event()
        self.sent_all = threading.Event()
        self.finished = threading.Event()
        self.stats = EmitStats()
        self.error: BaseException | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> "Emitter":
        """Start emitting in a daemon thread; returns self."""
        if self._thread is not None:
            raise RuntimeError("emitter already started")
        self._thread = threading.Thread(target=self.run, name="fieldvane-emitter", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 5.0) -> bool:
        """Ask the emitter to stop and wait up to timeout_s; returns True when it has ended."""
        self.stop_event.set()
        return self.join(timeout_s)

    def join(self, timeout_s: float | None = None) -> bool:
        """Wait for the emitter to end; returns True when it has."""
        return self.finished.wait(timeout_s)

    def wait_sent(self, timeout_s: float | None = None) -> bool:
        """Wait until every record went out (or the emitter ended); returns True when all did."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        while not self.sent_all.is_set() and not self.finished.is_set():
            step = _POLL_S if deadline is None else min(_POLL_S, deadline - time.monotonic())
            if step <= 0:
                break
            self.sent_all.wait(step)
        return self.sent_all.is_set()

    def run(self) -> EmitStats:
        """Emit the whole run (every pass when repeating) in this thread; returns the counters.

        With a sink that holds open (pty, TCP) this returns only after stop() from another thread.
        """
        stop = self.stop_event
        rng = np.random.default_rng(self.faults.seed)
        try:
            self.sink.begin(preamble(self.run_data, self.fmt, self.include_truth))
            k = 0
            t_start = self.clock()
            delay = 0.0
            pass_index = 0
            while not stop.is_set():
                for t, rec in encode_records(self.run_data, self.fmt, pass_index, self.include_truth,
                                             self.zero_before_each):
                    if stop.is_set():
                        break
                    delay = self._inject_before(k, rng, delay)
                    if self.realtime:
                        wait = t_start + t + delay - self.clock()
                        if wait > 0 and stop.wait(wait):
                            break
                    if self.faults.flips(k):
                        rec = flip_bit(rec, rng)
                        self._note(k, "bit_flip")
                        self.stats.bit_flips += 1
                    if self.sink.send(rec, not self.realtime, stop):
                        self.stats.records_sent += 1
                        self.stats.bytes_sent += len(rec)
                    else:
                        self.stats.records_dropped += 1
                    k += 1
                else:
                    self.stats.passes += 1
                    pass_index += 1
                    if self.repeat and len(self.run_data):
                        continue
                break
            if not stop.is_set():
                self.sink.finish(stop, self.drain_timeout_s)
                self.sent_all.set()
                if self.sink.holds_open:
                    stop.wait()
        except BaseException as exc:  # reported to whoever drives the thread
            self.error = exc
        finally:
            try:
                self.sink.close()
            finally:
                self.finished.set()
        return self.stats

    def _inject_before(self, k: int, rng: np.random.Generator, delay: float) -> float:
        f = self.faults
        if f.pause_at is not None and k == f.pause_at and f.pause_s > 0:
            self._note(k, "pause")
            self.stats.pauses += 1
            if self.realtime:
                delay += f.pause_s          # later records come later: the schedule shifts
            else:
                self.stop_event.wait(f.pause_s)
        if f.garbage_before(k):
            junk = garbage(f.garbage_len, self.fmt, f.garbage_delimited, rng)
            if self.sink.send(junk, not self.realtime, self.stop_event):
                self.stats.bytes_sent += len(junk)
            self._note(k, "garbage")
            self.stats.garbage_bursts += 1
        return delay

    def _note(self, k: int, what: str) -> None:
        if len(self.stats.injected) < 10_000:
            self.stats.injected.append((k, what))
