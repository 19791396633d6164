"""Calibration: fit the physics part and the smooth corrections of the response model to a scan."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from fieldvane.estimator.constants import CELL_PAIRS, gamma_hz_per_nt, identify_isotope
from fieldvane.estimator.harmonics import harmonics, n_harmonics
from fieldvane.estimator.magnitude_basis import MagnitudeBasis
from fieldvane.estimator.physics import PhysicsParameters
from fieldvane.estimator.response import ResponseModel
from fieldvane.estimator.sphere import (axis_angle_deg, exp_map, fibonacci_sphere, normalize, tangent_basis,
                                         unit_to_spherical)

PHYSICS_DEGREE = 2          # the ideal channel is exactly a degree-2 polynomial in u
MIN_ROWS_PER_PARAMETER = 3  # common practice: a few data per fitted parameter before trusting a fit


class CalibrationError(ValueError):
    """The scan cannot support a calibration (too few points, too little of the sphere, ...)."""


@dataclass
class ChannelReport:
    """Held-out quality of one channel: residual std of X and Y (V; the calibrated noise), phase (deg), amplitude (%)."""

    channel: str
    noise_std: float
    heldout_phase_deg: float
    heldout_amplitude_pct: float


@dataclass
class Calibration:
    """A fitted sensor: response model, physics parameters, isotopes and the fit's diagnostics."""

    model: ResponseModel
    physics: PhysicsParameters
    pump_isotopes: tuple[str, str]
    correction_degree: int             # -1: physics part only
    channel_reports: list[ChannelReport]
    degree_scores: dict[int, float]    # correction degree -> held-out RMS residual (V)
    coverage_fraction: float           # fraction of sphere cells holding enough samples
    sparse_regions: list[tuple[float, float]] = field(default_factory=list)  # (polar, azimuth) deg
    n_rows: int = 0
    warnings: list[str] = field(default_factory=list)
    nominal_pump_axes: np.ndarray | None = None
    nominal_probe_axes: np.ndarray | None = None

    @property
    def gammas_hz_per_nt(self) -> np.ndarray:
        """Return gamma/2pi of the isotopes at pumps a and b, Hz/nT."""
        return np.array([gamma_hz_per_nt(i) for i in self.pump_isotopes])

    @property
    def magnitude_range_nT(self) -> tuple[float, float]:
        """Return the calibrated magnitude range (nT)."""
        return self.model.basis.range_nT


def magnitude_knots(b_nT: np.ndarray, max_knots: int = 8, gap: float = 0.05) -> np.ndarray:
    """Return magnitude knots (nT): the levels of a stepped scan, or quantiles of a continuous one."""
    lb = np.sort(np.log(b_nT))
    breaks = np.flatnonzero(np.diff(lb) > gap)
    groups = np.split(lb, breaks + 1)
    if len(groups) <= max_knots:
        return np.exp([np.median(g) for g in groups])
    return np.exp(np.quantile(lb, np.linspace(0, 1, max_knots)))


def _init_axes_from_quadratic(u, z, channels):
    """Initial pump/probe axes from the eigen-structure of each channel's degree-2 part."""
    x, y, w = u[:, 0], u[:, 1], u[:, 2]
    design = np.column_stack([np.ones_like(x), x, y, w, x * y, x * w, y * w, x * x - y * y,
                              2 * w * w - x * x - y * y])
    coef, *_ = np.linalg.lstsq(design, z, rcond=None)
    pairs = {}
    for k, ch in enumerate(channels):
        b = coef[:, k]
        t = np.array([b[7] - b[8], -b[7] - b[8], 2 * b[8], b[4] / 2, b[5] / 2, b[6] / 2])
        _, _, vt = np.linalg.svd(np.vstack([t.real, t.imag]))
        v = vt[0]
        tm = np.array([[v[0], v[3], v[4]], [v[3], v[1], v[5]], [v[4], v[5], v[2]]])
        lam, vec = np.linalg.eigh(tm)
        r = (lam[2] - lam[1]) / max(lam[1] - lam[0], 1e-15)
        pq = np.clip((r - 1) / (r + 1), -0.99, 0.99)
        a, bb = np.sqrt(2 + 2 * pq) / 2, np.sqrt(2 - 2 * pq) / 2
        pairs[ch] = (normalize(a * vec[:, 2] + bb * vec[:, 0]), normalize(a * vec[:, 2] - bb * vec[:, 0]))
    probes, pumps = {}, {"a": [], "b": []}
    for probe in sorted({ch[0] for ch in channels}):
        ca, cb = pairs[probe + "a"], pairs[probe + "b"]
        i, j = max(((i, j) for i in range(2) for j in range(2)), key=lambda ij: abs(ca[ij[0]] @ cb[ij[1]]))
        q = ca[i] + np.sign(ca[i] @ cb[j]) * cb[j]
        probes[probe] = normalize(q)
        pumps["a"].append(ca[1 - i])
        pumps["b"].append(cb[1 - j])
    pump_axes = []
    for p in "ab":
        v = pumps[p][0]
        for other in pumps[p][1:]:
            v = v + np.sign(v @ other) * other
        pump_axes.append(normalize(v))
    return np.array(pump_axes), np.array([probes[k] for k in sorted(probes)])


