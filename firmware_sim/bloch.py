"""Time-domain Bloch equations of the cell's precessing species, many fields at once.

The equations are those of `cell.py` (upper hyperfine levels of both isotopes, optionally their
lower levels): precession about the field plus the pumps' light-shift fields, heading shift,
Bell-Bloom pumping R_j(t) = R_j (1 + m cos(2 pi f_j t)) by both pumps (cross-pumping included),
relaxation and spin exchange, all integrated as written, to every order in the modulation.

Integration (compiled with numba): Strang splitting with an exact rotation about u by the mean
longitudinal precession rate (field, mean light shift along u, heading shift) for half a step, a
second-order Runge-Kutta (midpoint) step for everything else (pumping, relaxation, exchange, the
light-shift field's transverse part and its modulation), and another half rotation. The rotation
is exact at any frequency, so the step only has to resolve the drive and keep the splitting
error small; `row_steps` chooses it per field (see there), `step_for` takes the smallest. The probe signal of probe k is
q_k . sum_s w_s P_s (polarization units).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .cell import CellRates, cell_rates, longitudinal_polarization
from .loop import modulation_hz
from .sensor import SensorConfig

# Splitting error of the scheme: the phase comes out off by about SPLIT_ERROR_DEG * omega * dt^2 * G
# (omega the fastest line, G the largest total damping; measured on the nominal cell at 1 uT, 0.33
# deg at 10 steps per period, falling as dt^2); row_steps keeps it below STEP_TOLERANCE_DEG.
SPLIT_ERROR_DEG = 24.0
STEP_TOLERANCE_DEG = 0.01


@dataclass(frozen=True)
class BlochProblem:
    """Per-row constants of the Bloch equations (rows = field directions/magnitudes)."""

    cell: CellRates
    w_mod: np.ndarray      # (N, 2) rad/s, modulation angular frequency of pump a, pump b
    probes: np.ndarray     # (P, 3) probe axes

    @property
    def n_rows(self) -> int:
        """Return the number of rows N."""
        return int(self.w_mod.shape[0])


def make_problem(config: SensorConfig, u: np.ndarray, b_nT, f_mod_hz=None) -> BlochProblem:
    """Return the Bloch-equation constants for field directions u (N, 3) and |B| (N,) in nT.

    The modulation frequencies are those the frequency loops set (loop.py) unless f_mod_hz is given.
    """
    u = np.asarray(u, dtype=float).reshape(-1, 3)
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    n = u.shape[0]
    b = np.broadcast_to(np.asarray(b_nT, dtype=float), (n,)).copy()
    if np.any(b <= 0.0):
        raise ValueError("b_nT: field magnitudes must be > 0")
    cell = cell_rates(config, u, b)
    if f_mod_hz is None:
        f_mod = modulation_hz(config, cell)
    else:
        f_mod = np.broadcast_to(np.asarray(f_mod_hz, float), (n, 2))
    return BlochProblem(cell=cell, w_mod=2.0 * np.pi * np.array(f_mod, dtype=float),
                        probes=config.probe_array())


def row_steps(problem: BlochProblem, steps_per_period: float = 10.0) -> np.ndarray:
    """Return the integration step (s) each row needs on its own, (N,).

    The smaller of steps_per_period steps per period of the row's fastest line (resolution) and
    the step that keeps the splitting error, SPLIT_ERROR_DEG * omega * dt^2 * G, below
    STEP_TOLERANCE_DEG: at low field the second bound is the tighter (for the nominal cell about
    57 steps per period at 1 uT, 26 at 5 uT, 13 at 20 uT), from ~50 uT up the first.
    """
    cell = problem.cell
    w_max = np.maximum(np.max(np.abs(cell.larmor_rate()), axis=1), np.max(problem.w_mod, axis=1))
    rate = np.max(cell.damping(), axis=1)
    resolution = 2.0 * np.pi / (w_max * steps_per_period)
    accuracy = np.sqrt(STEP_TOLERANCE_DEG / (SPLIT_ERROR_DEG * w_max * rate))
    return np.minimum(resolution, accuracy)


def step_for(problem: BlochProblem, steps_per_period: float = 10.0) -> float:
    """Return one integration step (s) good for every row: the smallest of row_steps."""
    return float(np.min(row_steps(problem, steps_per_period)))


def initial_state(problem: BlochProblem) -> np.ndarray:
    """Return a starting polarization (N, S, 3): the unmodulated longitudinal steady state, no coherence.

    Only a head start (the transverse parts and modulation effects still settle); it saves waiting
    for the slow common longitudinal mode, which relaxes at Gamma + R only.
    """
    cell = problem.cell
    p_long = np.zeros((problem.n_rows, cell.n_species))
    p_long[:, :2] = longitudinal_polarization(cell)
    if cell.n_species > 2:
        # A lower level is pumped like its upper level but gains nothing by exchange.
        src = (cell.pump_along() * cell.rates) @ cell.cross
        p_long[:, 2:] = src / cell.damping()
    return np.ascontiguousarray(p_long[:, :, None] * cell.u[:, None, :])


@njit(cache=True)
def _slow(p, out, cosines, rates, light, light_along, pumps, cross, relax, exchange, isotope,
          partner, u, depth):
    """Write into out (S, 3) the pumping, relaxation, exchange and transverse light-shift terms of dP/dt."""
    n_species = p.shape[0]
    mod0 = 1.0 + depth * cosines[0]
    mod1 = 1.0 + depth * cosines[1]
    for s in range(n_species):
        i = isotope[s]
        r0 = rates[0] * mod0 * cross[0, i]
        r1 = rates[1] * mod1 * cross[1, i]
        loss = relax[i] + exchange[i] + r0 + r1
        l0 = light[s, 0] * mod0
        l1 = light[s, 1] * mod1
        la = light_along[s]
        fx = l0 * pumps[0, 0] + l1 * pumps[1, 0] - la * u[0]
        fy = l0 * pumps[0, 1] + l1 * pumps[1, 1] - la * u[1]
        fz = l0 * pumps[0, 2] + l1 * pumps[1, 2] - la * u[2]
        px, py, pz = p[s, 0], p[s, 1], p[s, 2]
        out[s, 0] = r0 * pumps[0, 0] + r1 * pumps[1, 0] - loss * px + (py * fz - pz * fy)
        out[s, 1] = r0 * pumps[0, 1] + r1 * pumps[1, 1] - loss * py + (pz * fx - px * fz)
        out[s, 2] = r0 * pumps[0, 2] + r1 * pumps[1, 2] - loss * pz + (px * fy - py * fx)
        q = partner[s]
        if q >= 0:
            out[s, 0] += exchange[i] * p[q, 0]
            out[s, 1] += exchange[i] * p[q, 1]
            out[s, 2] += exchange[i] * p[q, 2]


@njit(cache=True)
def _rotate(p, cos_a, sin_a, u):
    """Rotate every species' p[s] (S, 3) about u by the angle with cosine cos_a[s], sine sin_a[s] (Rodrigues)."""
    for s in range(p.shape[0]):
        c, sn = cos_a[s], sin_a[s]
        px, py, pz = p[s, 0], p[s, 1], p[s, 2]
        c1 = (1.0 - c) * (u[0] * px + u[1] * py + u[2] * pz)
        p[s, 0] = px * c + (u[1] * pz - u[2] * py) * sn + u[0] * c1
        p[s, 1] = py * c + (u[2] * px - u[0] * pz) * sn + u[1] * c1
        p[s, 2] = pz * c + (u[0] * py - u[1] * px) * sn + u[2] * c1


