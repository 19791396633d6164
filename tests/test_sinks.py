"""Logger sinks: formats (CSV, JSON lines, NMEA 0183 proprietary sentences), transports, bounded queues, --out specs."""

from __future__ import annotations

import csv
import datetime
import io
import json
import math
import os
import select
import socket
import threading
import tty

import numpy as np
import pynmea2
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldvane.io.errors import InputError
from fieldvane.io.row_block import RowBlock
from fieldvane.io.sinks import (ESTIMATE_COLUMNS, NMEA_MNEMONIC, CsvFormatter, JsonlFormatter, NmeaFormatter,
                                Sink, SinkSpec, StreamTransport, TcpServerTransport, Transport,
                                close_sinks, nmea_checksum, open_sink, parse_sink_spec, utc_iso)

TIMEOUT = 10.0


def record(i, **extra):
    u = np.array([math.cos(0.01 * i), math.sin(0.01 * i), 0.1])
    u = u / np.linalg.norm(u)
    r = {"t": 0.001 * i, "ux": u[0], "uy": u[1], "uz": u[2], "b_nT": 48000.0 + i / 3,
         "bx_nT": 48000.0 * u[0], "by_nT": 48000.0 * u[1], "bz_nT": 48000.0 * u[2],
         "sigma_deg": 0.05, "flags": np.int64(1)}
    r.update(extra)
    return r


# ------------------------------------------------------------------- formats

def test_csv_columns_extras_and_exact_floats():
    f = CsvFormatter()
    rec = record(7, zeta=1.5, alpha=np.float32(0.1), note='a,"b"')
    f.bind(rec)
    text = f.header() + f.format(rec) + f.format(record(8, alpha=math.nan))
    rows = list(csv.reader(io.StringIO(text)))        # the standard csv module reads it back
    assert rows[0] == list(ESTIMATE_COLUMNS) + ["alpha", "note", "zeta"]
    assert [float(x) for x in rows[1][:9]] == [float(rec[c]) for c in ESTIMATE_COLUMNS[:9]]
    assert rows[1][9] == "1" and rows[1][11] == 'a,"b"'
    assert float(rows[1][10]) == float(np.float32(0.1))
    assert rows[2][10] == "nan" and rows[2][11] == "" and rows[2][12] == ""


def test_jsonl_keys_and_non_finite():
    f = JsonlFormatter()
    rec = record(3, innov=np.float64(math.inf), k=2)
    f.bind(rec)
    obj = json.loads(f.format(rec))
    assert list(obj)[:10] == list(ESTIMATE_COLUMNS)
    assert obj["innov"] is None and obj["k"] == 2 and obj["flags"] == 1
    assert obj["ux"] == float(rec["ux"])


def test_nmea_checksum_published_example():
    # A GGA sentence widely reproduced in NMEA 0183 tutorials, checksum 47 (from memory);
    # pynmea2 (reference library) validates it.
    body = "GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,"
    assert nmea_checksum(body) == "47"
    pynmea2.parse(f"${body}*47", check=True)


def parse_proprietary(line):
    """Parse one sentence with pynmea2 (reference library) as a proprietary sentence, checksum required."""
    assert line.endswith("\r\n") and len(line) <= 82        # NMEA 0183: at most 82 characters, '$' to LF
    msg = pynmea2.parse(line.strip(), check=True)
    assert isinstance(msg, pynmea2.ProprietarySentence) and type(msg) is pynmea2.ProprietarySentence
    # Checksum: pynmea2's XOR of the characters between '$' and '*', two upper-case hex digits.
    body, checksum = line.strip()[1:].split("*")
    assert checksum == "%02X" % pynmea2.NMEASentence.checksum(body)
    return msg


