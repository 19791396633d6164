"""Recording CSV (DESIGN.md section 4): streaming reader with clear errors, and a writer."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np

from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES, SampleBlock
from fieldvane.io.errors import InputError

BASE_COLUMNS = ("t", "f_a", "f_b")
FIELD_COLUMNS = ("bx_nT", "by_nT", "bz_nT")
TRUTH_COLUMNS = ("true_ux", "true_uy", "true_uz", "true_b_nT")
MAX_REPORTED_PROBLEMS = 20


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


class RecordingReader:
    """Streams a recording CSV in bounded-size chunks of SampleBlock; counts and reports bad rows."""

    def __init__(self, path: str | Path, chunk_rows: int = 65536):
        self.path = str(path)
        self.chunk_rows = int(chunk_rows)
        self.metadata: dict[str, str] = {}
        self.warnings: list[str] = []
        self.skipped_rows = 0
        self.rows_read = 0
        self.layout: Layout | None = None
        self._problems = 0

    def _warn(self, message: str) -> None:
        self._problems += 1
        if self._problems <= MAX_REPORTED_PROBLEMS:
            self.warnings.append(message)
        elif self._problems == MAX_REPORTED_PROBLEMS + 1:
            self.warnings.append(f"{self.path}: further problems not listed one by one")

    def __iter__(self) -> Iterator[SampleBlock]:
        try:
            fh = open(self.path, "r", encoding="utf-8", errors="replace", newline="")
        except OSError as exc:
            raise InputError(f"cannot open recording: {exc.strerror}", self.path) from None
        with fh:
            yield from self._read(fh)

    def _read(self, fh) -> Iterator[SampleBlock]:
        lineno = 0
        layout = None
        for raw in fh:
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
            break
        if layout is None:
            raise InputError("no header row found (a header naming the columns is required)", self.path)
        self.layout = layout
        if layout.unknown:
            self._warn(f"{self.path}:{lineno}: ignoring unknown columns: {', '.join(layout.unknown)}")
        ncol = len(layout.header)
        buf = np.empty((self.chunk_rows, ncol))
        lines = np.empty(self.chunk_rows, dtype=np.int64)
        n = 0
        last_t = -math.inf
        for raw in fh:
            lineno += 1
            s = raw.strip()
            if not s or s.startswith("#"):
                continue
            parts = s.split(",")
            if len(parts) != ncol:
                self.skipped_rows += 1
                self._warn(f"{self.path}:{lineno}: expected {ncol} fields, found {len(parts)}; row skipped")
                continue
            try:
                row = [float(p) for p in parts]
            except ValueError:
                bad = next(i for i, p in enumerate(parts) if not is_float(p))
                self.skipped_rows += 1
                self._warn(f"{self.path}:{lineno}: column '{layout.header[bad]}': not a number "
                           f"({parts[bad].strip()[:30]!r}); row skipped")
                continue
            if not all(map(math.isfinite, row)):
                bad = next(i for i, v in enumerate(row) if not math.isfinite(v))
                self.skipped_rows += 1
                self._warn(f"{self.path}:{lineno}: column '{layout.header[bad]}': non-finite value; "
                           f"row skipped")
                continue
            t = row[layout.index["t"]]
            if t < last_t:
                self._warn(f"{self.path}:{lineno}: column 't': time goes backwards "
                           f"({t:.6g} s after {last_t:.6g} s)")
            last_t = max(last_t, t)
            buf[n] = row
            lines[n] = lineno
            n += 1
            if n == self.chunk_rows:
                yield self._block(buf[:n].copy(), layout)
                n = 0
        if n:
            yield self._block(buf[:n].copy(), layout)

    def _block(self, rows: np.ndarray, layout: Layout) -> SampleBlock:
        ix = layout.index
        self.rows_read += rows.shape[0]
        z = np.empty((rows.shape[0], len(layout.channels)), complex)
        for k, ch in enumerate(layout.channels):
            a, b = (rows[:, ix[c]] for c in channel_columns(ch, layout.polar))
            z[:, k] = a * np.exp(1j * np.radians(b)) if layout.polar else a + 1j * b
        block = SampleBlock(t=rows[:, ix["t"]], f=rows[:, [ix["f_a"], ix["f_b"]]], z=z,
                            channels=layout.channels, metadata=dict(self.metadata))
        if layout.has_field:
            block.applied_b_nT = rows[:, [ix[c] for c in FIELD_COLUMNS]]
        if layout.has_truth:
            block.truth = {c: rows[:, ix[c]] for c in TRUTH_COLUMNS}
        return block


def is_float(s: str) -> bool:
    """Return True if s parses as a Python float."""
    try:
        float(s)
        return True
    except ValueError:
        return False


def read_recording(path: str | Path, chunk_rows: int = 65536) -> tuple[SampleBlock, list[str]]:
    """Return the whole recording as one SampleBlock plus the list of warnings (file:line: ...)."""
    reader = RecordingReader(path, chunk_rows)
    blocks = list(reader)
    if not blocks:
        raise InputError("no valid data rows", str(path))
    out = concatenate_blocks(blocks)
    out.skipped_rows = reader.skipped_rows
    if reader.skipped_rows:
        reader.warnings.append(f"{path}: {reader.skipped_rows} malformed row(s) skipped, "
                               f"{reader.rows_read} read")
    return out, reader.warnings


def concatenate_blocks(blocks: list[SampleBlock]) -> SampleBlock:
    """Return one SampleBlock holding the rows of several blocks with the same layout, in order."""
    first = blocks[0]
    out = SampleBlock(t=np.concatenate([b.t for b in blocks]), f=np.concatenate([b.f for b in blocks]),
                      z=np.concatenate([b.z for b in blocks]), channels=first.channels,
                      metadata=dict(first.metadata))
    if first.applied_b_nT is not None:
        out.applied_b_nT = np.concatenate([b.applied_b_nT for b in blocks])
    if first.truth:
        out.truth = {k: np.concatenate([b.truth[k] for b in blocks]) for k in first.truth}
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
