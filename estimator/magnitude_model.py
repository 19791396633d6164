"""Field magnitude from the pumps' locked frequencies, corrected for the cell's shifts, with its uncertainty.

A frequency loop locks to its isotope's resonance as the cell has it, not to gamma |B|. For isotope
i the error, in nT, is written

    delta_i(u, |B|) = f_i / gamma_i - |B| = sum_e E_e(|B|) sum_k C[i, e, k] Y_k(u)

with Y_k the orthonormal real spherical harmonics (estimator/harmonics.py) of the field direction u
(sensor frame) up to a degree chosen per isotope by held-out residual, and E_e envelopes in |B|
that follow the three effects' laws (x = |B| / reference):

* ``inverse`` 1/x: spin-exchange pulling of the two isotopes' coupled modes, about k0 k1 / dw
  with dw the gap between their frequencies (proportional to |B|), so constant in Hz times 1/|B|
  in nT (docs/references.md, 'Two isotopes coupled by spin exchange');
* ``constant`` 1: the light shift, a fictitious field b_j along each pump axis p_j, which moves
  |B u + b_j p_j| by b_j (p_j . u) to first order (degree 1 in u), independent of |B|;
* ``square`` x^2: the nonlinear Zeeman (heading) shift, proportional to f_L^2 / f_hfs in Hz and so
  to |B|^2 in nT, times the longitudinal polarization, which follows the pumps' projections on u.

Why these and not cubic splines in ln|B| (the response model's magnitude basis): the splines are
clamped outside the knots, where the pulling keeps growing as 1/|B|, and between sparse knots
they interpolate a 1/|B| or |B|^2 law less well than the law itself; three envelopes need only
three scanned magnitudes. With fewer levels the scan cannot separate them: one level keeps only
the constant, two keep two (1/x and 1 below CROSSOVER_NT, 1 and x^2 above).

The coefficients are fitted per isotope by linear least squares (normal equations, column-scaled)
with robust rejection of outlier rows (median absolute deviation, a family-wise normal limit); the
degree is the smallest within 2 % of the best 5-fold held-out residual. The residual std per
isotope (sum of squares over n - p) is the frequency noise in nT: one pooled value, or one per
scanned magnitude level when the levels' variances differ beyond chance (Bartlett's test). The
fitted delta's own error adds the ordinary least-squares prediction variance noise^2 x^T (A^T A)^-1 x
(x the design row at u, |B|): largest at the ends of the scanned range and beyond it.

Correction: each isotope's equation f_i / gamma_i = |B| + delta_i(u, |B|) is solved for |B| by
Newton steps from |B| = f_i / gamma_i. The two values are fused with inverse-variance weights, and
the fused value's variance is w^T S w with S the isotopes' 2 x 2 error covariance: frequency noise
and prediction error (independent) plus the direction uncertainty through d(delta)/du (shared, so
correlated). Where the
direction is unknown the sphere mean of delta is used and its spread over the sphere is the error.
This evaluation, per sample, is compiled in estimator/magnitude_core.py (the live loop corrects a few
samples per call).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from fieldvane.estimator.folds import scan_point_folds
from fieldvane.estimator.harmonics import harmonics, monomial_coefficients, n_harmonics
from fieldvane.estimator.monomials import exponents as monomial_exponents


def _stats():
    """Return scipy.stats, imported only when a magnitude model is fitted (not when one is read)."""
    import scipy.stats

    return scipy.stats

FORMAT_VERSION = 1
ENVELOPES = ("inverse", "constant", "square")
CROSSOVER_NT = 10_000.0      # below, pulling dominates heading (docs/physics.md: 'strongly below roughly 10 uT')
MAX_DEGREE = 4
MIN_ROWS_PER_PARAMETER = 3   # common practice: a few data per fitted parameter
FOLDS = 5
DEGREE_TOLERANCE = 0.02      # smallest degree within 2 % of the best held-out residual (as calibration.py)
IMMATERIAL_NT = 0.001        # our choice: residual differences below 1 pT are immaterial (<< any target here)
FAMILY_ALPHA = 0.01          # chance that a clean scan loses any row to the outlier test (common practice)
MAD_TO_STD = 1.4826          # consistency factor of the MAD for a Gaussian (common practice)
LEVEL_GAP = 0.05             # rows closer than this in ln|B| belong to one scanned level
LEVEL_SPAN = 0.2             # a "level" wider than this in ln|B| is a continuous sweep
MAX_LEVELS = 8
MIN_LEVEL_ROWS = 10          # fewer rows at a level: its noise is the pooled one
HOMOGENEITY_ALPHA = 0.01     # levels' residual variances differ when Bartlett's test rejects at 1 % (common practice)
NEWTON_STEPS = 2


# ------------------------------------------------------------------------------------------ helpers
def _envelope_values(names, b_nT: np.ndarray, reference_nT: float) -> tuple[np.ndarray, np.ndarray]:
    """Return (E (N, n_env), dE/d|B| (N, n_env) per nT) of the named envelopes at |B| = b_nT."""
    x = np.asarray(b_nT, float) / reference_nT
    vals, ders = [], []
    for name in names:
        if name == "inverse":
            vals.append(1.0 / x)
            ders.append(-1.0 / (x * x * reference_nT))
        elif name == "constant":
            vals.append(np.ones_like(x))
            ders.append(np.zeros_like(x))
        elif name == "square":
            vals.append(x * x)
            ders.append(2.0 * x / reference_nT)
        else:
            raise ValueError(f"unknown magnitude envelope {name!r}; known: {', '.join(ENVELOPES)}")
    return np.stack(vals, axis=-1), np.stack(ders, axis=-1)


def _design(names, degree: int, u: np.ndarray, b_nT: np.ndarray, reference_nT: float) -> np.ndarray:
    """Return the least-squares design (N, n_env * (L+1)^2): envelope e times harmonic k, e-major."""
    env, _ = _envelope_values(names, b_nT, reference_nT)
    y = harmonics(degree, u)
    return (env[:, :, None] * y[:, None, :]).reshape(u.shape[0], -1)


def scan_levels(b_nT: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (level magnitudes (L,) nT, level index of each row (N,)): a stepped scan's levels, or quantile bins.

    A continuous scan (more than MAX_LEVELS groups, or a group spanning more than LEVEL_SPAN in
    ln|B|) is cut into MAX_LEVELS bins of equal row counts.
    """
    lb = np.log(np.asarray(b_nT, float))
    order = np.argsort(lb)
    breaks = np.flatnonzero(np.diff(lb[order]) > LEVEL_GAP) + 1
    groups = np.split(order, breaks)
    if len(groups) > MAX_LEVELS or max(np.ptp(lb[g]) for g in groups) > LEVEL_SPAN:
        edges = np.quantile(lb, np.linspace(0, 1, MAX_LEVELS + 1))
        label = np.clip(np.searchsorted(edges, lb, side="right") - 1, 0, MAX_LEVELS - 1)
        used = np.unique(label)
        label = np.searchsorted(used, label)
        groups = [np.flatnonzero(label == k) for k in range(used.size)]
    label = np.empty(lb.size, int)
    centers = np.empty(len(groups))
    for k, g in enumerate(groups):
        label[g] = k
        centers[k] = math.exp(float(np.median(lb[g])))
    return centers, label