def _fit_gains(shapes, s_basis, z):
    """Least-squares complex gains (C, K) for fixed channel shapes (N, C); returns gains, residual."""
    gains = np.empty((shapes.shape[1], s_basis.shape[1]), complex)
    resid = np.empty_like(z)
    for k in range(shapes.shape[1]):
        design = s_basis * shapes[:, k:k + 1]
        g, *_ = np.linalg.lstsq(design, z[:, k], rcond=None)
        gains[k] = g
        resid[:, k] = z[:, k] - design @ g
    return gains, resid


def _fit_physics(u, s_basis, z, channels, pump0, probe0):
    """Fit beam axes, per-knot complex gains and handedness by variable projection."""
    n_probe = probe0.shape[0]
    axes0 = np.vstack([pump0, probe0])
    frames = [tangent_basis(a) for a in axes0]

    def axes_from(params):
        out = np.empty_like(axes0)
        for i, (a0, (e1, e2)) in enumerate(zip(axes0, frames)):
            out[i] = exp_map(a0, params[2 * i] * e1 + params[2 * i + 1] * e2)
        return out

    def params_of(axes, hand):
        return PhysicsParameters(axes[:2], axes[2:], np.zeros((len(channels), s_basis.shape[1]), complex),
                                 hand, tuple(channels))

    hand = np.ones(len(channels))
    # Handedness is discrete: choose per channel the sign that fits better at the initial axes.
    for k in range(len(channels)):
        best = None
        for sign in (1.0, -1.0):
            hand_try = hand.copy()
            hand_try[k] = sign
            _, r = _fit_gains(params_of(axes0, hand_try).shapes(u), s_basis, z)
            cost = np.sum(np.abs(r[:, k]) ** 2)
            if best is None or cost < best[0]:
                best = (cost, sign)
        hand[k] = best[1]

    def residuals(params):
        _, r = _fit_gains(params_of(axes_from(params), hand).shapes(u), s_basis, z)
        return np.concatenate([r.real.ravel(), r.imag.ravel()])

    from scipy.optimize import least_squares  # only the fit needs it; the live loop never does

    sol = least_squares(residuals, np.zeros(2 * (2 + n_probe)), method="lm", x_scale=0.01)
    axes = axes_from(sol.x)
    phys = params_of(axes, hand)
    phys.gains, _ = _fit_gains(phys.shapes(u), s_basis, z)
    return phys


def _correction_design(u, s_basis, degree):
    y = harmonics(degree, u)
    return (s_basis[:, :, None] * y[:, None, :]).reshape(u.shape[0], -1)


def _solve_ridge(design, target, ridge):
    """Tikhonov-regularized least squares for complex targets (N, C) -> (P, C)."""
    gram = design.T @ design
    gram[np.diag_indices_from(gram)] += ridge * (np.trace(gram) / gram.shape[0] + 1e-30)
    return np.linalg.solve(gram, design.T @ target)


