"""Fast response-level model of the simulated sensor: lock-in outputs from field direction and |B|.

This is the steady-state, first-order-in-modulation solution of the same Bloch equations that
`bloch.py` integrates in time (same parameters, same sign conventions), solved in closed form:

* Work in a frame (e1, e2, u) around the field direction u. Precession, relaxation, isotropic
  pump loss and spin exchange all commute with rotations about u, so every vector splits into a
  longitudinal part (along u) and two circular parts: beta = v.e1 - i v.e2 (co-rotating with the
  Bell-Bloom drive, resonant) and alpha = v.e1 + i v.e2 (counter-rotating).
* For each part the two isotopes form a 2x2 linear coupled-mode system (REFERENCES.md, 'Two
  isotopes coupled by spin exchange'): (G_i + i(w - W_i)) P_i - k P_other = drive_i, with W_i the
  isotope's precession rate including the nonlinear-Zeeman heading shift (which follows the
  isotope's longitudinal polarization, hence the pump-field angle), w the pump's modulation
  frequency and G_i the total damping (relaxation + mean pumping + exchange loss).
* The resonant part gives the DESIGN.md channel factor: probe . beta-part = (c + i s)/2 times
  the coupled-mode response; the counter-rotating and longitudinal parts are non-resonant terms of
  order Gamma/omega (about 1 % at 1 uT), kept so the two models agree closely at low field.

Sign convention: with dP/dt = gamma P x B (gamma > 0) and lock-in reference exp(-i w t) the
physics natively gives c + i s, i.e. handedness sigma = -1 in Z = g exp(i phi0) (c - i sigma s).
A channel configured with handedness +1 reports the complex conjugate (its quadrature sign is
reversed), which also reverses the sign of its phase-versus-detuning slope.
"""

from __future__ import annotations

import numpy as np

from .lockin import channel_outputs
from .sensor import SensorConfig


def _solve2(a0, a1, k, d0, d1):
    """Solve [[a0, -k], [-k, a1]] x = [d0, d1] elementwise; returns (x0, x1)."""
    det = a0 * a1 - k * k
    return (a1 * d0 + k * d1) / det, (k * d0 + a0 * d1) / det


