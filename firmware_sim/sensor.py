"""Configuration of the simulated sensor: beam axes, cell physics, lock-in gains, noise.

`SensorConfig` is validated on creation (ValueError naming the field) and round-trips through the
plain dict of a TOML `[sensor]` table with `from_dict` / `to_dict`. All default numbers are our own
invention for a plausible heated two-isotope Rb cell; they describe no real instrument.

Isotope-indexed values (relaxation, probe weight, lower-level weight, density fraction) are stored
in `pump_isotopes` order: index 0 is the isotope pump a is tuned to, index 1 the one pump b is tuned
to. Pump-indexed values (rate, power, detuning, angle efficiency) are stored in pump order (a, b).
Channel-indexed values are stored in `channels` order: ("1a", "1b") or ("1a", "1b", "2a", "2b").

The realism options (light shift, locked frequency loops, Breit-Rabi heading error, lower hyperfine
level, density-weighted spin exchange, pump efficiency over the sphere) are all off in the default
sensor, which therefore behaves exactly as the original idealized one; scenarios switch them on.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from .atoms import ATOMS, atom, optical_line_shape

CHANNELS_ONE_PROBE = ("1a", "1b")
CHANNELS_TWO_PROBES = ("1a", "1b", "2a", "2b")
PUMP_LETTERS = ("a", "b")

_PER_CHANNEL = ("gain_V", "phase_deg", "handedness", "noise_x_V", "noise_y_V")
_PER_ISOTOPE = ("relaxation_per_s", "probe_weight", "lower_level_weight", "density_fraction")
_PER_PUMP = ("pump_rate_per_s", "pump_power", "pump_detuning_GHz", "pump_angle_efficiency")
FREQUENCY_LOOPS = ("exact", "locked")
HEADING_MODELS = ("spacing", "breit_rabi")
_UNIT_TOL = 1e-3


def channels_for(n_probes: int) -> tuple[str, ...]:
    """Return the channel names for a sensor with 1 or 2 probes, in the fixed order."""
    return CHANNELS_ONE_PROBE if n_probes == 1 else CHANNELS_TWO_PROBES


def _unit_vectors(name: str, value: Any, counts: tuple[int, ...]) -> tuple[tuple[float, ...], ...]:
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected a list of 3-vectors, got {value!r}") from None
    if arr.ndim != 2 or arr.shape[1] != 3 or arr.shape[0] not in counts:
        want = " or ".join(str(c) for c in counts)
        raise ValueError(f"{name}: expected {want} vectors of 3 numbers, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: vectors must be finite, got {value!r}")
    out = []
    for k, v in enumerate(arr):
        n = float(np.linalg.norm(v))
        if abs(n - 1.0) > _UNIT_TOL:
            raise ValueError(f"{name}[{k}]: must be a unit vector (norm {n:.4g}, tolerance {_UNIT_TOL})")
        out.append(tuple(float(x) for x in v / n))
    return tuple(out)


def _floats(name: str, value: Any, n: int) -> tuple[float, ...]:
    if np.isscalar(value):
        value = [value] * n
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected {n} numbers, got {value!r}") from None
    if arr.shape != (n,):
        raise ValueError(f"{name}: expected {n} numbers, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: values must be finite, got {value!r}")
    return tuple(float(x) for x in arr)


def _scalar(name: str, value: Any, lo: float | None = None, hi: float | None = None,
            lo_open: bool = False) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected a number, got {value!r}") from None
    if not math.isfinite(x):
        raise ValueError(f"{name}: must be finite, got {value!r}")
    if lo is not None and (x < lo or (lo_open and x == lo)):
        raise ValueError(f"{name}: must be {'>' if lo_open else '>='} {lo}, got {x}")
    if hi is not None and x > hi:
        raise ValueError(f"{name}: must be <= {hi}, got {x}")
    return x


@dataclass(frozen=True)
class SensorConfig:
    """Simulated sensor: beam axes (sensor frame, unit), cell physics (1/s), lock-in gains (V, deg).

    Realism options (defaults switch each one off):

    * pump_power (relative, per pump, default 1): scales the pump's pumping rate and light shift.
    * pump_detuning_GHz (per pump, default 0) and optical_width_GHz (FWHM of the pressure-broadened
      optical line, default 3): the pump's complex line shape z = 1 / (1 - 2i detuning / width)
      gives its pumping rate pump_rate_per_s * power * Re z and its light shift, a fictitious
      magnetic field along the pump axis whose electron-spin precession rate is
      pump_rate_per_s * power * Im z (dispersive: zero on resonance, sign flips across it, ~ power /
      detuning far off). Both isotopes (and their lower levels) feel it through their own g_F.
    * frequency_loop: "exact" (default: pumps modulated at, and f_a, f_b reporting, gamma*|B|) or
      "locked" (each pump's loop sits on its isotope's resonance: pulled by spin exchange, moved by
      the heading error and the light shift; f_a, f_b report it and the pumps are modulated there).
    * heading_model: "spacing" (default: shift per unit longitudinal polarization = one nonlinear
      Zeeman line spacing 2 f_L^2 / f_hfs) or "breit_rabi" (the spin-temperature centroid slope of
      the Breit-Rabi lines, about 2.1 and 4.5 line spacings for 87Rb F=2 and 85Rb F=3); both
      times heading_strength.
    * lower_level_weight (per isotope, default 0, signed, |w| <= 1): the lower hyperfine level
      F = I - 1/2 (g_F < 0, precessing the other way) is pumped like the upper one and adds w times
      the upper level's probe weight to the probe signal; the spin-temperature limit is -0.20 (87Rb)
      and -0.36 (85Rb) (atoms.AtomData.lower_level_spin_ratio), real pumping leaves less.
    * density_fraction (per isotope, default unset): unset, each isotope exchanges with the other
      at spin_exchange_per_s (symmetric); set (e.g. natural Rb 0.2783 / 0.7217), isotope i exchanges
      at spin_exchange_per_s * fraction of the other isotope (spin_exchange_per_s is then the rate
      per atom against the whole vapor).
    * pump_angle_efficiency (per pump, e2, default 0): the pump's efficiency (rate and light shift)
      is 1 + e2 (p.u)^2 for field direction u: an even, smooth distortion over the sphere
      (e2 = 0.1 is +-5 % about its mean value).
    """

    pump_axes: tuple = ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0))
    probe_axes: tuple = ((0.0, 0.0, 1.0), (0.6, 0.3, 0.7416198487095663))
    pump_isotopes: tuple = ("87Rb", "85Rb")
    gain_V: tuple = (1.0, 0.85, 0.92, 0.78)
    phase_deg: tuple = (12.0, -25.0, 40.0, 167.0)
    handedness: tuple = (1, 1, -1, 1)
    relaxation_per_s: tuple = (300.0, 300.0)
    pump_rate_per_s: tuple = (200.0, 200.0)
    modulation_depth: float = 1.0
    cross_pumping: float = 0.05
    spin_exchange_per_s: float = 1000.0
    probe_weight: tuple = (0.2783, 0.7217)   # natural abundance of 87Rb, 85Rb (from memory)
    heading_strength: float = 1.0
    noise_x_V: tuple = (1e-3, 1e-3, 1e-3, 1e-3)
    noise_y_V: tuple = (1e-3, 1e-3, 1e-3, 1e-3)
    pump_power: tuple = (1.0, 1.0)
    pump_detuning_GHz: tuple = (0.0, 0.0)
    optical_width_GHz: float = 3.0
    frequency_loop: str = "exact"
    heading_model: str = "spacing"
    lower_level_weight: tuple = (0.0, 0.0)
    density_fraction: tuple = ()
    pump_angle_efficiency: tuple = (0.0, 0.0)

    def __post_init__(self) -> None:
        put = lambda k, v: object.__setattr__(self, k, v)  # noqa: E731 (frozen dataclass)
        put("pump_axes", _unit_vectors("pump_axes", self.pump_axes, (2,)))
        put("probe_axes", _unit_vectors("probe_axes", self.probe_axes, (1, 2)))
        iso = self.pump_isotopes
        if isinstance(iso, str) or len(tuple(iso)) != 2:
            raise ValueError(f"pump_isotopes: expected two isotope names, got {iso!r}")
        iso = tuple(str(x) for x in iso)
        for name in iso:
            if name not in ATOMS:
                raise ValueError(f"pump_isotopes: unknown isotope {name!r}; known: {', '.join(ATOMS)}")
        if iso[0] == iso[1]:
            raise ValueError(f"pump_isotopes: the two pumps need two different isotopes, got {iso!r}")
        put("pump_isotopes", iso)
        nc = len(self.channels)
        for name in _PER_CHANNEL:
            put(name, _floats(name, getattr(self, name), nc))
        for k, h in enumerate(self.handedness):
            if h not in (1.0, -1.0):
                raise ValueError(f"handedness[{self.channels[k]}]: must be +1 or -1, got {h}")
        put("handedness", tuple(int(h) for h in self.handedness))
        for k, g in enumerate(self.gain_V):
            if g <= 0.0:
                raise ValueError(f"gain_V[{self.channels[k]}]: must be > 0, got {g}")
        for name in ("noise_x_V", "noise_y_V"):
            for k, s in enumerate(getattr(self, name)):
                if s < 0.0:
                    raise ValueError(f"{name}[{self.channels[k]}]: must be >= 0, got {s}")
        put("relaxation_per_s", _floats("relaxation_per_s", self.relaxation_per_s, 2))
        if min(self.relaxation_per_s) <= 0.0:
            raise ValueError(f"relaxation_per_s: must be > 0, got {self.relaxation_per_s}")
        put("pump_rate_per_s", _floats("pump_rate_per_s", self.pump_rate_per_s, 2))
        if min(self.pump_rate_per_s) <= 0.0:
            raise ValueError(f"pump_rate_per_s: must be > 0, got {self.pump_rate_per_s}")
        put("probe_weight", _floats("probe_weight", self.probe_weight, 2))
        if self.probe_weight[0] == 0.0 or self.probe_weight[1] == 0.0:
            raise ValueError(f"probe_weight: both isotopes need a nonzero weight, got {self.probe_weight}")
        put("modulation_depth", _scalar("modulation_depth", self.modulation_depth, 0.0, 1.0, lo_open=True))
        put("cross_pumping", _scalar("cross_pumping", self.cross_pumping, 0.0, 1.0))
        put("spin_exchange_per_s", _scalar("spin_exchange_per_s", self.spin_exchange_per_s, 0.0))
        put("heading_strength", _scalar("heading_strength", self.heading_strength))
        put("pump_power", _floats("pump_power", self.pump_power, 2))
        if min(self.pump_power) <= 0.0:
            raise ValueError(f"pump_power: must be > 0, got {self.pump_power}")
        put("pump_detuning_GHz", _floats("pump_detuning_GHz", self.pump_detuning_GHz, 2))
        put("optical_width_GHz", _scalar("optical_width_GHz", self.optical_width_GHz, 0.0, lo_open=True))
        for name, choices in (("frequency_loop", FREQUENCY_LOOPS), ("heading_model", HEADING_MODELS)):
            value = getattr(self, name)
            if value not in choices:
                raise ValueError(f"{name}: expected one of {', '.join(repr(c) for c in choices)}, got {value!r}")
        put("lower_level_weight", _floats("lower_level_weight", self.lower_level_weight, 2))
        if max(abs(w) for w in self.lower_level_weight) > 1.0:
            raise ValueError(f"lower_level_weight: must lie in [-1, 1], got {self.lower_level_weight}")
        if self.density_fraction is None or (not np.isscalar(self.density_fraction)
                                             and len(tuple(self.density_fraction)) == 0):
            put("density_fraction", ())
        else:
            if not np.isscalar(self.density_fraction) and any(x is None for x in self.density_fraction):
                raise ValueError(f"density_fraction: give both isotopes, got {self.density_fraction!r}")
            frac = _floats("density_fraction", self.density_fraction, 2)
            if min(frac) <= 0.0:
                raise ValueError(f"density_fraction: both isotopes need a fraction > 0, got {frac}")
            total = sum(frac)
            put("density_fraction", tuple(x / total for x in frac))
        put("pump_angle_efficiency", _floats("pump_angle_efficiency", self.pump_angle_efficiency, 2))
        if min(self.pump_angle_efficiency) <= -1.0:
            raise ValueError(f"pump_angle_efficiency: must be > -1 (efficiency 1 + e2 (p.u)^2 stays > 0), "
                             f"got {self.pump_angle_efficiency}")

    # ----- derived quantities -------------------------------------------------------------
    @property
    def n_probes(self) -> int:
        """Return the number of probe beams (1 or 2)."""
        return len(self.probe_axes)

    @property
    def channels(self) -> tuple[str, ...]:
        """Return the channel names in array order, e.g. ('1a', '1b', '2a', '2b')."""
        return channels_for(len(self.probe_axes))

    def pump_array(self) -> np.ndarray:
        """Return the pump axes as a (2, 3) array (unit vectors, sensor frame): pump a, pump b."""
        return np.array(self.pump_axes, dtype=float)

    def probe_array(self) -> np.ndarray:
        """Return the probe axes as a (P, 3) array (unit vectors, sensor frame)."""
        return np.array(self.probe_axes, dtype=float)

    def gamma_hz_per_nt(self) -> np.ndarray:
        """Return gamma/2pi (Hz/nT) of the isotopes pumped by pump a and pump b, shape (2,)."""
        return np.array([atom(n).gamma_hz_per_nt for n in self.pump_isotopes])

    def hyperfine_hz(self) -> np.ndarray:
        """Return the ground hyperfine splittings (Hz) of the two isotopes in pump order, shape (2,)."""
        return np.array([atom(n).hyperfine_hz for n in self.pump_isotopes])

    def pump_weights(self) -> np.ndarray:
        """Return W (2, 2): W[j, i] = how strongly pump j pumps isotope i (1 own, cross fraction other)."""
        x = self.cross_pumping
        return np.array([[1.0, x], [x, 1.0]])

    def exchange_per_s(self) -> np.ndarray:
        """Return each isotope's spin-exchange rate with the other isotope (1/s), shape (2,).

        Symmetric (spin_exchange_per_s for both) unless density_fraction is set; then isotope i
        exchanges in proportion to the other's density: spin_exchange_per_s * fraction[other].
        """
        k = self.spin_exchange_per_s
        if not self.density_fraction:
            return np.array([k, k])
        return k * np.array(self.density_fraction)[::-1]

    def pump_line_shape(self) -> np.ndarray:
        """Return each pump's complex optical line shape z = 1 / (1 - 2i detuning / width), shape (2,).

        Re z is the pumping rate and Im z the electron-spin light-shift rate, both in units of the
        on-resonance pumping rate: the absorptive and dispersive parts of one Lorentzian line
        (Happer, Rev. Mod. Phys. 44, 169 (1972), complex line-shape description; from memory).
        """
        return optical_line_shape(np.array(self.pump_detuning_GHz), self.optical_width_GHz)

    def total_damping_per_s(self) -> np.ndarray:
        """Return each isotope's nominal transverse damping (1/s): relaxation + pumping + exchange loss.

        Nominal: pumps at power 1, on resonance, efficiency 1 (what the gains are referred to).
        """
        rates = np.array(self.pump_rate_per_s) @ self.pump_weights()
        return np.array(self.relaxation_per_s) + rates + self.exchange_per_s()

    def drive_normalization(self) -> np.ndarray:
        """Return, per pump (2,), the ideal on-resonance probe-signal phasor per unit geometry factor.

        For one isotope with no coupling, pumped by R (1 + m cos wt), the resonant transverse
        polarization phasor is R m (p_T) / Gamma and its probe projection is (c + i s) R m w / (2 Gamma);
        dividing the lock-in phasor by w R m / (2 Gamma) leaves the dimensionless geometry factor.
        Fixed electronics: computed from the nominal pumps (power 1, on resonance), so a scenario
        that changes the pump power or detuning sees the signal change.
        """
        damping = self.total_damping_per_s()
        w = np.abs(np.array(self.probe_weight))
        r = np.array(self.pump_rate_per_s)
        return w * r * self.modulation_depth / (2.0 * damping)

    def channel_pump_index(self) -> np.ndarray:
        """Return, per channel, the pump index (0 for 'a', 1 for 'b') it is demodulated at."""
        return np.array([PUMP_LETTERS.index(c[1]) for c in self.channels])

    def channel_probe_index(self) -> np.ndarray:
        """Return, per channel, the probe index (0 for probe 1, 1 for probe 2)."""
        return np.array([int(c[0]) - 1 for c in self.channels])

    def channel_complex_gain(self) -> np.ndarray:
        """Return g * exp(i phi0) per channel (V, complex), shape (C,)."""
        return np.array(self.gain_V) * np.exp(1j * np.radians(np.array(self.phase_deg)))

    def replace(self, **changes) -> "SensorConfig":
        """Return a copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    # ----- TOML [sensor] table ------------------------------------------------------------
    def to_dict(self) -> dict:
        """Return the plain dict of a TOML [sensor] table (per-channel/isotope values as tables)."""
        d: dict[str, Any] = {
            "pump_isotopes": list(self.pump_isotopes),
            "pump_axes": [list(v) for v in self.pump_axes],
            "probe_axes": [list(v) for v in self.probe_axes],
            "pump_rate_per_s": list(self.pump_rate_per_s),
            "modulation_depth": self.modulation_depth,
            "cross_pumping": self.cross_pumping,
            "spin_exchange_per_s": self.spin_exchange_per_s,
            "heading_strength": self.heading_strength,
            "pump_power": list(self.pump_power),
            "pump_detuning_GHz": list(self.pump_detuning_GHz),
            "optical_width_GHz": self.optical_width_GHz,
            "frequency_loop": self.frequency_loop,
            "heading_model": self.heading_model,
            "pump_angle_efficiency": list(self.pump_angle_efficiency),
        }
        for name in _PER_ISOTOPE:
            if getattr(self, name):                 # an unset density_fraction is left out
                d[name] = dict(zip(self.pump_isotopes, getattr(self, name)))
        for name in _PER_CHANNEL:
            d[name] = dict(zip(self.channels, getattr(self, name)))
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "SensorConfig":
        """Return a SensorConfig from a TOML [sensor] table; missing keys take the defaults.

        Per-channel, per-isotope and per-pump values may be a table keyed by channel ('1a'),
        isotope ('87Rb') or pump ('a', 'b'), a list in channel / pump order, or one number for all.
        """
        if not isinstance(d, Mapping):
            raise ValueError(f"[sensor]: expected a table, got {type(d).__name__}")
        known = {f.name for f in dataclasses.fields(cls)}
        for key in d:
            if key not in known:
                raise ValueError(f"[sensor]: unknown key {key!r}; known keys: {', '.join(sorted(known))}")
        n_probes = 2
        if "probe_axes" in d:
            try:
                n_probes = len(d["probe_axes"])
            except TypeError:
                raise ValueError(f"probe_axes: expected a list of 3-vectors, got {d['probe_axes']!r}") from None
            if n_probes not in (1, 2):
                raise ValueError(f"probe_axes: expected 1 or 2 vectors, got {n_probes}")
        base = default_config(n_probes)
        isotopes = tuple(d.get("pump_isotopes", base.pump_isotopes))
        kwargs: dict[str, Any] = {}
        for key, value in d.items():
            if key in _PER_CHANNEL:
                kwargs[key] = _keyed(key, value, base.channels, getattr(base, key))
            elif key in _PER_ISOTOPE:
                base_value = getattr(base, key) or (None, None)
                default = dict(zip(base.pump_isotopes, base_value))
                fallback = tuple(default.get(n, base_value[k]) for k, n in enumerate(isotopes))
                kwargs[key] = _keyed(key, value, isotopes, fallback)
            elif key in _PER_PUMP:
                kwargs[key] = _keyed(key, value, PUMP_LETTERS, getattr(base, key))
            else:
                kwargs[key] = value
        return dataclasses.replace(base, **kwargs)


