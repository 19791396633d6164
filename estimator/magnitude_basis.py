"""Smooth interpolation in field magnitude: cardinal cubic splines in log|B| through the knots.

The splines are the not-a-knot cubic interpolants of the unit vectors (scipy.interpolate.CubicSpline with
bc_type="not-a-knot" is the reference in tests; it is not imported here because loading scipy.interpolate would
cost a large share of the start-up time of `run` and `replay`): for 2 knots the line, for 3 the parabola through
them, beyond that the C2 cubic whose third derivative is also continuous at the second and last-but-one knot.
"""

from __future__ import annotations

import numpy as np


class _NotAKnotSpline:
    """Piecewise cubic through (x_j, Y_j) for several columns of Y at once (x increasing)."""

    def __init__(self, x: np.ndarray, y: np.ndarray):
        n = x.size
        h = np.diff(x)
        if n == 2:
            slope = (y[1] - y[0]) / h[0]
            coef = np.stack([y[0], slope, np.zeros_like(slope), np.zeros_like(slope)])[None]
        elif n == 3:
            # the parabola through the three points, written on each of the two segments
            d1, d2 = (y[1] - y[0]) / h[0], (y[2] - y[1]) / h[1]
            c2 = (d2 - d1) / (h[0] + h[1])
            b0 = d1 - c2 * h[0]
            b1 = b0 + 2 * c2 * h[0]
            coef = np.stack([np.stack([y[0], b0, c2, np.zeros_like(c2)]), np.stack([y[1], b1, c2, np.zeros_like(c2)])])
        else:
            # Second derivatives m: the C2 conditions at the interior knots, not-a-knot at both ends.
            a = np.zeros((n, n))
            r = np.zeros((n,) + y.shape[1:])
            for i in range(1, n - 1):
                a[i, i - 1], a[i, i], a[i, i + 1] = h[i - 1], 2 * (h[i - 1] + h[i]), h[i]
                r[i] = 6 * ((y[i + 1] - y[i]) / h[i] - (y[i] - y[i - 1]) / h[i - 1])
            a[0, 0], a[0, 1], a[0, 2] = h[1], -(h[0] + h[1]), h[0]
            a[-1, -3], a[-1, -2], a[-1, -1] = h[-1], -(h[-2] + h[-1]), h[-2]
            m = np.linalg.solve(a, r)
            seg = []
            for i in range(n - 1):
                b = (y[i + 1] - y[i]) / h[i] - h[i] * (2 * m[i] + m[i + 1]) / 6
                seg.append(np.stack([y[i], b, m[i] / 2, (m[i + 1] - m[i]) / (6 * h[i])]))
            coef = np.stack(seg)
        self.x = x
        self.coef = coef          # (segments, 4, columns): value = c0 + c1 d + c2 d^2 + c3 d^3, d = x - x_i

    def __call__(self, xs: np.ndarray, nu: int = 0) -> np.ndarray:
        """Return the spline (nu = 0) or its first derivative (nu = 1) at xs (N,), extrapolating the end cubics."""
        i = np.clip(np.searchsorted(self.x, xs, side="right") - 1, 0, self.coef.shape[0] - 1)
        d = (xs - self.x[i])[:, None]
        c = self.coef[i]
        if nu == 0:
            return c[:, 0] + d * (c[:, 1] + d * (c[:, 2] + d * c[:, 3]))
        return c[:, 1] + d * (2 * c[:, 2] + 3 * d * c[:, 3])


class MagnitudeBasis:
    """Basis functions S_i(|B|) with S_i(knot_j) = delta_ij, smooth (C2) in log|B|, clamped outside."""

    def __init__(self, knots_nT):
        knots = np.asarray(sorted(float(k) for k in knots_nT))
        if knots.size == 0 or np.any(knots <= 0):
            raise ValueError("magnitude knots must be positive nT values")
        if knots.size > 1 and np.any(np.diff(np.log(knots)) < 1e-6):
            raise ValueError("magnitude knots must be distinct")
        self.knots_nT = knots
        self._x = np.log(knots)
        k = knots.size
        # Not-a-knot gives the interpolating polynomial for 2 and 3 knots, a C2 cubic beyond.
        self._spline = None if k == 1 else _NotAKnotSpline(self._x, np.eye(k))

    @property
    def size(self) -> int:
        """Return the number of basis functions (= number of knots)."""
        return int(self.knots_nT.size)

    @property
    def range_nT(self) -> tuple[float, float]:
        """Return the calibrated magnitude range (lowest, highest knot), nT."""
        return float(self.knots_nT[0]), float(self.knots_nT[-1])

    def __call__(self, b_nT) -> np.ndarray:
        """Return S (N, K) at magnitudes b_nT (N,), nT; clamped to the knot range."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        if self._spline is None:
            return np.ones((b.size, 1))
        x = np.clip(np.log(np.maximum(b, 1e-300)), self._x[0], self._x[-1])
        return self._spline(x)

    def derivative(self, b_nT) -> np.ndarray:
        """Return dS/d(ln|B|) (N, K) at magnitudes b_nT (N,), nT; the spline's own slope, not clamped (zeros for 1 knot)."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        if self._spline is None:
            return np.zeros((b.size, 1))
        return self._spline(np.log(np.maximum(b, 1e-300)), 1)

    def inside(self, b_nT, tolerance: float = 0.1) -> np.ndarray:
        """Return True where |B| lies within the knot range widened by a relative tolerance."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        lo, hi = self.range_nT
        return (b >= lo * (1 - tolerance)) & (b <= hi * (1 + tolerance))
