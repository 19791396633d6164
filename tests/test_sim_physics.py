"""Physics checks of the simulated sensor (firmware_sim): atomic data, configuration, fast model."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants as sc

from fieldvane.firmware_sim.atoms import ATOMS, atom
from fieldvane.firmware_sim.response import add_noise, response
from fieldvane.firmware_sim.sensor import SensorConfig, default_config


def _ideal(cfg, **extra):
    """A config with the coupling, cross-pumping and heading terms switched off."""
    changes = dict(spin_exchange_per_s=0.0, cross_pumping=0.0, heading_strength=0.0)
    changes.update(extra)
    return cfg.replace(**changes)


def _geometry(cfg, u):
    """Return docs/physics.md's ideal channel output g exp(i phi0) (c - i sigma s), (N, C)."""
    pumps, probes = cfg.pump_array(), cfg.probe_array()
    cols = []
    for ch, sig, g in zip(cfg.channels, cfg.handedness, cfg.channel_complex_gain()):
        p, q = pumps["ab".index(ch[1])], probes[int(ch[0]) - 1]
        c = p @ q - (u @ p) * (u @ q)
        s = u @ np.cross(p, q)
        cols.append(g * (c - 1j * sig * s))
    return np.array(cols).T


def _directions(n, seed=3):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n, 3))
    return u / np.linalg.norm(u, axis=1, keepdims=True)


# ----- atomic data ---------------------------------------------------------------------------

def test_gamma_values_match_compilation():
    # docs/references.md 'Atomic constants': g_F formula with CODATA mu_B gives 6.9958 Hz/nT (87Rb F=2)
    # and 4.6674 Hz/nT (85Rb F=3); Steck's compilations quote about 0.70 MHz/G and 0.47 MHz/G.
    assert atom("87Rb").gamma_hz_per_nt == pytest.approx(6.9958, abs=5e-4)
    assert atom("85Rb").gamma_hz_per_nt == pytest.approx(4.6674, abs=5e-4)
    # Ratio measured with overlapping 85Rb/87Rb ensembles: 1.4988586 (arXiv 1809.04053).
    ratio = atom("87Rb").gamma_hz_per_nt / atom("85Rb").gamma_hz_per_nt
    assert ratio == pytest.approx(1.4988586, rel=5e-6)


def test_gamma_uses_codata_bohr_magneton():
    # scipy.constants (CODATA) as reference library: mu_B/h = 13.996 GHz/T.
    mu_b_hz_per_nt = sc.physical_constants["Bohr magneton in Hz/T"][0] * 1e-9
    for a in ATOMS.values():
        assert a.gamma_hz_per_nt == pytest.approx(abs(a.g_f) * mu_b_hz_per_nt, rel=1e-9)


def test_breit_rabi_low_field_limit_and_nonlinear_split():
    for name in ("87Rb", "85Rb"):
        a = atom(name)
        lines = a.breit_rabi_transitions_hz(10_000.0)
        # Low-field limit of Breit-Rabi: lines centred on g_F mu_B B / h (textbook limit of the
        # Breit-Rabi formula as given in Steck's compilations).
        assert lines.mean() == pytest.approx(a.larmor_hz(10_000.0), rel=2e-6)
        # docs/references.md: adjacent-line splitting about 2 f_L^2/f_hfs = 1.4 Hz at 10 uT, 36 Hz at 50 uT.
        assert np.mean(-np.diff(lines)) == pytest.approx(1.4, abs=0.06)
        assert np.mean(-np.diff(a.breit_rabi_transitions_hz(50_000.0))) == pytest.approx(36.0, abs=0.5)
        assert a.nonlinear_zeeman_split_hz(50_000.0) == pytest.approx(36.0, abs=0.5)


# ----- configuration -------------------------------------------------------------------------

