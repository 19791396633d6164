"""Calibration against the project's simulated sensor (firmware_sim): beam axes, their uncertainty, bias, honesty.

The simulator is an independent implementation of the cell physics (firmware_sim/response.py: the
coupled Bloch equations of both isotopes with spin exchange, cross-pumping, counter-rotating and
longitudinal responses, the nonlinear-Zeeman heading shift and a pump efficiency that follows the
pump-field angle); the calibration knows none of its parameters. The truth is the simulator's
configured axes. Scans here: 600 near-uniform directions at each of 7 magnitudes, lock-in noise
1/3000 of each channel's gain, pump efficiency 1 + 0.1 (p.u)^2 (+-5 % about its mean).
"""

import numpy as np
import pytest

from fieldvane.estimator.calibration import CalibrationError, axis_errors_deg, fit_calibration
from fieldvane.estimator.harmonics import harmonics
from fieldvane.estimator.magnitude_basis import MagnitudeBasis
from fieldvane.estimator.physics_fit import _Problem, fit_physics
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.sphere import angle_between, fibonacci_sphere, normalize, rotation_matrix
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import default_config

LOW = (1000, 1500, 2200, 3300, 5000, 10000, 20000)
EARTH = (20000, 27000, 35000, 42000, 50000, 57000, 65000)
SNR = 3000.0
EFFICIENCY = 0.1


def sensor(snr=SNR, efficiency=EFFICIENCY, **changes):
    """The simulator's default two-probe sensor, beams tilted 2 deg, noise = gain / snr on X and Y."""
    cfg = default_config(2, misalignment_deg=2.0, pump_angle_efficiency=(efficiency, efficiency), **changes)
    g = np.array(cfg.gain_V)
    return cfg.replace(noise_x_V=tuple(g / snr), noise_y_V=tuple(g / snr))


def scan(cfg, magnitudes, n_dir=600, seed=1):
    """Return (u, |B|, z, f): n_dir near-uniform directions per magnitude, turned at random per level."""
    rng = np.random.default_rng(seed)
    us, bs = [], []
    for m in magnitudes:
        rot = rotation_matrix(normalize(rng.normal(size=3)), rng.uniform(0, np.pi))
        us.append(fibonacci_sphere(n_dir) @ rot.T)
        bs.append(np.full(n_dir, float(m)))
    u, b = np.vstack(us), np.concatenate(bs)
    f, z0 = response(cfg, u, b)
    sx = np.array(cfg.noise_x_V)
    return u, b, z0 + sx * (rng.standard_normal(z0.shape) + 1j * rng.standard_normal(z0.shape)), f


def axis_errors(cal, cfg):
    """Return the fitted-minus-true axis angles (deg): pumps a, b, then probes."""
    return np.concatenate([axis_errors_deg(cal.physics.pump_axes, cfg.pump_array()),
                           axis_errors_deg(cal.physics.probe_axes, cfg.probe_array())])


@pytest.fixture(scope="module")
def low_field():
    cfg = sensor()
    u, b, z, f = scan(cfg, LOW)
    return cfg, (u, b, z, f), fit_calibration(u, b, z, f, cfg.channels)


@pytest.fixture(scope="module")
def earth_field():
    cfg = sensor()
    u, b, z, f = scan(cfg, EARTH)
    return cfg, (u, b, z, f), fit_calibration(u, b, z, f, cfg.channels)


def test_simulated_sensor_has_the_effects_the_physics_part_must_carry(low_field):
    # Guard that the scenario is what the acceptance numbers claim: a few percent of low-field
    # leak of the other pump into each channel, falling with |B|, and the pump efficiency.
    _, _, cal = low_field
    gain = np.abs(cal.physics.gains)
    leak = np.abs(cal.physics.leak) / gain
    assert np.all(leak[:, 0] > 0.01) and np.all(leak[:, 0] < 0.05), leak[:, 0]
    assert np.all(leak[:, -1] < 0.25 * leak[:, 0])
    # e = 0.1 on the pump rate; the channel amplitude follows it a little less (the rate also widens the line).
    np.testing.assert_allclose(np.diag(cal.physics.efficiency).real, 0.086, atol=0.01)


@pytest.mark.parametrize("which", ["low_field", "earth_field"])
def test_every_axis_within_0p03_deg_and_its_sigma(which, request):
    cfg, _, cal = request.getfixturevalue(which)
    err = axis_errors(cal, cfg)
    # Requirement: every fitted axis within 0.03 deg of the truth (0.1 deg is the promise to users).
    assert err.max() < 0.03, err
    # And within 4 of its own reported 1-sigma (a 2-D error beyond 4 sigma_tot has probability
    # exp(-16) for an isotropic Gaussian, docs/references.md 'Estimation'): the sigma is not a formality.
    assert np.all(err < 4 * cal.direction_std_deg), (err, cal.direction_std_deg)


