"""Frame encoder against outside references, and the emitter to a file, a pty and TCP."""

from __future__ import annotations

import binascii
import os
import select
import socket
import struct
import threading
import time

import numpy as np
import pytest
from cobs import cobs as cobs_ref
from crc import Calculator, Crc16

from fieldvane.firmware_sim import frames
from fieldvane.firmware_sim.emitter import (
    Emitter, FaultPlan, FileSink, PtySink, Sink, TcpSink, encode_records, open_sink, preamble,
)
from fieldvane.firmware_sim.scenario import loads_scenario, simulate

SCENARIO = """version = 1
name = "emitter test"
[run]
duration_s = 1.0
seed = 5
[direction]
start = [0.3, 0.4, 0.87]
[[direction.segments]]
kind = "rotate"
axis = [0, 0, 1]
rate_deg_per_s = 30
duration_s = 1
[magnitude]
start_nT = 20000
[[events]]
kind = "dropout"
start_s = 0.5
duration_s = 0.05
[[events]]
kind = "dropout"
start_s = 0.8
duration_s = 0.02
mode = "nan"
[[events]]
kind = "status"
start_s = 0.2
duration_s = 0.1
bits = ["LOCKIN_OVERLOAD", "CELL_NOT_READY"]
"""

READ_TIMEOUT_S = 10.0   # upper bound for a test to wait for bytes; never a synchronization sleep


@pytest.fixture(scope="module")
def run():
    return simulate(loads_scenario(SCENARIO, "<test>"))


@pytest.fixture(scope="module")
def one_probe_run():
    text = SCENARIO.replace('name = "emitter test"', 'name = "one probe"\n[sensor]\n'
                            'probe_axes = [[0, 0, 1]]')
    return simulate(loads_scenario(text, "<test>"))


def stream_bytes(run, fmt="binary", include_truth=False, zero_before_each=False) -> bytes:
    return preamble(run, fmt, include_truth) + b"".join(
        rec for _t, rec in encode_records(run, fmt, include_truth=include_truth,
                                          zero_before_each=zero_before_each))


class MemorySink(Sink):
    """Collects bytes in memory; sets `reached` once `limit` chunks went out."""

    def __init__(self, limit=None):
        self.data = bytearray()
        self.chunks = 0
        self.limit = limit
        self.reached = threading.Event()

    def begin(self, preamble_bytes):
        self.data += preamble_bytes

    def send(self, data, wait, stop):
        self.data += data
        self.chunks += 1
        if self.limit is not None and self.chunks >= self.limit:
            self.reached.set()
        return True


def read_fd_until(fd, n_expected, timeout_s=READ_TIMEOUT_S) -> bytes:
    """Read a file descriptor until n_expected bytes arrived, EOF, or the timeout passed."""
    buf = bytearray()
    deadline = time.monotonic() + timeout_s
    while len(buf) < n_expected and time.monotonic() < deadline:
        ready, _, _ = select.select([fd], [], [], 0.2)
        if not ready:
            continue
        try:
            chunk = os.read(fd, 65536)
        except OSError:          # EIO: the master side closed
            break
        if not chunk:
            break
        buf += chunk
    return bytes(buf)


def read_socket_to_eof(sock, timeout_s=READ_TIMEOUT_S, limit=None) -> bytes:
    """Read a socket until EOF (or limit bytes), bounded by timeout_s."""
    buf = bytearray()
    deadline = time.monotonic() + timeout_s
    sock.settimeout(0.2)
    while time.monotonic() < deadline and (limit is None or len(buf) < limit):
        try:
            chunk = sock.recv(65536)
        except socket.timeout:
            continue
        if not chunk:
            break
        buf += chunk
    return bytes(buf)


# ----- CRC and COBS against outside references ---------------------------------------------

def test_crc_check_value():
    # Check value of CRC-16/CCITT-FALSE for ASCII "123456789": 0x29B1 (the catalogue of
    # parametrised CRC algorithms, as quoted in docs/wire_format.md and docs/references.md).
    assert frames.crc16_ccitt_false(b"123456789") == 0x29B1


