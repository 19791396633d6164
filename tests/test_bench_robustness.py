"""The tracker with its default settings on streams carrying what every bench has (examples/*.toml scenarios of the
project's simulator): optical power drifting per probe, a probe going dark or missing, live noise at another
bandwidth than the calibration scan's, a lock-in's low-pass filter.

Yardstick: the median single-sample Cramer-Rao bound at the true directions (estimator/fisher.crlb_deg with the
stream's true noise std), and honesty against the 2-D Gaussian law P(err < k sigma) = 1 - exp(-k^2) (docs/references.md
"Estimation", derived): 63 % at k = 1 (up to 68 % for a flat ellipse), 98 % at k = 2; accepted here 50-80 % and
>= 93 %.
"""

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.fisher import crlb_deg
from fieldvane.estimator.lockin_noise import autocorrelation
from fieldvane.estimator.flags import EstimateFlag as F
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.sphere import angle_between
from fieldvane.estimator.tracker import Tracker
from fieldvane.firmware_sim.scenario import load_scenario, simulate

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
SETTLE_S = 2.0          # the first seconds: acquisition and the noise level being learned


@pytest.fixture(scope="module")
def calibrated():
    """A calibration from examples/calibration_scan.toml (independent samples at 1, 5, 10, 20 uT)."""
    run = simulate(load_scenario(EXAMPLES / "calibration_scan.toml"))
    b = np.linalg.norm(run.applied_b_nT, axis=1)
    cal = fit_calibration(run.applied_b_nT / b[:, None], b, run.z, run.f, run.channels)
    return cal, SnapshotSolver.from_calibration(cal)


def scenario(name, white=False, **changes):
    """Return an example scenario; white=True leaves its lock-in filter out (independent samples)."""
    sc = load_scenario(EXAMPLES / f"{name}.toml")
    if white:
        changes["lockin"] = None
    return dataclasses.replace(sc, **changes) if changes else sc


def track(calibrated, sc, channels=None, settings=None):
    """Simulate a scenario and track it with default settings (lock-in filter from the scenario, as the
    recording's metadata would give it); return (run, TrackRecord, tracker)."""
    cal, solver = calibrated
    run = simulate(sc)
    s = settings or FilterSettings()
    if run.lockin is not None:
        s = s.replace(lockin_time_constant_s=run.lockin.time_constant_s, lockin_filter_order=run.lockin.order)
    keep = list(range(len(run.channels))) if channels is None else [run.channels.index(c) for c in channels]
    block = SampleBlock(run.t, run.f, run.z[:, keep], tuple(run.channels[k] for k in keep))
    tracker = Tracker(cal, s, solver.initiate, sample_rate_hz=run.sample_rate_hz)
    return run, tracker.run_arrays(block), tracker


def truth_at(run, t):
    """Return the true unit direction at times t (s), interpolated (estimates describe t minus the lock-in delay)."""
    u = np.column_stack([np.interp(t, run.t, run.u[:, k]) for k in range(3)])
    return u / np.linalg.norm(u, axis=1)[:, None]


def scores(run, rec, model, noise_std, probes=None, rows=None):
    """Return errors and the yardsticks after the settling time: dict of err (deg), sigma, bound (median, deg)."""
    ut = truth_at(run, rec.t)
    keep = rec.t >= rec.t[0] + SETTLE_S
    if rows is not None:
        keep &= rows
    err = np.degrees(angle_between(rec.u[keep], ut[keep]))
    bound = np.median(crlb_deg(model, ut[keep][::10], float(np.median(run.b_nT)), probes=probes,
                               noise_std=noise_std))
    return dict(err=err, sigma=rec.sigma_deg[keep], bound=bound, rms=float(np.sqrt(np.mean(err ** 2))),
                flags=rec.flags[keep])


def assert_honest(s):
    """50-80 % of errors within sigma, >= 93 % within 2 sigma (see the module docstring)."""
    w1, w2 = np.mean(s["err"] < s["sigma"]), np.mean(s["err"] < 2 * s["sigma"])
    assert 0.5 <= w1 <= 0.8 and w2 >= 0.93, (w1, w2)