def test_config_round_trip_and_validation():
    cfg = default_config(2, misalignment_deg=2.0)
    assert SensorConfig.from_dict(cfg.to_dict()) == cfg
    one = default_config(1)
    assert one.channels == ("1a", "1b")
    assert SensorConfig.from_dict(one.to_dict()) == one
    with pytest.raises(ValueError, match="pump_axes"):
        SensorConfig(pump_axes=((1, 0, 0), (0, 2, 0)))
    with pytest.raises(ValueError, match="handedness"):
        default_config(2, handedness=(1, 1, 0, 1))
    with pytest.raises(ValueError, match="relaxation_per_s"):
        SensorConfig.from_dict({"relaxation_per_s": {"87Rb": -1.0}})
    with pytest.raises(ValueError, match="unknown key"):
        SensorConfig.from_dict({"pump_axis": [[1, 0, 0]]})
    with pytest.raises(ValueError, match="gain_V"):
        SensorConfig.from_dict({"gain_V": {"3a": 1.0}})
    d = SensorConfig.from_dict({"probe_axes": [[0, 0, 1]], "noise_x_V": 0.002,
                                "probe_weight": {"85Rb": 0.5, "87Rb": 0.5}})
    assert d.noise_x_V == (0.002, 0.002) and d.probe_weight == (0.5, 0.5)


def test_misalignment_tilts_each_beam_by_the_given_angle():
    nominal, tilted = default_config(2), default_config(2, misalignment_deg=3.0)
    for a, b in zip(nominal.pump_axes + nominal.probe_axes, tilted.pump_axes + tilted.probe_axes):
        # Rodrigues rotation about an axis at angle beta to the beam moves it by <= the rotation angle.
        angle = np.degrees(np.arccos(np.clip(np.dot(a, b), -1.0, 1.0)))
        assert 0.5 < angle <= 3.0 + 1e-9


def test_digital_lockin_recovers_a_known_tone():
    from fieldvane.firmware_sim.lockin import DigitalLockIn

    dt, n = 1e-6, 30_000
    t = dt * np.arange(1, n + 1)
    f = np.array([[7_000.0, 4_600.0]])
    amp = np.array([0.3 * np.exp(0.7j), 0.1 * np.exp(-2.0j)])
    sig = sum((amp[j] * np.exp(2j * np.pi * f[0, j] * t)).real for j in range(2))[None, None, :]
    lock = DigitalLockIn(f, n_probes=1, dt=dt, tau_s=1e-3, output_rate_hz=1_000.0)
    t_out, out = [], []
    for k in range(0, n, 3_000):                   # streaming in uneven chunks
        tt, yy = lock.process(t[k:k + 3_000], sig[..., k:k + 3_000])
        t_out.append(tt)
        out.append(yy)
    t_out, out = np.concatenate(t_out), np.concatenate(out, axis=-1)
    assert np.allclose(np.diff(t_out), 1e-3)       # decimated to the output rate
    # Demodulation identity (textbook): 2 <Re[A e^{i w t}] e^{-i w t}> = A; the other tone, 2.4 kHz
    # away, is suppressed by the 4-stage low-pass to about (2 pi 2400 tau)^-4 ~ 2e-5 of its size.
    assert np.allclose(out[0, 0, :, -1], amp, atol=2e-5)
    assert lock.settle_time_s() < t[-1]


# ----- fast model ----------------------------------------------------------------------------

def test_fast_model_ideal_limit_is_design_formula():
    # docs/physics.md / docs/references.md 'Geometry of one channel': without coupling the channel is
    # g exp(i phi0)(c - i sigma s); the remaining non-resonant terms scale like Gamma/omega.
    cfg = _ideal(default_config(2))
    u = _directions(400)
    ideal = _geometry(cfg, u)
    keep = np.abs(ideal).min(axis=1) > 0.2 * max(cfg.gain_V)
    for b_nT, tol in ((2_000.0, 0.03), (20_000.0, 0.003)):
        f, z = response(cfg, u, b_nT)
        err = np.abs(z - ideal)[keep] / np.abs(ideal)[keep]
        assert err.max() < tol, f"|B| = {b_nT} nT: max relative deviation {err.max():.4f}"
        assert f[0] == pytest.approx([b_nT * atom("87Rb").gamma_hz_per_nt, b_nT * atom("85Rb").gamma_hz_per_nt])