def test_crc_matches_binascii_and_crc_package():
    rng = np.random.default_rng(1)
    calc = Calculator(Crc16.IBM_3740)   # the `crc` package's name for CRC-16/CCITT-FALSE
    for n in (0, 1, 2, 35, 36, 52, 68, 255, 1000):
        data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        ours = frames.crc16_ccitt_false(data)
        assert ours == binascii.crc_hqx(data, 0xFFFF)      # Python stdlib reference
        assert ours == calc.checksum(data)                  # `crc` reference library


def test_cobs_worked_examples():
    # Worked examples of COBS (Cheshire and Baker 1999) as tabulated in docs/references.md.
    assert frames.cobs_encode(b"\x00") == b"\x01\x01"
    assert frames.cobs_encode(b"\x00\x00") == b"\x01\x01\x01"
    assert frames.cobs_encode(b"\x11\x22\x00\x33") == b"\x03\x11\x22\x02\x33"


def test_cobs_matches_cobs_package():
    rng = np.random.default_rng(2)
    for n in list(range(0, 300)) + [508, 509, 510, 700]:
        for p_zero in (0.0, 0.05, 0.5):
            data = rng.integers(1, 256, n, dtype=np.uint8)
            data[rng.random(n) < p_zero] = 0
            data = data.tobytes()
            ours = frames.cobs_encode(data)
            assert ours == cobs_ref.encode(data), (n, p_zero)   # `cobs` reference library
            assert b"\x00" not in ours
            assert cobs_ref.decode(ours) == data


# ----- payload layout (docs/wire_format.md table) ------------------------------------------

@pytest.mark.parametrize("n_values", [4, 8])
def test_payload_fields_sit_at_the_documented_offsets(n_values):
    values = [0.5 * (k + 1) * (-1) ** k for k in range(n_values)]
    wire = frames.encode_frame(0xFFFFFFFF + 3, 123_456_789_012, 0b1010, 139916.66, 93348.55, values)
    assert wire.endswith(b"\x00") and b"\x00" not in wire[:-1]
    assert len(wire) - 1 <= 72                         # "at most 72 encoded bytes"
    payload = cobs_ref.decode(wire[:-1])
    assert len(payload) == (54 if n_values == 4 else 70)
    assert payload[0:2] == b"FV"
    assert payload[2] == 1 and payload[3] == 1
    assert struct.unpack_from("<I", payload, 4)[0] == 2          # seq wraps 0xFFFFFFFF -> 0
    assert struct.unpack_from("<Q", payload, 8)[0] == 123_456_789_012
    assert struct.unpack_from("<H", payload, 16)[0] == 0b1010
    assert payload[18] == n_values and payload[19] == 0
    assert struct.unpack_from("<d", payload, 20)[0] == 139916.66
    assert struct.unpack_from("<d", payload, 28)[0] == 93348.55
    assert list(struct.unpack_from(f"<{n_values}f", payload, 36)) == values
    crc_at = 36 + 4 * n_values
    assert struct.unpack_from("<H", payload, crc_at)[0] == binascii.crc_hqx(payload[:crc_at], 0xFFFF)


def test_encoder_rejects_bad_fields():
    with pytest.raises(ValueError, match="4 or 8"):
        frames.encode_frame(0, 0, 0, 1.0, 1.0, [0.0] * 6)
    with pytest.raises(ValueError, match="t_ns"):
        frames.encode_frame(0, -1, 0, 1.0, 1.0, [0.0] * 4)
    with pytest.raises(ValueError, match="status"):
        frames.encode_frame(0, 0, 1 << 16, 1.0, 1.0, [0.0] * 4)


# ----- cross-check with the project's own decoder (written separately from the spec) --------

try:  # written by another developer from the same spec; cross-check when it is there
    from fieldvane.io import wire
except ImportError:  # pragma: no cover
    wire = None
needs_wire = pytest.mark.skipif(wire is None, reason="fieldvane.io.wire not available")


def _check_frames_match_run(decoded, run):
    assert [f.seq for f in decoded] == list(run.seq)
    assert [f.t_ns for f in decoded] == [int(round(t * 1e9)) for t in run.t]
    assert [f.status for f in decoded] == list(run.status)
    for f, fr, z in zip(decoded, run.f, run.z):
        np.testing.assert_array_equal([f.f_a, f.f_b], fr)                   # f64 exactly
        xy = np.column_stack([z.real, z.imag]).ravel().astype(np.float32)
        np.testing.assert_array_equal(np.array(f.values, np.float32), xy)   # f32 exactly


