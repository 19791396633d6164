"""Adaptive measurement noise: the noise-level statistic, and the tracker through noise bursts.

The streams are tests/synthetic_sensor.py's (see tests/test_tracker.py); a burst adds extra white
noise of `factor` times the calibrated std on the chosen channels, so the noise std there becomes
sqrt(1 + factor^2) times calibrated.
"""

import math

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.flags import EstimateFlag as F
from fieldvane.estimator.innovation import innovation_loglik
from fieldvane.estimator import filter_core as core
from fieldvane.estimator.lockin_noise import second_difference_variance
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.sphere import angle_between, normalize, rotation_matrix
from fieldvane.estimator.tracker import Tracker
from synthetic_sensor import make_sensor, scan
from test_tracker import GridInitiator, calibrated, errors_deg, make_stream, rotating

TURN_DEG_S = 6.0


@pytest.fixture(scope="module")
def two_probe():
    return calibrated(2)


@pytest.fixture(scope="module")
def one_probe():
    return calibrated(1)


def add_burst(block, sigma, rows, factor, channels=None, seed=9):
    """Add white noise of factor x the calibrated std (per channel) to the given rows and channels."""
    rng = np.random.default_rng(seed)
    cols = np.arange(block.z.shape[1]) if channels is None else np.asarray(channels)
    shape = (rows.size, cols.size)
    extra = factor * sigma[cols] * (rng.normal(size=shape) + 1j * rng.normal(size=shape))
    block.z[np.ix_(rows, cols)] += extra


def turning_stream(sensor, sigma, n=3000, seed=5):
    t, u = rotating(n, TURN_DEG_S, [0.1, 0.3, 0.95], normalize(np.array([0.55, 0.25, 0.8])))
    return make_stream(sensor, t, u, 5000.0, sigma, seed=seed), u


# ------------------------------------------------------------------------------ the statistic itself
@pytest.mark.parametrize("rho1, rho2", [(0.0, 0.0), (0.9074, 0.7151), (0.3, -0.1)])
def test_second_difference_variance_against_simulated_noise(rho1, rho2):
    """var(e_k - 2 e_(k-1) + e_(k-2)) / var(e) = 6 - 8 rho1 + 2 rho2, against seeded draws of correlated triples
    (numpy multivariate normal, the reference): within 2 %."""
    rng = np.random.default_rng(21)
    cov = np.array([[1.0, rho1, rho2], [rho1, 1.0, rho1], [rho2, rho1, 1.0]])
    e = rng.multivariate_normal(np.zeros(3), cov, size=400_000)
    assert second_difference_variance(rho1, rho2) == pytest.approx(np.var(e[:, 0] - 2 * e[:, 1] + e[:, 2]), rel=0.02)


