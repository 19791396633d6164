"""The simulated cell's own atomic data: g-factors, nuclear spins, hyperfine splittings, Zeeman lines.

Kept separate from fieldvane.estimator on purpose: the simulator stands in for real hardware and
must not share the estimator's constants (a shared mistake would then pass every test).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import constants as _const

J_GROUND = 0.5  # alkali ground state nS1/2

# CODATA values through scipy.constants (reference library).
MU_B_J_PER_T = _const.physical_constants["Bohr magneton"][0]
PLANCK_J_S = _const.h
MU_B_HZ_PER_NT = MU_B_J_PER_T / PLANCK_J_S * 1e-9  # about 13.996 Hz/nT


def _g_f(g_j: float, g_i: float, f: float, i: float) -> float:
    """Return the Lande factor g_F of level F for electron g_J, nuclear g_I (Bohr magnetons), spin I."""
    ff, ii, jj = f * (f + 1.0), i * (i + 1.0), J_GROUND * (J_GROUND + 1.0)
    return (g_j * (ff - ii + jj) + g_i * (ff + ii - jj)) / (2.0 * ff)


@dataclass(frozen=True)
class AtomData:
    """Ground-state data of one alkali isotope (g_I in Bohr magnetons, sign convention of Steck)."""

    name: str
    g_j: float
    g_i: float
    nuclear_spin: float
    hyperfine_hz: float

    @property
    def f_upper(self) -> float:
        """Return F = I + 1/2 of the upper ground hyperfine level (dimensionless)."""
        return self.nuclear_spin + J_GROUND

    @property
    def f_lower(self) -> float:
        """Return F = I - 1/2 of the lower ground hyperfine level (dimensionless)."""
        return self.nuclear_spin - J_GROUND

    @property
    def g_f(self) -> float:
        """Return the Lande factor g_F of the upper ground level (dimensionless, > 0)."""
        return _g_f(self.g_j, self.g_i, self.f_upper, self.nuclear_spin)

    @property
    def g_f_lower(self) -> float:
        """Return the Lande factor g_F of the lower ground level (dimensionless, < 0: precesses the other way)."""
        return _g_f(self.g_j, self.g_i, self.f_lower, self.nuclear_spin)

    @property
    def gamma_lower_hz_per_nt(self) -> float:
        """Return gamma/2pi of the lower ground level, |g_F| mu_B / h, in Hz/nT (slightly above the upper's)."""
        return abs(self.g_f_lower) * MU_B_HZ_PER_NT

    @property
    def electron_gamma_hz_per_nt(self) -> float:
        """Return g_J mu_B / h in Hz/nT: the precession rate of the bare electron spin (about 28 Hz/nT)."""
        return self.g_j * MU_B_HZ_PER_NT

    @property
    def gamma_hz_per_nt(self) -> float:
        """Return gamma/2pi of the upper ground level, |g_F| mu_B / h, in Hz/nT."""
        return abs(self.g_f) * MU_B_HZ_PER_NT

    def larmor_hz(self, b_nT):
        """Return the linear Larmor frequency gamma*|B| in Hz for |B| in nT (array or scalar)."""
        return self.gamma_hz_per_nt * np.asarray(b_nT, dtype=float)

    def nonlinear_zeeman_split_hz(self, b_nT):
        """Return 2 f_L^2 / f_hfs in Hz: the spacing of adjacent upper-level Zeeman lines (approx.)."""
        f_l = self.larmor_hz(b_nT)
        return 2.0 * f_l * f_l / self.hyperfine_hz

    def breit_rabi_upper_hz(self, b_nT):
        """Return the Breit-Rabi energies/h (Hz) of the upper level's m = -F..F, shape (..., 2F+1)."""
        b_t = np.asarray(b_nT, dtype=float)[..., None] * 1e-9
        i2 = 2.0 * self.nuclear_spin + 1.0
        m = np.arange(-self.f_upper, self.f_upper + 0.5, 1.0)
        x = (self.g_j - self.g_i) * MU_B_J_PER_T * b_t / (PLANCK_J_S * self.hyperfine_hz)
        root = np.sqrt(1.0 + 4.0 * m * x / i2 + x * x)
        # m = -F: the root is |1 - x|; it must be (1 - x) to stay on the upper branch.
        root = np.where(m == -self.f_upper, 1.0 - x, root)
        e_hz = (-self.hyperfine_hz / (2.0 * i2) + self.g_i * MU_B_J_PER_T * m * b_t / PLANCK_J_S
                + 0.5 * self.hyperfine_hz * root)
        return e_hz

    def breit_rabi_transitions_hz(self, b_nT):
        """Return the upper level's m <-> m-1 frequencies (Hz) for m = -F+1..F, shape (..., 2F)."""
        e = self.breit_rabi_upper_hz(b_nT)
        return np.abs(np.diff(e, axis=-1))

    def heading_hz_per_polarization(self, b_nT):
        """Return how far the upper level's resonance moves down per unit longitudinal polarization, Hz.

        The resonance is the centroid of the Breit-Rabi lines m <-> m-1 weighted by their strength
        |<m|F+|m-1>|^2 = F(F+1) - m(m-1) times the population difference; with a spin-temperature
        distribution rho_m ~ exp(beta m) the centroid is sum e^(beta m) M_m f_m / sum e^(beta m) M_m.
        Its slope at beta = 0 is the covariance of m and f_m under the weights M_m, and the electron
        polarization is P = tanh(beta / 2), so d(centroid)/dP = 2 Cov_M(m, f). Low-field value:
        (2 f_L^2 / f_hfs) * A_F / 2 with A_F = 4.2 for F = 2 and 9.0 for F = 3 (about 2x apart).
        Returns -d(centroid)/dP (positive: polarization along the field lowers the frequency).
        """
        lines = self.breit_rabi_transitions_hz(b_nT)
        f = self.f_upper
        m = np.arange(-f + 1.0, f + 0.5, 1.0)
        weight = f * (f + 1.0) - m * (m - 1.0)
        weight = weight / weight.sum()
        cov = (lines * weight) @ (m - weight @ m)
        return -2.0 * cov

    def lower_level_spin_ratio(self) -> float:
        """Return <S> in the lower level over <S> in the upper one at low spin-temperature polarization.

        With rho ~ exp(beta F_z), level F holds <F_z> ~ beta F(F+1)(2F+1)/3 and its electron spin is
        <S_z> = +-<F_z>/(2I+1) (upper +, lower -): the ratio is -(2I-1) I / ((2I+3)(I+1)),
        -0.20 for I = 3/2 and -0.357 for I = 5/2. An upper bound for the lower level's share of the
        probe signal; hyperfine-selective pumping leaves less.
        """
        i = self.nuclear_spin
        return -(2.0 * i - 1.0) * i / ((2.0 * i + 3.0) * (i + 1.0))


def optical_line_shape(detuning_ghz, width_ghz):
    """Return z = 1 / (1 - 2i detuning / width) of a Lorentzian optical line (FWHM width, GHz).

    Re z is the absorption (1 on resonance, ~ (width / 2 detuning)^2 far off), Im z the dispersion
    (odd in the detuning, +-1/2 at +-width/2, ~ width / (2 detuning) far off): a pump's pumping rate
    and light shift in units of its on-resonance pumping rate (Happer, Rev. Mod. Phys. 44, 169
    (1972), complex line-shape description; from memory).
    """
    x = 2.0 * np.asarray(detuning_ghz, dtype=float) / float(width_ghz)
    return 1.0 / (1.0 - 1j * x)


# Rb: D. A. Steck, "Rubidium 87 D Line Data" and "Rubidium 85 D Line Data" (values as quoted in
# docs/references.md; hyperfine splittings there marked 'from memory').
# K: T. G. Tiecke, "Properties of Potassium" (from memory). Cs: D. A. Steck, "Cesium D Line Data"
# (from memory; the 133Cs splitting is exact by the SI definition of the second).
ATOMS: dict[str, AtomData] = {
    "87Rb": AtomData("87Rb", g_j=2.00233113, g_i=-0.0009951414, nuclear_spin=1.5,
                     hyperfine_hz=6.834682610904e9),
    "85Rb": AtomData("85Rb", g_j=2.00233113, g_i=-0.00029364000, nuclear_spin=2.5,
                     hyperfine_hz=3.035732439e9),
    "39K": AtomData("39K", g_j=2.00229421, g_i=-0.00014193489, nuclear_spin=1.5,
                    hyperfine_hz=461.7197202e6),
    "41K": AtomData("41K", g_j=2.00229421, g_i=-0.00007790600, nuclear_spin=1.5,
                    hyperfine_hz=254.013872e6),
    "133Cs": AtomData("133Cs", g_j=2.00254032, g_i=-0.00039885395, nuclear_spin=3.5,
                      hyperfine_hz=9.192631770e9),
}


def atom(name: str) -> AtomData:
    """Return the AtomData of an isotope name like '87Rb' (ValueError naming the known ones)."""
    try:
        return ATOMS[name]
    except KeyError:
        raise ValueError(f"unknown isotope {name!r}; known: {', '.join(ATOMS)}") from None


def gamma_hz_per_nt(name: str) -> float:
    """Return gamma/2pi of the isotope's upper ground level in Hz/nT."""
    return atom(name).gamma_hz_per_nt
