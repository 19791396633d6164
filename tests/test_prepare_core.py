"""The tracker's compiled input preparation (estimator/prepare_core.py) against the numpy formulation it replaced.

The reference below is Tracker.prepare as it was written with numpy array operations (before the
compiled kernel): |B| per isotope f / gamma, their mean and the fixed-tolerance disagreement of
estimator/magnitude.py, BAD_INPUT / OUTSIDE_CALIBRATION / LOW_SIGNAL, TrackerModel.segments, the
model-error table through np.interp, and the whitened values. Inputs mix good rows with every kind of
bad one (nan, zero and negative frequencies, one isotope missing, disagreeing isotopes, magnitudes
outside the calibration and outside the tables, missing and faint lock-in channels).
"""

import numpy as np
import pytest

from fieldvane.estimator import prepare_core
from fieldvane.estimator.flags import EstimateFlag as F
from fieldvane.estimator.magnitude import disagreement, magnitudes_from_frequencies

GAMMAS = np.array([7.0, 4.667])          # Hz/nT, invented round numbers (the kernel takes any)


def reference(f, zr, limits, sigma, starts, grid, values):
    """The numpy formulation of Tracker.prepare's conversions (commit before the compiled kernel)."""
    tol, lo, hi, margin, low_amp, seg_lo, seg_hi, cap = limits
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        per = magnitudes_from_frequencies(f, GAMMAS)
        ok = np.isfinite(per) & (per > 0)
        both = ok[:, 0] & ok[:, 1]
        bb = magnitudes_from_frequencies(np.where(ok, f, 1.0), GAMMAS)
        fused = bb.mean(axis=1)
        disagree = disagreement(bb, None, tol)
    b = np.where(both, fused, np.where(ok[:, 0], per[:, 0], np.where(ok[:, 1], per[:, 1], np.nan)))
    flags = np.where(both, np.where(disagree, int(F.MAGNITUDE_DISAGREE), 0), int(F.BAD_INPUT))
    valid = both | ok[:, 0] | ok[:, 1]
    known = np.where(valid, b, lo)
    outside = valid & ((known < lo * (1 - margin)) | (known > hi * (1 + margin)))
    flags = np.where(outside, flags | int(F.OUTSIDE_CALIBRATION), flags)
    good = np.isfinite(zr)
    with np.errstate(invalid="ignore", over="ignore"):
        rms = np.sqrt(np.where(good, zr * zr, 0.0).sum(axis=1) * 2 / np.maximum(good.sum(axis=1), 1))
    flags = flags | np.where(good.any(axis=1) & (rms < low_amp), int(F.LOW_SIGNAL), 0)
    x = np.log(np.clip(np.nan_to_num(b, nan=seg_lo, posinf=seg_hi, neginf=seg_lo), seg_lo, seg_hi))
    s = np.clip(np.searchsorted(starts, x, side="right") - 1, 0, starts.size - 1)
    seg_t = x - starts[s]
    seg = np.where(np.isfinite(b), s, -1)
    if grid.size:
        with np.errstate(invalid="ignore", divide="ignore"):
            lx = np.log(b)
        out = np.interp(lx, grid, values)
        merr = np.where(np.isfinite(lx), np.where((lx < grid[0]) | (lx > grid[-1]), cap, out), 0.0)
    else:
        merr = np.zeros(len(b))
    with np.errstate(invalid="ignore"):
        zw = zr / sigma
    return b, per, flags, seg_t, seg, merr, zw


def inputs(seed, n=4000, channels=4):
    rng = np.random.default_rng(seed)
    b_true = np.exp(rng.uniform(np.log(300.0), np.log(200_000.0), n))
    f = b_true[:, None] * GAMMAS[None, :] * (1 + rng.normal(0, 2e-4, (n, 2)))
    kind = rng.integers(0, 8, n)
    f[kind == 1, 0] = np.nan
    f[kind == 2, 1] = 0.0
    f[kind == 3, :] = -5.0
    f[kind == 4, 1] *= 1.01                              # the isotopes disagree by 1 %
    f[kind == 5, :] = np.inf
    zr = rng.normal(0, 1e-3, (n, 2 * channels)) + rng.choice([0.0, 0.3], (n, 1))
    zr[rng.random((n, 2 * channels)) < 0.05] = np.nan
    zr[kind == 6, :] = np.nan
    return f, zr


