"""Logger sinks: estimate records formatted as CSV, JSON lines or NMEA 0183 proprietary sentences, written
to stdout, a file, a serial port, TCP clients or UDP, each behind a bounded queue and its own
writer thread so that a slow or absent logger never blocks the caller.

The `--out` grammar (parse_sink_spec) is documented in docs/sinks.md.
"""

from __future__ import annotations

import datetime
import json
import math
import os
import queue
import re
import select
import sys
import threading
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS  # one definition of the columns
from fieldvane.io.errors import InputError
from fieldvane.io.row_block import RowBlock
from fieldvane.io.worker_thread import WorkerThread

FORMATS = ("csv", "jsonl", "nmea")
TRANSPORTS = ("stdout", "file", "tcp", "udp", "serial")
FILE_SUFFIXES = {".csv": "csv", ".jsonl": "jsonl", ".nmea": "nmea"}
NMEA_MNEMONIC = "XFV"        # our manufacturer mnemonic: proprietary sentences $PXFVD and $PXFVM
NMEA_SENTENCES = "D"         # sentences sent per record by default (D only; "DM" adds the M sentence)
NMEA_MAX_LENGTH = 82         # NMEA 0183: '$' to LF inclusive
DEFAULT_QUEUE_SIZE = 4096
# A logger's thread, woken by a record, waits this long (s) and then writes what has arrived, and while records
# keep coming sleeps this long between batches: at 10 kHz, one wake-up per ~20 records instead of per record,
# each of which took the interpreter from the live loop.
DEFAULT_GATHER_S = 0.002
DEFAULT_HOST = "127.0.0.1"


# ---------------------------------------------------------------- value formatting

def _plain(value):
    """Return value as a plain Python scalar (numpy scalars unwrapped)."""
    item = getattr(value, "item", None)
    if item is not None and not isinstance(value, (str, bytes)):
        try:
            return item()
        except (TypeError, ValueError):
            return value
    return value