# ------------------------------------------------------------------------------------- power drift
@pytest.mark.parametrize("name", ["bench_power_drift", "bench_probe_drifts"])
def test_optical_power_drift_is_tracked_with_defaults(calibrated, name):
    """1.5 % common drift; 3-5 % independent drifts per probe over 120 s: with the default settings (gain states
    on) RMS <= 0.5x the median single-sample bound, honest sigma, <= 2 % gated, <= 3 re-acquisitions, no flips."""
    run, rec, tracker = track(calibrated, scenario(name, white=True))
    s = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std)
    assert s["rms"] <= 0.5 * s["bound"], (s["rms"], s["bound"])
    assert_honest(s)
    assert np.mean(rec.flags & F.GATED > 0) <= 0.02
    assert tracker.counters.acquisitions - 1 <= 3
    assert s["err"].max() < 1.0                                     # no mirror flip
    # the drift is carried by the gain states, not by an inflated noise level
    assert np.all(np.abs(tracker.noise_baseline - 1.0) < 0.15)


def test_without_gain_states_the_same_drift_breaks_the_track(calibrated):
    """The reason gain states are on by default: the per-probe drifts without them are rejected as noise."""
    run, rec, tracker = track(calibrated, scenario("bench_probe_drifts", white=True),
                              settings=FilterSettings(gain_drift=False))
    s = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std)
    assert s["rms"] > 0.5 * s["bound"] or np.mean(s["err"] < 2 * s["sigma"]) < 0.93


# ------------------------------------------------------------------------------------ probe subsets
def test_one_probe_recording_against_a_two_probe_calibration(calibrated):
    """Only probe 1's columns (a clean stream): tracked at <= 0.75x the one-probe bound, honest, every row estimated,
    probes_used = 1 throughout."""
    sc = scenario("wide_bandwidth", white=True, events=())
    run, rec, tracker = track(calibrated, sc, channels=("1a", "1b"))
    s = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std, probes=[1])
    assert s["rms"] <= 0.75 * s["bound"], (s["rms"], s["bound"])
    assert_honest(s)
    assert np.all(np.isin(rec.probes_used, (0, 1))) and np.mean(rec.probes_used == 1) > 0.99
    assert np.all(np.isfinite(rec.u))


def test_a_probe_missing_for_ten_seconds(calibrated):
    """Probe 2's fields empty for 10 s: >= 99 % of rows estimated, <= 0.75x the one-probe bound inside the dropout,
    probes_used right on >= 90 % of rows."""
    run, rec, tracker = track(calibrated, scenario("probe2_dropout", white=True))
    gap = np.all(np.isnan(run.z[:, 2:]), axis=1)
    assert 9.9 <= gap.sum() / run.sample_rate_hz <= 10.1
    assert np.mean(np.isfinite(rec.u[:, 0])) >= 0.99
    inside = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std, probes=[1], rows=gap)
    assert inside["rms"] <= 0.75 * inside["bound"], (inside["rms"], inside["bound"])
    right = np.where(gap, rec.probes_used == 1, rec.probes_used == 3)
    assert np.mean(right) >= 0.9
    assert tracker.counters.acquisitions == 1


def test_a_probe_whose_light_fades(calibrated):
    """Probe 2's light fades to almost nothing: LOW_SIGNAL while it is dark and it stops being fused; the track holds
    on probe 1 (a few re-acquisitions at most, honest sigma)."""
    sc = scenario("probe2_fade", white=True)
    run, rec, tracker = track(calibrated, sc)
    (fade,) = [e for e in sc.events if type(e).__name__ == "Fade"]
    light = fade.factor(run.t)
    dark = light < 0.03
    low = (rec.flags & F.LOW_SIGNAL) > 0
    assert dark.mean() > 0.1 and np.mean(low[dark]) > 0.9            # LOW_SIGNAL where it is dark
    assert np.all(rec.probes_used[low] & 2 == 0)                     # and probe 2 is not fused then
    assert np.mean(low[light > 0.5]) < 0.01
    assert tracker.counters.acquisitions - 1 <= 3
    s = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std)
    assert np.mean(s["err"] < 2 * s["sigma"]) >= 0.93


