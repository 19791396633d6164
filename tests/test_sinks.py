"""Logger sinks: formats (CSV, JSON lines, NMEA-style), transports, bounded queues, --out specs."""

from __future__ import annotations

import csv
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

from fieldvane.io.errors import InputError
from fieldvane.io.sinks import (ESTIMATE_COLUMNS, CsvFormatter, JsonlFormatter, NmeaFormatter,
                                Sink, SinkSpec, StreamTransport, TcpServerTransport, Transport,
                                close_sinks, nmea_checksum, open_sink, parse_sink_spec)

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


def test_nmea_sentences_checked_with_pynmea2():
    f = NmeaFormatter()
    rec = record(11, extra_text="x*y,z$", gate=0.5, bad=math.nan)
    f.bind(rec)
    for r in (rec, record(12, gate=1.25, extra_text="ok", bad=1.0)):
        line = f.format(r)
        assert line.endswith("\r\n")
        m = pynmea2.NMEASentence.sentence_re.match(line)
        assert m and m.group("sentence_type") == "FVDIR,"
        # Checksum: pynmea2's XOR of the characters between '$' and '*'.
        assert int(m.group("checksum"), 16) == pynmea2.NMEASentence.checksum(m.group("nmea_str"))
        assert m.group("checksum") == m.group("checksum").upper()
        # pynmea2 validates the checksum before it looks the sentence type up.
        with pytest.raises(pynmea2.SentenceTypeError):
            pynmea2.parse(line.strip(), check=True)
        broken = line.replace("FVDIR,", "FVDIR,9", 1)
        with pytest.raises(pynmea2.ChecksumError):
            pynmea2.parse(broken.strip(), check=True)
    fields = f.format(rec)[1:].split("*")[0].split(",")
    assert fields[0] == "FVDIR" and fields[1] == "0.011000"
    assert fields[11:] == ["", "x_y_z_", "0.5"]      # bad (nan) empty, text sanitized, gate


# ------------------------------------------------------------------- --out specs

@pytest.mark.parametrize("text, spec", [
    ("est.csv", SinkSpec("csv", "file", path="est.csv")),
    ("/tmp/a/b.JSONL", SinkSpec("jsonl", "file", path="/tmp/a/b.JSONL")),
    ("nmea:tcp:127.0.0.1:5600", SinkSpec("nmea", "tcp", host="127.0.0.1", port=5600)),
    ("csv:tcp:5600", SinkSpec("csv", "tcp", host="127.0.0.1", port=5600)),
    ("csv:tcp:[::1]:5600", SinkSpec("csv", "tcp", host="::1", port=5600)),
    ("csv:udp:127.0.0.1:5601", SinkSpec("csv", "udp", host="127.0.0.1", port=5601)),
    ("jsonl:stdout", SinkSpec("jsonl", "stdout")),
    ("nmea:serial:/dev/ttyUSB1:115200", SinkSpec("nmea", "serial", device="/dev/ttyUSB1",
                                                  baudrate=115200)),
    ("nmea:serial:socket://127.0.0.1:7000:9600", SinkSpec("nmea", "serial",
                                                          device="socket://127.0.0.1:7000",
                                                          baudrate=9600)),
    ("jsonl:file:out/x.log", SinkSpec("jsonl", "file", path="out/x.log")),
])
def test_parse_sink_spec(text, spec):
    assert parse_sink_spec(text) == spec
    assert parse_sink_spec(str(spec)) == spec


@pytest.mark.parametrize("text", ["est.txt", "xml:stdout", "csv:tcp:host:notaport",
                                  "csv:tcp:70000", "nmea:serial:/dev/ttyUSB1", "csv:pigeon:1",
                                  "csv:udp:0", "csv:file:", "jsonl"])
def test_parse_sink_spec_errors(text):
    with pytest.raises(InputError, match="--out"):
        parse_sink_spec(text)


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
        assert len(lines) == 30 and all(x.startswith("$FVDIR,") for x in lines)
        for x in lines:
            body, cs = x[1:].split("*")
            assert cs == "%02X" % pynmea2.NMEASentence.checksum(body)
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
