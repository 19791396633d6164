"""The simulated cell's realism options: light shift, frequency loops, exchange, lower level, efficiency.

Each effect is checked against something outside the project (a textbook relation, a reference
library, docs/physics.md, docs/references.md), and the default sensor is checked to have every one off.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit
from scipy.signal import hilbert

from fieldvane.firmware_sim.atoms import atom, optical_line_shape
from fieldvane.firmware_sim.cell import cell_rates
from fieldvane.firmware_sim.loop import locked_hz
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import SensorConfig, default_config

# Suggested realistic cell for bench scenarios (our own invented numbers): see docs/scenarios.md.
REALISTIC = dict(spin_exchange_per_s=2250.0, density_fraction=(0.2783, 0.7217), frequency_loop="locked",
                 heading_model="breit_rabi", pump_detuning_GHz=(0.8, -0.6), optical_width_GHz=3.0,
                 lower_level_weight=(-0.08, -0.12), pump_angle_efficiency=(0.1, 0.1))
QUIET = dict(spin_exchange_per_s=0.0, cross_pumping=0.0, heading_strength=0.0)


def _sphere(n, seed=0):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n, 3))
    return u / np.linalg.norm(u, axis=1, keepdims=True)


def _cell(cfg, u, b):
    return cell_rates(cfg, u, np.full(u.shape[0], float(b)))


# ----- defaults and configuration ------------------------------------------------------------

def test_default_sensor_has_every_effect_off():
    cfg = default_config(2)
    u = _sphere(50)
    cell = _cell(cfg, u, 5_000.0)
    assert cell.n_species == 2 and np.all(cell.light_nT == 0.0)
    assert cell.exchange[0] == cell.exchange[1] == cfg.spin_exchange_per_s
    assert np.allclose(cell.rates, np.array(cfg.pump_rate_per_s)[None, :], rtol=0, atol=0)
    f, _ = response(cfg, u, 5_000.0)
    assert np.array_equal(f, 5_000.0 * np.tile(cfg.gamma_hz_per_nt(), (50, 1)))


def test_realism_keys_round_trip_and_validate():
    cfg = SensorConfig.from_dict({
        "pump_power": {"b": 1.3}, "pump_detuning_GHz": [0.5, -0.5], "frequency_loop": "locked",
        "heading_model": "breit_rabi", "lower_level_weight": {"85Rb": -0.1},
        "density_fraction": {"87Rb": 28, "85Rb": 72}, "pump_angle_efficiency": 0.1, "optical_width_GHz": 2.5})
    assert cfg.pump_power == (1.0, 1.3) and cfg.lower_level_weight == (0.0, -0.1)
    assert cfg.density_fraction == pytest.approx((0.28, 0.72))          # normalized
    assert SensorConfig.from_dict(cfg.to_dict()) == cfg
    bad = [({"pump_power": 0.0}, "pump_power"), ({"pump_power": {"c": 1.0}}, "pump_power"),
           ({"frequency_loop": "pll"}, "frequency_loop"), ({"heading_model": "x"}, "heading_model"),
           ({"lower_level_weight": 1.5}, "lower_level_weight"),
           ({"density_fraction": {"87Rb": 0.3}}, "density_fraction"),
           ({"density_fraction": [0.0, 1.0]}, "density_fraction"),
           ({"pump_angle_efficiency": -1.0}, "pump_angle_efficiency"),
           ({"optical_width_GHz": 0.0}, "optical_width_GHz")]
    for table, key in bad:
        with pytest.raises(ValueError, match=key):
            SensorConfig.from_dict(table)


# ----- light shift ---------------------------------------------------------------------------

def test_light_shift_and_pumping_are_a_kramers_kronig_pair():
    # Absorption (the pumping rate) and dispersion (the light shift) are the real and imaginary
    # parts of one causal response: the dispersion is the Hilbert transform of the absorption
    # (Kramers-Kronig; Happer, Rev. Mod. Phys. 44, 169 (1972), complex line shape; from memory).
    # Reference: scipy.signal.hilbert on the sampled absorption.
    detuning = np.linspace(-3000.0, 3000.0, 2 ** 20, endpoint=False)
    z = optical_line_shape(detuning, 3.0)
    centre = np.abs(detuning) < 30.0
    assert np.max(np.abs(np.imag(hilbert(z.real))[centre] - z.imag[centre])) < 1e-4
    assert z.real[np.argmin(np.abs(detuning))] == pytest.approx(1.0)


def test_light_shift_field_scales_with_power_over_detuning_and_flips_sign():
    # Vector light shift of a circularly polarized pump: a fictitious field along the beam,
    # proportional to intensity and, far from resonance, to 1/detuning, odd in the detuning
    # (Happer 1972; Budker, Kimball and DeMille, "Atomic Physics"; both from memory).
    u = np.array([[0.6, 0.0, 0.8]])

    def field(detuning, power=1.0):
        cfg = default_config(2, pump_detuning_GHz=(detuning, 0.0), pump_power=(power, 1.0))
        return _cell(cfg, u, 10_000.0).light_nT[0, 0]

    assert field(0.0) == 0.0
    assert field(-2.0) == pytest.approx(-field(2.0), rel=1e-12)
    assert field(2.0, power=2.0) == pytest.approx(2.0 * field(2.0), rel=1e-12)
    # width 3 GHz: at 30 and 60 GHz (20 and 40 half-widths) field x detuning is constant to 0.3 %
    assert field(60.0) * 60.0 == pytest.approx(field(30.0) * 30.0, rel=3e-3)
    assert abs(field(1.5)) > abs(field(30.0)) * 5.0                    # strongest near half a width


def test_light_shift_moves_each_isotope_by_its_own_gyromagnetic_ratio():
    # A fictitious magnetic field shifts each isotope's Larmor frequency by gamma_i b (p.u): the two
    # shifts stand in the ratio of the gyromagnetic ratios, measured as 1.4988586 (arXiv 1809.04053).
    cfg = default_config(2, **QUIET, frequency_loop="locked", pump_detuning_GHz=(1.2, 0.0))
    u = np.array([[0.8, 0.1, 0.59], [-0.5, 0.3, 0.81]])
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    b = 5_000.0
    cell = _cell(cfg, u, b)
    shift = locked_hz(cell) - b * cfg.gamma_hz_per_nt()[None, :]
    expected = cell.light_nT[:, 0] * (u @ cfg.pump_array()[0])
    assert np.all(np.abs(shift[:, 0]) > 1.0)                           # Hz: a visible shift
    assert shift[:, 0] / shift[:, 1] == pytest.approx([1.4988586] * 2, rel=1e-4)
    assert shift[:, 0] == pytest.approx(cfg.gamma_hz_per_nt()[0] * expected, rel=1e-3)


# ----- frequency loops -----------------------------------------------------------------------

def test_locked_loop_without_shifts_reports_gamma_b():
    cfg = default_config(2, **QUIET, frequency_loop="locked")
    u = _sphere(20)
    f = locked_hz(_cell(cfg, u, 3_000.0))
    assert np.allclose(f, 3_000.0 * cfg.gamma_hz_per_nt()[None, :], rtol=1e-12)


def test_exchange_pulls_the_two_resonances_together_by_k0_k1_over_dw():
    # docs/references.md 'Two isotopes coupled by spin exchange': with the gap dw >> k each mode is pulled
    # by about k^2/dw (here k0 k1 / dw for the density-weighted rates), growing as the field falls.
    cfg = default_config(2, cross_pumping=0.0, heading_strength=0.0, frequency_loop="locked",
                         spin_exchange_per_s=2250.0, density_fraction=(0.2783, 0.7217))
    k0, k1 = cfg.exchange_per_s()
    assert k0 / k1 == pytest.approx(0.7217 / 0.2783)                   # driven by the other's density
    u = _sphere(5)
    pulls = []
    for b in (1_000.0, 3_000.0, 10_000.0):
        f_free = b * cfg.gamma_hz_per_nt()
        pull = locked_hz(_cell(cfg, u, b)) - f_free[None, :]
        dw = 2.0 * np.pi * (f_free[0] - f_free[1])
        expected_hz = k0 * k1 / dw / (2.0 * np.pi)
        # The higher line (87Rb, pump a) comes down, the lower one goes up: the modes attract (and
        # lock when dw is not large against k, as docs/references.md says).
        assert pull[:, 0] == pytest.approx(-expected_hz, rel=0.02)
        assert pull[:, 1] == pytest.approx(expected_hz, rel=0.02)
        pulls.append(pull[0, 1])
    assert pulls[0] > pulls[1] > pulls[2]


def test_locked_frequency_is_the_time_domain_resonance():
    # Bell and Bloom, PRL 6, 280 (1961): |P_perp|^2 is a Lorentzian in the modulation frequency
    # centred on the resonance. Sweep each pump across its locked frequency in the time-domain model
    # and fit (scipy curve_fit): the centre must be the loop's frequency, though the heading error and
    # light shift move it by many Hz from gamma*|B| at 50 uT.
    from fieldvane.firmware_sim.lockin import simulate_time_domain

    cfg = default_config(2, **REALISTIC, gain_V=1.0, phase_deg=0.0).replace(lower_level_weight=(0.0, 0.0))
    b = 50_000.0
    u = np.array([0.2, 0.9, 0.39]) / np.linalg.norm([0.2, 0.9, 0.39])
    f_lock = response(cfg, u[None, :], b)[0][0]
    shift = f_lock - b * cfg.gamma_hz_per_nt()
    assert np.all(np.abs(shift) > 15.0), shift
    detune = np.linspace(-600.0, 600.0, 13)
    for j in range(2):
        f_mod = np.tile(f_lock, (detune.size, 1))
        f_mod[:, j] += detune
        z = simulate_time_domain(cfg, np.tile(u, (detune.size, 1)), b, settle_s=0.008, average_s=0.004,
                                 f_mod_hz=f_mod)[:, j]                 # channel 1a / 1b: pump a / b

        def lorentz(d, a, hw, d0, c):
            return a / (1.0 + ((d - d0) / hw) ** 2) + c

        y = np.abs(z) ** 2
        (_, hw, d0, _), _ = curve_fit(lorentz, detune, y, p0=(y.max(), 300.0, 0.0, 0.0))
        assert abs(d0) < 0.5, f"pump {'ab'[j]}: resonance {d0:.2f} Hz from the locked frequency (shift {shift[j]:.1f} Hz)"


def test_isotopes_disagree_as_a_healthy_sensor_does():
    # Project requirement (not a physical constant): with the realistic cell the two isotopes'
    # magnitudes f/gamma disagree by about 0.1-0.4 % below 2 uT (spin-exchange pulling, ~1/|B|^2 in
    # relative terms) and by little at 50 uT (heading error only).
    cfg = default_config(2, **REALISTIC)
    u = _sphere(200)
    gamma = cfg.gamma_hz_per_nt()
    rel = {}
    for b in (1_000.0, 2_000.0, 50_000.0):
        f, _ = response(cfg, u, b)
        rel[b] = 100.0 * (f[:, 0] / gamma[0] - f[:, 1] / gamma[1]) / b
    assert 0.3 < -rel[1_000.0].mean() < 0.5, rel[1_000.0].mean()
    assert 0.07 < -rel[2_000.0].mean() < 0.15, rel[2_000.0].mean()
    assert np.abs(rel[50_000.0]).max() < 0.03


# ----- spin exchange -------------------------------------------------------------------------

def test_density_weighted_exchange_conserves_angular_momentum():
    # Spin-exchange collisions conserve the total spin (Happer, Rev. Mod. Phys. 44, 169 (1972); from
    # memory): with exchange alone, n87 P87 + n85 P85 stays put while the difference relaxes at
    # k87 + k85 = spin_exchange_per_s. Time-domain model, pumping and relaxation made negligible.
    from fieldvane.firmware_sim.bloch import integrate, make_problem

    frac = (0.2783, 0.7217)
    cfg = default_config(2, relaxation_per_s=1e-9, pump_rate_per_s=1e-9, cross_pumping=0.0,
                         heading_strength=0.0, spin_exchange_per_s=1500.0, density_fraction=frac)
    u = np.array([[0.0, 0.6, 0.8]])
    problem = make_problem(cfg, u, 2_000.0)
    p = np.zeros((1, 2, 3))
    p[0, 0], p[0, 1] = 0.5 * u[0], -0.2 * u[0]
    t_end = 1e-3
    dt = 2e-6
    p, _, _ = integrate(problem, p, 0.0, dt, int(round(t_end / dt)))
    along = p[0] @ u[0]
    assert frac[0] * along[0] + frac[1] * along[1] == pytest.approx(frac[0] * 0.5 - frac[1] * 0.2, abs=1e-9)
    assert along[0] - along[1] == pytest.approx(0.7 * np.exp(-1500.0 * t_end), rel=1e-5)


# ----- lower hyperfine level ---------------------------------------------------------------

def _geometry(cfg, u, channel):
    p, q = cfg.pump_array()["ab".index(channel[1])], cfg.probe_array()[int(channel[0]) - 1]
    return p @ q - (u @ p) * (u @ q), u @ np.cross(p, q)


def test_lower_level_adds_a_mirror_handed_signal_at_its_own_larmor_frequency():
    # docs/physics.md: the handedness of a channel follows the sense of precession, i.e. the sign of
    # g_F. The lower level (g_F < 0) must add c - i s where the upper level gives c + i s, and resonate
    # at its own |g_F| mu_B B / h (g_F formula with the constants of Steck's compilations, docs/references.md).
    from fieldvane.firmware_sim.atoms import MU_B_HZ_PER_NT

    base = default_config(2, **QUIET, gain_V=1.0, phase_deg=0.0, handedness=-1)
    with_lower = base.replace(lower_level_weight=(-0.3, 0.0))
    u = _sphere(300, seed=4)
    c, s = _geometry(base, u, "1a")
    keep = np.hypot(c, s) > 0.3
    u, c, s = u[keep], c[keep], s[keep]
    b = 2_000.0
    lower = response(with_lower, u, b)[1][:, 0] - response(base, u, b)[1][:, 0]
    mirror = lower / (c - 1j * s)
    same = lower / (c + 1j * s)
    assert np.std(np.angle(mirror)) < np.radians(1.0) and np.std(np.abs(mirror)) < 0.02 * np.abs(mirror).mean()
    assert np.std(np.angle(same)) > np.radians(20.0)
    # Its resonance: sweep pump a's frequency around the lower level's line and fit a Lorentzian.
    a = atom("87Rb")
    i, f = a.nuclear_spin, a.nuclear_spin - 0.5
    g_f = (a.g_j * (f * (f + 1) - i * (i + 1) + 0.75) + a.g_i * (f * (f + 1) + i * (i + 1) - 0.75)) / (2 * f * (f + 1))
    b = 20_000.0
    f_line = abs(g_f) * MU_B_HZ_PER_NT * b
    detune = np.linspace(-500.0, 500.0, 21)
    u1 = np.tile(u[:1], (detune.size, 1))
    f_mod = np.stack([f_line + detune, np.full(detune.size, b * base.gamma_hz_per_nt()[1])], axis=1)
    y = np.abs(response(with_lower, u1, b, f_mod)[1][:, 0] - response(base, u1, b, f_mod)[1][:, 0]) ** 2
    (_, _, d0), _ = curve_fit(lambda d, a0, hw, d0: a0 / (1.0 + ((d - d0) / hw) ** 2), detune, y,
                              p0=(y.max(), 80.0, 0.0))
    assert abs(d0) < 1.0, f"lower-level resonance {d0:.2f} Hz from |g_F| mu_B B / h"


def test_lower_level_and_exchange_move_the_phases_mostly_below_10_uT():
    # docs/physics.md (common practice): the phases depend on |B|, strongly below ~10 uT.
    real = default_config(2, **REALISTIC)
    u = _sphere(300, seed=2)
    med = {}
    for b in (1_000.0, 50_000.0):
        z = response(real, u, b)[1]
        for name, other in (("lower", real.replace(lower_level_weight=(0.0, 0.0))),
                            ("exchange", real.replace(density_fraction=()))):
            z0 = response(other, u, b)[1]
            ok = np.abs(z0).min(axis=1) > 0.2
            med[name, b] = np.median(np.degrees(np.abs(np.angle(z[ok] / z0[ok]))))
    for name in ("lower", "exchange"):
        assert med[name, 1_000.0] > 2.0 and med[name, 1_000.0] > 2.5 * med[name, 50_000.0], med


# ----- pump efficiency over the sphere -------------------------------------------------------

def test_pump_efficiency_is_even_in_the_field_direction_and_spans_e2():
    cfg = default_config(2, pump_angle_efficiency=(0.1, 0.1))
    u = _sphere(2000, seed=9)
    rates = _cell(cfg, u, 10_000.0).rates / np.array(cfg.pump_rate_per_s)[None, :]
    flipped = _cell(cfg, -u, 10_000.0).rates / np.array(cfg.pump_rate_per_s)[None, :]
    assert np.array_equal(rates, flipped)
    assert rates.min() == pytest.approx(1.0, abs=1e-3) and rates.max() == pytest.approx(1.1, abs=1e-3)
    # e2 = 0.1: half the range over the midpoint is 0.1 / 2.1, about +-5 % over the sphere.
    assert (rates.max() - rates.min()) / (rates.max() + rates.min()) == pytest.approx(0.1 / 2.1, rel=0.02)


# ----- documentation and scenarios -----------------------------------------------------------

def _docs_realistic_block():
    import pathlib
    import re

    text = (pathlib.Path(__file__).resolve().parents[1] / "docs" / "scenarios.md").read_text(encoding="utf-8")
    block = re.search(r"A realistic cell.*?```toml\n(.*?)```", text, re.S)
    assert block, "docs/scenarios.md lost its realistic [sensor] example"
    return text, block.group(1)


def test_every_sensor_key_is_documented_and_the_example_matches():
    import dataclasses

    try:
        import tomllib
    except ModuleNotFoundError:              # Python 3.10
        import tomli as tomllib

    text, block = _docs_realistic_block()
    missing = [f.name for f in dataclasses.fields(SensorConfig) if f"`{f.name}`" not in text]
    assert not missing, f"docs/scenarios.md lacks [sensor] keys: {missing}"
    assert SensorConfig.from_dict(tomllib.loads(block)["sensor"]) == default_config(2, **REALISTIC)


def test_a_scenario_with_the_realistic_cell_reports_locked_frequencies():
    from fieldvane.firmware_sim.scenario import loads_scenario, simulate

    _, block = _docs_realistic_block()
    text = ('version = 1\n[run]\nsample_rate_hz = 50\nduration_s = 1\n[direction]\nstart = [0.45, -0.55, 0.70]\n'
            '[magnitude]\nstart_nT = 1500\n' + block)
    run = simulate(loads_scenario(text))
    gamma = default_config(2).gamma_hz_per_nt()
    magnitudes = run.f / gamma[None, :]
    # Spin-exchange pulling (docs/references.md, coupled modes): 87Rb reads low, 85Rb high, both off |B|.
    assert np.all(magnitudes[:, 0] < run.b_nT) and np.all(magnitudes[:, 1] > run.b_nT)
    assert 0.1 < 100.0 * np.mean((magnitudes[:, 1] - magnitudes[:, 0]) / run.b_nT) < 0.4


# ----- the fast model's closed-form algebra --------------------------------------------------

def _dense_phasors(cell, f_mod):
    """Probe phasors from the Bloch equations of cell.py written as one dense Cartesian system per row.

    Reference for response.probe_phasors (which eliminates components in closed form): every species'
    3-vector stacked, the static state and the modulated phasor solved with numpy.linalg.solve.
    """
    n, ns = cell.u.shape[0], cell.n_species
    u, size = cell.u, 3 * ns
    light, damping = cell.light_rate(), cell.damping()
    src = np.zeros((n, size))
    for s in range(ns):
        src[:, 3 * s:3 * s + 3] = (cell.rates * cell.cross[:, cell.isotope[s]][None, :]) @ cell.pumps

    def generator(p_long):
        jac = np.zeros((n, size, size))
        for s in range(ns):
            omega = ((2 * np.pi * cell.gamma[s] * cell.b_nT - cell.kappa[:, s] * p_long[:, s])[:, None] * u
                     + light[:, s, :] @ cell.pumps)
            cross = np.zeros((n, 3, 3))                       # C P = P x omega
            cross[:, 0, 1], cross[:, 0, 2], cross[:, 1, 2] = omega[:, 2], -omega[:, 1], omega[:, 0]
            cross -= np.transpose(cross, (0, 2, 1))
            jac[:, 3 * s:3 * s + 3, 3 * s:3 * s + 3] = cross - damping[:, cell.isotope[s], None, None] * np.eye(3)
        for a, b in ((0, 1), (1, 0)):
            jac[:, 3 * a:3 * a + 3, 3 * b:3 * b + 3] += cell.exchange[a] * np.eye(3)
        return jac

    p_long = np.zeros((n, ns))
    for _ in range(4):
        mean = np.linalg.solve(generator(p_long), -src[..., None])[..., 0].reshape(n, ns, 3)
        p_long = np.einsum("nsc,nc->ns", mean, u)
    jac = generator(p_long)
    for s in range(ns):
        t = np.cross(mean[:, s], u) * cell.kappa[:, s, None]
        jac[:, 3 * s:3 * s + 3, 3 * s:3 * s + 3] -= t[:, :, None] * u[:, None, :]
    out = np.zeros((n, cell.probes.shape[0], 2), complex)
    for j in range(2):
        rate = cell.depth * cell.rates[:, j, None] * cell.cross[j, cell.isotope][None, :]        # (N, S)
        drive = rate[:, :, None] * (cell.pumps[j] - mean)
        drive += np.cross(mean, cell.pumps[j]) * (cell.depth * light[:, :, j])[:, :, None]
        system = 2j * np.pi * f_mod[:, j, None, None] * np.eye(size) - jac
        dp = np.linalg.solve(system, drive.reshape(n, size, 1))[..., 0].reshape(n, ns, 3)
        out[:, :, j] = np.einsum("nsc,s,kc->nk", dp, cell.probe_weight, cell.probes)
    return out


def test_fast_model_algebra_matches_a_dense_solve():
    from fieldvane.firmware_sim.loop import modulation_hz
    from fieldvane.firmware_sim.response import probe_phasors

    cfg = default_config(2, misalignment_deg=3.0, **REALISTIC).replace(pump_power=(1.3, 0.8))
    u = _sphere(60, seed=5)
    for b in (1_000.0, 50_000.0):
        cell = _cell(cfg, u, b)
        f = modulation_hz(cfg, cell) + 25.0          # a little off resonance as well
        fast, dense = probe_phasors(cell, f), _dense_phasors(cell, f)
        # Reference library: numpy.linalg.solve on the full Cartesian system (LAPACK).
        assert np.max(np.abs(fast - dense)) < 1e-9 * np.max(np.abs(dense))