# ------------------------------------------------------------------------------------- noise level
def _noise_times(sc, factor):
    """Return the scenario with every channel's noise std multiplied by factor."""
    sensor = dataclasses.replace(sc.sensor, noise_x_V=tuple(factor * v for v in sc.sensor.noise_x_V),
                                 noise_y_V=tuple(factor * v for v in sc.sensor.noise_y_V))
    return dataclasses.replace(sc, sensor=sensor)


@pytest.mark.parametrize("factor", [math.sqrt(6.0), 6.0])
def test_noisy_means_noisier_than_the_streams_own_normal(calibrated, factor):
    """A live stream at sqrt(6)x (6x the bandwidth) and at 6x the scan's noise std: NOISY on <= 5 % of the clean
    stream, its normal level learned (printed by replay), and on >= 80 % of a 10x burst within it."""
    clean = _noise_times(scenario("wide_bandwidth", white=True), factor)
    run, rec, tracker = track(calibrated, clean)
    late = rec.t > rec.t[0] + SETTLE_S
    assert np.mean(rec.flags[late] & F.NOISY > 0) <= 0.05
    assert np.allclose(tracker.noise_baseline, factor, rtol=0.15)
    s = scores(run, rec, calibrated[0].model, factor * calibrated[0].model.noise_std)
    assert_honest(s)
    burst_sc = _noise_times(scenario("wide_bandwidth_burst", white=True), factor)
    run, rec, tracker = track(calibrated, burst_sc)
    (ev,) = [e for e in burst_sc.events if type(e).__name__ == "NoiseBurst"]
    burst = (run.t >= ev.start_s) & (run.t < ev.start_s + ev.duration_s)
    assert np.mean(rec.flags[burst] & F.NOISY > 0) >= 0.8
    outside = ~burst & (rec.t > rec.t[0] + SETTLE_S) & (run.t < ev.start_s - 1.0)
    assert np.mean(rec.flags[outside] & F.NOISY > 0) <= 0.05


# ------------------------------------------------------------------------------------------ lock-in
def test_through_a_four_stage_lock_in_filter(calibrated):
    """A field turning at 6 deg/s seen through a 4-stage, 5 ms lock-in at 200 Hz (samples correlated ~0.9): with
    defaults (the lock-in's settings from the stream) 50-80 % within sigma, >= 93 % within 2 sigma, RMS <= 0.8x the
    median single-sample bound, mean error along the motion within +-0.02 deg (the 20 ms group delay removed from t),
    <= 2 % gated, no re-acquisition after the first."""
    sc = scenario("lockin_filtered_turn")
    run, rec, tracker = track(calibrated, sc)
    assert tracker.delay_s == pytest.approx(0.02) and tracker.kappa > 5.0
    s = scores(run, rec, calibrated[0].model, calibrated[0].model.noise_std)
    assert s["rms"] <= 0.8 * s["bound"], (s["rms"], s["bound"])
    assert_honest(s)
    assert np.mean(rec.flags & F.GATED > 0) <= 0.02 and tracker.counters.acquisitions == 1
    ut = truth_at(run, rec.t)
    v = np.gradient(run.u, run.t, axis=0)
    v = np.column_stack([np.interp(rec.t, run.t, v[:, k]) for k in range(3)])
    v /= np.linalg.norm(v, axis=1)[:, None]
    keep = rec.t >= rec.t[0] + SETTLE_S
    along = np.degrees(np.mean(np.sum((rec.u - ut) * v, axis=1)[keep]))
    assert abs(along) <= 0.02, along
    # Without the delay correction the estimates would lag by 6 deg/s x 20 ms = 0.12 deg.
    speed = np.degrees(np.median(np.linalg.norm(np.gradient(run.u, run.t, axis=0), axis=1)))
    assert speed == pytest.approx(6.0, rel=0.01)
    lagged = np.degrees(np.mean(np.sum((rec.u - truth_at(run, rec.t + tracker.delay_s)) * v, axis=1)[keep]))
    assert lagged == pytest.approx(-0.12, abs=0.02)