def test_fast_model_phase_pull_grows_as_field_falls():
    # docs/references.md 'Two isotopes coupled by spin exchange': with dw >> k each mode is pulled by about
    # k^2/dw, so the coupling's phase effect grows roughly as 1/|B| (dw is proportional to |B|).
    cfg = default_config(2, heading_strength=0.0, cross_pumping=0.0)
    free = cfg.replace(spin_exchange_per_s=0.0)
    u = _directions(50)
    u = u[_geometry(cfg, u).__abs__().min(axis=1) > 0.2]

    def shift(b):
        return np.degrees(np.abs(np.angle(response(cfg, u, b)[1] / response(free, u, b)[1]))).mean()

    s2, s4, s16 = shift(2_000.0), shift(4_000.0), shift(16_000.0)
    assert s2 > 2.0, f"coupling moves phases by only {s2:.2f} deg at 2 uT"
    assert s2 / s4 == pytest.approx(2.0, rel=0.25)
    assert s16 < s2 / 5.0


def test_add_noise_statistics():
    cfg = default_config(2, noise_x_V=(1e-3, 2e-3, 3e-3, 4e-3), noise_y_V=5e-3)
    z = np.zeros((20_000, 4), complex)
    noisy = add_noise(z, cfg, np.random.default_rng(7))
    # Sample std of Gaussian noise: relative standard error about 1/sqrt(2N) = 0.5 % (textbook).
    assert np.std(noisy.real, axis=0) == pytest.approx([1e-3, 2e-3, 3e-3, 4e-3], rel=0.03)
    assert np.std(noisy.imag, axis=0) == pytest.approx([5e-3] * 4, rel=0.03)


# ----- time-domain model ---------------------------------------------------------------------
# Relaxation of a few hundred per second with k = 0 gives a total damping of 600/s: 16 ms of
# settling leaves transients of exp(-9.6) ~ 7e-5.

def _td_ideal(**extra):
    base = default_config(2, relaxation_per_s=(400.0, 400.0), gain_V=1.0, phase_deg=0.0,
                          handedness=(-1, -1, -1, -1))
    return _ideal(base, **extra)


