"""Fast response-level model of the simulated sensor: lock-in outputs from field direction and |B|.

This is the steady-state, first-order-in-modulation solution of the same Bloch equations that
`bloch.py` integrates in time (constants from `cell.py`, same sign conventions), solved directly:

* Mean state: with the pumps unmodulated, dP_s/dt = 0 is a linear system for the species'
  polarization vectors (the two upper levels coupled by spin exchange, a lower level alone),
  except that the heading term moves each upper level's precession rate with its own longitudinal
  polarization: solved by fixed-point iteration from the longitudinal steady state (exact in one
  step unless a light shift tilts the precession axes off u, then two steps agree to ~1e-16).
* Modulated part: linearized about the mean state (the heading term's derivative included), the
  response to pump j's modulation m cos(w_j t) of the pumping rate and of the light-shift field is
  the complex phasor dP solving (i w_j - J) dP = d_j. Probe k's phasor at w_j is q_k . sum_s w_s dP_s.
* Both systems are solved in the frame (e1, e2, u) in circular components: precession about u is
  diagonal there, exchange acts component by component, and only the light shift's transverse
  field couples the longitudinal part to the transverse ones, so eliminating the transverse parts
  leaves a 2 x 2 system per row in closed form (`_solve`; checked against a dense Cartesian solve
  with numpy.linalg in tests/test_sim_realism.py).

Without coupling this reduces to the docs/physics.md channel factor (c + i s)/2 times the Bell-Bloom
resonance; the counter-rotating and longitudinal responses (order Gamma/omega, about 1 % at 1 uT)
come out of the same solve, so the two models agree closely at low field.

Sign convention: with dP/dt = gamma P x B (gamma > 0) and lock-in reference exp(-i w t) the
physics natively gives c + i s, i.e. handedness sigma = -1 in Z = g exp(i phi0) (c - i sigma s).
A channel configured with handedness +1 reports the complex conjugate (its quadrature sign is
reversed), which also reverses the sign of its phase-versus-detuning slope.
"""

from __future__ import annotations

import numpy as np

from .cell import CellRates, cell_rates, longitudinal_polarization
from .lockin import channel_outputs
from .loop import modulation_hz
from .sensor import SensorConfig

_HEADING_ITERATIONS = 2


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
    """Return the linear Larmor frequencies gamma*|B| (N, 2) in Hz of the isotopes of pump a and pump b."""
    b = np.atleast_1d(np.asarray(b_nT, dtype=float))
    return b[:, None] * config.gamma_hz_per_nt()[None, :]


