"""Absolute time and the geographic columns of the estimates, for replay, run, report and export.

- `utc` (POSIX seconds in records, ISO 8601 text in files): utc = start_utc + t, where t is the
  estimates' t column (the time of the field each estimate describes) and start_utc comes from
  --start-utc or the recording's `# start_utc:` line; for a capture without either, from the host
  clock of the chunk that completed each frame (as the live run had it).
- With a site file: X_nT, Y_nT, Z_nT, H_nT, F_nT, D_deg, I_deg, sigma_D_deg, sigma_I_deg, sigma_F_nT,
  the field at the site in North-East-Down turned from the sensor frame through the mounting (the
  calibration's `mounting_rotation`, from the sensor file) and the site's attitude at each
  estimate's time (docs/geographic.md), computed a block at a time.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fieldvane.estimator.geomagnetic import GEO_COLUMNS, checked_rotation, geographic_columns
from fieldvane.io.errors import InputError
from fieldvane.io.estimates_csv import live_block
from fieldvane.io.sitefile import Site, format_utc, parse_utc, read_site_file

# What the geographic output adds, in the order documented (files sort extra columns by name).
GEO_OUTPUT_COLUMNS = GEO_COLUMNS + ("sigma_F_nT",)
CAUTION = ("geographic values are only as good as the mounting, the attitude and the calibration: "
           "not a navigation or safety instrument by itself")


# ------------------------------------------------------------------------------------ inputs

def mounting_from_calibration(path: str | Path) -> np.ndarray | None:
    """Return the sensor -> platform rotation (3, 3) a calibration JSON carries (`mounting_rotation`), else None."""
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"cannot read the calibration: {exc}", str(path)) from None
    value = doc.get("mounting_rotation") if isinstance(doc, dict) else None
    if value is None:
        return None
    try:
        return checked_rotation(value)
    except ValueError as exc:
        raise InputError(str(exc), str(path), column="mounting_rotation", kind="key") from None


def start_utc_of(option: str | None, metadata: dict, path: str | None) -> tuple[float | None, str]:
    """Return (start_utc POSIX s or None, where it came from): --start-utc first, else the '# start_utc:' line."""
    if option is not None:
        return parse_utc(option, column="--start-utc"), "--start-utc"
    text = metadata.get("start_utc")
    if text is None:
        return None, ""
    try:
        return parse_utc(text), f"the '# start_utc:' line of {path}"
    except InputError as exc:
        raise InputError(f"{exc.reason} (in the '# start_utc:' metadata line)", path, column="start_utc",
                         kind="key") from None


def read_metadata(path: str | Path) -> dict[str, str]:
    """Return the '# key: value' lines before the header row of a CSV file (estimates or recording)."""
    meta: dict[str, str] = {}
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            for line in fh:
                s = line.strip()
                if not s:
                    continue
                if not s.startswith("#"):
                    break
                body = s[1:].strip()
                if ":" in body:
                    k, v = body.split(":", 1)
                    meta[k.strip()] = v.strip()
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", str(path)) from None
    return meta


def mounting_from_text(text: str, path: str) -> np.ndarray:
    """Return the rotation of an estimates file's '# mounting_rotation: [[...], [...], [...]]' line."""
    try:
        return checked_rotation(json.loads(text))
    except (ValueError, TypeError) as exc:
        raise InputError(f"not a rotation matrix: {exc}", path, column="mounting_rotation", kind="key") from None


def mounting_text(mounting: np.ndarray) -> str:
    """Return a rotation as the one-line JSON rows a '# mounting_rotation:' line holds."""
    return json.dumps([[round(float(x), 12) for x in row] for row in np.asarray(mounting)])


# ------------------------------------------------------------------------------------ the columns