# ------------------------------------------------------------------- the whole bench, lock-in included
@pytest.fixture(scope="module")
def calibrated_lockin():
    """A calibration from examples/calibration_scan_lockin.toml: the bench's 4 x 5 ms lock-in, 8 correlated
    samples recorded at each coil setting (as a real stepped scan records them)."""
    run = simulate(load_scenario(EXAMPLES / "calibration_scan_lockin.toml"))
    b = np.linalg.norm(run.applied_b_nT, axis=1)
    cal = fit_calibration(run.applied_b_nT / b[:, None], b, run.z, run.f, run.channels)
    return cal, SnapshotSolver.from_calibration(cal)


def test_a_lock_in_scan_calibrates_as_well_as_a_white_one(calibrated, calibrated_lockin):
    """Correlated samples of one coil setting stay in one cross-validation fold, so the corrections' degree is
    chosen on honest held-out data (with the samples split across folds it chose degree 6 and the model's
    direction errors put only 62 % of a white stream's errors within 2 sigma)."""
    assert calibrated_lockin[0].model.degree <= calibrated[0].model.degree + 1
    run, rec, tracker = track(calibrated_lockin, scenario("bench_power_drift", white=True))
    s = scores(run, rec, calibrated_lockin[0].model, calibrated_lockin[0].model.noise_std)
    assert s["rms"] <= 0.5 * s["bound"], (s["rms"], s["bound"])
    assert_honest(s)


def test_lock_in_scan_axis_sigma_counts_its_correlated_samples(calibrated_lockin):
    """The 8 samples of a coil setting are one cluster: the axis covariance grows by their design effect
    1 + (2/m) sum_k (m - k) rho_k (L. Kish, 'Survey Sampling', 1965), here with rho_k of the 4-stage 5 ms RC filter
    at 200 Hz (estimator/lockin_noise.autocorrelation, itself checked against scipy.signal.impulse in
    test_sim_lockin.py): about 4.7. The levels' axis shifts are then within noise: no missing effect is claimed."""
    cal = calibrated_lockin[0]
    m = 8
    rho = autocorrelation(np.arange(1, m) / 200.0, 0.005, 4)
    design_effect = 1 + 2.0 / m * sum((m - k) * rho[k - 1] for k in range(1, m))
    assert cal.fit_info["covariance_inflation"] == pytest.approx(design_effect, rel=0.1)
    assert max(cal.fit_info["level_dispersion"]) < 3.0, cal.fit_info["level_dispersion"]


@pytest.mark.parametrize("name", ["bench_power_drift", "bench_probe_drifts"])
def test_drift_through_the_lock_in_with_a_lock_in_calibration(calibrated_lockin, name):
    """The bench as it is: calibration scan and stream both through the 4 x 5 ms lock-in, power drifting, defaults.
    RMS <= 0.8x the median single-sample bound (the lock-in target; neighbouring samples correlate ~0.9, so a
    filter gains less from averaging than on independent samples), 2 sigma honest, <= 2 % gated, <= 3
    re-acquisitions. Within 1 sigma: 50-85 %: the default gain-drift rate is sized for 3-5 % drifts, so on the
    gentler 1.5 % drift sigma is a little conservative (76-83 % over seeds 1-4 and the scenario's own)."""
    cal = calibrated_lockin[0]
    run, rec, tracker = track(calibrated_lockin, scenario(name))
    s = scores(run, rec, cal.model, cal.model.noise_std)
    assert s["rms"] <= 0.8 * s["bound"], (s["rms"], s["bound"])
    w1, w2 = np.mean(s["err"] < s["sigma"]), np.mean(s["err"] < 2 * s["sigma"])
    assert 0.5 <= w1 <= 0.85 and w2 >= 0.93, (w1, w2)
    assert np.mean(rec.flags & F.GATED > 0) <= 0.02
    assert tracker.counters.acquisitions - 1 <= 3


