"""Recording CSV (docs/recording_format.md): a chunked, vectorized reader with per-line errors, and a writer.

Reading: lines are taken a chunk at a time and parsed from the raw bytes by a compiled parser
(io/csv_numbers.py) that takes only what it converts exactly; the lines it leaves go to numpy's text
reader, and a piece that numpy cannot parse either falls back to a line-by-line parser that names the
bad line. Only rows that fail the vectorized checks are parsed again one by one for their message.
Every path applies the same rules (`_RowRules.parse_line` is the reference):

- a row needs a finite t, f_a, f_b (and applied-field and truth columns when the file has them);
- lock-in values that are empty or NaN are missing: that channel becomes NaN+NaNj, and the row is
  kept when at least one probe has all its values (a one-probe file thus needs probe 1 complete);
- an infinite value, a wrong number of fields or text that is not a number skips the row,
  counted and reported as `file:line: column 'x': message`;
- columns the reader does not know are ignored (a warning names them once).
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np

from fieldvane.estimator.samples import (CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES, SampleBlock,
                                         channel_probe)
from fieldvane.io.byte_lines import ByteLines, ParsedRows
from fieldvane.io.errors import InputError

BASE_COLUMNS = ("t", "f_a", "f_b")
FIELD_COLUMNS = ("bx_nT", "by_nT", "bz_nT")
TRUTH_COLUMNS = ("true_ux", "true_uy", "true_uz", "true_b_nT")
MAX_REPORTED_PROBLEMS = 20
DEFAULT_CHUNK_ROWS = 65536
SLOW_PIECE_ROWS = 64          # below this many lines a failing piece is parsed line by line
_SPLIT = 16                   # a failing piece is retried as this many smaller pieces

# Line status inside a chunk.
_FAST, _SLOW_ROW, _IGNORED, _BAD = 0, 1, 2, 3


def channel_columns(channel: str, polar: bool) -> tuple[str, str]:
    """Return the two CSV column names of a channel: (x, y) or (r, th) when polar."""
    return (f"r_{channel}", f"th_{channel}") if polar else (f"x_{channel}", f"y_{channel}")


@dataclass
class Layout:
    """Where each quantity sits in a recording's columns (resolved once from the header)."""

    header: list[str]
    channels: tuple[str, ...]
    polar: bool
    index: dict[str, int]
    unknown: list[str] = field(default_factory=list)

    @property
    def has_field(self) -> bool:
        return all(c in self.index for c in FIELD_COLUMNS)

    @property
    def has_truth(self) -> bool:
        return all(c in self.index for c in TRUTH_COLUMNS)


def resolve_layout(header: list[str], path: str = "<input>", line: int = 1) -> Layout:
    """Return the column layout of a recording header, or raise InputError naming what is wrong."""
    names = [h.strip() for h in header]
    index: dict[str, int] = {}
    for i, n in enumerate(names):
        if n in index:
            raise InputError("column appears twice", path, line, n)
        index[n] = i
    for n in BASE_COLUMNS:
        if n not in index:
            raise InputError(f"required column missing (header has: {', '.join(names)})", path, line, n)
    polar = "r_1a" in index or "th_1a" in index
    if polar and ("x_1a" in index or "y_1a" in index):
        raise InputError("give each channel either x/y or r/th, not both", path, line, "x_1a")
    channels = CHANNELS_TWO_PROBES if any(f"{'r' if polar else 'x'}_2{p}" in index
                                          for p in "ab") else CHANNELS_ONE_PROBE
    for ch in channels:
        for n in channel_columns(ch, polar):
            if n not in index:
                raise InputError(f"channel column missing for channel {ch}", path, line, n)
    partial = [n for n in FIELD_COLUMNS if n in index]
    if partial and len(partial) != 3:
        missing = [n for n in FIELD_COLUMNS if n not in index][0]
        raise InputError("applied-field columns must come as a set of three", path, line, missing)
    known = set(BASE_COLUMNS) | set(FIELD_COLUMNS) | set(TRUTH_COLUMNS)
    for ch in channels:
        known.update(channel_columns(ch, polar))
    unknown = [n for n in names if n not in known]
    return Layout(names, channels, polar, index, unknown)


