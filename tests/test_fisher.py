"""Fisher information and Cramer-Rao bound of the field direction (estimator/fisher.py)."""

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.fisher import (crlb_covariance, crlb_deg, fisher_information, invert_2x2,
                                        tangent_jacobian)
from fieldvane.estimator.harmonics import harmonics
from fieldvane.estimator.response import ResponseModel, to_real
from fieldvane.estimator.sphere import exp_map, fibonacci_sphere, normalize, tangent_basis
from synthetic_sensor import make_sensor, scan


@pytest.fixture(scope="module")
def cal2():
    """A two-probe sensor with a smooth distortion, so the model carries harmonics above degree 2."""
    sensor, pumps, probes = make_sensor(seed=4, n_probes=2, distortion=0.03)
    u, b, z, f, _ = scan(sensor, [5000, 20000, 50000], 900, snr=3000, seed=9)
    return sensor, fit_calibration(u, b, z, f, sensor.channels, pumps, probes)


def model_from_functions(functions, degree, noise, knots=(20000.0,)):
    """A ResponseModel whose channels are the given complex functions of u (fitted exactly on harmonics)."""
    grid = fibonacci_sphere(600)
    y = harmonics(degree, grid)
    coef = np.stack([np.linalg.lstsq(y, fn(grid), rcond=None)[0] for fn in functions])
    coef = np.repeat(coef[:, None, :], len(knots), axis=1)
    return ResponseModel(("1a", "1b"), degree, knots, coef, noise)


def test_phase_bound_matches_rife_boorstyn():
    # Rife and Boorstyn, IEEE Trans. Inf. Theory 1974 (from memory): the phase of a sinusoid of known
    # frequency and amplitude A in white noise of variance s^2, N samples, has var >= 2 s^2 / (N A^2).
    # Degenerate configuration: channel 1a = A (ux + i uy) is, on the equator, a phasor of amplitude A
    # whose phase is the azimuth; channel 1b = B uz informs only the polar direction, so the Fisher
    # matrix is diagonal in (azimuth, polar) and the azimuth bound comes from channel 1a alone.
    a_amp, b_amp, s, n_samples = 0.7, 0.5, 0.2, 400
    # A lock-in averaging N samples, X = (2/N) sum x_n cos(w n), has var(X) = 2 s^2 / N (derived).
    sigma_xy = np.sqrt(2 * s ** 2 / n_samples)
    model = model_from_functions([lambda u: a_amp * (u[:, 0] + 1j * u[:, 1]), lambda u: b_amp * u[:, 2] + 0j],
                                 degree=1, noise=sigma_xy)
    phi = np.linspace(-np.pi, np.pi, 13)
    u = np.column_stack([np.cos(phi), np.sin(phi), np.zeros_like(phi)])
    e_phi = np.column_stack([-np.sin(phi), np.cos(phi), np.zeros_like(phi)])
    expected = 2 * s ** 2 / (n_samples * a_amp ** 2)
    for gain_free in (False, True):
        # Unknown amplitude does not change the phase bound: the (A, phase) Fisher matrix is diagonal.
        cov = crlb_covariance(model, u, 20000.0, gain_free=gain_free)
        e1, e2 = tangent_basis(u)
        proj = np.stack([np.sum(e_phi * e1, 1), np.sum(e_phi * e2, 1)], axis=1)
        var_phi = np.einsum("ni,nij,nj->n", proj, cov, proj)
        np.testing.assert_allclose(var_phi, expected, rtol=1e-6)


def test_lockin_noise_relation_used_above_holds_by_simulation():
    # Monte Carlo of the relation the test above relies on: demodulating N noisy samples of
    # A cos(w n + phi) gives a phase whose variance approaches 2 s^2 / (N A^2) (Rife and Boorstyn).
    rng = np.random.default_rng(11)
    a_amp, s, n_samples, trials = 0.7, 0.2, 400, 4000
    n = np.arange(n_samples)
    w = 2 * np.pi * 0.1234
    x = a_amp * np.cos(w * n + 0.3) + s * rng.normal(size=(trials, n_samples))
    z = 2.0 / n_samples * (x @ np.exp(-1j * w * n))
    var = np.var(np.angle(z * np.exp(-0.3j)))
    assert var == pytest.approx(2 * s ** 2 / (n_samples * a_amp ** 2), rel=0.08)