def _physics_to_harmonics(phys: PhysicsParameters) -> np.ndarray:
    """Exact degree-2 harmonic coefficients (C, K, 9) of the physics part."""
    grid = fibonacci_sphere(200)
    y = harmonics(PHYSICS_DEGREE, grid)
    shape_coef, *_ = np.linalg.lstsq(y, phys.shapes(grid), rcond=None)  # (9, C)
    return phys.gains[:, :, None] * shape_coef.T[:, None, :]


def sphere_coverage(u: np.ndarray, cells: int = 60, min_per_cell: int = 3):
    """Return (fraction of sphere cells holding >= min_per_cell samples, [(polar, azimuth) deg of sparse cells])."""
    centers = fibonacci_sphere(cells)
    nearest = np.argmax(u @ centers.T, axis=1)
    counts = np.bincount(nearest, minlength=cells)
    polar, azim = np.degrees(unit_to_spherical(centers[counts < min_per_cell]))
    return float(np.mean(counts >= min_per_cell)), list(zip(polar.round(1), azim.round(1)))


def fit_calibration(u: np.ndarray, b_nT: np.ndarray, z: np.ndarray, f: np.ndarray, channels,
                    nominal_pumps: np.ndarray | None = None, nominal_probes: np.ndarray | None = None,
                    max_correction_degree: int = 6, folds: int = 5, cell: str = "Rb",
                    ridge: float = 1e-7, seed: int = 0) -> Calibration:
    """Fit a Calibration from scan arrays: u (N,3) applied direction, b_nT (N,), z (N,C) V, f (N,2) Hz."""
    u = normalize(np.asarray(u, float))
    b_nT = np.asarray(b_nT, float)
    z = np.asarray(z, complex)
    channels = tuple(channels)
    n = u.shape[0]
    warnings: list[str] = []
    if n < 40:
        raise CalibrationError(f"only {n} usable rows; a calibration needs at least 40")

    try:
        candidates = CELL_PAIRS[cell]
    except KeyError:
        raise CalibrationError(f"unknown cell element {cell!r}; known: {', '.join(CELL_PAIRS)}") from None
    isotopes = []
    for j, pump in enumerate("ab"):
        ratio = float(np.median(np.asarray(f)[:, j] / b_nT))
        try:
            isotopes.append(identify_isotope(ratio, candidates))
        except ValueError as exc:
            raise CalibrationError(f"pump {pump}: {exc}") from None
    if isotopes[0] == isotopes[1]:
        raise CalibrationError(f"both pumps appear modulated at the {isotopes[0]} Larmor frequency")

    coverage, sparse = sphere_coverage(u)
    if coverage < 0.5:
        raise CalibrationError(f"the scan covers only {coverage:.0%} of the sphere (at least 50% of "
                               f"60 equal cells need 3 samples); extend the scan")
    if coverage < 0.9:
        warnings.append(f"sphere coverage {coverage:.0%}: the model is extrapolated in {len(sparse)} "
                        f"sparse cells; directions there are less trustworthy")

    knots = magnitude_knots(b_nT)
    basis = MagnitudeBasis(knots)
    s_basis = basis(b_nT)
    nearest_knot = np.argmin(np.abs(np.log(b_nT)[:, None] - np.log(knots)[None, :]), axis=1)
    per_knot = np.bincount(nearest_knot, minlength=len(knots))
    if len(knots) == 1:
        warnings.append(f"single magnitude {knots[0]:.0f} nT: the model holds only near it; "
                        f"estimates far from it are flagged OUTSIDE_CALIBRATION")
    if per_knot.min() < MIN_ROWS_PER_PARAMETER * n_harmonics(PHYSICS_DEGREE):
        raise CalibrationError(f"magnitude {knots[np.argmin(per_knot)]:.0f} nT has only "
                               f"{per_knot.min()} rows; need at least "
                               f"{MIN_ROWS_PER_PARAMETER * n_harmonics(PHYSICS_DEGREE)}")

    densest = nearest_knot == np.argmax(per_knot)
    if nominal_pumps is not None and nominal_probes is not None:
        pump0, probe0 = normalize(nominal_pumps), normalize(nominal_probes)
    else:
        pump0, probe0 = _init_axes_from_quadratic(u[densest], z[densest], channels)
    phys = _fit_physics(u, s_basis, z, channels, pump0, probe0)
    _align_signs(phys, nominal_pumps, nominal_probes)

    physics_pred = np.einsum("nk,ck->nc", s_basis, phys.gains) * phys.shapes(u)
    resid = z - physics_pred

    # Correction degree by k-fold held-out residual; the smallest degree within 2% of the best wins.
    rng = np.random.default_rng(seed)
    fold_of = rng.integers(0, folds, n)
    scores: dict[int, float] = {-1: float(np.sqrt(np.mean(np.abs(resid) ** 2) / 2))}
    heldout = {-1: resid}
    for degree in range(0, max_correction_degree + 1):
        n_par = basis.size * n_harmonics(degree)
        if per_knot.min() < MIN_ROWS_PER_PARAMETER * n_harmonics(degree) or n * (folds - 1) / folds < 2 * n_par:
            break
        design = _correction_design(u, s_basis, degree)
        pred = np.empty_like(resid)
        for k in range(folds):
            train, test = fold_of != k, fold_of == k
            sol = _solve_ridge(design[train], resid[train], ridge)
            pred[test] = design[test] @ sol
        r = resid - pred
        heldout[degree] = r
        scores[degree] = float(np.sqrt(np.mean(np.abs(r) ** 2) / 2))
    best = min(scores.values())
    chosen = min(d for d, s in scores.items() if s <= 1.02 * best)

    degree = max(PHYSICS_DEGREE, chosen)
    coef = np.zeros((len(channels), basis.size, n_harmonics(degree)), complex)
    coef[:, :, :n_harmonics(PHYSICS_DEGREE)] = _physics_to_harmonics(phys)
    if chosen >= 0:
        sol = _solve_ridge(_correction_design(u, s_basis, chosen), resid, ridge)
        coef[:, :, :n_harmonics(chosen)] += sol.T.reshape(len(channels), basis.size, n_harmonics(chosen))

    r = heldout[chosen]
    noise = np.sqrt(np.mean(np.abs(r) ** 2, axis=0) / 2)
    model = ResponseModel(channels, degree, knots, coef, noise)
    reports = _channel_reports(channels, z, z - r, noise)
    return Calibration(model, phys, tuple(isotopes), chosen, reports, scores, coverage, sparse, n,
                       warnings, None if nominal_pumps is None else normalize(nominal_pumps),
                       None if nominal_probes is None else normalize(nominal_probes))


