"""One meaning of BLIND: where the single-sample Cramer-Rao bound is far above its sphere median.

A direction is blind where its single-sample Cramer-Rao bound (sqrt of the trace of the 2x2
bound, degrees or radians, either unit as long as both arguments share it) exceeds BLIND_FACTOR
times the median of that bound over the sphere at the same field magnitude. The rule is
relative, so it marks the same directions whatever the lock-in noise level: doubling the noise
doubles every bound and the median alike. A bound that is not finite (singular information) is
always blind.

The map (`fieldvane map`), the tracker and the snapshot solver share these functions.
"""

from __future__ import annotations

import numpy as np

from fieldvane.estimator.median import median

BLIND_FACTOR = 5.0
MEDIAN_GRID_POINTS = 2000     # near-uniform directions behind every sphere median (same grid for all users)


def check_factor(factor: float) -> float:
    """Return factor as a float after checking it is finite and above 1 (a limit below the median makes no sense)."""
    f = float(factor)
    if not (np.isfinite(f) and f > 1.0):
        raise ValueError(f"the blind factor must be a finite number above 1, got {factor!r}")
    return f


def sphere_median(bound_on_grid) -> float:
    """Return the median of the bound over a near-uniform sphere grid (same unit as the input; inf counts as large)."""
    b = np.asarray(bound_on_grid, float).ravel()
    b = b[~np.isnan(b)]
    if b.size == 0:
        raise ValueError("no bound values to take the sphere median of")
    return median(b)


def blind_limit(median_bound: float, factor: float = BLIND_FACTOR) -> float:
    """Return the bound above which a direction is blind: factor x the sphere median (same unit as the median)."""
    return check_factor(factor) * float(median_bound)


def blind_mask(bound, median_bound: float, factor: float = BLIND_FACTOR) -> np.ndarray:
    """Return True where the bound exceeds factor x the sphere median, or is not finite (bool array of bound's shape)."""
    b = np.asarray(bound, float)
    limit = blind_limit(median_bound, factor)
    return ~(np.isfinite(b) & (b <= limit))


def blind_fraction(bound_on_grid, median_bound: float | None = None, factor: float = BLIND_FACTOR) -> float:
    """Return the blind share of a near-uniform sphere grid (0..1); the median defaults to the grid's own."""
    b = np.asarray(bound_on_grid, float).ravel()
    if b.size == 0:
        raise ValueError("no bound values")
    med = sphere_median(b) if median_bound is None else float(median_bound)
    return float(np.mean(blind_mask(b, med, factor)))


def median_bound_deg(model, b_nT: float, probes=None, gain_free: bool = False, noise_std=None,
                     n_points: int = MEDIAN_GRID_POINTS) -> float:
    """Return the sphere median of the single-sample Cramer-Rao bound (deg) of a response model at |B| = b_nT (nT)."""
    from fieldvane.estimator.fisher import crlb_deg
    from fieldvane.estimator.sphere import fibonacci_sphere

    return sphere_median(crlb_deg(model, fibonacci_sphere(int(n_points)), float(b_nT), probes, gain_free, noise_std))