def test_tangent_jacobian_matches_finite_differences(cal2):
    _, cal = cal2
    model = cal.model
    axes = np.vstack([cal.physics.pump_axes, cal.physics.probe_axes])
    # Many sphere points, plus the beam axes and the points where tangent_basis switches reference.
    special = np.vstack([axes, -axes, normalize(axes + 1e-4), normalize([[1, 1, 1], [1, 1, -1], [0, 1, 1]])])
    u = np.vstack([fibonacci_sphere(400), special])
    b = np.linspace(4000, 60000, u.shape[0])
    _, jac, e1, e2 = tangent_jacobian(model, u, b)
    h = 1e-6
    for k, e in enumerate((e1, e2)):
        fd = (model.h(exp_map(u, h * e), b) - model.h(exp_map(u, -h * e), b)) / (2 * h)
        scale = np.abs(jac).max()
        np.testing.assert_allclose(jac[:, :, k], fd, atol=2e-7 * scale)


def test_gain_free_schur_complement_matches_full_inverse(cal2):
    # Reference: numpy.linalg.inv of the full (2 + P) x (2 + P) Fisher matrix built from
    # finite-difference Jacobians; the direction block of its inverse is the bound with gains unknown.
    _, cal = cal2
    model = cal.model
    u = fibonacci_sphere(60)
    b = 12000.0
    sig = np.repeat(model.noise_std, 2)
    probe_of = np.array([int(ch[0]) for ch in model.channels])
    h = 1e-6
    expected = []
    for ui in u:
        e1, e2 = tangent_basis(ui)
        cols = [(to_real(model.h(exp_map(ui, h * e), b)) - to_real(model.h(exp_map(ui, -h * e), b)))[0] / (2 * h)
                for e in (e1, e2)]
        z = model.h(ui, b)[0]
        for p in (1, 2):
            cols.append(to_real(np.where(probe_of == p, z, 0)))   # dZ/dg_p = Z on probe p's channels
        jw = np.column_stack(cols) / sig[:, None]
        expected.append(np.linalg.inv(jw.T @ jw)[:2, :2])
    got = crlb_covariance(model, u, b, gain_free=True)
    np.testing.assert_allclose(got, np.array(expected), rtol=1e-5, atol=1e-12)


def test_information_adds_over_probes_and_gain_freedom_only_loses(cal2):
    _, cal = cal2
    model = cal.model
    u = fibonacci_sphere(300)
    b = 30000.0
    f1 = fisher_information(model, u, b, probes=[1])
    f2 = fisher_information(model, u, b, probes=[2])
    # Fisher information of independent measurements adds (Cramer-Rao theory, any textbook).
    np.testing.assert_allclose(fisher_information(model, u, b), f1 + f2, rtol=1e-10)
    # Eliminating nuisance parameters can only lose information: F - F_gain_free is positive semidefinite.
    diff = fisher_information(model, u, b) - fisher_information(model, u, b, gain_free=True)
    assert np.linalg.eigvalsh(diff).min() > -1e-9 * np.abs(diff).max()
    both = crlb_deg(model, u, b)
    assert np.all(both <= crlb_deg(model, u, b, probes=[1]) * (1 + 1e-9))
    assert np.all(both <= crlb_deg(model, u, b, probes=[2]) * (1 + 1e-9))
    # The bound scales linearly with the noise std.
    np.testing.assert_allclose(crlb_deg(model, u, b, noise_std=2 * model.noise_std), 2 * both, rtol=1e-10)


def test_vectorized_equals_per_direction_and_per_magnitude(cal2):
    _, cal = cal2
    u = fibonacci_sphere(25)
    b = np.linspace(3000, 70000, 25)
    together = crlb_covariance(cal.model, u, b)
    one_by_one = np.array([crlb_covariance(cal.model, u[i:i + 1], b[i])[0] for i in range(25)])
    np.testing.assert_allclose(together, one_by_one, rtol=1e-12)


def test_unobservable_direction_gives_infinite_bound():
    # Both channels depend on uz only: the azimuth is unobservable, the information matrix singular.
    model = model_from_functions([lambda u: u[:, 2] + 0.2j * u[:, 2] ** 2, lambda u: 0.5 * u[:, 2] + 0j],
                                 degree=2, noise=0.01)
    u = normalize(np.array([[0.3, 0.4, 0.6], [-0.5, 0.1, -0.4]]))
    assert np.all(np.isinf(crlb_deg(model, u, 20000.0)))
    inv = invert_2x2(np.array([[[4.0, 1.0], [1.0, 2.0]]]))
    np.testing.assert_allclose(inv[0], np.linalg.inv([[4.0, 1.0], [1.0, 2.0]]))   # numpy as reference
