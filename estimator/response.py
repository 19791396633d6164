"""The calibrated response model h(u, |B|): complex lock-in output per channel, with analytic Jacobian."""

from __future__ import annotations

import numpy as np

from fieldvane.estimator.harmonics import harmonics, harmonics_and_gradient, n_harmonics
from fieldvane.estimator.magnitude_basis import MagnitudeBasis


class ResponseModel:
    """Z_c(u, |B|) = sum_i S_i(|B|) sum_j C[c, i, j] Y_j(u): real spherical harmonics times magnitude splines.

    u is the unit field direction in the sensor frame, |B| in nT, Z in lock-in volts (X + iY).
    `noise_std` is the calibrated white-noise standard deviation of X and of Y, per channel (V).
    """

    def __init__(self, channels, degree: int, knots_nT, coef: np.ndarray, noise_std):
        self.channels = tuple(channels)
        self.degree = int(degree)
        self.basis = MagnitudeBasis(knots_nT)
        self.coef = np.asarray(coef, complex)
        expected = (len(self.channels), self.basis.size, n_harmonics(self.degree))
        if self.coef.shape != expected:
            raise ValueError(f"coefficient table has shape {self.coef.shape}, expected {expected}")
        self.noise_std = np.broadcast_to(np.asarray(noise_std, float), (len(self.channels),)).copy()
        if np.any(~np.isfinite(self.noise_std)) or np.any(self.noise_std <= 0):
            raise ValueError("noise_std must be positive and finite for every channel")

    @property
    def n_channels(self) -> int:
        """Return the number of complex channels C."""
        return len(self.channels)

    def coefficients_at(self, b_nT: float) -> np.ndarray:
        """Return the harmonic coefficients (C, (L+1)^2) at one magnitude b_nT (nT)."""
        s = self.basis(b_nT)[0]
        return np.tensordot(self.coef, s, axes=([1], [0]))

    def _per_point(self, b_nT, n: int) -> np.ndarray:
        b = np.atleast_1d(np.asarray(b_nT, float))
        if b.size == 1:
            return np.broadcast_to(self.coefficients_at(float(b[0])), (n,) + self.coef[:, 0, :].shape)
        return np.einsum("nk,ckj->ncj", self.basis(b), self.coef)

    def h(self, u: np.ndarray, b_nT) -> np.ndarray:
        """Return Z (N, C) complex at unit directions u (N, 3) and magnitudes b_nT (scalar or (N,))."""
        u = np.atleast_2d(u)
        y = harmonics(self.degree, u)
        b = np.atleast_1d(np.asarray(b_nT, float))
        if b.size == 1:
            return y @ self.coefficients_at(float(b[0])).T
        return np.einsum("nj,ncj->nc", y, self._per_point(b, u.shape[0]))

    def h_and_jacobian(self, u: np.ndarray, b_nT) -> tuple[np.ndarray, np.ndarray]:
        """Return Z (N, C) and dZ/du (N, C, 3), the ambient gradient; project on the tangent plane."""
        u = np.atleast_2d(u)
        y, dy = harmonics_and_gradient(self.degree, u)
        b = np.atleast_1d(np.asarray(b_nT, float))
        if b.size == 1:
            cb = self.coefficients_at(float(b[0]))
            return y @ cb.T, np.einsum("njk,cj->nck", dy, cb)
        w = self._per_point(b, u.shape[0])
        return np.einsum("nj,ncj->nc", y, w), np.einsum("njk,ncj->nck", dy, w)

    def measurement_noise(self) -> np.ndarray:
        """Return the std of the real measurement vector [X_c, Y_c, ...] (2C,), V."""
        return np.repeat(self.noise_std, 2)


def to_real(z: np.ndarray) -> np.ndarray:
    """Return the real measurement vector [..., X_c, Y_c, ...] from complex Z (..., C) -> (..., 2C)."""
    z = np.asarray(z, complex)
    out = np.empty(z.shape[:-1] + (2 * z.shape[-1],))
    out[..., 0::2] = z.real
    out[..., 1::2] = z.imag
    return out
