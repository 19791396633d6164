"""The physics part of the channel response: beam geometry, isotope cross-talk, pump efficiency, detuning.

Channel (probe q, pump p, other pump p'), field direction u, at magnitude knot k:

    Z_k(u) = eta(u) * [R_k(u) * (a_k c + b_k s) + l_k c' + (m_1 (B_1/B_k) + m_2 (B_1/B_k)^2) s' + o_k]
    c = p.q - (p.u)(q.u),  s = u.(p x q),  c' = p'.q - (p'.u)(q.u),  s' = u.(p' x q)
    eta(u) = 1 + e_own (p.u)^2 + e_other (p'.u)^2
    R_k(u) = 1 / (1 + i*sigma*x_k),   x_k = t_k,a L_a + t_k,b L_b,
    L_m = (p_m.u) (1 + v_m,a (p_a.u)^2 + v_m,b (p_b.u)^2)

* a_k c + b_k s is docs/physics.md's ideal channel g exp(i phi0) (c - i sigma s) when b = -i sigma a; a
  free b also carries the counter-rotating part of the precession (b/a differs from -i sigma by a
  few percent below ~2 uT, falling as 1/|B|).
* l_k c' + m(B) s' is the other pump's leak into this channel (docs/references.md, 'Two isotopes
  coupled by spin exchange'): the modulated pump acts on the mean polarization the other pump
  holds, whose longitudinal part the probe reads as (q.u)(p'.u) (the c' term, free at every knot)
  and whose small transverse part, turned by the precession, is driven on resonance into
  u.(p' x q) (the s' term). Both fall with |B|; the s' term is given the form m_1 (B_1/B) +
  m_2 (B_1/B)^2 (B_1 = 1000 nT, m complex, V) because a free s' term at every knot would let each
  pump axis slide toward the other one without changing the fit. o_k takes the constant parts.
* eta is the pump efficiency versus the pump-field angle (even in p.u): it scales everything this
  pump's modulation drives, so the whole channel (e_own). The other pump's efficiency changes the
  mean pumping rate and with it the line width, so the amplitude also follows (p'.u)^2 (e_other).
  e is complex: its imaginary part is a phase that follows the angle (the line width moves with
  the pumping, and with it the phase of a resonance that is slightly detuned). One pair per pump,
  shared by its channels and every magnitude.
* x_k is a detuning, relative to the line width, that follows the longitudinal polarization (a
  combination of the pumps' longitudinal drives L): the nonlinear-Zeeman heading shift at
  Earth-field magnitudes. Each path (resonance j, pump m) has its own even factor
  1 + sum_n v[j, m, n] (p_n.u)^2: the polarization reaches resonance j from pump m through the
  exchange-coupled spins and j's own line width, each following the pumps' efficiency versus the
  pump-field angle, so the four paths differ (a factor shared by the pumps and one per resonance,
  multiplied, could not follow them and biased the pump axes at Earth field by most of their sigma). The coefficients t follow
  t_0 + t_2 (|B| / 50 uT)^2: the
  nonlinear Zeeman splitting grows as f_L^2 (docs/references.md, 2 f_L^2 / f_hfs), a light shift adds a
  constant; four pairs (t_0, t_2) in all, whatever the number of knots.
  R, the resonance's response to that detuning, acts on the resonant part only; one set of t
  per pump, shared by that pump's channels.

The whole part is a polynomial of degree 10 in u (degree 2 when e and x vanish), folded exactly
into the response model's spherical-harmonic table; between knots the table, not these
parameters, is interpolated.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.harmonics import harmonics, n_harmonics
from fieldvane.estimator.sphere import fibonacci_sphere

PHYSICS_MAX_DEGREE = 10  # degree of the physics part as a polynomial in u
LEAK_REFERENCE_NT = 1000.0  # B_1: the s' leak coefficients m are its parts at 1 uT
LEAK_POWERS = (1, 2)        # the s' leak law: powers of B_1 / |B|
DETUNING_REFERENCE_NT = 50000.0  # B_2: the detuning law t_0 + t_2 (|B| / B_2)^2 is quoted at 50 uT


def leak_law(b_nT) -> np.ndarray:
    """Return (len(LEAK_POWERS), N): (B_1 / |B|)^p for each power of the s' leak law at magnitudes b_nT (nT)."""
    b = np.atleast_1d(np.asarray(b_nT, float))
    return np.stack([(LEAK_REFERENCE_NT / b) ** p for p in LEAK_POWERS])