def choose_envelopes(levels_nT: np.ndarray) -> tuple[str, ...]:
    """Return the envelope names a scan with these magnitude levels (nT) can separate (see module docstring)."""
    n = len(levels_nT)
    if n >= 3:
        return ENVELOPES
    if n == 2:
        mid = math.exp(float(np.mean(np.log(levels_nT))))
        return ("inverse", "constant") if mid < CROSSOVER_NT else ("constant", "square")
    return ("constant",)


def _robust_std(r: np.ndarray) -> float:
    """Return the MAD-based std of residuals r (nT)."""
    return float(MAD_TO_STD * np.median(np.abs(r - np.median(r))))


def _solve_normal(gram: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Return the least-squares solution from the normal equations (column-scaled; minimum norm if singular)."""
    d = np.sqrt(np.maximum(np.diag(gram), 1e-300))
    sol, *_ = np.linalg.lstsq(gram / np.outer(d, d), rhs / d, rcond=1e-13)
    return sol / d


def _least_squares(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Return the coefficients minimizing |design c - target|^2 (normal equations; the small system is solved exactly)."""
    return _solve_normal(design.T @ design, design.T @ target)


def _kfold_residual(design: np.ndarray, target: np.ndarray, fold_of: np.ndarray, folds: int) -> np.ndarray:
    """Return the k-fold held-out residual (N,) of a least-squares fit (each fold's rows removed from the normal equations)."""
    gram = design.T @ design
    rhs = design.T @ target
    out = np.empty_like(target)
    for f in range(folds):
        test = fold_of == f
        dt = design[test]
        sol = _solve_normal(gram - dt.T @ dt, rhs - dt.T @ target[test])
        out[test] = target[test] - dt @ sol
    return out


def _reject(design: np.ndarray, delta: np.ndarray, keep: np.ndarray, limit: float, rounds: int) -> np.ndarray:
    """Return the kept rows (N,) bool: within `limit` robust sigmas of the fit to the kept rows, refitted until stable."""
    for _ in range(rounds):
        sol = _least_squares(design[keep], delta[keep])
        r = delta - design @ sol
        scale = max(_robust_std(r[keep]), IMMATERIAL_NT)
        new_keep = np.isfinite(delta) & (np.abs(r) <= limit * scale)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    return keep


@dataclass
class IsotopeFit:
    """One isotope's fitted frequency error: degree, coefficients (n_env, (L+1)^2) nT, diagnostics."""

    degree: int
    coef: np.ndarray
    degree_scores: dict[int, float]        # degree -> held-out RMS residual, nT
    rejected: np.ndarray                   # (R,) row indices left out as outliers
    unit_covariance: np.ndarray            # (P, P) (A^T A)^-1: coefficient covariance per unit noise variance


def _fit_isotope(names, u, b_nT, delta, reference_nT, candidates, seed) -> tuple[IsotopeFit, np.ndarray]:
    """Fit one isotope's delta (N,) nT at one of the candidate degrees; return (IsotopeFit, residual (N,) nT, nan where rejected)."""
    n = u.shape[0]
    fold_of = scan_point_folds(u, b_nT, FOLDS, np.random.default_rng(seed))
    n_env = len(names)
    feasible = [d for d in candidates
                if n_env * n_harmonics(d) * MIN_ROWS_PER_PARAMETER <= n * (FOLDS - 1) / FOLDS]
    if not feasible:
        raise ValueError(f"magnitude model: {n} rows are too few for degree {min(candidates)} "
                         f"({n_env} envelopes x {n_harmonics(min(candidates))} harmonics)")
    # Robust start at a low degree (pulling, light shift and heading are all of low degree), then
    # reject rows beyond a family-wise normal limit of the MAD scale, and repeat.
    start = min(feasible[-1], 3)
    limit = float(_stats().norm.isf(FAMILY_ALPHA / (2 * n)))
    keep = _reject(_design(names, start, u, b_nT, reference_nT), delta, np.isfinite(delta), limit, rounds=5)
    scores: dict[int, float] = {}
    for d in feasible:
        design = _design(names, d, u, b_nT, reference_nT)
        r = _kfold_residual(design[keep], delta[keep], fold_of[keep], FOLDS)
        scores[d] = float(np.sqrt(np.mean(r * r)))
    best = min(scores.values())
    chosen = min(d for d, s in scores.items() if s <= max(best * (1 + DEGREE_TOLERANCE), best + IMMATERIAL_NT))
    design = _design(names, chosen, u, b_nT, reference_nT)
    # Final rejection against the chosen model (rows the start model's lower degree misjudged come back).
    keep = _reject(design, delta, keep, limit, rounds=3)
    a = design[keep]
    gram = a.T @ a
    sol = _solve_normal(gram, a.T @ delta[keep])
    p = a.shape[1]
    d = np.sqrt(np.maximum(np.diag(gram), 1e-300))
    unit_cov = np.linalg.pinv(gram / np.outer(d, d), rcond=1e-13, hermitian=True) / np.outer(d, d)
    unit_cov = _round_significant(0.5 * (unit_cov + unit_cov.T))
    # In-sample residuals scaled by sqrt(n / (n - p)): their mean square is then the unbiased
    # estimate of the noise variance (the prediction's own variance is added per sample).
    resid = np.full(n, np.nan)
    n_keep = int(keep.sum())
    resid[keep] = (delta[keep] - a @ sol) * math.sqrt(n_keep / max(n_keep - p, 1))
    coef = sol.reshape(n_env, n_harmonics(chosen))
    return IsotopeFit(chosen, coef, scores, np.flatnonzero(~keep), unit_cov), resid


def _round_significant(x: np.ndarray, digits: int = 8) -> np.ndarray:
    """Return x rounded to `digits` significant digits (an uncertainty needs no more; keeps CAL.json small)."""
    out = np.zeros_like(x)
    nz = x != 0
    mag = np.floor(np.log10(np.abs(x[nz])))
    scale = 10.0 ** (digits - 1 - mag)
    out[nz] = np.round(x[nz] * scale) / scale
    return out


# ------------------------------------------------------------------------------------------ results
@dataclass
class MagnitudeEstimate:
    """Corrected |B| per sample: fused and per isotope (nT), 1-sigma errors (nT), the isotopes' difference's sigma."""

    b_nT: np.ndarray                 # (N,) fused, nan where neither isotope is usable
    b_per_isotope: np.ndarray        # (N, 2) pump a's, pump b's isotope; nan where unusable
    sigma_b_nT: np.ndarray           # (N,) 1-sigma of b_nT
    sigma_per_isotope: np.ndarray    # (N, 2) 1-sigma of each isotope's value
    sigma_difference_nT: np.ndarray  # (N,) 1-sigma of b_a - b_b (correlation through the direction included)
    weights: np.ndarray              # (N, 2) fusion weights (sum 1)


@dataclass
class MagnitudeModel:
    """The fitted frequency errors of both isotopes (module docstring) and their noise; sensor frame, nT."""

    gammas_hz_per_nt: np.ndarray     # (2,) of the isotopes at pumps a, b
    reference_nT: float              # x = |B| / reference in the envelopes
    envelopes: tuple[str, ...]
    degrees: tuple[int, int]
    coef: tuple[np.ndarray, np.ndarray]   # per isotope (n_env, (L_i+1)^2), nT
    noise_levels_nT: np.ndarray      # (L,) scanned magnitude levels
    noise_nT: np.ndarray             # (L, 2) residual std per level and isotope, nT
    unit_covariance: tuple[np.ndarray, np.ndarray]   # per isotope (P_i, P_i): coefficient covariance / noise^2
    range_nT: tuple[float, float]    # scanned magnitude range
    isotopes: tuple[str, str] = ("", "")
    n_rows: int = 0
    rejected_rows: tuple[int, int] = (0, 0)
    degree_scores: tuple[dict, dict] = field(default_factory=lambda: ({}, {}))
    _core: tuple | None = field(default=None, init=False, repr=False, compare=False)   # estimate()'s kernel arrays
    _rows: object = field(default=None, init=False, repr=False, compare=False)         # row_corrector()'s two

    def __post_init__(self) -> None:
        self.gammas_hz_per_nt = np.asarray(self.gammas_hz_per_nt, float)
        self.noise_levels_nT = np.asarray(self.noise_levels_nT, float)
        self.noise_nT = np.asarray(self.noise_nT, float)
        self.coef = tuple(np.asarray(c, float) for c in self.coef)
        self.unit_covariance = tuple(np.asarray(c, float) for c in self.unit_covariance)
        self.envelopes = tuple(self.envelopes)
        self.degrees = tuple(int(d) for d in self.degrees)
        _validate(self)

    # ---------------------------------------------------------------------------------- evaluation
    def _coef_at(self, i: int, b_nT: np.ndarray) -> np.ndarray:
        """Return isotope i's harmonic coefficients (N, K) nT at |B| (N,) nT."""
        env, _ = _envelope_values(self.envelopes, b_nT, self.reference_nT)
        return env @ self.coef[i]

    def delta(self, u: np.ndarray, b_nT: np.ndarray) -> np.ndarray:
        """Return the frequency errors f_i / gamma_i - |B| (N, 2) in nT at directions u (N, 3) and |B| (N,) nT."""
        u = np.atleast_2d(np.asarray(u, float))
        b = np.broadcast_to(np.asarray(b_nT, float), (u.shape[0],))
        out = np.empty((u.shape[0], 2))
        for i in range(2):
            c = self._coef_at(i, b)
            out[:, i] = np.sum(harmonics(self.degrees[i], u) * c, axis=1)
        return out

    def frequencies(self, u: np.ndarray, b_nT: np.ndarray) -> np.ndarray:
        """Return the frequencies (N, 2) in Hz the loops report at directions u (N, 3) and |B| (N,) nT."""
        b = np.asarray(b_nT, float)
        return (b[:, None] + self.delta(u, b)) * self.gammas_hz_per_nt[None, :]

    def noise(self, b_nT: np.ndarray) -> np.ndarray:
        """Return the frequency noise (N, 2) in nT at |B| (N,) nT: per-level residual std, linear in ln|B|, clamped."""
        b = np.atleast_1d(np.asarray(b_nT, float))
        out = np.empty((b.size, 2))
        x = np.log(np.where(np.isfinite(b) & (b > 0), b, self.noise_levels_nT[0]))
        lv = np.log(self.noise_levels_nT)
        for i in range(2):
            out[:, i] = np.interp(x, lv, self.noise_nT[:, i])
        return out

    def estimate(self, f_hz: np.ndarray, u: np.ndarray, u_cov=None) -> MagnitudeEstimate:
        """Return the MagnitudeEstimate from frequencies f_hz (N, 2) Hz and directions u (N, 3), sensor frame.

        u_cov, the direction's uncertainty: None (exact); a number or (N,) array, the total angular
        1-sigma in rad (sqrt of the trace of the 2 x 2 tangent covariance, taken isotropic: the
        tracker's sigma_deg in radians); or (N, 3, 3) covariances of u in the sensor frame, rad^2
        (only the tangent part matters). Rows with a non-finite u or uncertainty use the
        sphere-mean correction, with the correction's spread over the sphere as its error.
        """
        from fieldvane.estimator import magnitude_core as core   # compiled: loaded only where |B| is corrected

        f = np.atleast_2d(np.asarray(f_hz, float))
        n = f.shape[0]
        if f.shape != (n, 2):
            raise ValueError(f"f_hz: expected (N, 2) frequencies (Hz), got shape {f.shape}")
        u = np.require(np.asarray(u, float).reshape(n, 3), np.float64, "CW")
        kind, sigma, cov = core.direction_uncertainty(u_cov, n)
        if self._core is None:
            self._core = self._core_arrays()
        out = core.estimate_rows(np.require(f, np.float64, "CW"), u, kind, sigma, cov, *self._core)
        return MagnitudeEstimate(b_nT=out[:, core.OUT_B], b_per_isotope=out[:, core.OUT_B_ISO:core.OUT_B_ISO + 2],
                                 sigma_b_nT=out[:, core.OUT_SIGMA_B],
                                 sigma_per_isotope=out[:, core.OUT_SIGMA_ISO:core.OUT_SIGMA_ISO + 2],
                                 sigma_difference_nT=out[:, core.OUT_SIGMA_DIFF],
                                 weights=out[:, core.OUT_W:core.OUT_W + 2])

    def row_corrector(self, of_core: bool = False):
        """Return magnitude_core.correct_rows with this model's arrays bound (checked once): the tracker's live rows;
        of_core: correct_core_rows, which reads the directions and flags from the filter core's outputs."""
        bound = self._rows
        if bound is None:
            from fieldvane.estimator import magnitude_core as core
            from fieldvane.kernels import bind

            if self._core is None:
                self._core = self._core_arrays()
            bound = self._rows = (bind(core.correct_rows, *self._core, trusted=True),
                                  bind(core.correct_core_rows, *self._core, trusted=True))
        return bound[of_core]

    def correct(self, f_hz: np.ndarray, u: np.ndarray, u_cov=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Return (|B| (N,) nT, per-isotope |B| (N, 2) nT, 1-sigma of |B| (N,) nT); arguments as in estimate()."""
        est = self.estimate(f_hz, u, u_cov)
        return est.b_nT, est.b_per_isotope, est.sigma_b_nT

    def _core_arrays(self) -> tuple:
        """Return the model as the arrays magnitude_core.estimate_rows takes (zero-padded per isotope)."""
        k = [n_harmonics(d) for d in self.degrees]
        n_env = len(self.envelopes)
        exps = np.array(monomial_exponents(max(self.degrees)))
        coef = np.zeros((2, n_env, max(k)))
        unit_cov = np.zeros((2, n_env * max(k), n_env * max(k)))
        to_harm = np.zeros((2, exps.shape[0], max(k)))
        for i, d in enumerate(self.degrees):
            e_i, t_i = monomial_coefficients(d)
            to_harm[i, :len(e_i), :k[i]] = t_i
            coef[i, :, :k[i]] = self.coef[i]
            unit_cov[i, :n_env * k[i], :n_env * k[i]] = self.unit_covariance[i]
        codes = np.array([ENVELOPES.index(e) for e in self.envelopes], np.int64)
        return (np.array(self.gammas_hz_per_nt, float), codes, float(self.reference_nT),
                np.array(self.degrees, np.int64), coef, unit_cov, exps, to_harm, np.log(self.noise_levels_nT),
                np.array(self.noise_nT, float), NEWTON_STEPS)

    # ---------------------------------------------------------------------------------- reporting
    def effect_sizes(self) -> list[dict]:
        """Return per isotope {envelope: (mean nT, sphere RMS of the direction-dependent part nT, at |B| nT)}.

        Each envelope's part is evaluated where it is largest over the scanned range: the pulling
        (inverse) at the lowest magnitude, the heading term (square) at the highest.
        """
        lo, hi = self.range_nT
        where = {"inverse": lo, "constant": math.sqrt(lo * hi), "square": hi}
        y00 = 1.0 / math.sqrt(4 * math.pi)
        out = []
        for i in range(2):
            sizes = {}
            for e, name in enumerate(self.envelopes):
                b = where[name]
                env, _ = _envelope_values((name,), np.array([b]), self.reference_nT)
                c = env[0, 0] * self.coef[i][e]
                sizes[name] = (float(c[0] * y00), float(np.sqrt(np.sum(c[1:] ** 2) / (4 * math.pi))), b)
            out.append(sizes)
        return out

    def residual_nT(self) -> np.ndarray:
        """Return the largest per-level held-out residual std (2,) nT of each isotope."""
        return self.noise_nT.max(axis=0)

    # ---------------------------------------------------------------------------------- storage
    def to_dict(self) -> dict:
        """Return the model as plain numbers and lists (the CAL.json 'magnitude_model' object)."""
        return {
            "version": FORMAT_VERSION,
            "isotopes": list(self.isotopes),
            "gamma_hz_per_nT": [float(g) for g in self.gammas_hz_per_nt],
            "reference_nT": float(self.reference_nT),
            "envelopes": list(self.envelopes),
            "degrees": list(self.degrees),
            "coefficients_nT": [[[float(v) for v in row] for row in c] for c in self.coef],
            "noise_levels_nT": [float(v) for v in self.noise_levels_nT],
            "noise_nT": [[float(v) for v in row] for row in self.noise_nT],
            "unit_covariance_upper": [[float(v) for v in c[np.triu_indices(c.shape[0])]] for c in self.unit_covariance],
            "range_nT": [float(v) for v in self.range_nT],
            "n_rows": int(self.n_rows),
            "rejected_rows": [int(v) for v in self.rejected_rows],
            "degree_scores_nT": [{str(k): float(v) for k, v in s.items()} for s in self.degree_scores],
        }

    @classmethod
    def from_dict(cls, doc) -> "MagnitudeModel":
        """Return the model stored by to_dict(); ValueError naming the key on anything malformed."""
        if not isinstance(doc, dict):
            raise ValueError(f"magnitude_model: expected an object, got {type(doc).__name__}")
        for key in ("version", "gamma_hz_per_nT", "reference_nT", "envelopes", "degrees", "coefficients_nT",
                    "unit_covariance_upper", "noise_levels_nT", "noise_nT", "range_nT"):
            if key not in doc:
                raise ValueError(f"magnitude_model.{key}: missing")
        if doc["version"] != FORMAT_VERSION or isinstance(doc["version"], bool):
            raise ValueError(f"magnitude_model.version: expected {FORMAT_VERSION}, got {doc['version']!r}")
        envelopes = doc["envelopes"]
        if not isinstance(envelopes, list) or not envelopes or any(e not in ENVELOPES for e in envelopes) \
                or len(set(envelopes)) != len(envelopes):
            raise ValueError(f"magnitude_model.envelopes: expected distinct names from {list(ENVELOPES)}, "
                             f"got {envelopes!r}")
        degrees = doc["degrees"]
        if not isinstance(degrees, list) or len(degrees) != 2 or \
                any(isinstance(d, bool) or not isinstance(d, int) or not 0 <= d <= 10 for d in degrees):
            raise ValueError(f"magnitude_model.degrees: expected two integers 0..10, got {degrees!r}")
        tables = []
        for i, arr in enumerate(_isotope_arrays(doc, "coefficients_nT", "table")):
            want = (len(envelopes), n_harmonics(degrees[i]))
            if arr.shape != want:
                raise ValueError(f"magnitude_model.coefficients_nT[{i}]: expected shape {want}, got {arr.shape}")
            tables.append(arr)
        covs = []
        for i, arr in enumerate(_isotope_arrays(doc, "unit_covariance_upper", "list")):
            p = tables[i].size
            if arr.shape != (p * (p + 1) // 2,):
                raise ValueError(f"magnitude_model.unit_covariance_upper[{i}]: expected {p * (p + 1) // 2} "
                                 f"numbers (upper triangle of {p} x {p}), got shape {arr.shape}")
            full = np.zeros((p, p))
            full[np.triu_indices(p)] = arr
            covs.append(full + np.triu(full, 1).T)
        isotopes = doc.get("isotopes", ["", ""])
        if not isinstance(isotopes, list) or len(isotopes) != 2 or not all(isinstance(s, str) for s in isotopes):
            raise ValueError(f"magnitude_model.isotopes: expected two names, got {isotopes!r}")
        rejected = doc.get("rejected_rows", [0, 0])
        n_rows = doc.get("n_rows", 0)
        if isinstance(n_rows, bool) or not isinstance(n_rows, int) or n_rows < 0:
            raise ValueError(f"magnitude_model.n_rows: expected a non-negative integer, got {n_rows!r}")
        if not isinstance(rejected, list) or len(rejected) != 2 or \
                any(isinstance(v, bool) or not isinstance(v, int) or v < 0 for v in rejected):
            raise ValueError(f"magnitude_model.rejected_rows: expected two non-negative integers, got {rejected!r}")
        scores = doc.get("degree_scores_nT", [{}, {}])
        try:
            scores = tuple({int(k): float(v) for k, v in s.items()} for s in scores)
            if len(scores) != 2:
                raise ValueError
        except (AttributeError, TypeError, ValueError):
            raise ValueError("magnitude_model.degree_scores_nT: expected two objects degree -> nT") from None
        return cls(gammas_hz_per_nt=_number_array(doc["gamma_hz_per_nT"], "gamma_hz_per_nT"),
                   reference_nT=_number(doc["reference_nT"], "reference_nT"),
                   envelopes=tuple(envelopes), degrees=tuple(degrees), coef=tuple(tables), unit_covariance=tuple(covs),
                   noise_levels_nT=_number_array(doc["noise_levels_nT"], "noise_levels_nT"),
                   noise_nT=_number_array(doc["noise_nT"], "noise_nT"),
                   range_nT=tuple(_number_array(doc["range_nT"], "range_nT")),
                   isotopes=tuple(isotopes), n_rows=n_rows, rejected_rows=tuple(rejected), degree_scores=scores)


def _number(value, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ValueError(f"magnitude_model.{key}: expected a finite number, got {value!r}")
    return float(value)


def _isotope_arrays(doc: dict, key: str, what: str):
    """Yield doc[key]'s two arrays of numbers (one per isotope), each checked when reached; ValueError naming the key."""
    value = doc[key]
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"magnitude_model.{key}: expected one {what} per isotope (2)")
    for i, c in enumerate(value):
        yield _number_array(c, f"{key}[{i}]")


def _number_array(value, key: str) -> np.ndarray:
    def check(v):
        if isinstance(v, list):
            for x in v:
                check(x)
        elif isinstance(v, bool) or not isinstance(v, (int, float)):
            raise ValueError(f"magnitude_model.{key}: expected numbers, got {v!r}")
    if not isinstance(value, list):
        raise ValueError(f"magnitude_model.{key}: expected a list of numbers, got {value!r}")
    check(value)
    try:
        arr = np.array(value, dtype=float)
    except ValueError:
        raise ValueError(f"magnitude_model.{key}: rows of unequal length") from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"magnitude_model.{key}: values must be finite")
    return arr