@njit(cache=True)
def _integrate_kernel(p, t0, dt, n_steps, u, larmor, kappa, light, rates, w_mod, depth, pumps, cross,
                      relax, exchange, isotope, partner, weight, probes, out):
    """Advance p (N, S, 3) by n_steps of dt from t0, writing probe signals into out (N, P, n_steps)."""
    n_rows, n_species = p.shape[0], p.shape[1]
    half = 0.5 * dt
    k1 = np.empty((n_species, 3))
    mid = np.empty((n_species, 3))
    k2 = np.empty((n_species, 3))
    cos_a = np.empty(n_species)
    sin_a = np.empty(n_species)
    light_along = np.empty(n_species)
    cos_start = np.empty(2)
    cos_mid = np.empty(2)
    base_cos = np.empty(n_species)
    base_sin = np.empty(n_species)
    for n in range(n_rows):
        pn = p[n]
        un = u[n]
        for s in range(n_species):
            light_along[s] = 0.0
            for j in range(2):
                light_along[s] += light[n, s, j] * (pumps[j, 0] * un[0] + pumps[j, 1] * un[1]
                                                    + pumps[j, 2] * un[2])
            # Rotation by -Omega_along dt/2 (dP/dt = P x Omega turns P the negative way about Omega).
            base_cos[s] = math.cos(-larmor[n, s] * half)
            base_sin[s] = math.sin(-larmor[n, s] * half)
        # The drive's phase advances by w dt/2 per half step: a rotation recurrence instead of cos().
        step_c0, step_s0 = math.cos(w_mod[n, 0] * half), math.sin(w_mod[n, 0] * half)
        step_c1, step_s1 = math.cos(w_mod[n, 1] * half), math.sin(w_mod[n, 1] * half)
        c0, s0 = math.cos(w_mod[n, 0] * t0), math.sin(w_mod[n, 0] * t0)
        c1, s1 = math.cos(w_mod[n, 1] * t0), math.sin(w_mod[n, 1] * t0)
        for i in range(n_steps):
            cos_start[0], cos_start[1] = c0, c1
            c0, s0 = c0 * step_c0 - s0 * step_s0, s0 * step_c0 + c0 * step_s0
            c1, s1 = c1 * step_c1 - s1 * step_s1, s1 * step_c1 + c1 * step_s1
            cos_mid[0], cos_mid[1] = c0, c1
            c0, s0 = c0 * step_c0 - s0 * step_s0, s0 * step_c0 + c0 * step_s0
            c1, s1 = c1 * step_c1 - s1 * step_s1, s1 * step_c1 + c1 * step_s1
            for s in range(n_species):
                # Heading: the angle grows by kappa (u.P) dt/2, normally a tiny angle (Taylor terms).
                along = pn[s, 0] * un[0] + pn[s, 1] * un[1] + pn[s, 2] * un[2]
                d = kappa[n, s] * along * half
                if abs(d) < 1e-3:
                    cd = 1.0 - 0.5 * d * d
                    sd = d - d * d * d / 6.0
                else:
                    cd = math.cos(d)
                    sd = math.sin(d)
                cos_a[s] = base_cos[s] * cd - base_sin[s] * sd
                sin_a[s] = base_sin[s] * cd + base_cos[s] * sd
            _rotate(pn, cos_a, sin_a, un)
            _slow(pn, k1, cos_start, rates[n], light[n], light_along, pumps, cross, relax, exchange,
                  isotope, partner, un, depth)
            for s in range(n_species):
                for c in range(3):
                    mid[s, c] = pn[s, c] + half * k1[s, c]
            _slow(mid, k2, cos_mid, rates[n], light[n], light_along, pumps, cross, relax, exchange,
                  isotope, partner, un, depth)
            for s in range(n_species):
                for c in range(3):
                    pn[s, c] += dt * k2[s, c]
            _rotate(pn, cos_a, sin_a, un)
            for k in range(probes.shape[0]):
                acc = 0.0
                for s in range(n_species):
                    acc += weight[s] * (probes[k, 0] * pn[s, 0] + probes[k, 1] * pn[s, 1]
                                        + probes[k, 2] * pn[s, 2])
                out[n, k, i] = acc


def integrate(problem: BlochProblem, p: np.ndarray, t0: float, dt: float, n_steps: int):
    """Advance p (N, S, 3) by n_steps from t0; return (final p, times (M,), probe signals (N, P, M))."""
    cell = problem.cell
    p = np.array(p, dtype=float, order="C")
    out = np.empty((problem.n_rows, problem.probes.shape[0], n_steps))
    partner = np.array([1, 0] + [-1] * (cell.n_species - 2), dtype=np.int64)
    c = np.ascontiguousarray
    _integrate_kernel(p, float(t0), float(dt), int(n_steps), c(cell.u), c(cell.larmor_rate()),
                      c(cell.kappa), c(cell.light_rate()), c(cell.rates), c(problem.w_mod),
                      float(cell.depth), c(cell.pumps), c(cell.cross), c(cell.relax, dtype=float),
                      c(cell.exchange, dtype=float), c(cell.isotope, dtype=np.int64), partner,
                      c(cell.probe_weight, dtype=float), c(problem.probes), out)
    times = t0 + dt * np.arange(1, n_steps + 1)
    return p, times, out