def test_nmea_proprietary_sentences_parse_with_pynmea2():
    f = NmeaFormatter(sentences="DM")
    utc = 1796169601.2345                 # 2026-12-02T00:00:01.2345Z (datetime, reference: standard library)
    rec = record(11, utc=utc, b_a_nT=48000.0021, b_b_nT=47999.9987, sigma_b_nT=0.0123, nis=7.25,
                 nis_dof=np.int64(8), extra_text="x*y,z$")
    d_line, m_line, rest = f.format(rec).split("\r\n")
    assert rest == ""
    d, m = parse_proprietary(d_line + "\r\n"), parse_proprietary(m_line + "\r\n")
    assert d.manufacturer == m.manufacturer == NMEA_MNEMONIC == "XFV"
    assert d.data[0] == "D" and m.data[0] == "M"
    stamp = datetime.datetime.fromtimestamp(utc, datetime.timezone.utc)
    assert d.data[1] == stamp.strftime("%H%M%S.") + f"{round(stamp.microsecond / 1000):03d}" == "000001.234"
    assert d.data[2] == stamp.strftime("%d%m%y") == "021226"
    assert [float(x) for x in d.data[3:6]] == pytest.approx([rec["ux"], rec["uy"], rec["uz"]], abs=5e-6)
    assert float(d.data[6]) == pytest.approx(rec["b_nT"], abs=5e-4)
    assert d.data[7] == "0.0500" and d.data[8] == "1" and len(d.data) == 9
    assert m.data[1] == d.data[1] and m.data[2] == "0.011"
    assert m.data[3:] == ["48000.002", "47999.999", "0.0123", "7.25", "8"]
    # Text extras never reach NMEA: the layout is fixed whatever the record holds.
    assert "x_y" not in d_line + m_line and "x*y" not in d_line + m_line


def test_nmea_missing_values_are_empty_fields():
    f = NmeaFormatter()
    rec = record(3, ux=math.nan, sigma_deg=math.inf)                # no utc: time and date unknown
    msg = parse_proprietary(f.format(rec))
    assert msg.data[1:3] == ["", ""] and msg.data[3] == "" and msg.data[7] == ""
    assert msg.data[4] != "" and msg.data[8] == "1"
    msg = parse_proprietary(NmeaFormatter(sentences="M").format(record(3)))
    assert msg.data[0] == "M" and msg.data[1] == "" and msg.data[3:] == ["", "", "", "", ""]


def test_nmea_mnemonic_is_configurable_and_checked():
    msg = parse_proprietary(NmeaFormatter(mnemonic="QZX").format(record(1)))
    assert msg.manufacturer == "QZX"
    for bad in ("XF", "xfv", "XF1", "XFVD", "ÄBC"):
        with pytest.raises(ValueError, match="three capital letters"):
            NmeaFormatter(mnemonic=bad)
    for bad in ("", "X", "DD", "DMX"):
        with pytest.raises(ValueError, match="D, M or DM"):
            NmeaFormatter(sentences=bad)


finite = st.floats(allow_nan=False, allow_infinity=False)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(utc=st.one_of(st.none(), st.floats(0, 4.1e9)), t=st.floats(-1e9, 1e10),
       u=st.tuples(st.floats(-1, 1), st.floats(-1, 1), st.floats(-1, 1)),
       b=st.one_of(st.floats(0, 999999.999), st.just(math.nan)), sigma=st.floats(0, 999.9),
       flags=st.integers(0, 65535), extra=st.tuples(finite, finite, finite, finite, st.integers(0, 999)))
def test_nmea_sentences_stay_within_82_characters(utc, t, u, b, sigma, flags, extra):
    # Any record with values in their documented ranges (docs/sinks.md) gives sentences pynmea2 parses,
    # at most 82 characters long; out-of-range optional values become empty fields, never longer lines.
    rec = {"t": t, "ux": u[0], "uy": u[1], "uz": u[2], "b_nT": b, "sigma_deg": sigma, "flags": flags,
           "b_a_nT": extra[0], "b_b_nT": extra[1], "sigma_b_nT": extra[2], "nis": extra[3], "nis_dof": extra[4]}
    if utc is not None:
        rec["utc"] = utc
    d_line, m_line, _ = NmeaFormatter(sentences="DM").format(rec).split("\r\n")
    d = parse_proprietary(d_line + "\r\n")
    parse_proprietary(m_line + "\r\n")
    assert [float(x) for x in d.data[3:6]] == pytest.approx(list(u), abs=5.000001e-6)
    if math.isfinite(b):
        assert float(d.data[6]) == pytest.approx(b, abs=5.000001e-4)
    assert d.data[8] == str(flags) and d.data[7] != ""


