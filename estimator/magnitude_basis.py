"""Smooth interpolation in field magnitude: cardinal cubic splines in log|B| through the knots."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline


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
        self._spline = None if k == 1 else CubicSpline(self._x, np.eye(k), bc_type="not-a-knot")

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