@dataclass
class GeoOutput:
    """What a command adds to its estimates: `utc` (when the time is known) and the site's columns."""

    site: Site | None = None
    mounting: np.ndarray = field(default_factory=lambda: np.eye(3))
    start_utc: float | None = None        # POSIX s of t = 0
    start_source: str = ""
    host_clock: bool = False              # utc from host receive times (capture, live) when no start_utc
    mounting_source: str = "none (identity)"

    @property
    def enabled(self) -> bool:
        """Return True when anything is added (utc or the geographic columns)."""
        return self.site is not None or self.start_utc is not None or self.host_clock

    @property
    def inputs(self) -> list[str]:
        """Return the files this output reads (never to be overwritten): the site and its attitude file."""
        if self.site is None:
            return []
        out = [self.site.path]
        if self.site.attitude.kind == "file":
            out.append(self.site.attitude.source)
        return out

    def take_metadata(self, metadata: dict, path: str) -> None:
        """Take start_utc from a recording's '# start_utc:' line unless --start-utc gave it; check the clock."""
        if self.start_utc is None:
            self.start_utc, self.start_source = start_utc_of(None, metadata, path)
        self.check_clock()

    def check_clock(self) -> None:
        """Refuse a UTC-clock attitude file when no sample can have a UTC time."""
        if (self.site is not None and self.site.attitude.kind == "file" and self.site.attitude.clock == "utc"
                and self.start_utc is None and not self.host_clock):
            raise InputError("the site's attitude file is on the UTC clock (file_clock = \"utc\"), but the "
                             "samples have no UTC time: give --start-utc or a '# start_utc:' line",
                             self.site.path, column="attitude.file_clock", kind="key")

    def utc(self, t, host_utc=None) -> np.ndarray | None:
        """Return utc (N,) POSIX s of estimate times t (s): start_utc + t, else the host times, else None."""
        if self.start_utc is not None:
            return self.start_utc + np.asarray(t, float)
        if self.host_clock and host_utc is not None:
            return np.asarray(host_utc, float)
        return None

    def columns(self, t, u, b_nT, sigma_deg, sigma_b_nT=None, host_utc=None) -> dict[str, np.ndarray]:
        """Return the added columns (name -> (N,) array): utc when known, and the site's geographic columns."""
        t = np.asarray(t, float).reshape(-1)
        out: dict[str, np.ndarray] = {}
        utc = self.utc(t, host_utc)
        if utc is not None:
            out["utc"] = utc
        if self.site is not None:
            out.update(site_columns(self.site, self.mounting, t, utc, u, b_nT, sigma_deg, sigma_b_nT))
        return out

    def for_record(self, record, host_utc=None) -> dict[str, np.ndarray]:
        """Return the added columns of a tracker TrackRecord (arrays)."""
        return self.columns(record.t, record.u, record.b_nT, record.sigma_deg, record.sigma_b_nT, host_utc)

    def for_estimates(self, estimates, host_utc=None) -> dict[str, np.ndarray]:
        """Return the added columns of a list of Estimate objects (snapshot mode)."""
        if not estimates:
            return {}
        t = np.array([e.t for e in estimates], float)
        u = np.array([np.asarray(e.u, float) for e in estimates]).reshape(-1, 3)
        b = np.array([e.b_nT for e in estimates], float)
        s = np.array([e.sigma_deg for e in estimates], float)
        sb = np.array([e.extras.get("sigma_b_nT", math.nan) for e in estimates], float)
        return self.columns(t, u, b, s, sb, host_utc)

    def live_block(self, tracker, samples, host_utc=None):
        """Return a few live samples' estimates as a RowBlock with the added columns (`run`'s batch for the loggers):
        utc alone, from the host's receive times (N,) POSIX s, goes into the block's own float matrix; a site's
        columns are added to it."""
        if self.site is None and self.start_utc is None and self.host_clock:
            return live_block(tracker, samples, host_utc)
        return self.add_to_block(live_block(tracker, samples), host_utc)

    def add_to_block(self, block, host_utc=None):
        """Return an estimates RowBlock (the live loggers' batch) with the added columns (its own t, u, |B|, sigmas)."""
        if not self.enabled or not len(block):
            return block
        if self.site is None:               # utc only (the live default): no need of the other columns
            return block.with_columns(self.columns(block.column("t"), None, None, None, None, host_utc))
        col = block.column
        u = np.column_stack([col("ux"), col("uy"), col("uz")])
        sigma_b = col("sigma_b_nT") if "sigma_b_nT" in block.keys() else None
        return block.with_columns(self.columns(col("t"), u, col("b_nT"), col("sigma_deg"), sigma_b, host_utc))

    def metadata(self) -> dict[str, str]:
        """Return the estimates file's '# key: value' lines: start_utc, its source, the mounting and the site."""
        meta: dict[str, str] = {}
        if self.start_utc is not None:
            meta["start_utc"] = format_utc(self.start_utc, 6)
            meta["utc_source"] = self.start_source
        elif self.host_clock:
            meta["utc_source"] = "host clock (receive time of the chunk that completed each frame)"
        if self.site is not None:
            meta["site"] = f"{self.site.name} ({self.site.iaga_code}), {self.site.path}"
            meta["attitude"] = self.site.attitude.source
        if self.site is not None or not np.allclose(self.mounting, np.eye(3)):
            meta["mounting_rotation"] = mounting_text(self.mounting)
        return meta

    def describe(self) -> list[str]:
        """Return the lines a command prints about time and site (empty when nothing is added)."""
        lines = []
        if self.start_utc is not None:
            lines.append(f"utc = {format_utc(self.start_utc, 3)} + t (from {self.start_source})")
        elif self.host_clock:
            lines.append("utc from the host clock (receive time of the bytes that completed each frame)")
        if self.site is not None:
            lines.append(f"site {self.site.name} ({self.site.iaga_code}): attitude {self.site.attitude.source}; "
                         f"mounting {self.mounting_source}")
            lines.append(f"note: {CAUTION}")
        return lines


