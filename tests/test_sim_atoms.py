"""Atomic data of the simulated cell (firmware_sim/atoms.py) against independent evaluations.

The reference here is the ground-state Hamiltonian itself, H/h = A I.J + mu_B B (g_J J_z + g_I I_z)/h
with A = f_hfs / (I + 1/2) (the form and constants of Steck's Rb D line data, as quoted in
docs/references.md), diagonalized numerically with numpy: nothing below reuses the closed-form
Breit-Rabi expressions of atoms.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants as sc

from fieldvane.firmware_sim.atoms import MU_B_HZ_PER_NT, atom


def _spin(s):
    """Return (s_z, s_+) matrices of spin s in the basis m = s, s-1, ..., -s."""
    m = np.arange(s, -s - 1, -1.0)
    plus = np.zeros((m.size, m.size))
    for k in range(1, m.size):
        plus[k - 1, k] = np.sqrt(s * (s + 1) - m[k] * (m[k] + 1))
    return np.diag(m), plus


def _ground_state(name):
    """Return (I_z, I_+, J_z, J_+) on the product space and the atom's data."""
    a = atom(name)
    iz, ip = _spin(a.nuclear_spin)
    jz, jp = _spin(0.5)
    one_i, one_j = np.eye(iz.shape[0]), np.eye(2)
    return np.kron(iz, one_j), np.kron(ip, one_j), np.kron(one_i, jz), np.kron(one_i, jp), a


def _eigen(name, b_nT):
    """Return (energies/h in Hz, eigenvectors, F_z, F_+ , atom) of the ground state at |B| = b_nT."""
    iz, ip, jz, jp, a = _ground_state(name)
    im, jm = ip.T, jp.T
    i_dot_j = iz @ jz + 0.5 * (ip @ jm + im @ jp)
    h = (a.hyperfine_hz / (a.nuclear_spin + 0.5)) * i_dot_j + MU_B_HZ_PER_NT * b_nT * (a.g_j * jz + a.g_i * iz)
    e, v = np.linalg.eigh(h)
    return e, v, iz + jz, ip + jp, a


def _levels(name, b_nT, upper=True):
    """Return (m values ascending, energies Hz, eigenvectors) of the upper or lower hyperfine level."""
    e, v, fz, fp, a = _eigen(name, b_nT)
    n = int(round(2 * (a.nuclear_spin + (0.5 if upper else -0.5)) + 1))
    pick = np.argsort(e)[-n:] if upper else np.argsort(e)[:n]
    m = np.array([v[:, k] @ fz @ v[:, k] for k in pick])
    order = np.argsort(m)
    return np.round(m[order] * 2) / 2, e[pick][order], v[:, pick][:, order], fp


def _centroid(name, b_nT, beta):
    """Return the line-strength and population weighted centroid (Hz) of the upper level's m<->m-1 lines."""
    m, e, v, fp = _levels(name, b_nT)
    lines = np.diff(e)
    strength = np.array([abs(v[:, k] @ fp @ v[:, k - 1]) ** 2 for k in range(1, m.size)])
    pop = np.exp(beta * m)
    weight = strength * (pop[:-1] - pop[1:])
    return float(weight @ lines / weight.sum())


@pytest.mark.parametrize("name", ["87Rb", "85Rb"])
def test_upper_level_lines_match_a_diagonalized_hamiltonian(name):
    a = atom(name)
    for b in (1_000.0, 20_000.0, 50_000.0):
        m, e, _, _ = _levels(name, b)
        # Independent evaluation: numerical eigenvalues of the ground-state Hamiltonian (Steck's form).
        assert np.allclose(a.breit_rabi_transitions_hz(b), np.diff(e), rtol=0, atol=1e-5)


@pytest.mark.parametrize("name", ["87Rb", "85Rb"])
def test_heading_slope_matches_a_spin_temperature_centroid(name):
    # The heading coefficient is -d(centroid)/dP with P = tanh(beta/2) the electron polarization of a
    # spin-temperature distribution rho ~ exp(beta F_z). Reference: the centroid computed from the
    # numerically diagonalized Hamiltonian, line strengths |<m|F+|m-1>|^2 from its eigenvectors.
    a = atom(name)
    beta = 1e-3
    for b in (10_000.0, 50_000.0):
        slope = (_centroid(name, b, beta) - _centroid(name, b, -beta)) / (2.0 * beta)
        assert a.heading_hz_per_polarization(b) == pytest.approx(-2.0 * slope, rel=1e-3)


