"""Direction tracker: an error-state extended Kalman filter on the unit sphere, fed with lock-in X/Y.

State. The nominal direction u (unit vector, sensor frame) is carried with a tangent basis (e1, e2)
that turns rigidly with u in the prediction (then the direction error obeys d/dt = B dw exactly to
first order, B = rate_coupling(e1, e2)) and is parallel-transported along every correction. The
error state (named slices in StateLayout)
holds the direction error in that basis (2, rad), optional per-probe log-gain and per-channel
phase-offset drifts, and the angular velocity w of the field direction (3, rad/s, sensor frame;
u' = w x u, so a field turning about a fixed axis is followed exactly). After every correction
the direction error is folded into u along a great circle (retraction), the basis is transported
with it and the covariance is mapped by the exact Jacobian of the chart change (Markley 2003,
REFERENCES.md "Estimation"; on the sphere the Jacobi field scales the component perpendicular to
the step by sin(a)/a).

Measurement. All available X/Y channels as one real vector with the calibrated noise (never phases).
The magnitude comes from both Larmor frequencies (fuse_magnitudes). Updates use the information
identity K = P H^T S^-1 = P_o (I + J P_oo)^-1 H^T R^-1 with J = H^T R^-1 H (the filter solves a
system the size of the observed states, never inverts P), Joseph form, symmetrized every step; the
normalized innovation squared (NIS) comes from the same pieces without forming S.

Noise of the moment. With `adaptive_noise` (the default) each probe's R is the calibrated noise
times a factor estimated from successive innovation differences (estimator/noise_level.py): a
noise burst inflates R instead of failing every gate, while a wrong track (a large but steady
innovation) or a single spike leaves the factor at 1, so both are still gated. A (re)acquisition
widens the initiator's covariance by the same factor. The factor is published per sample as the
extra `noise_scale` (std factor of the noisiest probe).

Speed. Without drift states the covariance (5x5) is carried as 15 floats and every step is written
out per block (estimator/tracker_algebra.py); with drift states the same equations run as matrices.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field
from typing import Callable, Protocol

import numpy as np
from filterpy.common import Q_continuous_white_noise
from scipy.stats import chi2

from fieldvane.estimator import tracker_algebra as algebra
from fieldvane.estimator.calibration import Calibration
from fieldvane.estimator.estimate import Estimate
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.flags import EstimateFlag as F
from fieldvane.estimator.magnitude import fuse_magnitudes, magnitudes_from_frequencies
from fieldvane.estimator.noise_level import NoiseLevel, difference_normalizers
from fieldvane.estimator.response import to_real
from fieldvane.estimator.samples import Sample, SampleBlock
from fieldvane.estimator.sphere import angle_between, tangent_basis
from fieldvane.estimator.tracker_model import DIRECTION as D
from fieldvane.estimator.tracker_model import StateLayout, TrackerModel, apply_drifts, drift_jacobian

_TRACKING, _COASTING, _REACQUIRED, _GATED = int(F.TRACKING), int(F.COASTING), int(F.REACQUIRED), int(F.GATED)
_BLIND, _DISAGREE, _LOW, _OUTSIDE = int(F.BLIND), int(F.MAGNITUDE_DISAGREE), int(F.LOW_SIGNAL), int(F.OUTSIDE_CALIBRATION)
_BAD, _FAULT, _NONE = int(F.BAD_INPUT), int(F.COVARIANCE_FAULT), int(F.NO_ESTIMATE)
_NAN3 = (math.nan, math.nan, math.nan)
MIN_CHART_STEP_RAD = 2.5e-3  # below this (0.14 deg) 1 - sin(a)/a < 1.1e-6: the chart-change Jacobian is I


class Initiator(Protocol):
    """Acquisition from one sample: returns (u, cov) or None when it cannot decide.

    u: unit field direction (3,), sensor frame. cov: (2, 2) covariance in rad^2 of the direction
    error expressed in the basis `sphere.tangent_basis(u)` (the project's chart convention).
    b_nT: the fused field magnitude of the sample (nT).
    """

    def __call__(self, sample: Sample, b_nT: float) -> tuple[np.ndarray, np.ndarray] | None: ...


@dataclass(frozen=True)
class ResetRecord:
    """One (re)acquisition: time (s), why ('start', 'gated', 'nis', 'gap', 'fault'), jump (deg, nan at start)."""

    t: float
    reason: str
    jump_deg: float


@dataclass
class TrackerCounters:
    """Running counts of what the tracker did with its samples."""

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


@dataclass
class TrackRecord:
    """Per-sample tracker output as arrays (the fast path): u (N, 3) sensor frame, angles in degrees."""

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
    noise_scale: np.ndarray | None = None      # adaptive factor on the noise std (noisiest probe)

    def __len__(self) -> int:
        return int(self.t.shape[0])

    def estimates(self) -> list[Estimate]:
        """Return the records as Estimate objects (extras: nis, nis_dof, b_a_nT, b_b_nT, bound_deg, noise_scale, ...)."""
        cols = {"nis": self.nis, "nis_dof": self.nis_dof, "b_a_nT": self.b_a_nT, "b_b_nT": self.b_b_nT,
                "bound_deg": self.bound_deg}
        if self.noise_scale is not None:
            cols["noise_scale"] = self.noise_scale
        cols.update(self.channel_readouts)
        names = list(cols)
        values = np.column_stack([cols[k] for k in names]).tolist()
        dof = self.nis_dof.tolist()
        out = []
        for i in range(len(self)):
            extras = dict(zip(names, values[i]))
            extras["nis_dof"] = dof[i]
            out.append(Estimate(float(self.t[i]), self.u[i].copy(), float(self.b_nT[i]), float(self.sigma_deg[i]),
                                int(self.flags[i]), extras))
        return out


def channel_readouts(z: np.ndarray, channels) -> dict[str, np.ndarray]:
    """Return the familiar readouts per sample: phase_<ch> (deg) and amplitude ratios amp_<c1>_<c2>."""
    z = np.atleast_2d(np.asarray(z, complex))
    out = {f"phase_{c}": np.degrees(np.angle(z[:, k])) for k, c in enumerate(channels)}
    amp = np.abs(z)
    pairs = [(f"{p}a", f"{p}b") for p in sorted({ch[0] for ch in channels})]
    pairs += [(f"1{pump}", f"2{pump}") for pump in "ab"]
    with np.errstate(divide="ignore", invalid="ignore"):
        for c1, c2 in pairs:
            if c1 in channels and c2 in channels:
                out[f"amp_{c1}_{c2}"] = amp[:, channels.index(c1)] / amp[:, channels.index(c2)]
    return out


def sample_magnitudes(f_hz: np.ndarray, gammas_hz_per_nt, tolerance: float, calibrated_range_nT,
                      margin: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (|B| (N,) nT or nan, per-isotope |B| (N, 2) nT, flags (N,)) from frequencies (N, 2) Hz.

    Both isotopes good: the fused mean, MAGNITUDE_DISAGREE beyond tolerance. One good: that one,
    with BAD_INPUT. None: nan and BAD_INPUT. OUTSIDE_CALIBRATION outside the widened knot range.
    """
    f_hz = np.atleast_2d(np.asarray(f_hz, float))
    per = magnitudes_from_frequencies(f_hz, gammas_hz_per_nt)
    ok = np.isfinite(per) & (per > 0)
    both = ok[:, 0] & ok[:, 1]
    # Fuse clean placeholders where a frequency is bad; those rows are replaced just below.
    fused, _, disagree = fuse_magnitudes(np.where(ok, f_hz, 1.0), gammas_hz_per_nt, tolerance)
    b = np.where(both, fused, np.where(ok[:, 0], per[:, 0], np.where(ok[:, 1], per[:, 1], np.nan)))
    flags = np.where(both, np.where(disagree, _DISAGREE, 0), _BAD)
    lo, hi = calibrated_range_nT
    valid = both | ok[:, 0] | ok[:, 1]
    known = np.where(valid, b, lo)
    outside = valid & ((known < lo * (1 - margin)) | (known > hi * (1 + margin)))
    return b, per, np.where(outside, flags | _OUTSIDE, flags).astype(np.int64)


def rate_coupling(e1, e2) -> np.ndarray:
    """Return B (2, 3): d(direction error in basis e1, e2)/dt = B @ (angular-velocity error), from u' = w x u."""
    return np.array((tuple(e2), tuple(-c for c in e1)))


def process_noise(settings: FilterSettings, layout: StateLayout, dt: float,
                  coupling: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (F, Q) of the error state over dt seconds for rate coupling B (see rate_coupling); rad, rad/s."""
    q_static, cross = process_noise_static(settings, layout, dt)
    d, r = layout.direction, layout.rate
    f = np.eye(layout.size)
    f[d, r] = dt * coupling
    q = q_static.copy()
    q[d, r] = cross * coupling
    q[r, d] = cross * coupling.T
    return f, q


def process_noise_static(settings: FilterSettings, layout: StateLayout, dt: float) -> tuple[np.ndarray, float]:
    """Return (Q without the direction-rate block, its factor c: Q[direction, rate] = c B) over dt seconds.

    Continuous model: direction error driven by B times the angular-velocity error plus white angle
    noise; angular velocity (3-D, sensor frame) and drifts random walks. Since B B^T = I, the
    discretization per tangent axis is filterpy's continuous white-noise model
    [[dt^3/3, dt^2/2], [dt^2/2, dt]] * rrw plus arw * dt on the angle.
    """
    n = layout.size
    d, r = layout.direction, layout.rate
    arw = math.radians(settings.angle_random_walk_deg_rt_s) ** 2
    rrw = math.radians(settings.rate_random_walk_deg_s_rt_s) ** 2
    cwn = Q_continuous_white_noise(dim=2, dt=dt, spectral_density=rrw)
    q = np.zeros((n, n))
    q[d, d] = (cwn[0, 0] + arw * dt) * np.eye(2)
    q[r, r] = cwn[1, 1] * np.eye(3)
    q[layout.gain, layout.gain] = settings.gain_drift_per_rt_s ** 2 * dt * np.eye(layout.n_gain)
    q[layout.phase, layout.phase] = math.radians(settings.phase_drift_deg_rt_s) ** 2 * dt * np.eye(layout.n_phase)
    return q, float(cwn[0, 1])


def initial_covariance_diagonal(settings: FilterSettings, layout: StateLayout) -> np.ndarray:
    """Return the prior variances of the non-direction states at first acquisition (rate, drifts)."""
    v = np.zeros(layout.size)
    v[layout.rate] = math.radians(settings.initial_rate_std_deg_s) ** 2
    v[layout.gain] = settings.initial_gain_std ** 2
    v[layout.phase] = math.radians(settings.initial_phase_std_deg) ** 2
    return v


def gate_thresholds(settings: FilterSettings, n_meas: int) -> np.ndarray:
    """Return chi-square gate limits indexed by degrees of freedom 0..n_meas (index 0 unused: inf)."""
    return np.concatenate([[np.inf], chi2.ppf(settings.gate_probability, np.arange(1, n_meas + 1))])


def weak_direction_filter(j00: float, j01: float, j11: float, layout: StateLayout, e1, e2) -> np.ndarray:
    """Return T (n, n) removing, from the gain rows (K' = T K), the least-informed tangent direction of
    J = [[j00, j01], [j01, j11]] (basis e1, e2) and the angular velocity that moves u along it."""
    theta = 0.5 * math.atan2(j01, 0.5 * (j00 - j11))      # angle of the strong eigenvector
    c, s = math.cos(theta), math.sin(theta)
    v = np.array((-s, c))                                   # weak direction, tangent coordinates
    w = rate_coupling(e1, e2).T @ v                         # unit angular velocity moving u along it
    t = np.eye(layout.size)
    t[layout.direction, layout.direction] -= np.outer(v, v)
    t[layout.rate, layout.rate] -= np.outer(w, w)
    return t


def covariance_ok(p: np.ndarray) -> bool:
    """Return True when the symmetric matrix P is finite and positive definite (Cholesky pivots all > 0)."""
    if p.shape[0] > 6:
        try:
            return bool(np.isfinite(np.linalg.cholesky(p)).all())
        except np.linalg.LinAlgError:
            return False
    a = p.tolist()
    n = len(a)
    # Gaussian elimination on the lower triangle: after step j it holds the Schur complement.
    for j in range(n):
        pivot = a[j][j]
        if not 0.0 < pivot < math.inf:
            return False
        for i in range(j + 1, n):
            ai = a[i]
            factor = ai[j] / pivot
            for k in range(j + 1, i + 1):
                ai[k] -= factor * a[k][j]
    return True


@dataclass
class PreparedInput:
    """Samples checked and converted once, vectorized, before the per-sample loop."""

    t: list            # s
    zw: np.ndarray     # (N, 2C) whitened real measurement X/sigma, Y/sigma (nan where missing)
    finite: list       # all channels finite
    b_nT: np.ndarray   # (N,) |B| used, nT (nan: none usable)
    per_isotope_nT: np.ndarray  # (N, 2)
    flags: list        # input flags: BAD_INPUT, MAGNITUDE_DISAGREE, OUTSIDE_CALIBRATION, LOW_SIGNAL
    segment: list      # magnitude segment of the model
    seg_t: list        # position inside it (log |B|)
    z: np.ndarray      # (N, C) complex, calibration channel order


class Tracker:
    """Error-state EKF on the sphere: step(sample) -> Estimate, run(block) -> list[Estimate]."""

    def __init__(self, calibration: Calibration, settings: FilterSettings | None, initiator: Initiator,
                 report_channels: bool = False):
        if not callable(initiator):
            raise ValueError("the tracker needs an initiator (sample, b_nT) -> (u, cov) | None to acquire")
        s = self.settings = settings if settings is not None else FilterSettings()
        self.calibration = calibration
        self.initiator = initiator
        self.report_channels = report_channels
        model = self.model = TrackerModel(calibration.model, s.measurement_noise_scale)
        self.channels = model.channels
        lay = self.layout = StateLayout(model.n_probes, model.n_channels, s.gain_drift, s.phase_drift)
        self._gammas = tuple(float(g) for g in calibration.gammas_hz_per_nt)
        lo, hi = calibration.magnitude_range_nT
        self._outside = (lo * (1 - s.calibration_margin), hi * (1 + s.calibration_margin))
        median_bound, median_amp = model.sphere_medians(math.sqrt(lo * hi))
        self.median_bound_deg = math.degrees(median_bound)
        self._blind_rel2 = (s.blind_factor * median_bound) ** 2
        self._blind_abs2 = math.radians(s.blind_threshold_deg) ** 2
        self._low_amp = s.low_signal_fraction * median_amp
        self._gates = gate_thresholds(s, model.n_meas).tolist()
        self._nis_alpha = 1.0 / s.nis_average_samples
        self._nis_limit, self._lost_after, self._max_gap = s.nis_average_limit, s.lost_after_gated, s.max_gap_s
        self._init_var = initial_covariance_diagonal(s, lay)
        self._n, self._no = lay.size, lay.observed.stop
        self._rate = lay.rate
        # Without drift states the covariance lives in 15 floats (estimator/tracker_algebra.py).
        self._plain = lay.size == 5
        self._eye = np.eye(self._n)
        self._select = np.eye(self._no, self._n)        # H = H_o @ select
        self._dt_cached = math.nan
        self._f, self._q = np.eye(self._n), np.zeros((self._n, self._n))
        self._cross = 0.0
        self._q_plain = (0.0, 0.0, 0.0)
        self._sigma = model.sigma
        self._setup_noise_groups()
        self._channel_index: dict[tuple, np.ndarray] = {}
        self._source: Callable[[int], Sample] = lambda index: None
        self.counters = TrackerCounters()
        self.resets: deque[ResetRecord] = deque(maxlen=10000)
        self._reset_state()

    def _setup_noise_groups(self) -> None:
        """Group the real measurements by probe for the adaptive noise level (estimator/noise_level.py)."""
        model, s = self.model, self.settings
        m = model.n_meas
        component_probe = np.repeat(model.channel_probe_index, 2)
        self._groups = [np.flatnonzero(component_probe == p) for p in range(model.n_probes)]
        self._component_probe = component_probe
        self._difference_norm = difference_normalizers([g.size for g in self._groups])
        # Rows [h, dh/dx, dh/dy, dh/dz, y, y one and two samples back], whitened; the per-probe Gram matrices
        # of the last six rows give the information, the innovation terms and the successive differences.
        self._rows = np.zeros((7, m))
        sizes = {g.size for g in self._groups}
        contiguous = all(np.array_equal(g, np.arange(g[0], g[0] + g.size)) for g in self._groups)
        rows = self._rows
        self._model_rows, self._h_row, self._y_row = rows[0:4].reshape(-1), rows[0], rows[4]
        self._history_rows = (rows[5:7], rows[4:6])      # (destination, source) of the shift by one sample
        if contiguous and len(sizes) == 1 and self._groups[0][0] == 0:
            view = self._rows[1:7].reshape(6, model.n_probes, sizes.pop()).transpose(1, 0, 2)
            self._gram_views = (view, view.transpose(0, 2, 1))
            self._gram = np.empty((model.n_probes, 6, 6))
        else:
            self._gram_views = None
        self._noise = (NoiseLevel(model.n_probes, s.adaptive_noise_window_samples, s.adaptive_noise_threshold,
                                  s.adaptive_noise_max_scale ** 2) if s.adaptive_noise else None)

    # ----------------------------------------------------------------------------------------- state
    def _reset_state(self) -> None:
        self._acquired = False
        self._lost: str | None = None   # why the track was lost, until re-acquired
        self._u = self._e1 = self._e2 = _NAN3
        self._x = np.zeros(self._n)
        self._p = np.diag(self._init_var)
        self._w = (0.0, 0.0, 0.0)                       # plain path: angular velocity, rad/s
        self._pp = algebra.from_matrix(self._p) if self._plain else ()
        self._t = math.nan
        self._seg_last = None
        self._gated_run = 0
        self._nis_avg = 1.0
        self._y_back = 0                                # innovations of the samples just before, in rows[5:7]
        self._pending_noise = None                      # this sample's noise values, pushed after the gate
        self._ratios = [1.0] * self.model.n_probes      # noise variance factor per probe
        self._calibrated_noise = True

    @property
    def direction(self) -> np.ndarray:
        """Return the current unit field direction (3,), sensor frame (nan before acquisition)."""
        return np.array(self._u)

    @property
    def covariance(self) -> np.ndarray:
        """Return a copy of the error-state covariance (see `layout` for the named slices)."""
        return algebra.to_matrix(self._pp) if self._plain else self._p.copy()

    def _set_covariance(self, p: np.ndarray) -> None:
        """Replace the error-state covariance (n, n) (for tests and tools that restore a saved state)."""
        if self._plain:
            self._pp = algebra.from_matrix(np.asarray(p, float))
        else:
            self._p = np.array(p, float)

    @property
    def tangent_basis(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the (e1, e2) tangent basis the direction covariance is expressed in (sensor frame)."""
        return np.array(self._e1), np.array(self._e2)

    @property
    def rate_deg_s(self) -> np.ndarray:
        """Return the estimated angular velocity of the field direction (3,), sensor frame, deg/s."""
        return np.degrees(np.array(self._w) if self._plain else self._x[self.layout.rate])

    @property
    def drifts(self) -> dict[str, np.ndarray]:
        """Return the estimated drifts: log-gain per probe and phase offset per channel (deg)."""
        return {"gain": self._x[self.layout.gain].copy(), "phase_deg": np.degrees(self._x[self.layout.phase])}

    @property
    def noise_scales(self) -> np.ndarray:
        """Return the adaptive factor on each probe's calibrated noise std (dimensionless, 1 = calibrated)."""
        return np.sqrt(self._ratios)

    def _process_noise(self, dt: float) -> None:
        """Refresh the cached process noise when dt changes beyond timestamp jitter (Q is linear in dt)."""
        self._q, self._cross = process_noise_static(self.settings, self.layout, dt)
        r0 = self._rate.start
        self._q_plain = (float(self._q[0, 0]), self._cross, float(self._q[r0, r0]))
        self._dt_cached = dt

    def _predict(self, dt: float) -> None:
        """Propagate P and the nominal state over dt: u and its basis turn about the angular velocity."""
        if not abs(dt - self._dt_cached) <= 1e-6 * dt:
            self._process_noise(dt)
        if self._plain:
            self._pp = algebra.predict(self._pp, self._e1, self._e2, dt, *self._q_plain)
            wx, wy, wz = self._w
        else:
            (ax, ay, az), (bx, by, bz) = self._e1, self._e2
            r = self._rate
            f, q, c = self._f, self._q, self._cross
            # F = I + dt [0 B; 0 0] and Q[direction, rate] = c B with B = rate_coupling(e1, e2).
            f[D, r] = ((dt * bx, dt * by, dt * bz), (-dt * ax, -dt * ay, -dt * az))
            q[D, r] = ((c * bx, c * by, c * bz), (-c * ax, -c * ay, -c * az))
            q[r, D] = ((c * bx, -c * ax), (c * by, -c * ay), (c * bz, -c * az))
            p = f @ self._p @ f.T
            p += q
            self._p = p
            wx, wy, wz = self._x[r].tolist()
        self._turn(wx * dt, wy * dt, wz * dt)

    def _turn(self, wx: float, wy: float, wz: float) -> None:
        """Rotate u and its basis by the rotation vector (wx, wy, wz) (rad, sensor frame; Rodrigues)."""
        th = math.sqrt(wx * wx + wy * wy + wz * wz)
        if th == 0.0:
            return
        kx, ky, kz = wx / th, wy / th, wz / th
        c, s = math.cos(th), math.sin(th)
        out = []
        for vx, vy, vz in (self._u, self._e1):
            kv = (kx * vx + ky * vy + kz * vz) * (1 - c)
            out.append((vx * c + (ky * vz - kz * vy) * s + kx * kv,
                        vy * c + (kz * vx - kx * vz) * s + ky * kv,
                        vz * c + (kx * vy - ky * vx) * s + kz * kv))
        self._set_frame(out[0], out[1])

    def _set_frame(self, u, e1) -> None:
        """Store u and e1 renormalized against rounding (u unit, e1 unit and orthogonal to u), e2 = u x e1."""
        (ux, uy, uz), (ax, ay, az) = u, e1
        nu = math.sqrt(ux * ux + uy * uy + uz * uz)
        ux, uy, uz = ux / nu, uy / nu, uz / nu
        dot = ax * ux + ay * uy + az * uz
        ax, ay, az = ax - dot * ux, ay - dot * uy, az - dot * uz
        na = math.sqrt(ax * ax + ay * ay + az * az)
        ax, ay, az = ax / na, ay / na, az / na
        self._u = (ux, uy, uz)
        self._e1 = (ax, ay, az)
        self._e2 = (uy * az - uz * ay, uz * ax - ux * az, ux * ay - uy * ax)

    def _move(self, a1: float, a2: float) -> float:
        """Move u along the great circle a1*e1 + a2*e2 (rad) and parallel-transport (e1, e2); return the angle."""
        th = math.hypot(a1, a2)
        if th == 0.0:
            return 0.0
        (ux, uy, uz), (ax, ay, az), (bx, by, bz) = self._u, self._e1, self._e2
        dx, dy, dz = (a1 * ax + a2 * bx) / th, (a1 * ay + a2 * by) / th, (a1 * az + a2 * bz) / th
        c, s = math.cos(th), math.sin(th)
        k1 = a1 / th
        # Parallel transport of a tangent vector e along the step: e - (e.d)((1 - c) d + s u).
        vx, vy, vz = (1 - c) * dx + s * ux, (1 - c) * dy + s * uy, (1 - c) * dz + s * uz
        self._set_frame((c * ux + s * dx, c * uy + s * dy, c * uz + s * dz),
                        (ax - k1 * vx, ay - k1 * vy, az - k1 * vz))
        return th

    def _acquire(self, t: float, index: int, b: float, reason: str) -> bool:
        """Start or restart the track from the initiator at sample `index`; record the reset; return success."""
        self._y_back = 0
        result = self.initiator(self._source(index), b) if math.isfinite(b) else None
        u = cov = None
        if result is not None:
            u, cov = (np.asarray(a, float) for a in result)
            norm = float(np.linalg.norm(u)) if u.shape == (3,) else math.nan
            if (cov.shape != (2, 2) or not np.all(np.isfinite(cov)) or not math.isfinite(norm) or norm == 0
                    or cov[0, 0] <= 0 or cov[0, 0] * cov[1, 1] - cov[0, 1] * cov[1, 0] <= 0):
                u = None
        if u is None:
            self.counters.initiator_failures += 1
            return False
        u = u / norm
        jump = math.degrees(float(angle_between(np.array(self._u), u))) if self._acquired else math.nan
        e1, e2 = tangent_basis(u)
        # The initiator's covariance assumes the calibrated noise: widen it by the noise of the moment.
        cov = 0.5 * (cov + cov.T) * max(self._ratios)
        if self._plain:
            self._pp = algebra.initial(cov, float(self._init_var[self._rate.start]))
            self._w = (0.0, 0.0, 0.0)
        else:
            x, p = np.zeros(self._n), np.diag(self._init_var)
            if self._acquired:
                # Sensor drifts outlive a lost track: keep their estimates and variances.
                drift = self.layout.drift
                x[drift], p[drift, drift] = self._x[drift], self._p[drift, drift]
            p[D, D] = cov
            self._x, self._p = x, p
        self._u, self._e1, self._e2 = tuple(u.tolist()), tuple(e1.tolist()), tuple(e2.tolist())
        self._acquired, self._lost = True, None
        self._t = t
        self._gated_run = 0
        self._nis_avg = 1.0
        self.counters.acquisitions += 1
        self.resets.append(ResetRecord(float(t), reason, jump))
        return True

    # ------------------------------------------------------------------------------------ the filter
    def _advance(self, t: float, zw: np.ndarray, finite: bool, b: float, flags: int, segment: int,
                 seg_t: float, index: int) -> tuple[int, float, int, float]:
        """Advance the filter by one prepared sample; return (flags, NIS, NIS dof, single-sample bound^2 rad^2).

        `index` names the sample for the initiator: self._source(index) returns it as a Sample.
        """
        c = self.counters
        c.samples += 1
        if flags & _BAD or not finite or not math.isfinite(t):
            c.bad_input += 1
            flags |= _BAD
        if b == b:
            self._seg_last = (segment, seg_t)
        elif self._seg_last is not None:
            segment, seg_t = self._seg_last            # no magnitude this sample: keep the last one
        if not math.isfinite(t):
            self._y_back = 0
            return flags | (_COASTING if self._acquired else _NONE), math.nan, 0, math.nan
        if not self._acquired or self._lost:
            if finite and self._acquire(t, index, b, self._lost or "start"):
                return flags | _REACQUIRED, math.nan, 0, math.nan
            if not self._acquired:
                return flags | _NONE, math.nan, 0, math.nan
        dt = t - self._t
        if dt < 0:
            if not flags & _BAD:
                c.bad_input += 1
            self._y_back = 0
            return flags | _BAD | _COASTING, math.nan, 0, math.nan
        if dt > self._max_gap and not self._lost:
            c.gaps += 1
            self._lost = "gap"
            if finite and self._acquire(t, index, b, "gap"):
                return flags | _REACQUIRED, math.nan, 0, math.nan
        self._t = t
        if dt > 0:
            self._predict(dt)
        if self._lost or self._seg_last is None:
            c.coasted += 1
            self._y_back = 0
            return flags | _COASTING, math.nan, 0, math.nan

        # ---- whitened measurement at the predicted state, noise inflated per probe:
        # J = H^T R^-1 H, bvec = H^T R^-1 y, y^T R^-1 y
        self._pending_noise = None
        if self._plain:
            meas = self._measure_direction(zw, finite, segment, seg_t)
        else:
            meas = self._measure_with_drifts(zw, finite, segment, seg_t)
        if meas is None:
            c.coasted += 1
            return flags | _COASTING, math.nan, 0, math.nan
        info, bvec, yy, dof = meas
        if self._plain:
            j00, j01, j11 = info
        else:
            j00, j01, j11 = info.item(0, 0), info.item(0, 1), info.item(1, 1)
        det_j = j00 * j11 - j01 * j01
        bound2 = (j00 + j11) / det_j if det_j > 0 else math.inf
        # BLIND compares the bound with its sphere median at the cleanest probe's noise of the moment: a
        # uniform noise rise does not make the geometry blind, one noisy probe may.
        blind = bound2 > self._blind_abs2 or bound2 > self._blind_rel2 * min(self._ratios)
        if blind:
            flags |= _BLIND

        # ---- gain by the information identity: M = P_o (I + J P_oo)^-1 = solve(I + P_oo J, P_o^T)^T
        if self._plain:
            rows = algebra.gain(self._pp, j00, j01, j11)
            if rows is None:
                return self._fault(t, index, b, flags, dof, bound2)
            m0, m1 = rows
            b0, b1 = bvec
            dx0, dx1 = b0 * m0[0] + b1 * m1[0], b0 * m0[1] + b1 * m1[1]
            nis = yy - (b0 * dx0 + b1 * dx1)
            if blind:
                # Near a blind fold the measurement is quadratic across it and its linearization can pull
                # the state onto the mirror branch: correct only along the well-observed tangent direction
                # and let the weak one coast (K' = T K; the Joseph form keeps P right for this gain, and
                # the NIS above keeps the full innovation covariance).
                m0, m1 = algebra.drop_weak_direction(m0, m1, j00, j01, j11, self._e1, self._e2)
        else:
            p = self._p
            o = self.layout.observed
            try:
                mt = np.linalg.solve(self._eye[o, o] + p[o, o] @ info, p[o])
            except np.linalg.LinAlgError:
                return self._fault(t, index, b, flags, dof, bound2)
            dx = bvec @ mt
            nis = yy - float(bvec @ dx[:self._no])   # the observed states lead: dx[:no] = dx[layout.observed]
            if blind:
                mt = mt @ weak_direction_filter(j00, j01, j11, self.layout, self._e1, self._e2)
                dx = bvec @ mt
        gate = self._gates[dof]
        self._nis_avg += self._nis_alpha * (min(nis, gate) / dof - self._nis_avg)
        gated = not nis <= gate
        if self._pending_noise is not None and (self._gated_run or not gated):
            # A gated sample counts toward the noise level only after another gated one: a lone spike
            # never moves it, a noise rise (every sample gated until the level follows) does.
            self._push_noise(self._pending_noise)
        if gated:
            c.gated += 1
            c.coasted += 1
            self._gated_run += 1
            flags |= _GATED | _COASTING
            if self._gated_run >= self._lost_after:
                c.lost_gated += 1
                self._lost = "gated"
                if self._acquire(t, index, b, "gated"):
                    flags |= _REACQUIRED
            return flags, nis, dof, bound2
        self._gated_run = 0

        # ---- Joseph form: P+ = (I - KH) P (I - KH)^T + K R K^T with KH = M J select, K R K^T = M J M^T
        if self._plain:
            pp = algebra.joseph(self._pp, m0, m1, j00, j01, j11)
            if not algebra.positive_definite(pp):
                return self._fault(t, index, b, flags, dof, bound2)
            w0, w1 = bvec
            d1, d2 = w0 * m0[0] + w1 * m1[0], w0 * m0[1] + w1 * m1[1]
            wx, wy, wz = self._w
            self._w = (wx + w0 * m0[2] + w1 * m1[2], wy + w0 * m0[3] + w1 * m1[3], wz + w0 * m0[4] + w1 * m1[4])
        else:
            mj = mt.T @ info
            t_mat = self._eye - mj @ self._select
            p = t_mat @ p @ t_mat.T + mj @ mt
            p += p.T
            p *= 0.5
            if not covariance_ok(p):
                return self._fault(t, index, b, flags, dof, bound2)
            x = self._x
            x += dx
            d1, d2 = x[D].tolist()
            x[D] = 0.0
        th = self._move(d1, d2)
        if th > MIN_CHART_STEP_RAD:
            # Chart change: the error component perpendicular to the step shrinks by sin(th)/th.
            nx, ny = -d2 / th, d1 / th
            k = 1.0 - math.sin(th) / th
            if self._plain:
                pp = algebra.chart_change(pp, 1 - k * nx * nx, -k * nx * ny, 1 - k * ny * ny)
            else:
                g = np.array(((1 - k * nx * nx, -k * nx * ny), (-k * nx * ny, 1 - k * ny * ny)))
                p[D, :] = g @ p[D, :]
                p[:, D] = p[:, D] @ g.T
        if self._plain:
            self._pp = pp
        else:
            self._p = p
        c.fused += 1
        flags |= _TRACKING
        if self._nis_avg > self._nis_limit:
            c.lost_nis += 1
            self._lost = "nis"
        return flags, nis, dof, bound2

    def _noise_values(self, grams, i: int) -> list[float] | None:
        """Return each probe's noise value (lambda estimate), or None when one is not finite.

        grams: per probe, a Gram matrix (nested lists) whose rows/columns i, i+1, i+2 are y, y_1, y_2.
        """
        j, k = i + 1, i + 2
        values = [min(g[i][i] - 2.0 * g[i][j] + g[j][j], g[i][i] - 2.0 * g[i][k] + g[k][k]) * norm
                  for g, norm in zip(grams, self._difference_norm)]
        return values if all(v < math.inf for v in values) else None        # also None for nan

    def _push_noise(self, values: list[float]) -> None:
        """Add one noise value per probe to the running level and refresh the factors on R."""
        self._ratios = self._noise.push(values)
        self._calibrated_noise = all(r == 1.0 for r in self._ratios)

    def _measure_direction(self, zw: np.ndarray, finite: bool, segment: int, seg_t: float):
        """Return (J (3 floats), b (2 floats), y^T R^-1 y, dof) of the plain state at u, or None without data.

        One Gram matrix per probe of [dh/dx; dh/dy; dh/dz; y; y_1; y_2] gives them all: J = E G E^T
        and b = E G y with E = [e1; e2], summed over probes weighted by the noise factors, plus the
        differences |y - y_1|^2, |y - y_2|^2 to the innovations one and two samples back (noise level).
        """
        buf = self._rows
        self.model.evaluate_in_segment(self._u, segment, seg_t, out=self._model_rows)
        if finite:
            np.subtract(zw, self._h_row, out=self._y_row)
            if self._gram_views is not None:
                grams = np.matmul(*self._gram_views, out=self._gram).tolist()
            else:
                grams = [(buf[1:7, g] @ buf[1:7, g].T).tolist() for g in self._groups]
            if self._noise is not None:
                if self._y_back == 2:
                    self._pending_noise = self._noise_values(grams, 3)
                else:
                    self._y_back += 1
                np.copyto(*self._history_rows)
            if self._calibrated_noise and len(grams) == 1:
                (gxx, gxy, gxz, gxr, *_), (_, gyy, gyz, gyr, *_), (_, _, gzz, gzr, *_), (*_, yy, _, _) = grams[0][:4]
            else:
                gxx = gxy = gxz = gxr = gyy = gyz = gyr = gzz = gzr = yy = 0.0
                for g, ratio in zip(grams, self._ratios):
                    w = 1.0 / ratio
                    (axx, axy, axz, axr, *_), (_, ayy, ayz, ayr, *_), (_, _, azz, azr, *_), (*_, arr, _, _) = g[:4]
                    gxx += w * axx
                    gxy += w * axy
                    gxz += w * axz
                    gxr += w * axr
                    gyy += w * ayy
                    gyz += w * ayz
                    gyr += w * ayr
                    gzz += w * azz
                    gzr += w * azr
                    yy += w * arr
            (ax, ay, az), (bx, by, bz) = self._e1, self._e2
            ga = (gxx * ax + gxy * ay + gxz * az, gxy * ax + gyy * ay + gyz * az, gxz * ax + gyz * ay + gzz * az)
            gb = (gxx * bx + gxy * by + gxz * bz, gxy * bx + gyy * by + gyz * bz, gxz * bx + gyz * by + gzz * bz)
            return ((ga[0] * ax + ga[1] * ay + ga[2] * az, ga[0] * bx + ga[1] * by + ga[2] * bz,
                     gb[0] * bx + gb[1] * by + gb[2] * bz),
                    (gxr * ax + gyr * ay + gzr * az, gxr * bx + gyr * by + gzr * bz), yy, self.model.n_meas)
        # Some channels missing: use the others (no successive difference across this sample).
        self._y_back = 0
        good = np.isfinite(zw)
        dof = int(good.sum())
        if dof == 0:
            return None
        y = np.where(good, zw - buf[0], 0.0)
        ht = (np.array((self._e1, self._e2)) @ buf[1:4]) * good      # (2, 2C): tangent Jacobian, transposed
        weighted = ht if self._calibrated_noise else ht / np.asarray(self._ratios)[self._component_probe]
        info = weighted @ ht.T
        bvec = weighted @ y
        yy = float(y @ y) if self._calibrated_noise else float(
            y @ (y / np.asarray(self._ratios)[self._component_probe]))
        return (info.item(0, 0), info.item(0, 1), info.item(1, 1)), tuple(bvec.tolist()), yy, dof

    def _measure_with_drifts(self, zw: np.ndarray, finite: bool, segment: int, seg_t: float):
        """Return (J (no, no), b (no,), y^T R^-1 y, dof) with the drift states, or None without data."""
        rows = self.model.evaluate_in_segment(self._u, segment, seg_t)
        h, ht = self._drift_measurement(rows)
        y = zw - h
        if finite:
            dof = self.model.n_meas
            if self._noise is not None:
                buf = self._rows
                buf[4] = y
                if self._y_back == 2:
                    self._pending_noise = self._noise_values(
                        [(buf[4:7, g] @ buf[4:7, g].T).tolist() for g in self._groups], 0)
                else:
                    self._y_back += 1
                buf[5:7] = buf[4:6]
        else:
            self._y_back = 0
            good = np.isfinite(zw)
            dof = int(good.sum())
            if dof == 0:
                return None
            y = np.where(good, y, 0.0)
            ht = ht * good
        weight = None if self._calibrated_noise else 1.0 / np.asarray(self._ratios)[self._component_probe]
        weighted = ht if weight is None else ht * weight
        return weighted @ ht.T, weighted @ y, float(y @ y) if weight is None else float(y @ (weight * y)), dof

    def _drift_measurement(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Apply gain/phase drifts to h and its gradient; return (h (2C), H_o^T (n_observed, 2C)), whitened."""
        lay = self.layout
        n_ch = self.model.n_channels
        g = self._x[lay.gain][self.model.channel_probe_index] if lay.n_gain else np.zeros(n_ch)
        phi = self._x[lay.phase] if lay.n_phase else np.zeros(n_ch)
        # The noise std is the same for X and Y of a channel, so drifting whitened rows is exact.
        rows = apply_drifts(rows, g, phi)
        h = rows[0]
        ht = np.empty((self._no, self.model.n_meas))
        ht[D] = np.array((self._e1, self._e2)) @ rows[1:]
        ht[lay.drift] = drift_jacobian(h, lay, self.model.channel_probe_index)
        return h, ht

    def _fault(self, t, index, b, flags, dof, bound2):
        """Covariance lost symmetry/definiteness: raise the fault bit and restart from the initiator."""
        self.counters.covariance_faults += 1
        flags |= _FAULT | _COASTING
        self._lost = "fault"
        if self._acquire(t, index, b, "fault"):
            flags |= _REACQUIRED
        return flags, math.nan, dof, bound2

    # --------------------------------------------------------------------------------------- inputs
    def _columns(self, channels: tuple) -> np.ndarray | None:
        """Return indices of the calibration's channels within a sample's channels (None if identical)."""
        if channels == self.channels:
            return None
        if channels not in self._channel_index:
            missing = [c for c in self.channels if c not in channels]
            if missing:
                raise ValueError(f"sample lacks calibrated channel(s) {', '.join(missing)} "
                                 f"(sample has {', '.join(channels)})")
            self._channel_index[channels] = np.array([channels.index(c) for c in self.channels])
        return self._channel_index[channels]

    def _segment(self, b: float) -> tuple[int, float]:
        """Return the model's magnitude segment and position for |B| = b nT (one scalar code path for step and run)."""
        return self.model.segment_of(b)

    def prepare(self, t, f_hz, z, channels) -> PreparedInput:
        """Return samples checked and converted for the filter: t (N,) s, f (N, 2) Hz, z (N, C') complex."""
        channels = tuple(channels)
        cols = self._columns(channels)
        z = np.atleast_2d(np.asarray(z, complex))
        if z.shape[1] != len(channels):
            raise ValueError(f"samples have {z.shape[1]} lock-in values for {len(channels)} channel names")
        if cols is not None:
            z = z[:, cols]
        zr = to_real(z)
        finite = np.isfinite(zr).all(axis=1)
        s = self.settings
        b, per, flags = sample_magnitudes(f_hz, self._gammas, s.magnitude_tolerance,
                                          self.calibration.magnitude_range_nT, s.calibration_margin)
        good = np.isfinite(zr)
        rms = np.sqrt(np.where(good, zr * zr, 0.0).sum(axis=1) * 2 / np.maximum(good.sum(axis=1), 1))
        flags = flags | np.where(rms < self._low_amp, _LOW, 0)
        segments = [self._segment(v) for v in b.tolist()]
        return PreparedInput(np.atleast_1d(np.asarray(t, float)).tolist(), zr / self._sigma, finite.tolist(), b,
                             per, flags.tolist(), [g[0] for g in segments], [g[1] for g in segments], z)

    def _prepare_sample(self, sample: Sample) -> tuple:
        """Return (zw, finite, |B| nT, |B| per isotope (2 floats) nT, input flags, segment, position) of one sample.

        The same checks and numbers as prepare() (its scalar twin for step(), without array set-up).
        """
        channels = sample.channels if type(sample.channels) is tuple else tuple(sample.channels)
        cols = self._columns(channels)
        z = np.asarray(sample.z, complex)
        if z.shape != (len(channels),):
            raise ValueError(f"sample has lock-in values of shape {z.shape} for {len(channels)} channels")
        if cols is not None:
            z = z[cols]
        zr = z.view(np.float64) if z.flags.c_contiguous else to_real(z)
        zw = zr / self._sigma
        energy = float(zr @ zr)
        finite = energy < math.inf                         # false for nan or inf anywhere (or overflow)
        if finite:
            rms = math.sqrt(energy * 2 / zr.size)
        else:
            good = np.isfinite(zr)
            finite = bool(good.all())
            rms = math.sqrt(float(np.where(good, zr * zr, 0.0).sum()) * 2 / max(int(good.sum()), 1))
        b, b_a, b_b, flags = self._magnitude(float(sample.f_a), float(sample.f_b))
        if rms < self._low_amp:
            flags |= _LOW
        segment, seg_t = self._segment(b)
        return zw, finite, b, (b_a, b_b), flags, segment, seg_t

    def _magnitude(self, f_a: float, f_b: float) -> tuple[float, float, float, int]:
        """Return (|B|, |B| seen by isotope a, by isotope b, flags) in nT: sample_magnitudes for one sample."""
        ga, gb = self._gammas
        b_a, b_b = f_a / ga, f_b / gb
        ok_a, ok_b = 0.0 < b_a < math.inf, 0.0 < b_b < math.inf
        if ok_a and ok_b:
            b = (b_a + b_b) / 2
            flags = _DISAGREE if abs(b_a - b_b) / max(b, 1e-30) > self.settings.magnitude_tolerance else 0
        else:
            b = b_a if ok_a else b_b if ok_b else math.nan
            flags = _BAD
        lo, hi = self._outside
        if (ok_a or ok_b) and (b < lo or b > hi):
            flags |= _OUTSIDE
        return b, b_a, b_b, flags

    def step(self, sample: Sample) -> Estimate:
        """Return the estimate after one sample (u sensor frame, |B| nT, sigma deg, flags, extras)."""
        zw, finite, b, (b_a, b_b), flags, segment, seg_t = self._prepare_sample(sample)
        t = float(sample.t)
        self._source = lambda index: sample
        flags, nis, dof, bound2 = self._advance(t, zw, finite, b, flags, segment, seg_t, 0)
        extras = {"nis": nis, "nis_dof": dof, "b_a_nT": b_a, "b_b_nT": b_b,
                  "bound_deg": math.degrees(math.sqrt(bound2)) if bound2 == bound2 else math.nan}
        u, sigma, noise_scale = self._output(flags)
        extras["noise_scale"] = noise_scale
        if noise_scale > 1.0:
            flags |= F.NOISY
        if self.report_channels:
            z = np.asarray(sample.z, complex)[None]
            cols = self._columns(tuple(sample.channels))
            extras.update({k: float(v[0]) for k, v in
                           channel_readouts(z if cols is None else z[:, cols], self.channels).items()})
        return Estimate(t, np.array(u), b, sigma, flags, extras)

    def _output(self, flags: int) -> tuple[tuple, float, float]:
        """Return (u, sigma deg, largest noise std factor) to publish."""
        noise_scale = math.sqrt(max(self._ratios))
        if flags & _NONE:
            return _NAN3, math.nan, noise_scale
        if self._plain:
            pp = self._pp
            return self._u, math.degrees(math.sqrt(pp[0] + pp[2])), noise_scale     # trace of P[D, D]
        p = self._p
        return self._u, math.degrees(math.sqrt(p.item(0, 0) + p.item(1, 1))), noise_scale

    def run_arrays(self, block: SampleBlock, chunk: int = 4096) -> TrackRecord:
        """Return the estimates of a whole block as arrays (the fast replay path; memory bounded per chunk)."""
        n = len(block)
        u_out, sigma_out, nis_out, bound_out = np.empty((n, 3)), np.empty(n), np.empty(n), np.empty(n)
        flags_out, dof_out = np.empty(n, np.int64), np.empty(n, np.int64)
        b_out, per_out, noise_out = np.empty(n), np.empty((n, 2)), np.empty(n)
        advance, output = self._advance, self._output
        self._source = block.sample
        for start in range(0, n, chunk):
            stop = min(start + chunk, n)
            inp = self.prepare(block.t[start:stop], block.f[start:stop], block.z[start:stop], block.channels)
            rows = []
            append = rows.append
            for i, (t, zw, finite, b, fl, seg, seg_t) in enumerate(
                    zip(inp.t, inp.zw, inp.finite, inp.b_nT.tolist(), inp.flags, inp.segment, inp.seg_t), start):
                flags, nis, dof, bound2 = advance(t, zw, finite, b, fl, seg, seg_t, i)
                append((flags, nis, dof, bound2) + output(flags))
            flags_c, nis_c, dof_c, bound_c, u_c, sigma_c, noise_c = zip(*rows)
            flags_out[start:stop], nis_out[start:stop], dof_out[start:stop] = flags_c, nis_c, dof_c
            bound_out[start:stop], u_out[start:stop], sigma_out[start:stop] = bound_c, u_c, sigma_c
            noise_out[start:stop] = noise_c
            flags_out[start:stop] |= np.where(np.asarray(noise_c) > 1.0, int(F.NOISY), 0)
            b_out[start:stop], per_out[start:stop] = inp.b_nT, inp.per_isotope_nT
        if self.report_channels:
            cols = self._columns(tuple(block.channels))
            readouts = channel_readouts(block.z if cols is None else block.z[:, cols], self.channels)
        else:
            readouts = {}
        with np.errstate(invalid="ignore"):
            bound_deg = np.degrees(np.sqrt(bound_out))
        return TrackRecord(np.asarray(block.t, float).copy(), u_out, b_out, sigma_out, flags_out, nis_out,
                           dof_out, per_out[:, 0].copy(), per_out[:, 1].copy(), bound_deg, readouts, noise_out)

    def run(self, block: SampleBlock) -> list[Estimate]:
        """Return one Estimate per sample of the block (see run_arrays for the array form)."""
        return self.run_arrays(block).estimates()
