"""Sphere geometry and the spherical-harmonic basis against scipy and finite differences."""

import numpy as np
import pytest

from fieldvane.estimator.harmonics import harmonics, harmonics_and_gradient, real_sph_harm_reference
from fieldvane.estimator.magnitude_basis import MagnitudeBasis
from fieldvane.estimator.sphere import (angle_between, exp_map, fibonacci_sphere, lambert_azimuthal, log_map,
                                        normalize, tangent_basis)

U = fibonacci_sphere(300)


@pytest.mark.parametrize("degree", [0, 1, 2, 4, 7])
def test_harmonics_equal_scipy_real_harmonics(degree):
    # Reference: scipy.special.sph_harm_y (orthonormal complex harmonics), real combinations.
    np.testing.assert_allclose(harmonics(degree, U), real_sph_harm_reference(degree, U), atol=1e-12)


def test_harmonics_orthonormal_on_sphere():
    # Orthonormality over the sphere: mean over a near-uniform grid times 4 pi is the identity.
    grid = fibonacci_sphere(20000)
    y = harmonics(4, grid)
    gram = y.T @ y * 4 * np.pi / grid.shape[0]
    np.testing.assert_allclose(gram, np.eye(25), atol=2e-3)


def test_harmonic_gradient_against_finite_differences():
    rng = np.random.default_rng(3)
    u = normalize(rng.normal(size=(50, 3)))
    _, dy = harmonics_and_gradient(6, u)
    e1, e2 = tangent_basis(u)
    h = 1e-6
    for e in (e1, e2):
        fd = (harmonics(6, exp_map(u, h * e)) - harmonics(6, exp_map(u, -h * e))) / (2 * h)
        np.testing.assert_allclose(np.einsum("njk,nk->nj", dy, e), fd, atol=1e-6)


def test_tangent_chart_and_maps():
    rng = np.random.default_rng(4)
    u = normalize(rng.normal(size=(100, 3)))
    e1, e2 = tangent_basis(u)
    np.testing.assert_allclose(np.sum(e1 * u, -1), 0, atol=1e-12)
    np.testing.assert_allclose(np.cross(e1, e2), u, atol=1e-12)
    delta = 0.3 * e1 - 0.2 * e2
    v = exp_map(u, delta)
    np.testing.assert_allclose(angle_between(u, v), np.hypot(0.3, 0.2), atol=1e-12)
    np.testing.assert_allclose(log_map(u, v), delta, atol=1e-10)
    # Tangent basis at the poles and on the axes stays orthonormal (no chart singularity).
    poles = np.array([[0, 0, 1.0], [0, 0, -1.0], [1.0, 0, 0]])
    a, b = tangent_basis(poles)
    np.testing.assert_allclose(np.linalg.norm(a, axis=1), 1)
    np.testing.assert_allclose(np.sum(a * b, -1), 0, atol=1e-15)


def test_lambert_projection_is_equal_area():
    # Equal-area: a uniform sphere sample stays uniform in the disk of radius 2 (Lambert azimuthal).
    xy = lambert_azimuthal(fibonacci_sphere(40000))
    r = np.hypot(xy[:, 0], xy[:, 1])
    assert np.mean(r < np.sqrt(2)) == pytest.approx(0.5, abs=0.002)  # hemisphere -> r < sqrt 2


def test_magnitude_basis_interpolates_and_is_smooth():
    knots = [1000, 2000, 5000, 10000, 20000]
    basis = MagnitudeBasis(knots)
    np.testing.assert_allclose(basis(knots), np.eye(5), atol=1e-12)
    np.testing.assert_allclose(basis(np.geomspace(500, 40000, 200)).sum(axis=1), 1, atol=1e-12)
    # A function that is a cubic in ln|B| is reproduced exactly between the knots.
    x = np.log(np.geomspace(1000, 20000, 50))
    f = lambda s: 0.3 * s**3 - s  # noqa: E731
    np.testing.assert_allclose(basis(np.exp(x)) @ f(np.log(knots)), f(x), rtol=1e-9, atol=1e-9)
    assert MagnitudeBasis([3000]).size == 1
    with pytest.raises(ValueError):
        MagnitudeBasis([0, 100])


@pytest.mark.parametrize("degree", [0, 1, 2, 5, 10])
def test_own_real_harmonics_equal_scipy(degree):
    """The recurrence-based real harmonics (used at run time) equal scipy.special.sph_harm_y's (the reference)."""
    from fieldvane.estimator.harmonics import real_sph_harm, real_sph_harm_reference
    from fieldvane.estimator.sphere import fibonacci_sphere

    u = fibonacci_sphere(500)
    assert np.allclose(real_sph_harm(degree, u), real_sph_harm_reference(degree, u), atol=1e-12)
