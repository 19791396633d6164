"""The cell's rates at given field directions and magnitudes: the constants of the Bloch equations.

Both sensor models (`bloch.py` in time, `response.py` in closed form) take their constants from
here, so they solve the same equations; they differ only in how they solve them. Species: index
0 and 1 are the upper hyperfine levels (F = I + 1/2) of the isotopes pumped by pump a and pump b;
2 and 3, present only when a lower_level_weight is nonzero, their lower levels (F = I - 1/2).
For species s of isotope i, pumped by R_j(t) = R_j (1 + m cos w_j t):

    dP_s/dt = P_s x Omega_s                                   precession (rad/s vector)
              + sum_j R_j(t) X[j, i] (p_j - P_s) - Gamma_i P_s  pumping and relaxation
              + k_i P_other - k_i P_s                           spin exchange (upper levels gain)
    Omega_s = 2 pi g_s (|B| u + sum_j b_j(t) p_j) - kappa_s (u . P_s) u

with g_s the signed gyromagnetic ratio (Hz/nT; negative for a lower level), b_j(t) = b_j (1 + m
cos w_j t) pump j's light-shift field (nT; it follows the light's intensity) and kappa_s the
heading-error coefficient (rad/s per unit longitudinal polarization; zero for lower levels).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .atoms import atom
from .sensor import SensorConfig


@dataclass(frozen=True)
class CellRates:
    """Per-row constants (rows = field samples) of the Bloch equations above, sensor frame."""

    u: np.ndarray              # (N, 3) unit field directions
    b_nT: np.ndarray           # (N,) field magnitudes, nT
    rates: np.ndarray          # (N, 2) mean pumping rate R_j of pump a, b, 1/s
    light_nT: np.ndarray       # (N, 2) mean light-shift field b_j of pump a, b along its axis, nT
    cross: np.ndarray          # (2, 2) X[j, i]: share of pump j's rate that isotope i receives
    relax: np.ndarray          # (2,) Gamma_i, 1/s
    exchange: np.ndarray       # (2,) k_i, 1/s
    gamma: np.ndarray          # (S,) signed gyromagnetic ratio g_s, Hz/nT
    kappa: np.ndarray          # (N, S) heading coefficient, rad/s per unit polarization
    isotope: np.ndarray        # (S,) isotope index of each species
    probe_weight: np.ndarray   # (S,) weight of each species in the probe signal
    depth: float               # modulation depth m
    pumps: np.ndarray          # (2, 3) pump axes
    probes: np.ndarray         # (P, 3) probe axes
    along: np.ndarray          # (N, 2) p_j . u, each pump's component along the field

    @property
    def n_species(self) -> int:
        """Return the number of precessing species S (2, or 4 with the lower levels)."""
        return int(self.gamma.shape[0])

    def damping(self) -> np.ndarray:
        """Return each isotope's mean transverse damping Gamma_i + sum_j R_j X[j, i] + k_i, (N, 2) 1/s."""
        return self.relax[None, :] + self.rates @ self.cross + self.exchange[None, :]

    def pump_along(self) -> np.ndarray:
        """Return p_j . u, (N, 2): each pump's component along the field."""
        return self.along

    def light_rate(self) -> np.ndarray:
        """Return 2 pi g_s b_j, (N, S, 2) rad/s: pump j's light-shift precession rate for species s."""
        return 2.0 * np.pi * self.gamma[None, :, None] * self.light_nT[:, None, :]

    def larmor_rate(self) -> np.ndarray:
        """Return 2 pi g_s (|B| + sum_j b_j p_j.u), (N, S) rad/s: the mean precession rate along u.

        Signed (negative for a lower level); without the heading term kappa_s (u . P_s).
        """
        along = self.b_nT + np.sum(self.light_nT * self.pump_along(), axis=1)
        return 2.0 * np.pi * along[:, None] * self.gamma[None, :]