def _align_signs(phys: PhysicsParameters, nominal_pumps, nominal_probes) -> None:
    """Axes are fitted up to sign: align with nominal axes, else make the largest component positive."""
    def flip(axis, ref):
        sign = np.sign(axis @ ref) if ref is not None else np.sign(axis[np.argmax(np.abs(axis))])
        return sign if sign != 0 else 1.0

    for j in range(2):
        sgn = flip(phys.pump_axes[j], None if nominal_pumps is None else normalize(nominal_pumps[j]))
        phys.pump_axes[j] *= sgn
        for k, ch in enumerate(phys.channels):
            if ch[1] == "ab"[j] and sgn < 0:
                phys.gains[k] *= -1      # c and s both flip with p
    for i in range(phys.probe_axes.shape[0]):
        sgn = flip(phys.probe_axes[i], None if nominal_probes is None else normalize(nominal_probes[i]))
        phys.probe_axes[i] *= sgn
        for k, ch in enumerate(phys.channels):
            if int(ch[0]) == i + 1 and sgn < 0:
                phys.gains[k] *= -1


def _channel_reports(channels, z, pred, noise) -> list[ChannelReport]:
    out = []
    for k, ch in enumerate(channels):
        amp = np.abs(pred[:, k])
        strong = amp > 0.2 * amp.max()
        ratio = z[strong, k] / pred[strong, k]
        phase = np.degrees(np.angle(ratio))
        amp_pct = 100 * (np.abs(ratio) - 1)
        out.append(ChannelReport(ch, float(noise[k]),
                                 float(np.sqrt(np.mean(phase ** 2))), float(np.sqrt(np.mean(amp_pct ** 2)))))
    return out


def axis_errors_deg(fitted: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """Return the angle between fitted and true axes ignoring sign, degrees."""
    return axis_angle_deg(np.atleast_2d(fitted), np.atleast_2d(truth))
