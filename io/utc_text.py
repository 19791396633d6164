"""The estimates' `utc` column as text: POSIX seconds <-> ISO 8601 UTC, vectorized for the block writer and reader.

Text files show `utc` as the sinks render it (io/sinks.py utc_iso): 'YYYY-MM-DDThh:mm:ss.ffffffZ',
microseconds, rounded half to even, an empty field when the time is unknown. Records and arrays
hold POSIX seconds (float, UTC, no leap seconds).
"""

from __future__ import annotations

import math

import numpy as np

from fieldvane.io.errors import InputError

# datetime's range (years 1 to 9999): the sinks write nothing outside it.
_FIRST_S = -62135596800.0
_LAST_S = 253402300799.999999


def iso_texts(posix_s) -> list[str]:
    """Return ISO 8601 UTC texts (microseconds, trailing Z) of POSIX seconds (N,); '' where not finite."""
    x = np.asarray(posix_s, float).reshape(-1)
    ok = np.isfinite(x) & (x >= _FIRST_S) & (x <= _LAST_S)
    out = [""] * x.size
    if np.any(ok):
        micro = np.rint(x[ok] * 1e6).astype(np.int64).astype("datetime64[us]")
        texts = np.char.add(np.datetime_as_string(micro, unit="us"), "Z")
        for i, text in zip(np.flatnonzero(ok).tolist(), texts.tolist()):
            out[i] = text
    return out


def insert_field(text: bytes | memoryview, index: int, values: list[str]) -> bytes:
    """Return CSV lines (ASCII, '\\n' endings) with field `index` (empty in every line) replaced by values."""
    lines = bytes(text).decode("ascii").split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    if len(lines) != len(values):
        raise ValueError(f"{len(lines)} lines but {len(values)} values")
    out = []
    for line, value in zip(lines, values):
        parts = line.split(",", index)            # the empty field starts the last part
        out.append(",".join(parts[:index]) + ("," if index else "") + value + parts[index])
    return ("\n".join(out) + "\n").encode("ascii")


def _parse_one(text: str) -> float:
    """Return POSIX seconds of one field: empty (NaN), a number of seconds, or ISO 8601 UTC ending in Z."""
    s = text.strip()
    if not s:
        return math.nan
    try:
        return float(s)
    except ValueError:
        pass
    if not s.endswith(("Z", "z")):
        raise ValueError(f"not a UTC time (ISO 8601 ending in Z, e.g. 2026-12-02T00:00:00Z): {s[:40]!r}")
    try:
        value = np.datetime64(s[:-1], "us")
    except ValueError:
        raise ValueError(f"not an ISO 8601 time: {s[:40]!r}") from None
    if np.isnat(value):
        return math.nan
    return int(value.astype(np.int64)) * 1e-6


def posix_from_texts(texts: list[str], path: str | None = None, first_line: int | None = None,
                     column: str = "utc", line_numbers=None) -> np.ndarray:
    """Return POSIX seconds (N,) of utc fields (ISO 8601 ending in Z, or seconds; empty -> NaN).

    A field that is neither raises InputError naming the file, its line (line_numbers[i], or
    first_line + i) and the column.
    """
    arr = np.array([t.strip() for t in texts], dtype=object)
    out = np.full(arr.size, np.nan)
    if arr.size == 0:
        return out
    strs = arr.astype(str)
    iso = np.char.endswith(strs, "Z")
    try:
        if np.any(iso):
            micro = np.array(np.char.rstrip(strs[iso], "Z"), dtype="datetime64[us]")
            good = ~np.isnat(micro)
            vals = np.full(micro.size, np.nan)
            vals[good] = micro[good].astype(np.int64) * 1e-6
            out[iso] = vals
        rest = ~iso
        if np.any(rest):
            out[rest] = [float(s) if s else math.nan for s in strs[rest]]
        return out
    except ValueError:
        pass
    for i, text in enumerate(texts):                # slow path: find the bad field and name its line
        try:
            out[i] = _parse_one(text)
        except ValueError as exc:
            line = int(line_numbers[i]) if line_numbers is not None else (
                None if first_line is None else first_line + i)
            raise InputError(str(exc), path, line, column) from None
    return out


def utc_lines_to_numbers(lines: list[str], index: int, path: str | None, first_line: int) -> list[str]:
    """Return CSV data lines with field `index` (utc text) turned into POSIX seconds (repr); blank and # lines kept."""
    rows, where = [], []
    for k, line in enumerate(lines):
        s = line.strip()
        if s and not s.startswith("#"):
            parts = line.split(",")
            if len(parts) > index:
                rows.append(parts)
                where.append(k)
    values = posix_from_texts([p[index] for p in rows], path, column="utc",
                              line_numbers=[first_line + k for k in where])
    out = list(lines)
    for parts, k, v in zip(rows, where, values.tolist()):
        parts[index] = "" if math.isnan(v) else repr(v)
        out[k] = ",".join(parts)
    return out