def _csv_field(value) -> str:
    value = _plain(value)
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value)   # shortest text that reads back to the same float
    text = str(value)
    if any(c in text for c in ',"\r\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def _json_value(value):
    value = _plain(value)
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    return str(value)


def utc_parts(posix_s) -> tuple[int, int, int, int, int, int, int] | None:
    """Return (year, month, day, hour, minute, second, microsecond) UTC of POSIX seconds, None when not finite."""
    value = _plain(posix_s)
    if value is None or isinstance(value, (str, bytes, bool)):
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(x):
        return None
    try:
        d = _EPOCH + datetime.timedelta(microseconds=round(x * 1e6))
    except OverflowError:
        return None
    return d.year, d.month, d.day, d.hour, d.minute, d.second, d.microsecond


def utc_iso(posix_s) -> str | None:
    """Return POSIX seconds as ISO 8601 UTC with microseconds and a trailing Z, None when not finite."""
    p = utc_parts(posix_s)
    if p is None:
        return None
    return f"{p[0]:04d}-{p[1]:02d}-{p[2]:02d}T{p[3]:02d}:{p[4]:02d}:{p[5]:02d}.{p[6]:06d}Z"


def utc_nmea(posix_s) -> tuple[str, str]:
    """Return NMEA 0183 (time hhmmss.sss, date ddmmyy) of POSIX seconds, rounded to the millisecond; empty when unknown."""
    value = _plain(posix_s)
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "", ""
    if not math.isfinite(x):
        return "", ""
    try:
        d = _EPOCH + datetime.timedelta(milliseconds=round(x * 1000.0))
    except OverflowError:
        return "", ""
    return (f"{d.hour:02d}{d.minute:02d}{d.second:02d}.{d.microsecond // 1000:03d}",
            f"{d.day:02d}{d.month:02d}{d.year % 100:02d}")


_EPOCH = datetime.datetime(1970, 1, 1)


def _render(key: str, value):
    """Return value as it goes to a text format: POSIX `utc` as ISO 8601 text, everything else unchanged."""
    if key == "utc":
        return utc_iso(value)
    return value


def _nmea_number(value, decimals: int, limit: float) -> str:
    """Return a fixed-decimals NMEA field, empty for missing, non-finite or |value| >= limit (sentence length)."""
    value = _plain(value)
    if value is None or isinstance(value, (str, bytes)):
        return ""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(x) or abs(x) >= limit:
        return ""
    text = f"{x:.{decimals}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def _nmea_int(value, limit: int = 100000) -> str:
    """Return a non-negative integer NMEA field, empty when missing or out of 0..limit-1."""
    value = _plain(value)
    try:
        x = float(value)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(x) or x != int(x) or not 0 <= x < limit:
        return ""
    return str(int(x))


def nmea_checksum(body: str) -> str:
    """Return the NMEA 0183 checksum of body (the text between '$' and '*'): two upper-case hex."""
    x = 0
    for b in body.encode("ascii"):
        x ^= b
    return f"{x:02X}"


def nmea_sentence(body: str) -> str:
    """Return '$' + body + '*' + checksum (no line ending)."""
    return f"${body}*{nmea_checksum(body)}"


# ---------------------------------------------------------------- formatters

def records_of(items: Iterable[Mapping | RowBlock]) -> list[Mapping]:
    """Return the records of a sink's queued items in order (a RowBlock's rows in place of it)."""
    records: list[Mapping] = []
    for item in items:
        if type(item) is RowBlock:
            records.extend(item.rows())
        else:
            records.append(item)
    return records


def _records_in(item: Mapping | RowBlock) -> int:
    """Return how many records a queued item holds."""
    return len(item) if type(item) is RowBlock else 1


class _Formatter:
    """Turns records into lines; columns fixed first, extras after them in a stable order."""

    def __init__(self, extras: Sequence[str] | None = None):
        self.extras: tuple[str, ...] | None = tuple(extras) if extras is not None else None

    def bind(self, names: Iterable[str]) -> None:
        """Fix the extra columns from the first record's column names (a record, or its keys), sorted, unless
        given explicitly."""
        if self.extras is None:
            self.extras = tuple(sorted(k for k in names if k not in ESTIMATE_COLUMNS))

    def header(self) -> str | None:
        """Return the header line (with line ending) or None when the format has none."""
        return None

    def format(self, record: Mapping) -> str:
        """Return one line (with line ending) for record."""
        raise NotImplementedError

    def format_many(self, records: Sequence[Mapping]) -> list[str]:
        """Return the lines of a batch of records, as format() gives each."""
        return [self.format(r) for r in records]

    def format_items(self, items: Sequence[Mapping | RowBlock]) -> list[str]:
        """Return the lines of a sink's queued items in order: records and RowBlocks of records."""
        return self.format_many(records_of(items))


# EstimatesWriter.write_columns (io/estimates_csv.py, io/float_text.py) writes the same bytes in
# compiled blocks: change both together (tests/test_estimates_csv.py compares them).
class CsvFormatter(_Formatter):
    """Estimates CSV: `t, ux, uy, uz, b_nT, bx_nT, by_nT, bz_nT, sigma_deg, flags` then extras."""

    def header(self) -> str:
        """Return the header line: the fixed columns then the extras, comma separated."""
        return ",".join(ESTIMATE_COLUMNS + tuple(self.extras or ())) + "\n"

    def format(self, record: Mapping) -> str:
        """Return one CSV line; floats as their shortest exact decimal (repr), `utc` as ISO 8601 UTC text."""
        get = record.get
        fields = []
        for c in ESTIMATE_COLUMNS + self.extras:
            v = get(c)
            tp = type(v)
            # Plain floats and ints, most fields of every record, straight to text (what _csv_field gives them).
            if tp is float and c != "utc":
                fields.append(repr(v))
            elif tp is int and c != "utc":
                fields.append(str(v))
            else:
                fields.append(_csv_field(_render(c, v)))
        return ",".join(fields) + "\n"

    def format_many(self, records: Sequence[Mapping]) -> list[str]:
        """Return the lines of records, as format() gives each: a backlog of like records in one compiled pass."""
        # The compiled pass costs about 35 us to set up and 2-3 us a record, against about 8 us a record one by one
        # (measured on the development VM with the tracker's records).
        if len(records) >= 8:
            from fieldvane.io.estimates_csv import records_text
            text = records_text(ESTIMATE_COLUMNS + self.extras, records)
            if text is not None:
                return text.splitlines(keepends=True)
        return super().format_many(records)

    def format_items(self, items: Sequence[Mapping | RowBlock]) -> list[str]:
        """Return the lines of queued items: RowBlocks (the live loop's batches) straight from their columns, in
        one compiled pass that leaves the interpreter free for the live loop (as format() gives each record)."""
        if all(type(item) is RowBlock for item in items):
            block = RowBlock.join(items)
            if block is not None:
                from fieldvane.io.estimates_csv import block_text
                text = block_text(ESTIMATE_COLUMNS + self.extras, block)
                if text is not None:
                    return text.splitlines(keepends=True)
        return super().format_items(items)


class JsonlFormatter(_Formatter):
    """JSON lines: one object per record, fixed keys first, then extras (non-finite -> null, `utc` -> ISO 8601)."""

    def format(self, record: Mapping) -> str:
        """Return one compact JSON object line."""
        obj = {c: _json_value(record.get(c)) for c in ESTIMATE_COLUMNS}
        for k in self.extras:
            if k in record:
                obj[k] = _json_value(_render(k, record[k]))
        for k in sorted(k for k in record if k not in obj):
            obj[k] = _json_value(_render(k, record[k]))
        return json.dumps(obj, separators=(",", ":"), allow_nan=False) + "\n"


class NmeaFormatter(_Formatter):
    """NMEA 0183 proprietary sentences, fixed fields, each at most 82 characters with CR LF.

    D (every record): `$P<mnemonic>D,hhmmss.sss,ddmmyy,ux,uy,uz,b_nT,sigma_deg,flags*hh`
    M (with sentences="DM"): `$P<mnemonic>M,hhmmss.sss,t,b_a_nT,b_b_nT,sigma_b_nT,nis,nis_dof*hh`
    Time and date come from the record's `utc` (POSIX seconds); missing values are empty fields.
    The layout is documented in docs/sinks.md.
    """

    D_FIELDS = ("time", "date", "ux", "uy", "uz", "b_nT", "sigma_deg", "flags")
    M_FIELDS = ("time", "t", "b_a_nT", "b_b_nT", "sigma_b_nT", "nis", "nis_dof")
    # Fields emptied, in this order, if a sentence would still exceed 82 characters (never for values
    # in their documented ranges).
    _SPARE = ("t", "nis", "sigma_b_nT", "b_b_nT", "b_a_nT", "sigma_deg")

    def __init__(self, extras: Sequence[str] | None = None, mnemonic: str = NMEA_MNEMONIC,
                 sentences: str = NMEA_SENTENCES):
        super().__init__(extras)
        if not (len(mnemonic) == 3 and mnemonic.isascii() and mnemonic.isalpha() and mnemonic.isupper()):
            raise ValueError(f"the NMEA mnemonic must be three capital letters A-Z, got {mnemonic!r}")
        kinds = sorted(set(sentences))
        if not kinds or any(k not in "DM" for k in kinds) or len(kinds) != len(sentences):
            raise ValueError(f"NMEA sentences must be D, M or DM, got {sentences!r}")
        self.mnemonic = mnemonic
        self.sentences = "".join(kinds)

    def fields(self, record: Mapping, kind: str) -> dict[str, str]:
        """Return the text of each field of sentence kind 'D' or 'M' for record (empty when missing)."""
        get = record.get
        time_, date = utc_nmea(get("utc"))
        if kind == "D":
            return {"time": time_, "date": date, "ux": _nmea_number(get("ux"), 5, 10),
                    "uy": _nmea_number(get("uy"), 5, 10), "uz": _nmea_number(get("uz"), 5, 10),
                    "b_nT": _nmea_number(get("b_nT"), 3, 1e6), "sigma_deg": _nmea_number(get("sigma_deg"), 4, 1e3),
                    "flags": _nmea_int(get("flags"))}
        return {"time": time_, "t": _nmea_number(get("t"), 3, 1e10),
                "b_a_nT": _nmea_number(get("b_a_nT"), 3, 1e6), "b_b_nT": _nmea_number(get("b_b_nT"), 3, 1e6),
                "sigma_b_nT": _nmea_number(get("sigma_b_nT"), 4, 1e4), "nis": _nmea_number(get("nis"), 2, 1e5),
                "nis_dof": _nmea_int(get("nis_dof"), 1000)}

    def sentence(self, record: Mapping, kind: str) -> str:
        """Return one sentence of kind 'D' or 'M' with CR LF, at most NMEA_MAX_LENGTH characters."""
        f = self.fields(record, kind)
        spare = [k for k in self._SPARE if k in f]
        while True:
            line = nmea_sentence(",".join([f"P{self.mnemonic}{kind}", *f.values()])) + "\r\n"
            if len(line) <= NMEA_MAX_LENGTH or not spare:
                return line
            f[spare.pop(0)] = ""

    def format(self, record: Mapping) -> str:
        """Return the record's sentences (D, then M when asked), each ending CR LF."""
        return "".join(self.sentence(record, kind) for kind in self.sentences)


FORMATTER_OPTIONS = {"nmea": ("mnemonic", "sentences")}


def make_formatter(fmt: str, extras: Sequence[str] | None = None, options: Mapping[str, str] | None = None,
                   where: str | None = None) -> _Formatter:
    """Return the formatter for 'csv', 'jsonl' or 'nmea' with its options (nmea: mnemonic, sentences)."""
    classes = {"csv": CsvFormatter, "jsonl": JsonlFormatter, "nmea": NmeaFormatter}
    if fmt not in classes:
        raise InputError(f"unknown sink format '{fmt}' (use one of {', '.join(FORMATS)})", column=where)
    options = dict(options or {})
    allowed = FORMATTER_OPTIONS.get(fmt, ())
    for key in options:
        if key not in allowed:
            raise InputError(f"unknown option '{key}' for the {fmt} format"
                             f"{' (use ' + ', '.join(allowed) + ')' if allowed else ' (it takes none)'}",
                             column=where)
    try:
        return classes[fmt](extras, **options)
    except ValueError as exc:
        raise InputError(str(exc), column=where) from None


# ---------------------------------------------------------------- transports
# A transport is used only from its sink's writer thread. write() returns how many lines were
# delivered (the rest count as write errors); it must not block for long.

class Transport:
    """Base transport: header handling and no-op poll/close."""

    description = "transport"
    delivers_every_line = True          # False: a lost line is the medium's way (UDP), not a failure

    def __init__(self):
        self.header: str | None = None

    def set_header(self, line: str) -> None:
        """Remember the header and write it once (stream transports)."""
        self.header = line
        self.write([line])

    def write(self, lines: list[str]) -> int:
        """Write lines; return how many were delivered."""
        raise NotImplementedError

    def poll(self) -> None:
        """Do periodic work (accept clients, retry sends, reconnect)."""

    def close(self, deadline: float) -> None:
        """Flush and release resources, giving up at the monotonic time deadline."""

    def counters(self) -> dict[str, int]:
        """Return transport-specific counters."""
        return {}


class StreamTransport(Transport):
    """Lines to a text stream (stdout by default); a broken pipe disables it."""

    description = "stdout"

    def __init__(self, stream=None):
        super().__init__()
        self.stream = stream if stream is not None else sys.stdout
        self.broken = False
        self.last_error: str | None = None   # why the stream broke (e.g. 'No space left on device')

    def write(self, lines: list[str]) -> int:
        """Write and flush lines; return how many were delivered (0 once the stream broke)."""
        if self.broken:
            return 0
        try:
            self.stream.write("".join(lines))
            self.stream.flush()
            return len(lines)
        except (BrokenPipeError, OSError, ValueError) as exc:
            self.broken = True
            self.last_error = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
            return 0


class FileTransport(StreamTransport):
    """Lines to a file; an existing file is never overwritten (append only when asked)."""

    def __init__(self, path: str | os.PathLike, append: bool = False):
        self.path = str(path)
        self.description = f"file {self.path}"
        try:
            stream = open(self.path, "a" if append else "x", encoding="utf-8", newline="")
        except FileExistsError:
            raise InputError("output file exists already; choose another name (nothing is "
                             "overwritten)", self.path) from None
        except OSError as exc:
            raise InputError(f"cannot open output file: {exc.strerror}", self.path) from None
        super().__init__(stream)

    def close(self, deadline: float) -> None:
        """Flush and close the file."""
        try:
            self.stream.close()
        except OSError:
            pass


class SerialTransport(Transport):
    """Lines to a serial port (pyserial URL or device); reopens with back-off after a failure."""

    def __init__(self, device: str, baudrate: int, write_timeout: float = 0.5,
                 reopen_min_s: float = 0.5, reopen_max_s: float = 10.0):
        super().__init__()
        import serial
        self._serial = serial
        self.device, self.baudrate, self.write_timeout = device, baudrate, write_timeout
        self.description = f"serial {device} at {baudrate} baud"
        self._reopen_min, self._reopen_max = reopen_min_s, reopen_max_s
        self._delay = reopen_min_s
        self._next_try = 0.0
        self.reopens = 0
        try:
            self.port = self._open()
        except Exception as exc:
            raise InputError(f"cannot open logger serial port: {exc}", device) from None

    def _open(self):
        return self._serial.serial_for_url(self.device, baudrate=self.baudrate,
                                           write_timeout=self.write_timeout, timeout=0)

    def set_header(self, line: str) -> None:
        """Remember the header; it is written now and after every reopen."""
        self.header = line
        if self.port is not None:
            self._raw_write([line])

    def _raw_write(self, lines: list[str]) -> bool:
        try:
            self.port.write("".join(lines).encode("ascii", errors="replace"))
            return True
        except Exception:
            self._drop_port()
            return False

    def _reopen(self) -> bool:
        now = time.monotonic()
        if now < self._next_try:
            return False
        try:
            self.port = self._open()
        except Exception:
            self._next_try = now + self._delay
            self._delay = min(self._delay * 2, self._reopen_max)
            return False
        self.reopens += 1
        self._delay = self._reopen_min
        return not self.header or self._raw_write([self.header])

    def write(self, lines: list[str]) -> int:
        """Write lines; return how many were delivered (0 while the port is down)."""
        if self.port is None and not self._reopen():
            return 0
        return len(lines) if self._raw_write(lines) else 0

    def _drop_port(self) -> None:
        try:
            self.port.close()
        except Exception:
            pass
        self.port = None
        self._next_try = time.monotonic() + self._delay

    def close(self, deadline: float) -> None:
        """Wait for the output buffer to drain (bounded by write_timeout) and close the port."""
        if self.port is not None:
            try:
                self.port.flush()
            except Exception:
                pass
            self._drop_port()

    def counters(self) -> dict[str, int]:
        """Return the number of reopens after failures."""
        return {"reopens": self.reopens}


class _Client:
    __slots__ = ("sock", "pending", "peer")

    def __init__(self, sock, peer):
        self.sock, self.peer, self.pending = sock, peer, bytearray()


class TcpServerTransport(Transport):
    """A TCP server: every connected client receives every line (CSV header first on connect).

    Sockets are non-blocking; each client has a bounded backlog and lines that would overflow it
    are dropped for that client only (counted), so a client that never reads costs nothing else.
    """

    def __init__(self, host: str = DEFAULT_HOST, port: int = 0, max_clients: int = 8,
                 client_backlog_bytes: int = 1 << 20, client_sndbuf: int | None = None):
        super().__init__()
        self.client_sndbuf = client_sndbuf
        import socket      # here, not at the top: a file-only run (replay) does not pay for its import

        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.server = socket.socket(family, socket.SOCK_STREAM)
        self.server.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            self.server.bind((host, port))
        except OSError as exc:
            self.server.close()
            raise InputError(f"cannot listen on {host}:{port}: {exc.strerror}") from None
        self.server.listen(max_clients)
        self.server.setblocking(False)
        self.address = self.server.getsockname()[:2]
        self.description = f"tcp server {self.address[0]}:{self.address[1]}"
        self.max_clients = max_clients
        self.backlog = client_backlog_bytes
        self.clients: list[_Client] = []
        self.clients_accepted = 0
        self.clients_refused = 0
        self.clients_closed = 0
        self.client_lines_dropped = 0
        self._client_count = threading.Semaphore(0)   # released once per accepted client

    def wait_clients(self, n: int, timeout: float) -> bool:
        """Return True once n clients have been accepted in total (False after timeout s)."""
        deadline = time.monotonic() + timeout
        for _ in range(n):
            if not self._client_count.acquire(timeout=max(0.0, deadline - time.monotonic())):
                return False
        for _ in range(n):
            self._client_count.release()
        return True

    def set_header(self, line: str) -> None:
        """Remember the header: it goes first to every client, now and on connect."""
        self.poll()                 # (before the header is set: a client accepted here gets it once, below)
        self.header = line
        data = line.encode("utf-8")
        for c in self.clients:
            c.pending[:0] = data
        self._send_all()

    def poll(self) -> None:
        """Accept waiting clients, notice closed ones, and push pending bytes."""
        import socket

        while True:
            try:
                sock, peer = self.server.accept()
            except (BlockingIOError, InterruptedError):
                break
            except OSError:
                break
            if len(self.clients) >= self.max_clients:
                self.clients_refused += 1
                sock.close()
                continue
            sock.setblocking(False)
            if self.client_sndbuf:
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, self.client_sndbuf)
            client = _Client(sock, peer)
            if self.header:
                client.pending += self.header.encode("utf-8")
            self.clients.append(client)
            self.clients_accepted += 1
            self._client_count.release()
        if self.clients:
            try:
                readable, _, _ = select.select([c.sock for c in self.clients], [], [], 0)
            except (OSError, ValueError):
                readable = [c.sock for c in self.clients]
            for c in [c for c in self.clients if c.sock in readable]:
                try:
                    if not c.sock.recv(4096):       # orderly close by the client
                        self._drop(c)
                except (BlockingIOError, InterruptedError):
                    pass
                except OSError:
                    self._drop(c)
        self._send_all()

    def _drop(self, c: _Client) -> None:
        self.client_lines_dropped += c.pending.count(b"\n")   # queued for it, never delivered
        c.pending.clear()
        if c in self.clients:
            self.clients.remove(c)
            self.clients_closed += 1
        try:
            c.sock.close()
        except OSError:
            pass

    def _send_all(self) -> None:
        for c in list(self.clients):
            if not c.pending:
                continue
            try:
                sent = c.sock.send(c.pending)
                del c.pending[:sent]
            except (BlockingIOError, InterruptedError):
                pass
            except OSError:
                self._drop(c)

    def write(self, lines: list[str]) -> int:
        """Queue lines for every client (dropping whole lines past a client's backlog); send."""
        if self.clients:
            encoded = [ln.encode("utf-8") for ln in lines]
            for c in self.clients:
                for b in encoded:
                    if len(c.pending) + len(b) > self.backlog:
                        self.client_lines_dropped += 1
                    else:
                        c.pending += b
        self.poll()
        return len(lines)

    def close(self, deadline: float) -> None:
        """Push what clients will take until deadline (monotonic s), then close every socket."""
        while any(c.pending for c in self.clients) and time.monotonic() < deadline:
            socks = [c.sock for c in self.clients if c.pending]
            try:
                select.select([], socks, [], max(0.0, min(0.05, deadline - time.monotonic())))
            except (OSError, ValueError):
                break
            self._send_all()
        self._hang_up(deadline)
        for c in list(self.clients):
            self._drop(c)
        self.server.close()

    def _hang_up(self, deadline: float) -> None:
        """End each client's stream after what it was sent; wait (until deadline) only for clients that speak.

        Closing a socket that holds unread input resets the connection, and the kernel then throws away what the
        client has not received yet: lines counted as written would vanish. A quiet client is closed at once (the
        kernel goes on delivering); one that sent something is read and discarded until it hangs up or has
        acknowledged every byte (Linux's outgoing-queue count)."""
        import socket

        talking = []
        for c in self.clients:
            try:
                c.sock.shutdown(socket.SHUT_WR)
            except OSError:
                continue
            if _drain_input(c.sock) is False:
                talking.append(c)
        while talking:
            left = deadline - time.monotonic()
            if left <= 0:
                break
            try:
                select.select([c.sock for c in talking], [], [], min(0.01, left))
            except (OSError, ValueError):
                break
            talking = [c for c in talking if not _client_done(c.sock)]

    def counters(self) -> dict[str, int]:
        """Return client counts and the lines dropped for clients that fell behind."""
        return {"clients": len(self.clients), "clients_accepted": self.clients_accepted,
                "clients_refused": self.clients_refused, "clients_closed": self.clients_closed,
                "client_lines_dropped": self.client_lines_dropped}