@pytest.mark.parametrize("which", ["low_field", "earth_field"])
def test_noise_free_scan_leaves_no_axis_bias_beyond_a_third_of_its_sigma(which, request):
    # The same directions without noise: whatever error remains is bias of the model, not noise. At Earth
    # field the heading detuning reaches each isotope from both pumps, each path with its own even shape in
    # the pump-field angles; a shape shared by the pumps (one factor per resonance on top) could not follow
    # the simulator's four paths and left each pump axis off by 0.6-0.8 of its sigma.
    cfg, (u, b, _, _), cal = request.getfixturevalue(which)
    _, z0 = response(cfg, u, b)
    knots = np.array(LOW if which == "low_field" else EARTH, float)
    fit = fit_physics(u, MagnitudeBasis(knots)(b), knots, z0, cfg.channels, cfg.pump_array(), cfg.probe_array(),
                      np.array(cfg.noise_x_V))
    bias = np.concatenate([axis_errors_deg(fit.params.pump_axes, cfg.pump_array()),
                           axis_errors_deg(fit.params.probe_axes, cfg.probe_array())])
    # 1/3 of sigma adds at most (1/3)^2 = 11 % to the mean squared error over seeds: sigma stays honest.
    assert np.all(bias < cal.direction_std_deg / 3), (bias, cal.direction_std_deg)


@pytest.mark.parametrize("which", ["low_field", "earth_field"])
def test_heldout_residual_is_the_injected_noise(which, request):
    cfg, _, cal = request.getfixturevalue(which)
    injected = np.array(cfg.noise_x_V)
    # Requirement: the calibrated noise (held-out residual) within 1.05x the injected noise.
    ratio = cal.model.noise_std / injected
    assert np.all(ratio < 1.05) and np.all(ratio > 0.95), ratio
    # A second, independent scan of the same sensor: the model predicts it to the noise as well.
    u, b, z, _ = scan(cfg, LOW if which == "low_field" else EARTH, n_dir=300, seed=77)
    fresh = np.sqrt(np.mean(np.abs(z - cal.model.h(u, b)) ** 2, axis=0) / 2) / injected
    assert np.all(fresh < 1.05), fresh


def test_corrections_on_top_of_the_physics_part_stay_small(low_field):
    _, _, cal = low_field
    # The physics part carries the leak and the efficiency: what the harmonic corrections add is
    # below the noise (their sphere RMS per component, worst knot).
    assert np.all(cal.correction_rms_V < cal.model.noise_std), cal.correction_rms_V / cal.model.noise_std


def static_bias_mrad(cal, cfg, magnitudes, n=300):
    """Return the RMS direction error (mrad) of the snapshot inverse on noise-free simulator samples."""
    solver = SnapshotSolver.from_calibration(cal)
    errors = []
    for m in magnitudes:
        g = fibonacci_sphere(n)
        f, z0 = response(cfg, g, np.full(n, float(m)))
        errors.append(angle_between(solver.solve(z0, f).u, g))
    return 1000.0 * float(np.sqrt(np.mean(np.concatenate(errors) ** 2))), solver


@pytest.mark.parametrize("which", ["low_field", "earth_field"])
def test_calibration_induced_direction_bias_below_0p1_mrad(which, request):
    cfg, _, cal = request.getfixturevalue(which)
    bias, _ = static_bias_mrad(cal, cfg, LOW if which == "low_field" else EARTH)
    # Requirement: calibration-induced direction bias on a noise-free static set <= 0.1 mrad RMS.
    assert bias <= 0.1, bias


def test_snapshot_error_reaches_the_cramer_rao_bound(low_field):
    cfg, _, cal = low_field
    solver = SnapshotSolver.from_calibration(cal)
    rng = np.random.default_rng(9)
    errors, sigmas = [], []
    for m in (1000, 3300, 20000):
        g = fibonacci_sphere(1500) @ rotation_matrix(normalize(rng.normal(size=3)), 1.0).T
        f, z0 = response(cfg, g, np.full(g.shape[0], float(m)))
        sx = np.array(cfg.noise_x_V)
        z = z0 + sx * (rng.standard_normal(z0.shape) + 1j * rng.standard_normal(z0.shape))
        res = solver.solve(z, f)
        ok = res.sigma_deg < 5.0
        errors.append(np.degrees(angle_between(res.u, g))[ok])
        sigmas.append(res.sigma_deg[ok])
    e, s = np.concatenate(errors), np.concatenate(sigmas)
    # Requirement: held-out snapshot RMS error within 1.05x the RMS Cramer-Rao bound (sqrt of the
    # trace of the inverse Fisher information, docs/references.md 'Estimation').
    assert np.sqrt(np.mean(e ** 2)) <= 1.05 * np.sqrt(np.mean(s ** 2))