def transverse_frame(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return unit vectors e1, e2 (N,3) with (e1, e2, u) right-handed, for unit directions u (N,3)."""
    helper = np.zeros_like(u)
    use_x = np.abs(u[:, 0]) < 0.9
    helper[use_x, 0] = 1.0
    helper[~use_x, 1] = 1.0
    e1 = helper - np.sum(helper * u, axis=1, keepdims=True) * u
    e1 /= np.sqrt(np.sum(e1 * e1, axis=1, keepdims=True))
    return e1, np.cross(u, e1)


def _inverse(m: list) -> list:
    """Return the inverse of a 1x1 or 2x2 matrix given as nested lists of (N,) arrays."""
    if len(m) == 1:
        return [[1.0 / m[0][0]]]
    det = m[0][0] * m[1][1] - m[0][1] * m[1][0]
    return [[m[1][1] / det, -m[0][1] / det], [-m[1][0] / det, m[0][0] / det]]


def _coupled(diagonal: list, exchange: np.ndarray) -> list:
    """Return [[a0, -k0], [-k1, a1]] (a pair) or [[a0]] (one species) as nested lists."""
    if len(diagonal) == 1:
        return [[diagonal[0]]]
    return [[diagonal[0], -exchange[0]], [-exchange[1], diagonal[1]]]


def _solve(w, damping, precession, exchange, to_beta, to_alpha, light_beta, d_long, d_beta, d_alpha):
    """Solve one group's linear system at angular frequency w (N,); return lists (L, beta, alpha).

    Every argument but w and exchange (k_i, 1/s) is a list over the group's species of (N,) arrays.
    In the circular components of the frame (e1, e2, u) (L = v.u, beta = v.e1 - i v.e2, alpha =
    v.e1 + i v.e2), P x Omega with Omega = W u + transverse part omega_beta couples only L with
    beta and alpha of the same species, and exchange couples the species component by component:

        (G + i(w - W)) beta - k beta_other = d_beta + to_beta L
        (G + i(w + W)) alpha - k alpha_other = d_alpha + to_alpha L
        (G + i w) L - k L_other - (i/2)(omega_beta alpha - conj(omega_beta) beta) = d_long

    Eliminating beta and alpha leaves a 2 x 2 (or 1 x 1) system for L: exact, in closed form.
    """
    g = len(damping)
    inv_b = _inverse(_coupled([damping[a] + 1j * (w - precession[a]) for a in range(g)], exchange))
    inv_a = _inverse(_coupled([damping[a] + 1j * (w + precession[a]) for a in range(g)], exchange))
    side_b = [[0.5j * np.conj(light_beta[a]) * inv_b[a][c] for c in range(g)] for a in range(g)]
    side_a = [[0.5j * light_beta[a] * inv_a[a][c] for c in range(g)] for a in range(g)]
    system = _coupled([damping[a] + 1j * w for a in range(g)], exchange)
    system = [[system[a][c] - side_a[a][c] * to_alpha[c] + side_b[a][c] * to_beta[c] for c in range(g)]
              for a in range(g)]
    rhs = [d_long[a] + sum(side_a[a][c] * d_alpha[c] - side_b[a][c] * d_beta[c] for c in range(g))
           for a in range(g)]
    inv_l = _inverse(system)
    p_long = [sum(inv_l[a][c] * rhs[c] for c in range(g)) for a in range(g)]
    beta = [sum(inv_b[a][c] * (d_beta[c] + to_beta[c] * p_long[c]) for c in range(g)) for a in range(g)]
    alpha = [sum(inv_a[a][c] * (d_alpha[c] + to_alpha[c] * p_long[c]) for c in range(g)) for a in range(g)]
    return p_long, beta, alpha


class _Geometry:
    """Beam projections in the frame (e1, e2, u) and the cell's per-row rates, computed once per call."""

    def __init__(self, cell: CellRates):
        e1, e2 = transverse_frame(cell.u)
        self.p_long = cell.pump_along()                                     # (N, 2): p_j . u
        self.p_beta = e1 @ cell.pumps.T - 1j * (e2 @ cell.pumps.T)          # (N, 2)
        self.q_long = cell.u @ cell.probes.T                                # (N, P)
        self.q_beta = e1 @ cell.probes.T - 1j * (e2 @ cell.probes.T)
        self.damping = cell.damping()                                       # (N, 2)
        self.light = cell.light_rate()                                      # (N, S, 2) rad/s
        self.light_beta = np.einsum("nsj,nj->ns", self.light, self.p_beta)  # transverse light field
        self.larmor = cell.larmor_rate()                                    # (N, S) rad/s


def _group_phasors(cell: CellRates, geo: _Geometry, group: list[int], f_mod: np.ndarray,
                   p_long0: np.ndarray, iterations: int) -> np.ndarray:
    """Return the probe phasors (N, P, 2) of species `group` (the exchange-coupled pair, or one alone)."""
    n = cell.u.shape[0]
    iso = [int(cell.isotope[s]) for s in group]
    exchange = cell.exchange
    damping = [geo.damping[:, i] for i in iso]
    light_beta = [geo.light_beta[:, s] for s in group]
    kappa = [cell.kappa[:, s] for s in group]
    rate = [[cell.rates[:, j] * cell.cross[j, i] for i in iso] for j in range(2)]   # [pump][species]
    src_long = [rate[0][a] * geo.p_long[:, 0] + rate[1][a] * geo.p_long[:, 1] for a in range(len(group))]
    src_beta = [rate[0][a] * geo.p_beta[:, 0] + rate[1][a] * geo.p_beta[:, 1] for a in range(len(group))]
    zero = np.zeros(n)
    # Mean state: the heading term makes W depend on L, iterated from the longitudinal start.
    p_long = [p_long0[:, s] for s in group]
    for _ in range(iterations):
        precession = [geo.larmor[:, s] - k * pl for s, k, pl in zip(group, kappa, p_long)]
        p_long, beta, _ = _solve(zero, damping, precession, exchange, [-1j * lb for lb in light_beta],
                                 [1j * np.conj(lb) for lb in light_beta], light_beta, src_long, src_beta,
                                 [np.conj(sb) for sb in src_beta])
        p_long = [pl.real for pl in p_long]
    precession = [geo.larmor[:, s] - k * pl for s, k, pl in zip(group, kappa, p_long)]
    alpha = [np.conj(b) for b in beta]
    # Linearized about it: the heading term adds -kappa dL (P x u), i.e. -i kappa beta dL to beta.
    to_beta = [-1j * (lb + k * b) for lb, k, b in zip(light_beta, kappa, beta)]
    to_alpha = [1j * (np.conj(lb) + k * a) for lb, k, a in zip(light_beta, kappa, alpha)]
    weight = cell.probe_weight[group]
    out = np.empty((n, cell.probes.shape[0], 2), dtype=complex)
    for j in range(2):
        pl, pb = geo.p_long[:, j], geo.p_beta[:, j]
        d_long, d_beta, d_alpha = [], [], []
        for a, s in enumerate(group):
            m_rate = cell.depth * rate[j][a]
            m_light = cell.depth * geo.light[:, s, j]
            # Modulated pumping on the mean state, plus P x (m b_j p_j): the light shift follows the light.
            d_long.append(m_rate * (pl - p_long[a]) + 0.5j * m_light * (alpha[a] * pb - beta[a] * np.conj(pb)))
            d_beta.append(m_rate * (pb - beta[a]) + 1j * m_light * (pl * beta[a] - p_long[a] * pb))
            d_alpha.append(m_rate * (np.conj(pb) - alpha[a]) - 1j * m_light * (pl * alpha[a] - p_long[a] * np.conj(pb)))
        dl, db, da = _solve(2.0 * np.pi * f_mod[:, j], damping, precession, exchange, to_beta, to_alpha,
                            light_beta, d_long, d_beta, d_alpha)
        mix_l = sum(w * x for w, x in zip(weight, dl))
        mix_b = sum(w * x for w, x in zip(weight, db))
        mix_a = sum(w * x for w, x in zip(weight, da))
        # probe . phasor = q_L L + (q_beta alpha + conj(q_beta) beta) / 2
        out[:, :, j] = geo.q_long * mix_l[:, None] + 0.5 * (geo.q_beta * mix_a[:, None]
                                                            + np.conj(geo.q_beta) * mix_b[:, None])
    return out


def probe_phasors(cell: CellRates, f_mod_hz: np.ndarray) -> np.ndarray:
    """Return the probe-signal phasors (N, P, 2) at the two modulation frequencies f_mod_hz (N, 2) Hz.

    Polarization units: probe k's signal is Re[A e^(i w_j t)] summed over the pumps j. The two
    upper levels are solved together (exchange-coupled), each lower level alone.
    """
    n = cell.u.shape[0]
    f_mod = np.asarray(f_mod_hz, dtype=float).reshape(n, 2)
    p_long = np.zeros((n, cell.n_species))
    p_long[:, :2] = longitudinal_polarization(cell)
    # The heading term needs iterating only when a light shift tilts the axes off u.
    iterations = _HEADING_ITERATIONS if np.any(cell.light_nT != 0.0) else 1
    geo = _Geometry(cell)
    out = _group_phasors(cell, geo, [0, 1], f_mod, p_long, iterations)
    for s in range(2, cell.n_species):
        # A lower level alone has no exchange gain and no heading term: one solve is exact.
        out += _group_phasors(cell, geo, [s], f_mod, p_long, 1)
    return out


def response(config: SensorConfig, u, b_nT, f_mod_hz=None) -> tuple[np.ndarray, np.ndarray]:
    """Return noise-free (f (N, 2) Hz [f_a, f_b], z (N, C) complex lock-in X+iY in V) at directions u.

    u: (N, 3) field directions in the sensor frame (normalized here); b_nT: (N,) or scalar |B| in nT.
    The modulation frequencies are those the frequency loops set (loop.py: gamma*|B| for 'exact',
    the pulled resonance for 'locked') unless f_mod_hz (N, 2) is given.
    """
    u, b = _prepare(u, b_nT)
    cell = cell_rates(config, u, b)
    if f_mod_hz is None:
        f = modulation_hz(config, cell)
    else:
        f = np.broadcast_to(np.asarray(f_mod_hz, float), (u.shape[0], 2)).copy()
    return f, channel_outputs(config, probe_phasors(cell, f))


def add_noise(z: np.ndarray, config: SensorConfig, rng: np.random.Generator) -> np.ndarray:
    """Return z (N, C) plus white Gaussian lock-in noise on X and Y (V, per-channel std from config)."""
    z = np.asarray(z)
    sx = np.array(config.noise_x_V)[None, :]
    sy = np.array(config.noise_y_V)[None, :]
    return z + sx * rng.standard_normal(z.shape) + 1j * sy * rng.standard_normal(z.shape)
