"""A sensor installed at a site: the Earth's field given in North-East-Down, seen through a platform attitude
and a mounting rotation (the scenario's `[site]` table, docs/scenarios.md).

The simulator stands for independent hardware, so the small rotation math is written here again rather
than shared with fieldvane.estimator.geomagnetic; the conventions are the same (docs/geographic.md):

- mounting M takes sensor-frame vectors to platform-frame vectors, from rotation_deg [rx, ry, rz]:
  M = Rz(rz) Ry(ry) Rx(rx) (rotate about x, then y, then z);
- attitude A takes platform-frame vectors (x forward, y right, z down) to NED: A = Rz(heading)
  Ry(pitch) Rx(roll), heading clockwise from true north, pitch nose up, roll right side down;
- the field in the sensor frame is then B_sensor = (A M)^T B_ned.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import numpy as np

ANGLES = ("heading", "pitch", "roll")
MAX_FIELD_NT = 1e6


def _rot_x(a: np.ndarray) -> np.ndarray:
    c, s, o, z = np.cos(a), np.sin(a), np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([o, z, z], -1), np.stack([z, c, -s], -1), np.stack([z, s, c], -1)], -2)


def _rot_y(a: np.ndarray) -> np.ndarray:
    c, s, o, z = np.cos(a), np.sin(a), np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([c, z, s], -1), np.stack([z, o, z], -1), np.stack([-s, z, c], -1)], -2)


def _rot_z(a: np.ndarray) -> np.ndarray:
    c, s, o, z = np.cos(a), np.sin(a), np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([c, -s, z], -1), np.stack([s, c, z], -1), np.stack([z, z, o], -1)], -2)


def zyx_matrix(z_deg, y_deg, x_deg) -> np.ndarray:
    """Return Rz(z) Ry(y) Rx(x) (..., 3, 3) for angles in degrees (right-handed rotations)."""
    z, y, x = (np.radians(np.asarray(a, float)) for a in (z_deg, y_deg, x_deg))
    return _rot_z(z) @ _rot_y(y) @ _rot_x(x)


def ned_from_elements(declination_deg: float, inclination_deg: float, total_nT: float) -> np.ndarray:
    """Return the NED field (3,) in nT of declination D (east of north), inclination I (down) and intensity F."""
    d, i = math.radians(declination_deg), math.radians(inclination_deg)
    return total_nT * np.array([math.cos(i) * math.cos(d), math.cos(i) * math.sin(d), math.sin(i)])


def parse_start_utc(text: str) -> datetime:
    """Return the aware UTC datetime of ISO 8601 text such as 2026-12-02T00:00:00Z (ValueError otherwise)."""
    s = text.strip()
    if len(s) <= 10:
        raise ValueError(f"give a date and a time, e.g. 2026-12-02T00:00:00Z, got {text!r}")
    try:
        dt = datetime.fromisoformat(s[:-1] + "+00:00" if s[-1:] in ("Z", "z") else s)
    except ValueError:
        raise ValueError(f"not an ISO 8601 time: {text!r} (example: 2026-12-02T00:00:00Z)") from None
    if dt.tzinfo is None:
        raise ValueError(f"no time zone in {text!r}: add Z for UTC")
    if dt.utcoffset() != timedelta(0):
        raise ValueError(f"{text!r} is not UTC: write the time in UTC with a Z")
    return dt.astimezone(timezone.utc)


def iso_utc(dt: datetime) -> str:
    """Return an aware UTC datetime as 'YYYY-MM-DDThh:mm:ss[.ffffff]Z'."""
    text = dt.astimezone(timezone.utc).replace(tzinfo=None).isoformat()
    return text + "Z"


@dataclass(frozen=True)
class Motion:
    """One term of the platform's motion on one angle: a sine (amplitude, period, phase) plus a steady drift."""

    angle: str                      # 'heading', 'pitch' or 'roll'
    amplitude_deg: float = 0.0
    period_s: float = 1.0
    phase_deg: float = 0.0
    rate_deg_per_s: float = 0.0

    def offset_deg(self, t: np.ndarray) -> np.ndarray:
        """Return this term's contribution (N,) in degrees at times t (s from the run start)."""
        wave = self.amplitude_deg * np.sin(2.0 * np.pi * t / self.period_s + math.radians(self.phase_deg))
        return wave + self.rate_deg_per_s * t