def test_noise_values_are_median_unbiased_through_a_lock_in_filter():
    """Through a 4-stage, 5 ms RC filter sampled at 200 Hz (simulated at 20x the rate with scipy.signal.lfilter),
    the sum over m = 4 components of squared second differences, divided by (6 - 8 rho1 + 2 rho2) times the
    chi-square median (scipy.stats.chi2, reference), has median 1 in units of the output variance."""
    from scipy.signal import lfilter
    from scipy.stats import chi2

    from fieldvane.estimator.lockin_noise import autocorrelation

    rng = np.random.default_rng(5)
    over, tau, fs = 20, 0.005, 200.0
    dt = 1.0 / (fs * over)
    a = math.exp(-dt / tau)
    x = rng.normal(size=(4, 200_000 * over // 20))
    for _ in range(4):
        x = lfilter([1 - a], [1, -a], x, axis=1)
    y = x[:, 2000::over]
    y /= y.std(axis=1, keepdims=True)
    rho1, rho2 = autocorrelation(np.array([1.0, 2.0]) / fs, tau, 4)
    d2 = ((y[:, 2:] - 2 * y[:, 1:-1] + y[:, :-2]) ** 2).sum(axis=0)
    ratio = d2 / (second_difference_variance(rho1, rho2) * chi2.median(4))
    assert np.median(ratio) == pytest.approx(1.0, abs=0.05)


class _Level:
    """Drive the core's noise level (one probe) from Python for the tests."""

    def __init__(self, window=9, threshold=2.5, max_ratio=900.0, learning=False, long=256):
        self.cfg = np.zeros(core.N_CFG)
        self.cfg[core.C_NOISE_THR], self.cfg[core.C_NOISE_MAX], self.cfg[core.C_STRIDE_S] = threshold, max_ratio, 1e9
        self.short, self.short_sorted = np.full((1, window), np.nan), np.full((1, window), np.nan)
        self.long, self.long_sorted = np.full((1, long), np.nan), np.full((1, long), np.nan)
        self.pos = np.zeros((1, 4), np.int64)
        self.baseline, self.ratio = np.ones(1), np.ones(1)
        self.fs = np.zeros(core.N_FSTATE)
        self.fs[core.S_NEXT_PUSH] = 1e18
        self.learning = learning
        self.probe_state = np.zeros((1, 4), np.int64)

    def push(self, value):
        core._push_noise(0, float(value), self.learning, self.short, self.short_sorted, self.long, self.long_sorted,
                         self.pos, self.baseline, self.ratio, self.cfg, 0.0, self.fs, self.probe_state)
        return float(self.ratio[0])


def test_noise_level_is_median_unbiased_and_follows_a_rise():
    """On white noise the running level stays at the baseline (below the threshold); after the variance rises
    100x it follows within (W + 1) / 2 values and reads 100 within the spread of a 9-value median."""
    rng = np.random.default_rng(3)
    m = 4
    level = _Level()
    y = rng.normal(size=(3000, m))
    y[2000:] *= 10.0
    ratios = []
    from scipy.stats import chi2

    for k in range(2, y.shape[0]):
        d = ((y[k] - 2 * y[k - 1] + y[k - 2]) ** 2).sum() / (6.0 * chi2.median(m))
        ratios.append(level.push(d))
    ratios = np.array(ratios)
    calm, noisy = ratios[:1998], ratios[2005:]          # index k - 2
    assert np.mean(calm == 1.0) > 0.99
    # (neighbouring second differences share samples, so a 9-value median has fewer independent values and
    # dips lower now and then than one of independent values would)
    assert noisy.min() > 15.0 and 70.0 < np.median(noisy) < 140.0, (noisy.min(), np.argmin(noisy))


def test_noise_level_median_threshold_cap_and_baseline_against_numpy():
    """The factor is numpy's median of the last W values when above threshold x baseline, the baseline below,
    capped at max x baseline; while learning, the baseline is numpy's median of the latest values."""
    rng = np.random.default_rng(4)
    values = rng.lognormal(0.5, 1.5, size=400)
    level = _Level(window=7, threshold=2.5, max_ratio=50.0)
    for k, v in enumerate(values):
        got = level.push(v)
        if k >= 3:                                    # (7 + 1) / 2 values before the level may move
            med = np.median(values[max(0, k - 6):k + 1])    # reference: numpy.median
            assert got == pytest.approx(1.0 if med <= 2.5 else min(med, 50.0), rel=1e-12)
    learner = _Level(window=7, learning=True, long=64)
    for k, v in enumerate(values):
        learner.push(v)
        assert learner.baseline[0] == pytest.approx(np.median(values[max(0, k - 63):k + 1]), rel=1e-12)


# ------------------------------------------------------------------------- the tracker through bursts
@pytest.mark.parametrize("n_probes", [2, 1])
def test_noise_burst_is_tracked_honestly(two_probe, one_probe, n_probes):
    """A 15x noise burst for 4 s while the field turns at 6 deg/s: the track is kept (no re-acquisition),
    the error stays consistent with sigma_deg (>= 90% within 2 sigma inside the burst; 98% expected for a
    2-D Gaussian, docs/references.md "Estimation") and the noise factor reads about sqrt(1 + 15^2). Without the
    adaptive noise the same stream loses the track and reports a sigma the errors do not respect."""
    sensor, cal, sigma = two_probe if n_probes == 2 else one_probe
    blk, u = turning_stream(sensor, sigma)
    burst = np.arange(1000, 1800)
    add_burst(blk, sigma, burst, 15.0)
    tracker = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    rec = tracker.run_arrays(blk)
    err = errors_deg(rec, u)
    inside = np.mean(err[burst] < 2 * rec.sigma_deg[burst])
    assert inside >= 0.9, inside
    assert tracker.counters.acquisitions == 1
    assert np.mean(rec.flags[burst] & F.GATED > 0) < 0.05            # gated only while the level follows
    assert np.all(rec.flags[burst[:3]] & F.GATED)                   # the first samples of the burst
    assert 12.0 < np.median(rec.noise_scale[burst]) < 20.0           # sqrt(226) = 15.03
    calm = np.r_[200:990, 1815:3000]
    assert np.mean(rec.flags[calm] & F.NOISY > 0) < 0.02
    assert np.allclose(tracker.noise_baseline, 1.0, atol=0.1)         # the stream's own normal level
    assert np.mean(err[calm] < 2 * rec.sigma_deg[calm]) > 0.95

    fixed = Tracker(cal, FilterSettings(adaptive_noise=False), GridInitiator(cal.model))
    rec0 = fixed.run_arrays(blk)
    err0 = errors_deg(rec0, u)
    assert fixed.counters.acquisitions > 10
    assert np.mean(err0[burst] < 2 * rec0.sigma_deg[burst]) < 0.8
    assert np.all(rec0.noise_scale == 1.0)


def test_burst_on_one_probe_inflates_that_probe_only(two_probe):
    """A 10x burst on probe 2's channels: probe 2's factor rises, probe 1's stays 1, so the direction keeps
    probe 1's accuracy (RMS error in the burst well below what a uniform inflation would give). step()
    gives exactly what run_arrays() gives, sample by sample."""
    sensor, cal, sigma = two_probe
    blk, u = turning_stream(sensor, sigma)
    burst = np.arange(1000, 1800)
    add_burst(blk, sigma, burst, 10.0, channels=[2, 3])
    tracker = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    rec = tracker.run_arrays(blk)
    # Replay the burst sample by sample to read the per-probe factors.
    by_step = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    scales = []
    for i in range(burst[-1] + 1):
        est = by_step.step(blk.sample(i))
        assert np.array_equal(est.u, rec.u[i]) and est.sigma_deg == rec.sigma_deg[i] and est.flags == rec.flags[i]
        assert est.extras["noise_scale"] == rec.noise_scale[i] == by_step.noise_scales.max()
        if i >= burst[0] + 20:
            scales.append(by_step.noise_scales)
    scales = np.array(scales)
    assert abs(np.median(scales[:, 0]) - 1.0) < 0.1 and scales[:, 0].max() < 2.0   # (rare brief false alarms)
    assert 7.0 < np.median(scales[:, 1]) < 14.0                              # sqrt(101) = 10.05
    err = errors_deg(rec, u)
    assert np.mean(err[burst] < 2 * rec.sigma_deg[burst]) >= 0.9 and tracker.counters.acquisitions == 1
    uniform = Tracker(cal, FilterSettings(adaptive_noise=False, measurement_noise_scale=math.sqrt(50.5)),
                      GridInitiator(cal.model)).run_arrays(blk)
    rms = np.sqrt(np.mean(err[burst] ** 2))
    # (with the default gain states, probe 1 alone pins its own gain less well than two probes do, so the gain
    # over a uniform inflation is smaller than without them: about 0.5x here against about 0.3x)
    assert rms < 0.6 * np.sqrt(np.mean(errors_deg(uniform, u)[burst] ** 2))


@pytest.mark.parametrize("n_probes", [2, 1])
def test_direction_step_inside_a_burst_is_still_reacquired(two_probe, one_probe, n_probes):
    """A 45-deg step in the middle of a 10x burst: the innovation is large but steady, so the noise level does
    not absorb it; the step is gated, the track declared lost after K gated samples and re-acquired there,
    with the initiator's covariance widened by the noise factor (sigma honest right after)."""
    sensor, cal, sigma = two_probe if n_probes == 2 else one_probe
    t, u = rotating(3000, 3.0, [0.1, 0.3, 0.95], normalize(np.array([0.55, 0.25, 0.8])))
    step = 1400
    u[step:] = u[step:] @ rotation_matrix([1.0, -0.5, 0.2], math.radians(45.0)).T
    blk = make_stream(sensor, t, u, 5000.0, sigma)
    burst = np.arange(1000, 1800)
    add_burst(blk, sigma, burst, 10.0)
    settings = FilterSettings()
    k = settings.lost_after_gated
    tracker = Tracker(cal, settings, GridInitiator(cal.model))
    rec = tracker.run_arrays(blk)
    err = errors_deg(rec, u)
    reacquired = step + np.flatnonzero(rec.flags[step:] & F.REACQUIRED)[0]
    assert reacquired - step + 1 <= k and np.all(rec.flags[step:reacquired] & F.GATED)
    assert tracker.resets[-1].reason == "gated" and tracker.counters.acquisitions == 2
    true_jump = math.degrees(angle_between(u[step - 1], u[step]))
    assert tracker.resets[-1].jump_deg == pytest.approx(true_jump, abs=2.0)
    after = np.arange(reacquired, burst[-1])
    assert np.mean(err[after] < 2 * rec.sigma_deg[after]) >= 0.9
    assert rec.noise_scale[reacquired] > 5.0


def test_single_spikes_are_gated_inside_and_outside_a_burst(two_probe):
    """Lone spikes of 80 calibrated sigma are rejected (the spiked probe is left out, or the whole sample gated),
    and the noise level ignores them: NOISY stays off but for the rare brief false alarms of a calm stream (a
    9-value median of noise values above 2.5 times its baseline; neighbouring values share lock-in samples,
    so fewer than 9 are independent: under 2 %)."""
    sensor, cal, sigma = two_probe
    blk, u = turning_stream(sensor, sigma)
    rng = np.random.default_rng(12)
    spikes = np.arange(300, 3000, 37)
    spiked = rng.integers(0, 4, spikes.size)
    blk.z[spikes, spiked] += 80 * sigma.max() * np.exp(2j * np.pi * rng.random(spikes.size))
    tracker = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    rec = tracker.run_arrays(blk)
    spiked_probe = np.array([1, 1, 2, 2])[spiked]
    left_out = (rec.flags[spikes] & F.TRACKING) > 0
    assert np.all(left_out | (rec.flags[spikes] & F.GATED > 0))
    assert np.all(rec.probes_used[spikes][left_out] == 3 - spiked_probe[left_out])
    assert rec.noise_scale.max() < 2.0 and np.mean(rec.flags & F.NOISY > 0) < 0.02
    assert errors_deg(rec, u)[1:].max() < 0.3


def test_innovation_loglik_matches_tracker_through_a_burst(two_probe):
    """The tuner's objective runs the same adaptive noise as the tracker: through a burst (and with other
    windows, thresholds and the switch off) its mean NIS and gated fraction equal the tracker's."""
    sensor, cal, sigma = two_probe
    blk, u = turning_stream(sensor, sigma, n=1500)
    add_burst(blk, sigma, np.arange(600, 1000), 8.0)
    add_burst(blk, sigma, np.arange(1200, 1300), 4.0, channels=[0, 1], seed=10)
    base = FilterSettings()
    candidates = [base, base.replace(adaptive_noise_window_samples=5), base.replace(adaptive_noise_threshold=1.5),
                  base.replace(adaptive_noise=False), base.replace(adaptive_noise_max_scale=3.0)]
    scores = innovation_loglik(cal, blk, candidates, GridInitiator(cal.model))
    for k, s in enumerate(candidates):
        tracker = Tracker(cal, s, GridInitiator(cal.model))
        rec = tracker.run_arrays(blk)
        fused = (rec.flags & F.TRACKING) > 0
        assert scores.mean_nis[k] == pytest.approx(rec.nis[fused].mean(), rel=1e-9)
        scored = np.isfinite(rec.nis)
        assert scores.fraction_gated[k] == pytest.approx(np.mean(rec.flags[scored] & F.GATED > 0), abs=1e-12)
        assert scores.reacquisitions[k] == tracker.counters.acquisitions - 1
    assert scores.reacquisitions[3] > 0 and scores.reacquisitions[0] == 0


def test_probes_with_unequal_channel_counts(two_probe):
    """Three channels (probe 1 at both pumps, probe 2 at pump a only): the per-probe noise level works with
    groups of unequal size (4 and 2 real measurements), and a burst on channel 2a is absorbed by probe 2."""
    sensor, _, sigma = two_probe
    _, pumps, probes = make_sensor(seed=1, n_probes=2)           # the nominal axes of the same sensor
    u_scan, b_scan, z_scan, f_scan, _ = scan(sensor, [5000.0], 800, seed=2)
    keep = [0, 1, 2]
    cal = fit_calibration(u_scan, b_scan, z_scan[:, keep], f_scan, ("1a", "1b", "2a"), pumps, probes)
    blk, u = turning_stream(sensor, sigma)
    add_burst(blk, sigma, np.arange(1000, 1800), 10.0, channels=[2])
    blk = SampleBlock(blk.t, blk.f, blk.z[:, keep], ("1a", "1b", "2a"))
    tracker = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    rec = tracker.run_arrays(blk)
    err = errors_deg(rec, u)
    burst = np.arange(1000, 1800)
    assert tracker.counters.acquisitions == 1
    assert np.mean(err[burst] < 2 * rec.sigma_deg[burst]) >= 0.9
    assert 6.0 < np.median(rec.noise_scale[burst]) < 15.0
