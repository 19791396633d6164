"""Direction tracker: an error-state extended Kalman filter on the unit sphere, fed with lock-in X/Y.

State. The nominal direction u (unit vector, sensor frame) is carried with a tangent basis (e1, e2)
that turns rigidly with u in the prediction (then the direction error obeys d/dt = B dw exactly to
first order, B = rate_coupling(e1, e2)) and is parallel-transported along every correction. The
error state (named slices in StateLayout) holds the direction error in that basis (2, rad), per-probe
log-gain drifts (on by default: optical power drifts on every bench), optional per-channel phase
drifts, and the angular velocity w of the field direction (3, rad/s, sensor frame; u' = w x u). After
every correction the direction error is folded into u along a great circle (retraction), the basis is
transported with it and the covariance is mapped by the exact Jacobian of the chart change (Markley
2003, docs/references.md "Estimation").

Measurement. The X/Y channels of the probes present in a sample, whitened by the calibrated noise
(never phases). A probe whose fields are missing, or whose light has faded below a fraction of its
calibrated level (LOW_SIGNAL), is left out; each estimate says which probes it used. When a sample
fails the chi-square gate but leaving out one probe makes the rest pass, the rest is fused (a probe
out of step with the others, e.g. its power jumped) and a probe rejected many times in a row gets its
gain state restarted from the data.

Noise of the moment. Each probe's measurement noise is the calibrated noise times a factor: this
stream's own normal level (learned in its first seconds from successive innovation differences,
then tracked slowly; or given in the filter settings), raised while a burst lasts (NOISY). When the
lock-in's filter is known (time constant and order, from recording metadata or the filter settings),
correlated noise is handled by its equivalent-bandwidth factor kappa and the lock-in's group delay is
removed from the output time, so an estimate's t is the time of the field it describes.

Time. A step backwards, a source restart (Sample.restarted), a non-finite time or a gap longer than
max_gap_s restarts the track from the initiator (REACQUIRED, with the reason in `resets`); a repeated
timestamp is counted and not fused again.

The filter itself runs compiled (estimator/filter_core.py); this module prepares samples, owns the
state and calls the initiator when the core asks for a (re)start.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Iterator, Protocol

import numpy as np

from fieldvane.estimator import chi_square, filter_core as core, prepare_core
from fieldvane.estimator.blind import median_bound_deg
from fieldvane.estimator.estimate import ESTIMATE_COLUMNS, Estimate
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.flags import EstimateFlag as F
from fieldvane.estimator.lockin_noise import (autocorrelation, correlation_factor, group_delay_s,
                                              second_difference_variance)
from fieldvane.estimator.magnitude import DISAGREE_SIGMAS
from fieldvane.estimator.magnitude_knots import MagnitudeKnots, evaluated_per_sample
from fieldvane.estimator.median import median
from fieldvane.estimator.response import to_real
from fieldvane.estimator.samples import Sample, SampleBlock, channel_probe
from fieldvane.estimator.sphere import angle_between, tangent_basis
from fieldvane.estimator.tracker_model import StateLayout, TrackerModel
from fieldvane.kernels import bind

if TYPE_CHECKING:                                   # (importing it would load the fitting code at start-up)
    from fieldvane.estimator.calibration import Calibration

_DISAGREE, _OUTSIDE, _BAD, _LOW = int(F.MAGNITUDE_DISAGREE), int(F.OUTSIDE_CALIBRATION), int(F.BAD_INPUT), int(
    F.LOW_SIGNAL)
LONG_RING = 256         # slow noise baseline: median of this many values (raw while learning, then levels)
PROBE_LOW_MIN_POWER = 25.0  # judge a probe's light only where its predicted signal power is 25x its noise


class Initiator(Protocol):
    """Acquisition from one sample: returns (u, cov) or None when it cannot decide.

    u: unit field direction (3,), sensor frame. cov: (2, 2) covariance in rad^2 of the direction
    error expressed in the basis `sphere.tangent_basis(u)` (the project's chart convention).
    b_nT: the fused field magnitude of the sample (nT).
    """

    def __call__(self, sample: Sample, b_nT: float) -> tuple[np.ndarray, np.ndarray] | None: ...


@dataclass(frozen=True)
class ResetRecord:
    """One (re)acquisition: time (s), why ('start', 'gated', 'nis', 'gap', 'fault', 'sensor_restart',
    'time_backwards', 'bad_time'), jump of the direction (deg, nan at the first start)."""

    t: float
    reason: str
    jump_deg: float


@dataclass
class TrackerCounters:
    """Running counts of what the tracker did with its samples (the compiled core's counters by name)."""

    samples: int = 0
    fused: int = 0
    gated: int = 0
    bad_input: int = 0
    coasted: int = 0
    acquisitions: int = 0           # including the first
    initiator_failures: int = 0     # the initiator returned nothing usable
    lost_gated: int = 0             # lost after consecutive gated samples
    lost_nis: int = 0               # lost on the NIS moving average
    gaps: int = 0                   # restarts after a time gap
    covariance_faults: int = 0
    restarts: int = 0               # the source said it restarted (sequence reset)
    time_backwards: int = 0         # time stepped backwards: track restarted
    bad_times: int = 0              # non-finite timestamps
    duplicate_times: int = 0        # a timestamp equal to the previous one: not fused again
    probe_rejections: int = 0       # samples fused without one probe that disagreed with the others
    probe_resets: int = 0           # a probe's gain state restarted from the data
    probe_missing: int = 0          # samples lacking at least one calibrated probe
    probe_low: int = 0              # probe-samples left out for low light

    def as_dict(self) -> dict[str, int]:
        """Return the counters as a plain dict (name -> count)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


assert tuple(f.name for f in fields(TrackerCounters)) == core.COUNTER_NAMES


@dataclass
class TrackRecord:
    """Per-sample tracker output as arrays (the fast path): u (N, 3) sensor frame, angles in degrees.

    t is the time of the field each estimate describes (the sample time minus the lock-in's group
    delay when the lock-in filter is known).
    """

    t: np.ndarray
    u: np.ndarray
    b_nT: np.ndarray
    sigma_deg: np.ndarray
    flags: np.ndarray
    nis: np.ndarray
    nis_dof: np.ndarray
    b_a_nT: np.ndarray
    b_b_nT: np.ndarray
    bound_deg: np.ndarray
    channel_readouts: dict[str, np.ndarray] = field(default_factory=dict)
    noise_scale: np.ndarray | None = None      # factor on the calibrated noise std (noisiest probe)
    probes_used: np.ndarray | None = None      # bitmask of the probes fused (1 = probe 1, 2 = probe 2)
    loglik: np.ndarray | None = None           # innovation log-likelihood of each fused or gated sample
    sigma_b_nT: np.ndarray | None = None       # 1-sigma of b_nT (calibrated magnitude model), nT

    def __len__(self) -> int:
        return int(self.t.shape[0])

    @classmethod
    def concatenate(cls, records: list[TrackRecord]) -> TrackRecord:
        """Return one TrackRecord of consecutive records (the same fields present in each)."""
        if len(records) == 1:
            return records[0]
        if not records:
            raise ValueError("no records to concatenate")
        values = {}
        for f in fields(cls):
            parts = [getattr(r, f.name) for r in records]
            if f.name == "channel_readouts":
                values[f.name] = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
            else:
                values[f.name] = None if parts[0] is None else np.concatenate(parts)
        return cls(**values)

    def extra_columns(self) -> dict[str, np.ndarray]:
        """Return the extra estimate columns in their written order (name -> (N,) array)."""
        cols = {"nis": self.nis, "nis_dof": self.nis_dof, "b_a_nT": self.b_a_nT, "b_b_nT": self.b_b_nT,
                "bound_deg": self.bound_deg}
        if self.sigma_b_nT is not None:
            cols["sigma_b_nT"] = self.sigma_b_nT
        if self.noise_scale is not None:
            cols["noise_scale"] = self.noise_scale
        if self.probes_used is not None:
            cols["probes_used"] = self.probes_used
        cols.update(self.channel_readouts)
        return cols

    def estimates(self) -> list[Estimate]:
        """Return the records as Estimate objects (extras: nis, nis_dof, b_a_nT, b_b_nT, bound_deg, ...)."""
        cols = self.extra_columns()
        ints = {"nis_dof", "probes_used"}
        names = list(cols)
        values = np.column_stack([cols[k] for k in names]).tolist() if names else [[]] * len(self)
        out = []
        for i in range(len(self)):
            extras = dict(zip(names, values[i]))
            for k in ints & extras.keys():
                extras[k] = int(extras[k])
            out.append(Estimate(float(self.t[i]), self.u[i].copy(), float(self.b_nT[i]), float(self.sigma_deg[i]),
                                int(self.flags[i]), extras))
        return out


def channel_readouts(z: np.ndarray, channels) -> dict[str, np.ndarray]:
    """Return the familiar readouts per sample: phase_<ch>_deg and amplitude ratios amp_<c1>_<c2>."""
    z = np.atleast_2d(np.asarray(z, complex))
    out = {f"phase_{c}_deg": np.degrees(np.angle(z[:, k])) for k, c in enumerate(channels)}
    amp = np.abs(z)
    pairs = [(f"{p}a", f"{p}b") for p in sorted({ch[0] for ch in channels})]
    pairs += [(f"1{pump}", f"2{pump}") for pump in "ab"]
    with np.errstate(divide="ignore", invalid="ignore"):
        for c1, c2 in pairs:
            if c1 in channels and c2 in channels:
                out[f"amp_{c1}_{c2}"] = amp[:, channels.index(c1)] / amp[:, channels.index(c2)]
    return out


def rate_coupling(e1, e2) -> np.ndarray:
    """Return B (2, 3): d(direction error in basis e1, e2)/dt = B @ (angular-velocity error), from u' = w x u."""
    return np.array((tuple(e2), tuple(-c for c in e1)))


def initial_covariance_diagonal(settings: FilterSettings, layout: StateLayout) -> np.ndarray:
    """Return the prior variances of the non-direction states at first acquisition (rate, drifts)."""
    v = np.zeros(layout.size)
    v[layout.rate] = math.radians(settings.initial_rate_std_deg_s) ** 2
    v[layout.gain] = settings.initial_gain_std ** 2
    v[layout.phase] = math.radians(settings.initial_phase_std_deg) ** 2
    return v


def chi2_quantile(probability: float, dof) -> np.ndarray:
    """Return chi-square quantiles (dimensionless) at `probability` for degrees of freedom dof (array)."""
    return np.array([chi_square.chi2_quantile(probability, float(k)) for k in np.atleast_1d(dof)])


def gate_thresholds(settings: FilterSettings, n_meas: int) -> np.ndarray:
    """Return chi-square gate limits indexed by degrees of freedom 0..n_meas (index 0 unused: inf)."""
    return np.concatenate([[np.inf], chi2_quantile(settings.gate_probability, np.arange(1, n_meas + 1))])


# The columns of Tracker.step_rows' two matrices (filter_core.record_rows writes them), and the extra
# columns' written order (TrackRecord.extra_columns without channel readouts).
ROW_FLOAT_COLUMNS = ESTIMATE_COLUMNS[:-1] + ("nis", "b_a_nT", "b_b_nT", "bound_deg", "sigma_b_nT", "noise_scale")
ROW_INT_COLUMNS = ("flags", "nis_dof", "probes_used")
_DISAGREE_BIT = int(F.MAGNITUDE_DISAGREE)
ROW_EXTRAS = ("nis", "nis_dof", "b_a_nT", "b_b_nT", "bound_deg", "sigma_b_nT", "noise_scale", "probes_used")


@dataclass
class PreparedInput:
    """Samples checked and converted once, vectorized, for the compiled core."""

    t: np.ndarray        # (N,) s
    zw: np.ndarray       # (N, 2C) whitened X/sigma, Y/sigma in calibration channel order (nan: missing)
    b_nT: np.ndarray     # (N,) |B| used, nT (nan: none usable)
    per_isotope_nT: np.ndarray  # (N, 2)
    flags: np.ndarray    # (N,) input flags: BAD_INPUT, MAGNITUDE_DISAGREE, OUTSIDE_CALIBRATION, LOW_SIGNAL
    segment: np.ndarray  # (N,) magnitude segment of the model (-1: no |B|)
    seg_t: np.ndarray    # (N,) position inside it (log |B|)
    restarted: np.ndarray  # (N,) 1 where the source restarted before the sample
    model_error: np.ndarray  # (N,) calibration model-error variance ratio at this |B|
    z: np.ndarray        # (N, C) complex, calibration channel order
    f_hz: np.ndarray     # (N, 2) Hz, the isotopes' Larmor frequencies as given


class Tracker:
    """Error-state EKF on the sphere: step(sample) -> Estimate, run_arrays(block) -> TrackRecord."""

    def __init__(self, calibration: Calibration, settings: FilterSettings | None, initiator: Initiator,
                 report_channels: bool = False, sample_rate_hz: float | None = None,
                 model: TrackerModel | None = None):
        if not callable(initiator):
            raise ValueError("the tracker needs an initiator (sample, b_nT) -> (u, cov) | None to acquire")
        s = self.settings = settings if settings is not None else FilterSettings()
        self.calibration = calibration
        self.initiator = initiator
        self.report_channels = report_channels
        # A model built for this calibration may be shared between trackers (the tuner runs many).
        model = self.model = model if model is not None else TrackerModel(calibration.model, 1.0)
        self.channels = model.channels
        lay = self.layout = StateLayout(model.n_probes, model.n_channels, s.gain_drift, s.phase_drift)
        self._gammas = tuple(float(g) for g in calibration.gammas_hz_per_nt)
        probes = sorted({channel_probe(c) for c in self.channels})
        self.probes = tuple(probes)
        lo, hi = calibration.magnitude_range_nT
        _, median_amp = model.sphere_medians(math.sqrt(lo * hi))
        # BLIND: the one rule of estimator/blind.py (the map and the snapshot inverse use it too).
        # The median at the noise the filter whitens with (calibrated noise times the settings' factors), so
        # BLIND stays relative whatever those factors are; the learned level of the moment scales it in the core.
        noise_std = calibration.model.noise_std * self._channel_scales()
        cache = model.__dict__.setdefault("_blind_median_deg", {})     # shared by trackers of one model
        key = (math.sqrt(lo * hi), tuple(np.round(noise_std, 15)))
        if key not in cache:
            cache[key] = median_bound_deg(calibration.model, key[0], noise_std=noise_std)
        self.median_bound_deg = cache[key]
        median_bound = math.radians(self.median_bound_deg)
        self._low_amp = s.low_signal_fraction * median_amp
        limits = np.zeros(prepare_core.N_LIMITS)
        limits[prepare_core.L_TOLERANCE] = s.magnitude_tolerance
        limits[prepare_core.L_RANGE_LO], limits[prepare_core.L_RANGE_HI] = lo, hi
        limits[prepare_core.L_MARGIN] = s.calibration_margin
        limits[prepare_core.L_LOW_AMP] = self._low_amp
        limits[prepare_core.L_SEG_LO], limits[prepare_core.L_SEG_HI] = model.range_nT
        limits[prepare_core.L_MERR_CAP] = s.model_error_cap_ratio
        self._prepare_limits = limits
        self._gammas_array = np.array(self._gammas)
        self._sigma = model.sigma * np.repeat(self._channel_scales(), 2)
        comp_probe = np.repeat(model.channel_probe_index, 2)
        self._comp_probe = comp_probe
        self._group_sizes = [int(np.sum(comp_probe == p)) for p in range(model.n_probes)]
        cfg = np.zeros(core.N_CFG)
        cfg[core.C_ARW] = math.radians(s.angle_random_walk_deg_rt_s) ** 2
        cfg[core.C_RRW] = math.radians(s.rate_random_walk_deg_s_rt_s) ** 2
        cfg[core.C_QGAIN] = s.gain_drift_per_rt_s ** 2
        cfg[core.C_QPHASE] = math.radians(s.phase_drift_deg_rt_s) ** 2
        init = initial_covariance_diagonal(s, lay)
        self._init_var = init
        cfg[core.C_INIT_RATE] = init[lay.rate.start]
        cfg[core.C_INIT_GAIN] = s.initial_gain_std ** 2
        cfg[core.C_INIT_PHASE] = math.radians(s.initial_phase_std_deg) ** 2
        cfg[core.C_NIS_ALPHA] = 1.0 / s.nis_average_samples
        cfg[core.C_NIS_LIMIT] = s.nis_average_limit
        cfg[core.C_MAX_GAP] = s.max_gap_s
        cfg[core.C_BLIND_REL2] = (s.blind_factor * median_bound) ** 2
        cfg[core.C_BLIND_ABS2] = math.radians(s.blind_threshold_deg) ** 2 if math.isfinite(s.blind_threshold_deg) \
            else math.inf
        cfg[core.C_NOISE_THR] = s.adaptive_noise_threshold
        cfg[core.C_NOISE_MAX] = s.adaptive_noise_max_scale ** 2
        cfg[core.C_KAPPA] = 1.0
        given = s.noise_baseline_ratio
        cfg[core.C_LEARN_S] = s.noise_learn_s if (given == 0 and s.adaptive_noise) else 0.0
        cfg[core.C_STRIDE_S] = s.noise_baseline_window_s / LONG_RING if given == 0 else math.inf
        cfg[core.C_BASELINE0] = given
        cfg[core.C_LOW_FRAC2] = s.low_signal_fraction ** 2
        cfg[core.C_LOW_MIN_POWER] = PROBE_LOW_MIN_POWER
        cfg[core.C_LOW_ALPHA] = 0.05
        cfg[core.C_MODEL_FLAG] = s.model_error_flag_ratio
        cfg[core.C_T_DUP] = 0.0
        icfg = np.zeros(core.N_ICFG, np.int64)
        icfg[core.I_NPROBES] = model.n_probes
        icfg[core.I_NCH] = model.n_channels
        icfg[core.I_NGAIN] = lay.n_gain
        icfg[core.I_NPHASE] = lay.n_phase
        icfg[core.I_WINDOW] = s.adaptive_noise_window_samples
        icfg[core.I_LONG] = LONG_RING
        icfg[core.I_LOST_AFTER] = s.lost_after_gated
        icfg[core.I_PROBE_RESET] = s.probe_reset_after
        icfg[core.I_DEGREE] = model.degree
        icfg[core.I_NPOW] = model.n_powers
        icfg[core.I_NMONO] = model.n_monomials
        icfg[core.I_ADAPTIVE] = 1 if s.adaptive_noise else 0
        icfg[core.I_PROBE_REJECTION] = 1 if s.probe_rejection else 0
        w_table = model.weights_table(self._sigma)
        self._arrays = core.FilterArrays(cfg, icfg, w_table, model.exponents, comp_probe, model.channel_probe_index,
                                         np.ones(model.n_probes), gate_thresholds(s, model.n_meas), self._sigma)
        self._sigma_log = np.log(self._sigma ** 2)
        self._rate_known = False
        self.sample_rate_hz = math.nan
        self.delay_s = group_delay_s(s.lockin_time_constant_s, s.lockin_filter_order)
        self._set_sample_rate(sample_rate_hz)
        self._channel_index: dict[tuple, np.ndarray | None] = {}
        self.resets: deque[ResetRecord] = deque(maxlen=10000)

    # ----------------------------------------------------------------------------------- settings
    def _channel_scales(self) -> np.ndarray:
        """Return the per-channel factor on the calibrated noise std (settings: one scale and per-channel ones)."""
        s = self.settings
        scales = np.full(len(self.channels), s.measurement_noise_scale)
        for name, value in s.channel_noise_scale:
            if name in self.channels:
                scales[self.channels.index(name)] *= value
        return scales

    def _set_sample_rate(self, rate_hz: float | None) -> None:
        """Set the correlation factor kappa and the noise-difference normalizers for samples at rate_hz (Hz)."""
        s = self.settings
        tau, order = s.lockin_time_constant_s, s.lockin_filter_order
        if rate_hz is None or not (rate_hz > 0 and math.isfinite(rate_hz)):
            rho1 = rho2 = 0.0
            kappa = 1.0
        else:
            self._rate_known = True
            self.sample_rate_hz = float(rate_hz)
            if tau > 0:
                rho1, rho2 = (float(v) for v in autocorrelation(np.array([1.0, 2.0]) / rate_hz, tau, order))
                kappa = correlation_factor(rate_hz, tau, order)
            else:
                rho1 = rho2 = 0.0
                kappa = 1.0
        self.kappa = kappa
        a = self._arrays
        a.cfg[core.C_KAPPA] = kappa
        # A noise value is |z_k - 2 z_(k-1) + z_(k-2)|^2 over a probe's m components: each component's variance
        # is (6 - 8 rho1 + 2 rho2) sigma^2, so the sum over its median is median-unbiased for the variance ratio.
        second = second_difference_variance(rho1, rho2)
        a.normalizers[:] = [1.0 / (second * chi_square.chi2_quantile(0.5, m)) for m in self._group_sizes]

    # ----------------------------------------------------------------------------------- state views
    @property
    def counters(self) -> TrackerCounters:
        """Return the running counts (a snapshot)."""
        return TrackerCounters(*(int(v) for v in self._arrays.counters))

    @property
    def direction(self) -> np.ndarray:
        """Return the current unit field direction (3,), sensor frame (nan before acquisition)."""
        return self._arrays.fstate[core.S_U:core.S_U + 3].copy()

    @property
    def covariance(self) -> np.ndarray:
        """Return a copy of the error-state covariance (see `layout` for the named slices)."""
        return self._arrays.p.copy()

    @property
    def tangent_basis(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the (e1, e2) tangent basis the direction covariance is expressed in (sensor frame)."""
        fs = self._arrays.fstate
        return fs[core.S_E1:core.S_E1 + 3].copy(), fs[core.S_E2:core.S_E2 + 3].copy()

    @property
    def rate_deg_s(self) -> np.ndarray:
        """Return the estimated angular velocity of the field direction (3,), sensor frame, deg/s."""
        return np.degrees(self._arrays.x[self.layout.rate])

    @property
    def drifts(self) -> dict[str, np.ndarray]:
        """Return the estimated drifts: log-gain per probe and phase offset per channel (deg)."""
        x = self._arrays.x
        return {"gain": x[self.layout.gain].copy(), "phase_deg": np.degrees(x[self.layout.phase])}

    @property
    def noise_scales(self) -> np.ndarray:
        """Return each probe's factor on its calibrated noise std now (dimensionless, 1 = calibrated)."""
        return np.sqrt(self._arrays.ratio)

    @property
    def noise_baseline(self) -> np.ndarray:
        """Return each probe's learned normal noise std of this stream over the calibrated one (dimensionless)."""
        return np.sqrt(self._arrays.baseline)

    def _set_covariance(self, p: np.ndarray) -> None:
        """Replace the error-state covariance (n, n) (for tests and tools that restore a saved state)."""
        self._arrays.p[:] = np.asarray(p, float)

    # ----------------------------------------------------------------------------------- inputs
    def _columns(self, channels: tuple) -> np.ndarray | None:
        """Return, per calibrated channel, its column in the sample (-1 when absent; None if identical)."""
        if channels == self.channels:
            return None
        if channels not in self._channel_index:
            cols = np.array([channels.index(c) if c in channels else -1 for c in self.channels])
            if np.all(cols < 0):
                raise ValueError(f"the samples hold none of the calibrated channels {', '.join(self.channels)} "
                                 f"(they have {', '.join(channels) or 'none'})")
            self._channel_index[channels] = cols
        return self._channel_index[channels]

    def calibrated_z(self, z: np.ndarray, channels) -> np.ndarray:
        """Return lock-in values (N, C) complex V in calibration channel order; nan for absent channels."""
        channels = tuple(channels)
        z = np.atleast_2d(np.asarray(z, complex))
        if z.shape[1] != len(channels):
            raise ValueError(f"samples have {z.shape[1]} lock-in values for {len(channels)} channel names")
        cols = self._columns(channels)
        if cols is None:
            return z
        out = np.full((z.shape[0], len(self.channels)), complex(np.nan, np.nan))
        have = cols >= 0
        out[:, have] = z[:, cols[have]]
        return out

    def prepare(self, t, f_hz, z, channels, restarted=None) -> PreparedInput:
        """Return samples checked and converted for the core: t (N,) s, f (N, 2) Hz, z (N, C') complex V."""
        z = self.calibrated_z(z, channels)
        t = np.ascontiguousarray(t, float)           # a column of a larger table arrives strided
        f = np.ascontiguousarray(np.atleast_2d(np.asarray(f_hz, float)))
        # complex128's own layout is to_real's [X, Y, ...] per row: a C-ordered z is viewed, not copied
        zr = z.view(np.float64) if z.flags.c_contiguous else to_real(z)
        n = len(zr)
        b, per, flags = np.empty(n), np.empty((n, 2)), np.empty(n, np.int64)
        seg, seg_t, merr, zw = np.empty(n, np.int64), np.empty(n), np.empty(n), np.empty(zr.shape)
        prepare_rows = self.__dict__.get("_bound_prepare")
        if prepare_rows is None:      # the tracker's constants, checked once
            prepare_rows = self._bound_prepare = bind(prepare_core.prepare_rows, self._gammas_array,
                                                      self._prepare_limits, self._sigma, self.model.starts,
                                                      *self._model_error_arrays(), trusted=True)
        prepare_rows(f, zr, b, per, flags, seg_t, seg, merr, zw)
        restart = np.zeros(n, np.int64) if restarted is None else np.ascontiguousarray(restarted, np.int64)
        return PreparedInput(t, zw, b, per, flags, seg, seg_t, restart, merr, z, f)

    def _model_error_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the model-error table (log|B| grid, worst-channel ratio), built at first use (the calibration's
        own evaluation is far too slow per live sample); two empty arrays when the calibration has none."""
        table = self.__dict__.get("_merr_table")
        if table is None:
            table = self._merr_table = self._model_error_table() or (_EMPTY, _EMPTY)
        return table

    def _model_error_table(self):
        """Return (log|B| grid, worst-channel ratio) over a quarter of the calibrated range to four times it."""
        ratio_fn = getattr(self.calibration, "model_error_ratio", None)
        if ratio_fn is None:
            return None
        lo, hi = self.calibration.magnitude_range_nT
        grid = np.linspace(math.log(lo / 4.0), math.log(hi * 4.0), MODEL_ERROR_GRID)
        with np.errstate(invalid="ignore"):
            values = np.max(np.atleast_2d(ratio_fn(np.exp(grid))), axis=1)
        cap = self.settings.model_error_cap_ratio
        # Where the calibration cannot say (inf: far outside its magnitudes) the cap applies, flagged.
        values = np.where(np.isnan(values), cap, np.minimum(values, cap))
        if not np.any(values > 0):
            return None
        return grid, values

    # ----------------------------------------------------------------------------------- running
    def run_arrays(self, block: SampleBlock, chunk: int = 65536) -> TrackRecord:
        """Return the estimates of a whole block as arrays (the fast replay path; memory bounded per chunk)."""
        pieces = list(self.run_pieces(block, chunk))
        return TrackRecord.concatenate(pieces) if pieces else BlockRun(self, block).record(0, 0)

    def run_pieces(self, block: SampleBlock, piece: int = 8192) -> Iterator[TrackRecord]:
        """Yield the estimates of a block in order, each stretch as soon as it is final; together they equal
        run_arrays(block) bit for bit. The filter runs `piece` samples at a time; a sample's |B| waits for the
        magnitude model's knots on either side of it (estimator/magnitude_knots.py)."""
        run = BlockRun(self, block)
        piece = max(1, int(piece))
        for start in range(0, run.n, piece):
            stop = min(start + piece, run.n)
            run.filter(start, stop)
            lo, hi = run.final_through(stop)
            if hi > lo:
                yield run.record(lo, hi)

    def run_prepared(self, inp: PreparedInput, sample_at) -> tuple[np.ndarray, np.ndarray]:
        """Return the core's raw outputs (fout (N, N_FOUT), iout (N, N_IOUT)) for prepared samples.

        sample_at(i) returns sample i as a Sample (asked only at (re)acquisitions).
        """
        n = len(inp.t)
        if not self._rate_known and n > 1:
            self._set_sample_rate(_rate_from_times(inp.t))
        fout = np.empty((n, core.N_FOUT))
        iout = np.zeros((n, core.N_IOUT), np.int64)
        self._run_prepared(inp, fout, iout, sample_at)
        return fout, iout

    def _record(self, t, fout, iout, b, per, readouts, f_hz, knots=None, lo=0, own=False) -> TrackRecord:
        """Return the TrackRecord of core outputs (degrees, delay removed) with |B| from the magnitude model (samples
        lo.. of the block `knots` belongs to; a block of their own without). own: fout and iout are this record's
        alone (step_record's), so its columns are views of them rather than copies."""
        if not own:
            fout, iout = fout.copy(), iout.copy()
        with np.errstate(invalid="ignore"):
            bound_deg = np.degrees(np.sqrt(fout[:, core.O_BOUND2]))
        u = fout[:, core.O_UX:core.O_UZ + 1].copy()         # (contiguous: the kernels take it)
        sigma = fout[:, core.O_SIGMA]
        f_hz = np.atleast_2d(np.asarray(f_hz, float))
        b, per, sigma_b, flags = self._magnitude(f_hz, u, sigma, b, per, iout[:, core.J_FLAGS], knots, lo)
        return TrackRecord(t - self.delay_s, u, b, sigma, flags, fout[:, core.O_NIS], iout[:, core.J_DOF],
                           per[:, 0].copy(), per[:, 1].copy(), bound_deg, readouts, fout[:, core.O_NOISE],
                           iout[:, core.J_PROBES], fout[:, core.O_LOGLIK], sigma_b)

    def _knots(self, n: int) -> MagnitudeKnots | None:
        """Return the magnitude knots of a block of n samples, or None without a calibrated magnitude model."""
        mm = getattr(self.calibration, "magnitude_model", None)
        return None if mm is None or n == 0 else MagnitudeKnots(mm, self._gammas_array, n)

    def _magnitude(self, f_hz, u, sigma_deg, b, per, flags, knots=None, lo=0):
        """Return (|B| nT, per isotope (N, 2) nT, sigma_b_nT, flags): corrected by the calibration's magnitude
        model (exchange pull, light shift, heading error) at the tracked direction, with MAGNITUDE_DISAGREE judged
        against the corrected isotopes' own uncertainty; without a model, f / gamma and no sigma. The samples are
        lo.. of the block `knots` was advanced through, or a block of their own."""
        n = len(b)
        if knots is None:
            knots = self._knots(n)
            if knots is None:
                return b, per, np.full(n, np.nan), flags
            knots.advance(n, f_hz, u, sigma_deg)
        return knots.apply(lo, f_hz, u, sigma_deg, b, per, flags, self.settings.magnitude_tolerance)

    def _run_prepared(self, inp: PreparedInput, fout: np.ndarray, iout: np.ndarray, sample_at) -> None:
        """Run the core over prepared samples, asking the initiator whenever the core stops for a (re)start."""
        run_filter = self.__dict__.get("_bound_filter")
        if run_filter is None:        # the filter's own arrays, checked once (the live path calls this per batch)
            run_filter = self._bound_filter = bind(core.run_filter, *self._arrays.kernel_args(), trusted=True)
        i, n = 0, len(inp.t)
        pending, answer = 0, (False, _NO_U, _NO_U, _NO_COV)
        while True:
            i = run_filter(inp.t, inp.zw, inp.segment, inp.seg_t, inp.flags, inp.restarted, inp.model_error,
                           self._sigma_log, fout, iout, i, n, pending, *answer, self._init_var)
            if i >= n:
                break
            pending, answer = 1, self._initiate(i, inp, iout, sample_at)

    def _initiate(self, i: int, inp: PreparedInput, iout, sample_at) -> tuple:
        """Ask the initiator for sample i (drifts removed, unused probes blanked); return the core's acquisition
        arguments (ok, u (3,), e1 (3,), cov (2, 2)) and record the reset when it answered."""
        a = self._arrays
        reason = core.REASON_NAMES[int(a.istate[core.K_LOST])] or "start"
        was = a.fstate[core.S_U:core.S_U + 3].copy() if a.istate[core.K_ACQUIRED] else None
        sample = sample_at(i)
        z = inp.z[i].copy()
        used = int(iout[i, core.J_PROBES])
        for k, c in enumerate(self.channels):
            pi = self.model.channel_probe_index[k]
            if not used & (1 << pi) or a.probe_state[pi, 1]:
                z[k] = complex(np.nan, np.nan)
            elif self.layout.n_gain or self.layout.n_phase:
                g = a.x[2 + pi] if self.layout.n_gain else 0.0
                ph = a.x[self.layout.phase.start + k] if self.layout.n_phase else 0.0
                z[k] /= np.exp(g + 1j * ph)
        probe_sample = Sample(float(inp.t[i]), sample.f_a, sample.f_b, z, self.channels, sample.status,
                              getattr(sample, "restarted", False))
        result = self.initiator(probe_sample, float(inp.b_nT[i])) if math.isfinite(inp.b_nT[i]) else None
        u = cov = None
        if result is not None:
            u, cov = (np.asarray(v, float) for v in result)
            norm = float(np.linalg.norm(u)) if u.shape == (3,) else math.nan
            if (cov.shape != (2, 2) or not np.all(np.isfinite(cov)) or not math.isfinite(norm) or norm == 0
                    or cov[0, 0] <= 0 or cov[0, 0] * cov[1, 1] - cov[0, 1] * cov[1, 0] <= 0):
                u = None
            else:
                u = u / norm
        if u is None:
            return False, _NO_U, _NO_U, _NO_COV
        e1, _ = tangent_basis(u)
        jump = math.degrees(float(angle_between(was, u))) if was is not None else math.nan
        self.resets.append(ResetRecord(float(inp.t[i]) - self.delay_s, reason, jump))
        return True, np.ascontiguousarray(u, float), np.ascontiguousarray(e1, float), np.ascontiguousarray(cov, float)

    def step(self, sample: Sample) -> Estimate:
        """Return the estimate after one sample (u sensor frame, |B| nT, sigma deg, flags, extras)."""
        record = self.step_record([sample])
        return record.estimates()[0]

    def step_record(self, samples) -> TrackRecord:
        """Return the TrackRecord of a few live samples, Samples or a SampleBlock (one core call; channel sets may
        differ between calls)."""
        inp, f, fout, iout = self._step(samples)
        readouts = channel_readouts(inp.z, self.channels) if self.report_channels else {}
        return self._record(inp.t, fout, iout, inp.b_nT, inp.per_isotope_nT, readouts, f, own=True)

    def step_rows(self, samples, spare_columns: int = 0) -> tuple[np.ndarray, np.ndarray]:
        """Return a few live samples' estimates as rows (the live loggers' batch): floats (N, 15 + spare_columns)
        and ints (N, 3), the columns ROW_FLOAT_COLUMNS and ROW_INT_COLUMNS name (u sensor frame, |B| nT, sigma
        deg), the spare ones left for the caller; the values step_record gives, bit for bit (without channel
        readouts: step_record has them)."""
        inp, f, fout, iout = self._step(samples)
        n = len(inp.t)
        b, per, sigma_b = inp.b_nT, inp.per_isotope_nT, np.empty(n)
        mm = getattr(self.calibration, "magnitude_model", None)
        if mm is not None and n and evaluated_per_sample(n):     # the usual live batch: one compiled call
            mm.row_corrector(of_core=True)(f, fout, iout, self.settings.magnitude_tolerance, DISAGREE_SIGMAS,
                                           _DISAGREE_BIT, b, per, sigma_b)
        else:
            u = fout[:, core.O_UX:core.O_UZ + 1].copy()
            b, per, sigma_b, iout[:, core.J_FLAGS] = self._magnitude(f, u, fout[:, core.O_SIGMA], b, per,
                                                                      iout[:, core.J_FLAGS])
        floats, ints = np.empty((n, core.N_ROW_FLOATS + spare_columns)), np.empty((n, core.N_ROW_INTS), np.int64)
        self._bound_rows(fout, iout, inp.t, self.delay_s, b, per, sigma_b, floats, ints)
        return floats, ints

    def _step(self, samples) -> tuple[PreparedInput, np.ndarray, np.ndarray, np.ndarray]:
        """Run the core over a few live samples; return (prepared input, f (N, 2) Hz, fout, iout) of this batch."""
        if isinstance(samples, SampleBlock):
            t, f, z, channels, restarted = samples.t, samples.f, samples.z, samples.channels, samples.restarted
            sample_at = samples.sample
        else:
            samples = list(samples)
            t = np.array([float(s.t) for s in samples])
            f = np.array([[float(s.f_a), float(s.f_b)] for s in samples])
            channels = tuple(samples[0].channels)
            if all(tuple(s.channels) == channels for s in samples):
                z = np.array([np.asarray(s.z, complex) for s in samples])
            else:
                z = np.vstack([self.calibrated_z(np.asarray(s.z, complex)[None], s.channels) for s in samples])
                channels = self.channels
            restarted = np.array([bool(getattr(s, "restarted", False)) for s in samples])
            sample_at = samples.__getitem__
        if not self._rate_known:
            self._note_times(t)
        inp = self.prepare(t, f, z, channels, restarted)
        n = len(inp.t)
        fout = np.empty((n, core.N_FOUT))
        iout = np.zeros((n, core.N_IOUT), np.int64)
        self._run_prepared(inp, fout, iout, sample_at)
        return inp, inp.f_hz, fout, iout

    @property
    def _bound_rows(self):
        bound = self.__dict__.get("_rows_kernel")
        if bound is None:
            bound = self._rows_kernel = bind(core.record_rows, trusted=True)
        return bound

    _first_times: list

    def _note_times(self, t: np.ndarray) -> None:
        """Learn the sample rate from the first live timestamps (used for the lock-in noise correlation)."""
        seen = getattr(self, "_first_times", None)
        if seen is None:
            seen = self._first_times = []
        seen.extend(float(v) for v in t[:64])
        if len(seen) >= 2:
            self._set_sample_rate(_rate_from_times(np.array(seen)))
            if len(seen) < 16:
                self._rate_known = False      # refine once more samples have arrived

    def run(self, block: SampleBlock) -> list[Estimate]:
        """Return one Estimate per sample of the block (see run_arrays for the array form)."""
        return self.run_arrays(block).estimates()


class BlockRun:
    """One block through a tracker's filter, piece by piece, in steps other threads may take (replay's pipeline):

    - prepare(start, stop): the filter's input for samples start..stop-1 (any thread, any time);
    - filter(start, stop, prepared): the filter over them, in order, one thread (it holds the tracker's state);
    - final_through(stop): after the filter has passed stop, the stretch (lo, hi) of samples whose |B| has become
      final (the magnitude knots around them are known); called in order, one thread;
    - record(lo, hi): that stretch's TrackRecord (any thread, once final_through handed it out).

    Tracker.run_pieces takes the steps in turn; whatever thread takes them, the estimates are the same.
    """

    def __init__(self, tracker: Tracker, block: SampleBlock):
        self.tracker, self.block = tracker, block
        n = self.n = len(block)
        if not tracker._rate_known and n > 1:
            tracker._set_sample_rate(_rate_from_times(block.t))
        self.fout = np.empty((n, core.N_FOUT))
        self.iout = np.zeros((n, core.N_IOUT), np.int64)
        self.b_out, self.per_out = np.empty(n), np.empty((n, 2))
        self.t = np.asarray(block.t, float)
        self.f_hz = np.atleast_2d(np.asarray(block.f, float))
        self.knots = tracker._knots(n)
        self.emitted = 0                  # samples handed out by final_through

    def prepare(self, start: int, stop: int) -> PreparedInput:
        """Return the filter's input for samples start..stop-1 of the block."""
        block = self.block
        restarted = getattr(block, "restarted", None)
        return self.tracker.prepare(block.t[start:stop], block.f[start:stop], block.z[start:stop], block.channels,
                                    None if restarted is None else restarted[start:stop])

    def filter(self, start: int, stop: int, prepared: PreparedInput | None = None) -> None:
        """Run the filter over samples start..stop-1 (the next ones), prepared here unless given."""
        inp = self.prepare(start, stop) if prepared is None else prepared
        self.tracker._run_prepared(inp, self.fout[start:stop], self.iout[start:stop],
                                   lambda k, s=start: self.block.sample(s + k))
        self.b_out[start:stop], self.per_out[start:stop] = inp.b_nT, inp.per_isotope_nT

    def final_through(self, stop: int) -> tuple[int, int]:
        """Return the stretch (lo, hi) of samples newly final once the filter has passed stop (lo == hi: none)."""
        if self.knots is None:
            final = stop
        else:
            self.knots.advance(stop, self.f_hz, self.fout[:, core.O_UX:core.O_UZ + 1], self.fout[:, core.O_SIGMA])
            final = self.knots.final()
        lo, self.emitted = self.emitted, max(self.emitted, final)
        return lo, self.emitted

    def record(self, lo: int, hi: int) -> TrackRecord:
        """Return the TrackRecord of samples lo..hi-1 (a stretch final_through handed out)."""
        tracker, part = self.tracker, slice(lo, hi)
        if tracker.report_channels:
            readouts = channel_readouts(tracker.calibrated_z(self.block.z[part], self.block.channels),
                                        tracker.channels)
        else:
            readouts = {}
        return tracker._record(self.t[part], self.fout[part], self.iout[part], self.b_out[part], self.per_out[part],
                               readouts, self.f_hz[part], self.knots, lo)


_NO_U, _NO_COV = np.zeros(3), np.eye(2)          # placeholders of the core's acquisition arguments
_EMPTY = np.zeros(0)                             # no model-error table
MODEL_ERROR_GRID = 2048   # points in log|B| of the model-error table (the calibration's ratio varies smoothly)


def _rate_from_times(t: np.ndarray) -> float | None:
    """Return the sample rate (Hz) from the median positive time step of t (s), or None."""
    t = np.asarray(t, float)
    with np.errstate(invalid="ignore"):
        dt = np.diff(t[np.isfinite(t)])
    dt = dt[dt > 0]
    if dt.size == 0:
        return None
    return 1.0 / median(dt)
