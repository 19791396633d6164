"""Site TOML (`--site SITE.toml`, spec in docs/geographic.md), the sensor file's [mounting] table, UTC times.

Everything here is strict: unknown sections, keys and columns are refused by name, types and
ranges are checked, and every error is one line naming the file, the line where there is one, and
the key or column (fieldvane.io.errors.InputError).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

from fieldvane.estimator.geomagnetic import (attitude_matrix, checked_rotation, mounting_from_rotation_deg,
                                             slerp_attitude)
from fieldvane.io.errors import InputError
from fieldvane.io.tomlfile import TomlDoc, read_text

SITE_VERSION = 1
TEXT_WIDTH = 45                # IAGA-2002 header descriptions fill columns 25-69
ELEVATION_RANGE_M = (-12000.0, 100000.0)
ATTITUDE_COLUMNS = ("t", "heading_deg", "pitch_deg", "roll_deg")
ATTITUDE_CLOCKS = ("recording", "utc")

_SITE_KEYS = {"name", "iaga_code", "latitude_deg", "longitude_deg", "elevation_m", "institute"}
_ANGLE_KEYS = ("heading_deg", "pitch_deg", "roll_deg")
_STD_KEYS = ("heading_std_deg", "pitch_std_deg", "roll_std_deg")
_ATTITUDE_KEYS = set(_ANGLE_KEYS) | set(_STD_KEYS) | {"matrix", "file", "file_clock"}
_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


# ----------------------------------------------------------------------------------------- UTC times

def parse_utc(text: str, path: str | None = None, line: int | None = None, column: str | None = None) -> float:
    """Return POSIX seconds (float, UTC, no leap seconds) of an ISO 8601 UTC time such as 2026-12-02T00:00:00Z.

    The zone must be written ('Z' or +00:00): a time without one is refused rather than guessed.
    """
    if not isinstance(text, str):
        raise InputError("expected an ISO 8601 UTC time string such as 2026-12-02T00:00:00Z", path, line, column)
    s = text.strip()
    try:
        dt = datetime.fromisoformat(s[:-1] + "+00:00" if s[-1:] in ("Z", "z") else s)
    except ValueError:
        raise InputError(f"not an ISO 8601 time: {text!r} (example: 2026-12-02T00:00:00Z)", path, line,
                         column) from None
    if len(s) <= 10:
        raise InputError(f"give a date and a time: {text!r} (example: 2026-12-02T00:00:00Z)", path, line, column)
    if dt.tzinfo is None:
        raise InputError(f"no time zone in {text!r}: add Z for UTC", path, line, column)
    if dt.utcoffset() != timedelta(0):
        raise InputError(f"{text!r} is not UTC: write the time in UTC with a Z", path, line, column)
    delta = dt - _EPOCH
    return delta.days * 86400.0 + delta.seconds + delta.microseconds * 1e-6


def format_utc(seconds: float, decimals: int = 3) -> str:
    """Return POSIX seconds as ISO 8601 UTC text 'YYYY-MM-DDThh:mm:ss[.fff]Z' (rounded to decimals)."""
    if not math.isfinite(seconds):
        raise ValueError("time is not finite")
    scale = 10 ** decimals
    ticks = round(seconds * scale)
    whole, frac = divmod(ticks, scale)
    dt = _EPOCH + timedelta(seconds=int(whole))
    out = dt.strftime("%Y-%m-%dT%H:%M:%S")
    if decimals > 0:
        out += f".{frac:0{decimals}d}"
    return out + "Z"


# ------------------------------------------------------------------------------------ TOML helpers

def _number(doc: TomlDoc, section: str, key: str, value, lo: float, hi: float) -> float:
    """Return a finite number within [lo, hi] or raise naming the key."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise doc.error(f"expected a number, got {type(value).__name__}", section, key)
    v = float(value)
    if not math.isfinite(v) or not lo <= v <= hi:
        raise doc.error(f"must be between {lo:g} and {hi:g}, got {value!r}", section, key)
    return v