@needs_wire
@pytest.mark.parametrize("fixture", ["run", "one_probe_run"])
def test_io_decoder_reads_our_frames_exactly(fixture, request):
    sim = request.getfixturevalue(fixture)
    data = stream_bytes(sim)
    dec = wire.FrameDecoder()
    decoded = dec.feed(data)
    _check_frames_match_run(decoded, sim)
    assert dec.crc_errors == 0 and dec.bad_frames == 0 and dec.duplicates == 0
    assert dec.seq_gaps == 10                        # the 0.05 s dropout at 200 Hz
    assert len(decoded[0].values) == 2 * len(sim.channels)
    # The same bytes in small uneven chunks give the same frames.
    dec2 = wire.FrameDecoder()
    rng = np.random.default_rng(3)
    out, i = [], 0
    while i < len(data):
        k = int(rng.integers(1, 40))
        out += dec2.feed(data[i:i + k])
        i += k
    _check_frames_match_run(out, sim)     # (NaN rows make Frame == Frame false, so compare fields)


def test_csv_lines_read_back_exactly(run):
    csv_lines = pytest.importorskip("fieldvane.io.csv_lines")
    dec = csv_lines.CsvLineDecoder()
    samples = dec.feed(stream_bytes(run, "csv"))
    assert dec.bad_lines == 0 and dec.header_lines == 1
    assert dec.metadata["scenario"] == "emitter test"
    assert len(samples) == len(run)
    np.testing.assert_array_equal([s.t for s in samples], run.t)
    np.testing.assert_array_equal([[s.f_a, s.f_b] for s in samples], run.f)
    np.testing.assert_array_equal(np.array([s.z for s in samples]), run.z)   # NaN rows too


def test_csv_truth_columns(run):
    text = stream_bytes(run, "csv", include_truth=True).decode()
    lines = [ln for ln in text.splitlines() if not ln.startswith("#")]
    assert lines[0].split(",")[-4:] == ["true_ux", "true_uy", "true_uz", "true_b_nT"]
    assert [float(x) for x in lines[1].split(",")[-4:]] == [*run.u[0], run.b_nT[0]]


def test_csv_line_leaves_a_missing_probes_fields_empty():
    z = [1 + 2j, 3 - 4j, complex(np.nan, np.nan), complex(np.nan, np.nan)]
    line = frames.csv_line(0.5, 10.0, 20.0, z, (0.25,), missing=[False, False, True, True])
    assert line == b"0.5,10.0,20.0,1.0,2.0,3.0,-4.0,,,,,0.25\n"
    # Without the mask a NaN is written as 'nan' (the sensor sent a non-finite value).
    assert frames.csv_line(0.5, 10.0, 20.0, z).endswith(b",nan,nan,nan,nan\n")


def test_lockin_run_streams_with_its_metadata():
    lockin = "[lockin]\ntime_constant_s = 0.005\nfilter_order = 4\n"
    text = SCENARIO.replace("[direction]", lockin + "[direction]", 1)
    sim = simulate(loads_scenario(text, "<test>"))
    head = stream_bytes(sim, "csv").decode().splitlines()
    assert "# lockin_time_constant_s: 0.005" in head and "# lockin_filter_order: 4" in head
    assert "# sample_rate_hz: 200" in head
    body = [ln for ln in head if not ln.startswith("#")][1:]
    assert [float(v) for v in body[0].split(",")[3:]] == [float(v) for v in frames.interleave_xy(sim.z[0])]


# ----- faults -----------------------------------------------------------------------------

def _emit_to_memory(run, faults, fmt="binary"):
    sink = MemorySink()
    stats = Emitter(run, sink, fmt=fmt, realtime=False, faults=faults).run()
    return bytes(sink.data), stats


@needs_wire
def test_bit_flips_lose_exactly_the_flipped_frames(run):
    data, stats = _emit_to_memory(run, FaultPlan(bit_flips_at=(3, 10, 25, 100), seed=4))
    assert stats.bit_flips == 4
    dec = wire.FrameDecoder()
    got = dec.feed(data)
    lost = set(run.seq) - {f.seq for f in got}
    assert lost == {int(run.seq[k]) for k in (3, 10, 25, 100)}
    assert dec.crc_errors + dec.bad_frames >= 4


