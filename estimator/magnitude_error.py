"""How wrong the calibrated model is between and beyond the scanned magnitude levels.

The model interpolates each knot's coefficient table with cardinal cubic splines in ln|B|. At a
scanned level the scan verified it (its residual is in the calibrated noise); between levels
nothing did. The check:

1. Leave one level out: interpolate the other levels' tables at the left-out level (exactly what
   a refit without those rows gives for a stepped scan, whose rows sit at the knots) and measure
   the sphere-mean squared difference per channel, over the noise variance, less the part the
   tables' own estimation noise explains.
2. Treat the response's dependence on x = ln|B| as a Gaussian process whose variance follows the
   physics: envelopes 1/|B| (exchange leak, counter-rotating response), |B|^2 (nonlinear-Zeeman
   heading) and a constant, each times a squared-exponential correlation of length `ell` in x
   (Rasmussen and Williams, 'Gaussian Processes for Machine Learning', 2006, ch. 2 and 5.4.2 for
   choosing hyperparameters by leave-one-out). The amplitudes (non-negative least squares) and
   `ell` (grid) are fitted so that the predicted leave-one-out errors match the measured ones.
3. The expected squared error of the spline interpolant with weights w(x) under that prior,
   k(x,x) - 2 w.k(x,X) + w.K(X,X).w, is the model's error variance at any |B|: zero at the
   levels, growing between sparse levels and beyond the range (where the model is clamped).
   Beyond the range it is at least the clamping error the model's own slope at the end implies,
   (dZ/d ln|B|)^2 (distance beyond the end in ln|B|)^2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.magnitude_basis import MagnitudeBasis


def _nnls():
    """Return scipy.optimize.nnls, imported only when a calibration is fitted (not when one is read)."""
    from scipy.optimize import nnls

    return nnls

ENVELOPES = ("inverse", "square", "constant")   # 1/|B|, |B|^2, 1
LENGTH_GRID = np.geomspace(0.5, 8.0, 25)         # candidate correlation lengths in ln|B|
SCORE_FLOOR = 0.05                               # ratios below this are noise-level alike (log score)
SINGLE_LEVEL_TOLERANCE = 0.1                     # a one-level model holds within +-10 % (OUTSIDE_CALIBRATION)


@dataclass
class MagnitudeCheck:
    """Scanned magnitude levels, leave-one-level-out errors and the fitted error prior (see module docstring).

    levels_nT (L,) scanned levels (or the knots of a continuous scan, stepped False); level_rows (L,);
    lolo_ratio (L, C) measured leave-one-out error variance over noise variance at each level (-1
    where it cannot be measured); amplitudes (3, C) of the envelopes; length_scale in ln|B|; knots_nT
    (K,) of the model; reference_nT: the |B| the envelopes are normalized at; end_slope_ratio (2, C).
    """

    levels_nT: np.ndarray
    level_rows: np.ndarray
    stepped: bool
    knots_nT: np.ndarray
    lolo_ratio: np.ndarray
    amplitudes: np.ndarray
    length_scale: float
    reference_nT: float
    end_slope_ratio: np.ndarray      # (2, C): sphere-mean |dZ/d ln|B||^2 / noise variance at the lowest, highest knot

    @property
    def n_channels(self) -> int:
        """Return the number of channels C."""
        return int(self.amplitudes.shape[1])

    def ratio(self, b_nT) -> np.ndarray:
        """Return (N, C): expected model error variance at |B| = b_nT (nT) over the noise variance, sphere mean."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        out = np.zeros((b.size, self.n_channels))
        bad = ~(np.isfinite(b) & (b > 0))
        out[bad] = np.inf
        good = ~bad
        if not good.any():
            return out
        x = np.log(b[good])
        xs = np.log(self.knots_nT)
        if xs.size == 1:
            far = np.abs(x - xs[0]) > np.log1p(SINGLE_LEVEL_TOLERANCE)
            out[np.flatnonzero(good)[far]] = np.inf
            return out
        w = MagnitudeBasis(self.knots_nT)(b[good])
        v = interpolation_variance(x, xs, w, self.length_scale, np.log(self.reference_nT))   # (N, 3)
        r = np.maximum(v @ self.amplitudes, 0.0)
        below, above = np.maximum(xs[0] - x, 0.0), np.maximum(x - xs[-1], 0.0)
        clamp = below[:, None] ** 2 * self.end_slope_ratio[0] + above[:, None] ** 2 * self.end_slope_ratio[1]
        r = np.maximum(r, clamp)
        r[np.min(np.abs(x[:, None] - xs[None, :]), axis=1) < 1e-9] = 0.0   # at a level: verified (no round-off)
        if not self.stepped:
            lo, hi = np.log(self.levels_nT.min()), np.log(self.levels_nT.max())
            r[(x >= lo) & (x <= hi)] = 0.0        # a continuous scan verified every magnitude in its range
        out[good] = r
        return out