def _text(doc: TomlDoc, section: str, key: str, value, width: int = TEXT_WIDTH) -> str:
    """Return a non-empty one-line printable ASCII string of at most `width` characters."""
    if not isinstance(value, str):
        raise doc.error(f"expected a string, got {type(value).__name__}", section, key)
    v = value.strip()
    if not v:
        raise doc.error("must not be empty", section, key)
    if len(v) > width:
        raise doc.error(f"at most {width} characters (IAGA-2002 header width), got {len(v)}", section, key)
    if not all(32 <= ord(c) < 127 and c != "|" for c in v):
        raise doc.error("use printable ASCII without '|' (IAGA-2002 headers are ASCII)", section, key)
    return v


def _table(doc: TomlDoc, name: str) -> dict:
    value = doc.data.get(name)
    if not isinstance(value, dict):
        raise doc.error(f"needs a [{name}] table", name)
    return value


def _refuse_unknown(doc: TomlDoc, section: str, table: dict, allowed: set[str]) -> None:
    for key in table:
        if key not in allowed:
            raise doc.error(f"unknown key (allowed: {', '.join(sorted(allowed))})", section, key)


def _matrix(doc: TomlDoc, section: str, key: str, value) -> np.ndarray:
    """Return the proper rotation written as rows [[...], [...], [...]] or raise naming the key."""
    ok = (isinstance(value, list) and len(value) == 3
          and all(isinstance(r, list) and len(r) == 3 for r in value)
          and all(isinstance(x, (int, float)) and not isinstance(x, bool) for r in value for x in r))
    if not ok:
        raise doc.error("expected 3 rows of 3 numbers: [[a, b, c], [d, e, f], [g, h, i]]", section, key)
    try:
        return checked_rotation(value)
    except ValueError as exc:
        raise doc.error(str(exc), section, key) from None


# ------------------------------------------------------------------------------------ mounting

def mounting_from_table(mount, path: str | Path, lines: dict[tuple[str, str], int] | None = None) -> np.ndarray:
    """Return the sensor -> platform rotation (3, 3) of a sensor file's [mounting] table (identity when absent).

    Accepts `rotation_deg = [rx, ry, rz]` (rotate about x, then y, then z) or `matrix = [[...], [...],
    [...]]` (rows of the rotation taking sensor-frame vectors to platform-frame vectors), not both.
    """
    doc = TomlDoc(str(path), {}, lines or {})
    if mount is None:
        return np.eye(3)
    if not isinstance(mount, dict):
        raise doc.error("[mounting] must be a table", "mounting")
    _refuse_unknown(doc, "mounting", mount, {"rotation_deg", "matrix"})
    if "rotation_deg" in mount and "matrix" in mount:
        raise doc.error("give rotation_deg or matrix, not both", "mounting", "matrix")
    if "matrix" in mount:
        return _matrix(doc, "mounting", "matrix", mount["matrix"])
    if "rotation_deg" in mount:
        value = mount["rotation_deg"]
        if not (isinstance(value, list) and len(value) == 3):
            raise doc.error("expected three angles in degrees [rx, ry, rz]", "mounting", "rotation_deg")
        angles = [_number(doc, "mounting", "rotation_deg", a, -360.0, 360.0) for a in value]
        return mounting_from_rotation_deg(angles)
    return np.eye(3)


def read_mounting(path: str | Path) -> np.ndarray:
    """Return the sensor -> platform rotation (3, 3) of a sensor TOML file's [mounting] table, errors with lines."""
    doc = TomlDoc.read(Path(path))
    return mounting_from_table(doc.data.get("mounting"), path, doc.lines)


# ------------------------------------------------------------------------------------ attitude