def test_heading_strength_differs_between_the_isotopes_by_about_two():
    rb87, rb85 = atom("87Rb"), atom("85Rb")
    b = 50_000.0
    # In units of the adjacent-line spacing 2 f_L^2/f_hfs (36 Hz at 50 uT for both, docs/references.md):
    # A_F / 2 with A_F = sum (2m-1)^2 M_m / sum M_m, M_m = F(F+1) - m(m-1) (derived in the docstring
    # of heading_hz_per_polarization; 4.2 for F = 2, 9.0 for F = 3). 1 %: the spacing formula uses
    # g_F where the exact low-field spacing has (g_J - g_I)/(2I+1), 0.4 % apart for 87Rb.
    assert rb87.heading_hz_per_polarization(b) / rb87.nonlinear_zeeman_split_hz(b) == pytest.approx(2.1, rel=1e-2)
    assert rb85.heading_hz_per_polarization(b) / rb85.nonlinear_zeeman_split_hz(b) == pytest.approx(4.5, rel=1e-2)
    ratio = rb85.heading_hz_per_polarization(b) / rb87.heading_hz_per_polarization(b)
    assert ratio == pytest.approx(9.0 / 4.2, rel=1e-2)                  # about 2x
    assert rb87.heading_hz_per_polarization(50_000.0) / rb87.heading_hz_per_polarization(25_000.0) == \
        pytest.approx(4.0, rel=1e-3)                                     # quadratic in |B|


@pytest.mark.parametrize("name", ["87Rb", "85Rb"])
def test_lower_level_precesses_the_other_way_with_its_own_g_factor(name):
    a = atom(name)
    b = 1_000.0
    m, e, _, _ = _levels(name, b, upper=False)
    slope = np.polyfit(m, e, 1)[0] / (MU_B_HZ_PER_NT * b)
    # Independent: the lower level's Zeeman slope from the diagonalized Hamiltonian.
    assert a.g_f_lower == pytest.approx(slope, rel=1e-6)
    assert a.g_f_lower < 0.0 < a.g_f
    # Steck's compilations: g_F = -1/2 (87Rb F=1) and -1/3 (85Rb F=2) approximately (from memory).
    assert a.g_f_lower == pytest.approx(-2.0 / (2.0 * a.nuclear_spin + 1.0), rel=5e-3)
    assert a.gamma_lower_hz_per_nt > a.gamma_hz_per_nt


@pytest.mark.parametrize("name", ["87Rb", "85Rb"])
def test_lower_level_spin_share_matches_a_spin_temperature_density_matrix(name):
    iz, ip, jz, jp, a = _ground_state(name)
    i_dot_j = iz @ jz + 0.5 * (ip @ jp.T + ip.T @ jp)
    beta = 1e-4
    rho = np.diag(np.exp(beta * np.diag(iz + jz)))          # F_z is diagonal in the product basis
    e, v = np.linalg.eigh(i_dot_j)                           # eigenvalues I/2 (upper), -(I+1)/2 (lower)
    upper = v[:, e > 0] @ v[:, e > 0].T
    lower = v[:, e < 0] @ v[:, e < 0].T
    s_upper, s_lower = np.trace(upper @ jz @ rho), np.trace(lower @ jz @ rho)
    # Reference: electron spin held by each hyperfine level of the spin-temperature density matrix.
    assert a.lower_level_spin_ratio() == pytest.approx(s_lower / s_upper, rel=1e-3)


def test_electron_gyromagnetic_ratio_is_codata_within_the_bound_state_correction():
    # scipy.constants (CODATA): free-electron gamma_e/2pi = 28024.95 MHz/T = 28.025 Hz/nT; the Rb
    # ground state's g_J = 2.00233113 is 5.9e-6 above the free g_e = 2.00231930 (docs/references.md).
    free = sc.physical_constants["electron gyromag. ratio in MHz/T"][0] * 1e-3
    for name in ("87Rb", "85Rb"):
        assert atom(name).electron_gamma_hz_per_nt == pytest.approx(free, rel=1e-5)
