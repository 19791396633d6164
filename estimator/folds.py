"""Cross-validation folds for scans: the samples recorded at one scan point stay in one fold."""

from __future__ import annotations

import numpy as np


def scan_point_folds(u: np.ndarray, b_nT: np.ndarray, folds: int, rng: np.random.Generator) -> np.ndarray:
    """Return the fold (N,) int of each scan row: consecutive rows at the same applied field (u (N, 3), |B| (N,) nT) share one.

    A stepped scan records several samples per coil setting; through a lock-in's output filter they
    are strongly correlated, so a fold holding some of them while another trains on the rest
    measures the fit on data it has nearly seen, and cross-validation picks too rich a model.
    Keeping each point's samples together makes the held-out residual honest; a scan whose rows all
    differ (a continuous sweep) gets per-row folds as before.
    """
    point = scan_points(u, b_nT)
    n_points = int(point[-1]) + 1 if point.size else 0
    return rng.permutation(np.arange(n_points) % folds)[point]


def scan_points(u: np.ndarray, b_nT: np.ndarray) -> np.ndarray:
    """Return the scan point (N,) int of each row: a new point wherever the applied field (u (N, 3), |B| (N,) nT) changes."""
    field = np.asarray(u, float) * np.asarray(b_nT, float)[:, None]
    n = field.shape[0]
    if n == 0:
        return np.zeros(0, int)
    new_point = np.ones(n, bool)
    new_point[1:] = np.any(field[1:] != field[:-1], axis=1)
    return np.cumsum(new_point) - 1