def _validate(model: MagnitudeModel) -> None:
    """Raise ValueError naming the field on an inconsistent model."""
    if model.gammas_hz_per_nt.shape != (2,) or np.any(model.gammas_hz_per_nt <= 0):
        raise ValueError("magnitude_model.gamma_hz_per_nT: expected two positive numbers (Hz/nT)")
    if not (math.isfinite(model.reference_nT) and model.reference_nT > 0):
        raise ValueError(f"magnitude_model.reference_nT: must be > 0, got {model.reference_nT!r}")
    for e in model.envelopes:
        if e not in ENVELOPES:
            raise ValueError(f"magnitude_model.envelopes: unknown {e!r}; known: {', '.join(ENVELOPES)}")
    for i, c in enumerate(model.coef):
        if c.shape != (len(model.envelopes), n_harmonics(model.degrees[i])):
            raise ValueError(f"magnitude_model.coefficients_nT[{i}]: shape {c.shape} does not match "
                             f"{len(model.envelopes)} envelopes x degree {model.degrees[i]}")
        p = c.size
        cov = model.unit_covariance[i]
        if cov.shape != (p, p) or not np.allclose(cov, cov.T, rtol=1e-6, atol=0) or np.any(np.diag(cov) < 0):
            raise ValueError(f"magnitude_model.unit_covariance[{i}]: expected a symmetric ({p}, {p}) matrix "
                             f"with a non-negative diagonal")
    lv = model.noise_levels_nT
    if lv.ndim != 1 or lv.size == 0 or np.any(lv <= 0) or np.any(np.diff(lv) <= 0):
        raise ValueError("magnitude_model.noise_levels_nT: expected increasing positive magnitudes (nT)")
    if model.noise_nT.shape != (lv.size, 2) or np.any(model.noise_nT < 0):
        raise ValueError(f"magnitude_model.noise_nT: expected ({lv.size}, 2) non-negative values (nT)")
    lo, hi = model.range_nT
    if not (0 < lo <= hi):
        raise ValueError(f"magnitude_model.range_nT: expected 0 < low <= high, got {model.range_nT!r}")