def transverse_frame(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return unit vectors e1, e2 (N,3) with (e1, e2, u) right-handed, for unit directions u (N,3)."""
    helper = np.zeros_like(u)
    use_x = np.abs(u[:, 0]) < 0.9
    helper[use_x, 0] = 1.0
    helper[~use_x, 1] = 1.0
    e1 = helper - np.sum(helper * u, axis=1, keepdims=True) * u
    e1 /= np.sqrt(np.sum(e1 * e1, axis=1, keepdims=True))
    e2 = np.empty_like(u)
    e2[:, 0] = u[:, 1] * e1[:, 2] - u[:, 2] * e1[:, 1]
    e2[:, 1] = u[:, 2] * e1[:, 0] - u[:, 0] * e1[:, 2]
    e2[:, 2] = u[:, 0] * e1[:, 1] - u[:, 1] * e1[:, 0]
    return e1, e2


def _prepare(u, b_nT):
    """Validate and normalize directions u (N, 3) and magnitudes b (N,) nT."""
    u = np.asarray(u, dtype=float)
    if u.ndim == 1:
        u = u[None, :]
    if u.ndim != 2 or u.shape[1] != 3:
        raise ValueError(f"u: expected shape (N, 3), got {u.shape}")
    norm = np.sqrt(np.sum(u * u, axis=1))
    if not (np.all(np.isfinite(norm)) and np.all(norm > 0.0)):
        raise ValueError("u: directions must be finite and nonzero")
    u = u / norm[:, None]
    b = np.broadcast_to(np.asarray(b_nT, dtype=float), (u.shape[0],)).astype(float)
    if not (np.all(np.isfinite(b)) and np.all(b > 0.0)):
        raise ValueError("b_nT: field magnitudes must be finite and > 0")
    return u, b


def larmor_hz(config: SensorConfig, b_nT) -> np.ndarray:
    """Return the Larmor frequencies (N, 2) in Hz of the isotopes pumped by pump a and pump b."""
    b = np.atleast_1d(np.asarray(b_nT, dtype=float))
    return b[:, None] * config.gamma_hz_per_nt()[None, :]


def heading_shift_coefficient(config: SensorConfig, f_larmor_hz: np.ndarray) -> np.ndarray:
    """Return kappa (N, 2) in rad/s: precession rate = 2 pi f_L - kappa * (longitudinal polarization).

    kappa = heading_strength * 2 pi * 2 f_L^2 / f_hfs: the nonlinear Zeeman spacing of adjacent
    lines (Breit-Rabi, see atoms.py); the resonance centroid moves with the population imbalance.
    """
    split = 2.0 * f_larmor_hz ** 2 / config.hyperfine_hz()[None, :]
    return config.heading_strength * 2.0 * np.pi * split


class _Parts:
    """Beam projections in the (e1, e2, u) frame and the cell constants, computed once per call."""

    def __init__(self, config: SensorConfig, u: np.ndarray, b: np.ndarray):
        e1, e2 = transverse_frame(u)
        pumps, probes = config.pump_array(), config.probe_array()
        self.p_long = u @ pumps.T                             # (N, 2): p_j . u
        self.p_beta = e1 @ pumps.T - 1j * (e2 @ pumps.T)      # (N, 2): p_j.e1 - i p_j.e2
        self.q_long = u @ probes.T                            # (N, P)
        self.q_beta = e1 @ probes.T - 1j * (e2 @ probes.T)
        self.weights = config.pump_weights()
        self.rates = np.array(config.pump_rate_per_s)
        self.damping = config.total_damping_per_s()
        self.k = config.spin_exchange_per_s
        self.f_l = larmor_hz(config, b)
        self.kappa = heading_shift_coefficient(config, self.f_l)


def _steady(parts: _Parts) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (P_L (N, 2), beta parts (N, 2), precession rates W (N, 2) rad/s) without modulation."""
    g, k = parts.damping, parts.k
    src_long = (parts.p_long * parts.rates[None, :]) @ parts.weights   # sum_j R_j W[j, i] p_j.u
    src_beta = (parts.p_beta * parts.rates[None, :]) @ parts.weights
    pl0, pl1 = _solve2(g[0], g[1], k, src_long[:, 0], src_long[:, 1])
    p_l = np.stack([pl0, pl1], axis=1)
    omega = 2.0 * np.pi * parts.f_l - parts.kappa * p_l
    b0, b1 = _solve2(g[0] - 1j * omega[:, 0], g[1] - 1j * omega[:, 1], k, src_beta[:, 0], src_beta[:, 1])
    return p_l, np.stack([b0, b1], axis=1), omega


def _phasors(config: SensorConfig, parts: _Parts, f_mod: np.ndarray) -> np.ndarray:
    """Return probe phasors (N, P, 2) from precomputed parts and modulation frequencies (N, 2) Hz."""
    g, k = parts.damping, parts.k
    wprobe = np.array(config.probe_weight)
    w_mod = 2.0 * np.pi * f_mod
    p_l, beta0, omega = _steady(parts)
    alpha0 = np.conj(beta0)
    p_alpha, q_alpha = np.conj(parts.p_beta), np.conj(parts.q_beta)
    out = np.empty((p_l.shape[0], parts.q_long.shape[1], 2), dtype=complex)
    for j in range(2):
        wj = w_mod[:, j]
        amp = parts.rates[j] * config.modulation_depth * parts.weights[j]   # (2,): drive on each isotope
        d_long = amp[None, :] * (parts.p_long[:, j:j + 1] - p_l)
        d_beta = amp[None, :] * (parts.p_beta[:, j:j + 1] - beta0)
        d_alpha = amp[None, :] * (p_alpha[:, j:j + 1] - alpha0)
        l0, l1 = _solve2(g[0] + 1j * wj, g[1] + 1j * wj, k, d_long[:, 0], d_long[:, 1])
        b0, b1 = _solve2(g[0] + 1j * (wj - omega[:, 0]), g[1] + 1j * (wj - omega[:, 1]),
                         k, d_beta[:, 0], d_beta[:, 1])
        a0, a1 = _solve2(g[0] + 1j * (wj + omega[:, 0]), g[1] + 1j * (wj + omega[:, 1]),
                         k, d_alpha[:, 0], d_alpha[:, 1])
        mix_long = wprobe[0] * l0 + wprobe[1] * l1
        mix_beta = wprobe[0] * b0 + wprobe[1] * b1
        mix_alpha = wprobe[0] * a0 + wprobe[1] * a1
        # probe . phasor = q_L L + (q_beta alpha + q_alpha beta) / 2; q_alpha beta is the resonant
        # term and reduces to (c + i s) times the coupled-mode response.
        out[:, :, j] = (parts.q_long * mix_long[:, None]
                        + 0.5 * (parts.q_beta * mix_alpha[:, None] + q_alpha * mix_beta[:, None]))
    return out


def response(config: SensorConfig, u, b_nT, f_mod_hz=None) -> tuple[np.ndarray, np.ndarray]:
    """Return noise-free (f (N, 2) Hz [f_a, f_b], z (N, C) complex lock-in X+iY in V) at directions u.

    u: (N, 3) field directions in the sensor frame (normalized here); b_nT: (N,) or scalar |B| in nT.
    The modulation frequencies track the Larmor frequencies gamma*|B| unless f_mod_hz (N, 2) is given.
    """
    u, b = _prepare(u, b_nT)
    parts = _Parts(config, u, b)
    f = parts.f_l.copy()
    if f_mod_hz is not None:
        f = np.broadcast_to(np.asarray(f_mod_hz, float), f.shape).copy()
    return f, channel_outputs(config, _phasors(config, parts, f))


def add_noise(z: np.ndarray, config: SensorConfig, rng: np.random.Generator) -> np.ndarray:
    """Return z (N, C) plus white Gaussian lock-in noise on X and Y (V, per-channel std from config)."""
    z = np.asarray(z)
    sx = np.array(config.noise_x_V)[None, :]
    sy = np.array(config.noise_y_V)[None, :]
    return z + sx * rng.standard_normal(z.shape) + 1j * sy * rng.standard_normal(z.shape)
