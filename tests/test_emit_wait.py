"""`emit --to pty` waits for its reader: a receiver started late (another terminal) still gets the whole run."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import termios
import threading

import pytest

from fieldvane.firmware_sim.emitter import PtySink, TcpSink
from fieldvane.io.wire import FrameDecoder

TIMEOUT = 30.0
pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="pseudo-terminals are POSIX only")


def test_pty_wait_returns_once_a_reader_holds_the_port_and_keeps_it_raw():
    sink = PtySink()
    try:
        reader = os.open(sink.path, os.O_RDWR | os.O_NOCTTY)
        try:
            assert sink.wait_for_reader(threading.Event())
            lflag = termios.tcgetattr(sink.slave_fd)[3]
            assert not lflag & (termios.ICANON | termios.ECHO)      # still raw: bytes pass untouched
            sink.send(b"\x00abc\x00", True, threading.Event())
            assert os.read(reader, 16) == b"\x00abc\x00"
        finally:
            os.close(reader)
    finally:
        sink.close()


def test_pty_wait_gives_up_when_stopped_and_keeps_the_port():
    sink = PtySink()
    try:
        stop = threading.Event()
        stop.set()
        assert sink.wait_for_reader(stop) is False
        assert os.ttyname(sink.slave_fd) == sink.path              # the pty is held open again
    finally:
        sink.close()


def test_tcp_wait_returns_when_a_client_connects():
    import socket

    sink = TcpSink(0)
    try:
        client = socket.create_connection((sink.host, sink.port), timeout=TIMEOUT)
        try:
            assert sink.wait_for_reader(threading.Event())
        finally:
            client.close()
    finally:
        sink.close()


def test_emit_to_pty_sends_nothing_before_its_late_reader_and_drops_nothing():
    proc = subprocess.Popen([sys.executable, "-m", "fieldvane", "emit", "static", "--to", "pty", "--duration", "0.5"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        first = proc.stdout.readline()
        path = first.split(" to pty ", 1)[1].split(" ", 1)[0]
        assert "waiting for a reader" in proc.stdout.readline()
        fd = os.open(path, os.O_RDWR | os.O_NOCTTY)            # the reader arrives (as late as it likes)
        try:
            assert "reader connected" in proc.stdout.readline()
            decoder, frames = FrameDecoder(), []
            while len(frames) < 100:
                frames += decoder.feed(os.read(fd, 4096))
            sent = proc.stdout.readline()
            assert sent.startswith("sent 100 records (") and sent.rstrip().endswith(", 0 dropped"), sent
        finally:
            os.close(fd)
        assert [f.seq for f in frames] == list(range(100))
        assert decoder.counters()["resync_bytes"] == 0 and decoder.counters()["seq_gaps"] == 0
        proc.send_signal(signal.SIGTERM)                     # like Ctrl-C in its terminal
        out, err = proc.communicate(timeout=TIMEOUT)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    assert first and "100 samples" in first
