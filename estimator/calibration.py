"""Calibration: screen the scan's rows, fit the physics part and the smooth corrections of the response model.

Order of work: (1) rows that cannot be used (non-finite, absurd lock-in values, a pump frequency
that disagrees with the applied field) are set aside and named; (2) a robust screening fit rejects
wild rows (estimator/outliers.py); (3) the physics part (estimator/physics.py) is fitted by
variable projection (estimator/physics_fit.py), which also gives each beam axis its uncertainty;
(4) harmonic corrections are fitted to its residual, their degree chosen by k-fold held-out
residual; (5) rows whose held-out residual fails the chi-square test are rejected and (3)-(4)
repeated; (6) both parts are folded into one coefficient table, and the model's accuracy between
the scanned magnitude levels is checked by leaving each level out (estimator/magnitude_error.py).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fieldvane.estimator.constants import CELL_PAIRS, gamma_hz_per_nt, identify_isotope
from fieldvane.estimator.folds import scan_point_folds, scan_points
from fieldvane.estimator.harmonics import harmonics, n_harmonics
from fieldvane.estimator.magnitude_basis import MagnitudeBasis
from fieldvane.estimator.magnitude_error import MagnitudeCheck, check_magnitudes, scan_levels
from fieldvane.estimator.magnitude_model import MagnitudeModel, fit_magnitude_model
from fieldvane.estimator.outliers import robust_scale, row_statistic, row_threshold, screen_rows
from fieldvane.estimator.physics import PhysicsParameters
from fieldvane.estimator.physics_fit import N_LINEAR_TERMS, PhysicsFitError, fit_physics
from fieldvane.estimator.response import ResponseModel
from fieldvane.estimator.sphere import axis_angle_deg, fibonacci_sphere, normalize, unit_to_spherical
from fieldvane.estimator.tall import gram, rows_times

PHYSICS_DEGREE = 2          # the ideal channel is exactly a degree-2 polynomial in u
MIN_ROWS_PER_PARAMETER = 3  # common practice: a few data per fitted parameter before trusting a fit
ABSURD_V = 1e6              # no lock-in reports megavolts: such a value is a corrupted row
FREQUENCY_TOLERANCE = 0.05  # a pump frequency this far (relative) from gamma |B| belongs to another row
SCREEN_DEGREE = 3           # harmonic degree of the robust screening fit
SCREEN_FACTOR = 100.0       # screening rejects only wild rows (x chi-square limit); the full model does the rest
FAMILY_ALPHA = 0.01         # chance that a clean scan loses any row to the outlier test (common practice)
TRUNCATION_FRACTION = 0.05  # physics harmonics smaller than this fraction of the noise are dropped


class CalibrationError(ValueError):
    """The scan cannot support a calibration; `unusable` is True when the input itself is at fault."""

    def __init__(self, message: str, unusable: bool = True):
        super().__init__(message)
        self.unusable = unusable


@dataclass
class ChannelReport:
    """Held-out quality of one channel: residual std of X and Y (V; the calibrated noise), phase (deg), amplitude (%)."""

    channel: str
    noise_std: float
    heldout_phase_deg: float
    heldout_amplitude_pct: float


@dataclass
class RejectedRow:
    """A scan row left out of the fit: its index in the arrays, file line if known, reason and detail."""

    index: int
    line: int | None
    reason: str            # 'non-finite', 'absurd', 'frequency', 'outlier'
    channel: str | None
    detail: str

    def where(self) -> str:
        """Return 'line N' when the file line is known, else 'data row N' (1-based)."""
        return f"line {self.line}" if self.line is not None else f"data row {self.index + 1}"


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
    direction_std_deg: np.ndarray | None = None   # (2 + P,) pumps a, b then probes: sqrt(trace) of 2x2 cov
    rejected_rows: list[RejectedRow] = field(default_factory=list)
    correction_rms_V: np.ndarray | None = None    # (C,) sphere RMS of the corrections at the worst knot
    magnitude_check: MagnitudeCheck | None = None
    fit_info: dict = field(default_factory=dict)  # physics-fit diagnostics (iterations, inflation, stds)
    magnitude_model: MagnitudeModel | None = None  # the loops' frequency errors: corrected |B| and its sigma
    scan_lockin: tuple[float, int] | None = None   # the scan's lock-in filter: RC time constant (s), stages

    @property
    def gammas_hz_per_nt(self) -> np.ndarray:
        """Return gamma/2pi of the isotopes at pumps a and b, Hz/nT."""
        return np.array([gamma_hz_per_nt(i) for i in self.pump_isotopes])

    @property
    def magnitude_range_nT(self) -> tuple[float, float]:
        """Return the calibrated magnitude range (nT)."""
        return self.model.basis.range_nT

    def model_error_ratio(self, b_nT) -> np.ndarray:
        """Return (N, C): the model's expected error variance at |B| = b_nT (nT, (N,)) over each channel's noise variance.

        Averaged over the sphere, per component (X or Y). 0 where the scan verified the model (at
        its magnitude levels), growing between sparse levels and outside the range; +inf where the
        scan says nothing (a single level, far from it). A tracker adds ratio * noise_std^2 to its
        measurement variance.
        """
        b = np.atleast_1d(np.asarray(b_nT, float))
        if self.magnitude_check is None:
            return np.zeros((b.size, self.model.n_channels))
        return self.magnitude_check.ratio(b)


def magnitude_knots(b_nT: np.ndarray, max_knots: int = 8, gap: float = 0.05) -> np.ndarray:
    """Return magnitude knots (nT): the levels of a stepped scan, or quantiles of a continuous one.

    Levels are groups of magnitudes separated by more than `gap` in ln|B|, each no wider than `gap`;
    otherwise the scan is continuous and gets about one knot per factor 1.5 in |B| (2..max_knots).
    """
    lb = np.sort(np.log(b_nT))
    breaks = np.flatnonzero(np.diff(lb) > gap)
    groups = np.split(lb, breaks + 1)
    if len(groups) <= max_knots and all(g[-1] - g[0] <= gap for g in groups):
        return np.exp([np.median(g) for g in groups])
    count = int(np.clip(np.ceil((lb[-1] - lb[0]) / np.log(1.5)) + 1, 2, max_knots))
    return np.exp(np.quantile(lb, np.linspace(0, 1, count)))


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


def _correction_design(u, s_basis, degree):
    y = harmonics(degree, u)
    return (s_basis[:, :, None] * y[:, None, :]).reshape(u.shape[0], -1)


def _solve_gram(gram, rhs, ridge):
    """Tikhonov-regularized normal equations: (G + ridge * mean diag) x = rhs."""
    g = gram.copy()
    g[np.diag_indices_from(g)] += ridge * (np.trace(g) / g.shape[0] + 1e-30)
    return np.linalg.solve(g, rhs)


def sphere_coverage(u: np.ndarray, cells: int = 60, min_per_cell: int = 3):
    """Return (fraction of sphere cells holding >= min_per_cell samples, [(polar, azimuth) deg of sparse cells])."""
    centers = fibonacci_sphere(cells)
    nearest = np.argmax(u @ centers.T, axis=1)
    counts = np.bincount(nearest, minlength=cells)
    polar, azim = np.degrees(unit_to_spherical(centers[counts < min_per_cell]))
    return float(np.mean(counts >= min_per_cell)), list(zip(polar.round(1), azim.round(1)))


def _sane_rows(u, b_nT, z, f, channels, lines) -> tuple[np.ndarray, list[RejectedRow]]:
    """Return (usable mask (N,), rejected rows) for non-finite, absurd and frequency-mismatched rows."""
    n = u.shape[0]
    rejected: list[RejectedRow] = []

    def line_of(i):
        return None if lines is None else int(lines[i])

    with np.errstate(invalid="ignore", over="ignore"):
        finite = (np.all(np.isfinite(u), axis=1) & np.isfinite(b_nT) & np.all(np.isfinite(f), axis=1)
                  & np.all(np.isfinite(z.real) & np.isfinite(z.imag), axis=1))
        norm = np.linalg.norm(np.where(np.isfinite(u), u, 0.0), axis=1)
        finite &= (norm > 0) & (b_nT > 0) & np.all(f > 0, axis=1)
    for i in np.flatnonzero(~finite):
        rejected.append(RejectedRow(int(i), line_of(i), "non-finite", None,
                                    "non-finite or non-positive field, frequency or lock-in value"))
    big = np.maximum(np.abs(np.where(np.isfinite(z.real), z.real, 0.0)),
                     np.abs(np.where(np.isfinite(z.imag), z.imag, 0.0)))        # (N, C)
    absurd = finite & np.any(big > ABSURD_V, axis=1)
    for i in np.flatnonzero(absurd):
        k = int(np.argmax(big[i]))
        rejected.append(RejectedRow(int(i), line_of(i), "absurd", channels[k],
                                    f"lock-in value {big[i, k]:.3g} V (limit {ABSURD_V:.0e} V)"))
    ok = finite & ~absurd
    if ok.sum() >= 2:
        ratio = f[ok] / b_nT[ok, None]
        med = np.median(ratio, axis=0)
        off = np.zeros((n, 2))
        off[ok] = np.abs(ratio / med - 1.0)
        bad_f = ok & np.any(off > FREQUENCY_TOLERANCE, axis=1)
        for i in np.flatnonzero(bad_f):
            j = int(np.argmax(off[i]))
            rejected.append(RejectedRow(int(i), line_of(i), "frequency", None,
                                        f"f_{'ab'[j]} / |B| is {off[i, j]:.0%} away from the scan's median "
                                        f"(applied field and frequency disagree)"))
        ok &= ~bad_f
    return ok, rejected


def _check_channels(z: np.ndarray, channels) -> None:
    """Refuse a scan with a dead channel: zero, or the same value, in every usable row."""
    for k, ch in enumerate(channels):
        v = z[:, k]
        spread = robust_scale((v - np.median(v.real) - 1j * np.median(v.imag))[:, None])[0]
        if np.all(v == 0):
            raise CalibrationError(f"channel {ch} is zero in every row: is its lock-in connected?")
        if spread == 0 or np.ptp(v.real) + np.ptp(v.imag) == 0:
            raise CalibrationError(f"channel {ch} does not change with the field direction in most rows "
                                   f"(constant value): is its lock-in connected?")


def _choose_start_level(b_nT, knots, nearest_knot):
    """Return the knot index used for the starting axes: a well-filled level near the middle of the range."""
    counts = np.bincount(nearest_knot, minlength=len(knots))
    full = np.flatnonzero(counts >= 0.5 * counts.max())
    mid = np.median(np.log(knots))
    return int(full[np.argmin(np.abs(np.log(knots[full]) - mid))])


def _align_signs(phys: PhysicsParameters, nominal_pumps, nominal_probes) -> None:
    """Axes are fitted up to sign: align with nominal axes, else make the largest component positive."""
    def flip(axis, ref):
        sign = np.sign(axis @ ref) if ref is not None else np.sign(axis[np.argmax(np.abs(axis))])
        return sign if sign != 0 else 1.0

    for j in range(2):
        ref = None if nominal_pumps is None else normalize(nominal_pumps[j])
        if flip(phys.pump_axes[j], ref) < 0:
            phys.flip_axis("pump", j)
    for i in range(phys.probe_axes.shape[0]):
        ref = None if nominal_probes is None else normalize(nominal_probes[i])
        if flip(phys.probe_axes[i], ref) < 0:
            phys.flip_axis("probe", i)


def _cross_validate(design_for, degrees, resid, fold_of, folds, ridge):
    """Return ({degree: held-out residual}, {degree: full-data solution}) of ridge fits of resid (n, C)."""
    heldout, solutions = {}, {}
    for degree in degrees:
        design = design_for(degree)
        gram_total = gram(design)
        rhs_total = gram(design, resid)
        pred = np.empty_like(resid)
        for f in range(folds):
            test = fold_of == f
            dt = design[test]
            sol = _solve_gram(gram_total - gram(dt), rhs_total - gram(dt, resid[test]), ridge)
            pred[test] = rows_times(dt, sol)
        heldout[degree] = resid - pred
        solutions[degree] = _solve_gram(gram_total, rhs_total, ridge)
    return heldout, solutions


def _one_standard_error(heldout: dict, whiten: np.ndarray) -> int:
    """Return the smallest degree whose whitened held-out mean square is within one standard error of the best."""
    per_row = {d: np.mean(np.abs(r * whiten) ** 2, axis=1) for d, r in heldout.items()}
    mse = {d: float(np.mean(v)) for d, v in per_row.items()}
    best = min(mse, key=mse.get)
    limit = mse[best] + float(np.std(per_row[best]) / np.sqrt(per_row[best].size))
    return min(d for d, v in mse.items() if v <= limit)


def _fit_corrections(u, s_basis, resid, nearest_knot, max_degree, folds, ridge, seed, whiten, stepped, b_nT):
    """Return (degrees per knot (K,), scores by degree, held-out residual (N, C), corrections (C, K, J)).

    Each candidate degree's corrections are scored by k-fold held-out residual and the smallest
    degree within one standard error of the best wins: the one-standard-error rule of
    cross-validation (Hastie, Tibshirani and Friedman, 'The Elements of Statistical Learning',
    2009, section 7.10), on residuals whitened by `whiten` (C,) 1/V. A stepped scan's levels are
    chosen one by one (their rows share no correction); a continuous scan's all together.
    """
    n, c_n = resid.shape
    k_n = s_basis.shape[1]
    fold_of = scan_point_folds(u, b_nT, folds, np.random.default_rng(seed))
    groups = [np.flatnonzero(nearest_knot == k) for k in range(k_n)] if stepped else [np.arange(n)]
    chosen = np.full(k_n, -1)
    heldout_all = resid.copy()
    sse = {-1: float(np.sum(np.abs(resid) ** 2))}
    counted = {-1: n}
    top = max_degree
    corrections = np.zeros((c_n, k_n, n_harmonics(max(top, 0))), complex)
    for gi, rows in enumerate(groups):
        m = rows.size
        degrees = [d for d in range(0, max_degree + 1)
                   if m >= MIN_ROWS_PER_PARAMETER * n_harmonics(d)
                   and m * (folds - 1) / folds >= 2 * n_harmonics(d) * (1 if stepped else k_n)]
        if stepped:
            y_all = harmonics(max(degrees), u[rows]) if degrees else None
            design_for = (lambda d, y=y_all: y[:, :n_harmonics(d)])
        else:
            design_for = (lambda d: _correction_design(u, s_basis, d))
        heldout, solutions = _cross_validate(design_for, degrees, resid[rows], fold_of[rows], folds, ridge)
        heldout[-1] = resid[rows]
        for d, r in heldout.items():
            if d >= 0:
                sse[d] = sse.get(d, 0.0) + float(np.sum(np.abs(r) ** 2))
                counted[d] = counted.get(d, 0) + m
        pick = _one_standard_error(heldout, whiten)
        heldout_all[rows] = heldout[pick]
        if pick >= 0:
            sol = solutions[pick]
            if stepped:
                corrections[:, gi, :n_harmonics(pick)] = sol.T
                chosen[gi] = pick
            else:
                corrections[:, :, :n_harmonics(pick)] = sol.T.reshape(c_n, k_n, n_harmonics(pick))
                chosen[:] = pick
    # Scores by degree over the levels that could try it (the rest at their own best), for the summary.
    scores = {d: float(np.sqrt(v / counted[d] / (2 * c_n))) for d, v in sse.items() if counted[d] == n}
    return chosen, scores, heldout_all, corrections


def _physics_table_degree(phys_coef: np.ndarray, noise: np.ndarray) -> int:
    """Return the smallest degree (>= 2) beyond which the physics harmonics are below a fraction of the noise."""
    full = int(round(np.sqrt(phys_coef.shape[2]))) - 1
    power = np.abs(phys_coef) ** 2 / (4 * np.pi)            # sphere mean of |term|^2 (orthonormal Y)
    for degree in range(PHYSICS_DEGREE, full + 1):
        tail = power[:, :, n_harmonics(degree):].sum(axis=2)   # (C, K)
        if np.all(np.sqrt(tail / 2) <= TRUNCATION_FRACTION * noise[:, None]):
            return degree
    return full


def fit_calibration(u: np.ndarray, b_nT: np.ndarray, z: np.ndarray, f: np.ndarray, channels,
                    nominal_pumps: np.ndarray | None = None, nominal_probes: np.ndarray | None = None,
                    max_correction_degree: int = 6, folds: int = 5, cell: str = "Rb",
                    ridge: float = 1e-7, seed: int = 0, line_numbers: np.ndarray | None = None,
                    fit_efficiency: bool = True, fit_detuning: bool = True) -> Calibration:
    """Fit a Calibration from scan arrays: u (N,3) applied direction, b_nT (N,), z (N,C) V, f (N,2) Hz.

    line_numbers (N,): the file line of every row, used only to name rejected rows.
    """
    u = np.asarray(u, float)
    b_nT = np.asarray(b_nT, float)
    z = np.asarray(z, complex)
    f = np.asarray(f, float)
    channels = tuple(channels)
    if not isinstance(folds, (int, np.integer)) or folds < 2:
        raise CalibrationError(f"folds must be an integer of at least 2, got {folds!r}")
    if not isinstance(max_correction_degree, (int, np.integer)) or not -1 <= max_correction_degree <= 10:
        raise CalibrationError(f"max correction degree must be an integer from -1 to 10, got {max_correction_degree!r}")
    n_all = u.shape[0]
    if u.shape != (n_all, 3) or b_nT.shape != (n_all,) or z.shape != (n_all, len(channels)) or f.shape != (n_all, 2):
        raise CalibrationError("scan arrays disagree in shape: u (N,3), b_nT (N,), z (N,C), f (N,2)")
    warnings: list[str] = []

    usable, rejected = _sane_rows(u, b_nT, z, f, channels, line_numbers)
    if usable.sum() < 0.5 * n_all:
        reasons = sorted({r.reason for r in rejected})
        raise CalibrationError(f"{n_all - int(usable.sum())} of {n_all} rows are unusable "
                               f"({', '.join(reasons)}): the scan is not a calibration recording")
    if usable.sum() < 40:
        raise CalibrationError(f"only {int(usable.sum())} usable rows; a calibration needs at least 40")
    idx = np.flatnonzero(usable)
    u, b_nT, z, f = normalize(u[idx]), b_nT[idx], z[idx], f[idx]
    _check_channels(z, channels)

    try:
        candidates = CELL_PAIRS[cell]
    except KeyError:
        raise CalibrationError(f"unknown cell element {cell!r}; known: {', '.join(CELL_PAIRS)}") from None
    isotopes = []
    for j, pump in enumerate("ab"):
        ratio = float(np.median(f[:, j] / b_nT))
        try:
            isotopes.append(identify_isotope(ratio, candidates))
        except ValueError as exc:
            raise CalibrationError(f"pump {pump}: {exc}") from None
    if isotopes[0] == isotopes[1]:
        raise CalibrationError(f"both pumps appear modulated at the {isotopes[0]} Larmor frequency")

    knots = magnitude_knots(b_nT)
    basis = MagnitudeBasis(knots)
    s_all = basis(b_nT)
    nearest_all = np.argmin(np.abs(np.log(b_nT)[:, None] - np.log(knots)[None, :]), axis=1)

    # Robust screening: wild rows must not reach the physics fit.
    n_keep = u.shape[0]
    screen_degree = SCREEN_DEGREE
    while screen_degree > 1 and n_keep < 4 * len(knots) * n_harmonics(screen_degree):
        screen_degree -= 1
    row_alpha = FAMILY_ALPHA / n_keep
    screen = screen_rows(u, s_all, z, screen_degree, row_alpha)
    # The screening model is simpler than the sensor: it only removes rows wild enough to pull the
    # physics fit; the full model's held-out residual then applies the chi-square limit itself.
    outlier_local = screen.statistic > SCREEN_FACTOR * screen.threshold

    def reject_outliers(mask, stat, worst, limit):
        for i in np.flatnonzero(mask):
            rejected.append(RejectedRow(int(idx[i]), None if line_numbers is None else int(line_numbers[idx[i]]),
                                        "outlier", channels[int(worst[i])],
                                        f"whitened residual {stat[i]:.3g} over {2 * len(channels)} components "
                                        f"(limit {limit:.3g})"))

    reject_outliers(outlier_local, screen.statistic, screen.worst_channel, SCREEN_FACTOR * screen.threshold)
    keep = ~outlier_local
    noise0 = screen.scale

    for attempt in range(3):
        uk, bk, zk, sk = u[keep], b_nT[keep], z[keep], s_all[keep]
        result = _fit_inliers(uk, bk, zk, sk, knots, basis, nearest_all[keep], channels, noise0,
                              nominal_pumps, nominal_probes, max_correction_degree, folds, ridge, seed,
                              fit_efficiency, fit_detuning, [])
        stat, worst = row_statistic(result["heldout"], np.maximum(robust_scale(result["heldout"]), 1e-300))
        limit = row_threshold(len(channels), row_alpha)
        late = stat > limit
        if not late.any() or attempt == 2:
            break
        kept_idx = np.flatnonzero(keep)
        mask = np.zeros(keep.shape, bool)
        mask[kept_idx[late]] = True
        full_stat = np.zeros(keep.shape)
        full_stat[kept_idx] = stat
        full_worst = np.zeros(keep.shape, int)
        full_worst[kept_idx] = worst
        reject_outliers(mask, full_stat, full_worst, limit)
        keep &= ~mask
        noise0 = result["noise"]

    rejected.sort(key=lambda r: r.index)
    cal = result["calibration"]
    cal.pump_isotopes = tuple(isotopes)
    cal.rejected_rows = rejected
    cal.warnings = warnings + cal.warnings
    cal.nominal_pump_axes = None if nominal_pumps is None else normalize(nominal_pumps)
    cal.nominal_probe_axes = None if nominal_probes is None else normalize(nominal_probes)
    # The same usable rows give the frequency loops' errors (the model rejects its own outlier rows).
    try:
        cal.magnitude_model = fit_magnitude_model(u, b_nT, f, cal.gammas_hz_per_nt, cal.pump_isotopes, seed=seed)
    except ValueError as exc:
        cal.warnings.append(f"no magnitude model ({exc}): |B| is f / gamma, uncorrected")
    return cal


def _fit_inliers(u, b_nT, z, s_basis, knots, basis, nearest_knot, channels, noise0, nominal_pumps,
                 nominal_probes, max_correction_degree, folds, ridge, seed, fit_efficiency, fit_detuning,
                 warnings) -> dict:
    """Fit physics and corrections to inlier rows; return the Calibration and the held-out residual."""
    n = u.shape[0]
    if n < 40:
        raise CalibrationError(f"only {n} usable rows after outlier rejection; a calibration needs at least 40")
    coverage, sparse = sphere_coverage(u)
    if coverage < 0.5:
        raise CalibrationError(f"the scan covers only {coverage:.0%} of the sphere (at least 50% of "
                               f"60 equal cells need 3 samples); extend the scan")
    if coverage < 0.9:
        warnings.append(f"sphere coverage {coverage:.0%}: the model is extrapolated in {len(sparse)} "
                        f"sparse cells; directions there are less trustworthy")
    per_knot = np.bincount(nearest_knot, minlength=len(knots))
    if len(knots) == 1:
        warnings.append(f"single magnitude {knots[0]:.0f} nT: the model holds only near it; "
                        f"estimates far from it are flagged OUTSIDE_CALIBRATION")
    need = MIN_ROWS_PER_PARAMETER * n_harmonics(PHYSICS_DEGREE)
    if per_knot.min() < need:
        raise CalibrationError(f"magnitude {knots[np.argmin(per_knot)]:.0f} nT has only "
                               f"{per_knot.min()} rows; need at least {need}")

    if nominal_pumps is not None and nominal_probes is not None:
        pump0, probe0 = normalize(nominal_pumps), normalize(nominal_probes)
    else:
        level = nearest_knot == _choose_start_level(b_nT, knots, nearest_knot)
        pump0, probe0 = _init_axes_from_quadratic(u[level], z[level], channels)
    try:
        pfit = fit_physics(u, s_basis, knots, z, channels, pump0, probe0, noise0, fit_efficiency, fit_detuning,
                           points=scan_points(u, b_nT))
    except PhysicsFitError as exc:
        raise CalibrationError(str(exc)) from None
    phys = pfit.params
    _align_signs(phys, nominal_pumps, nominal_probes)
    resid = z - phys.predict(u, s_basis)

    stepped = scan_levels(b_nT, knots)[2]
    per_level, scores, heldout, corr = _fit_corrections(u, s_basis, resid, nearest_knot, max_correction_degree,
                                                        folds, ridge, seed, 1.0 / pfit.noise_std, stepped, b_nT)
    chosen = int(per_level.max())
    noise = np.maximum(np.sqrt(np.mean(np.abs(heldout) ** 2, axis=0) / 2), 1e-300)

    phys_coef = phys.harmonic_coefficients()
    phys_degree = _physics_table_degree(phys_coef, noise)
    degree = max(phys_degree, chosen)
    c_n = len(channels)
    coef = np.zeros((c_n, basis.size, n_harmonics(degree)), complex)
    keep_h = min(n_harmonics(degree), phys_coef.shape[2])
    coef[:, :, :keep_h] = phys_coef[:, :, :keep_h]
    used = min(corr.shape[2], n_harmonics(max(chosen, 0)))
    coef[:, :, :used] += corr[:, :, :used]
    correction_rms = np.sqrt(np.max(np.sum(np.abs(corr) ** 2, axis=2), axis=1) / (4 * np.pi) / 2)
    model = ResponseModel(channels, degree, knots, coef, noise)
    reports = _channel_reports(channels, z, z - heldout, noise)

    std = pfit.parameter_std()
    n_beams = 2 + phys.probe_axes.shape[0]
    fit_info = {"iterations": pfit.iterations, "covariance_inflation": round(float(pfit.inflation), 4),
                "correction_degree_per_knot": [int(d) for d in per_level],
                "physics_residual_V": [float(x) for x in pfit.noise_std],
                "physics_table_degree": phys_degree,
                "covariance_std_deg": [round(float(x), 6) for x in pfit.covariance_std_deg()],
                "level_dispersion": (None if pfit.dispersion is None
                                     else [round(float(x), 4) for x in pfit.dispersion]),
                "misfit_beams": [bool(x) for x in pfit.misfit_beams()]}
    col = 2 * n_beams
    fit_info["terms"] = dict(pfit.terms or {})
    if pfit.terms and pfit.terms["efficiency"]:
        fit_info["efficiency_std"] = std[col:col + 8].reshape(2, 2, 2).tolist()   # [pump, pump of (p.u)^2, re/im]
        col += 8
    if pfit.terms and pfit.terms["detuning"]:
        fit_info["detuning_law_std"] = std[col:col + 8].reshape(2, 2, 2).tolist()
        fit_info["detuning_shape_std"] = std[col + 8:col + 16].reshape(2, 2, 2).tolist()
    params_per_knot = N_LINEAR_TERMS + np.array([n_harmonics(d) if d >= 0 else 0 for d in per_level])
    check = check_magnitudes(coef, knots, noise, b_nT, params_per_knot)
    names = ["pump a", "pump b"] + [f"probe {i + 1}" for i in range(phys.probe_axes.shape[0])]
    for name, misfit, disp in zip(names, pfit.misfit_beams(),
                                  pfit.dispersion if pfit.dispersion is not None else []):
        if misfit:
            warnings.append(f"{name}: its axis moves with the scanned magnitudes more than the noise explains "
                            f"(dispersion {disp:.1f}): the physics model misses an effect that changes with |B|; "
                            f"its sigma is widened by {np.sqrt(disp):.1f}x")
    cal = Calibration(model, phys, ("", ""), chosen, reports, scores, coverage, sparse, n, warnings,
                      direction_std_deg=pfit.direction_std_deg(), correction_rms_V=correction_rms,
                      magnitude_check=check, fit_info=fit_info)
    return {"calibration": cal, "heldout": heldout, "noise": noise}


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