def test_utc_is_iso_8601_in_csv_and_jsonl():
    utc = 1796169601.234567
    expected = datetime.datetime.fromtimestamp(utc, datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    assert expected == "2026-12-02T00:00:01.234567Z"
    assert utc_iso(utc) == expected and utc_iso(math.nan) is None and utc_iso(None) is None
    f = CsvFormatter()
    rec = record(1, utc=utc)
    f.bind(rec)
    rows = list(csv.DictReader(io.StringIO(f.header() + f.format(rec) + f.format(record(2, utc=math.nan)))))
    assert rows[0]["utc"] == expected and rows[1]["utc"] == ""
    j = JsonlFormatter()
    j.bind(rec)
    assert json.loads(j.format(rec))["utc"] == expected
    assert json.loads(j.format(record(2, utc=math.inf)))["utc"] is None
    # The standard library reads it back (ISO 8601, 'Z' accepted from Python 3.11).
    back = datetime.datetime.fromisoformat(expected).timestamp()
    assert back == pytest.approx(utc, abs=1e-6)


# ------------------------------------------------------------------- --out specs

@pytest.mark.parametrize("text, spec", [
    ("est.csv", SinkSpec("csv", "file", path="est.csv")),
    ("/tmp/a/b.JSONL", SinkSpec("jsonl", "file", path="/tmp/a/b.JSONL")),
    ("nmea:tcp:127.0.0.1:10110", SinkSpec("nmea", "tcp", host="127.0.0.1", port=10110)),
    ("csv:tcp:50010", SinkSpec("csv", "tcp", host="127.0.0.1", port=50010)),
    ("csv:tcp:[::1]:50010", SinkSpec("csv", "tcp", host="::1", port=50010)),
    ("csv:udp:127.0.0.1:50011", SinkSpec("csv", "udp", host="127.0.0.1", port=50011)),
    ("jsonl:stdout", SinkSpec("jsonl", "stdout")),
    ("nmea:serial:/dev/ttyUSB1:115200", SinkSpec("nmea", "serial", device="/dev/ttyUSB1",
                                                  baudrate=115200)),
    ("nmea:serial:socket://127.0.0.1:7000:9600", SinkSpec("nmea", "serial",
                                                          device="socket://127.0.0.1:7000",
                                                          baudrate=9600)),
    ("jsonl:file:out/x.log", SinkSpec("jsonl", "file", path="out/x.log")),
    ("nmea:tcp:10110?mnemonic=QZX&sentences=DM",
     SinkSpec("nmea", "tcp", host="127.0.0.1", port=10110, options=(("mnemonic", "QZX"), ("sentences", "DM")))),
    ("run.nmea?sentences=DM", SinkSpec("nmea", "file", path="run.nmea", options=(("sentences", "DM"),))),
    # A pyserial URL's own query stays with the device: the baud rate follows it.
    ("nmea:serial:socket://h:7000?logging=debug:9600", SinkSpec("nmea", "serial", device="socket://h:7000?logging=debug",
                                                                baudrate=9600)),
])
def test_parse_sink_spec(text, spec):
    assert parse_sink_spec(text) == spec
    assert parse_sink_spec(str(spec)) == spec


@pytest.mark.parametrize("text", ["est.txt", "xml:stdout", "csv:tcp:host:notaport",
                                  "csv:tcp:70000", "nmea:serial:/dev/ttyUSB1", "csv:pigeon:1",
                                  "csv:udp:0", "csv:file:", "jsonl", "nmea:tcp:10110?mnemonic=xy",
                                  "nmea:tcp:10110?talker=GP", "csv:stdout?mnemonic=ABC",
                                  "nmea:stdout?sentences=Q", "nmea:stdout?sentences=D&sentences=M"])
def test_parse_sink_spec_errors(text):
    with pytest.raises(InputError, match="--out"):
        parse_sink_spec(text)


def test_open_sink_uses_the_formatter_options(tmp_path):
    path = tmp_path / "run.nmea"
    sink = open_sink(f"{path}?mnemonic=QZX&sentences=DM")
    sink.emit(record(4, utc=1796169601.5))
    assert sink.close(TIMEOUT)
    lines = path.read_bytes().decode("ascii").splitlines(keepends=True)
    assert [parse_proprietary(x).data[0] for x in lines] == ["D", "M"]
    assert lines[0].startswith("$PQZXD,000001.500,021226,")


# ------------------------------------------------------------------- transports

def test_file_sink_and_no_overwrite(tmp_path):
    path = tmp_path / "est.csv"
    sink = open_sink(str(path))
    for i in range(50):
        assert sink.emit(record(i, q=i))
    assert sink.close(TIMEOUT)
    rows = list(csv.DictReader(open(path, newline="")))
    assert len(rows) == 50 and rows[49]["q"] == "49"
    assert sink.counters()["written"] == 50
    with pytest.raises(InputError, match="exists already"):
        open_sink(str(path))


def test_stream_sink_header_first_even_with_explicit_extras():
    buf = io.StringIO()
    sink = Sink(CsvFormatter(extras=["q"]), StreamTransport(buf))
    sink.emit(record(1, q=5, ignored=3))
    assert sink.close(TIMEOUT)
    lines = buf.getvalue().splitlines()
    assert lines[0].endswith(",flags,q") and lines[1].endswith(",1,5") and len(lines) == 2


class BlockingTransport(Transport):
    """A logger whose write blocks until released (a stuck pipe or file system)."""

    description = "blocking"

    def __init__(self):
        super().__init__()
        self.entered = threading.Event()
        self.release = threading.Event()
        self.lines = []

    def write(self, lines):
        self.entered.set()
        self.release.wait(TIMEOUT)
        self.lines += lines
        return len(lines)


def test_a_queue_size_of_zero_is_unbounded_as_queue_queue():
    t = BlockingTransport()
    sink = Sink(JsonlFormatter(), t, queue_size=0, max_batch=8)
    assert sink.emit(record(0))
    assert t.entered.wait(TIMEOUT)        # the writer is stuck: everything else waits in the queue
    assert all(sink.emit(record(i)) for i in range(1, 500))
    assert sink.counters()["dropped"] == 0
    t.release.set()
    assert sink.close(TIMEOUT) and sink.counters()["written"] == 500


def test_blocked_writer_never_blocks_caller_and_counts_drops():
    t = BlockingTransport()
    sink = Sink(JsonlFormatter(), t, queue_size=32, max_batch=8)
    assert sink.emit(record(0))
    assert t.entered.wait(TIMEOUT)        # the writer holds one batch and is stuck in write()
    done = threading.Event()

    def producer():
        for i in range(1, 1000):
            sink.emit(record(i))
        done.set()

    th = threading.Thread(target=producer)
    th.start()
    th.join(TIMEOUT)
    assert done.is_set()                  # 999 emits returned while the logger was stuck
    c = sink.counters()
    assert c["accepted"] + c["dropped"] == 1000
    assert c["accepted"] == 1 + 32        # the batch in write() plus a full queue
    assert not sink.close(0.05)           # still stuck: close reports it instead of hanging
    assert not sink.emit(record(5000))    # closed sinks refuse (counted)
    t.release.set()
    assert sink.join(TIMEOUT)             # released: the thread drains and ends
    c = sink.counters()
    assert c["written"] == 33 and c["dropped"] == 968 and c["queued"] == 0
    assert [json.loads(x)["t"] for x in t.lines] == [record(i)["t"] for i in range(33)]


class _PollHeldUntilStop(Transport):
    """A logger whose periodic poll holds the idle writer until the sink is told to stop."""

    description = "poll held"

    def __init__(self):
        super().__init__()
        self.polling = threading.Event()
        self.sink = None
        self.lines = []

    def write(self, lines):
        self.lines += lines
        return len(lines)

    def poll(self):
        self.polling.set()
        _wait_until(lambda: self.sink._stop.is_set())


def test_records_queued_while_the_idle_writer_polled_are_written_by_close():
    # The writer found the queue empty and was in the transport's poll when a burst of records came and close()
    # right after them (a replay's last records, then its close, on a loaded machine): they are written, not left
    # in the queue because the writer saw the stop on its way back (the sink reported success and wrote nothing).
    t = _PollHeldUntilStop()
    sink = Sink(JsonlFormatter(), t)
    t.sink = sink
    assert t.polling.wait(TIMEOUT)
    assert all(sink.emit(record(i)) for i in range(50))
    assert sink.close(TIMEOUT)
    c = sink.counters()
    assert c["written"] == 50 and c["queued"] == 0
    assert [json.loads(x)["t"] for x in t.lines] == [record(i)["t"] for i in range(50)]


def _block(lo, hi):
    rows = [record(i) for i in range(lo, hi)]
    return RowBlock({k: np.array([r[k] for r in rows]) for k in rows[0]})


def test_row_blocks_count_as_their_records_in_the_bounded_queue():
    # The live loop hands each sink one RowBlock per batch: the queue's bound, the drops and the counters are in
    # records, a block that does not fit is cut (its first records kept), and every format writes its rows.
    t = BlockingTransport()
    sink = Sink(JsonlFormatter(), t, queue_size=10, max_batch=4)
    assert sink.emit_block(_block(0, 1)) == 1
    assert t.entered.wait(TIMEOUT)        # the writer holds one batch (one record) and is stuck in write()
    assert sink.emit_block(_block(1, 7)) == 6
    assert sink.emit(record(7))
    assert sink.emit_block(_block(8, 14)) == 3          # room for 3 of 6
    assert sink.emit_block(_block(14, 16)) == 0
    assert not sink.emit(record(16))
    c = sink.counters()
    assert (c["accepted"], c["dropped"], c["queued"]) == (11, 6, 11)
    t.release.set()
    assert sink.flush(TIMEOUT)
    assert sink.close(TIMEOUT)
    assert sink.emit_block(_block(20, 22)) == 0          # closed: refused, counted
    c = sink.counters()
    assert (c["written"], c["dropped"], c["queued"]) == (11, 8, 0)
    assert [json.loads(x)["t"] for x in t.lines] == [record(i)["t"] for i in range(11)]
    one = JsonlFormatter()
    one.bind(record(3))
    assert json.loads(t.lines[3]) == json.loads(one.format(record(3)))


def test_csv_sink_writes_row_blocks_as_their_records(tmp_path):
    a, b = open_sink(str(tmp_path / "blocks.csv")), open_sink(str(tmp_path / "records.csv"))
    blocks = [_block(0, 1), _block(1, 40), _block(40, 41), _block(41, 300)]
    for blk in blocks:
        a.emit_block(blk)
        for r in blk:
            b.emit(r)
    assert close_sinks([a, b], TIMEOUT)
    text = (tmp_path / "blocks.csv").read_text()
    assert text == (tmp_path / "records.csv").read_text() and text.count("\n") == 301


def _read_lines(sock, n, out, stop, cond=None):
    buf = b""
    while len(out) < n and not stop.is_set():
        r, _, _ = select.select([sock], [], [], 0.1)
        if r:
            data = sock.recv(65536)
            if not data:
                break
            buf += data
            *lines, buf = buf.split(b"\n")
            out.extend(lines)
            if cond is not None:
                with cond:
                    cond.notify_all()


def _receive_all(sock) -> tuple[bytes, str]:
    """Return (every byte a client receives until the stream ends, how it ended: 'end of stream' or the error)."""
    got = b""
    sock.settimeout(TIMEOUT)
    try:
        while True:
            data = sock.recv(65536)
            if not data:
                return got, "end of stream"
            got += data
    except OSError as exc:
        return got, repr(exc)


def test_tcp_close_delivers_every_line_to_a_client_that_sent_something_meanwhile():
    # A client's bytes that came after the writer's last poll were unread when the transport closed its socket:
    # the connection was reset and the lines still in the kernel's send queue, counted as written, never arrived
    # (195 of 4000). Now the stream ends after the last line and the client gets all of them.
    tr = TcpServerTransport("127.0.0.1", 0, client_sndbuf=4 << 20)
    in_close, client_sent = threading.Event(), threading.Event()
    closing = tr.close

    def close(deadline):                  # the writer reached close(), past its last poll: the client speaks first
        in_close.set()
        assert client_sent.wait(TIMEOUT)
        _wait_until(lambda: select.select([c.sock for c in tr.clients], [], [], 0)[0])    # its bytes are here
        closing(deadline)

    tr.close = close
    sink = Sink(CsvFormatter(), tr, queue_size=0, gather_s=0)
    client = socket.socket()
    client.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)     # most lines wait in the server's send queue
    client.connect(tr.address)
    assert tr.wait_clients(1, TIMEOUT)
    n = 4000
    assert all(sink.emit(record(i)) for i in range(n))
    assert sink.flush(TIMEOUT)
    closed = []
    closer = threading.Thread(target=lambda: closed.append(sink.close(TIMEOUT)))
    closer.start()
    assert in_close.wait(TIMEOUT)
    client.sendall(b"hello\n")
    client_sent.set()
    got, end = _receive_all(client)
    closer.join(TIMEOUT)
    client.close()
    lines = got.decode().splitlines()
    assert end == "end of stream" and closed == [True]
    assert lines[0].startswith("t,ux,uy") and [float(x.split(",")[0]) for x in lines[1:]] == \
        [record(i)["t"] for i in range(n)]


