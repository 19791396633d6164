"""Tuning: which drift states the filter carries and how much noise it expects, chosen from a recording.

Measurement noise and the lock-in's correlation (estimator/noise_correlation.py): each channel's
noise level from second differences of the lock-in values, which cancel anything constant or linear
over a few samples, so a slow gain or phase drift cannot pass for white noise; the lock-in's RC
filter (time constant, order) fitted from how those differences grow with the lag, unless the
recording or the settings state it. The channels' relative levels go into channel_noise_scale (with
measurement_noise_scale = 1; the tracker learns the common level from the stream), the filter into
lockin_time_constant_s / lockin_filter_order.

Process noise, per state set. Three sets of states are compared: 'none' (direction and rate only),
'gain' (plus a log-gain per probe) and 'gain+phase' (plus a phase offset per channel). Each set's
process noise (the motion knobs plus that set's drift rates) maximizes the innovation log-likelihood
(estimator/innovation.py: the tracker's own compiled filter): a coarse grid in log10, then a compass
search (each knob a step and half a step up and down, scored together; move to the best, else shrink
the step) down to an eighth of a decade; then each knob is raised, one quarter decade at a time, as
far as the likelihood stays within TIE_LOGLIK of the best (a flat likelihood leaves the filter
cautious). The sets' candidates share scoring calls; a set far behind another stops early.

Decimation. The search runs on every k-th sample. The settings are continuous-time (per sqrt(s)),
so they hold at any rate, and k is at least the lag at which the lock-in's correlation has fallen
below DECORRELATED: the filter's likelihood treats samples as independent (correlated noise enters
only through the bandwidth factor kappa), which they then nearly are.

Choice of set: the Bayesian information criterion, BIC = -2 logL + p ln T, with p the set's tuned
settings and T the search's samples. The innovation likelihood is prequential: every sample is
predicted before the filter has seen it, so the extra states (and their initial uncertainty) are
scored out of sample and pay for themselves in it; only the tuned rates are fitted to the same data,
and BIC charges ln T for each. A held-out split is not used: a bench drift often happens once, in
one half. BIC alone is not enough, though: the calibrated model errs slowly with direction, and
drift states absorb part of that error as if the sensor drifted (on the simulator's drift-free and
drifting streams the phase states raised logL by 0.1-0.2 per sample while pulling the direction
0.15-0.2 deg off with a sigma of 0.05 deg). So a richer set (none -> gain -> gain+phase) replaces a
simpler one only when it lowers BIC by more than twice the log-likelihood that absorbing the
calibration's model error could add (model_error_allowance): a real drift wins by far more.

Accuracy floor. A calibration error is a direction bias that innovations cannot reveal, so for a
still or smoothly turning field the likelihood keeps falling toward zero process noise and the
filter would claim more accuracy than the calibration supports. The angle random walk is kept at or
above the value whose steady state matches the calibration's statistical accuracy
(calibration_error_ratio, angle_random_walk_for_floor), counting the correlated rows of a scan taken
through a lock-in (the calibration's covariance inflation) and the stream's own correlation (kappa).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from fieldvane.estimator.calibration import Calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.fisher import crlb_deg
from fieldvane.estimator.tracker_model import TrackerModel
from fieldvane.estimator.innovation import InnovationScores, innovation_loglik
from fieldvane.estimator.lockin_noise import autocorrelation, correlation_factor
from fieldvane.estimator.noise_correlation import NoiseFit, fit_noise
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.tracker import Tracker

# progress(done, total, stage): called before and after each piece of work (units of `stage`).
Progress = Callable[[int, int, str], None]


@dataclass(frozen=True)
class Knob:
    """One tuned setting: its unit, its coarse-grid values (log10) and hard log10 limits."""

    name: str
    unit: str
    coarse: tuple[float, ...]
    limits: tuple[float, float]


KNOBS = {
    "angle_random_walk_deg_rt_s": Knob("angle_random_walk_deg_rt_s", "deg/sqrt(s)", (-4.0, -3.0, -2.0, -1.0, 0.0),
                                       (-7.0, 1.5)),
    "rate_random_walk_deg_s_rt_s": Knob("rate_random_walk_deg_s_rt_s", "(deg/s)/sqrt(s)",
                                        (-3.0, -2.0, -1.0, 0.0, 1.0, 2.0), (-6.0, 4.0)),
    "gain_drift_per_rt_s": Knob("gain_drift_per_rt_s", "1/sqrt(s)", (-6.0, -5.0, -4.0, -3.0, -2.0), (-9.0, 0.0)),
    "phase_drift_deg_rt_s": Knob("phase_drift_deg_rt_s", "deg/sqrt(s)", (-4.0, -3.0, -2.0, -1.0, 0.0), (-7.0, 1.5)),
}
MOTION_KNOBS = ("angle_random_walk_deg_rt_s", "rate_random_walk_deg_s_rt_s")
# State set -> (switches, tuned settings). Searched in this order: 'gain' first (its motion grid seeds the others).
STATE_SETS = {
    "gain": ({"gain_drift": True, "phase_drift": False}, MOTION_KNOBS + ("gain_drift_per_rt_s",)),
    "none": ({"gain_drift": False, "phase_drift": False}, MOTION_KNOBS),
    "gain+phase": ({"gain_drift": True, "phase_drift": True},
                   MOTION_KNOBS + ("gain_drift_per_rt_s", "phase_drift_deg_rt_s")),
}
SET_ORDER = ("none", "gain", "gain+phase")     # display order
LADDER = SET_ORDER                             # simplest first: a richer set must earn its place
# Candidates within this much log-likelihood of the best are statistically indistinguishable from it
# (2 delta logL < 1: the 68% profile-likelihood interval of one parameter); each knob is raised as far
# as the likelihood stays within it, so a flat likelihood (a still or smoothly turning field) leaves the
# filter cautious rather than at whatever tiny value rounding favoured. Common practice in model
# selection (the one-standard-error rule), here leaning toward the more cautious filter.
TIE_LOGLIK = 0.5
COMPASS_START = 0.5        # first compass step, decades
COMPASS_END = 0.125        # the search stops below this step, decades
COMPASS_MAX_STEPS = 12     # compass iterations per set at most
MIN_MOVE_LOGLIK = 0.5 * TIE_LOGLIK  # a compass move must gain this much (smaller gains are ties: the ladder decides)
CAUTIOUS_STEP = 0.25       # the cautious ladder's step (decades) ...
CAUTIOUS_STEPS = 3         # ... and its length
OUTCLASSED_PER_SAMPLE = 1.0  # a set this much log-likelihood per sample behind another stops early
TRACK_CHECK_FRACTIONS = (0.25, 0.5, 0.75, 1.0)   # log10 steps of the motion noise toward the settings before
TRACK_CHECK_GIVE_UP = 20     # a replay that has lost the track this many more times than before stops counting
TRACK_CHECK_CHUNK = 50_000   # samples per tracker call in the whole-input replays
DECORRELATED = 0.1         # search samples at least this decorrelated (lock-in autocorrelation at the step)
MIN_SEARCH_RATE_HZ = 10.0  # ... but never decimated below this rate
MIN_SEARCH_SAMPLES = 1000  # ... nor to fewer samples than this
DEFAULT_MAX_SAMPLES = 2000
BOUND_POINTS = 500         # track points behind the median single-sample bound


# ----------------------------------------------------------------------------- decimation

def decimation_step(n_samples: int, rate_hz: float, tau_s: float, order: int,
                    max_samples: int | None = DEFAULT_MAX_SAMPLES) -> int:
    """Return the search's step k (>= 1): at most max_samples samples, and neighbours decorrelated by the lock-in.

    The lock-in's part: the smallest k with autocorrelation(k / rate_hz) <= DECORRELATED, limited so that the
    decimated rate stays >= MIN_SEARCH_RATE_HZ and at least MIN_SEARCH_SAMPLES samples remain.
    """
    k_size = 1 if not max_samples else max(1, -(-int(n_samples) // int(max_samples)))
    k_corr = 1
    if tau_s > 0 and rate_hz > 0:
        lags = np.arange(1, int(math.ceil(rate_hz * (order + 6.0) * tau_s * 2)) + 2)
        below = np.flatnonzero(autocorrelation(lags / rate_hz, tau_s, order) <= DECORRELATED)
        k_corr = int(lags[below[0]]) if below.size else int(lags[-1])
        k_corr = min(k_corr, max(1, int(rate_hz / MIN_SEARCH_RATE_HZ)), max(1, n_samples // MIN_SEARCH_SAMPLES))
    return max(k_size, k_corr)


def decimate(block: SampleBlock, step: int) -> SampleBlock:
    """Return every step-th sample of block (truth and metadata kept)."""
    if step < 1:
        raise ValueError(f"the decimation step must be at least 1 (got {step})")
    if step == 1:
        return block
    sl = slice(None, None, int(step))
    return SampleBlock(t=block.t[sl], f=block.f[sl], z=block.z[sl], channels=block.channels,
                       applied_b_nT=None if block.applied_b_nT is None else block.applied_b_nT[sl],
                       truth={key: v[sl] for key, v in block.truth.items()}, metadata=dict(block.metadata),
                       skipped_rows=block.skipped_rows)


# ----------------------------------------------------------------------------- measurement noise

def stream_noise(calibration: Calibration, block: SampleBlock, settings: FilterSettings,
                 fit_lockin: bool = True) -> NoiseFit:
    """Return the stream's per-channel noise (calibration channel order) and its lock-in filter.

    With settings.lockin_time_constant_s > 0 (or fit_lockin False) the filter is taken from the settings;
    otherwise it is fitted from the data (noise_correlation.fit_noise).
    """
    model = calibration.model
    names = tuple(block.channels)
    missing = [c for c in model.channels if c not in names]
    if missing:
        raise ValueError(f"samples lack calibrated channel(s) {', '.join(missing)}")
    z = np.asarray(block.z, complex)[:, [names.index(c) for c in model.channels]]
    given = settings.lockin_time_constant_s > 0 or not fit_lockin
    tau = settings.lockin_time_constant_s if given else None
    order = settings.lockin_filter_order if given else None
    return fit_noise(block.t, z, model.channels, tau, order)


def noise_settings(settings: FilterSettings, noise: NoiseFit, calibrated_std_V: np.ndarray) -> FilterSettings:
    """Return settings with the measured per-channel noise and the lock-in filter.

    channel_noise_scale gets each channel's noise ratio (stream over calibration) relative to their root
    mean square, and measurement_noise_scale 1: the tracker learns the common level from the stream
    (noise_baseline_ratio 0), and its BLIND rule compares bounds at the calibrated noise times that learned
    level, so the factors must not carry the level too. A fixed noise_baseline_ratio in `settings` is
    replaced by the measured one (the mean variance ratio).
    """
    ratio = noise.ratio(calibrated_std_V)
    if not np.all(np.isfinite(ratio) & (ratio > 0)):
        bad = [c for c, r in zip(noise.channels, ratio) if not (np.isfinite(r) and r > 0)]
        raise ValueError(f"no noise level could be measured on channel(s) {', '.join(bad)}")
    level = float(np.sqrt(np.mean(ratio ** 2)))
    changes = {"measurement_noise_scale": 1.0,
               "channel_noise_scale": tuple((c, float(round(r / level, 4))) for c, r in zip(noise.channels, ratio))}
    if settings.noise_baseline_ratio > 0:
        changes["noise_baseline_ratio"] = float(f"{level ** 2:.4g}")
    if noise.source == "data":
        changes["lockin_time_constant_s"] = float(f"{noise.tau_s:.4g}") if noise.tau_s > 0 else 0.0
        if noise.tau_s > 0:
            changes["lockin_filter_order"] = int(noise.order)
    return settings.replace(**changes)


# ----------------------------------------------------------------------------- accuracy floor

def calibration_error_ratio(calibration: Calibration) -> float:
    """Return sqrt(parameters per channel x inflation / scan rows): the calibrated model's statistical error per
    channel as a fraction of the noise std (a least-squares fit's average prediction variance is sigma^2 p / n,
    with n the effective rows: rows over the calibration's covariance inflation for correlated rows); 0 when the
    scan's row count is unknown."""
    _, knots, harmonics_per_knot = calibration.model.coef.shape
    rows = int(getattr(calibration, "n_rows", 0) or 0)
    info = getattr(calibration, "fit_info", None) or {}
    inflation = float(info.get("covariance_inflation", 1.0) or 1.0)
    if not (math.isfinite(inflation) and inflation >= 1.0):
        inflation = 1.0
    return math.sqrt(knots * harmonics_per_knot * inflation / rows) if rows > 0 else 0.0


def angle_random_walk_for_floor(floor_deg: float, single_sample_deg: float, dt_s: float, kappa: float = 1.0) -> float:
    """Return the angle random walk (deg/sqrt(s)) at which a still field's filter settles at sigma = sqrt(2) floor_deg.

    A calibration error of total std floor_deg (floor^2 / 2 per axis) is a bias that innovations
    cannot see. A filter with white angle noise q and gain K << 1 holds P = K R per axis while its
    own averaging error is only K R / 2, so P = floor^2 per axis (trace 2 floor^2) matches averaging
    error plus bias. With R = kappa bound^2 / 2 per axis (kappa: the lock-in's bandwidth factor, the
    filter's inflation for correlated samples) and the steady state P^2 = q dt R,
    sqrt(q) = sqrt(2) floor^2 / (bound sqrt(kappa dt)).
    """
    if not (floor_deg > 0 and single_sample_deg > 0 and dt_s > 0) or not math.isfinite(single_sample_deg):
        return 0.0
    f, b = math.radians(floor_deg), math.radians(single_sample_deg)
    return math.degrees(math.sqrt(2.0) * f * f / (b * math.sqrt(max(kappa, 1.0) * dt_s)))


def median_bounds_deg(calibration: Calibration, block: SampleBlock, settings: FilterSettings, initiator,
                      noise_std_V: np.ndarray) -> tuple[float, float]:
    """Return the median single-sample bound (deg) along the stream's track at (calibrated noise, the stream's noise).

    The track: one run of the filter with `settings` over block; the bound: the Cramer-Rao bound of
    one sample at each estimated direction and |B| (estimator/fisher.py).
    """
    rec = Tracker(calibration, settings, initiator).run_arrays(block)
    ok = np.flatnonzero(np.all(np.isfinite(rec.u), axis=1) & np.isfinite(rec.b_nT))
    if not ok.size:
        return math.nan, math.nan
    ok = ok[::max(1, ok.size // BOUND_POINTS)]
    u, b = rec.u[ok], rec.b_nT[ok]
    model = calibration.model
    at_cal = float(np.median(crlb_deg(model, u, b)))
    at_stream = float(np.median(crlb_deg(model, u, b, noise_std=np.asarray(noise_std_V, float))))
    return at_cal, at_stream


# ----------------------------------------------------------------------------- process noise

class MemoInitiator:
    """An initiator that remembers its answers: the same sample (time, frequencies, values, channels, |B|) gets
    the same acquisition without solving again. Exact (the inverse is deterministic); it saves the tuner's
    candidates that lose the track at the same samples from repeating the single-sample solve."""

    def __init__(self, initiator, max_entries: int = 100_000):
        self.initiator = initiator
        self.max_entries = int(max_entries)
        self.cache: dict[tuple, object] = {}
        self.hits = 0

    def __call__(self, sample, b_nT: float):
        z = np.asarray(sample.z, complex)
        key = (float(sample.t), float(sample.f_a), float(sample.f_b), z.tobytes(), tuple(sample.channels),
               bool(getattr(sample, "restarted", False)), float(b_nT))
        if key in self.cache:
            self.hits += 1
            return self.cache[key]
        result = self.initiator(sample, b_nT)
        if len(self.cache) < self.max_entries:
            self.cache[key] = result
        return result


@dataclass
class ScoreTable:
    """Every evaluated candidate of one state set: tuned values (linear units, KNOBS) and scores."""

    names: tuple[str, ...]
    values: np.ndarray            # (N, d)
    loglik: np.ndarray            # (N,) innovation log-likelihood (larger is better)
    mean_nis: np.ndarray          # (N,) mean NIS of fused samples (2C expected)
    fraction_gated: np.ndarray    # (N,)
    reacquisitions: np.ndarray    # (N,)

    def __len__(self) -> int:
        return int(self.loglik.shape[0])

    def best(self, tolerance: float = 0.0) -> int:
        """Return the row of the largest log-likelihood; with tolerance > 0, the row with the most process noise
        (largest product of tuned values) within tolerance of it."""
        ll = np.where(np.isfinite(self.loglik), self.loglik, -np.inf)
        top = int(np.argmax(ll))
        if tolerance <= 0 or not np.isfinite(ll[top]):
            return top
        close = np.flatnonzero(ll >= ll[top] - tolerance)
        size = np.log10(self.values[close]).sum(axis=1)
        return int(close[np.argmax(size)])


@dataclass
class SetResult:
    """One state set after its search: best settings, scores, BIC and every candidate scored."""

    name: str
    settings: FilterSettings
    table: ScoreTable
    best_index: int
    parameters: int               # tuned settings (BIC's p)
    samples: int                  # samples scored (BIC's T)
    at_floor: bool                # the angle random walk rests on the accuracy floor
    outclassed: bool = False      # its search stopped early: far behind another set

    @property
    def loglik(self) -> float:
        """Return the innovation log-likelihood of the best candidate."""
        return float(self.table.loglik[self.best_index])

    @property
    def penalty(self) -> float:
        """Return BIC's penalty p ln T."""
        return self.parameters * math.log(max(self.samples, 2))

    @property
    def score(self) -> float:
        """Return BIC = -2 logL + p ln T (smaller is better)."""
        return -2.0 * self.loglik + self.penalty

    def values(self) -> dict[str, float]:
        """Return the tuned settings of the best candidate (name -> value, linear units)."""
        return {n: float(self.table.values[self.best_index, k]) for k, n in enumerate(self.table.names)}


@dataclass
class TrackCheck:
    """Whole-input track keeping: losses (lost after gating or on the NIS average) before and after, and any raise."""

    lost_before: int
    lost_likelihood: int          # with the likelihood's choice of motion noise
    lost_after: int               # with the settings written
    fraction: float               # how far (in log10) the motion noise was moved toward the settings before: 0..1
    raised: dict                  # knob -> (likelihood's value, value written), for the knobs that moved


def track_losses(calibration: Calibration, block: SampleBlock, settings: FilterSettings, initiator,
                 rate_hz: float | None = None, give_up_after: int | None = None) -> int:
    """Return how often the tracker with `settings` loses the track over the whole block (not counting time faults)."""
    tracker = Tracker(calibration, settings, initiator, sample_rate_hz=rate_hz)
    lost = 0
    for s in range(0, len(block), TRACK_CHECK_CHUNK):
        sl = slice(s, s + TRACK_CHECK_CHUNK)
        tracker.run_arrays(SampleBlock(block.t[sl], block.f[sl], block.z[sl], block.channels))
        c = tracker.counters
        lost = c.lost_gated + c.lost_nis + c.covariance_faults
        if give_up_after is not None and lost > give_up_after:
            break
    return lost


def keep_the_track(calibration: Calibration, block: SampleBlock, tuned: FilterSettings, before: FilterSettings,
                   initiator, rate_hz: float | None = None,
                   lower: dict[str, float] | None = None) -> tuple[FilterSettings, TrackCheck]:
    """Return (settings, TrackCheck): tuned, with its motion noise moved toward `before`'s (log10, in quarters;
    the rate random walk first, then also the angle random walk, never below `lower`) until the whole input
    loses the track no more often than with `before`.

    The likelihood is dominated by the many samples of smooth motion; a single change of turning rate (a
    rotation stage switching axis) is a few samples of it, and a filter tuned to the smooth part can lose
    the track there. The settings before are the user's (or the defaults) and held the track as they did.
    """
    lower = lower or {}

    def losses(settings, limit):
        return track_losses(calibration, block, settings, initiator, rate_hz, give_up_after=limit)

    lost_before = losses(before, TRACK_CHECK_GIVE_UP)
    lost_tuned = losses(tuned, lost_before + TRACK_CHECK_GIVE_UP)
    if lost_tuned <= lost_before:
        return tuned, TrackCheck(lost_before, lost_tuned, lost_tuned, 0.0, {})
    settings, lost, fraction = tuned, lost_tuned, 0.0
    for knobs in (MOTION_KNOBS[1:], MOTION_KNOBS):          # the rate random walk alone, then both
        for fraction in TRACK_CHECK_FRACTIONS:
            changes = {}
            for k in knobs:
                a, b = math.log10(max(getattr(tuned, k), 1e-12)), math.log10(max(getattr(before, k), 1e-12))
                changes[k] = max(float(f"{10 ** (a + fraction * (b - a)):.4g}"), lower.get(k, 0.0))
            settings = tuned.replace(**changes)
            lost = losses(settings, lost_before + TRACK_CHECK_GIVE_UP)
            if lost <= lost_before:
                break
        if lost <= lost_before:
            break
    raised = {k: (getattr(tuned, k), getattr(settings, k)) for k in MOTION_KNOBS
              if getattr(settings, k) != getattr(tuned, k)}
    return settings, TrackCheck(lost_before, lost_tuned, lost, fraction, raised)


@dataclass
class TuneResult:
    """Tuned filter settings: the chosen state set, all sets compared, the noise fit and the accuracy floor."""

    settings: FilterSettings
    chosen: str
    sets: dict[str, SetResult]
    noise: NoiseFit
    decimation: int               # every k-th sample was searched
    samples_used: int
    floor_deg: float              # calibration accuracy floor (deg, 1-sigma total); 0: none
    floor_arw_deg_rt_s: float     # the angle random walk it implies (lower limit of the search)
    bound_calibrated_deg: float   # median single-sample bound along the track at the calibrated noise
    bound_stream_deg: float       # ... at the stream's noise
    reference: InnovationScores | None = None   # the settings before tuning, scored on the same samples
    candidates: int = 0
    allowance: float = 0.0        # model-error allowance (log-likelihood) a richer state set had to beat
    calibrated_std_V: np.ndarray | None = None  # (C,) the calibration's noise std per channel
    error_ratio: float = 0.0      # calibration_error_ratio: the floor over the bound at the calibrated noise
    track_check: TrackCheck | None = None       # the likelihood's choice against the settings before, whole input


class _Search:
    """One state set's candidates: log10 values of its tuned knobs, scores once scored, and the search's steps.

    `steps()` is a generator: it yields lists of rows (log10 values) to score and resumes once they are
    scored (`record`), so several sets' candidates can share one scoring call.
    """

    def __init__(self, base: FilterSettings, name: str, start: dict[str, float], lower: dict[str, float]):
        switches, names = STATE_SETS[name]
        self.name, self.names = name, names
        self.base = base.replace(**switches)
        self.limits = _limits(names, lower)
        self.lower = lower
        self.start = dict(start)
        self.logs: list[np.ndarray] = []
        self.scores: list[tuple] = []
        self.seen: dict[tuple, int] = {}
        self.coarse_done = False
        self.outclassed = False
        self.chosen = None

    def _key(self, row) -> tuple:
        return tuple(np.round(np.clip(np.asarray(row, float), self.limits[:, 0], self.limits[:, 1]), 6))

    def fresh(self, rows: Sequence[np.ndarray]) -> list[np.ndarray]:
        """Return the rows (clipped to the limits) not scored yet, without repeats."""
        out, keys = [], set()
        for row in rows:
            key = self._key(row)
            if key not in self.seen and key not in keys:
                keys.add(key)
                out.append(np.array(key, float))
        return out

    def settings_at(self, logs: np.ndarray) -> FilterSettings:
        """Return the base settings with the tuned knobs at 10**logs."""
        return self.base.replace(**{n: float(f"{10.0 ** v:.4g}") for n, v in zip(self.names, logs)})

    def record(self, rows: Sequence[np.ndarray], scores: Sequence[tuple]) -> None:
        """Remember the scores (loglik, mean NIS, fraction gated, reacquisitions) of rows."""
        for row, sc in zip(rows, scores):
            self.seen[self._key(row)] = len(self.logs)
            self.logs.append(np.asarray(row, float))
            self.scores.append(tuple(float(v) for v in sc))

    def loglik_of(self, row: np.ndarray) -> float:
        """Return the log-likelihood of a scored row (clipped to the limits), -inf if it was not scored."""
        i = self.seen.get(self._key(row))
        return -math.inf if i is None or not math.isfinite(self.scores[i][0]) else self.scores[i][0]

    def best_row(self) -> np.ndarray:
        """Return the log values of the largest log-likelihood so far."""
        ll = np.array([sc[0] if math.isfinite(sc[0]) else -np.inf for sc in self.scores])
        return self.logs[int(np.argmax(ll))].copy()

    def best_loglik(self) -> float:
        """Return the largest log-likelihood so far."""
        return max((sc[0] for sc in self.scores if math.isfinite(sc[0])), default=-math.inf)

    def best_values(self) -> dict[str, float]:
        """Return the tuned values (linear) of the best candidate so far."""
        return {n: float(10.0 ** v) for n, v in zip(self.names, self.best_row())}

    def table(self) -> ScoreTable:
        """Return every scored candidate as a ScoreTable."""
        arr = np.array(self.scores, float).reshape(-1, 4)
        return ScoreTable(tuple(self.names), 10.0 ** np.array(self.logs, float).reshape(-1, len(self.names)),
                          arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3].astype(int))

    def steps(self, tie: float):
        """Yield batches of rows to score: coarse grids, compass refinement, the cautious ladder; set self.chosen."""
        names = self.names
        center = np.array([math.log10(self.start[n]) if n in self.start else float(np.median(KNOBS[n].coarse))
                           for n in names])
        center = np.clip(center, self.limits[:, 0], self.limits[:, 1])
        gridded = [k for k, n in enumerate(names) if n not in self.start]
        motion = [k for k in gridded if names[k] in MOTION_KNOBS]
        if motion:
            rows = []
            for combo in itertools.product(*[KNOBS[names[k]].coarse for k in motion]):
                row = center.copy()
                row[motion] = combo
                rows.append(row)
            yield rows
            center = self.best_row()
        for k in [k for k in gridded if names[k] not in MOTION_KNOBS]:
            rows = []
            for v in KNOBS[names[k]].coarse:
                row = center.copy()
                row[k] = v
                rows.append(row)
            yield rows
            center = self.best_row()
        if not self.scores:
            yield [center]
        self.coarse_done = True
        # Compass: each knob a step and half a step either side of the best, all scored together; move to the
        # best (halving the step when it was a half step), else quarter the step.
        step, eye = COMPASS_START, np.eye(len(names))
        for _ in range(COMPASS_MAX_STEPS):
            if step < COMPASS_END - 1e-12:
                break
            center, top = self.best_row(), self.best_loglik()
            yield [center + sign * f * step * eye[k] for k in range(len(names)) for sign in (1.0, -1.0)
                   for f in (1.0, 0.5)]
            if self.best_loglik() <= top + MIN_MOVE_LOGLIK:
                step /= 4.0
            elif np.max(np.abs(self.best_row() - center)) < 0.75 * step:
                step /= 2.0
        # Cautious ladder: each knob raised from the best as far as the likelihood stays within tie.
        best, top = self.best_row(), self.best_loglik()
        self.chosen = best
        if not (math.isfinite(top) and tie > 0):
            return
        ladders = [[best + j * CAUTIOUS_STEP * eye[k] for j in range(1, CAUTIOUS_STEPS + 1)]
                   for k in range(len(names))]
        yield [row for ladder in ladders for row in ladder]
        raised = best.copy()
        for k, ladder in enumerate(ladders):
            for row in ladder:
                if self.loglik_of(row) < top - tie:
                    break
                raised[k] = np.clip(row, self.limits[:, 0], self.limits[:, 1])[k]
        if np.array_equal(raised, best):
            return
        yield [raised]
        if self.loglik_of(raised) >= top - tie * len(names):
            self.chosen = raised
        else:
            self.chosen = self.logs[self.table().best(tie)]

    def result(self, samples: int) -> SetResult:
        """Return the SetResult of the finished search."""
        table = self.table()
        best = self.seen[self._key(self.chosen)]
        arw_floor = self.lower.get("angle_random_walk_deg_rt_s", 0.0)
        at_floor = arw_floor > 0 and table.values[best, 0] <= arw_floor * (1 + 1e-6)
        return SetResult(self.name, self.settings_at(self.logs[best]), table, best, len(self.names), samples,
                         bool(at_floor), self.outclassed)


def _limits(names: Sequence[str], lower: dict[str, float]) -> np.ndarray:
    """Return (d, 2) log10 limits of the knobs, raised to the lower limits given (linear units)."""
    lim = np.array([KNOBS[n].limits for n in names], float)
    for k, n in enumerate(names):
        if lower.get(n, 0) > 0:
            lim[k, 0] = min(max(lim[k, 0], math.log10(lower[n])), lim[k, 1])
    return lim


def _drop_outclassed(searches: dict, running: dict, batches: dict, results: dict, samples: int,
                     allowance: float) -> None:
    """Stop refining a set whose best log-likelihood trails another set's by more than OUTCLASSED_PER_SAMPLE per
    sample (and 10 allowances): no refinement closes such a gap, and its candidates, which lose the track
    again and again, are the slowest to score."""
    best = {n: s.best_loglik() for n, s in searches.items()}
    top = max(best.values(), default=-math.inf)
    gap = max(OUTCLASSED_PER_SAMPLE * samples, 10.0 * allowance)
    for name in list(running):
        if name in results or not searches[name].scores or not math.isfinite(top) or best[name] >= top - gap:
            continue
        s = searches[name]
        s.chosen, s.outclassed = s.best_row(), True
        del running[name]
        batches.pop(name, None)
        results[name] = s.result(samples)


def search_state_sets(calibration: Calibration, block: SampleBlock, base: FilterSettings, initiator,
                      state_sets: Sequence[str] = SET_ORDER, lower_limits: dict[str, float] | None = None,
                      progress: Progress | None = None, tie_loglik: float = TIE_LOGLIK,
                      reference: FilterSettings | None = None,
                      allowance: float = 0.0) -> tuple[dict[str, SetResult], InnovationScores | None]:
    """Return each state set's settings maximizing the innovation log-likelihood of block (then the most cautious
    within tie_loglik, knob by knob).

    The 'gain' set starts with a coarse grid of the motion knobs; 'none' starts from the best motion of that
    grid and 'gain+phase' from the 'gain' set's result (each with its own coarse grid when 'gain' is not
    searched). The sets' candidates are scored together, one innovation_loglik call per step.
    lower_limits: name -> least value allowed (linear), e.g. the accuracy floor's angle random walk.
    reference: settings scored with the first candidates (e.g. those before tuning); its scores are returned.
    allowance: the model-error allowance (log-likelihood); a set trailing another by far more stops early.
    """
    lower = {k: float(v) for k, v in (lower_limits or {}).items() if v and v > 0}
    wanted = [n for n in STATE_SETS if n in state_sets]
    searches: dict[str, _Search] = {}
    running: dict[str, object] = {}
    batches: dict[str, list] = {}
    results: dict[str, SetResult] = {}

    def begin(name: str, start: dict[str, float]) -> None:
        searches[name] = _Search(base, name, {k: v for k, v in start.items() if k in STATE_SETS[name][1]}, lower)
        running[name] = searches[name].steps(tie_loglik)
        advance(name)

    def advance(name: str) -> None:
        try:
            while True:
                rows = searches[name].fresh(next(running[name]))
                if rows:
                    batches[name] = rows
                    return
        except StopIteration:
            del running[name]
            batches.pop(name, None)
            results[name] = searches[name].result(len(block))

    shared_model = TrackerModel(calibration.model, 1.0)       # its sphere medians are computed once
    gain_first = "gain" in wanted
    begin(wanted[0], {})
    if not gain_first:
        for name in wanted[1:]:
            begin(name, {})
    done = 0
    ref_scores = None
    while running:
        names = [n for n in running if n in batches]
        rows = [(n, r) for n in names for r in batches[n]]
        extra = [reference] if (reference is not None and ref_scores is None) else []
        if progress is not None:
            progress(done, done + len(rows), "search: " + ", ".join(names))
        scores = innovation_loglik(calibration, block, [searches[n].settings_at(r) for n, r in rows] + extra,
                                   initiator, model=shared_model)
        if extra:
            ref_scores = InnovationScores(*(np.asarray(v)[-1:] for v in scores))
        done += len(rows)
        for k, (n, r) in enumerate(rows):
            searches[n].record([r], [tuple(np.asarray(v)[k] for v in scores)])
        for n in names:
            advance(n)
        _drop_outclassed(searches, running, batches, results, len(block), allowance)
        if gain_first:
            if "none" in wanted and "none" not in searches:
                begin("none", {k: v for k, v in searches["gain"].best_values().items() if k in MOTION_KNOBS})
            if "gain+phase" in wanted and "gain+phase" not in searches and searches["gain"].coarse_done:
                begin("gain+phase", searches["gain"].best_values())
    if progress is not None:
        progress(done, done, "search")
    return {n: results[n] for n in SET_ORDER if n in results}, ref_scores


def model_error_allowance(calibration: Calibration, samples: int, noise_ratio: np.ndarray | None = None) -> float:
    """Return the log-likelihood that absorbing the calibration's model error could add over `samples` samples.

    The calibrated model errs by about calibration_error_ratio r times the calibration's noise std on every
    real measurement, slowly with direction; on a stream whose noise std is noise_ratio (C,) times the
    calibration's, that is r / noise_ratio of the stream's. Unmodelled, it adds (r / ratio)^2 per real
    measurement to the expected NIS, i.e. costs 0.5 sum (r / ratio)^2 log-likelihood per sample. Drift states
    can absorb it, as if the sensor drifted.
    """
    r = calibration_error_ratio(calibration)
    ratio = np.ones(calibration.model.n_channels) if noise_ratio is None else np.asarray(noise_ratio, float)
    return 0.5 * samples * float(np.sum(2.0 * (r / ratio) ** 2))


def choose_state_set(results: dict[str, SetResult], allowance: float = 0.0) -> str:
    """Return the name of the chosen state set: up the ladder none -> gain -> gain+phase, a richer set replaces the
    current choice when its BIC is lower by more than 2 x allowance (what absorbing model error could explain)."""
    if not results:
        raise ValueError("no state set was searched")
    ladder = [n for n in LADDER if n in results]
    chosen = ladder[0]
    for name in ladder[1:]:
        if results[name].score < results[chosen].score - 2.0 * allowance:
            chosen = name
    return chosen


def state_set_of(settings: FilterSettings) -> str:
    """Return the name of the state set that settings switch on ('none', 'gain', 'gain+phase' or 'phase')."""
    if settings.gain_drift and settings.phase_drift:
        return "gain+phase"
    if settings.gain_drift:
        return "gain"
    return "phase" if settings.phase_drift else "none"


def tune(calibration: Calibration, block: SampleBlock, initiator, base: FilterSettings | None = None,
         state_sets: Sequence[str] = SET_ORDER, max_samples: int | None = DEFAULT_MAX_SAMPLES,
         floor_deg: float | None = None, fit_lockin: bool = True, progress: Progress | None = None,
         check_track: bool = True) -> TuneResult:
    """Return tuned FilterSettings: noise from second differences, state set and process noise by likelihood.

    base: the settings to start from, completed with the stream's lock-in when it is known (its
    lockin_time_constant_s > 0); otherwise (and fit_lockin) the lock-in is fitted from the data.
    initiator: acquires every candidate's track (the snapshot solver's `initiate`). state_sets: the sets
    compared ('none', 'gain', 'gain+phase'). max_samples: the search's samples at most (decimated).
    floor_deg: the calibration accuracy floor (deg, 1-sigma total; None: calibration_error_ratio times
    the median single-sample bound at the calibrated noise; 0: none). check_track: replay the whole input
    and raise the motion noise where the likelihood's choice loses the track more often than `base`
    (keep_the_track).
    """
    base = base if base is not None else FilterSettings()
    unknown = [s for s in state_sets if s not in STATE_SETS]
    if unknown or not state_sets:
        raise ValueError(f"unknown state set(s) {', '.join(unknown) or '(none given)'}; known: {', '.join(SET_ORDER)}")
    if len(block) < 2:
        raise ValueError("too few samples to tune")
    initiator = initiator if isinstance(initiator, MemoInitiator) else MemoInitiator(initiator)
    model = calibration.model
    if progress is not None:
        progress(0, 1, "noise")
    noise = stream_noise(calibration, block, base, fit_lockin)
    if progress is not None:
        progress(1, 1, "noise")
    start = noise_settings(base, noise, model.noise_std)
    rate = noise.sample_rate_hz
    k = decimation_step(len(block), rate, start.lockin_time_constant_s, start.lockin_filter_order, max_samples)
    used = decimate(block, k)
    bound_cal, bound_stream = median_bounds_deg(calibration, used, start, initiator,
                                                noise.std_V if np.all(np.isfinite(noise.std_V)) else None)
    if floor_deg is None:
        floor_deg = calibration_error_ratio(calibration) * bound_cal
    floor_deg = float(floor_deg) if math.isfinite(floor_deg) else 0.0
    kappa = correlation_factor(rate, start.lockin_time_constant_s, start.lockin_filter_order)
    floor_arw = angle_random_walk_for_floor(floor_deg, bound_stream, 1.0 / rate, kappa)
    lower = {"angle_random_walk_deg_rt_s": floor_arw}

    allowance = model_error_allowance(calibration, len(used), noise.ratio(model.noise_std))
    results, reference = search_state_sets(calibration, used, start, initiator, state_sets, lower, progress,
                                           reference=base, allowance=allowance)
    chosen = choose_state_set(results, allowance)
    settings, check = results[chosen].settings, None
    if check_track:
        if progress is not None:
            progress(0, 1, "track check")
        settings, check = keep_the_track(calibration, block, settings, start, initiator, rate, lower)
        if progress is not None:
            progress(1, 1, "track check")
    return TuneResult(settings, chosen, {n: results[n] for n in SET_ORDER if n in results}, noise,
                      k, len(used), floor_deg, floor_arw, bound_cal, bound_stream, reference,
                      sum(len(r.table) for r in results.values()), allowance,
                      np.asarray(model.noise_std, float).copy(), calibration_error_ratio(calibration), check)
