"""IAGA-2002 text files of geomagnetic XYZF data: one-second means and Gaussian-filtered one-minute values.

Sources (read for this module; the wording and layout below are our own):
- The IAGA-2002 data exchange format as described in the INTERMAGNET Technical Reference Manual,
  appendix "IAGA2002 INTERMAGNET Exchange Format" (format adopted August 2001, revised December
  2001, July 2003, August 2011; the same text is kept by NOAA NCEI and WDC Kyoto): 12 header
  records, optional comment records, one data header record, data records, every record 70
  characters. Header and comment records: space in column 1, label from column 2, description from
  column 25, '|' in column 70; comment records have '#' in column 2. Data records: DATE (YYYY-MM-DD),
  TIME (hh:mm:ss.sss), DOY, then 4(1X,F9.2); 99999.00 marks a missing value, 88888.00 an element
  that is not recorded. Incomplete days carry '#Start Time hh:mm:ss' and '#Duration-in-seconds'
  comments. File names iagyyyymmdd[hhMMss]tint.int in lower case.
- One-minute values: IAGA Resolution 12 (1979) asks for minute values centred on the minute; the
  INTERMAGNET Technical Reference Manual (section "Data Sampling and Filtering" of one-minute
  observatories and appendix "Filter coefficients to produce one minute values") gives the Gaussian
  filter for one-second data: 91 coefficients from 45 s before to 45 s after the minute (t0 =
  0.0251958 ... t45 = 0.000459), which a Gaussian of standard deviation 15.90 s reproduces to the
  table's printed digits (checked in tests/test_iaga2002.py).
- Missing data: the same manual ("Rule for Missing 1-minute Values") allows a filtered value when
  90 % or more of the values, or of the filter's weight, are available; otherwise it is missing.
  We use 90 % of the weight and renormalize the weights over the values present.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path
from typing import Iterable

import numpy as np

from fieldvane.io.errors import InputError
from fieldvane.io.outputs import atomic_files, check_output

RECORD_WIDTH = 70
MISSING = 99999.0
NOT_RECORDED = 88888.0
ELEMENTS = "XYZF"
GAUSS_SIGMA_S = 15.90          # INTERMAGNET one-second -> one-minute Gaussian, standard deviation
GAUSS_HALF_WIDTH_S = 45        # coefficients from -45 s to +45 s around the minute
MIN_WEIGHT_FRACTION = 0.9      # INTERMAGNET rule for missing values
DATA_TYPES = ("Provisional", "Definitive", "Quasi-definitive", "Variation")
_NAME_TYPE = {"Provisional": "p", "Definitive": "d", "Quasi-definitive": "q", "Variation": "v"}
_EPOCH_DAY = date(1970, 1, 1)


# ------------------------------------------------------------------------------------ averaging

def second_means(utc, values, min_samples: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Return (seconds (M,) int POSIX s, means (M, K)) of samples (N,) x (N, K) in [s - 0.5, s + 0.5).

    The grid runs without gaps from the first to the last second holding a sample; a second with
    fewer than min_samples finite values of a column is NaN there. Non-finite samples are ignored.
    """
    t = np.asarray(utc, float).reshape(-1)
    v = np.asarray(values, float).reshape(t.size, -1)
    ok_t = np.isfinite(t)
    if not np.any(ok_t):
        return np.zeros(0, np.int64), np.zeros((0, v.shape[1]))
    bins = np.floor(t[ok_t] + 0.5).astype(np.int64)
    first, last = int(bins.min()), int(bins.max())
    idx = bins - first
    size = last - first + 1
    out = np.full((size, v.shape[1]), np.nan)
    for k in range(v.shape[1]):
        col = v[ok_t, k]
        good = np.isfinite(col)
        count = np.bincount(idx[good], minlength=size)
        total = np.bincount(idx[good], weights=col[good], minlength=size)
        keep = count >= max(min_samples, 1)
        out[keep, k] = total[keep] / count[keep]
    return np.arange(first, last + 1, dtype=np.int64), out


def gaussian_minute_weights(sigma_s: float = GAUSS_SIGMA_S, half_width_s: int = GAUSS_HALF_WIDTH_S) -> np.ndarray:
    """Return the normalized Gaussian weights (2 * half_width + 1,) for one-second values at -half..+half s."""
    k = np.arange(-half_width_s, half_width_s + 1, dtype=float)
    w = np.exp(-0.5 * (k / sigma_s) ** 2)
    return w / w.sum()


