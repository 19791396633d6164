"""Time-domain Bloch equations of the two isotopes' ground-state polarizations, many fields at once.

For isotope i (index 0: pumped by pump a, index 1: pumped by pump b), field B = |B| u:

    dP_i/dt = W_i(P_i) P_i x u                      precession, W_i = 2 pi gamma_i |B| - kappa_i (u . P_i)
              + sum_j R_j(t) X[j, i] (p_j - P_i)    optical pumping by both pumps
              - Gamma_i P_i                         relaxation
              + k (P_other - P_i)                   spin exchange between the isotopes

with R_j(t) = R_j (1 + m cos(2 pi f_j t)) (Bell-Bloom intensity modulation), X[j, i] = 1 for the
pump's own isotope and the cross-pumping fraction for the other, and kappa_i the phenomenological
heading-error coefficient (nonlinear Zeeman spacing times strength; see response.py).

Integration: Strang splitting with an exact rotation about u (Rodrigues) for half a step, a
second-order Runge-Kutta (midpoint) step for the slow linear terms, and another half rotation.
The rotation is exact at any frequency, so the step only has to resolve the drive and the beat
between the isotopes; about 10 steps per period of the highest Larmor frequency is plenty.
The probe signal of probe k is q_k . (w_0 P_0 + w_1 P_1) (polarization units).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .sensor import SensorConfig


@dataclass(frozen=True)
class BlochProblem:
    """Per-row constants of the Bloch equations (rows = field directions/magnitudes)."""

    u: np.ndarray          # (3, N, 1) unit field directions, component first
    omega0: np.ndarray     # (N, 2) rad/s, linear Larmor precession rates of the two isotopes
    kappa: np.ndarray      # (N, 2) rad/s, heading shift per unit longitudinal polarization
    w_mod: np.ndarray      # (N, 2) rad/s, modulation angular frequency of pump a, pump b
    pumps: np.ndarray      # (2, 3) pump axes
    probes: np.ndarray     # (P, 3) probe axes
    cross: np.ndarray      # (2, 2) X[j, i]
    rates: np.ndarray      # (2,) mean pump rates R_j, 1/s
    depth: float           # modulation depth m
    relax: np.ndarray      # (2,) Gamma_i, 1/s
    k: float               # spin-exchange rate, 1/s
    probe_weight: np.ndarray  # (2,)


def make_problem(config: SensorConfig, u: np.ndarray, b_nT, f_mod_hz=None) -> BlochProblem:
    """Return the Bloch-equation constants for field directions u (N, 3) and |B| (N,) in nT."""
    u = np.asarray(u, dtype=float).reshape(-1, 3)
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    n = u.shape[0]
    b = np.broadcast_to(np.asarray(b_nT, dtype=float), (n,))
    if np.any(b <= 0.0):
        raise ValueError("b_nT: field magnitudes must be > 0")
    f_l = b[:, None] * config.gamma_hz_per_nt()[None, :]
    f_mod = f_l if f_mod_hz is None else np.broadcast_to(np.asarray(f_mod_hz, float), (n, 2))
    kappa = config.heading_strength * 2.0 * np.pi * 2.0 * f_l ** 2 / config.hyperfine_hz()[None, :]
    return BlochProblem(
        u=u.T[:, :, None].copy(), omega0=2.0 * np.pi * f_l, kappa=kappa,
        w_mod=2.0 * np.pi * np.array(f_mod, dtype=float), pumps=config.pump_array(),
        probes=config.probe_array(), cross=config.pump_weights(),
        rates=np.array(config.pump_rate_per_s), depth=config.modulation_depth,
        relax=np.array(config.relaxation_per_s), k=config.spin_exchange_per_s,
        probe_weight=np.array(config.probe_weight))


def step_for(problem: BlochProblem, steps_per_period: float = 10.0) -> float:
    """Return an integration step (s) giving steps_per_period steps per period of the fastest line."""
    w_max = max(float(np.max(problem.omega0)), float(np.max(problem.w_mod)))
    return 2.0 * np.pi / (w_max * steps_per_period)


def initial_state(problem: BlochProblem) -> np.ndarray:
    """Return a starting polarization (3, N, 2): the unmodulated longitudinal steady state, no coherence.

    Only a head start (the transverse parts and modulation effects still settle); it saves waiting
    for the slow common longitudinal mode, which relaxes at Gamma + R only.
    """
    pump_long = np.einsum("cn,jc->nj", problem.u[:, :, 0], problem.pumps)      # (N, 2): p_j . u
    src = (pump_long * problem.rates[None, :]) @ problem.cross                 # (N, 2)
    damping = problem.relax + problem.rates @ problem.cross + problem.k        # (2,)
    det = damping[0] * damping[1] - problem.k ** 2
    p0 = (damping[1] * src[:, 0] + problem.k * src[:, 1]) / det
    p1 = (problem.k * src[:, 0] + damping[0] * src[:, 1]) / det
    return problem.u * np.stack([p0, p1], axis=1)[None, :, :]


def _rotation(problem: BlochProblem, p: np.ndarray, half_dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Return (cos, sin) (N, 2) of the half-step precession angle -W_i(P) * half_dt.

    W depends on the longitudinal polarization only through the small heading term, which changes
    on the slow (pumping) time scale, so one evaluation serves both half rotations of a step.
    """
    along = p[0] * problem.u[0] + p[1] * problem.u[1] + p[2] * problem.u[2]
    angle = -(problem.omega0 - problem.kappa * along) * half_dt
    return np.cos(angle), np.sin(angle)


