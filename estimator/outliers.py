"""Outlier rows of a calibration scan: a robust screening fit and a chi-square test per row.

Screening fits every channel with spherical harmonics times the magnitude splines by iteratively
reweighted least squares with a Huber weight on each row's whitened residual norm (Huber,
'Robust Statistics', 1981). The loss is convex, so the result does not depend on the start, and a
designed scan has no leverage points (directions spread over the sphere, magnitudes at chosen
levels): a few wild rows, however large, move it by a bounded amount. Channel scales come from the
median absolute deviation (50 % breakdown; 1.4826 makes it consistent for Gaussian noise). A row is
rejected when its whitened residual sum of squares over the 2C real components exceeds the
chi-square quantile at level `row_alpha` (scipy.stats.chi2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.harmonics import harmonics
from fieldvane.estimator.tall import gram, rows_times


def _chi2():
    """Return scipy.stats.chi2, imported only when a calibration is fitted (not when one is read)."""
    from scipy.stats import chi2

    return chi2

MAD_TO_STD = 1.4826         # consistency factor of the MAD for a Gaussian (common practice)
HUBER_QUANTILE = 0.95       # rows beyond this chi-square quantile are down-weighted (common practice)


@dataclass
class ScreenResult:
    """Robust screening of N rows: inlier mask, per-channel robust std (V), row statistic, worst channel."""

    inlier: np.ndarray          # (N,) bool
    scale: np.ndarray           # (C,) robust std of X and Y per channel, V
    statistic: np.ndarray       # (N,) whitened residual sum of squares (2C components)
    worst_channel: np.ndarray   # (N,) index of the channel contributing most to the statistic
    threshold: float


def row_threshold(n_channels: int, row_alpha: float) -> float:
    """Return the chi-square limit (2C degrees of freedom) on a row's whitened residual sum of squares."""
    return float(_chi2().isf(row_alpha, 2 * n_channels))


def robust_scale(resid: np.ndarray) -> np.ndarray:
    """Return the per-channel std (C,) of X and Y from complex residuals (N, C) by the MAD."""
    comp = np.concatenate([resid.real, resid.imag], axis=0)
    med = np.median(comp, axis=0)
    return MAD_TO_STD * np.median(np.abs(comp - med), axis=0)


def row_statistic(resid: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (sum over channels of |r|^2 / std^2 (N,), worst channel (N,)) for residuals (N, C)."""
    per = np.abs(resid / scale) ** 2
    return per.sum(axis=1), np.argmax(per, axis=1)


def screen_rows(u: np.ndarray, s_basis: np.ndarray, z: np.ndarray, degree: int, row_alpha: float,
                max_iterations: int = 30) -> ScreenResult:
    """Return the ScreenResult of rows u (N,3), magnitude weights s_basis (N,K), values z (N,C) V."""
    n, c_n = z.shape
    design = (s_basis[:, :, None] * harmonics(degree, u)[:, None, :]).reshape(n, -1)
    target = np.concatenate([z.real, z.imag], axis=1)                     # (N, 2C)
    huber_k2 = float(_chi2().isf(1.0 - HUBER_QUANTILE, 2 * c_n))
    w = np.ones(n)
    scale = np.ones(c_n)
    resid = z
    for _ in range(max_iterations):
        weighted = design * w[:, None]
        normal = gram(weighted, design)
        normal[np.diag_indices_from(normal)] += 1e-12 * (np.trace(normal) / normal.shape[0] + 1e-300)
        coef = np.linalg.solve(normal, gram(weighted, target))
        r = target - rows_times(design, coef)
        resid = r[:, :c_n] + 1j * r[:, c_n:]
        scale = np.maximum(robust_scale(resid), 1e-300)
        stat, _ = row_statistic(resid, scale)
        new_w = np.minimum(1.0, np.sqrt(huber_k2 / np.maximum(stat, 1e-300)))
        if np.max(np.abs(new_w - w)) < 1e-4:
            w = new_w
            break
        w = new_w
    stat, worst = row_statistic(resid, scale)
    limit = row_threshold(c_n, row_alpha)
    return ScreenResult(stat <= limit, scale, stat, worst, limit)