def test_tcp_close_lets_a_quiet_client_that_has_not_read_yet_take_every_line_afterwards():
    # A client that says nothing is closed at once (no waiting for it to read); the system goes on delivering.
    tr = TcpServerTransport("127.0.0.1", 0, client_sndbuf=4 << 20)
    sink = Sink(CsvFormatter(), tr, queue_size=0, gather_s=0)
    client = socket.socket()
    client.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    client.connect(tr.address)
    assert tr.wait_clients(1, TIMEOUT)
    n = 3000
    assert all(sink.emit(record(i)) for i in range(n))
    assert sink.flush(TIMEOUT) and sink.close(TIMEOUT)
    got, end = _receive_all(client)
    client.close()
    assert end == "end of stream"
    assert [float(x.split(",")[0]) for x in got.decode().splitlines()[1:]] == [record(i)["t"] for i in range(n)]


def test_tcp_client_accepted_with_the_first_record_gets_one_header():
    # A client still waiting to be accepted when the first record came was accepted while the header was being
    # set, and got it twice (from the accept and from the header's hand-out to every client).
    tr = TcpServerTransport("127.0.0.1", 0)
    polls, made = tr.poll, []
    tr.poll = lambda: polls() if made and made[0].accepted else None     # no one accepted before the record
    sink = Sink(CsvFormatter(), tr, gather_s=0)
    made.append(sink)
    client = socket.create_connection(tr.address)
    sink.emit(record(1))
    assert sink.flush(TIMEOUT) and sink.close(TIMEOUT)
    got, end = _receive_all(client)
    client.close()
    assert end == "end of stream"
    lines = got.decode().splitlines()
    assert len(lines) == 2 and lines[0].startswith("t,ux,uy") and lines[1].startswith(repr(record(1)["t"]) + ",")