def _rotate(problem: BlochProblem, p: np.ndarray, c: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Return p (3, N, 2) rotated about u by the angle with cosine c and sine s (Rodrigues)."""
    ux, uy, uz = problem.u
    px, py, pz = p
    c1 = (1.0 - c) * (ux * px + uy * py + uz * pz)
    out = np.empty_like(p)
    out[0] = px * c + (uy * pz - uz * py) * s + ux * c1
    out[1] = py * c + (uz * px - ux * pz) * s + uy * c1
    out[2] = pz * c + (ux * py - uy * px) * s + uz * c1
    return out


def _pump_tensor(problem: BlochProblem) -> np.ndarray:
    """Return T (2, 8): R (N, 2) @ T gives the pump sources (N, 3*2) then the pump loss rates (N, 2)."""
    src = np.einsum("ji,jc->jci", problem.cross, problem.pumps).reshape(2, 6)
    return np.concatenate([src, problem.cross], axis=1)


def _slow_rhs(problem: BlochProblem, p: np.ndarray, pump_rate: np.ndarray, tensor: np.ndarray) -> np.ndarray:
    """Return dP/dt (3, N, 2) of pumping, relaxation and spin exchange at pump rates R_j(t) (N, 2)."""
    mixed = pump_rate @ tensor                                         # (N, 8)
    src = mixed[:, :6].reshape(-1, 3, 2).transpose(1, 0, 2)           # (3, N, 2)
    loss = problem.relax[None, :] + problem.k + mixed[:, 6:]           # (N, 2)
    return src - loss * p + problem.k * p[:, :, ::-1]


def pump_rates(problem: BlochProblem, t: np.ndarray) -> np.ndarray:
    """Return R_j(t) = R_j (1 + m cos(w_j t)) for times t (M,), shape (M, N, 2), 1/s."""
    phase = problem.w_mod[None, :, :] * np.asarray(t, dtype=float)[:, None, None]
    return problem.rates[None, None, :] * (1.0 + problem.depth * np.cos(phase))


def probe_signal(problem: BlochProblem, p: np.ndarray) -> np.ndarray:
    """Return the probe signals (N, P) = q_k . (w_0 P_0 + w_1 P_1), polarization units."""
    mixed = p @ problem.probe_weight                                   # (3, N)
    return mixed.T @ problem.probes.T


def integrate(problem: BlochProblem, p: np.ndarray, t0: float, dt: float, n_steps: int):
    """Advance p (3, N, 2) by n_steps from t0; return (final p, times (M,), probe signals (N, P, M))."""
    half = 0.5 * dt
    out = np.empty((p.shape[1], problem.probes.shape[0], n_steps))
    times = t0 + dt * np.arange(1, n_steps + 1)
    rates = pump_rates(problem, t0 + half * np.arange(2 * n_steps))      # start and middle of each step
    tensor = _pump_tensor(problem)
    for i in range(n_steps):
        c, s = _rotation(problem, p, half)
        p = _rotate(problem, p, c, s)
        mid = p + half * _slow_rhs(problem, p, rates[2 * i], tensor)
        p = p + dt * _slow_rhs(problem, mid, rates[2 * i + 1], tensor)
        p = _rotate(problem, p, c, s)
        out[:, :, i] = probe_signal(problem, p)
    return p, times, out
