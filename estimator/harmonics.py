"""Real spherical harmonics up to degree L as Cartesian polynomials, with exact gradients."""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from fieldvane.estimator.monomials import exponents as monomial_exponents
from fieldvane.estimator.monomials import monomials, monomials_and_gradient
from fieldvane.estimator.sphere import fibonacci_sphere, unit_to_spherical
from fieldvane.estimator.tall import rows_times


def n_harmonics(degree: int) -> int:
    """Return the number of real spherical harmonics of degree 0..degree: (L+1)^2."""
    return (degree + 1) ** 2


def real_sph_harm_reference(degree: int, u: np.ndarray) -> np.ndarray:
    """Return orthonormal real spherical harmonics Y_lm(u), l <= degree, from scipy.special (N, (L+1)^2)."""
    from scipy.special import sph_harm_y  # only for building the tables once

    polar, azimuth = unit_to_spherical(u)
    cols = []
    for l in range(degree + 1):
        for m in range(-l, l + 1):
            y = sph_harm_y(l, abs(m), polar, azimuth)
            if m < 0:
                cols.append(np.sqrt(2.0) * y.imag)
            elif m == 0:
                cols.append(y.real)
            else:
                cols.append(np.sqrt(2.0) * y.real)
    return np.column_stack(cols)


def real_sph_harm(degree: int, u: np.ndarray) -> np.ndarray:
    """Return orthonormal real spherical harmonics Y_lm(u), l <= degree (N, (L+1)^2), the same functions and order as
    real_sph_harm_reference (scipy.special, with the Condon-Shortley phase), by the associated Legendre recurrences
    (so that reading a calibration does not load scipy.special)."""
    u = np.atleast_2d(np.asarray(u, float))
    polar, azimuth = unit_to_spherical(u)
    x, s = np.cos(polar), np.sin(polar)
    p = {}                                  # P_l^m(x) with the Condon-Shortley phase, m >= 0
    pmm = np.ones_like(x)
    for m in range(degree + 1):
        if m > 0:
            pmm = -(2 * m - 1) * s * pmm
        p[(m, m)] = pmm
        if m + 1 <= degree:
            p[(m + 1, m)] = x * (2 * m + 1) * pmm
        for l in range(m + 2, degree + 1):
            p[(l, m)] = ((2 * l - 1) * x * p[(l - 1, m)] - (l + m - 1) * p[(l - 2, m)]) / (l - m)
    cols = []
    for l in range(degree + 1):
        for m in range(-l, l + 1):
            a = abs(m)
            norm = math.sqrt((2 * l + 1) / (4 * math.pi) * math.exp(math.lgamma(l - a + 1) - math.lgamma(l + a + 1)))
            if m < 0:
                cols.append(math.sqrt(2.0) * norm * p[(l, a)] * np.sin(a * azimuth))
            elif m == 0:
                cols.append(norm * p[(l, 0)])
            else:
                cols.append(math.sqrt(2.0) * norm * p[(l, a)] * np.cos(a * azimuth))
    return np.column_stack(cols)


@lru_cache(maxsize=16)
def monomial_coefficients(degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Return (monomial exponents (M, 3), T (M, (L+1)^2)) with harmonics(degree, u) = monomials(u) @ T on the sphere."""
    exps = monomial_exponents(degree)
    # Each degree-l harmonic is a homogeneous degree-l polynomial: fit it exactly on the
    # sphere from that degree's monomials only (residual at rounding level).
    grid = fibonacci_sphere(max(400, 8 * n_harmonics(degree)))
    ref = real_sph_harm(degree, grid)
    mono = monomials(grid, exps)
    total = exps.sum(axis=1)
    coef = np.zeros((len(exps), n_harmonics(degree)))
    col = 0
    for l in range(degree + 1):
        rows = np.flatnonzero(total == l)
        sol, *_ = np.linalg.lstsq(mono[:, rows], ref[:, col:col + 2 * l + 1], rcond=None)
        coef[np.ix_(rows, np.arange(col, col + 2 * l + 1))] = sol
        col += 2 * l + 1
    coef[np.abs(coef) < 1e-12] = 0.0
    coef.setflags(write=False)
    return exps, coef


def harmonics(degree: int, u: np.ndarray) -> np.ndarray:
    """Return real spherical harmonics Y (N, (L+1)^2) at unit vectors u (N, 3), sensor frame."""
    exps, coef = monomial_coefficients(degree)
    return rows_times(monomials(np.atleast_2d(u), exps), coef)


def harmonics_and_gradient(degree: int, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return Y (N, K) and dY/du (N, K, 3): ambient gradient of the solid-harmonic extension."""
    exps, coef = monomial_coefficients(degree)
    mono, grad = monomials_and_gradient(np.atleast_2d(u), exps)       # (N, M), (N, 3, M)
    return mono @ coef, np.swapaxes(grad @ coef, 1, 2)