@needs_wire
def test_garbage_is_dropped_and_counted(run):
    data, stats = _emit_to_memory(run, FaultPlan(garbage_at=(5, 6, 50), garbage_len=20, seed=1))
    assert stats.garbage_bursts == 3
    dec = wire.FrameDecoder()
    got = dec.feed(data)
    assert len(got) == len(run)                      # delimited garbage costs no frame
    assert dec.crc_errors + dec.bad_frames == 3


@needs_wire
def test_undelimited_garbage_takes_the_next_frame_with_it(run):
    data, _ = _emit_to_memory(run, FaultPlan(garbage_at=(7,), garbage_delimited=False, seed=1))
    got = wire.FrameDecoder().feed(data)
    assert {int(s) for s in run.seq} - {f.seq for f in got} == {int(run.seq[7])}


@needs_wire
def test_zero_before_each_frame_confines_undelimited_garbage(run):
    sink = MemorySink()
    Emitter(run, sink, realtime=False, zero_before_each=True,
            faults=FaultPlan(garbage_at=(7, 30), garbage_delimited=False, seed=1)).run()
    assert bytes(sink.data).startswith(b"\x00\x00")      # the stream's 0x00, then frame 0's
    dec = wire.FrameDecoder()
    got = dec.feed(bytes(sink.data))
    _check_frames_match_run(got, run)                    # no frame lost
    assert dec.bad_frames + dec.crc_errors == 2


def test_binary_stream_starts_with_a_delimiter(run):
    # wire_format.md: a sender should send one 0x00 before its first frame.
    assert stream_bytes(run).startswith(b"\x00") and not stream_bytes(run).startswith(b"\x00\x00")


def test_pause_loses_nothing(run):
    data, stats = _emit_to_memory(run, FaultPlan(pause_at=12, pause_s=0.01))
    assert stats.pauses == 1
    assert data == stream_bytes(run)


@needs_wire
def test_repeat_continues_seq_and_time_until_stopped(run):
    sink = MemorySink(limit=int(2.5 * len(run)))
    em = Emitter(run, sink, realtime=False, repeat=True).start()
    assert sink.reached.wait(READ_TIMEOUT_S)
    assert em.stop(READ_TIMEOUT_S) and em.error is None
    got = wire.FrameDecoder().feed(bytes(sink.data))
    assert len(got) >= 2 * len(run) and em.stats.passes >= 2
    seq = np.array([f.seq for f in got])
    period = run.n_samples
    np.testing.assert_array_equal(seq[len(run):2 * len(run)], run.seq + period)
    t_ns = np.array([f.t_ns for f in got])
    assert np.all(np.diff(t_ns) > 0)
    assert t_ns[len(run)] == int(round((run.t[0] + period / run.sample_rate_hz) * 1e9))


# ----- sinks ------------------------------------------------------------------------------

def test_emitter_to_file(run, tmp_path):
    path = tmp_path / "stream.bin"
    em = Emitter(run, open_sink(f"file:{path}"), realtime=False)
    stats = em.run()
    assert em.error is None and stats.records_sent == len(run) and stats.records_dropped == 0
    assert path.read_bytes() == stream_bytes(run)
    csv_path = tmp_path / "stream.csv"
    Emitter(run, FileSink(csv_path), fmt="csv", realtime=False).run()
    assert csv_path.read_bytes() == stream_bytes(run, "csv")


@pytest.mark.parametrize("realtime", [False, True])
def test_emitter_to_pty(run, realtime):
    short = run if not realtime else _head(run, 40)      # real time: 0.2 s of samples
    sink = PtySink()
    assert os.path.exists(sink.path)
    fd = os.open(sink.path, os.O_RDONLY | os.O_NOCTTY)
    try:
        expected = stream_bytes(short)
        em = Emitter(short, sink, realtime=realtime).start()
        got = read_fd_until(fd, len(expected))
        assert em.wait_sent(READ_TIMEOUT_S)
        assert not em.finished.is_set()          # the pty stays open after the run's end
        assert em.stop(READ_TIMEOUT_S) and em.error is None
    finally:
        os.close(fd)
    assert got == expected
    assert em.stats.records_dropped == 0


