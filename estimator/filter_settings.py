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

    # Slow sensor drifts, each a random walk: per-probe gain (on: optical power drifts on every bench),
    # per-channel phase offset (off).
    gain_drift: bool = True
    """Estimate a relative gain drift per probe (log-gain, dimensionless): optical power drifts a few percent
    over tens of seconds on a diode-laser bench."""
    gain_drift_per_rt_s: float = 3e-3
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
    channel_noise_scale: tuple = ()
    """Further factor per channel, as (channel, factor) pairs (a TOML table {"1a" = 1.1, ...}); others 1."""
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
    """Largest factor on the noise std over the stream's baseline (dimensionless): bounds the inflation."""
    noise_baseline_ratio: float = 0.0
    """This stream's normal noise variance over the calibration scan's (dimensionless; for white input noise,
    the live lock-in noise bandwidth over the scan's). 0: learn it from the stream's first seconds and track it
    slowly. Given: fixed."""
    noise_learn_s: float = 2.0
    """Seconds at the start of a stream during which its normal noise level is learned (every value counts)."""
    noise_baseline_window_s: float = 30.0
    """Span (s) of the slow median that tracks the stream's normal noise level after the learning."""

    # The lock-in amplifier's output filter (from recording metadata or here): 0 = unknown (white samples).
    lockin_time_constant_s: float = 0.0
    """Time constant of each RC stage of the lock-in's low-pass filter, s (0: not known; samples treated as
    independent and undelayed)."""
    lockin_filter_order: int = 4
    """Number of RC stages of the lock-in's low-pass filter (6 dB/octave each)."""

    probe_rejection: bool = True
    """When a sample fails the gate, fuse the other probes if leaving one probe out makes them pass."""
    probe_reset_after: int = 10
    """Consecutive samples in which one probe disagrees with the others before its gain state restarts from the
    data."""
    model_error_cap_ratio: float = 100.0
    """Model-error variance (over the noise variance) assumed where the calibration cannot say how wrong its model
    is (far outside its magnitudes): 100 = an error ten times the noise std, flagged INTERPOLATED."""
    model_error_flag_ratio: float = 0.25
    """INTERPOLATED when the calibration's model-error variance at this |B| exceeds this fraction of the noise."""

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
        for name, limit in UPPER_LIMITS.items():
            if getattr(self, name) > limit:
                raise ValueError(f"FilterSettings.{name} must be at most {limit:g} (got {getattr(self, name)!r})")
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
            if 1e6 < value < math.inf:
                # Squared in the filter: beyond this nothing physical is described, and overflow looms.
                raise ValueError(f"FilterSettings.{name} must be below 1e6 (got {value!r})")
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
        if not (0.0 <= self.noise_baseline_ratio < 1e6):
            raise ValueError(f"FilterSettings.noise_baseline_ratio must be 0 (learn) or a positive ratio below 1e6 "
                             f"(got {self.noise_baseline_ratio!r})")
        for name in ("noise_learn_s", "noise_baseline_window_s"):
            if not (0.0 <= getattr(self, name) <= 1e6):
                raise ValueError(f"FilterSettings.{name} must lie between 0 and 1e6 s (got {getattr(self, name)!r})")
        if not (0.0 <= self.lockin_time_constant_s <= 100.0):
            raise ValueError(f"FilterSettings.lockin_time_constant_s must lie between 0 and 100 s "
                             f"(got {self.lockin_time_constant_s!r})")
        if not (1 <= self.lockin_filter_order <= 8):
            raise ValueError(f"FilterSettings.lockin_filter_order must be 1 to 8 (got {self.lockin_filter_order!r})")
        if self.probe_reset_after < 1:
            raise ValueError(f"FilterSettings.probe_reset_after must be at least 1 (got {self.probe_reset_after!r})")
        if not (0.0 < self.model_error_cap_ratio <= 1e6):
            raise ValueError(f"FilterSettings.model_error_cap_ratio must be > 0 and <= 1e6 "
                             f"(got {self.model_error_cap_ratio!r})")
        if not (0.0 < self.model_error_flag_ratio < math.inf):
            raise ValueError(f"FilterSettings.model_error_flag_ratio must be finite and > 0 "
                             f"(got {self.model_error_flag_ratio!r})")
        pairs = self.channel_noise_scale
        if isinstance(pairs, dict):
            pairs = tuple(sorted(pairs.items()))
        try:
            pairs = tuple((str(k), float(v)) for k, v in pairs)
        except (TypeError, ValueError):
            raise ValueError(f"FilterSettings.channel_noise_scale must map channel names to factors "
                             f"(got {self.channel_noise_scale!r})") from None
        for k, v in pairs:
            if not (len(k) == 2 and k[0] in "12" and k[1] in "ab"):
                raise ValueError(f"FilterSettings.channel_noise_scale: unknown channel {k!r} (1a, 1b, 2a, 2b)")
            if not (0.0 < v < 1e6):
                raise ValueError(f"FilterSettings.channel_noise_scale[{k}] must be > 0 and < 1e6 (got {v!r})")
        object.__setattr__(self, "channel_noise_scale", pairs)
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
        """Return every setting as a plain dict of bool/int/float (TOML-writable; inf stays inf); per-channel
        factors as a dict."""
        out = dataclasses.asdict(self)
        out["channel_noise_scale"] = dict(self.channel_noise_scale)
        return out

    def replace(self, **changes) -> "FilterSettings":
        """Return a validated copy with some settings changed (for tuning)."""
        return dataclasses.replace(self, **changes)


# Upper limits where the checks below set none: beyond them no filter makes sense (and counts or products overflow).
UPPER_LIMITS = {"adaptive_noise_window_samples": 100_001, "lost_after_gated": 10_000_000,
                "probe_reset_after": 10_000_000, "nis_average_samples": 1e9, "nis_average_limit": 1e6,
                "calibration_margin": 1e3, "model_error_flag_ratio": 1e6}


def _check_type(name: str, value, type_name: str) -> None:
    """Raise ValueError unless value has the declared type (bool is not a number here)."""
    if type_name == "tuple":
        ok = isinstance(value, (tuple, list, dict))
        want = "a table of channel = factor"
    elif type_name == "bool":
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
