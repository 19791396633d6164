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
    def g_f(self) -> float:
        """Return the Lande factor g_F of the upper ground level (dimensionless)."""
        f, i, j = self.f_upper, self.nuclear_spin, J_GROUND
        ff, ii, jj = f * (f + 1.0), i * (i + 1.0), j * (j + 1.0)
        return (self.g_j * (ff - ii + jj) + self.g_i * (ff + ii - jj)) / (2.0 * ff)

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


# Rb: D. A. Steck, "Rubidium 87 D Line Data" and "Rubidium 85 D Line Data" (values as quoted in
# REFERENCES.md; hyperfine splittings there marked 'from memory').
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