def heading_coefficient(config: SensorConfig, b_nT: np.ndarray) -> np.ndarray:
    """Return kappa (N, 2) in rad/s per unit longitudinal polarization for the two upper levels.

    'spacing': kappa = heading_strength * 2 pi * 2 f_L^2 / f_hfs (one nonlinear Zeeman line spacing).
    'breit_rabi': kappa = heading_strength * 2 pi * the spin-temperature centroid slope of the
    Breit-Rabi lines (atoms.AtomData.heading_hz_per_polarization), per isotope.
    """
    b = np.asarray(b_nT, dtype=float)
    if config.heading_model == "breit_rabi":
        per_iso = [atom(n).heading_hz_per_polarization(b) for n in config.pump_isotopes]
        hz = np.stack(per_iso, axis=-1)
    else:
        f_l = b[:, None] * config.gamma_hz_per_nt()[None, :]
        hz = 2.0 * f_l ** 2 / config.hyperfine_hz()[None, :]
    return config.heading_strength * 2.0 * np.pi * hz


def cell_rates(config: SensorConfig, u: np.ndarray, b_nT: np.ndarray) -> CellRates:
    """Return the CellRates for unit field directions u (N, 3) and magnitudes b_nT (N,) in nT."""
    u = np.asarray(u, dtype=float)
    b = np.asarray(b_nT, dtype=float)
    pumps = config.pump_array()
    along = u[:, 0, None] * pumps[None, :, 0] + u[:, 1, None] * pumps[None, :, 1] + u[:, 2, None] * pumps[None, :, 2]
    efficiency = 1.0 + np.array(config.pump_angle_efficiency)[None, :] * along ** 2
    z = config.pump_line_shape()
    nominal = np.array(config.pump_rate_per_s) * np.array(config.pump_power)       # (2,) 1/s
    rates = efficiency * (nominal * z.real)[None, :]
    # The light shift precesses the electron spin at R0 Im z (1/s): a field of that rate over g_J mu_B / h.
    electron = np.array([atom(n).electron_gamma_hz_per_nt for n in config.pump_isotopes])
    light_nT = efficiency * (nominal * z.imag / (2.0 * np.pi * electron))[None, :]
    isotopes = [atom(n) for n in config.pump_isotopes]
    upper = np.array([a.gamma_hz_per_nt for a in isotopes])
    kappa = heading_coefficient(config, b)
    weight = np.array(config.probe_weight)
    lower_w = np.array(config.lower_level_weight)
    if np.any(lower_w != 0.0):
        gamma = np.concatenate([upper, [-a.gamma_lower_hz_per_nt for a in isotopes]])
        kappa = np.concatenate([kappa, np.zeros_like(kappa)], axis=1)
        isotope = np.array([0, 1, 0, 1])
        probe_weight = np.concatenate([weight, lower_w * weight])
    else:
        gamma, isotope, probe_weight = upper, np.array([0, 1]), weight
    return CellRates(u=u, b_nT=b, rates=rates, light_nT=light_nT, cross=config.pump_weights(),
                     relax=np.array(config.relaxation_per_s), exchange=config.exchange_per_s(),
                     gamma=gamma, kappa=kappa, isotope=isotope, probe_weight=probe_weight,
                     depth=config.modulation_depth, pumps=pumps, probes=config.probe_array(), along=along)


def longitudinal_polarization(cell: CellRates) -> np.ndarray:
    """Return the upper levels' mean polarization along u, (N, 2), ignoring the light-shift tilt.

    Precession about u leaves the longitudinal part alone, so it follows from pumping, damping
    and exchange only: G_i P_i - k_i P_other = sum_j R_j X[j, i] (p_j . u).
    """
    src = (cell.pump_along() * cell.rates) @ cell.cross
    g = cell.damping()
    k0, k1 = cell.exchange
    det = g[:, 0] * g[:, 1] - k0 * k1
    p0 = (g[:, 1] * src[:, 0] + k0 * src[:, 1]) / det
    p1 = (k1 * src[:, 0] + g[:, 0] * src[:, 1]) / det
    return np.stack([p0, p1], axis=1)