# ------------------------------------------------------------------------------------------ fitting
def _level_noise(resid: np.ndarray, label: np.ndarray, n_levels: int) -> np.ndarray:
    """Return the residual std (L,) nT per level; one pooled value when the levels agree (Bartlett's test).

    A level's std from a hundred rows is itself uncertain by several per cent: unless the levels'
    variances differ beyond chance (scipy.stats.bartlett at HOMOGENEITY_ALPHA), the pooled std is
    the better estimate at every level.
    """
    ok = np.isfinite(resid)
    pooled = float(np.sqrt(np.mean(resid[ok] ** 2)))
    groups = [resid[ok & (label == k)] for k in range(n_levels)]
    sizable = [g for g in groups if g.size >= MIN_LEVEL_ROWS]
    if len(sizable) < 2 or pooled == 0.0:
        return np.full(n_levels, pooled)
    # A level whose residuals are all equal (noiseless frequencies) makes Bartlett's statistic
    # log(0): its variance differs from the others' beyond any chance, so keep the levels apart.
    spread_everywhere = all(np.ptp(g) > 0.0 for g in sizable)
    if spread_everywhere and _stats().bartlett(*sizable).pvalue >= HOMOGENEITY_ALPHA:
        return np.full(n_levels, pooled)
    return np.array([float(np.sqrt(np.mean(g * g))) if g.size >= MIN_LEVEL_ROWS else pooled for g in groups])


