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
import serial
from cobs import cobs

from fieldvane.io.capture import CaptureWriter, read_capture
from fieldvane.io.live import LiveLoop, frames_from_capture, make_decoder, replay_capture
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


def test_loop_url_faults_slow_loggers_capture_and_replay(tmp_path):
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
                    log_interval_s=0.0, sink_close_timeout_s=0.5)
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


def _pty(path):
    master, slave = os.openpty()
    tty.setraw(slave)
    if os.path.lexists(path):
        os.unlink(path)
    os.symlink(os.ttyname(slave), path)
    return master, slave


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


def test_sigterm_flushes_sinks_and_prints_summary(tmp_path):
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
        proc.send_signal(signal.SIGTERM)
        rest_out, rest_err = proc.communicate(timeout=TIMEOUT)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(TIMEOUT)
        os.close(master)
        os.close(slave)
    assert proc.returncode == 130
    records = [json.loads(x) for x in (out + rest_out).splitlines()]
    assert [r["t"] for r in records] == [f.t_ns / 1e9 for f in frames]
    final = (err + rest_err).decode()
    assert "fieldvane live: final " in final and "frames_ok=100" in final
    assert b"".join(c.data for c in read_capture(tmp_path / "cap")) == sent
