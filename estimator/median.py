"""Median of a 1-D float array, equal to numpy.median, without importing numpy.ma.

numpy 2.x's median (and unique) import numpy.ma on first use: about 9 ms of every start of `run` and
`replay`. This is the same arithmetic (partition, then the mean of the two middle values for an even
count), so the result equals numpy.median bit for bit.
"""

from __future__ import annotations

import math

import numpy as np


def median(values) -> float:
    """Return the median of the values (any unit; nan when empty or any value is nan), as numpy.median."""
    a = np.asarray(values, dtype=np.float64).ravel()
    n = a.size
    if n == 0 or np.isnan(a).any():
        return math.nan
    k = n // 2
    if n % 2:
        return float(0.0 + np.partition(a, k)[k])            # numpy's mean sums from +0.0: -0.0 becomes 0.0
    part = np.partition(a, (k - 1, k))
    with np.errstate(invalid="ignore", over="ignore"):       # inf + -inf is nan, as numpy's mean gives
        return float(((0.0 + part[k - 1]) + part[k]) / 2.0)