@dataclass(frozen=True, eq=False)   # holds numpy arrays
class SiteField:
    """A still Earth field at a site (NED, nT) seen by a sensor mounted on a platform with a (moving) attitude."""

    field_ned_nT: np.ndarray            # (3,) X north, Y east, Z down
    mounting: np.ndarray                # (3, 3) sensor -> platform
    heading_deg: float
    pitch_deg: float
    roll_deg: float
    motions: tuple = ()
    start_utc: str | None = None        # ISO 8601 UTC: t = 0 of the run

    def attitude_angles_deg(self, t) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Return (heading, pitch, roll) (N,) in degrees at times t (s from the run start)."""
        t = np.atleast_1d(np.asarray(t, float))
        out = {"heading": np.full(t.shape, self.heading_deg), "pitch": np.full(t.shape, self.pitch_deg),
               "roll": np.full(t.shape, self.roll_deg)}
        for m in self.motions:
            out[m.angle] = out[m.angle] + m.offset_deg(t)
        return out["heading"], out["pitch"], out["roll"]

    def attitude(self, t) -> np.ndarray:
        """Return the platform -> NED matrices (N, 3, 3) at times t (s)."""
        h, p, r = self.attitude_angles_deg(t)
        return zyx_matrix(h, p, r)

    def field_sensor(self, t) -> tuple[np.ndarray, np.ndarray]:
        """Return the true field at times t (s): unit direction (N, 3) in the sensor frame and |B| (N,) nT."""
        t = np.atleast_1d(np.asarray(t, float))
        total = self.attitude(t) @ self.mounting                       # sensor -> NED
        b = np.einsum("nji,j->ni", total, self.field_ned_nT)            # (A M)^T B_ned
        mag = np.linalg.norm(b, axis=1)
        return b / mag[:, None], mag

    def start_datetime(self) -> datetime | None:
        """Return start_utc as an aware datetime (None when not given)."""
        return None if self.start_utc is None else parse_start_utc(self.start_utc)


_SITE_KEYS = ("start_utc", "field_ned_nT", "declination_deg", "inclination_deg", "total_nT",
              "mounting_rotation_deg", "attitude")
_ATTITUDE_KEYS = ("heading_deg", "pitch_deg", "roll_deg", "motion")
_MOTION_KEYS = ("angle", "amplitude_deg", "period_s", "phase_deg", "rate_deg_per_s")


def _vector3(tab, key: str, lo: float, hi: float) -> np.ndarray:
    """Return key as three finite numbers in [lo, hi] (the scenario table's error naming the key otherwise)."""
    v = tab.data[key]
    if (not isinstance(v, list) or len(v) != 3
            or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in v)):
        raise tab.error(key, f"expected three numbers [a, b, c], got {v!r}")
    arr = np.array(v, float)
    if not np.all(np.isfinite(arr)) or np.any(arr < lo) or np.any(arr > hi):
        raise tab.error(key, f"each value must be finite and within {lo:g}..{hi:g}, got {v!r}")
    return arr


def parse_site(tab) -> SiteField:
    """Return the SiteField of a scenario's [site] table (a scenario _Table; its errors name file, line, key)."""
    tab.check_keys(_SITE_KEYS)
    start = tab.text("start_utc", None)
    if start is not None:
        try:
            start = iso_utc(parse_start_utc(start))
        except ValueError as exc:
            raise tab.error("start_utc", str(exc)) from None
    elements = [k for k in ("declination_deg", "inclination_deg", "total_nT") if tab.has(k)]
    if tab.has("field_ned_nT") == bool(elements):
        raise tab.error("field_ned_nT", "give either field_ned_nT = [X, Y, Z] or declination_deg, "
                                        "inclination_deg and total_nT")
    if tab.has("field_ned_nT"):
        field = _vector3(tab, "field_ned_nT", -MAX_FIELD_NT, MAX_FIELD_NT)
        if not 0.0 < float(np.linalg.norm(field)) <= MAX_FIELD_NT:
            raise tab.error("field_ned_nT", "the field must be nonzero and at most 1 mT")
    else:
        missing = [k for k in ("declination_deg", "inclination_deg", "total_nT") if k not in elements]
        if missing:
            raise tab.error(missing[0], "declination_deg, inclination_deg and total_nT go together")
        field = ned_from_elements(tab.number("declination_deg", lo=-180.0, hi=360.0),
                                  tab.number("inclination_deg", lo=-90.0, hi=90.0),
                                  tab.number("total_nT", lo=0.0, hi=MAX_FIELD_NT, lo_open=True))
    mounting = np.eye(3)
    if tab.has("mounting_rotation_deg"):
        rx, ry, rz = _vector3(tab, "mounting_rotation_deg", -360.0, 360.0)
        mounting = zyx_matrix(rz, ry, rx)
    att = tab.table("attitude")
    if att is None:
        raise tab.error("attitude", "needs a [site.attitude] table with heading_deg, pitch_deg and roll_deg")
    att.check_keys(_ATTITUDE_KEYS)
    heading = att.number("heading_deg", lo=-360.0, hi=360.0)
    pitch = att.number("pitch_deg", lo=-90.0, hi=90.0)
    roll = att.number("roll_deg", lo=-180.0, hi=180.0)
    motions = []
    for m in att.tables("motion"):
        m.check_keys(_MOTION_KEYS)
        angle = m.text("angle", choices=ANGLES)
        amplitude = m.number("amplitude_deg", 0.0, lo=0.0, hi=45.0)
        rate = m.number("rate_deg_per_s", 0.0, lo=-10.0, hi=10.0)
        if amplitude == 0.0 and rate == 0.0:
            raise m.error("amplitude_deg", "a motion needs amplitude_deg (with period_s) or rate_deg_per_s")
        if amplitude > 0.0 and not m.has("period_s"):
            raise m.error("period_s", "a swaying motion (amplitude_deg) needs period_s")
        motions.append(Motion(angle, amplitude, m.number("period_s", 1.0, lo=0.0, hi=1e6, lo_open=True),
                              m.number("phase_deg", 0.0, lo=-360.0, hi=360.0), rate))
    return SiteField(field, mounting, heading, pitch, roll, tuple(motions), start)