@dataclass(frozen=True)
class Attitude:
    """Platform -> NED attitude: fixed ('angles', 'matrix') or a time series ('file'), plus 1-sigma angles."""

    kind: str                                   # 'angles' | 'matrix' | 'file'
    sigma_deg: tuple[float, float, float]       # heading, pitch, roll 1-sigma, degrees
    matrix: np.ndarray | None = None            # (3, 3) for 'angles' and 'matrix'
    times: np.ndarray | None = None             # (K,) s, for 'file'
    matrices: np.ndarray | None = None          # (K, 3, 3), for 'file'
    clock: str = "recording"                    # 'file' times: the recording's t or POSIX UTC seconds
    source: str = ""                            # for reports: the angles or the file name

    def at(self, t: np.ndarray, utc: np.ndarray | None = None) -> np.ndarray:
        """Return platform -> NED matrices (N, 3, 3) at recording times t (s) or UTC (POSIX s); NaN off a file's span."""
        t = np.atleast_1d(np.asarray(t, float))
        if self.kind != "file":
            return np.broadcast_to(self.matrix, (t.size, 3, 3)).copy()
        if self.clock == "utc":
            if utc is None:
                raise ValueError("this attitude file is on the UTC clock: give the samples' UTC times")
            t = np.atleast_1d(np.asarray(utc, float))
        return slerp_attitude(self.times, self.matrices, t)


