"""The tracker's measurement model and state layout: h(u, |B|) with its gradient, precomputed for speed.

The calibrated response is a sum over magnitude splines S_i(|B|) of spherical-harmonic expansions
in u. Both parts are polynomials: each harmonic of degree l is a homogeneous polynomial of degree l
in (x, y, z), and each cardinal spline is a cubic in t = log|B| - log(knot) on every segment. So
on each magnitude segment the model and its three ambient derivatives are one table W_seg with

    [Z, dZ/dx, dZ/dy, dZ/dz](u, |B|) = sum_p t^p * (monomials(u) @ W_seg[:, p])

and one sample costs one small matrix-vector product. Derivatives of a monomial are monomials of
lower degree, so the same monomial vector serves the gradient.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from fieldvane.estimator.harmonics import monomial_coefficients
from fieldvane.estimator.median import median
from fieldvane.estimator.monomials import derivative_maps, monomials, power_index
from fieldvane.estimator.response import ResponseModel, to_real
from fieldvane.estimator.samples import channel_probe
from fieldvane.estimator.sphere import fibonacci_sphere, tangent_basis

N_ROWS = 4  # value, d/dx, d/dy, d/dz
DIRECTION = slice(0, 2)   # the direction error always leads the error state (see StateLayout)


def _segment_polynomials(basis) -> tuple[np.ndarray, np.ndarray]:
    """Return (segment starts in log|B| (S,), cubic coefficients (S, 4, K)) of the magnitude splines."""
    knots = np.log(basis.knots_nT)
    if knots.size == 1:
        return knots.copy(), np.eye(4, 1)[None, :, :] * 1.0
    starts = knots[:-1]
    coef = np.empty((starts.size, 4, knots.size))
    for s in range(starts.size):
        h = knots[s + 1] - knots[s]
        t = np.linspace(0.0, h, 4)
        values = basis(np.exp(knots[s] + t))                 # (4, K): exactly cubic in t here
        coef[s] = np.linalg.solve(np.vander(t, 4, increasing=True), values)
    return starts, coef


class TrackerModel:
    """Response model in tracker form: whitened real measurement (2C) and its ambient gradient (3, 2C).

    Whitened means divided by the noise std of each real measurement (calibrated noise times
    `noise_scale`), so the Fisher information is plain H^T H and the NIS a plain sum of squares.
    """

    def __init__(self, model: ResponseModel, noise_scale: float = 1.0):
        self.model = model
        self.channels = model.channels
        self.n_channels = model.n_channels
        self.n_meas = 2 * self.n_channels
        self.sigma = noise_scale * model.measurement_noise()   # (2C,) V
        degree = model.degree
        exps, mono_coef = monomial_coefficients(degree)
        self.degree = degree
        # Complex monomial coefficients per knot, row (value, d/dx, d/dy, d/dz) and channel: (K, M, 4, C).
        a = np.einsum("mj,ckj->kmc", mono_coef, model.coef)
        table = np.stack([a] + [np.einsum("kmc,mj->kjc", a, d) for d in derivative_maps(exps)], axis=2)
        real = to_real(table) / self.sigma
        self._starts, seg = _segment_polynomials(model.basis)
        self._starts_list = self._starts.tolist()
        self._range_nT = model.basis.range_nT
        # One knot: the model does not depend on |B|, so only the constant term is kept.
        self._powers = 1 if model.basis.size == 1 else 4
        w = np.einsum("spk,kmrc->spmrc", seg[:, :self._powers], real)
        # W[s]: rows (power p, monomial m), columns (row r, measurement k)
        self._w = np.ascontiguousarray(w.reshape(w.shape[0], self._powers * w.shape[2], -1))
        self._exps = exps
        self._flat_index = power_index(exps, degree)  # (3, M)
        self._out_shape = (N_ROWS, self.n_meas)
        probes = sorted({channel_probe(c) for c in self.channels})
        self.n_probes = len(probes)
        self.channel_probe_index = np.array([probes.index(channel_probe(c)) for c in self.channels])

    @property
    def exponents(self) -> np.ndarray:
        """Return the monomial exponent table (M, 3) the tables are written in (int64)."""
        return np.ascontiguousarray(self._exps, dtype=np.int64)

    @property
    def n_monomials(self) -> int:
        """Return the number of monomials M of the tables."""
        return int(self._exps.shape[0])

    @property
    def n_powers(self) -> int:
        """Return the number of powers of the in-segment magnitude position (4: cubic; 1: one knot)."""
        return int(self._powers)

    def weights_table(self, sigma: np.ndarray) -> np.ndarray:
        """Return the tables W (S, powers * M, 4 * 2C) whitened by `sigma` (2C,) instead of this model's own sigma."""
        factor = np.tile(self.sigma / np.asarray(sigma, float), N_ROWS)
        return np.ascontiguousarray(self._w * factor[None, None, :])

    @property
    def starts(self) -> np.ndarray:
        """Return the magnitude segments' starts (S,), log|B| with |B| in nT (estimator/prepare_core.py takes them)."""
        return self._starts

    @property
    def range_nT(self) -> tuple[float, float]:
        """Return the tables' magnitude range (lo, hi) in nT; magnitudes outside are clamped to it."""
        return self._range_nT

    def segments(self, b_nT) -> tuple[np.ndarray, np.ndarray]:
        """Return (segment index (N,), t = log|B| - segment start (N,)) for magnitudes b_nT (nT), clamped."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        lo, hi = self._range_nT
        x = np.log(np.clip(np.nan_to_num(b, nan=lo, posinf=hi, neginf=lo), lo, hi))
        s = np.clip(np.searchsorted(self._starts, x, side="right") - 1, 0, self._starts.size - 1)
        return s, x - self._starts[s]

    def segment_of(self, b_nT: float) -> tuple[int, float]:
        """Return (segment index, t = log|B| - segment start) for one magnitude b_nT (nT), clamped like segments()."""
        lo, hi = self._range_nT
        b = lo if b_nT != b_nT else min(max(b_nT, lo), hi)
        x = math.log(b)
        s = min(max(bisect.bisect_right(self._starts_list, x) - 1, 0), len(self._starts_list) - 1)
        return s, x - self._starts_list[s]

    def evaluate(self, u, b_nT: float) -> np.ndarray:
        """Return whitened rows (4, 2C): h(u, |B|) / sigma and its ambient gradient d/d(x, y, z), sensor frame."""
        s, t = self.segments(b_nT)
        return self.evaluate_in_segment(u, int(s[0]), float(t[0]))

    def evaluate_in_segment(self, u, segment: int, t: float, out: np.ndarray | None = None) -> np.ndarray:
        """Return whitened rows (4, 2C) at unit u (3 floats) in a magnitude segment from `segments`.

        With `out` (a C-contiguous (4, 2C) array, or a flat (8C,) one) the rows are written there and it is returned.
        """
        x, y, z = u
        d = self.degree
        pw = [1.0] * (3 * (d + 1))
        for e in range(1, d + 1):
            pw[e] = pw[e - 1] * x
            pw[d + 1 + e] = pw[d + e] * y
            pw[2 * d + 2 + e] = pw[2 * d + 1 + e] * z
        m3 = np.array(pw).take(self._flat_index)
        mono = m3[0] * m3[1] * m3[2]
        if self._powers > 1:
            mono = np.multiply.outer(np.array((1.0, t, t * t, t * t * t)), mono).ravel()
        if out is None:
            return (mono @ self._w[segment]).reshape(self._out_shape)
        np.matmul(mono, self._w[segment], out=out if out.ndim == 1 else out.reshape(-1))
        return out

    def evaluate_many(self, u: np.ndarray, b_nT: float) -> np.ndarray:
        """Return whitened rows (N, 4, 2C) at unit directions u (N, 3) and one magnitude b_nT (nT)."""
        s, t = self.segments(b_nT)
        return self.evaluate_many_in_segment(u, int(s[0]), float(t[0]))

    def evaluate_many_in_segment(self, u: np.ndarray, segment: int, t: float) -> np.ndarray:
        """Return whitened rows (N, 4, 2C) at unit directions u (N, 3) in one magnitude segment."""
        u = np.atleast_2d(np.asarray(u, float))
        mono = monomials(u, self._exps)
        if self._powers > 1:
            tp = np.array([1.0, t, t * t, t * t * t])
            mono = (tp[None, :, None] * mono[:, None, :]).reshape(u.shape[0], -1)
        return (mono @ self._w[segment]).reshape((u.shape[0],) + self._out_shape)

    def tangent_fisher(self, u: np.ndarray, b_nT: float) -> np.ndarray:
        """Return the single-sample Fisher information (N, 2, 2) of the direction in tangent_basis(u), 1/rad^2."""
        u = np.atleast_2d(u)
        rows = self.evaluate_many(u, b_nT)
        e1, e2 = tangent_basis(u)
        h_t = np.stack([np.einsum("nkm,nk->nm", rows[:, 1:], e) for e in (e1, e2)], axis=-1)  # (N, 2C, 2)
        return np.einsum("nmi,nmj->nij", h_t, h_t)

    def sphere_medians(self, b_nT: float, n_points: int = 600) -> tuple[float, float]:
        """Return sphere medians of the single-sample bound sqrt(trace J^-1) (rad) and of the RMS amplitude (V)."""
        key = (float(b_nT), int(n_points))
        cache = self.__dict__.setdefault("_medians", {})
        if key not in cache:
            cache[key] = self._sphere_medians(b_nT, n_points)
        return cache[key]

    def _sphere_medians(self, b_nT: float, n_points: int) -> tuple[float, float]:
        """Compute sphere_medians (not cached)."""
        grid = fibonacci_sphere(n_points)
        info = self.tangent_fisher(grid, b_nT)
        det = info[:, 0, 0] * info[:, 1, 1] - info[:, 0, 1] ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            bound = np.sqrt(np.where(det > 0, (info[:, 0, 0] + info[:, 1, 1]) / det, np.inf))
        z = self.evaluate_many(grid, b_nT)[:, 0] * self.sigma
        amp = np.sqrt(np.mean(z ** 2, axis=1) * 2)
        return median(bound), median(amp)


def apply_drifts(rows: np.ndarray, log_gain: np.ndarray, phase: np.ndarray) -> np.ndarray:
    """Return rows (..., R, 2C) with every channel's Z = X + iY multiplied by exp(log_gain + i phase), (..., C) each."""
    scale = np.exp(log_gain)
    ca = (scale * np.cos(phase))[..., None, :]
    sa = (scale * np.sin(phase))[..., None, :]
    x, y = rows[..., 0::2], rows[..., 1::2]
    out = np.empty_like(rows)
    out[..., 0::2] = ca * x - sa * y
    out[..., 1::2] = sa * x + ca * y
    return out