def _drain_input(sock) -> bool | None:
    """Read and discard what a client sent; return None when it sent nothing, True when it hung up (or is gone),
    False when it sent bytes and is still there."""
    sent = None
    try:
        while True:
            if not sock.recv(65536):
                return True             # its end of stream
            sent = False
    except (BlockingIOError, InterruptedError):
        return sent
    except OSError:
        return True                     # reset or gone: nothing more to deliver


def _client_done(sock) -> bool:
    """Discard what a half-closed client sent; return True once it hung up or acknowledged every byte sent."""
    return _drain_input(sock) is True or _unacknowledged_bytes(sock) == 0


def _unacknowledged_bytes(sock) -> int:
    """Return the bytes of a TCP socket's send queue the peer has not acknowledged (Linux), -1 when unknown."""
    try:
        import array
        import fcntl
        import termios

        count = array.array("i", [0])
        fcntl.ioctl(sock.fileno(), termios.TIOCOUTQ, count)      # SIOCOUTQ on a socket
        return count[0]
    except (ImportError, AttributeError, OSError):
        return -1                       # (wait for the client's hang-up or the deadline)


class UdpTransport(Transport):
    """One datagram per line to host:port (the CSV header is sent once, first)."""

    delivers_every_line = False

    def __init__(self, host: str, port: int):
        super().__init__()
        self.last_error: str | None = None       # why the last datagram that could not be sent was not
        import socket

        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.sock = socket.socket(family, socket.SOCK_DGRAM)
        self.sock.setblocking(False)
        self.target = (host, port)
        self.description = f"udp {host}:{port}"

    def write(self, lines: list[str]) -> int:
        """Send each line as one datagram; return how many were sent."""
        sent = 0
        for ln in lines:
            try:
                self.sock.sendto(ln.encode("utf-8"), self.target)
                sent += 1
            except OSError as exc:      # buffer full, or an earlier datagram was refused (ICMP)
                self.last_error = exc.strerror or type(exc).__name__
        return sent

    def close(self, deadline: float) -> None:
        """Close the socket."""
        self.sock.close()


