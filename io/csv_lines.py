"""Text input mode: recording-CSV lines arriving over a serial link, decoded into Samples."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES, Sample
from fieldvane.io.errors import InputError
from fieldvane.io.recording import BASE_COLUMNS, channel_columns, is_float

MAX_LINE_LEN = 4096          # a longer line is garbage: dropped up to the next newline
MAX_METADATA_KEYS = 256      # '# key: value' comments kept (the rest are counted only)

BOM = b"\xef\xbb\xbf"          # UTF-8 byte order mark (spreadsheets write one): ignored

COUNTER_NAMES = ("lines_ok", "bad_lines", "comment_lines", "header_lines", "long_lines",
                 "bytes_discarded", "resync_bytes", "resyncs", "bytes_fed")


class CsvLayout:
    """Where each needed field sits in a row: built from a header (column names)."""

    def __init__(self, columns: Sequence[str], source: str = "<input>", line: int | None = None):
        cols = [c.strip() for c in columns]
        self.columns = tuple(cols)
        index = {}
        for i, name in enumerate(cols):
            if name in index:
                raise InputError(f"column '{name}' appears twice", source, line, name)
            index[name] = i
        for name in BASE_COLUMNS:
            if name not in index:
                raise InputError("required column is missing", source, line, name)
        self.t_i, self.fa_i, self.fb_i = index["t"], index["f_a"], index["f_b"]
        plan = []
        for ch in CHANNELS_TWO_PROBES:
            xy, rth = channel_columns(ch, False), channel_columns(ch, True)
            if all(n in index for n in xy):
                plan.append((ch, False, index[xy[0]], index[xy[1]]))
            elif all(n in index for n in rth):
                plan.append((ch, True, index[rth[0]], index[rth[1]]))
            elif any(n in index for n in xy + rth):
                pair = xy if any(n in index for n in xy) else rth
                missing = next(n for n in pair if n not in index)
                raise InputError(f"channel {ch} needs both columns of its pair", source, line, missing)
            elif ch in CHANNELS_ONE_PROBE:
                raise InputError(f"channel {ch} needs {','.join(xy)} or {','.join(rth)}", source,
                                 line, xy[0])
        if len(plan) == 3:
            ch = next(c for c in CHANNELS_TWO_PROBES if c not in [p[0] for p in plan])
            raise InputError(f"probe 2 is incomplete: channel {ch} is missing", source, line,
                             f"x_{ch}")
        self.plan = tuple(plan)
        self.channels = CHANNELS_TWO_PROBES if len(plan) == 4 else CHANNELS_ONE_PROBE

    def parse(self, fields: list[str], source: str, line: int, restarted: bool = False) -> Sample:
        """Return the Sample in one row's fields (t in s, f in Hz, z = x + i y in volts)."""
        if len(fields) != len(self.columns):
            raise InputError(f"expected {len(self.columns)} fields, got {len(fields)}", source,
                             line)
        cols = self.columns

        def _num(i: int, may_be_missing: bool = False) -> float:
            text = fields[i].strip()
            if may_be_missing and not text:
                return math.nan
            try:
                return float(text)
            except ValueError:
                raise InputError(f"not a number: {text[:40]!r}", source, line, cols[i]) from None

        t, f_a, f_b = _num(self.t_i), _num(self.fa_i), _num(self.fb_i)
        z = np.empty(len(self.plan), dtype=np.complex128)
        for k, (_ch, polar, i1, i2) in enumerate(self.plan):
            a, b = _num(i1, True), _num(i2, True)
            if math.isnan(a) or math.isnan(b):
                z[k] = complex(math.nan, math.nan)      # missing, as in a recording (a dark probe)
            elif polar:
                th = math.radians(b)
                z[k] = complex(a * math.cos(th), a * math.sin(th))
            else:
                z[k] = complex(a, b)
        # Like a binary frame with non-finite values, the sample goes on: the estimator uses the
        # complete probes and flags BAD_INPUT, and the stream keeps its time line.
        return Sample(t, f_a, f_b, z, self.channels, 0, restarted)


def _looks_like_header(fields: list[str]) -> bool:
    """Return True when no field parses as a number (a header row, not a data row)."""
    return not any(map(is_float, fields))