def fill_empty_fields(text: str) -> str:
    """Return CSV text ('\\n' between lines) with every empty field written as 'nan'."""
    if not text:
        return text
    out = text.replace(",,", ",nan,").replace(",,", ",nan,")
    out = out.replace(",\n", ",nan\n").replace("\n,", "\nnan,")
    if out[0] == ",":
        out = "nan" + out
    if out[-1] == ",":
        out += "nan"
    return out


def fast_parse_lines(lines: list[str], ncol: int) -> np.ndarray | None:
    """Return the (len(lines), ncol) float64 values of CSV lines (no line endings; empty fields NaN), or None
    if any line does not parse as exactly ncol numbers."""
    for attempt in (0, 1):
        if attempt:
            text = "\n".join(lines)
            filled = fill_empty_fields(text)
            if filled == text:
                return None
            lines = filled.split("\n")
        try:
            values = np.loadtxt(lines, delimiter=",", comments=None, dtype=np.float64, ndmin=2)
        except (ValueError, OverflowError):
            continue
        # numpy skips blank lines silently: the count check keeps rows and lines aligned.
        if values.shape == (len(lines), ncol):
            return values
        return None
    return None


class _RowRules:
    """The row rules of one layout: the line-by-line reference parser and its vectorized twin."""

    def __init__(self, layout: Layout, require_all_probes: bool):
        ix = layout.index
        self.layout = layout
        self.ncol = len(layout.header)
        required = [ix[c] for c in BASE_COLUMNS]
        if layout.has_field:
            required += [ix[c] for c in FIELD_COLUMNS]
        if layout.has_truth:
            required += [ix[c] for c in TRUTH_COLUMNS]
        self.required = np.array(sorted(required), np.intp)
        self.chan_cols = np.array([[ix[c] for c in channel_columns(ch, layout.polar)]
                                   for ch in layout.channels], np.intp)          # (C, 2)
        self.used = sorted(required + self.chan_cols.ravel().tolist())
        self._required_set = set(required)
        self._channel_set = set(self.chan_cols.ravel().tolist())
        probes = sorted({channel_probe(ch) for ch in layout.channels})
        self.probes = [(p, [k for k, ch in enumerate(layout.channels) if channel_probe(ch) == p])
                       for p in probes]
        self.require_all_probes = require_all_probes

    def channel_missing(self, values: np.ndarray) -> np.ndarray:
        """Return (N, C) True where a channel has an empty or NaN value."""
        miss = np.isnan(values[:, self.chan_cols.ravel()])
        return miss[:, 0::2] | miss[:, 1::2]

    def rows_ok(self, values: np.ndarray) -> np.ndarray:
        """Return (N,) True for rows the reference parser keeps (values already parsed, empty = NaN)."""
        ok = np.isfinite(values[:, self.required]).all(axis=1)
        ok &= ~np.isinf(values[:, self.chan_cols.ravel()]).any(axis=1)
        complete = self._complete_probes(self.channel_missing(values))
        return ok & (complete.all(axis=1) if self.require_all_probes else complete.any(axis=1))

    def _complete_probes(self, missing: np.ndarray) -> np.ndarray:
        """Return (N, P) True where every channel of the probe is present."""
        return np.column_stack([~missing[:, cols].any(axis=1) for _, cols in self.probes])

    def parse_line(self, raw: str) -> tuple[int, list[float] | None, str | None]:
        """Return (status, values, problem) for one data line: the reference rules, one line at a time."""
        s = raw.strip()
        if not s or s.startswith("#"):
            return _IGNORED, None, None
        parts = s.split(",")
        if len(parts) != self.ncol:
            return _BAD, None, f"expected {self.ncol} fields, found {len(parts)}; row skipped"
        header = self.layout.header
        values = [math.nan] * self.ncol
        empty = set()
        for i in self.used:
            text = parts[i].strip()
            try:
                values[i] = float(text)
            except ValueError:
                if text == "" and i in self._channel_set:
                    empty.add(i)
                    continue
                return _BAD, None, f"column '{header[i]}': not a number ({text[:30]!r}); row skipped"
        for i in self.used:
            v = values[i]
            if (i in self._required_set and not math.isfinite(v)) or (i in self._channel_set and math.isinf(v)):
                return _BAD, None, f"column '{header[i]}': non-finite value; row skipped"
        missing = [math.isnan(values[a]) or math.isnan(values[b]) for a, b in self.chan_cols.tolist()]
        complete = [not any(missing[k] for k in cols) for _, cols in self.probes]
        if all(complete) if self.require_all_probes else any(complete):
            return _SLOW_ROW, values, None
        first = min(i for i in self._channel_set if math.isnan(values[i]))
        if first in empty:
            return _BAD, None, f"column '{header[first]}': not a number (''); row skipped"
        return _BAD, None, f"column '{header[first]}': non-finite value; row skipped"