# ---------------------------------------------------------------- the sink

class Sink:
    """A formatter and a transport behind a bounded queue drained by the sink's own thread."""

    def __init__(self, formatter: _Formatter, transport: Transport,
                 queue_size: int = DEFAULT_QUEUE_SIZE, name: str | None = None,
                 max_batch: int = 256, poll_s: float = 0.05, gather_s: float = DEFAULT_GATHER_S):
        self.formatter = formatter
        self.transport = transport
        self.name = name or transport.description
        self.max_batch = max_batch
        self.poll_s = poll_s
        self.gather_s = gather_s
        self.queue_size = queue_size
        # queue.SimpleQueue (in C) bounded by counting: emit() from the live loop costs no Python-level lock
        # or condition, and the writer, once woken, gathers for gather_s before it takes its batch.
        self._q: queue.SimpleQueue = queue.SimpleQueue()
        self._lock = threading.Lock()
        self._cond = threading.Condition()
        self._stop = threading.Event()
        self._closing = False
        self._header_done = False
        self.accepted = 0        # records taken into the queue
        self.dropped = 0         # records refused because the queue was full (or sink closed)
        self.written = 0         # lines the transport delivered
        self.write_errors = 0    # lines the transport could not deliver
        self.format_errors = 0   # records that could not be formatted
        self._taken = 0          # records the writer took out of the queue
        self._processed = 0      # records taken out of the queue and handled
        self.last_error: str | None = None
        self._writer_done = False   # the writer has ended (set under _cond, before its waiters are woken)
        self._thread = WorkerThread(self._run, name=f"fieldvane-sink {self.name}")
        self._thread.start()

    def _offer(self, record: Mapping) -> bool | None:
        """Queue a copy of record if there is room (True), refuse it when closed (False), else None."""
        with self._lock:
            if self._closing:
                self.dropped += 1
                return False
            if 0 < self.queue_size <= self.accepted - self._taken:      # (0 or less: unbounded, as queue.Queue)
                return None
            self._q.put(dict(record))
            self.accepted += 1
            return True

    def emit(self, record: Mapping) -> bool:
        """Queue a copy of record without blocking; return False (and count a drop) if full."""
        if not isinstance(record, Mapping):
            record = record.row()          # an estimator Estimate: its estimates-CSV row
        done = self._offer(record)
        if done is None:
            with self._lock:
                self.dropped += 1
            return False
        return done

    def emit_block(self, block: RowBlock) -> int:
        """Queue a batch of records (a RowBlock, shared: left unchanged by its maker) without blocking; return how
        many were taken, the rest counted as drops when the queue is full."""
        n = len(block)
        with self._lock:
            room = 0 if self._closing else n
            if room and self.queue_size > 0:
                room = max(0, min(n, self.queue_size - (self.accepted - self._taken)))
            if room:
                self._q.put(block if room == n else block[:room])
                self.accepted += room
            self.dropped += n - room
        return room

    def emit_wait(self, record: Mapping, timeout: float) -> bool:
        """Queue a copy of record, waiting up to timeout s for room (for replays, not live)."""
        if not isinstance(record, Mapping):
            record = record.row()
        deadline = time.monotonic() + timeout
        while True:
            done = self._offer(record)
            if done is not None:
                return done
            left = deadline - time.monotonic()
            if left <= 0 or self._writer_done:
                with self._lock:
                    self.dropped += 1
                return False
            with self._cond:              # the writer notifies after each batch
                self._cond.wait_for(lambda: not 0 < self.queue_size <= self.accepted - self._taken
                                    or self._writer_done, min(left, self.poll_s))

    def flush(self, timeout: float = 5.0) -> bool:
        """Return True once every record accepted so far has been handed to the transport."""
        target = self.accepted
        with self._cond:
            return self._cond.wait_for(lambda: self._processed >= target or
                                       self._writer_done, timeout) and \
                self._processed >= target

    def close(self, timeout: float = 5.0) -> bool:
        """Stop accepting, write what is queued, close the transport; True if done in time."""
        with self._lock:
            self._closing = True
        # The transport gets most of the time; the rest is left for the thread to end.
        self._deadline = time.monotonic() + 0.8 * timeout
        self._stop.set()
        return self._thread.join(timeout)

    @property
    def failed(self) -> bool:
        """Return True when the sink's file or stream broke (every later line is a write error)."""
        return bool(getattr(self.transport, "broken", False))

    @property
    def alive(self) -> bool:
        """Return True while the writer thread runs."""
        return self._thread.is_alive()

    def join(self, timeout: float) -> bool:
        """Wait for the writer thread to end; return True if it did."""
        return self._thread.join(timeout)

    def counters(self) -> dict[str, int]:
        """Return accepted, dropped, written, write_errors, format_errors, queued and transport counts."""
        c = {"accepted": self.accepted, "dropped": self.dropped, "written": self.written,
             "write_errors": self.write_errors, "format_errors": self.format_errors,
             "queued": self.accepted - self._processed}
        c.update(self.transport.counters())
        return c

    def _run(self) -> None:
        formatter, transport, q = self.formatter, self.transport, self._q
        if formatter.extras is not None:
            self._write_header()
        streaming = False          # the last batch had records: the next one is gathered by sleeping first
        try:
            while True:
                # One wake-up per gathered batch, not per record (no wait for a backlog): while records keep
                # coming, the writer sleeps gather_s and takes what arrived; idle, it waits for the next record.
                if streaming and self._gathers():
                    time.sleep(self.gather_s)
                try:
                    first = q.get_nowait() if streaming else q.get(timeout=self.poll_s)
                except queue.Empty:
                    if streaming:
                        streaming = False
                        continue
                    try:
                        transport.poll()
                    except Exception as exc:           # keep the writer alive on odd errors
                        self.last_error = repr(exc)
                    # Records may have come (and the close after them) since the queue looked empty: write them
                    # first. Closing refuses new records before the stop is set, so an empty queue now stays so.
                    if self._stop.is_set() and q.empty():
                        break
                    continue
                if not streaming and self._gathers():        # (asked after the wait: a backlog may have come)
                    time.sleep(self.gather_s)
                streaming = True
                batch = [first]
                rows = _records_in(first)
                while rows < self.max_batch:
                    try:
                        item = q.get_nowait()
                    except queue.Empty:
                        break
                    batch.append(item)
                    rows += _records_in(item)
                self._taken += rows
                if not self._header_done:
                    formatter.bind(first.keys())          # (a record's or a RowBlock's column names)
                    self._write_header()
                try:
                    lines = formatter.format_items(batch)
                except Exception:              # one odd record: record by record, to count and name it
                    lines = []
                    for rec in records_of(batch):
                        try:
                            lines.append(formatter.format(rec))
                        except Exception as exc:
                            self.format_errors += 1
                            self.last_error = repr(exc)
                try:
                    n = transport.write(lines) if lines else 0
                except Exception as exc:
                    n = 0
                    self.last_error = repr(exc)
                if n < len(lines) and getattr(transport, "last_error", None):
                    self.last_error = transport.last_error
                self.written += n
                self.write_errors += len(lines) - n
                with self._cond:
                    self._processed += rows
                    self._cond.notify_all()
        finally:
            try:
                transport.close(getattr(self, "_deadline", time.monotonic() + 1.0))
            except Exception as exc:
                self.last_error = repr(exc)
            with self._cond:
                self._writer_done = True
                self._cond.notify_all()

    def _gathers(self) -> bool:
        """Return True when the writer should wait gather_s before taking a batch (not stopping, no backlog)."""
        return self.gather_s > 0 and not self._stop.is_set() and self.accepted - self._taken < self.max_batch

    def _write_header(self) -> None:
        self._header_done = True
        header = self.formatter.header()
        if header:
            try:
                self.transport.set_header(header)
            except Exception as exc:
                self.last_error = repr(exc)


