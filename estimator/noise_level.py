"""Adaptive measurement noise: per-probe noise level from successive differences of the innovations.

Why. The tracker's measurement noise R is the calibrated lock-in noise. When interference raises
the noise (a fan, a pump-laser hop), every sample fails the chi-square gate, the track is
declared lost, and re-acquisitions start from snapshot solutions whose covariance still assumes
the calibrated noise: the reported sigma is far too small. The filter needs the noise level of the
moment, and that estimate must not confuse noise with a wrong track.

Method. With y_k the whitened innovation of sample k (prior, calibrated noise) and m the number of
real measurements of one probe, the successive difference y_k - y_(k-1) cancels whatever changes
slowly from one sample to the next -- the track error, a model error, the field's motion already
predicted by the filter -- and keeps the white lock-in noise twice. This is the mean square
successive difference (J. von Neumann et al., Ann. Math. Statist. 12, 1941) applied to the
innovation sequence; it belongs to innovation-based adaptive estimation (R. K. Mehra, IEEE Trans.
Automatic Control 17, 1972; A. H. Mohamed and K. P. Schwarz, J. Geodesy 73, 1999), but unlike
their windowed innovation covariance it does not grow when the track itself is wrong: after a
direction step the innovation is large but nearly constant, so its differences stay at the noise.

Each sample gives one value: the smaller of its squared differences to the two samples before it,
min(|y_k - y_(k-1)|^2, |y_k - y_(k-2)|^2), so one spike spoils one value, not two. Divided by its
median under calibrated white noise (difference_median: given y_k both differences are independent
noncentral chi-square, so the median solves a one-dimensional integral, scipy.stats.ncx2) it is a
median-unbiased estimate of lambda, the noise variance over its calibrated value. The level is the
running median of the last W values, which spikes cannot move unless they spoil half the window;
the factor applied to R is 1 while that median stays below a threshold (a stream at its calibrated
noise keeps exactly the calibrated R), the median above it, capped at max_scale^2. It follows a
change of noise within (W + 1) / 2 values. The tracker adds one rule: the value of a sample that
fails the gate enters only if the sample before it failed too, so a lone spike never counts while a
noise rise (every sample gated until the level follows) does, one sample later.

Assumes white lock-in noise between samples, as the calibrated R does: noise correlated from one
sample to the next (correlation rho) reads low, by roughly the factor 1 - rho.
"""

from __future__ import annotations

from collections import deque
from functools import lru_cache

import numpy as np
from scipy.optimize import brentq
from scipy.stats import chi2, ncx2


@lru_cache(maxsize=32)
def difference_median(m: int) -> float:
    """Return the median of min(|a - b|^2, |a - c|^2) for a, b, c independent N(0, I_m) (dimensionless).

    Given a, |a - b|^2 and |a - c|^2 are independent noncentral chi-square (m dof, noncentrality
    |a|^2), so P(min > s) = E[sf(s)^2] over |a|^2 ~ chi2(m): averaged here over 4000 quantile
    midpoints of chi2(m), and solved for P = 1/2.
    """
    r = chi2.ppf((np.arange(4000) + 0.5) / 4000, m)
    return float(brentq(lambda s: np.mean(ncx2.sf(s, m, r) ** 2) - 0.5, 1e-9, 10.0 * m + 50.0, xtol=1e-12))


def difference_normalizers(sizes) -> list[float]:
    """Return 1 / difference_median(m) per group of m real measurements (the factor turning a value into lambda)."""
    return [1.0 / difference_median(int(m)) for m in sizes]


def min_values(window: int) -> int:
    """Return how many values a window of that length needs before its median may leave 1: half of it."""
    return (window + 1) // 2


def effective_ratio(median: float, threshold: float, max_ratio: float) -> float:
    """Return the variance factor applied to R (dimensionless) for a running-median noise ratio."""
    if not median > threshold:      # also 1 for nan
        return 1.0
    return min(median, max_ratio)


class NoiseLevel:
    """Running noise-variance factor per probe (1 = calibrated) for one filter.

    push() takes one lambda estimate per group and updates `ratios`, the factors to apply to each
    group's calibrated noise variance.
    """

    def __init__(self, n_groups: int, window: int, threshold: float, max_ratio: float):
        self._windows = [deque(maxlen=window) for _ in range(n_groups)]
        self._min_values = min_values(window)
        self._threshold = threshold
        self._max_ratio = max_ratio
        self.ratios = [1.0] * n_groups

    def push(self, values) -> list[float]:
        """Add one finite lambda value per group; return the variance factors per group."""
        for g, v in enumerate(values):
            w = self._windows[g]
            w.append(v)
            n = len(w)
            if n >= self._min_values:
                s = sorted(w)
                med = s[n // 2] if n % 2 else 0.5 * (s[n // 2 - 1] + s[n // 2])
                self.ratios[g] = effective_ratio(med, self._threshold, self._max_ratio)
        return self.ratios


class NoiseLevelBatch:
    """The same running factors for many filters at once (filters, groups); window and limits per filter."""

    def __init__(self, n_groups: int, windows, thresholds, max_ratios):
        self._window = np.asarray(windows, int)
        n_filters = self._window.size
        self._ring = np.full((n_filters, n_groups, int(self._window.max())), np.nan)
        self._pos = np.zeros(n_filters, int)
        self._count = np.zeros(n_filters, int)
        self._min_values = np.array([min_values(int(w)) for w in self._window])
        self._threshold = np.asarray(thresholds, float)[:, None]
        self._max_ratio = np.asarray(max_ratios, float)[:, None]
        self.ratios = np.ones((n_filters, n_groups))

    def push(self, values: np.ndarray, mask: np.ndarray) -> np.ndarray:
        """Add values (filters, groups) for the filters in mask; return the variance factors (filters, groups)."""
        idx = np.flatnonzero(mask)
        if idx.size == 0:
            return self.ratios
        self._ring[idx, :, self._pos[idx]] = values[idx]
        self._pos[idx] = (self._pos[idx] + 1) % self._window[idx]
        n = self._count[idx] = np.minimum(self._count[idx] + 1, self._window[idx])
        ring = np.sort(self._ring[idx], axis=2)                       # unfilled (nan) entries sort last
        groups = ring.shape[1]
        lo = np.take_along_axis(ring, np.repeat(((n - 1) // 2)[:, None, None], groups, 1), axis=2)[..., 0]
        hi = np.take_along_axis(ring, np.repeat((n // 2)[:, None, None], groups, 1), axis=2)[..., 0]
        med = 0.5 * (lo + hi)
        thr, cap = self._threshold[idx], self._max_ratio[idx]
        new = np.where(med > thr, np.minimum(med, cap), 1.0)
        ready = (n >= self._min_values[idx])[:, None]
        self.ratios[idx] = np.where(ready, new, self.ratios[idx])
        return self.ratios
