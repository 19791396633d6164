"""Scenario files for the simulated sensor (docs/scenarios.md, version 1) and the simulation itself.

A scenario is a TOML file: the sensor (`[sensor]`, see sensor.py), the run (`[run]`: sample rate,
duration, seed), optionally the lock-in's output filter (`[lockin]`: RC stages and time constant;
without it every output sample is the steady-state response plus independent white noise), the
field's trajectory in the sensor frame (`[direction]` and `[magnitude]` with timed segments, or a
calibration `[scan]` over the sphere), and events applied on top (`[[events]]`: noise bursts, gain
drift, light fades, dropouts, missing probes, outliers, status bits).

`load_scenario(path)` validates everything on the way in: any problem raises ScenarioError (a
ValueError) naming the file, the line where it can be found, and the key path (e.g.
`events[1].factor`). `simulate(scenario)` returns a SimulatedRun: time, modulation frequencies,
lock-in outputs, ground truth and, for scans, the applied field.
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Mapping, Union

import numpy as np
from scipy.signal import lfilter

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

from .frames import STATUS_BITS, TRUTH_COLUMNS
from .lockin import OutputFilter, default_oversample
from .response import add_noise, response
from .sensor import SensorConfig
from .site import SiteField, parse_site

SCENARIO_VERSION = 1
KINDS = ("track", "scan")
DEFAULT_SAMPLE_RATE_HZ = 200.0
MAX_SAMPLES = 20_000_000            # about 28 h at 200 Hz: guards memory, not physics
MAX_FIELD_NT = 1e6                  # 1 mT
MAX_INTERNAL_SAMPLES = 2_000_000_000  # lock-in filter work (internal rate x duration): guards run time
_REQUIRED = object()


# ----- errors ---------------------------------------------------------------------------------

class ScenarioError(ValueError):
    """A scenario problem: `reason`, the `key` path (e.g. 'run.duration_s'), `source` file, `line`."""

    def __init__(self, reason: str, key: str | None = None, source: str | None = None,
                 line: int | None = None):
        self.reason, self.key, self.source, self.line = reason, key, source, line
        where = ""
        if source:
            where = f"{source}:{line}: " if line else f"{source}: "
        super().__init__(where + (f"{key}: " if key else "") + reason)


def locate_key(text: str, key: str) -> int | None:
    """Return the 1-based line of a TOML key path like 'events[1].factor' (best effort, else None).

    When the key itself is absent (a required key left out), the line of the closest enclosing
    table or array-of-tables header is returned instead.
    """
    best, best_len = None, -1
    table = ""
    counts: dict[str, int] = {}
    for lineno, raw in enumerate(text.splitlines(), 1):
        s = raw.strip()
        if not s or s.startswith("#"):
            continue
        m = re.match(r"^\[\[\s*([^\]]+?)\s*\]\]", s)
        if m:
            name = _plain_key(m.group(1))
            idx = counts.get(name, 0)
            counts[name] = idx + 1
            table = cand = f"{name}[{idx}]"
        else:
            m = re.match(r"^\[\s*([^\]]+?)\s*\]", s)
            if m:
                table = cand = _plain_key(m.group(1))
            else:
                m = re.match(r'^([A-Za-z0-9_\-."\' ]+?)\s*=', s)
                if not m:
                    continue
                cand = (table + "." if table else "") + _plain_key(m.group(1))
        if cand == key:
            return lineno
        if (key.startswith(cand + ".") or key.startswith(cand + "[")) and len(cand) > best_len:
            best, best_len = lineno, len(cand)
    return best


def _plain_key(k: str) -> str:
    return ".".join(part.strip().strip('"').strip("'") for part in k.split("."))


@dataclass
class _Context:
    source: str
    text: str | None

    def error(self, key: str | None, reason: str) -> ScenarioError:
        """Return a ScenarioError for key, with the line where the key sits in the text."""
        line = locate_key(self.text, key) if (self.text and key) else None
        return ScenarioError(reason, key, self.source, line)


class _Table:
    """Typed, range-checked access to one TOML table; every error names its key path."""

    def __init__(self, data: Any, path: str, ctx: _Context):
        if not isinstance(data, Mapping):
            raise ctx.error(path, f"expected a table, got {_describe(data)}")
        self.data, self.path, self.ctx = data, path, ctx

    def key(self, k: str) -> str:
        """Return the full key path of k inside this table."""
        return f"{self.path}.{k}" if self.path else k

    def error(self, k: str | None, reason: str) -> ScenarioError:
        """Return a ScenarioError for key k of this table (the table itself when k is None)."""
        return self.ctx.error(self.key(k) if k else self.path, reason)

    def has(self, k: str) -> bool:
        """Return True when the table holds key k."""
        return k in self.data

    def check_keys(self, allowed: tuple[str, ...]) -> None:
        """Raise ScenarioError on the first key not in allowed."""
        for k in self.data:
            if k not in allowed:
                raise self.error(k, f"unknown key; known keys here: {', '.join(allowed)}")

    def _get(self, k: str, default: Any) -> Any:
        if k in self.data:
            return self.data[k]
        if default is _REQUIRED:
            raise self.error(k, "required key is missing")
        return default

    def number(self, k: str, default: Any = _REQUIRED, lo: float | None = None,
               hi: float | None = None, lo_open: bool = False) -> Any:
        """Return key k as a finite float in range (or default when absent and not required)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.error(k, f"expected a number, got {_describe(v)}")
        v = float(v)
        if not math.isfinite(v):
            raise self.error(k, f"must be finite, got {v}")
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise self.error(k, f"must be {'>' if lo_open else '>='} {lo:g}, got {v:g}")
        if hi is not None and v > hi:
            raise self.error(k, f"must be <= {hi:g}, got {v:g}")
        return v

    def integer(self, k: str, default: Any = _REQUIRED, lo: int | None = None,
                hi: int | None = None) -> Any:
        """Return key k as an int in range (or default)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.error(k, f"expected a whole number, got {_describe(v)}")
        if lo is not None and v < lo:
            raise self.error(k, f"must be >= {lo}, got {v}")
        if hi is not None and v > hi:
            raise self.error(k, f"must be <= {hi}, got {v}")
        return int(v)

    def boolean(self, k: str, default: Any = _REQUIRED) -> bool:
        """Return key k as a bool (or default)."""
        v = self._get(k, default)
        if not isinstance(v, bool):
            raise self.error(k, f"expected true or false, got {_describe(v)}")
        return v

    def text(self, k: str, default: Any = _REQUIRED, choices: tuple[str, ...] | None = None) -> Any:
        """Return key k as a string, one of choices when given (or default)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if not isinstance(v, str):
            raise self.error(k, f"expected a string, got {_describe(v)}")
        if choices is not None and v not in choices:
            raise self.error(k, f"must be one of {', '.join(repr(c) for c in choices)}, got {v!r}")
        return v

    def unit_vector(self, k: str, default: Any = _REQUIRED) -> Any:
        """Return key k as a unit 3-vector (normalized; sensor frame) (or default)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if (not isinstance(v, list) or len(v) != 3
                or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in v)):
            raise self.error(k, f"expected a 3-vector [x, y, z] in the sensor frame, got {_describe(v)}")
        arr = np.array(v, dtype=float)
        n = float(np.linalg.norm(arr))
        if not math.isfinite(n) or n < 1e-9:
            raise self.error(k, f"must be a finite, nonzero vector, got {v}")
        return arr / n

    def names(self, k: str, allowed: tuple[str, ...], default: Any = _REQUIRED) -> Any:
        """Return key k as a tuple of distinct names from allowed (or default)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if not isinstance(v, list) or not v or not all(isinstance(x, str) for x in v):
            raise self.error(k, f"expected a non-empty list of names, got {_describe(v)}")
        for x in v:
            if x not in allowed:
                raise self.error(k, f"unknown name {x!r}; expected some of {', '.join(allowed)}")
        return tuple(dict.fromkeys(v))

    def numbers(self, k: str, lo: float, hi: float, default: Any = _REQUIRED) -> Any:
        """Return key k as a tuple of floats in (lo, hi] (or default)."""
        v = self._get(k, default)
        if v is default and k not in self.data:
            return v
        if (not isinstance(v, list) or not v
                or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in v)):
            raise self.error(k, f"expected a non-empty list of numbers, got {_describe(v)}")
        for i, x in enumerate(v):
            if not (math.isfinite(x) and lo < x <= hi):
                raise self.ctx.error(f"{self.key(k)}[{i}]", f"must be in ({lo:g}, {hi:g}], got {x}")
        return tuple(float(x) for x in v)

    def table(self, k: str) -> "_Table | None":
        """Return sub-table k, or None when absent."""
        if k not in self.data:
            return None
        return _Table(self.data[k], self.key(k), self.ctx)

    def tables(self, k: str) -> list["_Table"]:
        """Return the array of tables k ([[k]]), empty when absent."""
        v = self.data.get(k, [])
        if not isinstance(v, list):
            raise self.error(k, f"expected an array of tables ([[{self.key(k)}]]), got {_describe(v)}")
        return [_Table(item, f"{self.key(k)}[{i}]", self.ctx) for i, item in enumerate(v)]