# ---------------------------------------------------------------- --out specs

@dataclass(frozen=True)
class SinkSpec:
    """A parsed `--out` value: format, transport and its target."""

    fmt: str
    transport: str
    path: str | None = None
    host: str | None = None
    port: int | None = None
    device: str | None = None
    baudrate: int | None = None
    options: tuple[tuple[str, str], ...] = ()     # formatter options, e.g. (("mnemonic", "XFV"),)

    def __str__(self) -> str:
        return self._target() + ("?" + "&".join(f"{k}={v}" for k, v in self.options) if self.options else "")

    def _target(self) -> str:
        if self.transport == "file":
            return f"{self.fmt}:file:{self.path}"
        if self.transport in ("tcp", "udp"):
            host = f"[{self.host}]" if ":" in (self.host or "") else self.host
            return f"{self.fmt}:{self.transport}:{host}:{self.port}"
        if self.transport == "serial":
            return f"{self.fmt}:serial:{self.device}:{self.baudrate}"
        return f"{self.fmt}:{self.transport}"


# A trailing `?key=value[&key=value]` holds formatter options; a pyserial URL's own query is followed
# by ':BAUD', so it never matches.
_OPTIONS_RE = re.compile(r"[a-z_]+=[^&?:/\\]*(?:&[a-z_]+=[^&?:/\\]*)*")


