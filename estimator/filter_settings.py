"""Settings of the direction tracker: a frozen dataclass validated on creation, readable from TOML tables."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, fields

# Defaults are chosen for a sensor at rest or turning slowly (a few deg/s, changing over seconds),
# sampled at 10-1000 Hz. Units are in every name: deg, s, rt_s = sqrt(s).


@dataclass(frozen=True)
class FilterSettings:
    """Process noise, measurement noise, gating and health rules of the tracking filter (units in names)."""

    # Motion model: direction error (2, tangent plane) plus angular velocity (3, sensor frame).
    angle_random_walk_deg_rt_s: float = 0.01
    """White jitter of the field direction, deg/sqrt(s) (vibration, fast field noise)."""
    rate_random_walk_deg_s_rt_s: float = 1.0
    """Random walk of the turning rate, (deg/s)/sqrt(s): how fast the platform's rate may change."""
    initial_rate_std_deg_s: float = 10.0
    """Turning-rate uncertainty at (re)acquisition, deg/s."""

    # Optional slow sensor drifts, each a random walk: per-probe gain, per-channel phase offset.
    gain_drift: bool = False
    """Estimate a relative gain drift per probe (log-gain, dimensionless)."""
    gain_drift_per_rt_s: float = 1e-3
    """Random walk of each probe's log-gain, 1/sqrt(s)."""
    initial_gain_std: float = 0.02
    """Uncertainty of each probe's log-gain at the first acquisition (dimensionless)."""
    phase_drift: bool = False
    """Estimate a phase-offset drift per channel. Common phase shifts look much like a turn of the field,
    so with this on the direction sigma grows toward the phase uncertainty (honestly); off by default."""
    phase_drift_deg_rt_s: float = 0.02
    """Random walk of each channel's phase offset, deg/sqrt(s)."""
    initial_phase_std_deg: float = 1.0
    """Uncertainty of each channel's phase offset at the first acquisition, deg."""

    # Measurements.
    measurement_noise_scale: float = 1.0
    """Factor on the calibrated lock-in noise std of every channel (dimensionless)."""
    gate_probability: float = 0.9999
    """Chi-square gate: a sample whose innovation is less likely than 1 - this is rejected."""

    # Adaptive measurement noise (estimator/noise_level.py): per probe, the running median of successive
    # innovation differences estimates the noise variance of the moment; R is inflated by it.
    adaptive_noise: bool = True
    """Inflate each probe's measurement noise while its recent innovations show more noise than calibrated."""
    adaptive_noise_window_samples: int = 9
    """Values in the running median of the noise level: a noise rise is absorbed after about (n + 1) / 2 + 1
    gated samples, which must stay below lost_after_gated (n <= 2 * lost_after_gated - 5)."""
    adaptive_noise_threshold: float = 2.5
    """Noise variance ratio (to calibrated, dimensionless) above which R is inflated; below it R stays calibrated."""
    adaptive_noise_max_scale: float = 30.0
    """Largest factor on the noise std (dimensionless): bounds the inflation."""

    # Lost-track rule: either condition triggers a re-acquisition from the initiator.
    lost_after_gated: int = 10
    """Consecutive gated samples that declare the track lost."""
    nis_average_samples: float = 200.0
    """Length (samples) of the moving average of NIS/dof (exponential)."""
    nis_average_limit: float = 3.0
    """The track is lost when the moving average of NIS/dof exceeds this."""
    max_gap_s: float = 1.0
    """A time gap longer than this (s) restarts the track: the motion model cannot bridge it."""

    # Health flags.
    blind_factor: float = 5.0
    """BLIND when the single-sample bound exceeds this times its sphere median (dimensionless)."""
    blind_threshold_deg: float = math.inf
    """BLIND also when the single-sample bound exceeds this many degrees (inf: off)."""
    magnitude_tolerance: float = 1e-3
    """MAGNITUDE_DISAGREE when the two isotopes' |B| differ by more than this fraction."""
    low_signal_fraction: float = 0.05
    """LOW_SIGNAL when the RMS lock-in amplitude is below this fraction of its sphere median."""
    calibration_margin: float = 0.1
    """OUTSIDE_CALIBRATION when |B| leaves the calibrated range widened by this fraction."""

    def __post_init__(self):
        for f in fields(self):
            _check_type(f.name, getattr(self, f.name), f.type)
        positive = ("angle_random_walk_deg_rt_s", "rate_random_walk_deg_s_rt_s", "initial_rate_std_deg_s",
                    "gain_drift_per_rt_s", "initial_gain_std", "phase_drift_deg_rt_s",
                    "initial_phase_std_deg", "measurement_noise_scale", "max_gap_s", "blind_factor",
                    "blind_threshold_deg", "magnitude_tolerance")
        for name in positive:
            value = getattr(self, name)
            if not (value > 0) or math.isnan(value):
                raise ValueError(f"FilterSettings.{name} must be > 0 (got {value!r})")
            if math.isinf(value) and name != "blind_threshold_deg":
                raise ValueError(f"FilterSettings.{name} must be finite (got {value!r})")
        if not 0.5 < self.gate_probability < 1.0:
            raise ValueError(f"FilterSettings.gate_probability must be between 0.5 and 1 (exclusive), "
                             f"got {self.gate_probability!r}")
        if self.lost_after_gated < 1:
            raise ValueError(f"FilterSettings.lost_after_gated must be at least 1 (got {self.lost_after_gated!r})")
        if not (1.0 <= self.nis_average_samples < math.inf):
            raise ValueError(f"FilterSettings.nis_average_samples must be a finite number >= 1 "
                             f"(got {self.nis_average_samples!r})")
        if not (1.0 < self.nis_average_limit < math.inf):
            raise ValueError(f"FilterSettings.nis_average_limit must be finite and > 1: a consistent filter "
                             f"averages NIS/dof = 1 (got {self.nis_average_limit!r})")
        if not (0.0 <= self.low_signal_fraction < 1.0):
            raise ValueError(f"FilterSettings.low_signal_fraction must be in [0, 1) (got {self.low_signal_fraction!r})")
        if self.adaptive_noise_window_samples < 3:
            raise ValueError(f"FilterSettings.adaptive_noise_window_samples must be at least 3 "
                             f"(got {self.adaptive_noise_window_samples!r})")
        if not (1.0 <= self.adaptive_noise_max_scale < math.inf):
            raise ValueError(f"FilterSettings.adaptive_noise_max_scale must be finite and >= 1 "
                             f"(got {self.adaptive_noise_max_scale!r})")
        if not (1.0 <= self.adaptive_noise_threshold <= self.adaptive_noise_max_scale ** 2):
            raise ValueError(f"FilterSettings.adaptive_noise_threshold must lie between 1 and "
                             f"adaptive_noise_max_scale^2 (got {self.adaptive_noise_threshold!r})")
        if not (0.0 <= self.calibration_margin < math.inf):
            raise ValueError(f"FilterSettings.calibration_margin must be finite and >= 0 "
                             f"(got {self.calibration_margin!r})")

    @classmethod
    def from_dict(cls, values: dict) -> "FilterSettings":
        """Return settings from a plain dict (e.g. a TOML table); unknown keys raise ValueError naming them."""
        if not isinstance(values, dict):
            raise ValueError(f"filter settings must be a table of key = value, got {type(values).__name__}")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise ValueError(f"unknown filter setting(s) {', '.join(unknown)}; known: {', '.join(sorted(known))}")
        kwargs = {}
        for f in fields(cls):
            if f.name in values:
                value = values[f.name]
                # TOML writes 1 for 1.0; accept integers where a float is expected.
                if f.type == "float" and isinstance(value, int) and not isinstance(value, bool):
                    value = float(value)
                kwargs[f.name] = value
        return cls(**kwargs)

    def to_dict(self) -> dict:
        """Return every setting as a plain dict of bool/int/float (TOML-writable; inf stays inf)."""
        return dataclasses.asdict(self)

    def replace(self, **changes) -> "FilterSettings":
        """Return a validated copy with some settings changed (for tuning)."""
        return dataclasses.replace(self, **changes)


def _check_type(name: str, value, type_name: str) -> None:
    """Raise ValueError unless value has the declared type (bool is not a number here)."""
    if type_name == "bool":
        ok = isinstance(value, bool)
        want = "true or false"
    elif type_name == "int":
        ok = isinstance(value, int) and not isinstance(value, bool)
        want = "a whole number"
    else:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        want = "a number"
    if not ok:
        raise ValueError(f"FilterSettings.{name} must be {want} (got {value!r})")