def envelope_values(x: np.ndarray, x_ref: float) -> np.ndarray:
    """Return the three variance envelopes' square roots (..., 3) at x = ln|B|: 1/|B|, |B|^2, 1 (relative to x_ref)."""
    d = np.asarray(x, float) - x_ref
    return np.stack([np.exp(-d), np.exp(2.0 * d), np.ones_like(d)], axis=-1)


def interpolation_variance(x: np.ndarray, xs: np.ndarray, w: np.ndarray, ell: float, x_ref: float) -> np.ndarray:
    """Return (M, 3): per envelope, the error variance of the interpolant with weights w (M, K) at nodes xs, points x.

    Unit-amplitude prior per envelope e: k(a, b) = e(a) e(b) exp(-(a - b)^2 / (2 ell^2)).
    """
    x = np.atleast_1d(np.asarray(x, float))
    ex, es = envelope_values(x, x_ref), envelope_values(xs, x_ref)     # (M, 3), (K, 3)
    rho_x = np.exp(-0.5 * (x[:, None] - xs[None, :]) ** 2 / ell ** 2)   # (M, K)
    rho_s = np.exp(-0.5 * (xs[:, None] - xs[None, :]) ** 2 / ell ** 2)  # (K, K)
    out = np.empty((x.size, 3))
    for r in range(3):
        kx = ex[:, r:r + 1] * es[None, :, r] * rho_x
        kk = es[:, r:r + 1] * es[None, :, r] * rho_s
        out[:, r] = ex[:, r] ** 2 - 2.0 * np.sum(w * kx, axis=1) + np.einsum("mi,ij,mj->m", w, kk, w)
    return np.maximum(out, 0.0)


def scan_levels(b_nT: np.ndarray, knots_nT: np.ndarray, gap: float = 0.05) -> tuple[np.ndarray, np.ndarray, bool]:
    """Return (levels nT, rows per level, stepped): the scan's distinct magnitude levels, or its knots if continuous.

    A scan is stepped when every row lies within `gap` (in ln|B|) of a knot.
    """
    lb, lk = np.log(b_nT), np.log(knots_nT)
    nearest = np.argmin(np.abs(lb[:, None] - lk[None, :]), axis=1)
    stepped = bool(np.all(np.abs(lb - lk[nearest]) <= gap))
    return np.asarray(knots_nT, float), np.bincount(nearest, minlength=lk.size), stepped