def test_probe_dropout_and_fade_through_the_lock_in(calibrated_lockin):
    """Probe 2 missing for 10 s, then (another stream) fading to dark, both through the lock-in and calibrated
    through it: inside the dropout <= 0.75x the one-probe bound and every row estimated; through the fade 2 sigma
    honest, probe 2 not fused while dark, no re-acquisition."""
    cal = calibrated_lockin[0]
    run, rec, tracker = track(calibrated_lockin, scenario("probe2_dropout"))
    gap = np.all(np.isnan(run.z[:, 2:]), axis=1)
    assert np.all(np.isfinite(rec.u[:, 0]))
    inside = scores(run, rec, cal.model, cal.model.noise_std, probes=[1], rows=gap)
    assert inside["rms"] <= 0.75 * inside["bound"], (inside["rms"], inside["bound"])
    assert np.mean(rec.probes_used[gap] == 1) >= 0.9
    run, rec, tracker = track(calibrated_lockin, scenario("probe2_fade"))
    s = scores(run, rec, cal.model, cal.model.noise_std)
    assert np.mean(s["err"] < 2 * s["sigma"]) >= 0.93
    assert np.all(rec.probes_used[(rec.flags & F.LOW_SIGNAL) > 0] & 2 == 0)
    assert tracker.counters.acquisitions == 1


# ----------------------------------------------------------------------------- a realistic cell's |B|
@pytest.fixture(scope="module")
def realistic():
    """A calibration (with its magnitude model) from examples/realistic_scan.toml: light shifts, loops locked to
    the exchange-pulled resonances, per-isotope heading error, lower levels, pump-angle efficiency."""
    run = simulate(load_scenario(EXAMPLES / "realistic_scan.toml"))
    b = np.linalg.norm(run.applied_b_nT, axis=1)
    cal = fit_calibration(run.applied_b_nT / b[:, None], b, run.z, run.f, run.channels)
    assert cal.magnitude_model is not None
    return cal, SnapshotSolver.from_calibration(cal)


@pytest.mark.parametrize("name, limit_nT", [("realistic_turn_1000nT", 0.0005 * 1000), ("realistic_turn_50000nT", 0.5)])
def test_magnitude_of_a_realistic_cell(realistic, name, limit_nT):
    """|B| after the calibrated corrections: RMS error <= 0.05 % at 1 uT and <= 0.5 nT at 50 uT, where the raw
    isotopes disagree by 0.4 % and by heading errors of several nT; MAGNITUDE_DISAGREE on < 1 % of these healthy
    samples; sigma_b_nT honest (1-D Gaussian: 68 % within 1 sigma, 95 % within 2: accepted 55-85 % and >= 93 %);
    the direction honest too."""
    cal = realistic[0]
    run, rec, tracker = track(realistic, scenario(name))
    keep = rec.t >= rec.t[0] + SETTLE_S
    err_b = rec.b_nT[keep] - np.interp(rec.t[keep], run.t, run.b_nT)
    raw = run.f[keep] / cal.gammas_hz_per_nt
    if "1000" in name:
        assert np.median(np.abs(raw[:, 0] - raw[:, 1])) > 0.002 * 1000      # the raw isotopes disagree
    assert np.sqrt(np.mean(err_b ** 2)) <= limit_nT
    assert np.mean(rec.flags[keep] & F.MAGNITUDE_DISAGREE > 0) < 0.01
    w1, w2 = np.mean(np.abs(err_b) < rec.sigma_b_nT[keep]), np.mean(np.abs(err_b) < 2 * rec.sigma_b_nT[keep])
    assert 0.55 <= w1 <= 0.85 and w2 >= 0.93, (w1, w2)
    assert_honest(scores(run, rec, cal.model, cal.model.noise_std))
