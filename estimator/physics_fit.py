"""Fit of the physics part (estimator/physics.py) by variable projection, with parameter covariance.

The per-knot coefficients (a, b, l, o of every channel) enter linearly: for given axes, pump
efficiencies and detunings they are one least-squares solve per channel. Only the nonlinear
parameters are iterated: two tangent-plane angles per beam, the pump efficiencies (2 x 2 complex),
the detuning law (2 x 2 pairs t_0, t_2) and its even shape (2 x 2). Levenberg-Marquardt on the projected residual with the Jacobian of
Kaufman (BIT 15, 1975; Golub and Pereyra, Inverse Problems 19, 2003), re-centred on the sphere
after every step. Its Gauss-Newton matrix is the Fisher information of the nonlinear parameters
with the linear ones eliminated, so its inverse scaled by the whitened residual is their covariance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.physics import (DETUNING_REFERENCE_NT, LEAK_POWERS, PhysicsParameters, channel_indices,
                                         detuning_from_law, leak_law)
from fieldvane.estimator.sphere import exp_map, tangent_basis
from fieldvane.estimator.tall import gram, rows_times


def _chi2():
    """Return scipy.stats.chi2, imported only when a calibration is fitted (not when one is read)."""
    from scipy.stats import chi2

    return chi2

N_LINEAR_TERMS = 4        # a (c), b (s), l (c'), o (1) per channel and knot; plus one m (s') per channel
LEAK_TEST_ALPHA = 1e-3    # significance level for keeping the s' leak term
JACKKNIFE_MIN_LEVELS = 3  # fewer levels give too few leave-one-out fits for a spread
JACKKNIFE_ALPHA = 0.01    # the level dispersion widens the covariance when significant at this level (chi-square)
PRIOR_STD = 1.0           # weak prior on efficiency and detuning parameters (dimensionless)
PINNED_STD = 1e-9         # a parameter the scan cannot separate from another is held at zero by this prior
DETUNING_TEST_ALPHA = 1e-3  # significance level for fitting the detuning (heading) terms
LINEAR_TEST_ALPHA = 1e-3  # significance level for the non-ideal linear terms (quadrature, leak, offset)
COST_TOLERANCE = 1e-3     # LM stops when the whitened chi-square falls by less than this
RANK_TOLERANCE = 1e-10    # relative size of a QR diagonal below which the design is rank-deficient
RANK_MESSAGE = ("the scan cannot separate the channel terms (rank-deficient design); "
                "it needs more directions at every magnitude")


class PhysicsFitError(ValueError):
    """The scan cannot determine the physics part (rank-deficient design)."""


@dataclass
class PhysicsFit:
    """Result of fit_physics: parameters, covariance of the nonlinear ones, whitened residual (N, C)."""

    params: PhysicsParameters
    covariance: np.ndarray        # (n_theta, n_theta): beams' tangent angles (rad), efficiencies, detunings
    beam_frames: list             # per beam (e1, e2): the tangent basis of the covariance's angles
    residual: np.ndarray          # (N, C) complex, V
    noise_std: np.ndarray         # (C,) per-component residual std used for whitening, V
    iterations: int
    inflation: float              # covariance factor for correlated residuals (AR(1), >= 1)
    dispersion: np.ndarray | None = None  # (n_beams,) leave-one-level-out dispersion, about 1 if the model holds
    terms: dict | None = None             # which optional terms were fitted: efficiency, detuning, leak_terms

    def covariance_std_deg(self) -> np.ndarray:
        """Return each beam's 1-sigma angle from the fit's covariance alone, degrees (pumps, probes)."""
        n_beams = 2 + self.params.probe_axes.shape[0]
        return np.array([np.degrees(np.sqrt(max(np.trace(self.beam_covariance(b)), 0.0)))
                         for b in range(n_beams)])

    def misfit_beams(self) -> np.ndarray:
        """Return True per beam whose leave-one-level-out dispersion is significant (chi-square at JACKKNIFE_ALPHA).

        Under a correct model 2 K times the dispersion is about chi-square with 2K degrees of
        freedom (scipy.stats.chi2 gives the limit; the levels' shifts are treated as independent).
        """
        if self.dispersion is None:
            return np.zeros(2 + self.params.probe_axes.shape[0], bool)
        dof = 2 * self.params.n_knots
        return self.dispersion > _chi2().isf(JACKKNIFE_ALPHA, dof) / dof

    def beam_covariance(self, beam: int) -> np.ndarray:
        """Return the 2x2 covariance (rad^2) of beam `beam` (pumps a, b, then probes) on beam_frames[beam]."""
        return self.covariance[2 * beam:2 * beam + 2, 2 * beam:2 * beam + 2]

    def direction_std_deg(self) -> np.ndarray:
        """Return each beam's 1-sigma axis angle sqrt(trace of its 2x2 covariance), degrees (pumps, probes).

        The covariance is the fit's, widened by the leave-one-level-out dispersion where that is
        significant (misfit_beams): the axis then moves with the scanned magnitudes more than the
        noise explains, a sign the physics model misses something that changes with |B|.
        """
        std = self.covariance_std_deg()
        if self.dispersion is None:
            return std
        return np.where(self.misfit_beams(), std * np.sqrt(np.maximum(self.dispersion, 1.0)), std)

    def parameter_std(self) -> np.ndarray:
        """Return the 1-sigma of every nonlinear parameter (n_theta,), in their own units."""
        return np.sqrt(np.maximum(np.diag(self.covariance), 0.0))


class _DenseLinear:
    """Least squares on one channel's full design (N, m): QR, coefficients and the residual projector."""

    def __init__(self, design: np.ndarray):
        self.q, r = np.linalg.qr(design)
        diag = np.abs(np.diag(r))
        if diag.min() <= RANK_TOLERANCE * max(diag.max(), 1e-300):
            raise PhysicsFitError(RANK_MESSAGE)
        self.r = r

    def coefficients(self, y: np.ndarray) -> np.ndarray:
        """Return the least-squares coefficients of y (N,) on the design's columns."""
        return np.linalg.solve(self.r, gram(self.q, y))

    def project(self, d: np.ndarray) -> np.ndarray:
        """Return d (N,) or (N, p) minus its least-squares fit: the part orthogonal to the design."""
        return d - rows_times(self.q, gram(self.q, d))


class _BlockLinear:
    """The same for a stepped scan: one (n_k, m) block per magnitude level plus a few global columns.

    Small per-level factorizations keep every product small (and single-threaded in BLAS), and
    cost K times less than one factorization of the whole (N, mK) design. The first n_keep columns
    of every block are the terms whose coefficients are returned; further ones are only projected
    out.
    """

    def __init__(self, blocks: list, terms: np.ndarray, columns: np.ndarray | None, n_keep: int = 4):
        self.blocks = blocks
        self.n_keep = n_keep
        self.factors = []
        for idx in blocks:
            q, r = np.linalg.qr(terms[idx])
            diag = np.abs(np.diag(r))
            if diag.min() <= RANK_TOLERANCE * max(diag.max(), 1e-300):
                raise PhysicsFitError(RANK_MESSAGE)
            self.factors.append((q, r))
        self.columns = None if columns is None or columns.shape[1] == 0 else columns.astype(complex)
        if self.columns is not None:
            g = self._project_blocks(self.columns)
            q_g, r_g = np.linalg.qr(g)
            diag = np.abs(np.diag(r_g))
            if diag.min() <= RANK_TOLERANCE * max(float(np.abs(self.columns).max()), 1e-300):
                raise PhysicsFitError(RANK_MESSAGE)
            self.q_g, self.r_g = q_g, r_g

    def _project_blocks(self, d: np.ndarray) -> np.ndarray:
        out = np.array(d, dtype=complex, copy=True)
        for idx, (q, _) in zip(self.blocks, self.factors):
            out[idx] -= rows_times(q, gram(q, out[idx]))
        return out

    def coefficients(self, y: np.ndarray) -> np.ndarray:
        """Return the coefficients: each kept block column over the knots in turn, then the global columns."""
        k, m = len(self.blocks), self.n_keep
        n_g = 0 if self.columns is None else self.columns.shape[1]
        out = np.zeros(m * k + n_g, complex)
        rest = y
        if n_g:
            x_g = np.linalg.solve(self.r_g, gram(self.q_g, y))
            out[m * k:] = x_g
            rest = y - self.columns @ x_g
        for i, (idx, (q, r)) in enumerate(zip(self.blocks, self.factors)):
            out[i:m * k:k] = np.linalg.solve(r, gram(q, rest[idx]))[:m]
        return out

    def project(self, d: np.ndarray) -> np.ndarray:
        """Return d (N,) or (N, p) minus its least-squares fit on the blocks and the global columns."""
        out = self._project_blocks(d)
        if self.columns is not None:
            out -= rows_times(self.q_g, gram(self.q_g, out))
        return out


def _level_blocks(s_basis: np.ndarray) -> list | None:
    """Return each knot's row indices when every row sits exactly at a knot (a stepped scan), else None."""
    own = np.argmax(s_basis, axis=1)
    one_hot = np.zeros_like(s_basis)
    one_hot[np.arange(s_basis.shape[0]), own] = 1.0
    if not np.allclose(s_basis, one_hot, atol=1e-9):
        return None
    return [np.flatnonzero(own == k) for k in range(s_basis.shape[1])]


class _Problem:
    """Data and fixed structure of one fit: directions, magnitude weights, values, channel layout."""

    def __init__(self, u, s_basis, z, channels, weights, fit_efficiency, fit_detuning, knots_nT, leak_terms: int,
                 full_linear: bool = True):
        self.u, self.s, self.z = u, s_basis, z
        self.full_linear = bool(full_linear)   # False: the ideal channel a (c - i sigma s) only, per knot
        self.leak_terms = int(leak_terms)   # how many of the s' leak law's powers are fitted (0, 1 or 2)
        self.knots_nT = np.asarray(knots_nT, float)
        self.law = s_basis @ leak_law(self.knots_nT).T                 # (N, powers): (B_1/B)^p, like the table
        self.blocks = _level_blocks(s_basis)
        self.own_knot = np.argmax(s_basis, axis=1)
        self.channels = tuple(channels)
        self.pj, self.qi = channel_indices(self.channels)
        self.n_probes = int(self.qi.max()) + 1
        self.k = s_basis.shape[1]
        self.w = np.asarray(weights, float)         # (C,) 1/std
        self.fit_efficiency, self.fit_detuning = fit_efficiency, fit_detuning
        self.n_beams = 2 + self.n_probes
        self.n_theta = 2 * self.n_beams + (8 if fit_efficiency else 0) + (16 if fit_detuning else 0)
        self.law_powers = np.stack([np.ones(self.k), (self.knots_nT / DETUNING_REFERENCE_NT) ** 2])   # (2, K)
        # A weak prior (std PRIOR_STD) on the dimensionless efficiency and detuning parameters keeps them
        # bounded where the scan cannot see them (a detuning shape when there is no detuning); it is
        # negligible wherever the data determine them. With knots spanning less than a factor 1.5 the
        # detuning law's |B|^2 term cannot be told from its constant one: it is held at zero.
        self.prior = np.zeros(self.n_theta)
        self.prior[2 * self.n_beams:] = 1.0 / PRIOR_STD
        if fit_detuning and not (self.k >= 2 and self.knots_nT.max() >= 1.5 * self.knots_nT.min()):
            start = 2 * self.n_beams + (8 if fit_efficiency else 0)
            self.prior[start + 1:start + 8:2] = 1.0 / PINNED_STD

    def solve(self, phys: PhysicsParameters):
        """Solve the linear coefficients in place; return ((geo, eta, R), solver per channel, residual (N,C))."""
        geo = phys.geometry(self.u)
        eta = phys.efficiency_factor(geo["pu"])
        rot = phys.resonance_factor(geo["pu"])
        k, n = self.k, self.u.shape[0]
        solvers, resid = [], np.empty_like(self.z)
        for c in range(len(self.channels)):
            columns = (eta[:, c] * geo["s_leak"][:, c])[:, None] * self.law[:, :self.leak_terms]
            ideal = geo["c"][:, c] - 1j * phys.handedness[c] * geo["s"][:, c]
            n_keep = 4 if self.full_linear else 1
            if self.blocks is not None:
                r_own = rot[np.arange(n), c, self.own_knot]
                if self.full_linear:
                    terms = eta[:, c, None] * np.column_stack([r_own * geo["c"][:, c], r_own * geo["s"][:, c],
                                                               geo["c_leak"][:, c], np.ones(n)])
                else:
                    terms = (eta[:, c] * r_own * ideal)[:, None]
                lin = _BlockLinear(self.blocks, terms, columns, n_keep)
            else:
                se = self.s * eta[:, c, None]                                   # (N, K)
                if self.full_linear:
                    cols = [se * rot[:, c, :] * geo["c"][:, c, None], se * rot[:, c, :] * geo["s"][:, c, None],
                            se * geo["c_leak"][:, c, None], se.astype(complex)]
                else:
                    cols = [se * rot[:, c, :] * ideal[:, None]]
                cols.append(columns.astype(complex))
                lin = _DenseLinear(np.concatenate(cols, axis=1))
            coef = lin.coefficients(self.z[:, c])
            if self.full_linear:
                phys.gains[c], phys.quadrature[c] = coef[:k], coef[k:2 * k]
                phys.leak[c], phys.offset[c] = coef[2 * k:3 * k], coef[3 * k:4 * k]
            else:
                phys.gains[c] = coef[:k]
                phys.quadrature[c] = -1j * phys.handedness[c] * coef[:k]
                phys.leak[c], phys.offset[c] = 0.0, 0.0
            phys.leak_quadrature[c] = 0.0
            phys.leak_quadrature[c, :self.leak_terms] = coef[n_keep * k:n_keep * k + self.leak_terms]
            resid[:, c] = lin.project(self.z[:, c])
            solvers.append(lin)
        return (geo, eta, rot), solvers, resid

    def values(self, phys: PhysicsParameters) -> np.ndarray:
        """Return the current nonlinear parameters (n_theta,) with zeros for the beams (they are re-centred)."""
        out = np.zeros(self.n_theta)
        col = 2 * self.n_beams
        if self.fit_efficiency:
            out[col:col + 8] = np.stack([phys.efficiency.real, phys.efficiency.imag], axis=-1).ravel()
            col += 8
        if self.fit_detuning:
            out[col:col + 8] = phys.detuning_law.ravel()
            out[col + 8:col + 16] = phys.detuning_shape.ravel()
        return out

    def cost(self, resid, phys: PhysicsParameters) -> float:
        """Return the whitened sum of squares plus the prior's."""
        return float(np.sum(np.abs(resid * self.w) ** 2) + np.sum((self.values(phys) * self.prior) ** 2))

    def at_rows(self, v: np.ndarray) -> np.ndarray:
        """Return a per-knot array (..., K) as seen by each row: (N, ..., 1) at the row's own knot for a
        stepped scan (whose rows sit at knots), else (1, ..., K) for the magnitude-weight sum."""
        if self.blocks is None:
            return v[None]
        return np.moveaxis(v[..., self.own_knot], -1, 0)[..., None]

    def rows_knots(self, a: np.ndarray) -> np.ndarray:
        """Return a row array (N, ..., K) reduced to the row's own knot (N, ..., 1) for a stepped scan."""
        if self.blocks is None:
            return a
        n = a.shape[0]
        return np.take_along_axis(a, self.own_knot.reshape((n,) + (1,) * (a.ndim - 1)), axis=-1)

    def jacobian(self, phys: PhysicsParameters, terms, qs, frames) -> np.ndarray:
        """Return the whitened projected Jacobian (2*N*C, n_theta) of the residual (Kaufman's form)."""
        geo, eta, rot = terms
        n, c_n = self.u.shape[0], len(self.channels)
        u = self.u
        s = np.ones((n, 1, 1)) if self.blocks is not None else self.s[:, None, :]      # (N, 1, Ke)
        pj, qi = self.pj, self.qi
        pu, qu = geo["pu"], geo["qu"]
        rot = self.rows_knots(rot)                                                      # (N, C, Ke)
        x = self.rows_knots(phys.detuning_terms(pu))[:, pj, :]
        hand = phys.handedness[None, :, None]
        gains, quad, leak = self.at_rows(phys.gains), self.at_rows(phys.quadrature), self.at_rows(phys.leak)
        sleak = self.at_rows(phys.s_leak_per_knot())
        own = gains * geo["c"][:, :, None] + quad * geo["s"][:, :, None]
        inner = (rot * own + leak * geo["c_leak"][:, :, None] + sleak * geo["s_leak"][:, :, None]
                 + self.at_rows(phys.offset))
        drdx = -1j * hand / (1.0 + 1j * hand * x) ** 2                       # dR/dx (N, C, Ke)
        longi = phys.longitudinal(pu)                                         # (N, 2 [j], 2 [m])
        dlong_dpu = phys.longitudinal_gradient(pu)                            # (N, 2 [j], 2 [m], 2 [n])
        t_rows = self.at_rows(phys.detuning)                                  # (N or 1, 2, 2, Ke)
        t_all = np.broadcast_to(t_rows, (n,) + t_rows.shape[1:])              # (N, 2 [j], 2 [m], Ke)
        ee = eta[:, :, None]
        p_own, p_oth, q_all = phys.pump_axes[pj], phys.pump_axes[1 - pj], phys.probe_axes[qi]
        d = np.zeros((n, c_n, self.n_theta), complex)                        # d(prediction)/d(theta)
        col = 0
        for beam in range(self.n_beams):
            for e in frames[beam]:
                ue = u @ e
                if beam < 2:                                  # pump `beam` turns along e
                    m = beam
                    dx_pump = np.einsum("njq,njqk->njk", dlong_dpu[:, :, :, m] * ue[:, None, None], t_all)
                    dr = drdx * dx_pump[:, pj, :]
                    d_eta = 2.0 * phys.efficiency[pj, m][None, :] * (pu[:, m] * ue)[:, None]      # (N, C)
                    dcq = e @ q_all.T - ue[:, None] * qu[:, qi]                                    # dc or dc'
                    dsq = u @ np.cross(e, q_all).T
                    mine = (pj == m)[None, :, None]
                    d_inner = dr * own + np.where(mine, rot * (gains * dcq[:, :, None] + quad * dsq[:, :, None]),
                                                  leak * dcq[:, :, None] + sleak * dsq[:, :, None])
                    term = ee * d_inner + d_eta[:, :, None] * inner
                else:                                         # a probe turns along e
                    dc = e @ p_own.T - pu[:, pj] * ue[:, None]
                    ds = u @ np.cross(p_own, e).T
                    dcx = e @ p_oth.T - pu[:, 1 - pj] * ue[:, None]
                    dsx = u @ np.cross(p_oth, e).T
                    term = ee * (rot * (gains * dc[:, :, None] + quad * ds[:, :, None])
                                 + leak * dcx[:, :, None] + sleak * dsx[:, :, None])
                    term = term * (qi == beam - 2)[None, :, None]
                d[:, :, col] = np.sum(s * term, axis=2)
                col += 1
        if self.fit_efficiency:
            base = np.sum(s * inner, axis=2)                                  # (N, C)
            for j in range(2):
                for m in range(2):
                    for part in (1.0, 1j):                  # real and imaginary part of e[j, m]
                        d[:, :, col] = part * (pu[:, m] ** 2)[:, None] * base * (pj == j)[None, :]
                        col += 1
        if self.fit_detuning:
            lead = ee * drdx * own                                            # (N, C, Ke)
            law = self.at_rows(self.law_powers)                               # (N or 1, 2, Ke)
            law = np.broadcast_to(law, (n,) + law.shape[1:])
            for j in range(2):
                for m in range(2):
                    for r in range(2):
                        v = lead * longi[:, pj, m][:, :, None] * law[:, r, None, :]
                        d[:, :, col] = np.sum(s * v, axis=2) * (pj == j)[None, :]
                        col += 1
            # The paths' even shapes detuning_shape[j, m, n], in that (row-major) order.
            for j in range(2):
                for m in range(2):
                    for nn in range(2):
                        dx = (pu[:, m] * pu[:, nn] ** 2)[:, None, None] * t_all[:, pj, m, :]
                        d[:, :, col] = np.sum(s * lead * dx, axis=2) * (pj == j)[None, :]
                        col += 1
        jac = np.empty((2, n, c_n, self.n_theta))
        for ch in range(c_n):
            proj = qs[ch].project(d[:, ch, :])
            proj *= -self.w[ch]
            jac[0, :, ch], jac[1, :, ch] = proj.real, proj.imag
        return jac.reshape(-1, self.n_theta)

    def residual_vector(self, resid, phys: PhysicsParameters | None = None) -> np.ndarray:
        """Return the whitened real residual (2*N*C,), followed by the prior's (n_theta,) when phys is given."""
        w = resid * self.w
        out = np.stack([w.real, w.imag]).reshape(-1)
        if phys is None:
            return out
        return np.concatenate([out, self.values(phys) * self.prior])

    def full_jacobian(self, phys: PhysicsParameters, terms, qs, frames) -> np.ndarray:
        """Return the Jacobian with the prior's rows appended ((2*N*C + n_theta), n_theta)."""
        return np.vstack([self.jacobian(phys, terms, qs, frames), np.diag(self.prior)])

    def step(self, phys: PhysicsParameters, frames, delta) -> PhysicsParameters:
        """Return new parameters moved by delta (n_theta,): beams along their tangent frames, the rest added."""
        out = PhysicsParameters(phys.pump_axes.copy(), phys.probe_axes.copy(), phys.gains.copy(),
                                phys.handedness.copy(), phys.channels, phys.quadrature.copy(),
                                phys.leak.copy(), phys.offset.copy(), phys.efficiency.copy(),
                                phys.detuning.copy(), phys.leak_quadrature.copy(), phys.knots_nT.copy(),
                                phys.detuning_law.copy(), phys.detuning_shape.copy())
        for beam in range(self.n_beams):
            e1, e2 = frames[beam]
            v = delta[2 * beam] * e1 + delta[2 * beam + 1] * e2
            if beam < 2:
                out.pump_axes[beam] = exp_map(out.pump_axes[beam], v)
            else:
                out.probe_axes[beam - 2] = exp_map(out.probe_axes[beam - 2], v)
        col = 2 * self.n_beams
        if self.fit_efficiency:
            step = delta[col:col + 8].reshape(2, 2, 2)
            out.efficiency = out.efficiency + step[..., 0] + 1j * step[..., 1]
            col += 8
        if self.fit_detuning:
            out.detuning_law = out.detuning_law + delta[col:col + 8].reshape(2, 2, 2)
            out.detuning = detuning_from_law(out.detuning_law, self.knots_nT)
            out.detuning_shape = out.detuning_shape + delta[col + 8:col + 16].reshape(2, 2, 2)
        return out

    def frames(self, phys: PhysicsParameters) -> list:
        """Return the tangent basis (e1, e2) at every beam axis: pumps, then probes."""
        beams = list(phys.pump_axes) + list(phys.probe_axes)
        return [tangent_basis(b) for b in beams]


def _handedness_from(phys: PhysicsParameters) -> np.ndarray:
    """Return sigma per channel from the fitted a and b: b ~ -i sigma a, so sigma = -sign Im(b conj(a))."""
    im = np.imag(np.sum(phys.quadrature * np.conj(phys.gains), axis=1))
    return np.where(im > 0, -1.0, 1.0)


def _correlation_inflation(resid_w: np.ndarray, points: np.ndarray | None) -> float:
    """Return the covariance factor (>= 1) for correlated rows: the design effect of scan points, else the lag-1 law.

    Rows of one scan point share their regressors, so a least-squares estimate's variance grows by
    sum over points of (sum of the point's whitened residuals)^2 over their sum of squares: the
    design effect of cluster sampling (L. Kish, 'Survey Sampling', 1965; it is 1 + (m - 1) rho for
    m rows of equal correlation rho), measured here from the residuals themselves.
    """
    if points is None or points.size != resid_w.shape[0] or points.size == 0 or points[-1] + 1 == points.size:
        return _lag1_inflation(resid_w)
    a = np.concatenate([resid_w.real, resid_w.imag], axis=1)
    sums = np.zeros((int(points[-1]) + 1, a.shape[1]))
    np.add.at(sums, points, a)
    den = float(np.sum(a * a))
    return max(float(np.sum(sums * sums)) / den, 1.0) if den > 0 else 1.0


def _lag1_inflation(resid_w: np.ndarray) -> float:
    """Return (1 + rho) / (1 - rho) for the lag-1 correlation rho of whitened residuals in row order, >= 1.

    An AR(1) sequence's mean has variance (1 + rho) / (1 - rho) times that of white noise (common
    practice for effective sample size): repeated rows of a dwelling scan and a lock-in's output
    filter correlate neighbouring rows.
    """
    a = np.concatenate([resid_w.real, resid_w.imag], axis=1)
    if a.shape[0] < 3:
        return 1.0
    num = np.sum(a[1:] * a[:-1])
    den = np.sum(a * a)
    rho = float(num / den) if den > 0 else 0.0
    # Below 3 standard errors of zero the correlation is indistinguishable from white noise.
    if rho < 3.0 / np.sqrt(a.size):
        return 1.0
    rho = min(rho, 0.95)
    return (1.0 + rho) / (1.0 - rho)


def fit_physics(u: np.ndarray, s_basis: np.ndarray, knots_nT: np.ndarray, z: np.ndarray, channels,
                pump0: np.ndarray, probe0: np.ndarray, noise_std: np.ndarray, fit_efficiency: bool = True,
                fit_detuning: bool = True, max_iterations: int = 60, points: np.ndarray | None = None) -> PhysicsFit:
    """Return the PhysicsFit of rows u (N,3), magnitude weights s_basis (N,K) at knots_nT (K,), values z (N,C) V.

    points (N,) int: the scan point of each row (estimator/folds.scan_points); rows recorded at one
    coil setting are correlated through a lock-in, and the covariance is inflated by their design
    effect (without points, or with one row per point, by the lag-1 correlation in row order).

    pump0 (2,3), probe0 (P,3): starting axes (within a few degrees); noise_std (C,): starting
    whitening std per channel, V (re-estimated from the residual before the final pass). The s'
    leak law is fitted only when the knots span a factor of at least 2 in |B| (else it cannot be
    told from a pump-axis turn) and its first term lowers the whitened residual by more than the
    chi-square quantile at LEAK_TEST_ALPHA (2C degrees of freedom, scipy.stats.chi2).
    """
    c_n, k = z.shape[1], s_basis.shape[1]
    knots_nT = np.asarray(knots_nT, float)
    phys = PhysicsParameters(np.array(pump0, float), np.array(probe0, float), np.zeros((c_n, k), complex),
                             np.ones(c_n), channels, np.zeros((c_n, k), complex), knots_nT=knots_nT)
    weights = 1.0 / np.asarray(noise_std, float)
    prob = _Problem(u, s_basis, z, channels, weights, fit_efficiency, False, knots_nT, 0)
    prob.solve(phys)
    phys.handedness = _handedness_from(phys)
    phys, iterations = _fit_reweighted(prob, phys, max_iterations)
    full_linear = True

    def make(detuning: bool, leak_terms: int) -> _Problem:
        return _Problem(u, s_basis, z, channels, prob.w, fit_efficiency, detuning, knots_nT, leak_terms,
                        full_linear=full_linear)

    def better(current, phys_now, other, start, dof, alpha):
        """Return (problem, parameters, iterations): `other` fitted from `start` if it is significantly better."""
        trial, it = _levenberg_marquardt(other, start, max_iterations)
        gain = current.cost(current.solve(phys_now)[2], phys_now) - other.cost(other.solve(trial)[2], trial)
        return (other, trial, it) if gain > _chi2().isf(alpha, dof) else (current, phys_now, it)

    # The non-ideal linear terms (free quadrature b, leak l, offset o at every knot) only when they
    # lower the residual significantly: a sensor without them would only gain noise from 6 more
    # real parameters per channel and knot.
    ideal = _Problem(u, s_basis, z, channels, prob.w, fit_efficiency, False, knots_nT, 0, full_linear=False)
    trial, it = _levenberg_marquardt(ideal, _same(phys, ideal), max_iterations)
    iterations += it
    gain = ideal.cost(ideal.solve(trial)[2], trial) - prob.cost(prob.solve(phys)[2], phys)
    if gain <= _chi2().isf(LINEAR_TEST_ALPHA, 6 * k * c_n):
        prob, phys, full_linear = ideal, trial, False
    # The detuning (heading) terms only where they lower the residual significantly: at low fields
    # there is no heading shift to see, and 16 idle parameters would only add noise to the model.
    if fit_detuning:
        det = make(True, 0)
        free = 16 - int(np.sum(det.prior >= 1.0 / PINNED_STD / 2))
        prob, phys, it = better(prob, phys, det, _same(phys, det), free, DETUNING_TEST_ALPHA)
        iterations += it
        if prob is det:
            # The whitening was measured while the heading shift was still in the residual: measured
            # again, or the leak test below judges against that inflated level and misses a real leak.
            phys, it = _fit_reweighted(prob, phys, max_iterations, rounds=1)
            iterations += it
    # The s' leak law: tried when the knots span a factor 2 in |B| (its first term, 1/B, must not look
    # like a constant, i.e. a pump-axis turn) and kept when it lowers the residual significantly; then
    # its second term (1/B^2) too wherever the knots span a factor 4 and hold 3 levels. The second
    # term is not tested on its own: a weak term left out still pulls the pump axes.
    eligible = sum(1 for t in range(1, len(LEAK_POWERS) + 1)
                   if k >= t + 1 and knots_nT.max() >= 2.0 ** t * knots_nT.min())
    if eligible:
        one = make(prob.fit_detuning, 1)
        prob, phys, it = better(prob, phys, one, _same(phys, one), 2 * c_n, LEAK_TEST_ALPHA)
        iterations += it
        if prob is one and eligible >= 2:
            prob = make(prob.fit_detuning, eligible)
            phys, it = _levenberg_marquardt(prob, _same(phys, prob), max_iterations)
            iterations += it
    phys, it = _fit_reweighted(prob, phys, max_iterations, rounds=1)
    iterations += it
    terms, qs, resid = prob.solve(phys)
    frames = prob.frames(phys)
    jac = prob.jacobian(phys, terms, qs, frames)
    cov = _inverse_psd(gram(jac) + np.diag(prob.prior ** 2))
    inflation = _correlation_inflation(resid * prob.w, points)
    jack = _level_jackknife(prob, jac, resid) if prob.blocks is not None and k >= JACKKNIFE_MIN_LEVELS else None
    if jack is not None:
        jack = jack / inflation     # the levels' shifts carry the same correlation as every other estimate
    terms_used = {"efficiency": prob.fit_efficiency, "detuning": prob.fit_detuning, "leak_terms": prob.leak_terms,
                  "full_linear": prob.full_linear}
    return PhysicsFit(phys, cov * inflation, frames, resid, 1.0 / prob.w, iterations, inflation, jack, terms_used)


def _level_jackknife(prob: _Problem, jac: np.ndarray, resid: np.ndarray) -> np.ndarray | None:
    """Return per beam the dispersion of its leave-one-level-out shifts (n_beams,): about 1 when the model holds.

    Each magnitude level is left out in turn: the fit without it is one Gauss-Newton step from
    the full solution, d_k = -(A - A_k)^-1 J_k^T r_k, with A = J^T J (prior included) and A_k, J_k
    that level's rows (the one-step jackknife; for a stepped scan the level's own linear terms
    leave with it). Under a correct model d_k has covariance (A - A_k)^-1 - A^-1, so for each beam
    d_k^T [that covariance]^-1 d_k is chi-square with 2 degrees of freedom; their mean over the
    levels, halved, is the dispersion. Levels of any size count alike (the cross-validation view
    of the delete-a-group jackknife: Efron and Stein, Ann. Stat. 9, 1981).
    """
    k_n, n, c_n = prob.k, prob.u.shape[0], len(prob.channels)
    rows = jac.reshape(2, n, c_n, -1)
    r = prob.residual_vector(resid).reshape(2, n, c_n)
    total = gram(jac) + np.diag(prob.prior ** 2)
    cov = _inverse_psd(total)
    stats = np.zeros((k_n, prob.n_beams))
    for k, idx in enumerate(prob.blocks):
        j_k = rows[:, idx].reshape(-1, prob.n_theta)
        a_k = gram(j_k)
        sub = _inverse_psd(total - a_k)
        d = -sub @ gram(j_k, r[:, idx].reshape(-1))
        spread = sub - cov
        for b in range(prob.n_beams):
            sl = slice(2 * b, 2 * b + 2)
            stats[k, b] = d[sl] @ np.linalg.pinv(spread[sl, sl], rcond=1e-10, hermitian=True) @ d[sl]
    return stats.mean(axis=0) / 2.0


def _same(phys: PhysicsParameters, prob: _Problem) -> PhysicsParameters:
    """Return a copy of phys (for a start in another problem)."""
    out = prob.step(phys, prob.frames(phys), np.zeros(prob.n_theta))
    out.handedness = phys.handedness
    return out


def _fit_reweighted(prob: _Problem, phys: PhysicsParameters, max_iterations: int, rounds: int = 2):
    """Return (parameters, iterations): LM, then whitening from the residual, `rounds` times (weights set in prob)."""
    c_n, k = prob.z.shape[1], prob.k
    iterations = 0
    for _ in range(rounds):
        phys, it = _levenberg_marquardt(prob, phys, max_iterations)
        iterations += it
        _, _, resid = prob.solve(phys)
        n_lin = N_LINEAR_TERMS * k + prob.leak_terms
        dof = 2 * (prob.z.shape[0] - n_lin) - prob.n_theta / c_n
        prob.w = 1.0 / np.maximum(np.sqrt(np.sum(np.abs(resid) ** 2, axis=0) / max(dof, 1.0)), 1e-300)
    return phys, iterations


def _inverse_psd(info: np.ndarray) -> np.ndarray:
    """Return the inverse of a symmetric positive semi-definite matrix (pseudo-inverse on its null space)."""
    scale = np.sqrt(np.maximum(np.diag(info), 1e-300))
    normed = info / np.outer(scale, scale)
    inv = np.linalg.pinv(normed, rcond=1e-12, hermitian=True)
    return inv / np.outer(scale, scale)


def _levenberg_marquardt(prob: _Problem, phys: PhysicsParameters, max_iterations: int):
    """Return (parameters, iterations) minimizing the projected whitened residual from `phys`."""
    terms, qs, resid = prob.solve(phys)
    cost = prob.cost(resid, phys)
    lam = 1e-3
    it = 0
    for it in range(1, max_iterations + 1):
        frames = prob.frames(phys)
        jac = prob.full_jacobian(phys, terms, qs, frames)
        r = prob.residual_vector(resid, phys)
        a = gram(jac)
        g = gram(jac, r)
        diag = np.maximum(np.diag(a), 1e-12 * max(np.max(np.diag(a)), 1e-300))
        improved = False
        for _ in range(12):
            try:
                delta = np.linalg.solve(a + lam * np.diag(diag), -g)
            except np.linalg.LinAlgError:
                lam *= 10.0
                continue
            trial = prob.step(phys, frames, delta)
            trial.handedness = phys.handedness
            try:
                t_terms, t_qs, t_resid = prob.solve(trial)
            except PhysicsFitError:
                lam *= 10.0
                continue
            t_cost = prob.cost(t_resid, trial)
            if t_cost < cost:
                phys, terms, qs, resid = trial, t_terms, t_qs, t_resid
                # Whitened chi-square: a fall below COST_TOLERANCE is far below any statistical meaning.
                done = (cost - t_cost) <= COST_TOLERANCE + 1e-10 * cost
                cost = t_cost
                lam = max(lam / 5.0, 1e-9)
                improved = True
                break
            lam *= 10.0
        if not improved or done:
            break
    prob.solve(phys)
    return phys, it