def site_columns(site: Site, mounting, t, utc, u, b_nT, sigma_deg, sigma_b_nT=None) -> dict[str, np.ndarray]:
    """Return GEO_OUTPUT_COLUMNS (name -> (N,)) at estimate times t (s) / utc (POSIX s, or None).

    The attitude comes from the site at each time (slerped from a file, NaN outside it); the direction
    covariance is the isotropic one of sigma_deg (the tracker's sqrt(trace P)) plus the attitude's
    1-sigma angles; F's sigma is sigma_b_nT (NaN when unknown).
    """
    t = np.asarray(t, float).reshape(-1)
    n = t.size
    att = site.attitude
    if att.kind == "file" and att.clock == "utc" and utc is None:
        attitude = np.full((n, 3, 3), np.nan)
    else:
        attitude = att.at(t, utc)
    sb = np.full(n, np.nan) if sigma_b_nT is None else np.asarray(sigma_b_nT, float).reshape(-1)
    u = np.asarray(u, float).reshape(-1, 3)
    with np.errstate(invalid="ignore", divide="ignore"):
        cols = geographic_columns(u, np.asarray(b_nT, float).reshape(-1), mounting, attitude,
                                  sigma_deg=np.asarray(sigma_deg, float).reshape(-1),
                                  attitude_sigma_deg=att.sigma_deg, sigma_b_nT=sb)
    return {k: np.asarray(cols[k], float) for k in GEO_OUTPUT_COLUMNS}


def setup(site_path: str | None, start_option: str | None = None, calibration: str | None = None, *,
          metadata: dict | None = None, source: str | None = None, host_clock: bool = False,
          mounting: np.ndarray | None = None, mounting_source: str = "") -> GeoOutput:
    """Return the GeoOutput of a command's --site / --start-utc options (InputError naming file and key).

    The mounting is `mounting` when given, else the calibration's `mounting_rotation`, else the identity
    (with a site, a command says so). metadata/source: the input's '# key: value' lines and its name.
    """
    site = read_site_file(site_path) if site_path is not None else None
    start, start_source = start_utc_of(start_option, metadata or {}, source)
    geo = GeoOutput(site=site, start_utc=start, start_source=start_source, host_clock=host_clock)
    if mounting is not None:
        geo.mounting, geo.mounting_source = np.asarray(mounting, float), mounting_source or "given"
    elif calibration is not None:
        m = mounting_from_calibration(calibration)
        if m is not None:
            geo.mounting, geo.mounting_source = m, f"from {calibration} (its sensor file's [mounting])"
        else:
            geo.mounting_source = (f"identity: {calibration} carries no mounting_rotation (calibrate with a "
                                   "sensor file that has a [mounting] table)")
    return geo