def _split_options(text: str, spec: str) -> tuple[str, tuple[tuple[str, str], ...]]:
    """Return (spec text without options, ((key, value), ...)) of an `--out` value."""
    head, sep, tail = text.rpartition("?")
    if not sep or not _OPTIONS_RE.fullmatch(tail):
        return text, ()
    pairs = tuple(tuple(item.split("=", 1)) for item in tail.split("&"))
    keys = [k for k, _ in pairs]
    if len(set(keys)) != len(keys):
        raise InputError("an option is given twice", column="--out " + spec)
    return head, pairs


def _port(text: str, spec: str) -> int:
    try:
        port = int(text)
    except ValueError:
        raise InputError(f"'{text}' is not a port number", column="--out " + spec) from None
    if not 0 <= port <= 65535:
        raise InputError(f"port {port} is out of range", column="--out " + spec)
    return port


def _host_port(rest: str, spec: str) -> tuple[str, int]:
    if rest.startswith("["):
        host, sep, tail = rest[1:].partition("]")
        if not sep or not tail.startswith(":"):
            raise InputError("expected [IPV6]:PORT", column="--out " + spec)
        return host, _port(tail[1:], spec)
    if ":" not in rest:
        return DEFAULT_HOST, _port(rest, spec)
    host, _, port = rest.rpartition(":")
    if not host:
        raise InputError("empty host", column="--out " + spec)
    return host, _port(port, spec)