@pytest.mark.parametrize("with_table", [True, False])
@pytest.mark.parametrize("seed", [1, 2])
def test_prepare_rows_equals_the_numpy_formulation(seed, with_table):
    f, zr = inputs(seed)
    n, m = zr.shape
    limits = np.array([1e-3, 1000.0, 50_000.0, 0.05, 0.05, 800.0, 80_000.0, 25.0])
    sigma = np.linspace(0.8e-3, 1.2e-3, m)
    starts = np.log(np.array([800.0, 2000.0, 9000.0, 30_000.0]))
    grid = np.linspace(np.log(250.0), np.log(150_000.0), 300) if with_table else np.zeros(0)
    values = np.abs(np.sin(grid)) * 3 if with_table else np.zeros(0)
    out = (np.empty(n), np.empty((n, 2)), np.empty(n, np.int64), np.empty(n), np.empty(n, np.int64), np.empty(n),
           np.empty((n, m)))
    assert prepare_core.prepare_rows(GAMMAS, limits, sigma, starts, grid, values, f, zr, *out) == n
    ref = reference(f, zr, limits, sigma, starts, grid, values)
    names = ("b", "per", "flags", "seg_t", "segment", "merr", "zw")
    for name, got, want in zip(names, out, ref):
        if got.dtype == np.int64:
            assert np.array_equal(got, want), name
        else:
            # Same operations in the same order; log may differ in the last bit between numpy's and the
            # compiler's implementation, and the RMS sums in another order (it only feeds a threshold).
            assert np.allclose(got, want, rtol=1e-14, atol=0, equal_nan=True), name
    # Every kind of row occurred (the test is not vacuous).
    flags = out[2]
    for flag in (F.BAD_INPUT, F.MAGNITUDE_DISAGREE, F.OUTSIDE_CALIBRATION, F.LOW_SIGNAL):
        assert np.any(flags & int(flag)), flag
    assert np.any(out[4] == -1) and np.any(out[4] == 3)
    if with_table:
        assert np.any(out[5] == 25.0) and np.any((out[5] > 0) & (out[5] < 25.0))


def test_low_signal_at_its_exact_threshold_decides_as_numpy():
    # numpy sums eight or more components pairwise (eight running sums, combined in pairs), not left to right;
    # on this row the two orders differ in the last bit exactly where the RMS meets the low-signal level.
    zr = np.array([[0.45681329643684543, 1.8474093048439182, -1.5972296272949795, 1.0248266106947637,
                    -0.2328555527723943, -0.09116747777088853, 0.19173487964230326, 0.012319205628171633]])
    f = np.array([[20000.0 * GAMMAS[0], 20000.0 * GAMMAS[1]]])
    limits = np.array([1e-3, 1000.0, 50_000.0, 0.05, 1.3530021097619511, 800.0, 80_000.0, 25.0])
    sigma, starts, empty = np.ones(8), np.log(np.array([800.0, 30_000.0])), np.zeros(0)
    out = (np.empty(1), np.empty((1, 2)), np.empty(1, np.int64), np.empty(1), np.empty(1, np.int64), np.empty(1),
           np.empty((1, 8)))
    prepare_core.prepare_rows(GAMMAS, limits, sigma, starts, empty, empty, f, zr, *out)
    want = reference(f, zr, limits, sigma, starts, empty, empty)[2]
    assert out[2][0] == want[0]
    assert want[0] & int(F.LOW_SIGNAL)          # the numpy order puts this row below the level
