"""Real spherical harmonics up to degree L as Cartesian polynomials, with exact gradients."""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from fieldvane.estimator.sphere import fibonacci_sphere, unit_to_spherical


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


@lru_cache(maxsize=16)
def _tables(degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Monomial exponents (M, 3) of total degree <= L and the map (M, (L+1)^2) to real harmonics."""
    exps = [(a, b, l - a - b) for l in range(degree + 1) for a in range(l, -1, -1)
            for b in range(l - a, -1, -1)]
    exps = np.array(exps, dtype=np.int64)
    # Each degree-l harmonic is a homogeneous degree-l polynomial: fit it exactly on the
    # sphere from that degree's monomials only (residual at rounding level).
    grid = fibonacci_sphere(max(400, 8 * n_harmonics(degree)))
    ref = real_sph_harm_reference(degree, grid)
    mono = np.prod(grid[:, None, :] ** exps[None, :, :], axis=2)
    total = exps.sum(axis=1)
    coef = np.zeros((len(exps), n_harmonics(degree)))
    col = 0
    for l in range(degree + 1):
        rows = np.flatnonzero(total == l)
        sol, *_ = np.linalg.lstsq(mono[:, rows], ref[:, col:col + 2 * l + 1], rcond=None)
        coef[np.ix_(rows, np.arange(col, col + 2 * l + 1))] = sol
        col += 2 * l + 1
    coef[np.abs(coef) < 1e-12] = 0.0
    return exps, coef


def harmonics(degree: int, u: np.ndarray) -> np.ndarray:
    """Return real spherical harmonics Y (N, (L+1)^2) at unit vectors u (N, 3), sensor frame."""
    exps, coef = _tables(degree)
    pw = _powers(np.atleast_2d(u), degree)
    mono = pw[:, 0, exps[:, 0]] * pw[:, 1, exps[:, 1]] * pw[:, 2, exps[:, 2]]
    return mono @ coef


def harmonics_and_gradient(degree: int, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return Y (N, K) and dY/du (N, K, 3): ambient gradient of the solid-harmonic extension."""
    exps, coef = _tables(degree)
    u = np.atleast_2d(u)
    pw = _powers(u, degree)
    ex, ey, ez = exps[:, 0], exps[:, 1], exps[:, 2]
    px, py, pz = pw[:, 0, ex], pw[:, 1, ey], pw[:, 2, ez]
    dx = ex * pw[:, 0, np.maximum(ex - 1, 0)]
    dy = ey * pw[:, 1, np.maximum(ey - 1, 0)]
    dz = ez * pw[:, 2, np.maximum(ez - 1, 0)]
    mono = px * py * pz
    grad = np.stack([dx * py * pz, px * dy * pz, px * py * dz], axis=1)  # (N, 3, M)
    return mono @ coef, np.swapaxes(grad @ coef, 1, 2)


def _powers(u: np.ndarray, degree: int) -> np.ndarray:
    """Return u_k^e for e = 0..degree, shape (N, 3, degree+1)."""
    pw = np.ones(u.shape + (degree + 1,))
    for e in range(1, degree + 1):
        pw[..., e] = pw[..., e - 1] * u
    return pw
