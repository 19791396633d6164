"""Gyromagnetic ratios and isotope identification against published values."""

import pytest

from fieldvane.estimator.constants import ISOTOPES, gamma_hz_per_nt, identify_isotope


def test_rb87_upper_level_gyromagnetic_ratio():
    # D. A. Steck, "Rubidium 87 D Line Data": g_F(F=2) ~ 1/2, i.e. ~0.70 MHz/G = 7.0 Hz/nT;
    # with CODATA mu_B/h the compilation's g-factors give 6.9958 Hz/nT (docs/references.md).
    assert gamma_hz_per_nt("87Rb") == pytest.approx(6.9958, abs=5e-4)
    assert ISOTOPES["87Rb"].g_f == pytest.approx(0.5, rel=1e-3)


def test_rb85_upper_level_gyromagnetic_ratio():
    # D. A. Steck, "Rubidium 85 D Line Data": g_F(F=3) ~ 1/3, ~0.47 MHz/G = 4.67 Hz/nT.
    assert gamma_hz_per_nt("85Rb") == pytest.approx(4.6674, abs=5e-4)
    assert ISOTOPES["85Rb"].g_f == pytest.approx(1 / 3, rel=1e-3)


def test_rb_ratio_against_measured_value():
    # Measured 87Rb/85Rb gyromagnetic ratio 1.4988586(1), synchronous pumping of overlapping
    # ensembles, arXiv 1809.04053. The g-factor model neglects tiny shielding corrections, so
    # agreement to a few parts in 1e5 is what it can give.
    ratio = gamma_hz_per_nt("87Rb") / gamma_hz_per_nt("85Rb")
    assert ratio == pytest.approx(1.4988586, rel=3e-5)


def test_other_cells():
    # D. A. Steck, "Cesium D Line Data": g_F(F=4) ~ 1/4, 0.35 MHz/G (from memory).
    assert gamma_hz_per_nt("133Cs") == pytest.approx(3.4986, rel=1e-3)
    # T. G. Tiecke, "Properties of Potassium": 39K F=2 ~ 0.70 MHz/G (from memory).
    assert gamma_hz_per_nt("39K") == pytest.approx(7.0, rel=2e-3)


def test_nonlinear_zeeman_scale():
    # 2 f_L^2 / f_hfs: about 1.4 Hz at 10 uT and 36 Hz at 50 uT for 87Rb (docs/references.md, from
    # the Breit-Rabi formula).
    rb = ISOTOPES["87Rb"]
    assert rb.nonlinear_zeeman_hz(10_000) == pytest.approx(1.43, rel=0.03)
    assert rb.nonlinear_zeeman_hz(50_000) == pytest.approx(35.8, rel=0.03)


def test_identify_isotope():
    assert identify_isotope(7.0) == "87Rb"
    assert identify_isotope(4.66) == "85Rb"
    with pytest.raises(ValueError, match="matches no isotope"):
        identify_isotope(5.8)
    with pytest.raises(ValueError, match="unknown isotope"):
        gamma_hz_per_nt("12C")


def test_written_out_codata_values_equal_scipy_constants():
    """The Bohr magneton and Planck constant written in estimator/constants.py equal scipy.constants (CODATA)."""
    from scipy import constants

    from fieldvane.estimator.constants import BOHR_MAGNETON_J_PER_T, PLANCK_J_S

    assert BOHR_MAGNETON_J_PER_T == constants.physical_constants["Bohr magneton"][0]
    assert PLANCK_J_S == constants.h
