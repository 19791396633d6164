"""Alkali ground-state constants and gyromagnetic ratios computed from CODATA constants."""

from __future__ import annotations

from dataclasses import dataclass

J_GROUND = 0.5  # 2S1/2 ground state
# CODATA 2022 (h exact since the 2019 SI): the Bohr magneton and the Planck constant. Written out rather than
# read from scipy.constants at import, which costs a tenth of a second of every command's start-up;
# tests/test_constants.py checks both against scipy.constants.
BOHR_MAGNETON_J_PER_T = 9.2740100657e-24
PLANCK_J_S = 6.62607015e-34


@dataclass(frozen=True)
class Isotope:
    """Ground-state data of one alkali isotope; the upper hyperfine level F = I + 1/2 is used."""

    name: str
    g_j: float
    g_i: float
    nuclear_spin: float
    hyperfine_hz: float

    @property
    def f_upper(self) -> float:
        """Return F of the upper ground hyperfine level (dimensionless)."""
        return self.nuclear_spin + J_GROUND

    @property
    def g_f(self) -> float:
        """Return the Lande factor g_F of the upper ground level (dimensionless)."""
        return lande_g_f(self.g_j, self.g_i, self.nuclear_spin, J_GROUND, self.f_upper)

    @property
    def gamma_hz_per_nt(self) -> float:
        """Return gamma/2pi = |g_F| mu_B / h of the upper ground level, in Hz/nT."""
        return abs(self.g_f) * BOHR_MAGNETON_J_PER_T / PLANCK_J_S * 1e-9

    def nonlinear_zeeman_hz(self, b_nT: float) -> float:
        """Return the approximate splitting between adjacent Zeeman lines, 2 f_L^2 / f_hfs, in Hz."""
        f_l = self.gamma_hz_per_nt * b_nT
        return 2.0 * f_l * f_l / self.hyperfine_hz


def lande_g_f(g_j: float, g_i: float, i: float, j: float, f: float) -> float:
    """Return g_F for hyperfine level F from g_J, g_I, I, J (dimensionless, g_I in Bohr magnetons)."""
    ff, ii, jj = f * (f + 1), i * (i + 1), j * (j + 1)
    return g_j * (ff - ii + jj) / (2 * ff) + g_i * (ff + ii - jj) / (2 * ff)


# g_J, g_I (in Bohr magnetons, sign convention of the compilations), I, ground hyperfine splitting.
# Rb: D. A. Steck, "Rubidium 87 D Line Data" and "Rubidium 85 D Line Data".
# Cs: D. A. Steck, "Cesium D Line Data" (from memory). K: T. G. Tiecke, "Properties of
# Potassium" (from memory).
ISOTOPES = {
    "87Rb": Isotope("87Rb", 2.00233113, -0.0009951414, 1.5, 6.834682610904e9),
    "85Rb": Isotope("85Rb", 2.00233113, -0.00029364000, 2.5, 3.035732439e9),
    "133Cs": Isotope("133Cs", 2.00254032, -0.00039885395, 3.5, 9.192631770e9),
    "39K": Isotope("39K", 2.00229421, -0.00014193489, 1.5, 461.7197202e6),
    "41K": Isotope("41K", 2.00229421, -0.00007790600, 1.5, 254.0138720e6),
}

# Cells hold two isotopes of one element; identification only chooses within the cell's pair.
# Potassium is absent on purpose: 39K and 41K both have I = 3/2, so their Larmor frequencies differ
# by about 1e-4 and two pumps cannot be told apart by frequency.
CELL_PAIRS = {
    "Rb": ("87Rb", "85Rb"),
}


def gamma_hz_per_nt(isotope: str) -> float:
    """Return gamma/2pi of the named isotope's upper ground level, Hz/nT."""
    try:
        return ISOTOPES[isotope].gamma_hz_per_nt
    except KeyError:
        raise ValueError(f"unknown isotope {isotope!r}; known: {', '.join(ISOTOPES)}") from None


def identify_isotope(f_over_b_hz_per_nt: float, candidates=("87Rb", "85Rb"),
                     tolerance: float = 0.02) -> str:
    """Return the candidate isotope whose gamma/2pi (Hz/nT) matches f/|B| within a relative tolerance."""
    best, best_err = None, float("inf")
    for name in candidates:
        g = gamma_hz_per_nt(name)
        err = abs(f_over_b_hz_per_nt - g) / g
        if err < best_err:
            best, best_err = name, err
    if best_err > tolerance:
        known = ", ".join(f"{n} {gamma_hz_per_nt(n):.4f}" for n in candidates)
        raise ValueError(f"f/|B| = {f_over_b_hz_per_nt:.4f} Hz/nT matches no isotope within "
                         f"{tolerance:.0%} (known Hz/nT: {known})")
    return best
