"""End to end: link -> capture -> decoder -> estimate -> sinks, with faults; replay == live."""

from __future__ import annotations

import json
import math
import os
import random
import select
import signal
import socket
import subprocess
import sys
import textwrap
import threading
import tty

import numpy as np
import pytest
import serial
from cobs import cobs

from fieldvane.io.capture import CaptureWriter, read_capture
from fieldvane.io.live import LiveLoop, frames_from_capture, make_decoder, replay_capture
from fieldvane.io.row_block import RowBlock
from fieldvane.io.serial_link import SerialLink
from fieldvane.io.sinks import (CsvFormatter, Sink, TcpServerTransport, Transport,
                                close_sinks, open_sink)
from fieldvane.io.wire import Frame, encode_frame, encode_payload

TIMEOUT = 15.0


def toy_estimate(sample):
    """A deterministic stand-in for the estimator: direction from the first channels' X/Y."""
    v = np.array([sample.z[0].real, sample.z[0].imag, sample.z[1].real])
    n = float(np.linalg.norm(v))
    if not math.isfinite(n) or n == 0.0:
        return None
    u = v / n
    b = sample.f_a / 6.9958
    return {"t": sample.t, "ux": u[0], "uy": u[1], "uz": u[2], "b_nT": b, "bx_nT": b * u[0],
            "by_nT": b * u[1], "bz_nT": b * u[2], "sigma_deg": abs(sample.z[-1]),
            "flags": sample.status, "n_channels": len(sample.channels), "f_b": sample.f_b}


def make_frame(seq, rng):
    n = rng.choice((4, 8))
    vals = tuple(float(np.float32(rng.uniform(-1, 1))) for _ in range(n))
    return Frame(seq, 1_000_000 * seq + rng.randrange(1000), rng.randrange(16),
                 350000 + rng.uniform(-50, 50), 233500 + rng.uniform(-50, 50), vals)


def faulty_stream(seed, n):
    """Return (stream, expected decoder counters, number of intact frames) with known faults."""
    rng = random.Random(seed)
    out = bytearray(b"\x00")
    exp = dict(frames_ok=0, crc_errors=0, bad_frames=0, duplicates=0, seq_gaps=0,
               bytes_discarded=0)
    seq = 0
    for i in range(n):
        seq += 1
        f = make_frame(seq, rng)
        k = i % 10
        if k == 1:                        # bit flip: CRC-16 catches every single-bit error
            p = bytearray(encode_payload(f))
            p[rng.randrange(len(p))] ^= 1 << rng.randrange(8)
            enc = cobs.encode(bytes(p))
            out += enc + b"\x00"
            exp["crc_errors"] += 1
            exp["bytes_discarded"] += len(enc)
            exp["seq_gaps"] += 1
            continue
        if k == 3:                        # truncated frame; its delimiter survives
            enc = cobs.encode(encode_payload(f))
            cut = enc[:rng.randrange(1, len(enc))]
            out += cut + b"\x00"
            try:                          # classified with the reference `cobs` decoder
                cobs.decode(cut)
                exp["crc_errors"] += 1
            except cobs.DecodeError:
                exp["bad_frames"] += 1
            exp["bytes_discarded"] += len(cut)
            exp["seq_gaps"] += 1
            continue
        if k == 5:                        # random garbage longer than 256 bytes: oversize
            g = bytes(rng.randrange(1, 256) for _ in range(rng.randrange(257, 600)))
            out += g + b"\x00"
            exp["bad_frames"] += 1
            exp["bytes_discarded"] += len(g)
        if k == 7:                        # sent twice
            out += encode_frame(f)
            exp["duplicates"] += 1
        if k == 9:                        # frames lost upstream: a gap of 3
            seq += 3
            f = make_frame(seq, rng)
            exp["seq_gaps"] += 3
        out += encode_frame(f)
        exp["frames_ok"] += 1
    return bytes(out), exp


class StuckTransport(Transport):
    """A logger whose write blocks until the test ends (then returns)."""

    description = "stuck"

    def __init__(self):
        super().__init__()
        self.release = threading.Event()

    def write(self, lines):
        self.release.wait(TIMEOUT)
        return len(lines)


def start_loop(loop):
    result = {}
    th = threading.Thread(target=lambda: result.setdefault("summary", loop.run()))
    th.start()
    return th, result


def replay_to(capture_dir, path, fmt="csv", input_format=None):
    sink = open_sink(f"{fmt}:file:{path}")
    counters = replay_capture(capture_dir, toy_estimate, [sink], input_format)
    assert close_sinks([sink], TIMEOUT)
    return counters