def test_pty_read_with_pyserial(run):
    serial = pytest.importorskip("serial")
    sink = PtySink()
    port = serial.Serial(sink.path, timeout=0.2)
    expected = stream_bytes(run, "csv")
    em = Emitter(run, sink, fmt="csv", realtime=False).start()
    try:
        buf = bytearray()
        deadline = time.monotonic() + READ_TIMEOUT_S
        while len(buf) < len(expected) and time.monotonic() < deadline:
            buf += port.read(65536)
        assert em.wait_sent(READ_TIMEOUT_S)
    finally:
        port.close()
        assert em.stop(READ_TIMEOUT_S) and em.error is None
    assert bytes(buf) == expected


def test_emitter_to_tcp(run):
    sink = TcpSink(0)
    assert sink.host == "127.0.0.1" and sink.port > 0
    expected = stream_bytes(run)
    em = Emitter(run, sink, realtime=False).start()
    try:
        with socket.create_connection((sink.host, sink.port), timeout=READ_TIMEOUT_S) as client:
            got = read_socket_to_eof(client, limit=len(expected))
            assert em.wait_sent(READ_TIMEOUT_S)
            assert not em.finished.is_set()          # the connection stays open after the end
            assert em.stop(READ_TIMEOUT_S)
            assert read_socket_to_eof(client) == b""  # stop closes it: EOF, nothing more
    finally:
        em.stop(READ_TIMEOUT_S)
    assert em.error is None
    assert got == expected


@needs_wire
def test_tcp_read_with_pyserial_socket_url(run):
    serial = pytest.importorskip("serial")
    sink = TcpSink(0)
    # Real-time pacing: pyserial discards what has arrived when it opens a socket:// URL, and an
    # as-fast-as-possible sender could have sent the whole run by then (seen as a flaky failure).
    em = Emitter(run, sink, realtime=True).start()
    port = serial.serial_for_url(f"socket://{sink.host}:{sink.port}", timeout=0.2)
    dec = wire.FrameDecoder()
    got = []
    try:
        deadline = time.monotonic() + READ_TIMEOUT_S
        while (not got or got[-1].seq != run.seq[-1]) and time.monotonic() < deadline:
            got += dec.feed(port.read(65536))
    finally:
        port.close()
        assert em.stop(READ_TIMEOUT_S) and em.error is None
    # pyserial empties its input buffer when it opens a socket:// URL (wire_format.md,
    # implementation notes), so the stream may start late; from there on it must be exact.
    assert got and dec.bad_frames + dec.crc_errors <= 1
    _check_frames_match_run(got, _tail(run, len(got)))


def test_tcp_serves_clients_one_after_another_each_with_the_header(run):
    sink = TcpSink(0)
    em = Emitter(run, sink, fmt="csv", realtime=False, repeat=True).start()
    head = preamble(run, "csv")
    try:
        with socket.create_connection((sink.host, sink.port), timeout=READ_TIMEOUT_S) as first:
            got1 = read_socket_to_eof(first, limit=len(head) + 2000)
        with socket.create_connection((sink.host, sink.port), timeout=READ_TIMEOUT_S) as second:
            got2 = read_socket_to_eof(second, limit=len(head) + 2000)
    finally:
        assert em.stop(READ_TIMEOUT_S)
    assert em.error is None
    assert got1.startswith(head) and got2.startswith(head)
    assert sink.clients_served == 2


def test_realtime_tcp_without_a_client_drops_and_counts():
    sim = simulate(loads_scenario(SCENARIO.replace("duration_s = 1.0", "duration_s = 0.1"), "<t>"))
    em = Emitter(sim, TcpSink(0), realtime=True).start()
    assert em.wait_sent(READ_TIMEOUT_S)
    assert em.stop(READ_TIMEOUT_S) and em.error is None
    stats = em.stats
    assert stats.records_dropped == len(sim) and stats.records_sent == 0


def test_open_sink_rejects_unknown_destinations():
    for spec in ("serial", "tcp:", "tcp:http", "tcp:70000", "file:"):
        with pytest.raises(ValueError):
            open_sink(spec)


def _head(run, n):
    from dataclasses import replace
    return replace(run, t=run.t[:n], seq=run.seq[:n], f=run.f[:n], z=run.z[:n], u=run.u[:n],
                   b_nT=run.b_nT[:n], status=run.status[:n])


def _tail(run, n):
    from dataclasses import replace
    return replace(run, t=run.t[-n:], seq=run.seq[-n:], f=run.f[-n:], z=run.z[-n:], u=run.u[-n:],
                   b_nT=run.b_nT[-n:], status=run.status[-n:])