def test_tcp_server_slow_client_does_not_hurt_others():
    tr = TcpServerTransport("127.0.0.1", 0, client_backlog_bytes=16384, client_sndbuf=4096)
    sink = Sink(CsvFormatter(), tr, queue_size=100000)
    host, port = tr.address
    assert host == "127.0.0.1"
    lazy = socket.socket()
    lazy.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    lazy.connect((host, port))            # connects and never reads (until the end)
    reader = socket.create_connection((host, port))
    assert tr.wait_clients(2, TIMEOUT)
    got, stop, cond = [], threading.Event(), threading.Condition()
    n_batches, per_batch = 200, 40        # a batch (~8 KB) fits one client's 16 KB backlog
    total = n_batches * per_batch
    th = threading.Thread(target=_read_lines, args=(reader, 1 + total, got, stop, cond))
    th.start()
    try:
        for b in range(n_batches):
            for i in range(per_batch):
                sink.emit(record(b * per_batch + i, pad="x" * 10))
            with cond:                    # the reading client keeps up before the next batch
                assert cond.wait_for(lambda: len(got) >= 1 + (b + 1) * per_batch, TIMEOUT)
        th.join(TIMEOUT)
        assert len(got) == 1 + total      # header + every line
        assert got[0].decode().startswith("t,ux,uy")
        assert [float(x.split(b",")[0]) for x in got[1:]] == [record(i)["t"] for i in range(total)]
        c = sink.counters()
        assert c["dropped"] == 0 and c["written"] == total
        assert c["client_lines_dropped"] > 0
    finally:
        stop.set()
        th.join(TIMEOUT)
        assert close_sinks([sink], 1.0)
    # Exact accounting for the client that never read: what it holds + what was dropped for it.
    lazy_lines = []
    _read_lines(lazy, 10**9, lazy_lines, threading.Event())
    lazy.close()
    reader.close()
    dropped_for_lazy = sink.counters()["client_lines_dropped"]   # includes those cut at close
    assert len(lazy_lines) - 1 + dropped_for_lazy == total


