"""The tracker's input preparation per sample, compiled: |B| from the two frequencies, input flags, magnitude
segment, model-error ratio and whitened lock-in values, in one pass over the rows.

`prepare_rows` computes what Tracker.prepare did with numpy (estimator/tracker.py): |B| seen by each
isotope f_i / gamma_i; both good: their mean, MAGNITUDE_DISAGREE when they differ by more than
tolerance x |B| (estimator/magnitude.py's fixed-tolerance rule); one good: that one, with BAD_INPUT;
none: nan and BAD_INPUT. OUTSIDE_CALIBRATION beyond the calibrated magnitudes widened by the margin;
LOW_SIGNAL when the lock-in RMS over the present components is below the low-signal level; the
magnitude segment of the response tables and the position in it (log|B|, clamped, as
TrackerModel.segments); the calibration's model-error ratio interpolated in log|B| (the cap outside
its table, 0 without |B|); lock-in values divided by their calibrated noise std. The live loop
prepares a few samples per call, where numpy's per-call cost of some forty small array operations
was most of the time; here one call walks the rows once. Compiled like estimator/filter_core.py
(fieldvane/kernels.py).
"""

from __future__ import annotations

import math

import numpy as np

from fieldvane.estimator.flags import EstimateFlag as _F
from fieldvane.kernels import entry, helper

_DISAGREE, _OUTSIDE, _BAD, _LOW = (int(_F.MAGNITUDE_DISAGREE), int(_F.OUTSIDE_CALIBRATION), int(_F.BAD_INPUT),
                                   int(_F.LOW_SIGNAL))

# Slots of the `limits` argument (floats).
L_TOLERANCE, L_RANGE_LO, L_RANGE_HI, L_MARGIN, L_LOW_AMP, L_SEG_LO, L_SEG_HI, L_MERR_CAP = range(8)
N_LIMITS = 8


@helper(cache=True, nogil=True)
def _numpy_sum(a, n):
    """Return a[0] + ... + a[n-1] added in numpy's order for n <= 128 (its pairwise sum: eight running sums from
    n = 8, combined in pairs), so that a threshold on the sum decides exactly as the numpy formulation did."""
    if n < 8:
        total = 0.0
        for k in range(n):
            total += a[k]
        return total
    r0, r1, r2, r3, r4, r5, r6, r7 = a[0], a[1], a[2], a[3], a[4], a[5], a[6], a[7]
    k = 8
    while k < n - n % 8:
        r0 += a[k]
        r1 += a[k + 1]
        r2 += a[k + 2]
        r3 += a[k + 3]
        r4 += a[k + 4]
        r5 += a[k + 5]
        r6 += a[k + 6]
        r7 += a[k + 7]
        k += 8
    total = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while k < n:
        total += a[k]
        k += 1
    return total


@entry("i8(f8[::1], f8[::1], f8[::1], f8[::1], f8[::1], f8[::1], f8[:, ::1], f8[:, ::1], f8[::1], f8[:, ::1], "
       "i8[::1], f8[::1], i8[::1], f8[::1], f8[:, ::1])",
       cache=True, nogil=True, error_model="numpy")
def prepare_rows(gammas, limits, sigma, starts, merr_grid, merr_values, f, zr, b, per, flags, seg_t, segment, merr,
                 zw):
    """Fill b (N,) nT, per (N, 2) nT, flags (N,), seg_t (N,), segment (N,), merr (N,) and zw (N, 2C) from
    frequencies f (N, 2) Hz and lock-in components zr (N, 2C) V; return N. The tracker's constants come first
    (the live path binds them once: fieldvane.kernels.bind).

    gammas (2,) Hz/nT; limits (N_LIMITS,) by the L_* slots; sigma (2C,) V; starts (S,) segment starts in
    log|B|; merr_grid (G,) log|B| and merr_values (G,) the model-error table (G = 0: none).
    """
    n, m = zr.shape
    g0, g1 = gammas[0], gammas[1]
    tol, lo, hi, margin = limits[L_TOLERANCE], limits[L_RANGE_LO], limits[L_RANGE_HI], limits[L_MARGIN]
    low_lo, low_hi = lo * (1 - margin), hi * (1 + margin)
    seg_lo, seg_hi, cap = limits[L_SEG_LO], limits[L_SEG_HI], limits[L_MERR_CAP]
    n_seg = starts.shape[0]
    n_grid = merr_grid.shape[0]
    squares = np.empty(m)
    for r in range(n):
        p0, p1 = f[r, 0] / g0, f[r, 1] / g1
        per[r, 0], per[r, 1] = p0, p1
        ok0 = math.isfinite(p0) and p0 > 0
        ok1 = math.isfinite(p1) and p1 > 0
        code = 0
        if ok0 and ok1:
            value = (p0 + p1) / 2
            if abs(p0 - p1) > tol * abs(value):
                code = _DISAGREE
        else:
            code = _BAD
            value = p0 if ok0 else (p1 if ok1 else np.nan)
        if (ok0 or ok1) and (value < low_lo or value > low_hi):
            code |= _OUTSIDE
        # Lock-in level: the RMS over the components present.
        count = 0
        for k in range(m):
            v = zr[r, k]
            squares[k] = v * v if math.isfinite(v) else 0.0
            count += math.isfinite(v)
            zw[r, k] = v / sigma[k]
        if count > 0 and math.sqrt(_numpy_sum(squares, m) * 2 / count) < limits[L_LOW_AMP]:
            code |= _LOW
        b[r] = value
        flags[r] = code
        # Magnitude segment (clamped to the tables' range; no |B|: segment -1, position from the low end).
        known = math.isfinite(value)
        if value != value:
            x = math.log(seg_lo)
        else:
            x = math.log(min(max(value, seg_lo), seg_hi))
        s = np.searchsorted(starts, x, side="right") - 1
        s = min(max(s, 0), n_seg - 1)
        segment[r] = s if known else -1
        seg_t[r] = x - starts[s]
        # Model-error ratio at this |B| (0 without |B|, the cap outside the table).
        if n_grid == 0:
            merr[r] = 0.0
        elif not known or value <= 0:
            merr[r] = 0.0
        else:
            lx = math.log(value)
            if lx < merr_grid[0] or lx > merr_grid[n_grid - 1]:
                merr[r] = cap
            else:
                merr[r] = np.interp(lx, merr_grid, merr_values)
    return n