class RecordingReader:
    """Streams a recording CSV in chunks of at most chunk_rows rows (SampleBlock); counts and reports bad rows.

    After iteration: `skipped_rows`, `rows_read`, `rows_without_probe` {probe: rows kept with that
    probe incomplete}, `metadata` ('# key: value' lines before the header) and `warnings`
    (file:line: ... messages, then one summary line per kind of problem).
    """

    def __init__(self, path: str | Path, chunk_rows: int = DEFAULT_CHUNK_ROWS, *,
                 require_all_probes: bool = False, fast: bool = True):
        self.path = str(path)
        self.chunk_rows = max(1, int(chunk_rows))
        self.require_all_probes = require_all_probes
        self.fast = fast                  # False: every line through the reference parser (tests)
        self.metadata: dict[str, str] = {}
        self.warnings: list[str] = []
        self.skipped_rows = 0
        self.rows_read = 0
        self.rows_without_probe: dict[int, int] = {}
        self.layout: Layout | None = None
        self.header_line: int | None = None    # line of the header row, once read
        self.header_read = threading.Event()   # set once metadata and layout are known (or the reading ended)
        self._problems = 0
        self._rules: _RowRules | None = None
        self._last_t = -math.inf

    def _warn(self, message: str) -> None:
        self._problems += 1
        if self._problems <= MAX_REPORTED_PROBLEMS:
            self.warnings.append(message)
        elif self._problems == MAX_REPORTED_PROBLEMS + 1:
            self.warnings.append(f"{self.path}: further problems not listed one by one")

    def __iter__(self) -> Iterator[SampleBlock]:
        try:
            try:
                fh = open(self.path, "rb")
            except OSError as exc:
                raise InputError(f"cannot open recording: {exc.strerror}", self.path) from None
            with fh:
                yield from self._read(ByteLines(fh, block_bytes=min(1 << 22, max(1 << 16, 64 * self.chunk_rows))))
        finally:
            self.header_read.set()        # also when there was no header to read

    def _read(self, source: ByteLines) -> Iterator[SampleBlock]:
        lineno = 0
        layout = None
        while (raw := source.readline()) is not None:
            lineno += 1
            s = raw.strip()
            if not s:
                continue
            if "\x00" in s or "\ufffd" in s:
                raise InputError("not text (binary bytes where a CSV line was expected)", self.path, lineno)
            if s.startswith("#"):
                body = s[1:].strip()
                if ":" in body:
                    k, v = body.split(":", 1)
                    self.metadata[k.strip()] = v.strip()
                continue
            layout = resolve_layout(s.split(","), self.path, lineno)
            self.header_line = lineno
            break
        if layout is None:
            raise InputError("no header row found (a header naming the columns is required)", self.path)
        self.layout = layout
        self._rules = _RowRules(layout, self.require_all_probes)
        self.header_read.set()
        if layout.unknown:
            self._warn(f"{self.path}:{lineno}: ignoring unknown columns: {', '.join(layout.unknown)}")
        while (lines := source.parse(self.chunk_rows, self._rules.ncol)) is not None:
            block = self._chunk(lines, lineno + 1)
            lineno += len(lines)
            if block is not None:
                yield block
        self._summarize()

    def _summarize(self) -> None:
        if self.skipped_rows:
            self.warnings.append(f"{self.path}: {self.skipped_rows} malformed row(s) skipped, "
                                 f"{self.rows_read} read")
        for probe, n in sorted(self.rows_without_probe.items()):
            self.warnings.append(f"{self.path}: {n} row(s) kept without probe {probe} "
                                 f"(empty or NaN lock-in values read as missing)")

    def _parse_piece(self, lines, lo, hi, values, status, problems, try_fast: bool = True) -> None:
        """Fill values/status/problems for lines[lo:hi]: compiled parse, else smaller pieces, else line by line."""
        if self.fast and try_fast:
            arr = fast_parse_lines(lines[lo:hi], self._rules.ncol)
            if arr is not None:
                values[lo:hi] = arr
                status[lo:hi] = _FAST
                return
        if self.fast and hi - lo > SLOW_PIECE_ROWS:
            step = max(SLOW_PIECE_ROWS, -(-(hi - lo) // _SPLIT))
            for a in range(lo, hi, step):
                self._parse_piece(lines, a, min(a + step, hi), values, status, problems)
            return
        for k in range(lo, hi):
            self._reparse(lines, k, values, status, problems)

    def _reparse(self, lines, k, values, status, problems) -> None:
        st, row, problem = self._rules.parse_line(lines[k])
        status[k] = st
        if row is not None:
            values[k] = row
        if problem is not None:
            problems[k] = problem

    def _chunk(self, lines: ParsedRows, first_line: int) -> SampleBlock | None:
        rules = self._rules
        n = len(lines)
        status = np.full(n, _FAST, np.int8)
        problems: dict[int, str] = {}
        if self.fast:
            values = lines.values
            rest = np.flatnonzero(~lines.ok)
            if rest.size:                 # lines the compiled parser left: numpy's reader, else one by one
                sub = np.full((rest.size, rules.ncol), np.nan)
                sub_status = np.full(rest.size, _FAST, np.int8)
                sub_problems: dict[int, str] = {}
                self._parse_piece(lines[rest], 0, rest.size, sub, sub_status, sub_problems)
                values[rest], status[rest] = sub, sub_status
                problems.update((int(rest[j]), text) for j, text in sub_problems.items())
        else:
            values = np.full((n, rules.ncol), np.nan)
            self._parse_piece(lines, 0, n, values, status, problems, try_fast=False)
        fast = status == _FAST
        clean = bool(fast.all()) and bool(np.isfinite(values).all())    # the usual chunk: nothing to check
        suspect = [] if clean or not fast.any() else np.flatnonzero(fast & ~rules.rows_ok(values))
        for k in suspect:                 # the reference parser decides and words the problem
            self._reparse(lines, int(k), values, status, problems)
        kept = (status == _FAST) | (status == _SLOW_ROW)
        bad = np.flatnonzero(status == _BAD)
        self.skipped_rows += bad.size
        rows = values if kept.all() else values[kept]
        row_index = np.flatnonzero(kept)
        self._report(rows, row_index, bad, problems, first_line)
        if rows.shape[0] == 0:
            return None
        block = self._block(rows, first_line + row_index, clean)
        block.skipped_rows = int(bad.size)
        return block

    def _report(self, rows, row_index, bad, problems, first_line) -> None:
        """Warn in line order about skipped rows and about time going backwards (kept rows)."""
        t = rows[:, self.layout.index["t"]]
        if t.size:
            running = np.maximum.accumulate(np.concatenate(([self._last_t], t)))
            back = np.flatnonzero(t < running[:-1])
            self._last_t = float(running[-1])
        else:
            back = np.empty(0, np.intp)
        events = sorted([(int(k), -1) for k in bad] + [(int(row_index[j]), int(j)) for j in back])
        for k, j in events:
            if self._problems > MAX_REPORTED_PROBLEMS:
                self._problems += len(events) - events.index((k, j))
                break
            where = f"{self.path}:{first_line + k}"
            if j < 0:
                self._warn(f"{where}: {problems[k]}")
            else:
                self._warn(f"{where}: column 't': time goes backwards "
                           f"({t[j]:.6g} s after {running[j]:.6g} s)")

    def _block(self, rows: np.ndarray, lines: np.ndarray, clean: bool = False) -> SampleBlock:
        layout, rules = self.layout, self._rules
        ix = layout.index
        n = rows.shape[0]
        self.rows_read += n
        z = np.empty((n, len(layout.channels)), complex)
        for k, (ia, ib) in enumerate(rules.chan_cols.tolist()):
            a, b = rows[:, ia], rows[:, ib]
            z[:, k] = a * np.exp(1j * np.radians(b)) if layout.polar else a + 1j * b
        missing = None if clean else rules.channel_missing(rows)
        if missing is not None and missing.any():
            z[missing] = complex(math.nan, math.nan)
            for probe, cols in rules.probes:
                count = int(missing[:, cols].any(axis=1).sum())
                if count:
                    self.rows_without_probe[probe] = self.rows_without_probe.get(probe, 0) + count
        block = SampleBlock(t=np.ascontiguousarray(rows[:, ix["t"]]), f=rows[:, [ix["f_a"], ix["f_b"]]], z=z,
                            channels=layout.channels, metadata=dict(self.metadata))
        block.lines = np.asarray(lines, np.int64)
        if layout.has_field:
            block.applied_b_nT = rows[:, [ix[c] for c in FIELD_COLUMNS]]
        if layout.has_truth:
            block.truth = {c: np.ascontiguousarray(rows[:, ix[c]]) for c in TRUTH_COLUMNS}
        return block


def is_float(s: str) -> bool:
    """Return True if s parses as a Python float."""
    try:
        float(s)
        return True
    except ValueError:
        return False


def read_recording(path: str | Path, chunk_rows: int = DEFAULT_CHUNK_ROWS, *,
                   require_all_probes: bool = False) -> tuple[SampleBlock, list[str]]:
    """Return the whole recording as one SampleBlock plus the list of warnings (file:line: ...).

    require_all_probes=True skips (and counts) rows with any lock-in value missing instead of
    keeping them with NaN channels.
    """
    reader = RecordingReader(path, chunk_rows, require_all_probes=require_all_probes)
    blocks = list(reader)
    if not blocks:
        raise InputError("no valid data rows", str(path))
    out = concatenate_blocks(blocks)
    out.skipped_rows = reader.skipped_rows
    return out, reader.warnings


def concatenate_blocks(blocks: list[SampleBlock]) -> SampleBlock:
    """Return one SampleBlock holding the rows of several blocks with the same layout, in order."""
    first = blocks[0]
    out = SampleBlock(t=np.concatenate([b.t for b in blocks]), f=np.concatenate([b.f for b in blocks]),
                      z=np.concatenate([b.z for b in blocks]), channels=first.channels,
                      metadata=dict(first.metadata), skipped_rows=sum(b.skipped_rows for b in blocks))
    if first.applied_b_nT is not None:
        out.applied_b_nT = np.concatenate([b.applied_b_nT for b in blocks])
    if first.truth:
        out.truth = {k: np.concatenate([b.truth[k] for b in blocks]) for k in first.truth}
    if all(getattr(b, "lines", None) is not None for b in blocks):
        out.lines = np.concatenate([b.lines for b in blocks])
    return out


def write_recording(path: str | Path, columns: dict[str, np.ndarray],
                    metadata: dict[str, str] | None = None) -> None:
    """Write a recording CSV: '# key: value' metadata lines, a header, then one row per sample."""
    names = list(columns)
    data = np.column_stack([np.asarray(columns[n], float) for n in names])
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        for k, v in (metadata or {}).items():
            fh.write(f"# {k}: {v}\n")
        fh.write(",".join(names) + "\n")
        np.savetxt(fh, data, delimiter=",", fmt="%.10g")