def read_attitude_csv(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """Return (t (K,) s, platform -> NED matrices (K, 3, 3)) of a CSV with t, heading_deg, pitch_deg, roll_deg."""
    path = Path(path)
    text = read_text(path)
    header: list[str] | None = None
    header_line = 0
    rows: list[tuple[float, float, float, float]] = []
    last_t, last_line = -math.inf, 0
    limits = {"heading_deg": (-360.0, 360.0), "pitch_deg": (-90.0, 90.0), "roll_deg": (-180.0, 180.0)}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        fields = [f.strip() for f in line.split(",")]
        if header is None:
            header, header_line = fields, number
            for name in header:
                if name not in ATTITUDE_COLUMNS:
                    raise InputError(f"unknown column (expected: {', '.join(ATTITUDE_COLUMNS)})", str(path),
                                     number, name)
            for name in ATTITUDE_COLUMNS:
                if header.count(name) != 1:
                    what = "appears twice" if header.count(name) else "required column missing"
                    raise InputError(what, str(path), number, name)
            continue
        if len(fields) != len(header):
            raise InputError(f"expected {len(header)} values, got {len(fields)}", str(path), number)
        values = {}
        for name, field in zip(header, fields):
            try:
                v = float(field)
            except ValueError:
                raise InputError(f"not a number: {field!r}", str(path), number, name) from None
            if not math.isfinite(v):
                raise InputError(f"not a finite number: {field!r}", str(path), number, name)
            lo, hi = limits.get(name, (-math.inf, math.inf))
            if not lo <= v <= hi:
                raise InputError(f"must be between {lo:g} and {hi:g}, got {field}", str(path), number, name)
            values[name] = v
        if values["t"] <= last_t:
            raise InputError(f"time must increase (line {last_line} has t = {last_t:g})", str(path), number, "t")
        last_t, last_line = values["t"], number
        rows.append(tuple(values[c] for c in ATTITUDE_COLUMNS))
    if header is None:
        raise InputError("empty: needs a header row t,heading_deg,pitch_deg,roll_deg and data", str(path))
    if len(rows) < 2:
        raise InputError("needs at least two attitude rows to interpolate between", str(path), header_line)
    a = np.array(rows)
    return a[:, 0], attitude_matrix(a[:, 1], a[:, 2], a[:, 3])


def _attitude(doc: TomlDoc, base: Path) -> Attitude:
    if "attitude" not in doc.data:
        raise doc.error("needs an [attitude] table: heading/pitch/roll, a matrix or a file", "attitude")
    table = _table(doc, "attitude")
    _refuse_unknown(doc, "attitude", table, _ATTITUDE_KEYS)
    sigma = tuple(_number(doc, "attitude", k, table[k], 0.0, 90.0) if k in table else 0.0 for k in _STD_KEYS)
    has_angles = [k for k in _ANGLE_KEYS if k in table]
    forms = [name for name, present in (("heading/pitch/roll", bool(has_angles)), ("matrix", "matrix" in table),
                                        ("file", "file" in table)) if present]
    if len(forms) != 1:
        what = "one of" if not forms else "only one of"
        raise doc.error(f"give {what}: heading_deg/pitch_deg/roll_deg, matrix, file (got {', '.join(forms) or 'none'})",
                        "attitude", "matrix" if "matrix" in table else "")
    if "file_clock" in table and "file" not in table:
        raise doc.error("file_clock applies only to an attitude file", "attitude", "file_clock")
    if has_angles:
        missing = [k for k in _ANGLE_KEYS if k not in table]
        if missing:
            raise doc.error("heading_deg, pitch_deg and roll_deg go together", "attitude", missing[0])
        h = _number(doc, "attitude", "heading_deg", table["heading_deg"], -360.0, 360.0)
        p = _number(doc, "attitude", "pitch_deg", table["pitch_deg"], -90.0, 90.0)
        r = _number(doc, "attitude", "roll_deg", table["roll_deg"], -180.0, 180.0)
        return Attitude("angles", sigma, matrix=attitude_matrix(h, p, r),
                        source=f"heading {h:g} deg, pitch {p:g} deg, roll {r:g} deg")
    if "matrix" in table:
        return Attitude("matrix", sigma, matrix=_matrix(doc, "attitude", "matrix", table["matrix"]),
                        source="platform -> NED matrix")
    name = table["file"]
    if not isinstance(name, str) or not name.strip():
        raise doc.error("expected a file name (relative to the site file)", "attitude", "file")
    clock = table.get("file_clock", "recording")
    if clock not in ATTITUDE_CLOCKS:
        raise doc.error(f"must be one of {', '.join(ATTITUDE_CLOCKS)}, got {clock!r}", "attitude", "file_clock")
    csv_path = base / name
    if not csv_path.is_file():
        raise doc.error(f"attitude file not found: {csv_path}", "attitude", "file")
    times, matrices = read_attitude_csv(csv_path)
    return Attitude("file", sigma, times=times, matrices=matrices, clock=clock, source=str(csv_path))


# ------------------------------------------------------------------------------------ the site file

@dataclass(frozen=True)
class Site:
    """One installation: where it is (geodetic, WGS-84), its IAGA code and the platform's attitude."""

    path: str
    name: str
    iaga_code: str
    latitude_deg: float        # geodetic, north positive
    longitude_deg: float       # east positive, -180..180 or 0..360 as written
    elevation_m: float         # above mean sea level
    attitude: Attitude
    institute: str = ""


def read_site_file(path: str | Path) -> Site:
    """Return the Site of a site TOML file, or raise InputError naming the file, line and key."""
    path = Path(path)
    doc = TomlDoc.read(path)
    for key in doc.data:
        if key not in ("version", "site", "attitude"):
            kind = "section" if isinstance(doc.data[key], dict) else "key"
            raise doc.error(f"unknown {kind} (allowed: version, [site], [attitude])", key if kind == "section" else "",
                            "" if kind == "section" else key)
    version = doc.data.get("version")
    if type(version) is not int or version != SITE_VERSION:
        raise doc.error(f"must be the integer {SITE_VERSION}, got {version!r}", "", "version")
    site = _table(doc, "site")
    _refuse_unknown(doc, "site", site, _SITE_KEYS)
    for key in ("name", "iaga_code", "latitude_deg", "longitude_deg", "elevation_m"):
        if key not in site:
            raise doc.error("required key missing", "site", key)
    code = site["iaga_code"]
    if not (isinstance(code, str) and re.fullmatch(r"[A-Za-z]{3}", code)):
        raise doc.error(f"must be 3 letters (the IAGA station code), got {code!r}", "site", "iaga_code")
    return Site(
        path=str(path),
        name=_text(doc, "site", "name", site["name"]),
        iaga_code=code.upper(),
        latitude_deg=_number(doc, "site", "latitude_deg", site["latitude_deg"], -90.0, 90.0),
        longitude_deg=_number(doc, "site", "longitude_deg", site["longitude_deg"], -180.0, 360.0),
        elevation_m=_number(doc, "site", "elevation_m", site["elevation_m"], *ELEVATION_RANGE_M),
        attitude=_attitude(doc, path.parent),
        institute=_text(doc, "site", "institute", site["institute"]) if "institute" in site else "",
    )
