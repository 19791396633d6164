"""The calibrated |B| of a block of tracked samples: the magnitude model at knots, interpolated between them.

The corrections (exchange pull, light shift, heading error) change with the slowly moving direction
and |B| only: the model is evaluated at every MAGNITUDE_STRIDE-th sample of a block and at its last
sample (the knots), and each sample's corrections are interpolated linearly over the finite knots;
the per-sample |B| keeps its own frequency. A stride changes a correction by far less than the
frequency noise at tracking rates. Blocks of at most 4 strides are evaluated sample by sample.

The knots are filled as the filter advances through a block, so a sample's |B| is final as soon as
the finite knots on either side of it are known: the replay writes a block's first estimates while
the filter works on the rest, and they equal, bit for bit, what evaluating the whole block at once
gives (np.interp's value at x depends only on the two knots around x).
"""

from __future__ import annotations

import math

import numpy as np

from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.magnitude import DISAGREE_SIGMAS

MAGNITUDE_STRIDE = 16     # samples between evaluations of the calibrated magnitude corrections
_SERIES = 6               # per knot: correction of isotope a, b (nT); fusion weight a, b; sigma_b; sigma_diff (nT)
_DISAGREE = int(EstimateFlag.MAGNITUDE_DISAGREE)
_NO_ROWS, _NO_SERIES = np.zeros(0, np.intp), np.zeros((0, _SERIES))     # a dense block's knots (never written)


def evaluated_per_sample(n: int) -> bool:
    """Return True when a block of n samples has the model evaluated at every sample (no knots)."""
    return n <= 4 * MAGNITUDE_STRIDE


class MagnitudeKnots:
    """The magnitude model's corrections at the knots of one block of n samples, filled as the filter advances."""

    def __init__(self, model, gammas_hz_per_nT: np.ndarray, n: int):
        self.model, self.gammas, self.n = model, gammas_hz_per_nT, n
        self.dense = evaluated_per_sample(n)
        if self.dense:                    # evaluated sample by sample: no knots (a live batch, every time)
            self.rows, self.series = _NO_ROWS, _NO_SERIES
        else:
            rows = np.arange(0, n, MAGNITUDE_STRIDE)
            self.rows = rows if rows[-1] == n - 1 else np.append(rows, n - 1)
            self.series = np.full((len(self.rows), _SERIES), math.nan)
        self.count = 0            # knots evaluated
        self.filtered = 0         # samples of the block the filter has finished

    def advance(self, filtered: int, f_hz: np.ndarray, u: np.ndarray, sigma_deg: np.ndarray) -> None:
        """Evaluate the knots among the first `filtered` samples: f_hz (n, 2) Hz, u (n, 3) sensor frame, sigma_deg
        (n,) of the whole block (rows past `filtered` are not read)."""
        self.filtered = filtered
        if self.dense:
            return
        new = int(np.searchsorted(self.rows, filtered))
        if new <= self.count:
            return
        r = self.rows[self.count:new]
        est = self.model.estimate(f_hz[r], u[r], np.radians(sigma_deg[r]))
        with np.errstate(invalid="ignore", divide="ignore"):
            m = f_hz[r] / self.gammas[None, :]
        s = self.series[self.count:new]
        s[:, 0:2] = m - est.b_per_isotope
        # A knot without |B| (no frequency of either isotope) has no fusion weights: its zeros would pull the
        # fused |B| of the samples up to a stride away from it toward 0 nT.
        s[:, 2:4] = np.where(np.isfinite(est.b_nT)[:, None], est.weights, np.nan)
        s[:, 4] = est.sigma_b_nT
        s[:, 5] = est.sigma_difference_nT
        self.count = new

    def final(self) -> int:
        """Return how many leading samples of the block have their |B| final (every series' next finite knot known)."""
        if self.dense or self.filtered >= self.n:
            return self.filtered
        finite = np.isfinite(self.series[:self.count])
        if not finite.any(axis=0).all():
            return 0
        last = self.count - 1 - np.argmax(finite[::-1], axis=0)       # each series' last finite knot
        return int(self.rows[last.min()]) + 1

    def apply(self, lo: int, f_hz: np.ndarray, u: np.ndarray, sigma_deg: np.ndarray, b_nT: np.ndarray,
              per_nT: np.ndarray, flags: np.ndarray, tolerance: float):
        """Return (|B| (N,) nT, per isotope (N, 2) nT, sigma_b (N,) nT, flags (N,)) of the block's samples lo..lo+N-1:
        their own |B| (f / gamma) corrected by the model where it gives one, MAGNITUDE_DISAGREE judged against the
        corrected isotopes' uncertainty (estimator/magnitude.py's rule), given f_hz (N, 2) Hz, u (N, 3) sensor frame
        and sigma_deg (N,) deg. New arrays; the arguments are left as they are."""
        b = np.array(b_nT, np.float64)
        per = np.array(per_nT, np.float64)
        flags = np.array(flags, np.int64)
        sigma_b = np.empty(b.shape[0])
        if self.dense:
            self.model.row_corrector()(np.ascontiguousarray(f_hz, np.float64), np.ascontiguousarray(u, np.float64),
                                       np.ascontiguousarray(sigma_deg, np.float64), tolerance, DISAGREE_SIGMAS,
                                       _DISAGREE, b, per, flags, sigma_b)
        else:
            from fieldvane.estimator import magnitude_core as core     # compiled: loaded only where |B| is corrected

            per_c, fused, sb, sd = self.corrected(lo, f_hz, u, sigma_deg)
            core.apply_corrections(per_c, fused, sb, sd, tolerance, DISAGREE_SIGMAS, _DISAGREE, b, per, flags, sigma_b)
        return b, per, sigma_b, flags

    def corrected(self, lo: int, f_hz: np.ndarray, u: np.ndarray, sigma_deg: np.ndarray):
        """Return (per isotope (N, 2) nT, fused |B| (N,) nT, sigma_b (N,) nT, sigma of the isotopes' difference (N,)
        nT) of the block's samples lo..lo+N-1, given their f_hz (N, 2) Hz, u (N, 3) and sigma_deg (N,), interpolated
        between the knots (a block with knots: apply() evaluates a dense one sample by sample)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            m = f_hz / self.gammas[None, :]
            m[~(m > 0)] = np.nan            # no frequency (0, negative, nan): no |B| from it, as estimate_rows
        idx = np.arange(lo, lo + f_hz.shape[0])
        count = self.count                # read once: advance() may add knots meanwhile (from another thread)
        rows, s = self.rows[:count], self.series[:count]
        per_c = np.column_stack([m[:, k] - _interp_finite(idx, rows, s[:, k]) for k in range(2)])
        w = np.column_stack([_interp_finite(idx, rows, s[:, 2 + k]) for k in range(2)])
        sigma_b = _interp_finite(idx, rows, s[:, 4])
        sigma_diff = _interp_finite(idx, rows, s[:, 5])
        both = np.isfinite(per_c).all(axis=1)
        fused = np.where(both, (w * np.where(np.isfinite(per_c), per_c, 0.0)).sum(axis=1),
                         np.where(np.isfinite(per_c[:, 0]), per_c[:, 0], per_c[:, 1]))
        return per_c, fused, np.ascontiguousarray(sigma_b), np.ascontiguousarray(sigma_diff)


def _interp_finite(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """Return fp (at positions xp) linearly interpolated at x, over its finite values only (nan if none)."""
    ok = np.isfinite(fp)
    if not ok.any():
        return np.full(x.shape, np.nan)
    return np.interp(x, xp[ok], fp[ok])