@pytest.mark.slow
def test_direction_std_is_honest_over_seeds():
    """Monte Carlo: the true axis lies within the reported 1 sigma in 55-75 % of the cases.

    direction_std_deg is sigma_tot = sqrt(trace) of the axis' 2x2 covariance; for a 2-D isotropic
    Gaussian P(error < sigma_tot) = 1 - exp(-1) = 63.2 % (docs/references.md 'Estimation'), up to
    68.3 % for a fully anisotropic one. 20 seeds x 4 axes of the low-field scan (about 20 s of
    CPU); FIELDVANE_LONG_MC=1 adds the Earth-field scan.
    """
    import os

    cfg = sensor()
    scans = [LOW] + ([EARTH] if os.environ.get("FIELDVANE_LONG_MC") else [])
    for magnitudes in scans:
        inside = []
        for seed in range(100, 120):
            u, b, z, f = scan(cfg, magnitudes, seed=seed)
            cal = fit_calibration(u, b, z, f, cfg.channels)
            inside.append(axis_errors(cal, cfg) <= cal.direction_std_deg)
        share = float(np.mean(inside))
        assert 0.55 <= share <= 0.75, (magnitudes, share)


def test_physics_jacobian_against_finite_differences():
    # The analytic (Kaufman) Jacobian of the projected residual against central differences of the
    # residual with the linear terms held at their solved values (both sides from the same code).
    cfg = sensor(efficiency=0.1)
    u, b, z, f = scan(cfg, (1000, 5000, 40000), n_dir=200, seed=3)
    knots = np.array([1000.0, 5000.0, 40000.0])
    s = MagnitudeBasis(knots)(b)
    fit = fit_physics(u, s, knots, z, cfg.channels, cfg.pump_array(), cfg.probe_array(),
                      np.array(cfg.noise_x_V))
    phys = fit.params
    phys.detuning_shape = np.array([[[0.3, -0.2], [-0.2, 0.1]], [[0.1, 0.25], [0.15, -0.1]]])  # every term matters
    phys.efficiency = phys.efficiency + np.array([[0.02j, 0.01], [-0.01j, 0.03]])
    for blocks_or_dense in (True, False):
        prob = _Problem(u, s if blocks_or_dense else s + 1e-6, z, cfg.channels, 1.0 / np.array(cfg.noise_x_V),
                        True, True, knots, 2)
        terms, qs, _ = prob.solve(phys)
        frames = prob.frames(phys)
        jac = prob.jacobian(phys, terms, qs, frames)

        def prediction(delta):
            moved = prob.step(phys, frames, delta)       # the linear terms stay as solved
            return moved.predict(u, prob.s)

        n, c_n = u.shape[0], len(cfg.channels)
        ours = jac.reshape(2, n, c_n, prob.n_theta)
        h = 1e-6
        for col in range(prob.n_theta):
            e = np.zeros(prob.n_theta)
            e[col] = h
            fd = (prediction(e) - prediction(-e)) / (2 * h)
            for c in range(c_n):
                # Kaufman's Jacobian: minus the whitened derivative with the linear terms projected out.
                expected = -prob.w[c] * qs[c].project(fd[:, c])
                got = ours[0, :, c, col] + 1j * ours[1, :, c, col]
                scale = np.abs(expected).max() + 1e-9
                assert np.abs(got - expected).max() < 1e-5 * scale + 1e-6, (blocks_or_dense, col, c)


def test_physics_part_folds_exactly_into_the_harmonic_table(low_field):
    _, _, cal = low_field
    ph = cal.physics
    coef = ph.harmonic_coefficients()
    grid = fibonacci_sphere(777)
    direct = ph.knot_responses(grid)                                   # (N, C, K)
    folded = np.einsum("nj,ckj->nck", harmonics(int(np.sqrt(coef.shape[2])) - 1, grid), coef)
    # Real spherical harmonics reproduce a polynomial of degree <= L exactly (checked against
    # scipy.special.sph_harm_y in test_sphere_harmonics.py); the detuning's resonance factor is
    # rational, its tail beyond degree 10 far below 1e-9 of the signal here.
    assert np.abs(direct - folded).max() < 1e-9 * np.abs(direct).max()