def fit_magnitude_model(u: np.ndarray, b_nT: np.ndarray, f_hz: np.ndarray, gammas,
                        isotopes: tuple[str, str] = ("", ""), max_degree: int = MAX_DEGREE,
                        degree: int | None = None, seed: int = 0) -> MagnitudeModel:
    """Return the MagnitudeModel fitted to scan rows: applied direction u (N, 3), |B| (N,) nT, frequencies (N, 2) Hz.

    gammas: gamma/2pi (2,) in Hz/nT of the isotopes at pumps a, b. degree: force one harmonic
    degree for both isotopes (else chosen per isotope by 5-fold held-out residual up to max_degree).
    """
    u = np.asarray(u, float)
    b_nT = np.asarray(b_nT, float)
    f = np.asarray(f_hz, float)
    g = np.asarray(gammas, float)
    n = u.shape[0]
    if u.shape != (n, 3) or b_nT.shape != (n,) or f.shape != (n, 2) or g.shape != (2,):
        raise ValueError("magnitude model: expected u (N, 3), b_nT (N,), f_hz (N, 2), gammas (2,)")
    if np.any(~np.isfinite(g)) or np.any(g <= 0):
        raise ValueError(f"magnitude model: gammas must be positive Hz/nT, got {g.tolist()}")
    if not (isinstance(max_degree, (int, np.integer)) and 0 <= max_degree <= 10):
        raise ValueError(f"magnitude model: max_degree must be an integer 0..10, got {max_degree!r}")
    if degree is not None and not (isinstance(degree, (int, np.integer)) and 0 <= degree <= 10):
        raise ValueError(f"magnitude model: degree must be an integer 0..10, got {degree!r}")
    with np.errstate(invalid="ignore"):
        norm_u = np.linalg.norm(u, axis=1)
        usable = np.isfinite(norm_u) & (norm_u > 0) & np.isfinite(b_nT) & (b_nT > 0)
    if usable.sum() < 10:
        raise ValueError(f"magnitude model: only {int(usable.sum())} usable rows (need at least 10)")
    idx = np.flatnonzero(usable)
    u, b, f = u[idx] / norm_u[idx, None], b_nT[idx], f[idx]
    levels, label = scan_levels(b)
    names = choose_envelopes(levels)
    reference = math.exp(float(np.mean(np.log(levels))))
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = f / g[None, :] - b[:, None]
    delta = np.where(np.isfinite(delta) & (f > 0), delta, np.nan)
    fits, resids = [], []
    candidates = list(range(max_degree + 1)) if degree is None else [int(degree)]
    for i in range(2):
        fit, resid = _fit_isotope(names, u, b, delta[:, i], reference, candidates, seed + i)
        fits.append(fit)
        resids.append(resid)
    noise = np.column_stack([_level_noise(r, label, levels.size) for r in resids])
    return MagnitudeModel(gammas_hz_per_nt=g, reference_nT=reference, envelopes=names,
                          degrees=(fits[0].degree, fits[1].degree), coef=(fits[0].coef, fits[1].coef),
                          noise_levels_nT=levels, noise_nT=noise,
                          unit_covariance=(fits[0].unit_covariance, fits[1].unit_covariance), range_nT=(float(b.min()), float(b.max())),
                          isotopes=tuple(isotopes), n_rows=int(idx.size),
                          rejected_rows=(int(fits[0].rejected.size), int(fits[1].rejected.size)),
                          degree_scores=(fits[0].degree_scores, fits[1].degree_scores))