def test_udp_sink():
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(TIMEOUT)
    sink = open_sink(f"csv:udp:127.0.0.1:{rx.getsockname()[1]}")
    for i in range(20):
        sink.emit(record(i))
    assert sink.close(TIMEOUT)
    grams = [rx.recv(4096).decode() for _ in range(21)]
    rx.close()
    assert grams[0].startswith("t,ux") and len(grams[1:]) == 20
    assert sink.counters()["written"] == 20


def test_serial_sink_over_pty():
    master, slave = os.openpty()
    tty.setraw(slave)
    try:
        sink = open_sink(f"nmea:serial:{os.ttyname(slave)}:115200")
        for i in range(30):
            sink.emit(record(i))
        assert sink.close(TIMEOUT)
        data = b""
        while data.count(b"\n") < 30:
            r, _, _ = select.select([master], [], [], TIMEOUT)
            assert r
            data += os.read(master, 65536)
        lines = data.decode().splitlines()
        assert len(lines) == 30 and all(x.startswith("$PXFVD,") for x in lines)
        for x in lines:
            parse_proprietary(x + "\r\n")
    finally:
        os.close(master)
        os.close(slave)


def test_serial_sink_missing_port_is_clear():
    with pytest.raises(InputError, match="cannot open logger serial port"):
        open_sink("csv:serial:/dev/does-not-exist-fv:9600")


