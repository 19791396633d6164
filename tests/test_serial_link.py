"""The serial link over loop://, a pty pair and socket://: bytes in order, reconnect, counters."""

from __future__ import annotations

import os
import random
import socket
import threading
import time
import tty

import pytest
import serial

from fieldvane.io.capture import EVENT_LINK_OPEN, EVENT_LOST, CaptureWriter, Chunk, read_capture
from fieldvane.io.capture_thread import CaptureThread
from fieldvane.io.serial_link import ChunkQueue, SerialLink

TIMEOUT = 10.0


def collect(link, n_bytes, max_chunks=100000):
    """Return the bytes and chunks of the link until n_bytes arrived (bounded in count and time), taken as the
    live loop takes them (with shared reads: read here)."""
    chunks = []
    total = 0
    for _ in range(max_chunks):
        if total >= n_bytes:
            break
        got = link.take(timeout=TIMEOUT)
        assert got, f"timed out after {total} of {n_bytes} bytes"
        chunks += got
        total += sum(len(c.data) for c in got)
    return b"".join(c.data for c in chunks), chunks


def test_loop_url_delivers_every_byte_in_order():
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port).start()
    try:
        assert link.connected.wait(TIMEOUT)
        rng = random.Random(5)
        sent = bytes(rng.randrange(256) for _ in range(20000))
        for i in range(0, len(sent), 997):
            port.write(sent[i:i + 997])
        data, chunks = collect(link, len(sent))
        assert data == sent
        times = [c.host_time_ns for c in chunks]
        assert times == sorted(times) and all(isinstance(t, int) for t in times)
        c = link.counters()
        assert chunks[0].event == EVENT_LINK_OPEN and not chunks[0].data    # the open comes first
        assert c["bytes_read"] == len(sent) and c["chunks_read"] == len(chunks) - 1
        assert c["chunks_dropped"] == 0 and c["opens"] == 1
    finally:
        assert link.stop(TIMEOUT)
    assert not link.connected.is_set()


def make_pty(link_path):
    master, slave = os.openpty()
    tty.setraw(slave)          # no echo or line editing before pyserial configures it
    if os.path.lexists(link_path):
        os.unlink(link_path)
    os.symlink(os.ttyname(slave), link_path)
    return master, slave


@pytest.mark.parametrize("shared", [False, True])
def test_pty_vanishes_and_returns(tmp_path, shared):
    path = str(tmp_path / "sensor")
    master, slave = make_pty(path)
    link = SerialLink(path, reconnect_min_s=0.01, reconnect_max_s=0.05)
    if shared:
        link.share_reads()
    link.start()
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        first = bytes(range(256)) * 20
        os.write(master, first)
        data, _ = collect(link, len(first))
        assert data == first
        # The port vanishes: the device goes away (master closed, path removed).
        os.unlink(path)
        os.close(master)
        os.close(slave)
        assert link.wait_for(lambda l: l.disconnects == 1 and not l.connected.is_set(), TIMEOUT)
        assert link.wait_for(lambda l: l.open_failures >= 1, TIMEOUT)   # retries while absent
        # ...and returns under the same name.
        master, slave = make_pty(path)
        assert link.wait_for(lambda l: l.opens == 2, TIMEOUT)
        second = b"after the port came back" * 100
        os.write(master, second)
        data, _ = collect(link, len(second))
        assert data == second
        c = link.counters()
        assert (c["opens"], c["disconnects"], c["bytes_read"]) == (2, 1, len(first) + len(second))
    finally:
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)


def _listen(port):
    """Return a TCP server socket listening on 127.0.0.1:port (0: any free port), accepts timing out after TIMEOUT."""
    server = socket.socket()
    server.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)   # the restart binds the same port again
    server.bind(("127.0.0.1", port))
    server.listen(1)
    server.settimeout(TIMEOUT)
    return server


def test_socket_url_server_restart():
    server = _listen(0)
    port = server.getsockname()[1]
    link = SerialLink(f"socket://127.0.0.1:{port}", reconnect_min_s=0.01,
                      reconnect_max_s=0.05).start()
    try:
        conn, _ = server.accept()
        # pyserial's open() empties the input buffer: send only once the open has completed.
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        conn.sendall(b"one" * 1000)
        assert collect(link, 3000)[0] == b"one" * 1000
        conn.close()
        server.close()                     # the port vanishes entirely (connections refused)
        assert link.wait_for(lambda l: l.disconnects == 1, TIMEOUT)
        assert link.wait_for(lambda l: l.open_failures >= 1, TIMEOUT)
        server = _listen(port)
        conn, _ = server.accept()
        assert link.wait_for(lambda l: l.opens == 2, TIMEOUT)
        conn.sendall(b"two" * 1000)
        assert collect(link, 3000)[0] == b"two" * 1000
        conn.close()
    finally:
        assert link.stop(TIMEOUT)
        server.close()