def _describe(v: Any) -> str:
    if isinstance(v, Mapping):
        return "a table"
    if isinstance(v, list):
        return f"a list of {len(v)}" if len(v) != 1 else "a list of 1"
    return f"{type(v).__name__} {v!r}"


# ----- rotations --------------------------------------------------------------------------

def rotate_vectors(v: np.ndarray, axis: np.ndarray, angle_rad) -> np.ndarray:
    """Return v (3,) or (N, 3) rotated about the unit axis by angle_rad (scalar or (N,)), right-handed."""
    v = np.asarray(v, float)
    a = np.asarray(angle_rad, float)[..., None]
    cross = np.cross(axis, v)
    dot = (v @ axis)[..., None] if v.ndim > 1 else v @ axis
    return v * np.cos(a) + cross * np.sin(a) + axis * dot * (1.0 - np.cos(a))


# ----- trajectory segments --------------------------------------------------------------

@dataclass(frozen=True)
class Hold:
    """Keep the direction (or magnitude) for duration_s seconds."""

    duration_s: float

    def direction(self, v: np.ndarray, tau: np.ndarray) -> np.ndarray:
        """Return the unit direction (N, 3), sensor frame, tau seconds into the segment."""
        return np.broadcast_to(v, (tau.shape[0], 3)).copy()

    def magnitude(self, b0: float, tau: np.ndarray) -> np.ndarray:
        """Return |B| (N,) in nT, tau seconds into the segment."""
        return np.full(tau.shape[0], b0)


@dataclass(frozen=True, eq=False)   # holds numpy arrays: compare fields explicitly
class Rotate:
    """Turn the field direction about `axis` (unit, sensor frame) at rate_deg_per_s."""

    axis: np.ndarray
    rate_deg_per_s: float
    duration_s: float

    def direction(self, v: np.ndarray, tau: np.ndarray) -> np.ndarray:
        """Return the unit direction (N, 3), sensor frame, tau seconds into the segment."""
        return rotate_vectors(v, self.axis, np.radians(self.rate_deg_per_s * tau))


@dataclass(frozen=True, eq=False)   # holds numpy arrays: compare fields explicitly
class Turntable:
    """Dwell, then turn by step_deg about `axis` (over move_s; 0 = at once), `steps` times."""

    axis: np.ndarray
    step_deg: float
    dwell_s: float
    move_s: float
    steps: int

    @property
    def duration_s(self) -> float:
        """Return the segment's length in seconds: steps x (dwell + move)."""
        return self.steps * (self.dwell_s + self.move_s)

    def angle_deg(self, tau: np.ndarray) -> np.ndarray:
        """Return the turned angle (deg) tau seconds into the segment."""
        cycle = self.dwell_s + self.move_s
        n = np.minimum(np.floor(tau / cycle), self.steps)
        phase = tau - n * cycle
        frac = np.zeros_like(tau) if self.move_s == 0 else np.clip((phase - self.dwell_s) / self.move_s, 0, 1)
        frac = np.where(n >= self.steps, 0.0, frac)
        return self.step_deg * (n + frac)

    def direction(self, v: np.ndarray, tau: np.ndarray) -> np.ndarray:
        """Return the unit direction (N, 3), sensor frame, tau seconds into the segment."""
        return rotate_vectors(v, self.axis, np.radians(self.angle_deg(tau)))


@dataclass(frozen=True, eq=False)   # holds numpy arrays: compare fields explicitly
class DirectionStep:
    """Sudden change of direction: to a new direction `to`, or by angle_deg about `axis`."""

    to: np.ndarray | None
    axis: np.ndarray | None
    angle_deg: float
    duration_s: float = 0.0

    def apply(self, v: np.ndarray) -> np.ndarray:
        """Return the unit direction (3,) just after the step, sensor frame."""
        if self.to is not None:
            return self.to.copy()
        return rotate_vectors(v, self.axis, math.radians(self.angle_deg))


@dataclass(frozen=True)
class Ramp:
    """Change |B| smoothly to to_nT over duration_s: 'linear' in nT or 'log' (constant ratio per s)."""

    to_nT: float
    duration_s: float
    shape: str = "linear"

    def magnitude(self, b0: float, tau: np.ndarray) -> np.ndarray:
        """Return |B| (N,) in nT, tau seconds into the segment."""
        x = np.clip(tau / self.duration_s, 0.0, 1.0)
        if self.shape == "log":
            return b0 * (self.to_nT / b0) ** x
        return b0 + (self.to_nT - b0) * x


@dataclass(frozen=True)
class MagnitudeStep:
    """Sudden change of |B| to to_nT."""

    to_nT: float
    duration_s: float = 0.0