def detuning_from_law(law: np.ndarray, knots_nT: np.ndarray) -> np.ndarray:
    """Return the detuning t (2, 2, K) at the knots from its law (2, 2, 2): t_0 + t_2 (|B| / B_2)^2."""
    powers = np.stack([np.ones(len(knots_nT)), (np.asarray(knots_nT, float) / DETUNING_REFERENCE_NT) ** 2])
    return np.einsum("jmr,rk->jmk", law, powers)


def channel_geometry(u: np.ndarray, pump: np.ndarray, probe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (c, s) at unit directions u (N,3): c = p.q - (p.u)(q.u), s = u.(p x q) (dimensionless)."""
    u = np.atleast_2d(u)
    c = pump @ probe - (u @ pump) * (u @ probe)
    s = u @ np.cross(pump, probe)
    return c, s


def channel_geometry_gradient(u: np.ndarray, pump: np.ndarray, probe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return ambient gradients dc/du (N,3) and ds/du (N,3) of the geometry factors."""
    u = np.atleast_2d(u)
    dc = -(u @ probe)[:, None] * pump[None, :] - (u @ pump)[:, None] * probe[None, :]
    ds = np.broadcast_to(np.cross(pump, probe), u.shape).copy()
    return dc, ds


def channel_indices(channels) -> tuple[np.ndarray, np.ndarray]:
    """Return (pump index (C,) 0 for 'a' / 1 for 'b', probe index (C,) 0-based) of channel names like '2a'."""
    channels = tuple(channels)
    return (np.array(["ab".index(ch[1]) for ch in channels], dtype=int),
            np.array([int(ch[0]) - 1 for ch in channels], dtype=int))


@dataclass
class PhysicsParameters:
    """Fitted physics part (module docstring): beam axes (sensor frame) and per-channel, per-knot terms.

    gains (C,K) complex: a, the coefficient of c, V (g exp(i phi0)); quadrature (C,K) complex: b,
    the coefficient of s, V; handedness (C,) +1/-1 (the sign sigma of -Im(b/a)); leak (C,K) complex:
    l, V; leak_quadrature (C, 2) complex: (m_1, m_2), V; offset (C,K) complex: o, V; knots_nT (K,):
    the magnitude knots (for the 1/B of the s' leak); efficiency (2,2) complex: e [pump of the channel, pump whose
    (p.u)^2 it follows]; detuning (2,2,K) real: t [pump of the channel, pump whose p.u it follows,
    knot]; detuning_law (2,2,2): its (t_0, t_2), from which a fit sets `detuning`; detuning_shape
    (2,2,2): v [resonance j, pump m of the path, pump whose (p.u)^2 it follows]. Omitted terms take their
    ideal values.
    """

    pump_axes: np.ndarray      # (2, 3) unit vectors: pump a, pump b
    probe_axes: np.ndarray     # (P, 3) unit vectors: probe 1 [, probe 2]
    gains: np.ndarray          # (C, K) complex
    handedness: np.ndarray     # (C,) +1 or -1
    channels: tuple[str, ...]
    quadrature: np.ndarray | None = None
    leak: np.ndarray | None = None
    offset: np.ndarray | None = None
    efficiency: np.ndarray | None = None
    detuning: np.ndarray | None = None
    leak_quadrature: np.ndarray | None = None
    knots_nT: np.ndarray | None = None
    detuning_law: np.ndarray | None = None
    detuning_shape: np.ndarray | None = None

    def __post_init__(self):
        self.pump_axes = np.asarray(self.pump_axes, float)
        self.probe_axes = np.asarray(self.probe_axes, float)
        self.gains = np.asarray(self.gains, complex)
        self.handedness = np.asarray(self.handedness, float)
        self.channels = tuple(self.channels)
        shape = self.gains.shape
        if self.quadrature is None:
            self.quadrature = -1j * self.handedness[:, None] * self.gains
        for name in ("quadrature", "leak", "offset"):
            v = getattr(self, name)
            v = np.zeros(shape, complex) if v is None else np.asarray(v, complex)
            if v.shape != shape:
                raise ValueError(f"physics {name} has shape {v.shape}, expected {shape}")
            setattr(self, name, v)
        self.leak_quadrature = (np.zeros((shape[0], len(LEAK_POWERS)), complex) if self.leak_quadrature is None
                                else np.asarray(self.leak_quadrature, complex))
        self.knots_nT = (np.full(shape[1], LEAK_REFERENCE_NT) if self.knots_nT is None
                         else np.asarray(self.knots_nT, float))
        if self.leak_quadrature.shape != (shape[0], len(LEAK_POWERS)) or self.knots_nT.shape != (shape[1],):
            raise ValueError(f"physics leak_quadrature must have shape (C, {len(LEAK_POWERS)}) and knots_nT (K,)")
        self.efficiency = (np.zeros((2, 2), complex) if self.efficiency is None
                           else np.asarray(self.efficiency, complex))
        self.detuning_law = (np.zeros((2, 2, 2)) if self.detuning_law is None
                             else np.asarray(self.detuning_law, float))
        self.detuning_shape = (np.zeros((2, 2, 2)) if self.detuning_shape is None
                               else np.asarray(self.detuning_shape, float))
        if self.detuning_law.shape != (2, 2, 2) or self.detuning_shape.shape != (2, 2, 2):
            raise ValueError("physics detuning_law and detuning_shape must have shape (2, 2, 2)")
        self.detuning = (detuning_from_law(self.detuning_law, self.knots_nT) if self.detuning is None
                         else np.asarray(self.detuning, float))
        if self.efficiency.shape != (2, 2) or self.detuning.shape != (2, 2, shape[1]):
            raise ValueError("physics efficiency must have shape (2, 2) and detuning (2, 2, K)")

    @property
    def n_knots(self) -> int:
        """Return the number of magnitude knots K."""
        return int(self.gains.shape[1])

    def axes_of(self, channel: str) -> tuple[np.ndarray, np.ndarray]:
        """Return (pump axis, probe axis) of a channel like '2a' (unit vectors, sensor frame)."""
        return self.pump_axes["ab".index(channel[1])], self.probe_axes[int(channel[0]) - 1]

    def shapes(self, u: np.ndarray) -> np.ndarray:
        """Return the ideal unit-gain channel shapes c - i*sigma*s at u, shape (N, C) complex."""
        out = np.empty((np.atleast_2d(u).shape[0], len(self.channels)), complex)
        for k, ch in enumerate(self.channels):
            c, s = channel_geometry(u, *self.axes_of(ch))
            out[:, k] = c - 1j * self.handedness[k] * s
        return out

    def geometry(self, u: np.ndarray) -> dict[str, np.ndarray]:
        """Return the direction terms at u (N,3): pu (N,2) p.u, qu (N,P) q.u, c, s, c_leak, s_leak (N,C)."""
        u = np.atleast_2d(np.asarray(u, float))
        pj, qi = channel_indices(self.channels)
        pu, qu = u @ self.pump_axes.T, u @ self.probe_axes.T
        p_own, p_other, q = self.pump_axes[pj], self.pump_axes[1 - pj], self.probe_axes[qi]
        c = np.sum(p_own * q, axis=1)[None, :] - pu[:, pj] * qu[:, qi]
        s = u @ np.cross(p_own, q).T
        cx = np.sum(p_other * q, axis=1)[None, :] - pu[:, 1 - pj] * qu[:, qi]
        sx = u @ np.cross(p_other, q).T
        return {"pu": pu, "qu": qu, "c": c, "s": s, "c_leak": cx, "s_leak": sx}

    def longitudinal(self, pu: np.ndarray) -> np.ndarray:
        """Return L (N, 2 [j], 2 [m]): pump m's longitudinal drive as resonance j feels it, (p_m.u)(1 + sum_n v[j, m, n] (p_n.u)^2)."""
        return pu[:, None, :] * (1.0 + np.einsum("nk,jmk->njm", pu ** 2, self.detuning_shape))

    def longitudinal_gradient(self, pu: np.ndarray) -> np.ndarray:
        """Return dL[j, m]/d(p_n.u) (N, 2 [j], 2 [m], 2 [n]) from p.u (N,2)."""
        v = self.detuning_shape
        out = 2.0 * pu[:, None, :, None] * v[None] * pu[:, None, None, :]     # p_m * 2 v[j,m,n] p_n
        base = 1.0 + np.einsum("nk,jmk->njm", pu ** 2, v)
        for m in range(2):
            out[:, :, m, m] += base[:, :, m]
        return out

    def detuning_terms(self, pu: np.ndarray) -> np.ndarray:
        """Return x (N, 2, K): each pump's relative detuning at every knot, from p.u (N,2)."""
        return np.einsum("njm,jmk->njk", self.longitudinal(pu), self.detuning)

    def efficiency_factor(self, pu: np.ndarray) -> np.ndarray:
        """Return eta (N, C): each channel's efficiency factor 1 + sum_m e[pump, m] (p_m.u)^2 from p.u (N,2)."""
        pj, _ = channel_indices(self.channels)
        return 1.0 + (pu ** 2) @ self.efficiency[pj].T

    def resonance_factor(self, pu: np.ndarray) -> np.ndarray:
        """Return R (N, C, K) complex: 1 - i sigma x - x^2 of each channel's pump at every knot."""
        pj, _ = channel_indices(self.channels)
        x = self.detuning_terms(pu)[:, pj, :]
        return 1.0 / (1.0 + 1j * self.handedness[None, :, None] * x)

    def knot_responses(self, u: np.ndarray) -> np.ndarray:
        """Return Z (N, C, K) complex V: the physics response at u (N,3) with each knot's parameters."""
        geo = self.geometry(u)
        own = self.gains[None] * geo["c"][:, :, None] + self.quadrature[None] * geo["s"][:, :, None]
        inner = (self.resonance_factor(geo["pu"]) * own + self.leak[None] * geo["c_leak"][:, :, None]
                 + self.s_leak_per_knot()[None] * geo["s_leak"][:, :, None] + self.offset[None])
        return self.efficiency_factor(geo["pu"])[:, :, None] * inner

    def s_leak_per_knot(self) -> np.ndarray:
        """Return the s' leak coefficient m(B) (C, K) complex V at every knot."""
        return self.leak_quadrature @ leak_law(self.knots_nT)

    def predict(self, u: np.ndarray, s_basis: np.ndarray) -> np.ndarray:
        """Return Z (N, C) complex V at u (N,3) with magnitude-basis weights s_basis (N, K)."""
        return np.einsum("nck,nk->nc", self.knot_responses(u), s_basis)

    def harmonic_coefficients(self, degree: int = PHYSICS_MAX_DEGREE) -> np.ndarray:
        """Return the physics part as harmonic coefficients (C, K, (degree+1)^2), exact for degree >= 6."""
        grid = fibonacci_sphere(max(400, 4 * n_harmonics(degree)))
        y = harmonics(degree, grid)
        z = self.knot_responses(grid).reshape(grid.shape[0], -1)            # (G, C*K)
        coef, *_ = np.linalg.lstsq(y, z, rcond=None)                       # (J, C*K)
        return coef.T.reshape(len(self.channels), self.n_knots, -1)

    def flip_axis(self, kind: str, index: int) -> None:
        """Reverse one fitted axis ('pump' or 'probe', 0-based) and every term whose sign follows it."""
        pj, qi = channel_indices(self.channels)
        if kind == "pump":
            self.pump_axes[index] *= -1
            own, other = pj == index, (1 - pj) == index
            self.gains[own] *= -1                  # c and s both flip with p
            self.quadrature[own] *= -1
            self.leak[other] *= -1                 # c' and s' flip with p'
            self.leak_quadrature[other] *= -1
            self.detuning[:, index, :] *= -1       # x follows p.u
            self.detuning_law[:, index, :] *= -1     # (L_m flips with p_m; v is even)
        else:
            self.probe_axes[index] *= -1
            mine = qi == index
            self.gains[mine] *= -1
            self.quadrature[mine] *= -1
            self.leak[mine] *= -1
            self.leak_quadrature[mine] *= -1
