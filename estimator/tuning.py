"""Tuning math: measurement noise from best-fit residuals, process noise by innovation likelihood.

Measurement noise. At one sample's best-fit direction (the snapshot inverse) the whitened residual
is r = (I - H) e to first order, e the whitened noise and H = J J^+ the hat matrix of the fitted
parameters (two tangent angles, plus one log-gain per probe when the solver is gain-free). With a_j
the ratio of true to calibrated noise std of real measurement j, E[r_k^2] = sum_j (I - H)_kj^2 a_j^2:
the field's motion does not enter, only the noise. The ratios (one per channel, the same for X and
Y) are found in windows of consecutive samples: each window's mean square against its expectation,
then the median over windows, corrected to the mean by the chi-square median, so that outliers and
noise bursts, which spoil a minority of windows, do not pull the answer.

FilterSettings carries one measurement_noise_scale (a factor on every channel's calibrated noise),
not one per channel. The per-channel ratios are reported; the scale set is their root mean square,
the maximum-likelihood common factor for them.

Process noise. The innovation log-likelihood of the recording (fieldvane.estimator.innovation, all
candidates' filters advanced together) is maximized over a grid in log10 of angle random walk and
rate random walk (and the gain and phase drift rates when enabled), refined a few rounds: each
round centers a grid on the best so far, one previous grid step (at most half the previous span)
either side. Of the candidates statistically indistinguishable from the best (TIE_LOGLIK), the
most cautious is kept.

Accuracy floor. A calibration error is a direction bias that innovations cannot reveal, so for a
still or smoothly turning field the likelihood keeps falling toward zero process noise and the
filter would claim far more accuracy than the calibration supports. The angle random walk is
therefore kept at or above the value whose steady state matches the calibration's statistical
accuracy (calibration_error_ratio, angle_random_walk_for_floor).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from scipy.stats import chi2

from fieldvane.estimator.calibration import Calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.fisher import probe_groups, tangent_jacobian
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.innovation import InnovationScores, innovation_loglik
from fieldvane.estimator.response import to_real
from fieldvane.estimator.samples import SampleBlock

# progress(done, total, stage): called before and after each piece of work (units of `stage`).
Progress = Callable[[int, int, str], None]

# Snapshot rows whose residual does not measure noise: no fit, or maybe the wrong branch.
_UNUSABLE = int(EstimateFlag.BAD_INPUT | EstimateFlag.AMBIGUOUS | EstimateFlag.LOW_SIGNAL)
_MIN_WINDOWS = 5
_CHUNK = 8192          # samples per vectorized residual pass (bounds memory)
OUTLIER_ALPHA = 1e-4   # a sample is an outlier when its residual is this unlikely (costs ~0.1% of variance)


@dataclass(frozen=True)
class Knob:
    """One tuned setting: its log10 search range for the first round and hard log10 limits."""

    name: str
    unit: str
    first_round: tuple[float, float]
    limits: tuple[float, float]


KNOBS = {
    "angle_random_walk_deg_rt_s": Knob("angle_random_walk_deg_rt_s", "deg/sqrt(s)", (-4.0, 0.0), (-7.0, 1.5)),
    "rate_random_walk_deg_s_rt_s": Knob("rate_random_walk_deg_s_rt_s", "(deg/s)/sqrt(s)", (-3.0, 2.0), (-6.0, 4.0)),
    "gain_drift_per_rt_s": Knob("gain_drift_per_rt_s", "1/sqrt(s)", (-6.0, -2.0), (-9.0, 0.0)),
    "phase_drift_deg_rt_s": Knob("phase_drift_deg_rt_s", "deg/sqrt(s)", (-4.0, 0.0), (-7.0, 1.5)),
}
# Candidates within this much log-likelihood of the best are statistically indistinguishable from it
# (2 delta logL < 1: the 68% profile-likelihood interval of one parameter); the one with the most
# process noise is taken, so a flat likelihood (a still or smoothly turning field) leaves the filter
# cautious rather than at whatever tiny value rounding favoured. Common practice in model selection
# (the one-standard-error rule), here leaning toward the more cautious filter.
TIE_LOGLIK = 0.5
MOTION_KNOBS = ("angle_random_walk_deg_rt_s", "rate_random_walk_deg_s_rt_s")
# drift name -> (switch setting, rate setting)
DRIFTS = {"gain": ("gain_drift", "gain_drift_per_rt_s"), "phase": ("phase_drift", "phase_drift_deg_rt_s")}


# ----------------------------------------------------------------------------- measurement noise

@dataclass(frozen=True)
class NoiseEstimate:
    """Per-channel noise from best-fit residuals: std of X and of Y (V), ratio to calibrated, common scale."""

    channels: tuple[str, ...]
    calibrated_std_V: np.ndarray    # (C,) the calibration's noise_std
    std_V: np.ndarray               # (C,) estimated
    ratio: np.ndarray               # (C,) std_V / calibrated_std_V
    scale: float                    # RMS of ratio: the measurement_noise_scale to use
    samples: int                    # samples whose residuals were used
    windows: int                    # windows of `window` samples behind the medians
    window: int
    outliers: int = 0               # samples dropped as outliers
    single_sample_deg: float = math.nan  # median single-sample bound (CRLB) at the calibrated noise, deg


def decimate(block: SampleBlock, max_samples: int | None) -> tuple[SampleBlock, int]:
    """Return (every k-th sample of block, k) with k the smallest step leaving at most max_samples rows."""
    n = len(block)
    if max_samples is None or n <= max_samples:
        return block, 1
    if max_samples < 1:
        raise ValueError(f"max_samples must be at least 1 (got {max_samples})")
    k = -(-n // int(max_samples))
    sl = slice(None, None, k)
    out = SampleBlock(t=block.t[sl], f=block.f[sl], z=block.z[sl], channels=block.channels,
                      applied_b_nT=None if block.applied_b_nT is None else block.applied_b_nT[sl],
                      truth={key: v[sl] for key, v in block.truth.items()}, metadata=dict(block.metadata),
                      skipped_rows=block.skipped_rows)
    return out, k


def residual_statistics(model, z: np.ndarray, u: np.ndarray, b_nT: np.ndarray,
                        gains: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Return (whitened residual squares per channel (N, C), M (N, C, C)) at best-fit directions u (N, 3).

    z (N, C) complex V in the model's channel order; gains (N, P) per probe when fitted, else None.
    M[n, c, d] sums (I - H)_kj^2 over k in channel c's X/Y and j in channel d's X/Y, so that
    E[residual square of c] = sum_d M[c, d] a_d^2 for noise std ratios a (H: hat matrix of the fit).
    """
    sigma = model.noise_std
    zm, jac, _, _ = tangent_jacobian(model, u, b_nT)                     # (N, C), (N, C, 2)
    if gains is not None:
        _, member = probe_groups(model.channels)
        g = gains @ member.T                                             # (N, C)
        zm, jac = zm * g, jac * g[:, :, None]
        # d Z / d(log gain of probe p) = Z on that probe's channels.
        jac = np.concatenate([jac, zm[:, :, None] * member[None, :, :]], axis=2)
    resid = to_real((z - zm) / sigma)                                    # (N, 2C)
    cols = [to_real(jac[:, :, k] / sigma) for k in range(jac.shape[2])]
    j = np.stack(cols, axis=2)                                           # (N, 2C, p)
    # Hat matrix from the SVD: H = U U^T over the columns that carry information.
    uu, s, _ = np.linalg.svd(j, full_matrices=False)
    keep = s > 1e-9 * s[:, :1]
    uu = uu * keep[:, None, :]
    hat = uu @ np.swapaxes(uu, 1, 2)
    m = (np.eye(j.shape[1]) - hat) ** 2                                  # (N, 2C, 2C)
    n, c = z.shape
    per_channel = m.reshape(n, c, 2, c, 2).sum(axis=(2, 4))
    return (resid ** 2).reshape(n, c, 2).sum(axis=2), per_channel


