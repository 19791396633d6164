"""Snapshot inverse: the field direction from one lock-in sample, with its CRLB covariance and flags.

For a whole block at once: (1) a coarse scan of the lookup table, done as one matrix product per
probe group, gives every grid direction's whitened residual; (2) the lowest local minima of that
map are the candidates; (3) each candidate takes a few Gauss-Newton steps on all channels on the
sphere (tangent step, exp_map retraction, step accepted only if the residual falls, else shrunk);
(4) the best is polished with a few more steps. The work per sample is fixed:
`evaluations_per_sample` model evaluations plus one row of the table scan, whatever the sample.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from fieldvane.estimator.chi_square import chi2_quantile
from fieldvane.estimator.blind import BLIND_FACTOR, blind_mask, check_factor, median_bound_deg
from fieldvane.estimator.estimate import Estimate
from fieldvane.estimator.fisher import channel_selection, invert_2x2, probe_groups, sigma_deg_from_covariance
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.harmonics import harmonics, monomial_coefficients
from fieldvane.estimator.lookup_table import DEFAULT_GRID_POINTS, LookupTable, build_table, calibration_key
from fieldvane.estimator.magnitude import fuse_magnitudes, magnitudes_from_frequencies
from fieldvane.estimator.monomials import derivative_maps, monomials
from fieldvane.estimator.response import to_real
from fieldvane.estimator.sphere import angle_between, exp_map, tangent_basis

F = EstimateFlag


@dataclass(frozen=True)
class SnapshotSettings:
    """Tuning of the snapshot inverse: work per sample, and the thresholds of its flags."""

    n_candidates: int = 3            # table minima refined per sample
    refine_iterations: int = 3       # Gauss-Newton trials per candidate
    polish_iterations: int = 3       # further trials for the best candidate
    max_step_rad: float = 0.25       # trust radius cap of one Gauss-Newton step
    scan_depth: int = 24             # lowest table cells examined for local minima
    blind_factor: float = BLIND_FACTOR  # BLIND where the 1-sigma bound exceeds this x its sphere median (blind.py)
    ambiguity_alpha: float = 0.01    # AMBIGUOUS: test level of the chi-square residual difference
    min_separation_deg: float = 10.0 # an alternative must lie at least this far away ...
    separation_sigmas: float = 3.0   # ... and this many sigma away to count as distinct
    low_signal_snr: float = 5.0      # LOW_SIGNAL when every |Z_c| < this * noise std
    magnitude_tolerance: float = 1e-3  # MAGNITUDE_DISAGREE above this relative |B| difference
    calibration_margin: float = 0.1  # OUTSIDE_CALIBRATION beyond the knot range widened by this
    chunk: int = 1024                # samples per vectorized pass (bounds memory)

    def __post_init__(self):
        if self.n_candidates < 1 or self.refine_iterations < 0 or self.polish_iterations < 0:
            raise ValueError("n_candidates must be >= 1 and iteration counts >= 0")
        if self.scan_depth < self.n_candidates:
            raise ValueError("scan_depth must be at least n_candidates")
        if not 0 < self.ambiguity_alpha < 1:
            raise ValueError("ambiguity_alpha must lie in (0, 1)")
        check_factor(self.blind_factor)


@dataclass
class SnapshotResult:
    """Snapshot solutions for N samples; rows with BAD_INPUT hold NaN directions.

    u (N,3) unit field direction, sensor frame; b_nT (N,) fused |B|; b_pair_nT (N,2) per isotope;
    cov (N,2,2) CRLB covariance in rad^2 on sphere.tangent_basis(u); sigma_deg (N,) sqrt(trace cov);
    flags (N,) EstimateFlag bits; chi2 (N,) whitened residual sum of squares of the best fit;
    alt_u (N,3) best well-separated alternative (NaN if none) and alt_dchi2 (N,) its chi2 minus the
    best's; candidates (N,R,3) refined candidates ranked by residual, candidate_chi2 (N,R);
    gains (N,P) fitted gain factor per probe (1 unless gain-free).
    """

    t: np.ndarray
    u: np.ndarray
    b_nT: np.ndarray
    b_pair_nT: np.ndarray
    cov: np.ndarray
    sigma_deg: np.ndarray
    flags: np.ndarray
    chi2: np.ndarray
    alt_u: np.ndarray
    alt_dchi2: np.ndarray
    candidates: np.ndarray
    candidate_chi2: np.ndarray
    gains: np.ndarray
    probes: tuple[int, ...] = field(default=())
    probes_used: np.ndarray | None = None   # (N,) bitmask of the probes with data (1 = probe 1, 2 = probe 2)

    def __len__(self) -> int:
        return int(self.t.shape[0])

    def estimate(self, i: int) -> Estimate:
        """Return row i as an Estimate (extras: chi2, alt_dchi2, b_a_nT, b_b_nT, gain_<probe>)."""
        extras = {"chi2": float(self.chi2[i]), "alt_dchi2": float(self.alt_dchi2[i]),
                  "b_a_nT": float(self.b_pair_nT[i, 0]), "b_b_nT": float(self.b_pair_nT[i, 1])}
        for j, p in enumerate(self.probes):
            extras[f"gain_{p}"] = float(self.gains[i, j])
        if self.probes_used is not None:
            extras["probes_used"] = int(self.probes_used[i])
        return Estimate(float(self.t[i]), self.u[i].copy(), float(self.b_nT[i]),
                        float(self.sigma_deg[i]), int(self.flags[i]), extras)

    def estimates(self) -> list[Estimate]:
        """Return every row as an Estimate, in order."""
        return [self.estimate(i) for i in range(len(self))]


class SnapshotSolver:
    """Single-sample inverse of a calibrated response model (see the module docstring)."""

    def __init__(self, model, gammas_hz_per_nt, table: LookupTable | None = None, *, probes=None,
                 gain_free: bool = False, settings: SnapshotSettings | None = None, noise_std=None,
                 grid_points: int = DEFAULT_GRID_POINTS, channel_index=None, median_bound: float | None = None):
        self.model = model
        self.settings = settings or SnapshotSettings()
        self.gammas_hz_per_nt = np.asarray(gammas_hz_per_nt, float)
        self.gain_free = bool(gain_free)
        self.table = table if table is not None else build_table(model, n_grid=grid_points)
        self._check_table(self.table)
        # channel_index: an explicit subset of the model's channels (used for samples missing some channels).
        self.idx = (np.asarray(channel_index, int) if channel_index is not None
                    else channel_selection(model.channels, probes))
        self._noise_arg = noise_std
        self._subsets: dict[tuple, "SnapshotSolver"] = {}
        self._median_bound = median_bound      # deg; subsets share their parent's (the sensor's normal)
        self.channels = tuple(model.channels[k] for k in self.idx)
        noise = model.noise_std if noise_std is None else np.broadcast_to(
            np.asarray(noise_std, float), (model.n_channels,))
        self.noise_std = np.asarray(noise, float)[self.idx]
        probe_ids, member = probe_groups(self.channels)
        self.probes = tuple(int(p) for p in probe_ids)
        self.member = member                                        # (C, P)
        self._exps, to_harm = monomial_coefficients(model.degree)
        # Whitened coefficients on monomials at each knot k: Z_c = sum_m mono_m(u) * coef[k, c, m]. The
        # partial derivatives of a polynomial are polynomials in the same monomials, so the rows for
        # Z, dZ/dx, dZ/dy, dZ/dz stack into one (K, 4C, M) table: one product gives value and gradient.
        coef = np.einsum("ckj,mj->kcm", model.coef[self.idx] / self.noise_std[:, None, None], to_harm)
        coef = np.concatenate([coef] + [coef @ d for d in derivative_maps(self._exps)], axis=1)
        k, rows, mono = coef.shape
        real = np.empty((k, 2 * rows, mono))
        real[:, 0::2], real[:, 1::2] = coef.real, coef.imag
        self._coef_shape = (2 * rows, mono)
        self._coef_real = real.reshape(k, -1)                     # (K, 8C*M), real/imag rows interleaved
        self._scan = self._scan_matrices()

    @classmethod
    def from_calibration(cls, calibration, table: LookupTable | None = None, **kwargs) -> "SnapshotSolver":
        """Return a solver for a Calibration; a given table must carry that calibration's key."""
        if table is not None and table.key != calibration_key(calibration, table.size,
                                                              table.neighbors.shape[1]):
            raise ValueError("the lookup table was built for a different calibration (key mismatch)")
        if table is None:
            from fieldvane.estimator.lookup_table import build_calibration_table
            table = build_calibration_table(calibration, kwargs.pop("grid_points", DEFAULT_GRID_POINTS))
        return cls(calibration.model, calibration.gammas_hz_per_nt, table, **kwargs)

    @property
    def median_bound_deg(self) -> float:
        """Return the sphere median of the single-sample bound (deg) at the calibrated range's middle |B| (BLIND)."""
        if self._median_bound is None:
            lo, hi = self.model.basis.range_nT
            noise = np.broadcast_to(np.asarray(self.model.noise_std if self._noise_arg is None else self._noise_arg,
                                               float), (self.model.n_channels,))
            probes = sorted({int(self.model.channels[k][0]) for k in self.idx})
            self._median_bound = median_bound_deg(self.model, math.sqrt(lo * hi), probes, self.gain_free, noise)
        return self._median_bound

    @property
    def evaluations_per_sample(self) -> int:
        """Return the fixed number of model-plus-Jacobian evaluations spent on every sample."""
        s = self.settings
        return s.n_candidates * (1 + s.refine_iterations) + s.polish_iterations

    def _check_table(self, table: LookupTable) -> None:
        if tuple(table.channels) != tuple(self.model.channels):
            raise ValueError(f"table channels {table.channels} differ from model channels {self.model.channels}")
        if not np.allclose(table.knots_nT, self.model.basis.knots_nT, rtol=1e-12):
            raise ValueError("table magnitude knots differ from the model's")
        probe = np.linspace(0, table.size - 1, 7).astype(int)
        expect = np.einsum("mj,ckj->kmc", harmonics(self.model.degree, table.grid[probe]), self.model.coef)
        if not np.allclose(table.values[:, probe], expect, rtol=1e-9, atol=1e-12 * np.abs(expect).max()):
            raise ValueError("the lookup table does not match this response model")

    def _scan_matrices(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Per probe group (one group unless gain-free): (channel indices, stacked [cross; norm] matrix)."""
        tw = self.table.values[:, :, self.idx] / self.noise_std            # (K, M, C) whitened
        k, m, _ = tw.shape
        groups = ([np.flatnonzero(self.member[:, j]) for j in range(self.member.shape[1])]
                  if self.gain_free else [np.arange(len(self.channels))])
        out = []
        for g in groups:
            t = tw[:, :, g]
            real = np.empty((k, 2 * len(g), m))
            real[:, 0::2] = t.real.transpose(0, 2, 1)
            real[:, 1::2] = t.imag.transpose(0, 2, 1)
            gram = np.einsum("kmc,lmc->klm", t.conj(), t).real.reshape(k * k, m)
            out.append((g, np.ascontiguousarray(np.vstack([real.reshape(k * 2 * len(g), m), gram]))))
        return out

    # ----------------------------------------------------------------------------- public entry points

    def solve(self, z: np.ndarray, f_hz: np.ndarray, t=None, channels=None, b_nT=None) -> SnapshotResult:
        """Return SnapshotResult for samples z (N,C) complex V and pump frequencies f_hz (N,2) Hz.

        z's columns are `channels` (names like '1a'), or the model's channels when None. b_nT (N,)
        or scalar, nT, replaces the magnitude fused from f_hz when given (f_hz then only sets flags).
        """
        z = np.atleast_2d(np.asarray(z, complex))
        f_hz = np.atleast_2d(np.asarray(f_hz, float))
        n = z.shape[0]
        if f_hz.shape != (n, 2):
            raise ValueError(f"f_hz has shape {f_hz.shape}, expected ({n}, 2)")
        names = tuple(self.model.channels) if channels is None else tuple(channels)
        if z.shape[1] != len(names):
            raise ValueError(f"z has {z.shape[1]} columns for {len(names)} channel names")
        if not any(ch in names for ch in self.channels):
            raise ValueError(f"the samples hold none of the solver's channels {', '.join(self.channels)}")
        z = np.stack([z[:, names.index(ch)] if ch in names else np.full(n, complex(np.nan, np.nan))
                      for ch in self.channels], axis=1)
        t = np.arange(n, dtype=float) if t is None else np.broadcast_to(np.asarray(t, float), (n,)).copy()

        s = self.settings
        r = s.n_candidates
        res = SnapshotResult(t, np.full((n, 3), np.nan), np.full(n, np.nan), np.full((n, 2), np.nan),
                             np.full((n, 2, 2), np.nan), np.full(n, np.nan),
                             np.full(n, int(F.SNAPSHOT), dtype=np.int64), np.full(n, np.nan),
                             np.full((n, 3), np.nan), np.full(n, np.nan), np.full((n, r, 3), np.nan),
                             np.full((n, r), np.nan), np.full((n, len(self.probes)), np.nan), self.probes)
        f_ok = np.all(np.isfinite(f_hz), axis=1) & np.all(f_hz > 0, axis=1)
        if np.any(f_ok):
            b, _, disagree = fuse_magnitudes(f_hz[f_ok], self.gammas_hz_per_nt, s.magnitude_tolerance)
            res.b_nT[f_ok] = b
            res.b_pair_nT[f_ok] = magnitudes_from_frequencies(f_hz[f_ok], self.gammas_hz_per_nt)
            res.flags[np.flatnonzero(f_ok)[disagree]] |= int(F.MAGNITUDE_DISAGREE)
        if b_nT is not None:
            res.b_nT = np.broadcast_to(np.asarray(b_nT, float), (n,)).copy()
        b_ok = np.isfinite(res.b_nT) & (res.b_nT > 0)
        finite = np.isfinite(z.real) & np.isfinite(z.imag)
        complete = np.all(finite, axis=1)
        # Probes wholly absent are expected (probes_used says which were there); a probe with only some of
        # its channels is bad input, still solved from what is there.
        probe_seen = finite.astype(float) @ self.member > 0                    # (N, P)
        probe_full = (~finite).astype(float) @ self.member == 0
        partial = np.any(probe_seen & ~probe_full, axis=1)
        res.probes_used = (probe_seen * (1 << (np.array(self.probes) - 1))).sum(axis=1).astype(np.int64)
        res.flags[~b_ok | ~np.any(finite, axis=1) | partial] |= int(F.BAD_INPUT)
        outside = np.flatnonzero(b_ok)[~self.model.basis.inside(res.b_nT[b_ok], s.calibration_margin)]
        res.flags[outside] |= int(F.OUTSIDE_CALIBRATION)
        rows = np.flatnonzero(b_ok & complete)
        for start in range(0, rows.size, s.chunk):
            sel = rows[start:start + s.chunk]
            self._solve_rows(z[sel] / self.noise_std, res.b_nT[sel], sel, res)
        incomplete = np.flatnonzero(b_ok & ~complete & np.any(finite, axis=1))
        if incomplete.size:
            patterns, which = np.unique(finite[incomplete], axis=0, return_inverse=True)
            for k, pattern in enumerate(patterns):
                sel = incomplete[np.ravel(which) == k]
                sub = self._subset_solver(tuple(np.flatnonzero(pattern)))
                part = sub.solve(z[np.ix_(sel, np.flatnonzero(pattern))], f_hz[sel], t[sel], sub.channels,
                                 res.b_nT[sel])
                self._merge(res, sel, part, sub)
        return res

    def _subset_solver(self, local: tuple) -> "SnapshotSolver":
        """Return (cached) a solver using only this solver's channels at positions `local`."""
        if local not in self._subsets:
            noise = self._noise_arg
            self._subsets[local] = SnapshotSolver(self.model, self.gammas_hz_per_nt, self.table,
                                                  gain_free=self.gain_free, settings=self.settings,
                                                  noise_std=noise, channel_index=self.idx[list(local)],
                                                  median_bound=self.median_bound_deg)
        return self._subsets[local]

    def _merge(self, res: SnapshotResult, sel: np.ndarray, part: SnapshotResult, sub: "SnapshotSolver") -> None:
        """Copy a subset solver's results into rows sel of res (keeping res's own BAD_INPUT and magnitude flags)."""
        keep = int(F.BAD_INPUT | F.MAGNITUDE_DISAGREE | F.OUTSIDE_CALIBRATION)
        res.flags[sel] = (res.flags[sel] & keep) | (part.flags & ~keep)
        for name in ("u", "cov", "sigma_deg", "chi2", "alt_u", "alt_dchi2", "candidates", "candidate_chi2"):
            getattr(res, name)[sel] = getattr(part, name)
        for j, probe in enumerate(sub.probes):
            res.gains[sel, self.probes.index(probe)] = part.gains[:, j]

    def initiate(self, sample, b_nT: float | None = None):
        """Return (u (3,), cov (2,2) rad^2 on tangent_basis(u)) from one Sample, or None if undecided.

        The tracker's initiator: None without a usable solution (no data, no |B|), for an ambiguous or a
        low-signal sample. Channels missing from the sample (nan) are left out of the fit.
        """
        res = self.solve(np.asarray(sample.z)[None, :], [[sample.f_a, sample.f_b]], [sample.t],
                         sample.channels, None if b_nT is None else [b_nT])
        if (res.flags[0] & int(F.AMBIGUOUS | F.LOW_SIGNAL) or not np.all(np.isfinite(res.cov[0]))
                or not np.all(np.isfinite(res.u[0]))):
            return None
        return res.u[0], res.cov[0]

    def solve_sample(self, sample) -> Estimate:
        """Return the Estimate of one Sample (fields t, f_a, f_b, z, channels)."""
        res = self.solve(np.asarray(sample.z)[None, :], [[sample.f_a, sample.f_b]], [sample.t],
                         sample.channels)
        return res.estimate(0)

    # ----------------------------------------------------------------------------- internals

    def _solve_rows(self, zw: np.ndarray, b_nT: np.ndarray, rows: np.ndarray, res: SnapshotResult) -> None:
        s = self.settings
        n, r = zw.shape[0], s.n_candidates
        weights = self.model.basis(b_nT)                                    # (n, K)
        start = self._candidates(zw, weights)                               # (n, R) grid indices
        coef = self._sample_coefficients(weights)                           # (n, 8C, M)

        flat = np.repeat(np.arange(n), r)
        state = self._start(self.table.grid[start.ravel()], zw[flat], coef)
        for _ in range(s.refine_iterations):
            self._step(state, zw[flat], coef)
        cost = state["cost"].reshape(n, r)
        best = np.argmin(cost, axis=1)
        pick = np.arange(n) * r + best
        polished = {k: v[pick] for k, v in state.items()}
        for _ in range(s.polish_iterations):
            self._step(polished, zw, coef)

        u = polished["u"]
        cov = invert_2x2(polished["info"])
        sigma = sigma_deg_from_covariance(cov)
        cand_u = state["u"].reshape(n, r, 3).copy()
        cand_cost = cost.copy()
        cand_u[np.arange(n), best] = u
        cand_cost[np.arange(n), best] = polished["cost"]
        order = np.argsort(cand_cost, axis=1)
        cand_u = np.take_along_axis(cand_u, order[:, :, None], axis=1)
        cand_cost = np.take_along_axis(cand_cost, order, axis=1)

        # Alternatives: candidates far from the best (in angle and in sigma); the smallest residual wins.
        sep = np.degrees(angle_between(cand_u, u[:, None, :]))              # (n, R)
        min_sep = np.maximum(s.min_separation_deg, s.separation_sigmas * np.nan_to_num(sigma, posinf=180.0))
        distinct = sep > min_sep[:, None]
        dchi2 = np.where(distinct, cand_cost - polished["cost"][:, None], np.inf)
        j = np.argmin(dchi2, axis=1)
        alt_d = dchi2[np.arange(n), j]
        has_alt = np.isfinite(alt_d)

        flags = np.zeros(n, dtype=np.int64)
        flags[has_alt & (alt_d < chi2_quantile(1.0 - s.ambiguity_alpha, 2.0))] |= int(F.AMBIGUOUS)
        flags[blind_mask(sigma, self.median_bound_deg, s.blind_factor)] |= int(F.BLIND)
        flags[np.all(np.abs(zw) < s.low_signal_snr, axis=1)] |= int(F.LOW_SIGNAL)

        res.u[rows] = u
        res.cov[rows] = cov
        res.sigma_deg[rows] = sigma
        res.flags[rows] |= flags
        res.chi2[rows] = polished["cost"]
        res.alt_u[rows] = np.where(has_alt[:, None], cand_u[np.arange(n), j], np.nan)
        res.alt_dchi2[rows] = np.where(has_alt, alt_d, np.nan)
        res.candidates[rows] = cand_u
        res.candidate_chi2[rows] = cand_cost
        res.gains[rows] = polished["gains"]

    def _candidates(self, zw: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """Return the grid indices (n, R) of the lowest local minima of the whitened table residual."""
        s = self.settings
        n = zw.shape[0]
        k = weights.shape[1]
        wprod = (weights[:, :, None] * weights[:, None, :]).reshape(n, k * k)
        energy = np.sum(np.abs(zw) ** 2, axis=1)
        cost = np.broadcast_to(energy[:, None], (n, self.table.size)).copy()
        for g, mat in self._scan:
            a = (weights[:, :, None] * to_real(zw[:, g])[:, None, :]).reshape(n, -1)
            if self.gain_free:
                # Best positive gain per probe: the residual falls by cross^2 / norm (in place: big arrays).
                cross, norm = a @ mat[: a.shape[1]], wprod @ mat[a.shape[1]:]
                np.maximum(cross, 0.0, out=cross)
                np.square(cross, out=cross)
                np.maximum(norm, 1e-300, out=norm)
                np.divide(cross, norm, out=cross)
                cost -= cross
            else:
                cost += np.hstack([-2.0 * a, wprod]) @ mat          # norm - 2 cross, one product
        depth = min(s.scan_depth, self.table.size)
        low = np.argpartition(cost, depth - 1, axis=1)[:, :depth]            # (n, D)
        low_cost = np.take_along_axis(cost, low, axis=1)
        nb_cost = np.take_along_axis(cost, self.table.neighbors[low].reshape(n, -1), axis=1)
        is_min = low_cost <= nb_cost.reshape(n, depth, -1).min(axis=2)
        order = np.lexsort((low_cost, ~is_min))                              # minima first, by cost
        return np.take_along_axis(low, order[:, : s.n_candidates], axis=1)

    def _evaluate(self, u: np.ndarray, zw: np.ndarray, coef: np.ndarray):
        """Return (cost, GN step (m,3), reduced information (m,2,2), gains (m,P)) at directions u (m,3).

        coef (n, 8C, M) holds each sample's whitened monomial coefficients of Z and of its gradient,
        real and imaginary rows interleaved; u holds m = n*r directions, r consecutive per sample, so
        the model and its gradient at all of them are one batched matrix product.
        """
        n, m = coef.shape[0], u.shape[0]
        c = zw.shape[1]
        mono = monomials(u, self._exps).reshape(n, m // n, -1).transpose(0, 2, 1)   # (n, M, r)
        out = (coef @ mono).transpose(0, 2, 1).reshape(m, 4, c, 2)         # [value, d/dx, d/dy, d/dz]
        out = out[..., 0] + 1j * out[..., 1]                                # (m, 4, C) complex
        e1, e2 = tangent_basis(u)
        zm = out[:, 0]
        jac = np.stack([np.einsum("nkc,nk->nc", out[:, 1:], e1), np.einsum("nkc,nk->nc", out[:, 1:], e2)],
                       axis=-1)                                             # (m, C, 2)
        if self.gain_free:
            cross = np.einsum("nc,nc,cp->np", zm.conj(), zw, self.member).real
            norm = np.einsum("nc,cp->np", np.abs(zm) ** 2, self.member)
            gains = np.maximum(cross, 0.0) / np.maximum(norm, 1e-300)
            scale = gains @ self.member.T                                   # (n, C)
            zm, jac = zm * scale, jac * scale[:, :, None]
        else:
            gains = np.ones((u.shape[0], len(self.probes)))
        resid = zw - zm
        cost = np.sum(np.abs(resid) ** 2, axis=1)
        info = np.einsum("nci,ncj->nij", jac.conj(), jac).real
        grad = np.einsum("nci,nc->ni", jac.conj(), resid).real
        if self.gain_free:
            # Eliminate the log-gains (dZ/dg = Z per probe) by the Schur complement.
            f_gg = np.einsum("nc,cp->np", np.abs(zm) ** 2, self.member)
            f_dg = np.einsum("nci,nc,cp->nip", jac.conj(), zm, self.member).real
            g_g = np.einsum("nc,nc,cp->np", zm.conj(), resid, self.member).real
            inv = np.where(f_gg > 0, 1.0 / np.where(f_gg > 0, f_gg, 1.0), 0.0)
            info = info - np.einsum("nip,njp,np->nij", f_dg, f_dg, inv)
            grad = grad - np.einsum("nip,np->ni", f_dg, g_g * inv)
        damp = 1e-9 * (info[:, 0, 0] + info[:, 1, 1]) + 1e-300
        reg = info + damp[:, None, None] * np.eye(2)
        det = reg[:, 0, 0] * reg[:, 1, 1] - reg[:, 0, 1] * reg[:, 1, 0]
        det = np.where(np.abs(det) > 0, det, 1e-300)
        d1 = (reg[:, 1, 1] * grad[:, 0] - reg[:, 0, 1] * grad[:, 1]) / det
        d2 = (reg[:, 0, 0] * grad[:, 1] - reg[:, 1, 0] * grad[:, 0]) / det
        step = d1[:, None] * e1 + d2[:, None] * e2
        return cost, step, info, gains

    def _sample_coefficients(self, weights: np.ndarray) -> np.ndarray:
        """Return per-sample whitened monomial coefficients (n, 8C, M) of Z and its gradient, real/imag interleaved."""
        return (weights @ self._coef_real).reshape((weights.shape[0],) + self._coef_shape)

    def _start(self, u: np.ndarray, zw: np.ndarray, coef: np.ndarray) -> dict[str, np.ndarray]:
        cost, step, info, gains = self._evaluate(u, zw, coef)
        radius = np.full(u.shape[0], self.settings.max_step_rad)
        return {"u": u, "cost": cost, "step": _clip(step, radius), "radius": radius, "info": info,
                "gains": gains}

    def _step(self, st: dict[str, np.ndarray], zw: np.ndarray, coef: np.ndarray) -> None:
        """One trust-region Gauss-Newton trial per problem: accept if the residual falls, else shrink."""
        trial = exp_map(st["u"], st["step"])
        cost, step, info, gains = self._evaluate(trial, zw, coef)
        ok = cost < st["cost"]
        taken = np.linalg.norm(st["step"], axis=1)
        radius = np.where(ok, np.minimum(np.maximum(st["radius"], 2.0 * taken), self.settings.max_step_rad),
                          0.25 * taken)
        st["u"] = np.where(ok[:, None], trial, st["u"])
        st["cost"] = np.where(ok, cost, st["cost"])
        st["info"] = np.where(ok[:, None, None], info, st["info"])
        st["gains"] = np.where(ok[:, None], gains, st["gains"])
        st["step"] = np.where(ok[:, None], _clip(step, radius), 0.25 * st["step"])
        st["radius"] = radius


def _clip(step: np.ndarray, radius: np.ndarray) -> np.ndarray:
    """Return tangent steps (n,3) shortened to at most `radius` (n,) radians."""
    norm = np.linalg.norm(step, axis=1)
    return step * np.minimum(1.0, radius / np.maximum(norm, 1e-300))[:, None]


def solve_block(solver: SnapshotSolver, block) -> list[Estimate]:
    """Return one snapshot Estimate per row of a SampleBlock (t, f (N,2) Hz, z (N,C) V, channels)."""
    return solver.solve(block.z, block.f, block.t, block.channels).estimates()