def parse_sink_spec(spec: str) -> SinkSpec:
    """Return the SinkSpec of an `--out` value (grammar in docs/sinks.md); raise InputError."""
    text, options = _split_options(spec.strip(), spec)
    parsed = _parse_target(text, spec)
    if options:
        make_formatter(parsed.fmt, None, dict(options), where="--out " + spec)   # check them now
        parsed = replace(parsed, options=options)
    return parsed


def _parse_target(text: str, spec: str) -> SinkSpec:
    """Return the SinkSpec of an `--out` value without formatter options."""
    head, sep, rest = text.partition(":")
    if head not in FORMATS:
        suffix = os.path.splitext(text)[1].lower()
        if suffix in FILE_SUFFIXES:
            return SinkSpec(FILE_SUFFIXES[suffix], "file", path=text)
        raise InputError("expected FORMAT:TRANSPORT[:TARGET] with FORMAT one of "
                         f"{', '.join(FORMATS)}, or a file path ending "
                         f"{', '.join(FILE_SUFFIXES)}", column="--out " + spec)
    kind, _, target = rest.partition(":")
    if kind == "stdout" and not target:
        return SinkSpec(head, "stdout")
    if kind == "file" and target:
        return SinkSpec(head, "file", path=target)
    if kind in ("tcp", "udp") and target:
        host, port = _host_port(target, spec)
        if kind == "udp" and port == 0:
            raise InputError("a UDP sink needs a destination port", column="--out " + spec)
        return SinkSpec(head, kind, host=host, port=port)
    if kind == "serial" and target:
        device, _, baud = target.rpartition(":")
        if not device or not baud.isdigit() or int(baud) <= 0:
            raise InputError("expected serial:DEVICE:BAUD (the baud rate is required)",
                             column="--out " + spec)
        return SinkSpec(head, "serial", device=device, baudrate=int(baud))
    raise InputError(f"unknown or incomplete transport '{kind}' (use stdout, file:PATH, "
                     "tcp:[HOST:]PORT, udp:[HOST:]PORT or serial:DEVICE:BAUD)",
                     column="--out " + spec)