def minute_values(seconds, second_values, weights: np.ndarray | None = None,
                  min_fraction: float = MIN_WEIGHT_FRACTION) -> tuple[np.ndarray, np.ndarray]:
    """Return (minutes (L,) int POSIX s, values (L, K)) filtered from one-second values, centred on each minute.

    seconds: (M,) int POSIX s (any order-preserving subset of a one-second grid); second_values:
    (M, K), NaN where missing. Minutes run over every whole minute within [seconds[0], seconds[-1]];
    a minute whose available filter weight is below min_fraction is NaN.
    """
    w = gaussian_minute_weights() if weights is None else np.asarray(weights, float)
    half = (w.size - 1) // 2
    s = np.asarray(seconds, np.int64).reshape(-1)
    v = np.asarray(second_values, float).reshape(s.size, -1)
    if s.size == 0:
        return np.zeros(0, np.int64), np.zeros((0, v.shape[1]))
    if np.any(np.diff(s) <= 0):
        raise ValueError("seconds must increase")
    s0, s1 = int(s[0]), int(s[-1])
    dense = np.full((s1 - s0 + 1 + 2 * half, v.shape[1]), np.nan)
    dense[s - s0 + half] = v
    first_minute = -(-s0 // 60) * 60
    minutes = np.arange(first_minute, s1 + 1, 60, dtype=np.int64)
    out = np.full((minutes.size, v.shape[1]), np.nan)
    if minutes.size == 0:
        return minutes, out
    start = minutes - s0                       # window [m - half, m + half] begins here in `dense`
    windows = np.lib.stride_tricks.sliding_window_view(dense, w.size, axis=0)[start]   # (L, K, taps)
    present = np.isfinite(windows)
    weight = np.einsum("lkt,t->lk", present, w)
    total = np.einsum("lkt,t->lk", np.where(present, windows, 0.0), w)
    keep = weight >= min_fraction * w.sum() - 1e-12
    out[keep] = total[keep] / weight[keep]
    return minutes, out


# ------------------------------------------------------------------------------------ text layout

@dataclass(frozen=True)
class IagaHeader:
    """The file header records of an IAGA-2002 file (XYZF data)."""

    source: str                        # institute responsible for the data
    station: str                       # full station name
    code: str                          # IAGA 3-letter code
    latitude_deg: float                # geodetic, north positive
    longitude_deg: float               # east positive
    elevation_m: float                 # above mean sea level
    digital_sampling_s: float          # the sensor's sampling interval, s
    data_type: str = "Provisional"
    sensor_orientation: str = "XYZF"
    comments: tuple[str, ...] = field(default_factory=tuple)


def header_record(label: str, description: str) -> str:
    """Return one 70-character header record: label from column 2, description from column 25, '|' in 70."""
    if len(label) > 23 or len(description) > 45:
        raise ValueError("header field too long (label 23, description 45 characters at most): "
                         f"{label!r} {description!r}")
    if not all(32 <= ord(c) < 127 and c != "|" for c in label + description):
        raise ValueError(f"header fields are printable ASCII without '|': {description!r}")
    return (" " + label.ljust(23) + description.ljust(45) + "|")


def comment_records(text: str) -> list[str]:
    """Return 70-character comment records (' #' in columns 1-2, '|' in 70) holding text, wrapped on words."""
    out, line = [], ""
    for word in text.split():
        while len(word) > 66:
            if line:
                out.append(line)
                line = ""
            out.append(word[:66])
            word = word[66:]
        if line and len(line) + 1 + len(word) > 66:
            out.append(line)
            line = word
        else:
            line = f"{line} {word}" if line else word
    if line or not out:
        out.append(line)
    return [(" # " + part).ljust(RECORD_WIDTH - 1) + "|" for part in out]


def _raw_comment(text: str) -> str:
    """Return a comment record written exactly as text after '#' (for '#Start Time hh:mm:ss')."""
    return (" #" + text).ljust(RECORD_WIDTH - 1) + "|"


def data_header_record(code: str) -> str:
    """Return the data header record: DATE, TIME, DOY and the four element columns CODE+X, Y, Z, F."""
    text = "DATE       TIME         DOY     " + "".join(f"{code}{e}".ljust(10) for e in ELEMENTS)
    return text[:RECORD_WIDTH - 1].ljust(RECORD_WIDTH - 1) + "|"


def _value_field(v: float | None) -> str:
    """Return one ' F9.2' value field; None means not recorded, NaN missing."""
    if v is None:
        return f" {NOT_RECORDED:9.2f}"
    if not math.isfinite(v):
        return f" {MISSING:9.2f}"
    if abs(v) >= NOT_RECORDED:
        raise ValueError(f"{v:.2f} nT cannot be written: values from 88888 up are reserved for missing data")
    return f" {v:9.2f}"


def data_record(seconds: int, values: Iterable[float | None]) -> str:
    """Return one 70-character data record for POSIX second `seconds` and four element values (nT)."""
    days, sod = divmod(int(seconds), 86400)
    day = _EPOCH_DAY + timedelta(days=days)
    hh, rem = divmod(sod, 3600)
    mm, ss = divmod(rem, 60)
    doy = day.timetuple().tm_yday
    vals = list(values)
    if len(vals) != 4:
        raise ValueError("a data record holds exactly four elements")
    return f"{day.isoformat()} {hh:02d}:{mm:02d}:{ss:02d}.000 {doy:03d}   " + "".join(_value_field(v) for v in vals)


def interval_type(interval_s: int) -> str:
    """Return the 'Data Interval Type' description for one-second or one-minute values."""
    if interval_s == 1:
        return "Average 1-second (-0.5 s to +0.5 s)"
    if interval_s == 60:
        return "Filtered 1-minute (00:15-01:45)"
    raise ValueError("interval must be 1 or 60 seconds")


def format_file(header: IagaHeader, interval_s: int, times, values, f_recorded: bool = True,
                day_start: int | None = None) -> str:
    """Return the text of one IAGA-2002 file (records joined by newlines) for XYZF values (M, 4), nT.

    times: (M,) int POSIX s on the interval's grid, increasing, one UTC day; NaN values are written as
    missing (99999.00), and F as not recorded (88888.00) when f_recorded is False. A file that does
    not cover its whole UTC day gets the '#Start Time' and '#Duration-in-seconds' comments.
    """
    if header.data_type not in DATA_TYPES:
        raise ValueError(f"data type must be one of {DATA_TYPES}")
    t = np.asarray(times, np.int64).reshape(-1)
    v = np.asarray(values, float).reshape(t.size, 4)
    if t.size == 0:
        raise ValueError("no data records")
    day0 = int(t[0]) // 86400 * 86400 if day_start is None else int(day_start)
    if int(t[-1]) >= day0 + 86400 or int(t[0]) < day0:
        raise ValueError("one IAGA-2002 file holds one UTC day")
    lines = [
        header_record("Format", "IAGA-2002"),
        header_record("Source of Data", header.source),
        header_record("Station Name", header.station),
        header_record("IAGA Code", header.code.upper()),
        header_record("Geodetic Latitude", f"{header.latitude_deg:.3f}"),
        header_record("Geodetic Longitude", f"{header.longitude_deg:.3f}"),
        header_record("Elevation", f"{header.elevation_m:.0f}"),
        header_record("Reported", ELEMENTS),
        header_record("Sensor Orientation", header.sensor_orientation),
        header_record("Digital Sampling", f"{header.digital_sampling_s:g} seconds"),
        header_record("Data Interval Type", interval_type(interval_s)),
        header_record("Data Type", header.data_type),
    ]
    full_day = int(t[0]) == day0 and int(t[-1]) == day0 + 86400 - interval_s and t.size == 86400 // interval_s
    if not full_day:
        sod = int(t[0]) - day0
        lines.append(_raw_comment(f"Start Time {sod // 3600:02d}:{sod % 3600 // 60:02d}:{sod % 60:02d}"))
        lines.append(_raw_comment(f"Duration-in-seconds {int(t[-1]) - int(t[0]) + interval_s}"))
    for text in header.comments:
        lines.extend(comment_records(text))
    lines.append(data_header_record(header.code.upper()))
    for ti, row in zip(t.tolist(), v.tolist()):
        lines.append(data_record(ti, (row[0], row[1], row[2], row[3] if f_recorded else None)))
    return "\n".join(lines) + "\n"


def file_name(code: str, start_s: int, interval_s: int, data_type: str, part_day: bool) -> str:
    """Return the recommended IAGA-2002 file name, e.g. tpn20261202pmin.min or tpn20261202132000psec.sec."""
    days, sod = divmod(int(start_s), 86400)
    day = _EPOCH_DAY + timedelta(days=days)
    ext = {1: "sec", 60: "min"}[interval_s]
    when = day.strftime("%Y%m%d")
    if part_day:
        when += f"{sod // 3600:02d}{sod % 3600 // 60:02d}" + (f"{sod % 60:02d}" if interval_s == 1 else "")
    return f"{code.lower()}{when}{_NAME_TYPE[data_type]}{ext}.{ext}"


def split_days(times, values) -> list[tuple[int, np.ndarray, np.ndarray]]:
    """Return [(day start POSIX s, times, values)] splitting increasing POSIX times at UTC midnight."""
    t = np.asarray(times, np.int64).reshape(-1)
    v = np.asarray(values, float).reshape(t.size, -1)
    days = t // 86400
    out = []
    for d in np.unique(days):
        sel = days == d
        out.append((int(d) * 86400, t[sel], v[sel]))
    return out


def day_files(header: IagaHeader, interval_s: int, times, values, f_recorded: bool = True) -> list[tuple[str, str]]:
    """Return [(file name, text)]: one IAGA-2002 file per UTC day of the XYZF values (M, 4)."""
    out = []
    for day0, t, v in split_days(times, values):
        text = format_file(header, interval_s, t, v, f_recorded, day_start=day0)
        part = not (int(t[0]) == day0 and t.size == 86400 // interval_s)
        out.append((file_name(header.code, int(t[0]), interval_s, header.data_type, part), text))
    return out


def write_files(folder: str | Path, files: list[tuple[str, str]], *, force: bool = False,
                inputs: Iterable[str | Path | None] = (), option: str = "--output") -> list[Path]:
    """Write [(name, text)] into folder (all or none), after the overwrite rule; return the paths."""
    paths = [check_output(Path(folder) / name, inputs=inputs, force=force, option=option) for name, _ in files]
    if len(set(paths)) != len(paths):
        raise InputError("two output files would have the same name", str(folder), column=option)
    with atomic_files(paths) as tmps:
        for tmp, (_, text) in zip(tmps, files):
            with open(tmp, "w", encoding="ascii", newline="\n") as fh:
                fh.write(text)
    return paths


def xyzf_series(utc, xyzf, interval_s: int) -> tuple[np.ndarray, np.ndarray]:
    """Return (times int POSIX s, values (M, 4) nT) on the interval's grid from samples at utc (N,) of XYZF (N, 4).

    One-second values are sample means centred on the second; one-minute values are the INTERMAGNET
    Gaussian filter of those one-second values, centred on the minute.
    """
    seconds, means = second_means(utc, xyzf)
    if interval_s == 1:
        return seconds, means
    if interval_s == 60:
        return minute_values(seconds, means)
    raise ValueError("interval must be 1 or 60 seconds")


def standard_comments(interval_s: int) -> tuple[str, ...]:
    """Return the comment texts every file carries: how the values were made and how to get D, H, I."""
    made = ("One-second values are means of the samples from 0.5 s before to 0.5 s after the second."
            if interval_s == 1 else
            "One-minute values: Gaussian filter (sigma 15.90 s, 91 one-second values from 45 s before "
            "to 45 s after the minute, as INTERMAGNET recommends) of one-second sample means; missing "
            "when less than 90 % of the filter weight has data.")
    return (made,
            "X, Y, Z: north, east, down at the site (geodetic), from a vector sensor turned to that "
            "frame with its mounting and the platform attitude. F: magnitude from the Larmor frequencies.",
            "H = sqrt(X*X + Y*Y), D = atan2(Y, X), I = atan2(Z, H).",
            "Written by fieldvane. Not a navigation or safety instrument by itself.")


def header_from_site(site, digital_sampling_s: float, interval_s: int, source: str | None = None,
                     data_type: str = "Provisional", comments: Iterable[str] = ()) -> IagaHeader:
    """Return the IagaHeader of a fieldvane.io.sitefile.Site (source: the site's institute unless given)."""
    src = source if source is not None else (site.institute or "not given")
    try:
        header_record("Source of Data", src)
    except ValueError as exc:
        raise InputError(str(exc), column="--source") from None
    return IagaHeader(source=src, station=site.name, code=site.iaga_code, latitude_deg=site.latitude_deg,
                      longitude_deg=site.longitude_deg, elevation_m=site.elevation_m,
                      digital_sampling_s=digital_sampling_s, data_type=data_type,
                      comments=standard_comments(interval_s) + tuple(comments))
