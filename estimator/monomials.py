"""Monomials x^a y^b z^c of a sensor-frame direction: exponent table, values and derivative maps.

One table serves the spherical harmonics (estimator/harmonics.py), the snapshot inverse
(estimator/snapshot.py) and the tracker's measurement model (estimator/tracker_model.py), so all
three expand the response in the same monomials, in the same order: by total degree, then by
falling power of x, then of y.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np


@lru_cache(maxsize=16)
def exponents(degree: int) -> np.ndarray:
    """Return the exponents (M, 3) of every monomial x^a y^b z^c of total degree <= degree (read-only)."""
    exps = np.array([(a, b, l - a - b) for l in range(degree + 1) for a in range(l, -1, -1)
                     for b in range(l - a, -1, -1)], dtype=np.int64).reshape(-1, 3)
    exps.setflags(write=False)
    return exps


def count(degree: int) -> int:
    """Return the number of monomials of total degree <= degree: (L+1)(L+2)(L+3)/6."""
    return (degree + 1) * (degree + 2) * (degree + 3) // 6


def powers(u: np.ndarray, degree: int) -> np.ndarray:
    """Return u_k^e for e = 0..degree at points u (N, 3): shape (N, 3, degree+1)."""
    pw = np.ones(u.shape + (degree + 1,))
    for e in range(1, degree + 1):
        pw[..., e] = pw[..., e - 1] * u
    return pw


def monomials(u: np.ndarray, exps: np.ndarray) -> np.ndarray:
    """Return every monomial of the exponent table exps (M, 3) at points u (N, 3): shape (N, M)."""
    deg = int(exps.max()) if exps.size else 0
    pw = powers(np.atleast_2d(u), deg)
    return pw[:, 0, exps[:, 0]] * pw[:, 1, exps[:, 1]] * pw[:, 2, exps[:, 2]]


def monomials_and_gradient(u: np.ndarray, exps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the monomials (N, M) at points u (N, 3) and their ambient gradients (N, 3, M)."""
    deg = int(exps.max()) if exps.size else 0
    pw = powers(np.atleast_2d(u), deg)
    ex, ey, ez = exps[:, 0], exps[:, 1], exps[:, 2]
    px, py, pz = pw[:, 0, ex], pw[:, 1, ey], pw[:, 2, ez]
    dx = ex * pw[:, 0, np.maximum(ex - 1, 0)]
    dy = ey * pw[:, 1, np.maximum(ey - 1, 0)]
    dz = ez * pw[:, 2, np.maximum(ez - 1, 0)]
    return px * py * pz, np.stack([dx * py * pz, px * dy * pz, px * py * dz], axis=1)


def power_index(exps: np.ndarray, degree: int) -> np.ndarray:
    """Return indices (3, M) into the flat list [x^0..x^L, y^0..y^L, z^0..z^L] picking each monomial's factors."""
    return (np.asarray(exps) + np.arange(3)[None, :] * (degree + 1)).T.copy()


def derivative_maps(exps: np.ndarray) -> list[np.ndarray]:
    """Return (M, M) matrices D_x, D_y, D_z with d/dx_k sum_m a_m mono_m = sum_m (a @ D_k)_m mono_m."""
    index = {tuple(e): i for i, e in enumerate(np.asarray(exps).tolist())}
    maps = []
    for k in range(3):
        d = np.zeros((len(index), len(index)))
        for i, e in enumerate(np.asarray(exps).tolist()):
            if e[k] > 0:
                lower = list(e)
                lower[k] -= 1
                d[i, index[tuple(lower)]] = e[k]
        maps.append(d)
    return maps