def toy_block(samples):
    """toy_estimate over a batch, as one RowBlock of its records (what `fieldvane run` hands the loggers)."""
    rows = [r for r in map(toy_estimate, samples) if r is not None]
    return RowBlock({k: np.array([r[k] for r in rows]) for k in rows[0]} if rows else {})


@pytest.mark.parametrize("batched", [False, True], ids=["records", "row-blocks"])
def test_loop_url_faults_slow_loggers_capture_and_replay(tmp_path, batched):
    stream, expected = faulty_stream(1, 300)
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    cap_dir = tmp_path / "cap"
    capture = CaptureWriter(cap_dir, {"input_format": "binary"}, max_file_bytes=4000)
    stuck = StuckTransport()
    tcp = TcpServerTransport("127.0.0.1", 0, client_backlog_bytes=2048, client_sndbuf=4096)
    sinks = [open_sink(str(tmp_path / "live.csv")), open_sink(str(tmp_path / "live.jsonl")),
             Sink(CsvFormatter(), stuck, queue_size=16, name="stuck"),
             Sink(CsvFormatter(), tcp, name="tcp")]
    lazy = socket.create_connection(tcp.address)   # a client that never reads
    assert tcp.wait_clients(1, TIMEOUT)
    logs = []
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, sinks, capture, log=logs.append,
                    log_interval_s=0.0, sink_close_timeout_s=0.5, estimate_batch=toy_block if batched else None)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        rng = random.Random(2)
        pos = 0
        while pos < len(stream):          # uneven writes: chunk boundaries fall anywhere
            step = rng.randrange(1, 300)
            port.write(stream[pos:pos + step])
            pos += step
        # The loop keeps up although one logger is stuck and one TCP client never reads.
        assert loop.wait_for(lambda l: l.bytes == len(stream), TIMEOUT)
        assert loop.wait_for(lambda l: l.decoder.counters()["pending"] == 0, TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
        stuck.release.set()
        lazy.close()
    summary = result["summary"]
    assert not th.is_alive()
    assert not summary.sinks_closed             # the stuck logger was reported, not waited for
    assert sinks[2].join(TIMEOUT)               # released, its thread ends: none left behind
    assert all(not s.alive for s in sinks)
    dec = summary.counters["decoder"]
    assert {k: dec[k] for k in expected} == expected
    assert summary.counters["samples"] == expected["frames_ok"]
    records = summary.counters["records"]
    st = summary.counters["sink[stuck]"]
    assert st["accepted"] + st["dropped"] == records and st["dropped"] > 0
    assert summary.counters["sink[tcp]"]["written"] == records
    assert any(line.startswith("fieldvane live: final ") for line in logs)
    assert any("frames_ok=" in line for line in logs[:-1])      # periodic counter log
    # Capture: byte-identical to what was sent, across rotated files.
    assert len(capture.files) > 3
    assert b"".join(c.data for c in read_capture(cap_dir)) == stream
    # Replay of the capture equals the live output, bit for bit.
    rep = replay_to(cap_dir, tmp_path / "replay.csv")
    replay_to(cap_dir, tmp_path / "replay.jsonl", "jsonl")
    assert (tmp_path / "replay.csv").read_bytes() == (tmp_path / "live.csv").read_bytes()
    assert (tmp_path / "replay.jsonl").read_bytes() == (tmp_path / "live.jsonl").read_bytes()
    assert rep["decoder"] == {k: v for k, v in dec.items()}
    lines = (tmp_path / "live.csv").read_text().splitlines()
    assert len(lines) == 1 + records and lines[0].endswith("flags,f_b,n_channels")
    last = toy_estimate(next(s for s in reversed(list(frames_from_capture(cap_dir))) if toy_estimate(s) is not None))
    assert loop.last_record == last


def _pty(path):
    master, slave = os.openpty()
    tty.setraw(slave)
    if os.path.lexists(path):
        os.unlink(path)
    os.symlink(os.ttyname(slave), path)
    return master, slave


def _end_child(proc, master, slave):
    """Kill the child if it is still running and close both ends of its pty."""
    if proc.poll() is None:
        proc.kill()
        proc.wait(TIMEOUT)
    os.close(master)
    os.close(slave)


def test_pty_port_vanishes_mid_run_and_returns(tmp_path):
    path = str(tmp_path / "sensor")
    master, slave = _pty(path)
    rng = random.Random(3)
    frames = [make_frame(s, rng) for s in range(1, 401)]
    part1 = b"\x00" + b"".join(encode_frame(f) for f in frames[:150])
    part2 = b"".join(encode_frame(f) for f in frames[155:])   # 5 frames lost while away
    before = set(threading.enumerate())
    link = SerialLink(path, reconnect_min_s=0.01, reconnect_max_s=0.05)
    out = tmp_path / "live.csv"
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [open_sink(str(out))],
                    CaptureWriter(tmp_path / "cap", {"input_format": "binary"}), log=None)
    th, result = start_loop(loop)
    try:
        assert link.wait_for(lambda l: l.opens == 1, TIMEOUT)
        os.write(master, part1)
        assert loop.wait_for(lambda l: l.samples == 150, TIMEOUT)
        os.unlink(path)
        os.close(master)
        os.close(slave)
        assert link.wait_for(lambda l: l.disconnects == 1, TIMEOUT)
        master, slave = _pty(path)
        assert link.wait_for(lambda l: l.opens == 2, TIMEOUT)
        os.write(master, part2)
        assert loop.wait_for(lambda l: l.samples == 395, TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
        os.close(master)
        os.close(slave)
    assert set(threading.enumerate()) == before          # link, sink and loop threads all ended
    c = result["summary"].counters
    assert (c["decoder"]["frames_ok"], c["decoder"]["seq_gaps"], c["decoder"]["bad_frames"],
            c["decoder"]["crc_errors"]) == (395, 5, 0, 0)
    assert (c["link"]["opens"], c["link"]["disconnects"]) == (2, 1)
    assert b"".join(ch.data for ch in read_capture(tmp_path / "cap")) == part1 + part2
    samples = list(frames_from_capture(tmp_path / "cap"))
    assert [s.t for s in samples] == [f.t_ns / 1e9 for f in frames[:150] + frames[155:]]
    replay_to(tmp_path / "cap", tmp_path / "replay.csv")
    assert (tmp_path / "replay.csv").read_bytes() == out.read_bytes()


def test_csv_text_mode_over_loop(tmp_path):
    rng = random.Random(4)
    lines = ["# sensor: bench unit", "t,f_a,f_b,r_1a,th_1a,x_1b,y_1b,bx_nT"]
    expected_t = []
    for i in range(200):
        t = 0.001 * i
        if i % 50 == 25:
            lines.append(f"{t},350000,233500,oops,1,2,3,0")          # bad field
            continue
        lines.append(f"{t!r},{350000 + i},{233500 - i},{rng.uniform(0.1, 1)!r},"
                     f"{rng.uniform(-180, 180)!r},{rng.uniform(-1, 1)!r},{rng.uniform(-1, 1)!r},5")
        expected_t.append(t)
    text = ("\r\n".join(lines) + "\r\n").encode()
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    loop = LiveLoop(link, make_decoder("csv"), toy_estimate, [open_sink(str(tmp_path / "l.csv"))],
                    CaptureWriter(tmp_path / "cap", {"input_format": "csv"}), log=None)
    th, result = start_loop(loop)
    try:
        for i in range(0, len(text), 101):
            port.write(text[i:i + 101])
        assert loop.wait_for(lambda l: l.bytes == len(text), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    dec = result["summary"].counters["decoder"]
    assert (dec["lines_ok"], dec["bad_lines"], dec["header_lines"], dec["comment_lines"]) == \
        (196, 4, 1, 1)
    assert "column 'r_1a'" in loop.decoder.last_error
    samples = list(frames_from_capture(tmp_path / "cap"))     # format taken from metadata
    assert [s.t for s in samples] == expected_t
    s0 = samples[0]
    r, th_deg = (float(v) for v in lines[2].split(",")[3:5])
    assert s0.z[0] == complex(r * math.cos(math.radians(th_deg)), r * math.sin(math.radians(th_deg)))
    replay_to(tmp_path / "cap", tmp_path / "r.csv")
    assert (tmp_path / "r.csv").read_bytes() == (tmp_path / "l.csv").read_bytes()


SCRIPT = textwrap.dedent("""
    import sys
    sys.path.insert(0, {tests!r})
    from test_live import toy_estimate
    from fieldvane.io.live import run_live
    summary = run_live(sys.argv[1], "binary", toy_estimate, ["jsonl:stdout"],
                       capture_dir=sys.argv[2], log_interval_s=3600.0)
    sys.exit(130 if summary.interrupted else 0)
""")


def _read_until(fd, predicate, buf):
    for _ in range(10000):
        if predicate(buf):
            return buf
        r, _, _ = select.select([fd], [], [], TIMEOUT)
        assert r, f"timed out; got {buf[-500:]!r}"
        data = os.read(fd, 65536)
        assert data, f"stream ended; got {buf[-500:]!r}"
        buf += data
    raise AssertionError("too many reads")


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP], ids=["SIGTERM", "SIGHUP"])
def test_sigterm_flushes_sinks_and_prints_summary(tmp_path, signum):
    # SIGHUP: the terminal closed (an ssh session dropped) stops the run as cleanly as SIGTERM.
    path = str(tmp_path / "sensor")
    master, slave = _pty(path)
    script = tmp_path / "live_child.py"
    script.write_text(SCRIPT.format(tests=os.path.dirname(__file__)))
    proc = subprocess.Popen([sys.executable, str(script), path, str(tmp_path / "cap")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        err = _read_until(proc.stderr.fileno(), lambda b: b"link open" in b, b"")
        rng = random.Random(6)
        frames = [make_frame(s, rng) for s in range(1, 101)]
        sent = b"".join(encode_frame(f) for f in frames)
        os.write(master, sent)
        out = _read_until(proc.stdout.fileno(), lambda b: b.count(b"\n") >= 100, b"")
        proc.send_signal(signum)
        rest_out, rest_err = proc.communicate(timeout=TIMEOUT)
    finally:
        _end_child(proc, master, slave)
    assert proc.returncode == 130
    records = [json.loads(x) for x in (out + rest_out).splitlines()]
    assert [r["t"] for r in records] == [f.t_ns / 1e9 for f in frames]
    final = (err + rest_err).decode()
    assert "fieldvane live: final " in final and "frames_ok=100" in final
    assert b"".join(c.data for c in read_capture(tmp_path / "cap")) == sent


# ----------------------------------------------------------------- capture first, stop at once

import errno  # noqa: E402
import time  # noqa: E402

from fieldvane.io import capture as capture_module  # noqa: E402
from fieldvane.io.capture import EVENT_LOST, CaptureReader  # noqa: E402
from fieldvane.io.errors import EXIT_CAPTURE_LOST, EXIT_FAILURE  # noqa: E402
from fieldvane.io.live import capture_problem_lines, run_live, runs_from_capture  # noqa: E402


def frames_stream(n, seed=10, first_seq=1):
    rng = random.Random(seed)
    frames = [make_frame(s, rng) for s in range(first_seq, first_seq + n)]
    return frames, b"\x00" + b"".join(encode_frame(f) for f in frames)


def slow_estimate(seconds):
    """toy_estimate that takes `seconds` per sample (a deliberately slow estimator; the sleep
    stands for work, it synchronizes nothing)."""
    def estimate(sample):
        time.sleep(seconds)
        return toy_estimate(sample)
    return estimate


def test_capture_keeps_every_byte_when_the_estimator_falls_far_behind(tmp_path):
    # The estimator takes 0.5 ms a sample (2,000 samples/s); 8,000 frames arrive at once, far
    # more than 10x what it can take while they come in, through a link queue of 64 KiB.
    frames, stream = frames_stream(8000)
    path = str(tmp_path / "sensor")
    master, slave = _pty(path)
    link = SerialLink(path, max_queued_bytes=64 * 1024)
    loop = LiveLoop(link, make_decoder("binary"), slow_estimate(0.0005), [],
                    CaptureWriter(tmp_path / "cap", {"input_format": "binary"}), log=None)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        os.write(master, stream)
        assert link.wait_for(lambda l: l.bytes_read == len(stream), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
        os.close(master)
        os.close(slave)
    c = result["summary"].counters
    assert c["link"]["bytes_dropped"] > 0                      # the estimator could not keep up
    assert c["samples"] < len(frames)
    assert (c["decoder"]["crc_errors"], c["decoder"]["bad_frames"]) == (0, 0)   # holes resync
    assert c["capture"]["bytes"] == len(stream) and c["capture"]["bytes_lost"] == 0
    assert b"".join(ch.data for ch in read_capture(tmp_path / "cap")) == stream
    # The backlog at the stop was abandoned, not worked through: the capture holds it.
    assert c["not_estimated_bytes"] + c["not_estimated_samples"] > 0
    replayed = list(frames_from_capture(tmp_path / "cap"))
    assert [s.t for s in replayed] == [f.t_ns / 1e9 for f in frames]


class FlakyDisk:
    """os.write stand-in for the capture: raises ENOSPC while `full` is set."""

    def __init__(self, monkeypatch):
        self.real = os.write
        self.full = threading.Event()
        monkeypatch.setattr(capture_module, "_os_write", self)

    def __call__(self, fd, data):
        if self.full.is_set():
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return self.real(fd, data)


def test_full_disk_is_reported_at_once_counted_exactly_and_ends_with_exit_4(tmp_path, monkeypatch):
    disk = FlakyDisk(monkeypatch)
    frames, stream = frames_stream(3000, seed=12)
    parts = [stream[:50_000], stream[50_000:100_000], stream[100_000:]]
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    logs = []
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [open_sink(str(tmp_path / "l.csv"))],
                    CaptureWriter(tmp_path / "cap", {"input_format": "binary"}), log=logs.append)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(parts[0])
        assert loop.wait_for(lambda l: l.capture.counters()["bytes"] == len(parts[0]), TIMEOUT)
        disk.full.set()
        port.write(parts[1])
        assert loop.wait_for(lambda l: l.capture.bytes_lost == len(parts[1]), TIMEOUT)
        assert loop.wait_for(lambda l: any("CAPTURE PROBLEM" in x for x in logs), TIMEOUT)
        disk.full.clear()
        port.write(parts[2])
        assert loop.wait_for(lambda l: l.capture.counters()["bytes"] == len(parts[0]) + len(parts[2]),
                             TIMEOUT)
        assert loop.wait_for(lambda l: l.samples == len(frames), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    summary = result["summary"]
    assert summary.capture_bytes_lost == len(parts[1]) and summary.exit_code() == EXIT_CAPTURE_LOST
    c = summary.counters["capture"]
    assert c["bytes_in"] == len(stream) == c["bytes"] + c["bytes_lost"] and c["lost_disk"] == len(parts[1])
    assert "No space left on device" in next(x for x in logs if "CAPTURE PROBLEM" in x)
    assert any("RAW BYTES LOST: 50000 of" in x for x in logs)
    # The capture reads back as the stream with a marked hole; replay says so and resyncs.
    r = CaptureReader(tmp_path / "cap")
    chunks = list(r)
    assert b"".join(ch.data for ch in chunks) == parts[0] + parts[2]
    assert [ch.lost for ch in chunks if ch.event == EVENT_LOST] == [len(parts[1])]
    warnings, counters, cap_counters = [], {}, {}
    replayed = list(frames_from_capture(tmp_path / "cap", warnings=warnings, counters=counters,
                                        capture_counters=cap_counters))
    assert any("could not store 50000 bytes" in w for w in warnings)
    assert cap_counters["live_bytes_lost"] == 50000
    lines = capture_problem_lines(cap_counters, warnings)
    assert lines[-1] == ("warning: the capture is incomplete: 50000 bytes the live run could not store; "
                         "estimates around those places are missing")
    # Frames decoded on replay = frames sent minus those cut by the hole (the sequence numbers
    # count them: docs/wire_format.md receiver rules).
    assert counters["frames_ok"] + counters["seq_gaps"] == len(frames)
    assert counters["crc_errors"] == counters["bad_frames"] == 0
    assert len(replayed) == counters["frames_ok"] < len(frames)


def test_a_capture_file_that_fails_to_close_is_reported_and_ends_with_exit_4(tmp_path, monkeypatch):
    # close() of the capture file can fail (EIO on a network or write-back file system: the bytes may not be on
    # the disk). The run ended with exit 0 and said nothing: the failure waited, unread, for the loop's next look.
    import types

    class ClosingFails(types.ModuleType):
        def __getattr__(self, name):
            return getattr(os, name)

        @staticmethod
        def close(fd):
            os.close(fd)
            raise OSError(errno.EIO, os.strerror(errno.EIO))

    monkeypatch.setattr(capture_module, "os", ClosingFails("os"))
    frames, stream = frames_stream(200, seed=3)
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    logs = []
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [],
                    CaptureWriter(tmp_path / "cap", {"input_format": "binary"}), log=logs.append)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(stream)
        assert loop.wait_for(lambda l: l.samples == len(frames), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    summary = result["summary"]
    assert summary.capture_bytes_lost == 0 and summary.exit_code() == EXIT_CAPTURE_LOST
    assert summary.capture_failures == ["capture close failed: Input/output error"]
    assert "fieldvane live: CAPTURE PROBLEM: capture close failed: Input/output error" in logs


class BrokenFile:
    """A text stream whose writes fail like a full disk."""

    def write(self, text):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def flush(self):
        pass


def test_logger_write_errors_are_reported_at_once_and_fail_the_run(tmp_path):
    from fieldvane.io.sinks import StreamTransport
    frames, stream = frames_stream(50, seed=13)
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    logs = []
    sink = Sink(CsvFormatter(), StreamTransport(BrokenFile()), name="est.csv")
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [sink], None, log=logs.append)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(stream)
        assert loop.wait_for(lambda l: any("logger est.csv: write failed" in x for x in logs), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    summary = result["summary"]
    assert summary.failed_sinks == ["est.csv"] and summary.exit_code() == EXIT_FAILURE
    assert "No space left on device" in next(x for x in logs if "write failed" in x)
    st = summary.counters["sink[est.csv]"]
    assert st["written"] == 0 and st["write_errors"] == st["accepted"] == 50


class StuckTransport(Transport):
    """A logger whose writes hang until released (a stalled network file system)."""

    description = "stuck"

    def __init__(self):
        super().__init__()
        self.entered, self.release = threading.Event(), threading.Event()

    def write(self, lines):
        self.entered.set()
        self.release.wait(TIMEOUT)
        return len(lines)


def test_a_logger_that_does_not_finish_writing_fails_the_run():
    # Its records may never reach the file: the run said so in a log line but ended with exit 0.
    frames, stream = frames_stream(50, seed=14)
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    logs, stuck = [], StuckTransport()
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [Sink(CsvFormatter(), stuck, name="nfs.csv")],
                    None, log=logs.append, sink_close_timeout_s=0.2)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(stream)
        assert stuck.entered.wait(TIMEOUT) and loop.wait_for(lambda l: l.samples == len(frames), TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
        stuck.release.set()
    summary = result["summary"]
    assert not summary.sinks_closed and summary.exit_code() == EXIT_FAILURE
    assert "fieldvane live: some loggers did not finish writing in time" in logs


def test_tcp_port_zero_is_printed_and_capture_checked_before_the_port_opens(tmp_path):
    logs = []
    summary = run_live("loop://", "binary", toy_estimate, ["csv:tcp:0"], str(tmp_path / "cap"),
                       log=logs.append, handle_signals=False, on_ready=lambda loop: loop.stop())
    line = next(x for x in logs if "listening on" in x)
    port = int(line.rsplit(":", 1)[1])
    assert 0 < port < 65536 and "csv:tcp:127.0.0.1:0" in line
    assert summary.exit_code() == 0
    (tmp_path / "afile").write_text("")
    from fieldvane.io.errors import InputError
    with pytest.raises(InputError, match="option '--capture'"):
        run_live(str(tmp_path / "no-such-port"), "binary", toy_estimate, [str(tmp_path / "x.csv")],
                 str(tmp_path / "afile"), log=None, handle_signals=False)
    assert not (tmp_path / "x.csv").exists()          # nothing opened before the check


def test_bytes_before_the_first_delimiter_are_resynchronisation_not_errors(tmp_path):
    frames, stream = frames_stream(20, seed=14)
    cut = encode_frame(make_frame(99, random.Random(1)))[30:]    # joined mid-frame
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    loop = LiveLoop(link, make_decoder("binary"), toy_estimate, [], None, log=None)
    th, result = start_loop(loop)
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(cut + stream[1:])
        assert loop.wait_for(lambda l: l.samples == 20, TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    d = result["summary"].counters["decoder"]
    assert (d["crc_errors"], d["bad_frames"], d["resync_bytes"]) == (0, 0, len(cut) - 1)


def test_sequence_reset_and_runs_restart_tracking_and_replay_equals_live(tmp_path):
    """Two live runs into one capture folder, the second with a sensor restart inside it.

    The estimator here is stateful (it numbers samples since its own start), so replay equals
    live only if every run gets a fresh estimator: runs_from_capture makes that easy."""
    def numbered():
        count = {"n": 0}

        def est(sample):
            count["n"] = 0 if sample.restarted else count["n"] + 1
            rec = toy_estimate(sample)
            rec["n_since_start"] = count["n"]
            rec["restarted"] = int(sample.restarted)
            return rec
        return est

    f1, s1 = frames_stream(40, seed=15, first_seq=1000)
    f2a, s2a = frames_stream(30, seed=16, first_seq=500)
    f2b, s2b = frames_stream(30, seed=17, first_seq=1)          # the sensor restarted: seq 1
    live = []
    for k, stream in enumerate([s1, s2a + s2b[1:]]):
        port = serial.serial_for_url("loop://", timeout=0.05)
        link = SerialLink("loop://", opener=lambda p=port: p)
        out = tmp_path / f"live{k}.csv"
        loop = LiveLoop(link, make_decoder("binary"), numbered(), [open_sink(str(out))],
                        CaptureWriter(tmp_path / "cap", {"input_format": "binary"}), log=None)
        th, result = start_loop(loop)
        try:
            assert link.connected.wait(TIMEOUT)
            port.write(stream)
            n = 40 if k == 0 else 60
            assert loop.wait_for(lambda l, n=n: l.samples == n, TIMEOUT)
        finally:
            loop.stop()
            th.join(TIMEOUT)
        live.append(out.read_bytes())
        assert result["summary"].counters["restarts"] == k
    # Per run, fresh estimators: replay == live run 1 then live run 2, byte for byte.
    sink = open_sink(str(tmp_path / "replay.csv"))
    rep = replay_capture(tmp_path / "cap", None, [sink], estimate_for_run=lambda run: numbered())
    assert close_sinks([sink], TIMEOUT)
    header, *rows1 = live[0].decode().splitlines(keepends=True)
    _, *rows2 = live[1].decode().splitlines(keepends=True)
    assert (tmp_path / "replay.csv").read_text() == header + "".join(rows1 + rows2)
    assert rep["decoder"]["seq_resets"] == 1
    runs = [(run, [s.restarted for s in samples]) for run, samples in runs_from_capture(tmp_path / "cap")]
    assert len(runs) == 2 and runs[0][1] == [False] * 40
    assert runs[1][1] == [False] * 30 + [True] + [False] * 29
    # All runs through one estimator: the first sample of the second run is marked restarted.
    flags = [s.restarted for s in frames_from_capture(tmp_path / "cap")]
    assert [i for i, f in enumerate(flags) if f] == [40, 70]


STOP_SCRIPT = textwrap.dedent("""
    import os, sys, time
    sys.path.insert(0, {tests!r})
    from test_live import slow_estimate
    from fieldvane.io import capture as capture_module
    from fieldvane.io.live import run_live
    if sys.argv[3] == "slow-disk":                  # 100 kB/s: the capture falls behind
        real = capture_module._os_write
        def slow(fd, data):
            time.sleep(len(data) * 1e-5)
            return real(fd, data)
        capture_module._os_write = slow
    summary = run_live(sys.argv[1], "binary", slow_estimate(0.002), ["jsonl:stdout"],
                       capture_dir=sys.argv[2], log_interval_s=0.2)
    sys.exit(summary.exit_code())
""")


def _start_child(tmp_path, mode):
    path = str(tmp_path / "sensor")
    master, slave = _pty(path)
    script = tmp_path / "stop_child.py"
    script.write_text(STOP_SCRIPT.format(tests=os.path.dirname(__file__)))
    proc = subprocess.Popen([sys.executable, str(script), path, str(tmp_path / "cap"), mode],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    return proc, master, slave


def _bytes_read(err):
    import re
    found = re.findall(rb"link\.bytes_read=(\d+)", err)
    return int(found[-1]) if found else -1


def test_sigterm_under_a_full_backlog_stops_at_once_and_keeps_every_byte(tmp_path):
    # 6,000 frames for an estimator that needs 2 ms each: 12 s of work when the stop comes.
    frames, stream = frames_stream(6000, seed=20)
    proc, master, slave = _start_child(tmp_path, "normal")
    try:
        err = _read_until(proc.stderr.fileno(), lambda b: b"link open" in b, b"")
        os.write(master, stream)
        err = _read_until(proc.stderr.fileno(), lambda b: _bytes_read(b) == len(stream), err)
        sent_at = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        _, rest = proc.communicate(timeout=TIMEOUT)
        stop_s = time.monotonic() - sent_at      # reported, not asserted (benchmarks measure speed)
    finally:
        _end_child(proc, master, slave)
    text = (err + rest).decode()
    print(f"\nSIGTERM to exit under a backlog of {len(frames)} frames: {stop_s:.2f} s")
    assert proc.returncode == 130, text[-2000:]
    final = next(x for x in text.splitlines() if x.startswith("fieldvane live: final "))
    assert f"capture.bytes={len(stream)} " in final and "capture.bytes_lost=0 " in final
    assert "not estimated live" in text
    assert b"".join(c.data for c in read_capture(tmp_path / "cap")) == stream


def test_second_ctrl_c_abandons_a_slow_capture_and_counts_what_it_lost(tmp_path):
    frames, stream = frames_stream(9000, seed=21)          # ~570 kB: ~6 s for this disk
    proc, master, slave = _start_child(tmp_path, "slow-disk")
    try:
        err = _read_until(proc.stderr.fileno(), lambda b: b"link open" in b, b"")
        os.write(master, stream)
        err = _read_until(proc.stderr.fileno(), lambda b: _bytes_read(b) == len(stream), err)
        proc.send_signal(signal.SIGINT)
        err = _read_until(proc.stderr.fileno(), lambda b: b"Ctrl-C again to abandon" in b, err)
        proc.send_signal(signal.SIGINT)
        _, rest = proc.communicate(timeout=TIMEOUT)
    finally:
        _end_child(proc, master, slave)
    text = (err + rest).decode()
    assert proc.returncode == EXIT_CAPTURE_LOST, text[-2000:]
    assert "RAW BYTES LOST" in text and "Traceback" not in text
    final = next(x for x in text.splitlines() if x.startswith("fieldvane live: final "))
    c = dict(kv.split("=", 1) for kv in final[len("fieldvane live: final "):].split())
    kept, lost, in_flight = int(c["capture.bytes"]), int(c["capture.bytes_lost"]), int(c["capture.in_flight"])
    assert int(c["capture.bytes_in"]) == len(stream) == kept + lost + in_flight
    assert lost > 0 and int(c["capture.lost_abandoned"]) == lost      # batches are 256 KiB at most
    on_disk = b"".join(ch.data for ch in read_capture(tmp_path / "cap"))
    assert kept <= len(on_disk) <= kept + in_flight and on_disk == stream[:len(on_disk)]


def test_threads_take_turns_every_fifth_of_a_millisecond_while_the_loop_runs():
    # Python's default of 5 ms (sys.getswitchinterval) would let a logger's writer hold the loop that long.
    from fieldvane.io.live import LIVE_SWITCH_INTERVAL_S

    before = sys.getswitchinterval()
    seen = []
    port = serial.serial_for_url("loop://", timeout=0.05)
    loop = LiveLoop(SerialLink("loop://", opener=lambda: port), make_decoder("binary"), toy_estimate, [], None,
                    log=None, status=lambda lp: seen.append(sys.getswitchinterval()), status_interval_s=0.01)
    th, result = start_loop(loop)
    try:
        assert loop.wait_for(lambda lp: len(seen) >= 2, TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    assert "summary" in result and max(seen) <= LIVE_SWITCH_INTERVAL_S <= 0.0002
    assert sys.getswitchinterval() == before


def test_a_sensor_restart_is_counted_and_said_once_on_the_batch_path():
    first, a = frames_stream(30, seed=21, first_seq=500)
    again, b = frames_stream(20, seed=22, first_seq=1)         # the sequence steps back: a restart
    port = serial.serial_for_url("loop://", timeout=0.05)
    logs, seen = [], []

    def estimate_batch(samples):
        seen.extend(s.restarted for s in samples)
        return [None] * len(samples)

    loop = LiveLoop(SerialLink("loop://", opener=lambda: port), make_decoder("binary"), toy_estimate, [], None,
                    log=logs.append, estimate_batch=estimate_batch)
    th, result = start_loop(loop)
    try:
        assert loop.link.connected.wait(TIMEOUT)
        port.write(a + b[1:])
        assert loop.wait_for(lambda lp: lp.samples == 50, TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
    restart_t = again[0].t_ns / 1e9
    assert loop.restarts == 1 and seen == [False] * 30 + [True] + [False] * 19
    said = [line for line in logs if "restarted" in line]
    assert said == [f"fieldvane live: the sensor restarted (sequence reset) at t={restart_t!r}; tracking starts afresh"]


def test_overlapping_loops_put_the_switch_interval_and_the_frozen_heap_back_only_when_the_last_ends():
    import gc

    from fieldvane.io.live import LIVE_SWITCH_INTERVAL_S, _live_process_settings

    before = sys.getswitchinterval()
    assert gc.get_freeze_count() == 0
    _live_process_settings(True)
    assert gc.get_freeze_count() > 0            # what was alive at the start is out of the collector's scans
    _live_process_settings(True)
    _live_process_settings(False)
    assert sys.getswitchinterval() == pytest.approx(LIVE_SWITCH_INTERVAL_S)      # the second loop still runs
    assert gc.get_freeze_count() > 0
    _live_process_settings(False)
    assert sys.getswitchinterval() == before and gc.get_freeze_count() == 0


def test_a_process_that_froze_its_own_heap_keeps_it_frozen_after_a_loop():
    import gc

    from fieldvane.io.live import _live_process_settings

    gc.freeze()
    try:
        frozen = gc.get_freeze_count()
        _live_process_settings(True)
        assert gc.get_freeze_count() == frozen      # left as the process had it
        _live_process_settings(False)
        assert gc.get_freeze_count() == frozen
    finally:
        gc.unfreeze()