def test_missing_port_backs_off_and_stops_cleanly(tmp_path):
    before = set(threading.enumerate())
    link = SerialLink(str(tmp_path / "absent"), reconnect_min_s=0.01, reconnect_max_s=0.02)
    link.start()
    assert link.wait_for(lambda l: l.open_failures >= 3, TIMEOUT)
    assert link.opens == 0 and "open failed" in link.last_error
    assert link.stop(TIMEOUT)
    assert set(threading.enumerate()) == before


def test_chunk_queue_is_bounded_in_bytes():
    q = ChunkQueue(max_bytes=100)
    assert q.put(Chunk(1, b"a" * 60))
    assert not q.put(Chunk(2, b"b" * 41))
    assert q.put(Chunk(3, b"c" * 40))
    assert (q.chunks_dropped, q.bytes_dropped, q.queued_bytes) == (1, 41, 100)
    assert q.get(0).data == b"a" * 60
    hole = q.get(0)                       # the consumer learns where bytes went missing
    assert (hole.event, hole.lost, hole.data) == (EVENT_LOST, 41, b"")
    assert q.get(0).data == b"c" * 40 and q.get(0) is None


@pytest.mark.parametrize("shared", [False, True])
def test_bytes_waiting_before_the_open_are_kept(tmp_path, shared):
    # pyserial flushes a port's input when it opens it; the link must not (the bytes a sensor
    # sent while the port was being opened would vanish uncounted).
    path = str(tmp_path / "sensor")
    master, slave = make_pty(path)
    early = bytes(range(1, 256)) * 8
    os.write(master, early)                       # sent before the link opens the port
    link = SerialLink(path)
    if shared:
        link.share_reads()
    link.start()
    try:
        data, _ = collect(link, len(early))
        assert data == early and link.counters()["bytes_read"] == len(early)
    finally:
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)


def test_socket_bytes_sent_at_connect_are_kept():
    server = _listen(0)
    burst = bytes(random.Random(9).randrange(256) for _ in range(50000))
    link = SerialLink(f"socket://127.0.0.1:{server.getsockname()[1]}").start()
    try:
        conn, _ = server.accept()
        conn.sendall(burst)                       # at once, racing the link's open()
        assert collect(link, len(burst))[0] == burst
        conn.close()
    finally:
        assert link.stop(TIMEOUT)
        server.close()


def test_the_capture_gets_every_byte_even_when_the_queue_drops(tmp_path):
    port = serial.serial_for_url("loop://", timeout=0.05)
    capture = CaptureThread(CaptureWriter(tmp_path / "cap"))
    link = SerialLink("loop://", opener=lambda: port, max_queued_bytes=5000, capture=capture)
    capture.start()
    link.start()
    rng = random.Random(8)
    sent = bytes(rng.randrange(256) for _ in range(200_000))
    try:
        assert link.connected.wait(TIMEOUT)
        for i in range(0, len(sent), 4000):       # nobody reads the queue: it overflows
            port.write(sent[i:i + 4000])
        assert link.wait_for(lambda l: l.bytes_read == len(sent), TIMEOUT)
    finally:
        assert link.stop(TIMEOUT)
    assert capture.close(TIMEOUT)
    c = link.counters()
    assert c["bytes_dropped"] > 0 and c["bytes_dropped"] + c["queued_bytes"] == len(sent)
    assert b"".join(ch.data for ch in read_capture(tmp_path / "cap")) == sent
    assert capture.counters()["bytes_lost"] == 0


class ThreadNotingCapture:
    """A capture stand-in: keeps every chunk it is given and the name of the thread that gave it."""

    def __init__(self):
        self.chunks: list[Chunk] = []
        self.threads: list[str] = []

    def put(self, chunk):
        self.chunks.append(chunk)
        self.threads.append(threading.current_thread().name)
        return True