def test_bell_bloom_resonance_from_time_domain():
    from scipy.optimize import curve_fit

    from fieldvane.firmware_sim.lockin import simulate_time_domain

    cfg = _td_ideal()
    b_nT = 2_000.0
    f_l = b_nT * np.array([atom("87Rb").gamma_hz_per_nt, atom("85Rb").gamma_hz_per_nt])
    detune_hz = np.linspace(-240.0, 240.0, 13)
    f_mod = np.tile(f_l, (detune_hz.size, 1))
    f_mod[:, 0] += detune_hz                      # sweep pump a across the 87Rb resonance
    u = np.tile(np.array([[0.3, 0.5, 0.81]]) / np.linalg.norm([0.3, 0.5, 0.81]), (detune_hz.size, 1))
    z = simulate_time_domain(cfg, u, b_nT, settle_s=0.016, average_s=0.004, f_mod_hz=f_mod)[:, 0]
    # Expected half-width: Gamma = relaxation + mean pump rate (docs/references.md 'Spin dynamics').
    gamma_hz = (cfg.relaxation_per_s[0] + cfg.pump_rate_per_s[0]) / (2.0 * np.pi)

    def lorentz(d, a, hw, d0):
        return a / (1.0 + ((d - d0) / hw) ** 2)

    (a, hw, d0), _ = curve_fit(lorentz, detune_hz, np.abs(z) ** 2, p0=(1.0, 50.0, 0.0))
    # Bell and Bloom, PRL 6, 280 (1961): |P_perp|^2 is a Lorentzian in the modulation detuning with
    # half-width Gamma (in rad/s) centred on the Larmor frequency.
    assert abs(hw) == pytest.approx(gamma_hz, rel=0.02), f"half-width {abs(hw):.2f} Hz vs {gamma_hz:.2f} Hz"
    assert abs(d0) < 0.02 * gamma_hz
    # Same source: the phase is dispersive, -atan(delta/Gamma) (sign by convention), through resonance.
    phase = np.unwrap(np.angle(z))
    rel = phase - phase[detune_hz.size // 2]
    assert np.degrees(np.max(np.abs(rel + np.arctan(detune_hz / gamma_hz)))) < 1.0
    # A channel with handedness +1 reports the conjugate: the slope reverses.
    z_flip = simulate_time_domain(cfg.replace(handedness=(1, 1, 1, 1)), u[:3], b_nT, 0.016, 0.004,
                                  f_mod_hz=f_mod[[0, 6, 12]])[:, 0]
    assert np.allclose(z_flip, np.conj(z[[0, 6, 12]]), rtol=1e-6, atol=1e-9)


def test_time_domain_geometry_and_blind_plane():
    from fieldvane.firmware_sim.lockin import simulate_time_domain

    cfg = _td_ideal()                                 # pumps along x and y, probe 1 along z
    rng = np.random.default_rng(11)
    generic = rng.normal(size=(10, 3))
    generic /= np.linalg.norm(generic, axis=1, keepdims=True)
    az = np.radians(np.arange(15.0, 180.0, 30.0))     # plane normal to pump a, away from probe 1
    blind = np.stack([np.zeros_like(az), np.cos(az), np.sin(az)], axis=1)
    u = np.vstack([generic, blind])
    z = simulate_time_domain(cfg, u, 5_000.0, settle_s=0.016, average_s=0.004)
    pumps, probes = cfg.pump_array(), cfg.probe_array()
    for k, ch in enumerate(cfg.channels):
        p, q = pumps["ab".index(ch[1])], probes[int(ch[0]) - 1]
        amp = np.linalg.norm(np.cross(p, generic), axis=1) * np.linalg.norm(np.cross(q, generic), axis=1)
        ok = amp > 0.2
        # docs/references.md 'Geometry of one channel' (derived from Bell-Bloom): |Z| proportional to
        # |p x u| |q x u|; the residue is the non-resonant Gamma/omega ~ 0.4 % at 5 uT.
        ratio = np.abs(z[:10, k])[ok] / amp[ok]
        assert np.max(np.abs(ratio - 1.0)) < 0.015, f"{ch}: |Z|/(|p x u||q x u|) = {ratio}"
        c = p @ q - (generic @ p) * (generic @ q)
        s = generic @ np.cross(p, q)
        dphi = np.degrees(np.angle(z[:10, k] / (c + 1j * s)))[ok]   # handedness -1: c - i(-1)s
        assert np.max(np.abs(dphi)) < 0.6, f"{ch}: phase off the geometric formula by {dphi}"
    # Common practice: for a probe orthogonal to a pump (probe 1 = z, pump a = x), the plane normal
    # to that pump is blind for the channel's phase: it sticks at +-90 degrees whatever the azimuth.
    blind_phase = np.degrees(np.angle(z[10:, 0]))
    assert np.max(np.abs(np.abs(blind_phase) - 90.0)) < 0.6, f"phases in the blind plane: {blind_phase}"
    generic_phase = np.degrees(np.angle(z[:10, 0]))
    assert np.ptp(np.abs(np.abs(generic_phase) - 90.0)) > 30.0     # elsewhere the phase does move


def test_time_domain_phases_move_with_field_when_isotopes_couple():
    from fieldvane.firmware_sim.lockin import simulate_time_domain

    coupled = _td_ideal(spin_exchange_per_s=1000.0)
    free = _td_ideal()
    rng = np.random.default_rng(5)
    u0 = rng.normal(size=(4, 3))
    u0 /= np.linalg.norm(u0, axis=1, keepdims=True)
    fields = np.array([1_500.0, 3_000.0, 9_000.0])
    u = np.tile(u0, (fields.size, 1))
    b = np.repeat(fields, u0.shape[0])
    z_c = simulate_time_domain(coupled, u, b, settle_s=0.016, average_s=0.004)
    z_f = simulate_time_domain(free, u, b, settle_s=0.016, average_s=0.004)
    shift = np.degrees(np.abs(np.angle(z_c / z_f))).reshape(fields.size, -1).mean(axis=1)
    # Common practice (phases depend on |B|, strongly below ~10 uT) and docs/references.md's k^2/dw pull:
    # the frequency gap dw grows with |B|, so the coupling's phase shift falls roughly as 1/|B|.
    assert shift[0] > 2.0, f"coupling moves phases by {shift} deg at {fields} nT"
    assert shift[0] / shift[1] == pytest.approx(2.0, rel=0.3), f"shifts {shift} deg"
    assert shift[2] < shift[0] / 4.0, f"shifts {shift} deg"