def leave_one_level_out(coef: np.ndarray, knots_nT: np.ndarray, noise_std: np.ndarray, level_rows: np.ndarray,
                        params_per_knot) -> np.ndarray:
    """Return (K, C): sphere-mean squared error of each knot's table predicted from the others, over noise variance.

    The expected contribution of estimation noise (params_per_knot, scalar or (K,), over the rows
    at each knot involved) is subtracted; the result is floored at 0.
    """
    params = np.broadcast_to(np.asarray(params_per_knot, float), knots_nT.shape)
    k_n = knots_nT.size
    out = np.zeros((k_n, coef.shape[0]))
    if k_n < 2:
        return out
    for k in range(k_n):
        others = [i for i in range(k_n) if i != k]
        w = MagnitudeBasis(knots_nT[others])(knots_nT[k:k + 1])[0]
        pred = np.einsum("i,cij->cj", w, coef[:, others, :])
        # Orthonormal harmonics: the sphere mean of |sum_j a_j Y_j|^2 is sum_j |a_j|^2 / (4 pi).
        err = np.sum(np.abs(coef[:, k, :] - pred) ** 2, axis=1) / (4.0 * np.pi) / (2.0 * noise_std ** 2)
        rows = np.maximum(level_rows.astype(float), 1.0)
        estimation = params[k] / rows[k] + np.sum(w ** 2 * params[others] / rows[others])
        out[k] = np.maximum(err - estimation, 0.0)
    return out


def fit_error_prior(lolo: np.ndarray, knots_nT: np.ndarray, x_ref: float) -> tuple[np.ndarray, float]:
    """Return (amplitudes (3, C), length scale) matching predicted to measured leave-one-out errors (K, C)."""
    k_n, c_n = lolo.shape
    xs = np.log(knots_nT)
    if k_n < 2:
        return np.zeros((3, c_n)), float(LENGTH_GRID[0])
    best = None
    for ell in LENGTH_GRID:
        v = np.empty((k_n, 3))
        for k in range(k_n):
            others = [i for i in range(k_n) if i != k]
            w = MagnitudeBasis(knots_nT[others])(knots_nT[k:k + 1])
            v[k] = interpolation_variance(xs[k:k + 1], xs[others], w, ell, x_ref)[0]
        amps = np.zeros((3, c_n))
        for c in range(c_n):
            weight = 1.0 / (lolo[:, c] + SCORE_FLOOR)       # relative fit: every level counts alike
            amps[:, c], _ = _nnls()(v * weight[:, None], lolo[:, c] * weight)
        pred = v @ amps
        score = float(np.sum(np.log((lolo + SCORE_FLOOR) / (pred + SCORE_FLOOR)) ** 2))
        # Ties go to the shorter length: it predicts larger errors between levels.
        if best is None or score < best[0] - 1e-9:
            best = (score, float(ell), amps)
    return best[2], best[1]


def check_magnitudes(coef: np.ndarray, knots_nT: np.ndarray, noise_std: np.ndarray, b_nT: np.ndarray,
                     params_per_knot) -> MagnitudeCheck:
    """Return the MagnitudeCheck of a model table coef (C, K, J) at knots_nT fitted to rows at b_nT (nT).

    params_per_knot (scalar or (K,)): fitted parameters per channel behind each knot's table.
    """
    knots_nT = np.asarray(knots_nT, float)
    levels, rows, stepped = scan_levels(b_nT, knots_nT)
    lolo = leave_one_level_out(coef, knots_nT, np.asarray(noise_std, float), rows, params_per_knot)
    x_ref = float(np.mean(np.log(knots_nT)))
    amps, ell = fit_error_prior(lolo, knots_nT, x_ref)
    reported = lolo.copy() if knots_nT.size >= 2 else np.full_like(lolo, -1.0)
    return MagnitudeCheck(levels, rows, stepped, knots_nT, reported, amps, ell, float(np.exp(x_ref)),
                          end_slopes(coef, knots_nT, np.asarray(noise_std, float)))


def end_slopes(coef: np.ndarray, knots_nT: np.ndarray, noise_std: np.ndarray) -> np.ndarray:
    """Return (2, C): sphere-mean |dZ/d ln|B||^2 over the noise variance at the lowest and highest knot."""
    basis = MagnitudeBasis(knots_nT)
    d = basis.derivative(knots_nT[[0, -1]])                            # (2, K)
    slope = np.einsum("ek,ckj->ecj", d, coef)                          # (2, C, J)
    return np.sum(np.abs(slope) ** 2, axis=2) / (4.0 * np.pi) / (2.0 * noise_std[None, :] ** 2)