def test_shared_reads_keep_every_byte_in_order_whichever_thread_reads():
    # The consumer reads the port itself while it waits in take(); while it is busy for longer than
    # watch_s the link's thread reads instead. Both hand on under one lock: the consumer, the capture
    # and the queue see the stream in order, with host times that never go back.
    master, slave = os.openpty()
    tty.setraw(slave)
    capture = ThreadNotingCapture()
    link = SerialLink(os.ttyname(slave), capture=capture, watch_s=0.003)
    link.share_reads()
    link.start()
    rng = random.Random(21)
    sent = bytes(rng.randrange(256) for _ in range(300_000))

    def writer():
        i = 0
        while i < len(sent):
            n = rng.randrange(1, 3000)
            view = memoryview(sent)[i:i + n]
            while view:
                view = view[os.write(master, view):]
            i += n
            time.sleep(rng.choice([0, 0, 0.0005, 0.002]))

    th = threading.Thread(target=writer)
    busy = random.Random(22)
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert link.reads_shared
        th.start()
        chunks, total = [], 0
        while total < len(sent):
            got = link.take(timeout=TIMEOUT)
            assert got, f"timed out after {total} of {len(sent)} bytes"
            chunks += got
            total += sum(len(c.data) for c in got)
            time.sleep(busy.choice([0, 0, 0, 0.001, 0.012]))       # now and then a long batch
    finally:
        if th.ident is not None:
            th.join(TIMEOUT)
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)
    data = [c for c in chunks if c.data]
    assert b"".join(c.data for c in data) == sent
    assert b"".join(c.data for c in capture.chunks) == sent
    assert [c.host_time_ns for c in capture.chunks if c.data] == [c.host_time_ns for c in data]
    times = [c.host_time_ns for c in data]
    assert times == sorted(times)
    readers = set(capture.threads[1:])          # (the first is the open event)
    assert threading.current_thread().name in readers                        # the consumer read the port
    assert any(name.startswith("fieldvane-link") for name in readers)        # and the link's thread did
    c = link.counters()
    assert c["bytes_read"] == len(sent) and c["chunks_dropped"] == 0
    assert (c["disconnects"], c["opens"]) == (0, 1)      # neither reader took the other's empty port for a vanished one


def test_shared_reads_notice_a_vanished_device_in_the_consumer_and_reopen(tmp_path):
    path = str(tmp_path / "sensor")
    master, slave = make_pty(path)
    link = SerialLink(path, reconnect_min_s=0.01, reconnect_max_s=0.05, watch_s=30.0)  # the thread would not look
    link.share_reads()
    link.start()
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert [c.event for c in link.take(timeout=TIMEOUT)] == [EVENT_LINK_OPEN]
        closer = threading.Timer(0.05, lambda: (os.unlink(path), os.close(master), os.close(slave)))
        closer.start()
        start = time.monotonic()
        while link.disconnects == 0 and time.monotonic() - start < TIMEOUT:
            assert link.take(timeout=TIMEOUT) == []         # the consumer, waiting on the port, finds it gone
        closer.join()
        assert link.disconnects == 1 and "read failed" in link.last_error and not link.connected.is_set()
        master, slave = make_pty(path)
        assert link.wait_for(lambda l: l.opens == 2, TIMEOUT)
        os.write(master, b"back again")
        data, chunks = collect(link, 10)
        assert data == b"back again" and chunks[0].event == EVENT_LINK_OPEN
    finally:
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)


def test_a_live_loop_shares_the_reads_of_a_plain_port_only():
    from fieldvane.io.live import LiveLoop, make_decoder

    pty_link = SerialLink("/dev/null")
    LiveLoop(pty_link, make_decoder("binary"), lambda s: None, [], None, log=None)
    assert pty_link._shared
    port = serial.serial_for_url("loop://", timeout=0.05)
    loop_link = SerialLink("loop://", opener=lambda: port)
    LiveLoop(loop_link, make_decoder("binary"), lambda s: None, [], None, log=None)
    loop_link.start()
    try:
        assert loop_link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert not loop_link.reads_shared                  # loop:// has no descriptor: its thread reads
        port.write(b"abc")
        assert collect(loop_link, 3)[0] == b"abc"
    finally:
        assert loop_link.stop(TIMEOUT)