class HostClock:
    """The live loop's host receive times of the samples being estimated (the chunk that completed each)."""

    def __init__(self):
        self.loop = None

    def attach(self, loop) -> None:
        """Read the receive times from this LiveLoop from now on."""
        self.loop = loop

    def utc(self, count: int) -> np.ndarray:
        """Return (count,) POSIX s (host clock) of the samples of the current estimate call; now, if unknown."""
        ns = getattr(self.loop, "sample_host_times_ns", None) or []
        if len(ns) == count and all(ns):
            return np.array(ns, float) * 1e-9
        return np.full(count, time.time())


def take_host_times(host_ns: list, count: int) -> np.ndarray:
    """Return the first `count` host receive times (POSIX s) of a list filled by runs_from_capture, removing them."""
    out = np.array(host_ns[:count], float) * 1e-9
    del host_ns[:count]
    if out.size < count:                      # never expected: the decoder reports each sample's chunk
        out = np.concatenate([out, np.full(count - out.size, np.nan)])
    return out


# Samples whose flags say there is no usable estimate are left out of averages, exports and checks.
UNUSABLE_FLAGS = ("NO_ESTIMATE", "COASTING", "BAD_INPUT", "COVARIANCE_FAULT")


def unusable(flags) -> np.ndarray:
    """Return (N,) True where the flags hold any of UNUSABLE_FLAGS (no usable estimate)."""
    from fieldvane.estimator.flags import EstimateFlag

    mask = 0
    for name in UNUSABLE_FLAGS:
        mask |= int(EstimateFlag[name])
    return (np.asarray(flags, np.int64) & mask) != 0


def estimates_time_and_site(est: dict, path: str, site: Site | None, start_option: str | None,
                            mounting_option: np.ndarray | None = None, mounting_source: str = ""
                            ) -> tuple[np.ndarray | None, dict[str, np.ndarray] | None, GeoOutput, str]:
    """Return (utc (N,) or None, geographic columns or None, the GeoOutput, how the columns were had).

    utc: start_utc (--start-utc, else the file's '# start_utc:' line) + t, else the file's utc column.
    The geographic columns: the file's own when it has them (written by replay or run with a site),
    else computed here with `site` from ux..uz, b_nT, sigma_deg (and sigma_b_nT), with the mounting
    of mounting_option, else of the file's '# mounting_rotation:' line, else the identity.
    """
    meta = read_metadata(path)
    start, start_source = start_utc_of(start_option, meta, path)
    geo = GeoOutput(site=site, start_utc=start, start_source=start_source)
    if mounting_option is not None:
        geo.mounting, geo.mounting_source = np.asarray(mounting_option, float), mounting_source
    elif "mounting_rotation" in meta:
        geo.mounting = mounting_from_text(meta["mounting_rotation"], path)
        geo.mounting_source = f"the '# mounting_rotation:' line of {path}"
    utc = None
    if start is not None:
        utc = start + est["t"]
    elif "utc" in est:
        utc = est["utc"]
    if all(k in est for k in GEO_COLUMNS):
        cols = {k: est[k] for k in GEO_OUTPUT_COLUMNS if k in est}
        cols.setdefault("sigma_F_nT", est.get("sigma_b_nT", np.full(est["t"].size, np.nan)))
        return utc, cols, geo, "the estimates' own geographic columns"
    if site is None:
        return utc, None, geo, ""
    geo.check_clock()
    u = np.column_stack([est["ux"], est["uy"], est["uz"]])
    cols = site_columns(site, geo.mounting, est["t"], utc, u, est["b_nT"], est["sigma_deg"],
                        est.get("sigma_b_nT"))
    return utc, cols, geo, f"computed from ux, uy, uz with the mounting {geo.mounting_source}"