class CsvLineDecoder:
    """Pure text decoder: feed(bytes) returns the Samples of completed lines; counts bad ones.

    Memory stays bounded: a line longer than max_line_len bytes is dropped as it arrives (counted
    in long_lines, bad_lines and bytes_discarded). The first line of a fresh stream (at start,
    after resync()) that does not parse counts as resynchronisation (resync_bytes), not as a bad
    line; after resync(lost=True) the first line is dropped whole (it is a fragment). A header
    arriving again (a restarted sender) marks the next sample `restarted`.
    """

    def __init__(self, columns: Sequence[str] | None = None, max_line_len: int = MAX_LINE_LEN,
                 source: str = "<serial>"):
        self.source = source
        self.max_line_len = max_line_len
        self.layout = CsvLayout(columns, source) if columns is not None else None
        self.metadata: dict[str, str] = {}
        self.last_error: str | None = None
        self._buf = bytearray()
        self._discarding = False
        self._discard_resync = False  # the long run being dropped is a resync, not a bad line
        self._fresh = True            # the next complete line may be a fragment
        self._skip_line = False       # drop the next line whole (bytes were lost before it)
        self._restart_next = False
        self.line_no = 0
        self.lines_ok = 0
        self.bad_lines = 0
        self.comment_lines = 0
        self.header_lines = 0
        self.long_lines = 0
        self.bytes_discarded = 0
        self.resync_bytes = 0
        self.resyncs = 0
        self.bytes_fed = 0

    def counters(self) -> dict[str, int]:
        """Return a snapshot of every counter (ints), including `pending` bytes."""
        c = {name: getattr(self, name) for name in COUNTER_NAMES}
        c["pending"] = len(self._buf)
        return c

    def resync(self, lost: bool = False) -> None:
        """Start afresh at the next byte (link reopened; lost=True: bytes went missing mid-line)."""
        self.resyncs += 1
        self.resync_bytes += len(self._buf)
        self._buf.clear()
        if self._discarding:
            self._discarding = False
            self.line_no += 1
        self._fresh = True
        self._skip_line = lost

    def _long(self, line: int, n: int) -> None:
        """Count a line longer than the limit (n bytes dropped so far)."""
        if self._fresh or self._skip_line:
            self.resync_bytes += n
            return
        self.long_lines += 1
        self._bad(f"line longer than {self.max_line_len} bytes", line)
        self.bytes_discarded += n

    def feed(self, data: bytes) -> list[Sample]:
        """Return the Samples of the lines completed by data; bad lines are counted, never raised."""
        if not isinstance(data, (bytes, bytearray)):
            data = bytes(data)
        self.bytes_fed += len(data)
        out: list[Sample] = []
        start, n = 0, len(data)
        buf = self._buf
        while start < n:
            end = data.find(b"\n", start)
            if end < 0:
                rest = n - start
                if self._discarding:
                    if self._discard_resync:
                        self.resync_bytes += rest
                    else:
                        self.bytes_discarded += rest
                elif len(buf) + rest > self.max_line_len:
                    self._discard_resync = self._fresh or self._skip_line
                    self._long(self.line_no + 1, len(buf) + rest)
                    buf.clear()
                    self._discarding = True
                else:
                    buf += data[start:]
                break
            seg = end - start
            if self._discarding:
                self.line_no += 1
                if self._discard_resync:
                    self.resync_bytes += seg
                else:
                    self.bytes_discarded += seg
                self._discarding = False
                self._fresh = self._skip_line = False
            elif len(buf) + seg > self.max_line_len:
                self.line_no += 1
                self._long(self.line_no, len(buf) + seg)
                buf.clear()
                self._fresh = self._skip_line = False
            elif self._skip_line:
                self.line_no += 1
                self.resync_bytes += len(buf) + seg
                buf.clear()
                self._fresh = self._skip_line = False
            else:
                buf += data[start:end]
                self._line(bytes(buf), out)
                buf.clear()
            start = end + 1
        return out

    def _bad(self, message: str, line: int, column: str | None = None) -> None:
        self.bad_lines += 1
        self.last_error = str(InputError(message, self.source, line, column))

    def _line(self, raw: bytes, out: list[Sample]) -> None:
        self.line_no += 1
        fresh, self._fresh = self._fresh, False
        if raw.startswith(BOM):
            raw = raw[len(BOM):]
        text = raw.decode("utf-8", errors="replace").rstrip("\r")
        stripped = text.strip()
        if not stripped:
            return
        if stripped.startswith("#"):
            self.comment_lines += 1
            key, sep, value = stripped[1:].partition(":")
            if sep and (key.strip() in self.metadata or len(self.metadata) < MAX_METADATA_KEYS):
                self.metadata[key.strip()] = value.strip()
            return
        fields = text.split(",")
        if _looks_like_header(fields):
            try:
                layout = CsvLayout(fields, self.source, self.line_no)
            except InputError as exc:
                self._fail(exc, fresh, len(raw))
                return
            self.layout = layout
            if self.header_lines:
                self._restart_next = True     # the sender started over
            self.header_lines += 1
            return
        if self.layout is None:
            self._fail(InputError("a header line (column names) must come first", self.source,
                                  self.line_no), fresh, len(raw))
            return
        try:
            sample = self.layout.parse(fields, self.source, self.line_no, self._restart_next)
        except InputError as exc:
            self._fail(exc, fresh, len(raw))
            return
        self._restart_next = False
        self.lines_ok += 1
        out.append(sample)

    def _fail(self, exc: InputError, fresh: bool, n: int) -> None:
        """Count a line that did not parse: resynchronisation on a fresh stream, else a bad line."""
        if fresh:
            self.resync_bytes += n
            return
        self.bad_lines += 1
        self.last_error = str(exc)