def _keyed(name: str, value: Any, keys: tuple[str, ...], fallback: tuple) -> Any:
    """Turn a table keyed by names into a tuple in `keys` order (missing entries from fallback)."""
    if isinstance(value, Mapping):
        for k in value:
            if k not in keys:
                raise ValueError(f"{name}: unknown key {k!r}; expected some of {', '.join(keys)}")
        return tuple(value.get(k, fallback[i]) for i, k in enumerate(keys))
    return value


def _tilt(v: np.ndarray, axis: np.ndarray, angle_deg: float) -> tuple[float, ...]:
    """Rotate v about axis by angle (Rodrigues) and return it as a unit 3-tuple."""
    a = axis / np.linalg.norm(axis)
    t = math.radians(angle_deg)
    r = v * math.cos(t) + np.cross(a, v) * math.sin(t) + a * (a @ v) * (1.0 - math.cos(t))
    return tuple(float(x) for x in r / np.linalg.norm(r))


def default_config(n_probes: int = 2, misalignment_deg: float = 0.0, **changes) -> SensorConfig:
    """Return the nominal simulated sensor (1 or 2 probes); misalignment_deg tilts every beam a little.

    Pumps along x and y, probe 1 along z, probe 2 tilted; with misalignment_deg > 0 each beam is
    rotated by that angle about a fixed, beam-specific axis (a deterministic pattern, no randomness).
    """
    if n_probes not in (1, 2):
        raise ValueError(f"n_probes: must be 1 or 2, got {n_probes}")
    proto = SensorConfig()
    pumps = [np.array(v) for v in proto.pump_axes]
    probes = [np.array(v) for v in proto.probe_axes[:n_probes]]
    if misalignment_deg:
        tilt_axes = [np.array([0.0, 0.3, 1.0]), np.array([1.0, 0.0, -0.4]),
                     np.array([1.0, -0.6, 0.0]), np.array([0.2, 1.0, 0.5])]
        signs = [1.0, -1.0, 0.7, -0.8]
        beams = pumps + probes
        beams = [_tilt(b, tilt_axes[k], signs[k] * misalignment_deg) for k, b in enumerate(beams)]
        pumps, probes = beams[:2], beams[2:]
    nc = 2 * n_probes
    base = dict(
        pump_axes=tuple(tuple(float(x) for x in v) for v in pumps),
        probe_axes=tuple(tuple(float(x) for x in v) for v in probes),
        gain_V=proto.gain_V[:nc], phase_deg=proto.phase_deg[:nc], handedness=proto.handedness[:nc],
        noise_x_V=proto.noise_x_V[:nc], noise_y_V=proto.noise_y_V[:nc],
    )
    base.update(changes)
    return dataclasses.replace(proto, **base)