def noise_ratios_from_windows(q: np.ndarray, m: np.ndarray, dof: np.ndarray,
                              iterations: int = 100, tol: float = 1e-10) -> np.ndarray:
    """Return noise std ratios a (C,) with median over windows of q / (m @ a^2) equal to the chi-square median.

    q (W, C): window sums of residual squares; m (W, C, C): their expectation per unit a_d^2;
    dof (C,): typical degrees of freedom of one window's sum (sets the median-to-mean factor).
    """
    kappa = chi2.median(dof) / dof                   # median of chi2_k / k, a little below 1
    a2 = np.ones(q.shape[1])
    for _ in range(iterations):
        expected = m @ a2                            # (W, C)
        factor = np.median(q / expected, axis=0) / kappa
        a2_new = a2 * factor
        done = np.max(np.abs(a2_new / a2 - 1.0)) < tol
        a2 = a2_new
        if done:
            break
    return np.sqrt(a2)


def measurement_noise(calibration: Calibration, solver, block: SampleBlock, window: int | None = None) -> NoiseEstimate:
    """Return the per-channel noise of `block` (V, X and Y alike) from the snapshot solver's best fits.

    solver: a SnapshotSolver for this calibration (gain-free solvers also fit one log-gain per probe).
    window: samples per window (default: N/16 clipped to 8..64).
    """
    model = calibration.model
    names = tuple(block.channels)
    missing = [c for c in model.channels if c not in names]
    if missing:
        raise ValueError(f"samples lack calibrated channel(s) {', '.join(missing)}")
    z = np.asarray(block.z, complex)[:, [names.index(c) for c in model.channels]]
    res = solver.solve(z, block.f, block.t, model.channels)
    ok = ((res.flags & _UNUSABLE) == 0) & np.isfinite(res.chi2) & np.all(np.isfinite(res.u), axis=1)
    rows = np.flatnonzero(ok)
    n = rows.size
    if window is None:
        window = int(np.clip(n // 16, 8, 64))
    n_windows = n // window
    if n_windows < _MIN_WINDOWS:
        raise ValueError(f"too few usable samples for a noise estimate: {n} (need {_MIN_WINDOWS * window})")
    parts = []
    for start in range(0, n, _CHUNK):
        sel = rows[start:start + _CHUNK]
        parts.append(residual_statistics(model, z[sel], res.u[sel], res.b_nT[sel],
                                         res.gains[sel] if solver.gain_free else None))
    q, m = (np.concatenate(x) for x in zip(*parts))
    # Degrees of freedom of one sample's residual: trace(I - H) = sum of m (I - H is a projection).
    dof_sample = m.sum(axis=(1, 2))
    keep = np.ones(n, bool)
    for _ in range(5):
        ratio, n_windows = _window_ratios(q[keep], m[keep], window)
        # Single-sample outliers spoil many windows at once: drop samples whose residual is beyond the
        # 1 - OUTLIER_ALPHA quantile of its (scaled) chi-square, then estimate again on the rest.
        expected = np.einsum("ncd,d->n", m, ratio ** 2)
        stat = q.sum(axis=1) * dof_sample / expected
        new_keep = stat <= chi2.ppf(1.0 - OUTLIER_ALPHA, dof_sample)
        if np.array_equal(new_keep, keep) or new_keep.sum() < _MIN_WINDOWS * window:
            break
        keep = new_keep
    else:
        ratio, n_windows = _window_ratios(q[keep], m[keep], window)
    used = int(keep.sum())
    cal_std = np.asarray(model.noise_std, float).copy()
    return NoiseEstimate(tuple(model.channels), cal_std, ratio * cal_std, ratio,
                         float(np.sqrt(np.mean(ratio ** 2))), used, int(n_windows), int(window), n - used,
                         float(np.median(res.sigma_deg[rows][keep])))


def _window_ratios(q: np.ndarray, m: np.ndarray, window: int) -> tuple[np.ndarray, int]:
    """Return (noise std ratios (C,), windows used) from per-sample q (N, C) and m (N, C, C)."""
    n_windows = q.shape[0] // window
    c = q.shape[1]
    rows = n_windows * window
    q_w = q[:rows].reshape(n_windows, window, c).sum(axis=1)
    m_w = m[:rows].reshape(n_windows, window, c, c).sum(axis=1)
    # Degrees of freedom of a window's sum: its expectation at equal noise (the trace of I - H per channel).
    dof = np.maximum(np.median(m_w.sum(axis=2), axis=0), 1.0)
    return noise_ratios_from_windows(q_w, m_w, dof), n_windows


# ----------------------------------------------------------------------------- accuracy floor

def calibration_error_ratio(calibration: Calibration) -> float:
    """Return sqrt(parameters per channel / scan rows): the calibrated model's statistical error per channel
    as a fraction of the noise std (a least-squares fit's average prediction variance is sigma^2 p / n);
    0 when the scan's row count is unknown."""
    _, knots, harmonics_per_knot = calibration.model.coef.shape
    rows = int(getattr(calibration, "n_rows", 0) or 0)
    return math.sqrt(knots * harmonics_per_knot / rows) if rows > 0 else 0.0


def angle_random_walk_for_floor(floor_deg: float, single_sample_deg: float, dt_s: float) -> float:
    """Return the angle random walk (deg/sqrt(s)) at which a still field's filter settles at sigma = sqrt(2) floor_deg.

    A calibration error of total std floor_deg (floor^2 / 2 per axis) is a bias that innovations
    cannot see. A filter with white angle noise q and gain K << 1 holds P = K R per axis while its
    own averaging error is only K R / 2, so P = floor^2 per axis (trace 2 floor^2) matches averaging
    error plus bias. With R = bound^2 / 2 per axis and the steady state P^2 = q dt R,
    sqrt(q) = sqrt(2) floor^2 / (bound sqrt(dt)).
    """
    if not (floor_deg > 0 and single_sample_deg > 0 and dt_s > 0) or not math.isfinite(single_sample_deg):
        return 0.0
    f, b = math.radians(floor_deg), math.radians(single_sample_deg)
    return math.degrees(math.sqrt(2.0) * f * f / (b * math.sqrt(dt_s)))


def median_step_s(t: np.ndarray) -> float:
    """Return the median positive time step of t (s), nan when there is none."""
    d = np.diff(np.asarray(t, float))
    d = d[np.isfinite(d) & (d > 0)]
    return float(np.median(d)) if d.size else math.nan


# ----------------------------------------------------------------------------- process noise

@dataclass
class ScoreTable:
    """Every evaluated candidate: tuned values (linear units, KNOBS), round (0: the reference) and scores."""

    names: tuple[str, ...]
    values: np.ndarray            # (N, d)
    round: np.ndarray             # (N,)
    loglik: np.ndarray            # (N,) innovation log-likelihood (larger is better)
    mean_nis: np.ndarray          # (N,) mean NIS of fused samples (2C expected)
    fraction_gated: np.ndarray    # (N,)
    reacquisitions: np.ndarray    # (N,)

    def __len__(self) -> int:
        return int(self.loglik.shape[0])

    def best(self, tolerance: float = 0.0) -> int:
        """Return the row of the largest log-likelihood among searched rows (round > 0); with tolerance > 0,
        the row with the most process noise (largest product of tuned values) within tolerance of it."""
        ll = np.where(np.isfinite(self.loglik) & (self.round > 0), self.loglik, -np.inf)
        top = int(np.argmax(ll))
        if tolerance <= 0 or not np.isfinite(ll[top]):
            return top
        close = np.flatnonzero(ll >= ll[top] - tolerance)
        size = np.log10(self.values[close]).sum(axis=1)
        return int(close[np.argmax(size)])

    def rows(self) -> list[dict]:
        """Return the table as dicts (setting values, round, loglik, mean_nis, fraction_gated, reacquisitions)."""
        out = []
        for i in range(len(self)):
            row = {name: float(self.values[i, k]) for k, name in enumerate(self.names)}
            row.update(round=int(self.round[i]), loglik=float(self.loglik[i]), mean_nis=float(self.mean_nis[i]),
                       fraction_gated=float(self.fraction_gated[i]), reacquisitions=int(self.reacquisitions[i]))
            out.append(row)
        return out


@dataclass
class SearchResult:
    """Outcome of the process-noise search: the best settings, the score table and how it was searched."""

    settings: FilterSettings
    table: ScoreTable
    best_index: int
    points_per_axis: int
    rounds: int
    lower_limits: dict[str, float]          # linear units; a best value on its limit means the limit binds
    reference_index: int | None = None

    def at_limit(self) -> list[str]:
        """Return the tuned names whose best value sits on a lower limit set by the caller."""
        out = []
        for k, name in enumerate(self.table.names):
            lim = self.lower_limits.get(name)
            if lim is not None and self.table.values[self.best_index, k] <= lim * (1 + 1e-9):
                out.append(name)
        return out


@dataclass
class TuneResult:
    """Tuned filter settings with the noise estimate, the search behind them and the accuracy floor used."""

    settings: FilterSettings
    noise: NoiseEstimate
    search: SearchResult
    decimation: int               # every k-th sample was used
    samples_used: int
    floor_deg: float              # calibration accuracy floor (deg, 1-sigma total); 0: none
    floor_arw_deg_rt_s: float     # the angle random walk it implies (lower limit of the search)


def tuned_names(drifts: Sequence[str] = ()) -> tuple[str, ...]:
    """Return the names of the settings searched: the motion knobs plus the enabled drift rates."""
    unknown = [d for d in drifts if d not in DRIFTS]
    if unknown:
        raise ValueError(f"unknown drift(s) {', '.join(unknown)}; known: {', '.join(DRIFTS)}")
    return MOTION_KNOBS + tuple(DRIFTS[d][1] for d in DRIFTS if d in drifts)


def points_per_axis(candidates: int | None, dims: int) -> int:
    """Return grid points per axis so that points**dims is at most `candidates` (at least 3).

    None: 6 points for one or two tuned settings, 4 for three, 3 for four (36, 64, 81 candidates).
    """
    if candidates is None:
        return {1: 6, 2: 6, 3: 4}.get(dims, 3)
    return max(3, int(math.floor(candidates ** (1.0 / dims) + 1e-9)))


def log_grid(center: np.ndarray, half_span: np.ndarray, points: int, limits: np.ndarray) -> np.ndarray:
    """Return the (<= points**d, d) grid of log10 values center +- half_span per axis, clipped to limits (d, 2)."""
    axes = [np.unique(np.clip(np.linspace(c - h, c + h, points), lo, hi))
            for c, h, (lo, hi) in zip(center, half_span, limits)]
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.stack([g.ravel() for g in mesh], axis=1)


def settings_grid(base: FilterSettings, names: Sequence[str], log_values: np.ndarray) -> list[FilterSettings]:
    """Return copies of base with settings `names` set to 10**log_values (N, d)."""
    return [base.replace(**{name: float(10.0 ** v) for name, v in zip(names, row)}) for row in log_values]


def score_settings(calibration: Calibration, block: SampleBlock, candidates: Sequence[FilterSettings], initiator,
                   batch_size: int | None = None, progress: Progress | None = None,
                   stage: str = "candidates") -> InnovationScores:
    """Return the innovation scores of every candidate; each batch (default: all) runs its filters together."""
    candidates = list(candidates)
    n = len(candidates)
    if n == 0:
        raise ValueError("no candidates to score")
    size = n if not batch_size else max(1, int(batch_size))
    parts = []
    if progress is not None:
        progress(0, n, stage)
    for start in range(0, n, size):
        parts.append(innovation_loglik(calibration, block, candidates[start:start + size], initiator))
        if progress is not None:
            progress(min(start + size, n), n, stage)
    return InnovationScores(*(np.concatenate([np.asarray(p[k], float) for p in parts]) for k in range(4)))


def search_process_noise(calibration: Calibration, block: SampleBlock, base: FilterSettings, initiator,
                         drifts: Sequence[str] = (), candidates: int | None = None, rounds: int = 4,
                         lower_limits: dict[str, float] | None = None, batch_size: int | None = None,
                         progress: Progress | None = None, reference: FilterSettings | None = None,
                         tie_loglik: float = TIE_LOGLIK) -> SearchResult:
    """Return the settings maximizing the innovation log-likelihood over coarse-to-fine log10 grids.

    base supplies every setting not searched (measurement_noise_scale included); drifts ('gain',
    'phase') switch those drift states on and add their rates to the search. candidates: grid size
    per round (rounded down to points**d, at least 3 points per axis; None: see points_per_axis). lower_limits: name -> least
    value allowed (linear units), e.g. the accuracy floor's angle random walk. reference: one more
    candidate scored with the first round (round 0 in the table), e.g. the settings before tuning.
    Grids refine around the largest likelihood; the result is the most cautious candidate (largest
    process noise) within tie_loglik of it (0: the maximum itself).
    """
    if rounds < 1:
        raise ValueError(f"rounds must be at least 1 (got {rounds})")
    names = tuned_names(drifts)
    base = base.replace(**{DRIFTS[d][0]: True for d in drifts})
    lower_limits = {k: float(v) for k, v in (lower_limits or {}).items() if v and v > 0}
    d = len(names)
    p = points_per_axis(candidates, d)
    limits = np.array([KNOBS[k].limits for k in names], float)
    for k, name in enumerate(names):
        if name in lower_limits:
            limits[k, 0] = min(max(limits[k, 0], math.log10(lower_limits[name])), limits[k, 1])
    first = np.clip(np.array([KNOBS[k].first_round for k in names], float), limits[:, :1], limits[:, 1:])
    center, half = first.mean(axis=1), 0.5 * (first[:, 1] - first[:, 0])
    half = np.maximum(half, 0.5)   # a range squeezed by a limit still spans a decade
    seen: set[tuple] = set()
    logs: list[np.ndarray] = []
    round_of: list[int] = []
    scores: list[tuple] = []
    reference_index = None
    for r in range(1, rounds + 1):
        grid = log_grid(center, half, p, limits)
        fresh = [row for row in grid if tuple(np.round(row, 9)) not in seen]
        extra = [reference] if (r == 1 and reference is not None) else []
        if fresh or extra:
            batch = settings_grid(base, names, np.array(fresh)) if fresh else []
            s = score_settings(calibration, block, batch + extra, initiator, batch_size, progress,
                               stage=f"round {r}/{rounds}")
            columns = [np.asarray(v, float) for v in s]
            for k, row in enumerate(fresh):
                seen.add(tuple(np.round(row, 9)))
                logs.append(row)
                round_of.append(r)
                scores.append(tuple(c[k] for c in columns))
            if extra:
                reference_index = len(logs)
                logs.append(np.log10([getattr(reference, k) for k in names]))
                round_of.append(0)
                scores.append(tuple(c[-1] for c in columns))
        ll = np.array([sc[0] for sc in scores], float)
        ll = np.where(np.isfinite(ll) & (np.array(round_of) > 0), ll, -np.inf)
        # Next round: one grid step of this round either side of the best so far, and at most half
        # this round's span (with 3 points a step is the whole half-span).
        center, half = np.asarray(logs[int(np.argmax(ll))], float), min(2.0 / (p - 1), 0.5) * half
    arr = np.array(scores, float)
    table = ScoreTable(names, 10.0 ** np.array(logs, float), np.array(round_of), arr[:, 0], arr[:, 1],
                       arr[:, 2], arr[:, 3])
    best = table.best(tie_loglik)
    settings = base.replace(**{name: float(table.values[best, k]) for k, name in enumerate(names)})
    return SearchResult(settings, table, best, p, rounds, lower_limits, reference_index)


def tune(calibration: Calibration, block: SampleBlock, solver, base: FilterSettings | None = None,
         drifts: Sequence[str] = (), candidates: int | None = None, rounds: int = 4, max_samples: int | None = 20_000,
         floor_deg: float | None = None, noise_solver=None, batch_size: int | None = None,
         progress: Progress | None = None) -> TuneResult:
    """Return tuned FilterSettings: noise scale from residuals, process noise by innovation likelihood.

    solver: the SnapshotSolver of this calibration (its `initiate` acquires every candidate's track);
    noise_solver: the one whose best fits give the noise residuals (default: solver; pass a gain-free
    solver when gains drift). max_samples: longer blocks are decimated to every k-th sample for the
    noise estimate and the search. floor_deg: the calibration accuracy floor (deg, 1-sigma total;
    None: from the calibration's size, calibration_error_ratio times the median single-sample
    bound; 0: none); its angle random walk is the search's lower limit. The table's reference row
    is `base` as given (defaults when None).
    """
    base = base if base is not None else FilterSettings()
    used, k = decimate(block, max_samples)
    if progress is not None:
        progress(0, 1, "noise")
    noise = measurement_noise(calibration, noise_solver if noise_solver is not None else solver, used)
    if progress is not None:
        progress(1, 1, "noise")
    if floor_deg is None:
        floor_deg = calibration_error_ratio(calibration) * noise.single_sample_deg
    floor_deg = float(floor_deg) if math.isfinite(floor_deg) else 0.0
    # The floor holds for the filter run on every sample, so it uses the full-rate step.
    floor_arw = angle_random_walk_for_floor(floor_deg, noise.scale * noise.single_sample_deg, median_step_s(block.t))
    start = base.replace(measurement_noise_scale=noise.scale)
    search = search_process_noise(calibration, used, start, solver.initiate, drifts, candidates, rounds,
                                  {"angle_random_walk_deg_rt_s": floor_arw}, batch_size, progress, reference=base)
    return TuneResult(search.settings, noise, search, k, len(used), floor_deg, floor_arw)