DirectionSegment = Union[Hold, Rotate, Turntable, DirectionStep]
MagnitudeSegment = Union[Hold, Ramp, MagnitudeStep]


def direction_at(start: np.ndarray, segments: tuple, t: np.ndarray) -> np.ndarray:
    """Return the true field direction (N, 3), unit, sensor frame, at times t (s) from run start."""
    t = np.asarray(t, float)
    u = np.broadcast_to(start, (t.shape[0], 3)).copy()
    v, t0 = np.asarray(start, float), 0.0
    for seg in segments:
        if isinstance(seg, DirectionStep):
            v = seg.apply(v)
            u[t >= t0] = v
            continue
        t1 = t0 + seg.duration_s
        inside = (t >= t0) & (t < t1)
        u[inside] = seg.direction(v, t[inside] - t0)
        v = seg.direction(v, np.array([seg.duration_s]))[0]
        u[t >= t1] = v
        t0 = t1
    return u / np.linalg.norm(u, axis=1, keepdims=True)


def magnitude_at(start_nT: float, segments: tuple, t: np.ndarray) -> np.ndarray:
    """Return the true field magnitude |B| (N,) in nT at times t (s) from run start."""
    t = np.asarray(t, float)
    b = np.full(t.shape[0], float(start_nT))
    b0, t0 = float(start_nT), 0.0
    for seg in segments:
        if isinstance(seg, MagnitudeStep):
            b0 = seg.to_nT
            b[t >= t0] = b0
            continue
        t1 = t0 + seg.duration_s
        inside = (t >= t0) & (t < t1)
        b[inside] = seg.magnitude(b0, t[inside] - t0)
        b0 = float(seg.magnitude(b0, np.array([seg.duration_s]))[0])
        b[t >= t1] = b0
        t0 = t1
    return b


def _total_duration(segments: tuple) -> float:
    return float(sum(s.duration_s for s in segments))


# ----- calibration scan -----------------------------------------------------------------

GOLDEN_ANGLE_RAD = math.pi * (3.0 - math.sqrt(5.0))


def sphere_points(n: int) -> np.ndarray:
    """Return n near-uniform unit directions (n, 3) on the sphere (Fibonacci lattice), pole to pole."""
    i = np.arange(n, dtype=float)
    z = 1.0 - (2.0 * i + 1.0) / n
    r = np.sqrt(np.clip(1.0 - z * z, 0.0, None))
    phi = i * GOLDEN_ANGLE_RAD
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