def test_a_wild_value_is_rejected_and_named_and_changes_nothing(low_field):
    cfg, (u, b, z, f), cal = low_field
    lines = np.arange(len(b)) + 12                 # as if the scan's data started on file line 12
    z2 = z.copy()
    z2[57, 0] = 100.0                              # one 100 V value
    z2[300, 3] = 1e160 + 0j                        # and one that would overflow every square
    spiked = fit_calibration(u, b, z2, f, cfg.channels, line_numbers=lines)
    named = {(r.line, r.reason, r.channel) for r in spiked.rejected_rows}
    assert (69, "outlier", "1a") in named and (312, "absurd", "2b") in named
    assert len(spiked.rejected_rows) == 2
    np.testing.assert_allclose(spiked.model.noise_std, cal.model.noise_std, rtol=0.01)
    assert np.all(axis_errors(spiked, cfg) < 0.03)


def test_unusable_scans_are_refused_with_one_line(low_field):
    cfg, (u, b, z, f), _ = low_field
    z2 = z.copy()
    z2[:, 1] = 0.0
    with pytest.raises(CalibrationError, match="channel 1b is zero in every row") as info:
        fit_calibration(u, b, z2, f, cfg.channels)
    assert info.value.unusable
    with pytest.raises(CalibrationError, match="unusable"):
        fit_calibration(u, b, np.full_like(z, 1e160), f, cfg.channels)
    with pytest.raises(CalibrationError, match="unusable"):
        fit_calibration(u, b, np.full_like(z, np.nan), f, cfg.channels)
    cap = u[:, 2] > 0.75
    with pytest.raises(CalibrationError, match="covers only"):
        fit_calibration(u[cap], b[cap], z[cap], f[cap], cfg.channels)


def test_model_error_ratio_is_what_a_stream_between_knots_needs():
    """Knots at 1/5/10/20 uT (the simulator's default noise, SNR 1000), a stream at 3000 nT.

    The ratio predicts the sphere-mean squared model error over the noise variance; the truth here is
    the simulator's noise-free response. Then the snapshot inverse at 3000 nT: with the noise
    widened by the ratio, its residual chi-square and its 2-sigma coverage are honest again.
    """
    cfg = sensor(snr=1000.0, efficiency=0.0)
    u, b, z, f = scan(cfg, (1000, 5000, 10000, 20000), n_dir=600, seed=5)
    cal = fit_calibration(u, b, z, f, cfg.channels)
    noise = cal.model.noise_std
    g = fibonacci_sphere(1500)
    for b_nT in (1700.0, 3000.0, 7000.0):
        _, zt = response(cfg, g, np.full(g.shape[0], b_nT))
        true_ratio = np.mean(np.abs(cal.model.h(g, b_nT) - zt) ** 2, axis=0) / 2 / noise ** 2
        predicted = cal.model_error_ratio(np.array([b_nT]))[0]
        # Within a factor 2 where the error matters (above a tenth of the noise variance).
        big = true_ratio > 0.1
        assert np.all(predicted[big] > 0.5 * true_ratio[big]) and np.all(predicted[big] < 2 * true_ratio[big]), \
            (b_nT, true_ratio, predicted)
    assert np.all(cal.model_error_ratio(np.array([1000.0, 5000.0]))[:, :] == 0.0)
    assert np.all(cal.model_error_ratio(np.array([500.0]))[0] > cal.model_error_ratio(np.array([3000.0]))[0])

    rng = np.random.default_rng(6)
    f_s, z0 = response(cfg, g, np.full(g.shape[0], 3000.0))
    zs = z0 + np.array(cfg.noise_x_V) * (rng.standard_normal(z0.shape) + 1j * rng.standard_normal(z0.shape))
    ratio = cal.model_error_ratio(np.array([3000.0]))[0]
    plain = SnapshotSolver.from_calibration(cal).solve(zs, f_s)
    widened = SnapshotSolver.from_calibration(cal, noise_std=noise * np.sqrt(1.0 + ratio)).solve(zs, f_s)
    dof = 2 * len(cal.model.channels) - 2
    # The plain noise: residual chi-square far above its degrees of freedom; widened: about right.
    assert np.mean(plain.chi2) > 1.5 * dof
    assert 0.7 * dof < np.mean(widened.chi2) < 1.3 * dof
    err_plain = np.degrees(angle_between(plain.u, g)) / plain.sigma_deg
    err_wide = np.degrees(angle_between(widened.u, g)) / widened.sigma_deg
    # 2-D Gaussian: P(error < 2 sigma_tot) = 1 - exp(-4) = 98.2 % (docs/references.md 'Estimation').
    assert np.mean(err_plain < 2) < 0.9
    assert np.mean(err_wide < 2) > 0.9