def test_no_threads_left_behind(tmp_path):
    before = set(threading.enumerate())
    sinks = [open_sink(str(tmp_path / "a.jsonl")), open_sink("nmea:tcp:0"),
             Sink(CsvFormatter(), StreamTransport(io.StringIO()))]
    for i in range(10):
        for s in sinks:
            s.emit(record(i))
    assert close_sinks(sinks, TIMEOUT)
    assert set(threading.enumerate()) == before


def test_documented_nmea_example_is_what_the_formatter_writes():
    # docs/sinks.md shows two sentences for one record; they must stay true (and parse, pynmea2).
    from pathlib import Path

    doc = (Path(__file__).resolve().parents[1] / "docs" / "sinks.md").read_text(encoding="utf-8")
    shown = [line.strip() for line in doc.splitlines() if line.strip().startswith("$PXFV")]
    assert len(shown) == 2
    rec = {"t": 12.345, "utc": 1796169601.2345, "ux": 0.45202062315507496, "uy": -0.5507615766788274,
           "uz": 0.701668755109382, "b_nT": 20000.000002507797, "sigma_deg": 0.0247, "flags": 1,
           "b_a_nT": 20000.0000055, "b_b_nT": 19999.9999995, "nis": 7.5, "nis_dof": 8}
    assert NmeaFormatter(sentences="DM").format(rec) == "".join(x + "\r\n" for x in shown)
    assert f"Example ({len(shown[0]) + 2} characters with CR LF" in doc.replace("\n", " ")
    for x in shown:
        parse_proprietary(x + "\r\n")