def open_transport(spec: SinkSpec, append: bool = False) -> Transport:
    """Return the transport a SinkSpec names, opened (files created, servers listening)."""
    if spec.transport == "stdout":
        return StreamTransport()
    if spec.transport == "file":
        return FileTransport(spec.path, append=append)
    if spec.transport == "tcp":
        return TcpServerTransport(spec.host, spec.port)
    if spec.transport == "udp":
        return UdpTransport(spec.host, spec.port)
    if spec.transport == "serial":
        return SerialTransport(spec.device, spec.baudrate)
    raise InputError(f"unknown transport '{spec.transport}'")


def open_sink(spec: str | SinkSpec, extras: Sequence[str] | None = None,
              queue_size: int = DEFAULT_QUEUE_SIZE, append: bool = False) -> Sink:
    """Return a started Sink for an `--out` value (or a SinkSpec)."""
    if isinstance(spec, str):
        spec = parse_sink_spec(spec)
    return Sink(make_formatter(spec.fmt, extras, dict(spec.options), where="--out " + str(spec)),
                open_transport(spec, append), queue_size, name=str(spec))


def close_sinks(sinks: Iterable[Sink], timeout: float = 5.0) -> bool:
    """Close every sink, sharing one deadline; return True if all finished in time."""
    deadline = time.monotonic() + timeout
    sinks = list(sinks)
    for s in sinks:
        with s._lock:
            s._closing = True
        s._deadline = deadline - 0.2 * timeout
        s._stop.set()
    ok = True
    for s in sinks:
        ok &= s.join(max(0.0, deadline - time.monotonic()))
    return ok