@dataclass(frozen=True)
class ScanPlan:
    """Field stepped over the sphere: `points` directions per magnitude, dwell_samples recorded at each.

    settle_samples more are spent at each point before the recorded ones (the lock-in's filter
    settling after the step); they are simulated but left out of the run (a sequence gap).
    """

    magnitudes_nT: tuple[float, ...]
    points: int
    dwell_samples: int
    vary_points: bool = True
    settle_samples: int = 0

    @property
    def samples_per_point(self) -> int:
        """Return the samples spent at each point: settling plus recorded."""
        return self.settle_samples + self.dwell_samples

    @property
    def n_samples(self) -> int:
        """Return the number of samples of the whole scan (settling samples included)."""
        return len(self.magnitudes_nT) * self.points * self.samples_per_point

    def recorded(self) -> np.ndarray:
        """Return, per scan sample (N,), True when it is recorded (False while the filter settles)."""
        per_point = np.arange(self.samples_per_point) >= self.settle_samples
        return np.tile(per_point, len(self.magnitudes_nT) * self.points)

    def field(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the applied field of every scan sample: direction (N, 3) unit and |B| (N,) nT."""
        base = sphere_points(self.points)
        tilt = np.array([1.0, 1.0, 1.0]) / math.sqrt(3.0)
        dirs, mags = [], []
        for m, b in enumerate(self.magnitudes_nT):
            # Turn the lattice by the golden angle per magnitude so magnitudes do not share points.
            pts = rotate_vectors(base, tilt, m * GOLDEN_ANGLE_RAD) if self.vary_points else base
            dirs.append(np.repeat(pts, self.samples_per_point, axis=0))
            mags.append(np.full(self.points * self.samples_per_point, b))
        return np.concatenate(dirs), np.concatenate(mags)


# ----- events ---------------------------------------------------------------------------

@dataclass(frozen=True)
class NoiseBurst:
    """Lock-in noise multiplied by `factor` from start_s for duration_s on `channels` (None = all)."""

    start_s: float
    duration_s: float
    factor: float
    channels: tuple[str, ...] | None = None


@dataclass(frozen=True)
class GainDrift:
    """Gain of one probe's channels (probe None: every probe) drifting: 'linear', 'sine' or 'random_walk'.

    'linear': %/s, held after the window. 'sine': amplitude % and period inside the window.
    'random_walk': a first-order Gauss-Markov wander from 1 (stationary rms `rms_pct` %,
    correlation time `correlation_time_s`), seeded from the run's seed, held after the window.
    """

    probe: int | None
    mode: str
    start_s: float = 0.0
    duration_s: float | None = None
    rate_pct_per_s: float = 0.0
    amplitude_pct: float = 0.0
    period_s: float = 1.0
    rms_pct: float = 0.0
    correlation_time_s: float = 1.0

    def factor(self, t: np.ndarray, walk: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
        """Return the gain multiplier (N,) at times t (s); 1 before the drift. walk: random_walk's knots."""
        if self.mode == "linear":
            end = math.inf if self.duration_s is None else self.start_s + self.duration_s
            tau = np.clip(t, self.start_s, end) - self.start_s
            return 1.0 + self.rate_pct_per_s / 100.0 * tau
        if self.mode == "random_walk":
            knots_t, knots_g = walk
            return np.interp(t, knots_t, knots_g, left=1.0, right=float(knots_g[-1]))
        wave = 1.0 + self.amplitude_pct / 100.0 * np.sin(2 * np.pi * (t - self.start_s) / self.period_s)
        return np.where(_window(t, self.start_s, self.duration_s), wave, 1.0)

    def walk_knots(self, seed: int, index: int, run_end_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Return (times s, gains) of a random_walk drift, linearly interpolated in between.

        Knots every min(correlation time / 50, 0.1 s) from start_s to the window's end (or the run's);
        the noise comes from a generator of its own (seed, event index), so adding this event
        leaves the lock-in noise of the run unchanged.
        """
        end = run_end_s if self.duration_s is None else min(run_end_s, self.start_s + self.duration_s)
        step = min(self.correlation_time_s / 50.0, 0.1)
        m = max(2, int(math.ceil(max(end - self.start_s, 0.0) / step)) + 1)
        rng = np.random.default_rng([int(seed), 0x6761696E, int(index)])
        decay = math.exp(-step / self.correlation_time_s)
        kick = self.rms_pct / 100.0 * math.sqrt(-math.expm1(-2.0 * step / self.correlation_time_s))
        x = np.zeros(m)
        x[1:] = lfilter([1.0], [1.0, -decay], rng.standard_normal(m - 1) * kick)
        return self.start_s + step * np.arange(m), 1.0 + x


@dataclass(frozen=True)
class Fade:
    """A probe's light fading: its gain falls smoothly to to_pct % over fall_s, and back if hold_s is given."""

    probe: int
    start_s: float
    fall_s: float
    to_pct: float = 2.0
    hold_s: float | None = None
    rise_s: float | None = None

    def factor(self, t: np.ndarray) -> np.ndarray:
        """Return the gain multiplier (N,) at times t (s): raised-cosine fall, hold, raised-cosine rise."""
        low = self.to_pct / 100.0
        down = _smooth_step((t - self.start_s) / self.fall_s)
        g = 1.0 - (1.0 - low) * down
        if self.hold_s is not None:
            t_up = self.start_s + self.fall_s + self.hold_s
            g = g + (1.0 - low) * _smooth_step((t - t_up) / (self.rise_s or self.fall_s))
        return g


def _smooth_step(x: np.ndarray) -> np.ndarray:
    """Return 0 for x <= 0, 1 for x >= 1 and a raised cosine in between."""
    return 0.5 - 0.5 * np.cos(np.pi * np.clip(x, 0.0, 1.0))


@dataclass(frozen=True)
class ProbeMissing:
    """A probe's lock-in values absent from start_s for duration_s: rows stay, its channels are empty."""

    probe: int
    start_s: float
    duration_s: float


@dataclass(frozen=True)
class Dropout:
    """Samples lost from start_s for duration_s: 'missing' rows (seq gap) or 'nan' rows."""

    start_s: float
    duration_s: float
    mode: str = "missing"


@dataclass(frozen=True)
class Outliers:
    """`count` single-sample spikes of size_V (random phase) on random samples/channels in a window."""

    count: int
    size_V: float
    start_s: float = 0.0
    duration_s: float | None = None
    channels: tuple[str, ...] | None = None


@dataclass(frozen=True)
class StatusFlags:
    """Status bits (wire_format.md names) raised from start_s for duration_s."""

    start_s: float
    duration_s: float
    bits: tuple[str, ...]

    @property
    def mask(self) -> int:
        """Return the u16 status word of these bits."""
        m = 0
        for b in self.bits:
            m |= STATUS_BITS[b]
        return m


Event = Union[NoiseBurst, GainDrift, Fade, Dropout, ProbeMissing, Outliers, StatusFlags]


def _window(t: np.ndarray, start: float, duration: float | None) -> np.ndarray:
    end = math.inf if duration is None else start + duration
    return (t >= start) & (t < end)


# ----- scenario -------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)   # holds numpy arrays: compare fields explicitly
class Scenario:
    """A validated scenario: sensor, run settings, field trajectory (or scan) and events."""

    name: str
    kind: str
    sensor: SensorConfig
    sample_rate_hz: float
    duration_s: float
    seed: int
    description: str = ""
    direction_start: np.ndarray | None = None
    direction_segments: tuple = ()
    magnitude_start_nT: float | None = None
    magnitude_segments: tuple = ()
    scan: ScanPlan | None = None
    events: tuple = ()
    source: str = "<scenario>"
    lockin: OutputFilter | None = None
    site: SiteField | None = None       # [site]: the field fixed in NED, seen through attitude and mounting

    @property
    def n_samples(self) -> int:
        """Return the number of samples the run produces before dropouts."""
        return max(1, int(round(self.duration_s * self.sample_rate_hz)))

    @property
    def channels(self) -> tuple[str, ...]:
        """Return the sensor's channel names in array order."""
        return self.sensor.channels

    def times(self) -> np.ndarray:
        """Return the sample times (N,) in seconds from the run start: k / sample rate."""
        return np.arange(self.n_samples) / self.sample_rate_hz

    def true_field(self, t: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Return the true field at times t (default: every sample): direction (N, 3) unit, |B| (N,) nT."""
        if self.kind == "scan":
            u, b = self.scan.field()
            # A point starts at its first sample's time and holds until the next point's (times
            # between samples, e.g. the lock-in's internal ones, see the point of the sample before).
            idx = np.arange(self.n_samples) if t is None else \
                np.clip(np.floor(np.asarray(t) * self.sample_rate_hz + 1e-6).astype(int), 0, len(b) - 1)
            return u[idx], b[idx]
        t = self.times() if t is None else np.asarray(t, float)
        if self.site is not None:
            return self.site.field_sensor(t)
        return (direction_at(self.direction_start, self.direction_segments, t),
                magnitude_at(self.magnitude_start_nT, self.magnitude_segments, t))

    def with_overrides(self, seed: int | None = None, duration_s: float | None = None) -> "Scenario":
        """Return a copy with another seed and/or duration (s); a scan can only be shortened."""
        changes: dict[str, Any] = {}
        if seed is not None:
            if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
                raise ScenarioError(f"must be a whole number >= 0, got {seed!r}", "run.seed (override)")
            changes["seed"] = int(seed)
        if duration_s is not None:
            d = float(duration_s)
            if not math.isfinite(d) or d <= 0:
                raise ScenarioError(f"must be > 0, got {duration_s!r}", "run.duration_s (override)")
            if d * self.sample_rate_hz > MAX_SAMPLES:
                raise ScenarioError(f"{d:g} s at {self.sample_rate_hz:g} Hz exceeds {MAX_SAMPLES} samples",
                                    "run.duration_s (override)")
            if self.kind == "scan":
                full = self.scan.n_samples / self.sample_rate_hz
                if d > full + 1e-9:
                    raise ScenarioError(f"{d:g} s is longer than the scan ({full:g} s); a scan can "
                                        f"only be shortened", "run.duration_s (override)")
            internal = d * self.sample_rate_hz * (self.lockin.oversample if self.lockin else 0)
            if internal > MAX_INTERNAL_SAMPLES:
                raise ScenarioError(f"{d:g} s through the lock-in filter needs more than "
                                    f"{MAX_INTERNAL_SAMPLES} internal samples; shorten it",
                                    "run.duration_s (override)")
            changes["duration_s"] = d
        return dataclasses.replace(self, **changes)


# ----- parsing --------------------------------------------------------------------------

_TOP_KEYS = ("version", "name", "description", "kind", "sensor", "run", "lockin", "direction",
             "magnitude", "scan", "events", "site")
_EVENT_KINDS = ("noise_burst", "gain_drift", "fade", "dropout", "probe_missing", "outliers", "status")


def load_scenario(path: str | Path, seed: int | None = None,
                  duration_s: float | None = None) -> Scenario:
    """Return the validated Scenario of a TOML file (ScenarioError naming file, line and key)."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ScenarioError(f"cannot read scenario: {exc.strerror}", None, str(path)) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioError(f"not UTF-8 text (byte {exc.start})", None, str(path)) from None
    scenario = loads_scenario(text, str(path), default_name=path.stem)
    if seed is not None or duration_s is not None:
        scenario = scenario.with_overrides(seed=seed, duration_s=duration_s)
    return scenario


def loads_scenario(text: str, source: str = "<scenario>", default_name: str = "scenario") -> Scenario:
    """Return the validated Scenario of TOML text; source names it in errors."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        reason = msg[:m.start()].strip() if m else msg
        raise ScenarioError(f"not valid TOML: {reason}" + (f" (column {m.group(2)})" if m else ""),
                            None, source, line) from None
    return parse_scenario(data, source, text, default_name)


def parse_scenario(data: Mapping[str, Any], source: str = "<scenario>", text: str | None = None,
                   default_name: str = "scenario") -> Scenario:
    """Return the validated Scenario of an already-parsed TOML document (a dict)."""
    ctx = _Context(source, text)
    top = _Table(data, "", ctx)
    if "version" not in data:
        raise ctx.error("version", f"missing; a scenario file starts with version = {SCENARIO_VERSION}")
    version = data["version"]
    if isinstance(version, bool) or version != SCENARIO_VERSION:
        raise ctx.error("version", f"unsupported scenario format version {version!r}; this fieldvane "
                                   f"reads version {SCENARIO_VERSION}")
    top.check_keys(_TOP_KEYS)
    name = top.text("name", default_name)
    description = top.text("description", "")
    kind = top.text("kind", "track", KINDS)

    sensor_table = top.table("sensor")
    try:
        sensor = SensorConfig.from_dict(sensor_table.data if sensor_table else {})
    except ValueError as exc:
        raise _sensor_error(ctx, str(exc)) from None

    run = top.table("run") or _Table({}, "run", ctx)
    run.check_keys(("sample_rate_hz", "duration_s", "seed"))
    rate = run.number("sample_rate_hz", DEFAULT_SAMPLE_RATE_HZ, lo=0.0, hi=1e5, lo_open=True)
    seed = run.integer("seed", 0, lo=0, hi=2**63 - 1)
    duration = run.number("duration_s", None, lo=0.0, lo_open=True)
    lockin_table = top.table("lockin")
    lockin = _parse_lockin(lockin_table, rate) if lockin_table is not None else None

    fields: dict[str, Any] = {"lockin": lockin}
    if kind == "scan":
        for k in ("direction", "magnitude", "site"):
            if top.has(k):
                raise top.error(k, "a scan scenario takes its field from [scan]; remove this table "
                                   "or set kind = \"track\"")
        scan_table = top.table("scan")
        if scan_table is None:
            raise ctx.error("scan", "a scan scenario needs a [scan] table")
        plan = _parse_scan(scan_table, rate, lockin)
        full = plan.n_samples / rate
        if duration is None:
            duration = full
        elif duration > full + 1e-9:
            raise run.error("duration_s", f"{duration:g} s is longer than the scan ({full:g} s = "
                                          f"{plan.n_samples} samples at {rate:g} Hz); leave it out "
                                          f"or shorten it")
        fields["scan"] = plan
    elif top.has("site"):
        if top.has("scan"):
            raise top.error("scan", "only a scan scenario (kind = \"scan\") takes a [scan] table")
        for k in ("direction", "magnitude"):
            if top.has(k):
                raise top.error(k, "with [site] the field comes from site.field_ned_nT (or its elements) "
                                   "through the attitude and mounting; remove this table")
        fields["site"] = parse_site(top.table("site"))
        if duration is None:
            raise run.error("duration_s", "required with [site] (the field has no timed segments)")
    else:
        if top.has("scan"):
            raise top.error("scan", "only a scan scenario (kind = \"scan\") takes a [scan] table")
        d_table, m_table = top.table("direction"), top.table("magnitude")
        if d_table is None:
            raise ctx.error("direction", "a track scenario needs a [direction] table with start = [x, y, z]")
        if m_table is None:
            raise ctx.error("magnitude", "a track scenario needs a [magnitude] table with start_nT")
        start, dsegs = _parse_direction(d_table)
        b0, msegs = _parse_magnitude(m_table)
        if duration is None:
            duration = max(_total_duration(dsegs), _total_duration(msegs))
            if duration <= 0:
                raise run.error("duration_s", "required when the trajectory has no timed segments")
        fields.update(direction_start=start, direction_segments=dsegs, magnitude_start_nT=b0,
                      magnitude_segments=msegs)
    if duration * rate > MAX_SAMPLES:
        raise run.error("duration_s", f"{duration:g} s at {rate:g} Hz exceeds {MAX_SAMPLES} samples")
    if duration * rate < 0.5:
        raise run.error("duration_s", f"{duration:g} s at {rate:g} Hz is shorter than one sample")
    if lockin is not None and duration * rate * lockin.oversample > MAX_INTERNAL_SAMPLES:
        key = "oversample" if lockin_table.has("oversample") else "time_constant_s"
        raise lockin_table.error(key, f"the filter would run {duration * rate * lockin.oversample:.3g} "
                                      f"internal samples (limit {MAX_INTERNAL_SAMPLES}); give a larger "
                                      f"time constant, a smaller oversample or a shorter run")

    events = tuple(_parse_event(e, sensor, duration) for e in top.tables("events"))
    return Scenario(name=name, kind=kind, sensor=sensor, sample_rate_hz=rate, duration_s=duration,
                    seed=seed, description=description, events=events, source=source, **fields)


def _sensor_error(ctx: _Context, message: str) -> ScenarioError:
    """Turn a SensorConfig ValueError ('field: reason') into a ScenarioError under 'sensor.'."""
    m = re.match(r"^\[sensor\]: unknown key '([^']+)'", message)
    if m:
        return ctx.error(f"sensor.{m.group(1)}", message.split(": ", 1)[1])
    m = re.match(r"^([A-Za-z_]\w*(?:\[[^\]]*\])?): (.*)$", message, re.S)
    if m:
        return ctx.error(f"sensor.{m.group(1)}", m.group(2))
    return ctx.error("sensor", message.removeprefix("[sensor]: "))


def _parse_direction(tab: _Table) -> tuple[np.ndarray, tuple]:
    tab.check_keys(("start", "segments"))
    start = tab.unit_vector("start")
    segs = []
    for s in tab.tables("segments"):
        kind = s.text("kind", choices=("hold", "rotate", "turntable", "step"))
        if kind == "hold":
            s.check_keys(("kind", "duration_s"))
            segs.append(Hold(s.number("duration_s", lo=0.0, lo_open=True)))
        elif kind == "rotate":
            s.check_keys(("kind", "axis", "rate_deg_per_s", "duration_s", "angle_deg"))
            axis = s.unit_vector("axis")
            rate = s.number("rate_deg_per_s")
            if rate == 0:
                raise s.error("rate_deg_per_s", "must be nonzero (use kind = \"hold\" to stay still)")
            if s.has("duration_s") == s.has("angle_deg"):
                raise s.error("duration_s", "give exactly one of duration_s or angle_deg")
            if s.has("angle_deg"):
                angle = s.number("angle_deg")
                if angle == 0 or math.copysign(1, angle) != math.copysign(1, rate):
                    raise s.error("angle_deg", f"must be nonzero with the sign of rate_deg_per_s "
                                               f"({rate:g}), got {angle:g}")
                duration = angle / rate
            else:
                duration = s.number("duration_s", lo=0.0, lo_open=True)
            segs.append(Rotate(axis, rate, duration))
        elif kind == "turntable":
            s.check_keys(("kind", "axis", "step_deg", "dwell_s", "move_s", "steps"))
            step = s.number("step_deg")
            if step == 0:
                raise s.error("step_deg", "must be nonzero")
            segs.append(Turntable(s.unit_vector("axis"), step, s.number("dwell_s", lo=0.0, lo_open=True),
                                  s.number("move_s", 0.0, lo=0.0), s.integer("steps", lo=1)))
        else:
            s.check_keys(("kind", "to", "axis", "angle_deg"))
            if s.has("to") == (s.has("axis") or s.has("angle_deg")):
                raise s.error("to", "give either to = [x, y, z] or both axis and angle_deg")
            if s.has("to"):
                segs.append(DirectionStep(s.unit_vector("to"), None, 0.0))
            else:
                segs.append(DirectionStep(None, s.unit_vector("axis"), s.number("angle_deg")))
    return start, tuple(segs)


def _parse_magnitude(tab: _Table) -> tuple[float, tuple]:
    tab.check_keys(("start_nT", "segments"))
    b0 = tab.number("start_nT", lo=0.0, hi=MAX_FIELD_NT, lo_open=True)
    segs = []
    for s in tab.tables("segments"):
        kind = s.text("kind", choices=("hold", "ramp", "step"))
        if kind == "hold":
            s.check_keys(("kind", "duration_s"))
            segs.append(Hold(s.number("duration_s", lo=0.0, lo_open=True)))
        elif kind == "ramp":
            s.check_keys(("kind", "to_nT", "duration_s", "shape"))
            segs.append(Ramp(s.number("to_nT", lo=0.0, hi=MAX_FIELD_NT, lo_open=True),
                             s.number("duration_s", lo=0.0, lo_open=True),
                             s.text("shape", "linear", ("linear", "log"))))
        else:
            s.check_keys(("kind", "to_nT"))
            segs.append(MagnitudeStep(s.number("to_nT", lo=0.0, hi=MAX_FIELD_NT, lo_open=True)))
    return b0, tuple(segs)


def _parse_lockin(tab: _Table, rate: float) -> OutputFilter:
    tab.check_keys(("time_constant_s", "filter_order", "oversample", "noise_reference_bandwidth_hz"))
    tau = tab.number("time_constant_s", lo=0.0, hi=100.0, lo_open=True)
    order = tab.integer("filter_order", 4, lo=1, hi=8)
    oversample = tab.integer("oversample", None, lo=1, hi=100_000)
    if oversample is None:
        oversample = default_oversample(tau, rate)
    reference = tab.number("noise_reference_bandwidth_hz", None, lo=0.0, hi=1e9, lo_open=True)
    return OutputFilter(tau, order, oversample, reference)


def _parse_scan(tab: _Table, rate: float, lockin: OutputFilter | None) -> ScanPlan:
    tab.check_keys(("magnitudes_nT", "points", "dwell_samples", "vary_points", "settle_s"))
    default_settle = 0.0 if lockin is None else lockin.settle_time_s()
    settle_s = tab.number("settle_s", default_settle, lo=0.0, hi=3600.0)
    return ScanPlan(magnitudes_nT=tab.numbers("magnitudes_nT", 0.0, MAX_FIELD_NT),
                    points=tab.integer("points", 200, lo=4, hi=1_000_000),
                    dwell_samples=tab.integer("dwell_samples", 10, lo=1, hi=1_000_000),
                    vary_points=tab.boolean("vary_points", True),
                    settle_samples=int(math.ceil(settle_s * rate - 1e-9)))


_DRIFT_KEYS = {"linear": ("rate_pct_per_s",), "sine": ("amplitude_pct", "period_s"),
               "random_walk": ("rms_pct", "correlation_time_s")}


def _parse_event(e: _Table, sensor: SensorConfig, run_duration: float) -> Event:
    kind = e.text("kind", choices=_EVENT_KINDS)
    channels = sensor.channels
    if kind == "noise_burst":
        e.check_keys(("kind", "start_s", "duration_s", "factor", "channels"))
        return NoiseBurst(e.number("start_s", lo=0.0), e.number("duration_s", lo=0.0, lo_open=True),
                          e.number("factor", lo=0.0), e.names("channels", channels, None))
    if kind == "gain_drift":
        e.check_keys(("kind", "probe", "mode", "start_s", "duration_s", "rate_pct_per_s",
                      "amplitude_pct", "period_s", "rms_pct", "correlation_time_s"))
        probe = e.integer("probe", None, lo=1, hi=sensor.n_probes)
        mode = e.text("mode", "linear", tuple(_DRIFT_KEYS))
        for k in ("rate_pct_per_s", "amplitude_pct", "period_s", "rms_pct", "correlation_time_s"):
            if e.has(k) and k not in _DRIFT_KEYS[mode]:
                owner = next(m for m, keys in _DRIFT_KEYS.items() if k in keys)
                raise e.error(k, f"only for mode = \"{owner}\"")
        start = e.number("start_s", 0.0, lo=0.0)
        duration = e.number("duration_s", None, lo=0.0, lo_open=True)
        if mode == "linear":
            rate = e.number("rate_pct_per_s")
            span = (run_duration - start) if duration is None else duration
            if 1.0 + rate / 100.0 * max(span, 0.0) <= 0.0:
                raise e.error("rate_pct_per_s", f"the gain would reach zero within {span:g} s")
            return GainDrift(probe, mode, start, duration, rate_pct_per_s=rate)
        if mode == "random_walk":
            return GainDrift(probe, mode, start, duration, rms_pct=e.number("rms_pct", lo=0.0, hi=10.0),
                             correlation_time_s=e.number("correlation_time_s", lo=0.0, hi=1e6,
                                                         lo_open=True))
        return GainDrift(probe, mode, start, duration,
                         amplitude_pct=e.number("amplitude_pct", lo=0.0, hi=99.0),
                         period_s=e.number("period_s", lo=0.0, lo_open=True))
    if kind == "fade":
        e.check_keys(("kind", "probe", "start_s", "fall_s", "to_pct", "hold_s", "rise_s"))
        probe = e.integer("probe", lo=1, hi=sensor.n_probes)
        hold = e.number("hold_s", None, lo=0.0)
        if e.has("rise_s") and hold is None:
            raise e.error("rise_s", "only with hold_s (without it the light stays low)")
        return Fade(probe, e.number("start_s", lo=0.0), e.number("fall_s", lo=0.0, lo_open=True),
                    e.number("to_pct", 2.0, lo=0.0, hi=100.0, lo_open=True), hold,
                    e.number("rise_s", None, lo=0.0, lo_open=True))
    if kind == "probe_missing":
        e.check_keys(("kind", "probe", "start_s", "duration_s"))
        if sensor.n_probes < 2:
            raise e.error("kind", "a one-probe sensor has no other probe left; use a dropout instead")
        return ProbeMissing(e.integer("probe", lo=1, hi=sensor.n_probes), e.number("start_s", lo=0.0),
                            e.number("duration_s", lo=0.0, lo_open=True))
    if kind == "dropout":
        e.check_keys(("kind", "start_s", "duration_s", "mode"))
        return Dropout(e.number("start_s", lo=0.0), e.number("duration_s", lo=0.0, lo_open=True),
                       e.text("mode", "missing", ("missing", "nan")))
    if kind == "outliers":
        e.check_keys(("kind", "count", "size_V", "start_s", "duration_s", "channels"))
        return Outliers(e.integer("count", lo=1, hi=MAX_SAMPLES), e.number("size_V", 1.0, lo=0.0, lo_open=True),
                        e.number("start_s", 0.0, lo=0.0), e.number("duration_s", None, lo=0.0, lo_open=True),
                        e.names("channels", channels, None))
    e.check_keys(("kind", "start_s", "duration_s", "bits"))
    return StatusFlags(e.number("start_s", lo=0.0), e.number("duration_s", lo=0.0, lo_open=True),
                       e.names("bits", tuple(STATUS_BITS)))


# ----- simulation -----------------------------------------------------------------------

@dataclass
class SimulatedRun:
    """One simulated run: samples, ground truth and (scans) the applied field, all sensor frame.

    t (N,) s; seq (N,) sample numbers (gaps where rows are missing); f (N, 2) Hz [f_a, f_b];
    z (N, C) complex lock-in X+iY in V; u (N, 3) true unit direction; b_nT (N,) true |B|;
    status (N,) u16 wire-format status bits; applied_b_nT (N, 3) nT for scans, else None;
    missing (N, C) bool, True where a probe's values are absent (z is NaN there; CSV writers
    leave those fields empty), or None when nothing is missing; lockin: the output filter or None.
    """

    t: np.ndarray
    seq: np.ndarray
    f: np.ndarray
    z: np.ndarray
    u: np.ndarray
    b_nT: np.ndarray
    status: np.ndarray
    channels: tuple[str, ...]
    sample_rate_hz: float
    name: str = ""
    seed: int = 0
    kind: str = "track"
    applied_b_nT: np.ndarray | None = None
    n_samples: int = 0                      # samples of the whole run before dropouts (seq period)
    missing: np.ndarray | None = None
    lockin: OutputFilter | None = None
    start_utc: str | None = None            # [site] start_utc (ISO 8601 UTC): t = 0 of the run

    @property
    def duration_s(self) -> float:
        """Return the run's length in seconds (n_samples / sample rate), dropouts included."""
        return self.n_samples / self.sample_rate_hz

    def __len__(self) -> int:
        return int(self.t.shape[0])

    def recording_columns(self) -> dict[str, np.ndarray]:
        """Return the recording-CSV columns (docs/recording_format.md), name -> (N,) array, in order."""
        cols: dict[str, np.ndarray] = {"t": self.t, "f_a": self.f[:, 0], "f_b": self.f[:, 1]}
        for k, ch in enumerate(self.channels):
            cols[f"x_{ch}"] = self.z[:, k].real
            cols[f"y_{ch}"] = self.z[:, k].imag
        if self.applied_b_nT is not None:
            for i, c in enumerate(("bx_nT", "by_nT", "bz_nT")):
                cols[c] = self.applied_b_nT[:, i]
        cols.update(zip(TRUTH_COLUMNS, (self.u[:, 0], self.u[:, 1], self.u[:, 2], self.b_nT)))
        return cols

    def metadata(self) -> dict[str, str]:
        """Return '# key: value' metadata for a recording of this run (scenario, seed, rate, lock-in)."""
        meta = {"source": "fieldvane simulated sensor", "scenario": self.name, "kind": self.kind,
                "seed": str(self.seed), "sample_rate_hz": f"{self.sample_rate_hz:g}",
                "channels": " ".join(self.channels)}
        if self.lockin is not None:
            meta["lockin_time_constant_s"] = f"{self.lockin.time_constant_s:.12g}"
            meta["lockin_filter_order"] = str(self.lockin.order)
            meta["lockin_noise_bandwidth_hz"] = f"{self.lockin.noise_bandwidth_hz:.12g}"
        if self.start_utc is not None:
            meta["start_utc"] = self.start_utc
        return meta


def simulate(scenario: Scenario) -> SimulatedRun:
    """Return the SimulatedRun of a scenario (fast steady-state sensor model, seeded noise).

    Without a lock-in filter every sample is the response at its own time plus independent noise.
    With one, the response (times the gain events) and white noise (times the noise bursts) are
    formed at the filter's internal rate, filtered, and every oversample-th value is kept.
    """
    sensor = scenario.sensor
    n, nc = scenario.n_samples, len(sensor.channels)
    t = scenario.times()
    rng = np.random.default_rng(scenario.seed)
    gain_of = _SignalGain(scenario)
    grid = _Grid(scenario)
    parts = []
    for t_eval, take in grid.chunks():
        u, b = scenario.true_field(t_eval)
        f, z_clean = response(sensor, u, b)
        noise = grid.noise(rng, t_eval.shape[0]) * _noise_scale(scenario, t_eval)
        z = grid.filter(z_clean * gain_of(t_eval), noise)
        parts.append((f[take], z[take], u[take], b[take]))
    f, z, u, b = (np.concatenate(p) for p in zip(*parts))

    status = np.zeros(n, np.uint16)
    for ev in scenario.events:
        if isinstance(ev, StatusFlags):
            status[_window(t, ev.start_s, ev.duration_s)] |= np.uint16(ev.mask)

    keep = scenario.scan.recorded()[:n].copy() if scenario.kind == "scan" else np.ones(n, bool)
    nan_rows = np.zeros(n, bool)
    missing = np.zeros((n, nc), bool)
    probe_of = sensor.channel_probe_index()
    for ev in scenario.events:
        if isinstance(ev, Dropout):
            rows = _window(t, ev.start_s, ev.duration_s)
            if ev.mode == "nan":
                nan_rows |= rows
            else:
                keep &= ~rows
        elif isinstance(ev, ProbeMissing):
            missing[np.ix_(_window(t, ev.start_s, ev.duration_s), probe_of == ev.probe - 1)] = True
    for ev in scenario.events:
        if isinstance(ev, Outliers):
            # Spikes land on rows that survive the dropouts, so `count` of them are seen (those
            # on a missing probe's channels are lost with it).
            rows = np.flatnonzero(_window(t, ev.start_s, ev.duration_s) & keep & ~nan_rows)
            cols = np.flatnonzero(_channel_mask(ev.channels, sensor.channels))
            if rows.size == 0:
                continue
            pick = rng.choice(rows, size=min(ev.count, rows.size), replace=False)
            which = rng.choice(cols, size=pick.size)
            phase = rng.uniform(0.0, 2 * np.pi, size=pick.size)
            z[pick, which] += ev.size_V * np.exp(1j * phase)
    f[nan_rows] = np.nan
    z[nan_rows] = complex(np.nan, np.nan)
    z[missing] = complex(np.nan, np.nan)
    missing &= ~nan_rows[:, None]
    applied = (u * b[:, None])[keep] if scenario.kind == "scan" else None
    return SimulatedRun(t=t[keep], seq=np.arange(n, dtype=np.int64)[keep], f=f[keep], z=z[keep],
                        u=u[keep], b_nT=b[keep], status=status[keep], channels=sensor.channels,
                        sample_rate_hz=scenario.sample_rate_hz, name=scenario.name,
                        seed=scenario.seed, kind=scenario.kind, applied_b_nT=applied, n_samples=n,
                        missing=missing[keep] if missing.any() else None, lockin=scenario.lockin,
                        start_utc=scenario.site.start_utc if scenario.site is not None else None)


class _SignalGain:
    """The gain events' signal multipliers (M, C) at any times: drifts and fades, per probe."""

    def __init__(self, scenario: Scenario):
        self.events = [ev for ev in scenario.events if isinstance(ev, (GainDrift, Fade))]
        self.probe_of = scenario.sensor.channel_probe_index()
        self.nc = len(scenario.sensor.channels)
        self.walks = {}
        for i, ev in enumerate(scenario.events):
            if isinstance(ev, GainDrift) and ev.mode == "random_walk":
                self.walks[id(ev)] = ev.walk_knots(scenario.seed, i, scenario.duration_s)

    def __call__(self, t: np.ndarray) -> np.ndarray:
        """Return the gain multiplier (M, C) at times t (s)."""
        gain = np.ones((t.shape[0], self.nc))
        for ev in self.events:
            cols = np.ones(self.nc, bool) if ev.probe is None else self.probe_of == ev.probe - 1
            if isinstance(ev, GainDrift):
                gain[:, cols] *= ev.factor(t, self.walks.get(id(ev)))[:, None]
            else:
                gain[:, cols] *= ev.factor(t)[:, None]
        return gain


def _noise_scale(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Return the noise bursts' multiplier (M, C) of the lock-in noise at times t (s)."""
    channels = scenario.sensor.channels
    scale = np.ones((t.shape[0], len(channels)))
    for ev in scenario.events:
        if isinstance(ev, NoiseBurst):
            rows = _window(t, ev.start_s, ev.duration_s)
            scale[np.ix_(rows, _channel_mask(ev.channels, channels))] *= ev.factor
    return scale


class _Grid:
    """The times the sensor is evaluated at, in chunks, with the noise and the lock-in filter there.

    Without a lock-in: one chunk, the sample times, independent noise per sample (as drawn by
    response.add_noise) and no filter. With one: internal times k / (oversample x rate) from
    -warm-up on, in chunks of about CHUNK internal samples; the filter state is carried across.
    """

    CHUNK = 1 << 17

    def __init__(self, scenario: Scenario):
        self.scenario = scenario
        self.sensor = scenario.sensor
        self.lockin = scenario.lockin
        self.state = None
        if self.lockin is not None:
            lk = self.lockin
            self.dt = 1.0 / (scenario.sample_rate_hz * lk.oversample)
            scale = lk.noise_std_ratio() / lk.noise_gain(self.dt)
            self.sx = np.array(self.sensor.noise_x_V) * scale
            self.sy = np.array(self.sensor.noise_y_V) * scale

    def chunks(self):
        """Yield (times (M,) s, indices of the output samples among them) chunk by chunk."""
        t_out = self.scenario.times()
        if self.lockin is None:
            yield t_out, slice(None)
            return
        m = self.lockin.oversample
        rate_in = self.scenario.sample_rate_hz * m
        first = -int(math.ceil(self.lockin.warmup_s() * rate_in))
        last = (t_out.shape[0] - 1) * m          # internal index of the last output sample
        per_chunk = max(1, self.CHUNK // m) * m
        for i0 in range(first, last + 1, per_chunk):
            idx = np.arange(i0, min(i0 + per_chunk, last + 1))
            t = idx / rate_in
            at_output = np.flatnonzero((idx >= 0) & (idx % m == 0))
            t[at_output] = t_out[idx[at_output] // m]    # the exact sample times (steps fall on them)
            yield t, at_output

    def noise(self, rng: np.random.Generator, m: int) -> np.ndarray:
        """Return m rows of complex lock-in noise (V): per output sample, or white at the internal rate."""
        nc = len(self.sensor.channels)
        if self.lockin is None:
            return add_noise(np.zeros((m, nc), complex), self.sensor, rng)
        return (self.sx[None, :] * rng.standard_normal((m, nc))
                + 1j * self.sy[None, :] * rng.standard_normal((m, nc)))

    def filter(self, signal: np.ndarray, noise: np.ndarray) -> np.ndarray:
        """Return signal + noise (M, C) V, through the lock-in filter when there is one (state carried on)."""
        if self.lockin is None:
            return signal + noise
        lk = self.lockin
        if self.state is None:    # at rest: on the first signal value, the noise from zero
            self.state = (lk.initial_state(self.dt, signal[0], "signal"),
                          lk.initial_state(self.dt, np.zeros_like(noise[0]), "noise"))
        out_signal, state_signal = lk.run(signal, self.dt, self.state[0], "signal")
        out_noise, state_noise = lk.run(noise, self.dt, self.state[1], "noise")
        self.state = (state_signal, state_noise)
        return out_signal + out_noise


def _channel_mask(names: tuple[str, ...] | None, channels: tuple[str, ...]) -> np.ndarray:
    if names is None:
        return np.ones(len(channels), bool)
    return np.array([c in names for c in channels])


# ----- built-in scenarios ---------------------------------------------------------------

def builtin_scenario_names() -> list[str]:
    """Return the names of the scenarios shipped in fieldvane.firmware_sim/scenarios (no suffix)."""
    folder = resources.files("fieldvane.firmware_sim").joinpath("scenarios")
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def builtin_scenario_path(name: str) -> Path:
    """Return the file path of a shipped scenario such as 'demo_track' (ValueError if unknown)."""
    folder = resources.files("fieldvane.firmware_sim").joinpath("scenarios")
    target = folder.joinpath(f"{name}.toml")
    if not target.is_file():
        raise ValueError(f"no built-in scenario {name!r}; known: {', '.join(builtin_scenario_names())}")
    return Path(str(target))