class HoldingCapture:
    """A capture stand-in that holds the link's thread inside its first put of data (the thread holds the port's
    lock meanwhile): the consumer can then be made to arrive while the thread is reading."""

    def __init__(self):
        self.chunks: list[Chunk] = []
        self.entered = threading.Event()
        self.release = threading.Event()

    def put(self, chunk):
        self.chunks.append(chunk)
        if chunk.data and threading.current_thread().name.startswith("fieldvane-link") and not self.entered.is_set():
            self.entered.set()
            self.release.wait(TIMEOUT)
        return True


def test_a_consumer_that_loses_the_port_to_the_thread_does_not_see_a_vanished_device():
    master, slave = os.openpty()
    tty.setraw(slave)
    capture = HoldingCapture()
    link = SerialLink(os.ttyname(slave), capture=capture, watch_s=0.005, reconnect_min_s=0.01)
    link.share_reads()
    link.start()
    releaser = threading.Timer(0.2, capture.release.set)
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert [c.event for c in link.take(timeout=0)] == [EVENT_LINK_OPEN]
        os.write(master, b"first ")
        assert capture.entered.wait(TIMEOUT)       # the consumer was away: the thread read it and is handing it on
        os.write(master, b"second")                # the port is readable again while the thread holds the lock
        releaser.start()
        got = link.take(timeout=TIMEOUT)           # select says ready; the thread reads "second" before we get the lock
        data = b"".join(c.data for c in got)
        if len(data) < 12:
            data += collect(link, 12 - len(data))[0]
        assert data == b"first second"
        assert (link.disconnects, link.opens, link.last_error) == (0, 1, None)
    finally:
        releaser.cancel()
        capture.release.set()
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)


def test_bytes_waiting_in_the_port_at_the_stop_reach_the_capture():
    master, slave = os.openpty()
    tty.setraw(slave)
    capture = ThreadNotingCapture()
    link = SerialLink(os.ttyname(slave), capture=capture, watch_s=0.5)   # (long: the thread has not looked yet)
    link.share_reads()
    link.start()
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert [c.event for c in link.take(timeout=0.01)] == [EVENT_LINK_OPEN]
        os.write(master, b"the sensor's last frames")     # arrive while the loop estimates its last batch
    finally:
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)
    assert b"".join(c.data for c in capture.chunks) == b"the sensor's last frames"


def test_shared_reads_work_on_a_descriptor_above_1024():
    import resource

    soft, _hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft < 1200:
        pytest.skip("needs a file limit above 1200")
    held = []
    master = slave = None
    link = None
    try:
        held = [os.open(os.devnull, os.O_RDONLY) for _ in range(1100)]      # a long run with many files open
        master, slave = os.openpty()
        tty.setraw(slave)
        link = SerialLink(os.ttyname(slave), reconnect_min_s=0.01)
        link.share_reads()
        link.start()
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert link._fd >= 1024
        os.write(master, b"abc")
        got = link.take(timeout=0.01) + link.take(timeout=2.0)
        assert b"".join(c.data for c in got) == b"abc"
        time.sleep(0.05)                          # the consumer away longer than watch_s: the thread looks
        assert link._thread.is_alive() and link.connected.is_set()
    finally:
        if link is not None:
            link.stop(TIMEOUT)
        for fd in held + [fd for fd in (master, slave) if fd is not None]:
            os.close(fd)


def test_a_forced_stop_between_a_read_and_the_capture_still_captures_the_bytes():
    # With shared reads the loop's thread reads, and a second Ctrl-C raises KeyboardInterrupt there. Here it
    # comes just after a read, before the chunk reached the capture (the clock that stamps it raises once).
    master, slave = os.openpty()
    tty.setraw(slave)
    capture = ThreadNotingCapture()
    calls = {"n": 0, "armed": False}

    def clock():
        if calls["armed"]:
            calls["armed"] = False
            raise KeyboardInterrupt
        calls["n"] += 1
        return time.time_ns()

    link = SerialLink(os.ttyname(slave), capture=capture, clock=clock, watch_s=30.0)
    link.share_reads()
    link.start()
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        assert [c.event for c in link.take(timeout=0)] == [EVENT_LINK_OPEN]
        os.write(master, b"the last frame")
        calls["armed"] = True
        with pytest.raises(KeyboardInterrupt):
            while True:
                link.take(timeout=TIMEOUT)
    finally:
        assert link.stop(TIMEOUT)
        os.close(master)
        os.close(slave)
    assert b"".join(c.data for c in capture.chunks) == b"the last frame"
    assert link.bytes_read == len(b"the last frame")