class _RecordingTransport(Transport):
    """A logger that notes each write in a shared list of events."""

    description = "recording"

    def __init__(self, events):
        super().__init__()
        self.events, self.lines = events, []

    def write(self, lines):
        self.events.append("write")
        self.lines += lines
        return len(lines)


def _wait_until(done, timeout=TIMEOUT) -> bool:
    """Return True as soon as done() holds, False after timeout s."""
    pause = threading.Event()
    for _ in range(int(timeout / 0.002)):
        if done():
            return True
        pause.wait(0.002)
    return done()


def _watch_the_writer(monkeypatch, events, during_sleep=None):
    """Note the writer's blocking waits for a record ("wait") and its gathering sleeps ("sleep") in events."""
    import queue
    import time
    from types import SimpleNamespace

    from fieldvane.io import sinks

    class WatchedQueue(queue.SimpleQueue):
        def get(self, block=True, timeout=None):
            if block:
                events.append("wait")
            return super().get(block, timeout)

    def sleep(seconds):
        events.append("sleep")
        if during_sleep is not None:
            during_sleep()
        time.sleep(seconds)

    monkeypatch.setattr(sinks.queue, "SimpleQueue", WatchedQueue)
    monkeypatch.setattr(sinks, "time", SimpleNamespace(sleep=sleep, monotonic=time.monotonic))


def test_a_streaming_writer_wakes_once_per_batch(monkeypatch):
    # While records keep coming the writer sleeps its gather time and takes what arrived, without waiting for the
    # next record in between: each wake-up takes Python's lock from the live loop (two per batch before).
    events, sent = [], []

    def one_arrives():           # a record arrives during each of the first 20 gathering sleeps
        if len(sent) < 20:
            sent.append(len(sent) + 1)
            sink.emit(record(sent[-1]))

    _watch_the_writer(monkeypatch, events, one_arrives)
    transport = _RecordingTransport(events)
    sink = Sink(JsonlFormatter(), transport, max_batch=64)
    sink.emit(record(0))
    assert _wait_until(lambda: len(sent) == 20) and sink.flush(TIMEOUT)
    assert sink.close(TIMEOUT)
    streaming = events[events.index("write"):len(events) - events[::-1].index("write")]
    assert streaming.count("write") >= 10 and "wait" not in streaming, streaming
    assert [json.loads(x)["t"] for x in transport.lines] == [record(i)["t"] for i in range(21)]


def test_a_backlog_at_an_idle_writer_is_written_without_the_gather_wait(monkeypatch):
    events = []
    _watch_the_writer(monkeypatch, events)
    transport = _RecordingTransport(events)
    sink = Sink(JsonlFormatter(), transport, max_batch=16)
    assert _wait_until(lambda: "wait" in events)          # the writer idles in its wait for a record
    assert sink.emit_block(_block(0, 40)) == 40          # a catch-up batch of more than max_batch records
    assert sink.flush(TIMEOUT) and sink.close(TIMEOUT)
    first_write = events.index("write")
    assert "sleep" not in events[:first_write], events
    assert len(transport.lines) == 40