def drift_jacobian(h: np.ndarray, layout: "StateLayout", channel_probe_index: np.ndarray) -> np.ndarray:
    """Return dh/d(drift states), transposed: (..., n_gain + n_phase, 2C) from h (..., 2C) (dZ/dg = Z, dZ/dphi = iZ)."""
    n_ch = layout.n_channels
    out = np.zeros(h.shape[:-1] + (layout.n_gain + layout.n_phase, 2 * n_ch))
    k = np.arange(n_ch)
    if layout.n_gain:
        rows = channel_probe_index
        out[..., rows, 2 * k] = h[..., 0::2]
        out[..., rows, 2 * k + 1] = h[..., 1::2]
    if layout.n_phase:
        rows = layout.n_gain + k
        out[..., rows, 2 * k] = -h[..., 1::2]
        out[..., rows, 2 * k + 1] = h[..., 0::2]
    return out


@dataclass(frozen=True)
class StateLayout:
    """Named slices of the error state: direction (2), optional gains (P) and phases (C), then rate (3)."""

    n_probes: int
    n_channels: int
    gain_drift: bool
    phase_drift: bool

    @cached_property
    def n_gain(self) -> int:
        """Return the number of gain-drift states (one per probe, or 0)."""
        return self.n_probes if self.gain_drift else 0

    @cached_property
    def n_phase(self) -> int:
        """Return the number of phase-drift states (one per channel, or 0)."""
        return self.n_channels if self.phase_drift else 0

    @cached_property
    def direction(self) -> slice:
        """Return the slice of the tangent-plane direction error (rad)."""
        return DIRECTION

    @cached_property
    def gain(self) -> slice:
        """Return the slice of the per-probe log-gain drifts."""
        return slice(2, 2 + self.n_gain)

    @cached_property
    def phase(self) -> slice:
        """Return the slice of the per-channel phase-offset drifts (rad)."""
        return slice(self.gain.stop, self.gain.stop + self.n_phase)

    @cached_property
    def drift(self) -> slice:
        """Return the slice of all drift states (gains then phases)."""
        return slice(self.gain.start, self.phase.stop)

    @cached_property
    def observed(self) -> slice:
        """Return the slice of states the measurement depends on: direction and drifts (contiguous)."""
        return slice(0, self.phase.stop)

    @cached_property
    def rate(self) -> slice:
        """Return the slice of the angular velocity of the field direction, sensor frame (rad/s)."""
        return slice(self.phase.stop, self.phase.stop + 3)

    @cached_property
    def size(self) -> int:
        """Return the total error-state dimension."""
        return self.rate.stop
