"""Tracker speed on one core beside a plain filterpy ExtendedKalmanFilter with finite-difference Jacobians.

Run: `pytest benchmarks/bench_tracker.py --benchmark-enable -s` (the process is pinned to one CPU).
Two probes (8 real measurements), 200 Hz, field turning at 3 deg/s, for two sensors: an ideal one
(the calibration keeps harmonic degree 2) and one with a smooth direction-dependent distortion
(the fit picks a higher degree, as real sensors need). The baseline estimates the same state as
the tracker (direction, as polar and azimuth angles, plus the 3-D angular velocity) with the
textbook EKF recipe: nonlinear predict and measurement functions, both Jacobians by forward
differences over its state. extra_info carries filter updates per second, the ratio to the
baseline, the accuracy of both (so speed is not bought with accuracy), and the peak Python memory
of a long replay (tracemalloc).
"""

import math
import resource
import tracemalloc

import numpy as np
import pytest
from filterpy.kalman import ExtendedKalmanFilter

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.innovation import innovation_loglik
from fieldvane.estimator.response import to_real
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.sphere import angle_between, normalize, spherical_to_unit, unit_to_spherical
from filterpy.common import Q_continuous_white_noise

from fieldvane.estimator import filter_core as core
from fieldvane.estimator.tracker import Tracker
from fieldvane.estimator.calibration import fit_calibration
from synthetic_sensor import make_sensor, scan
from test_tracker import B0, DT, GridInitiator, make_stream, rotating

N_TRACK = 4000       # samples per tracker run
N_BASELINE = 400     # samples for the (much slower) baseline
N_LONG = 100_000     # samples of the long replay for peak memory (500 s at 200 Hz)
RESULTS = {}

pytestmark = pytest.mark.benchmark_suite


# one_core (pinning to a single CPU) comes from benchmarks/conftest.py.

@pytest.fixture(scope="module", params=[0.0, 0.05], ids=["ideal", "distorted"])
def problem(request):
    sensor, pumps, probes = make_sensor(seed=1, n_probes=2, distortion=request.param)
    u, b, z, f, sigma = scan(sensor, [B0], 800, seed=2)
    cal = fit_calibration(u, b, z, f, sensor.channels, pumps, probes)
    t, u = rotating(N_TRACK, 3.0, [0.3, 1.0, 0.2], normalize(np.array([1.0, 0.5, 0.7])))
    return cal, make_stream(sensor, t, u, B0, sigma), u, request.param_index


def rms_deg(u_est, u_true, skip=200):
    return round(float(np.sqrt(np.mean(np.degrees(angle_between(u_est[skip:], u_true[skip:])) ** 2))), 4)


def truth_initiator(u0):
    """Start from the true first direction (speed runs need no search)."""
    return lambda sample, b: (u0, np.eye(2) * 1e-6)


def record_rate(benchmark, key, n):
    if benchmark.stats is not None:
        rate = n / benchmark.stats.stats.min
        benchmark.extra_info["updates_per_s"] = round(rate)
        RESULTS[key] = rate


def test_tracker_array_path(benchmark, problem):
    cal, block, u, which = problem

    def setup():
        return (Tracker(cal, FilterSettings(), truth_initiator(u[0])),), {}

    rec = benchmark.pedantic(lambda tracker: tracker.run_arrays(block), setup=setup, rounds=7, iterations=1)
    benchmark.extra_info.update(samples=N_TRACK, rms_err_deg=rms_deg(rec.u, u))
    record_rate(benchmark, ("array", which), N_TRACK)


@pytest.mark.parametrize("gain_drift", [True, False], ids=["gain-states", "no-drift-states"])
def test_compiled_step_alone(benchmark, problem, gain_drift):
    """The compiled core's per-sample step over 100,000 prepared samples (two probes; the default gain states on,
    and off), without the Python preparation and output assembly around it: microseconds per sample."""
    cal, block, u, which = problem
    sensor, _, _ = make_sensor(seed=1, n_probes=2, distortion=[0.0, 0.05][which])
    n_long = 100_000
    t = np.arange(n_long) * DT
    axis, u0 = normalize(np.array([0.3, 1.0, 0.2])), normalize(np.array([1.0, 0.5, 0.7]))
    ang = np.radians(3.0) * t[:, None]
    u_long = u0 * np.cos(ang) + np.cross(axis, u0) * np.sin(ang) + axis * (axis @ u0) * (1 - np.cos(ang))
    long_block = make_stream(sensor, t, u_long, B0, cal.model.noise_std)
    settings = FilterSettings(gain_drift=gain_drift)
    prepared = Tracker(cal, settings, truth_initiator(u[0])).prepare(long_block.t, long_block.f, long_block.z,
                                                                       long_block.channels)
    n = len(prepared.t)

    def setup():
        tracker = Tracker(cal, settings, truth_initiator(u[0]), sample_rate_hz=1 / DT)
        fout, iout = np.empty((n, core.N_FOUT)), np.zeros((n, core.N_IOUT), np.int64)
        head = tracker.prepare(long_block.t[:2], long_block.f[:2], long_block.z[:2], long_block.channels)
        tracker._run_prepared(head, fout[:2], iout[:2], long_block.sample)     # the acquisition
        return (tracker, fout, iout), {}

    def run(tracker, fout, iout):
        a = tracker._arrays
        return core.run_filter(*a.kernel_args(), prepared.t, prepared.zw, prepared.segment, prepared.seg_t,
                               prepared.flags, prepared.restarted, prepared.model_error, tracker._sigma_log, fout,
                               iout, 2, n, 0, False, np.zeros(3), np.zeros(3), np.eye(2), tracker._init_var)

    stop = benchmark.pedantic(run, setup=setup, rounds=5, iterations=1)
    assert stop == n
    if benchmark.stats is not None:
        us = 1e6 * benchmark.stats.stats.min / n
        benchmark.extra_info.update(samples=n, us_per_sample=round(us, 3), states=7 if gain_drift else 5)
        print(f"\n[compiled step, {'gain states' if gain_drift else 'no drift states'}, degree {cal.model.degree}] "
              f"{us:.2f} us/sample")


def test_tracker_step_path(benchmark, problem):
    cal, block, u, which = problem
    samples = [block.sample(i) for i in range(N_TRACK)]

    def setup():
        return (Tracker(cal, FilterSettings(), truth_initiator(u[0])),), {}

    est = benchmark.pedantic(lambda tracker: [tracker.step(s) for s in samples], setup=setup, rounds=5,
                             iterations=1)
    benchmark.extra_info.update(samples=N_TRACK, rms_err_deg=rms_deg(np.array([e.u for e in est]), u))
    record_rate(benchmark, ("step", which), N_TRACK)


def rotate_angles(x, dt):
    """Return the state [polar, azimuth, wx, wy, wz] after dt s: the direction turned about w (Rodrigues)."""
    polar, azimuth, wx, wy, wz = (float(v) for v in x[:, 0])
    s = math.sin(polar)
    ux, uy, uz = s * math.cos(azimuth), s * math.sin(azimuth), math.cos(polar)
    th = math.sqrt(wx * wx + wy * wy + wz * wz) * dt
    if th > 0:
        kx, ky, kz = wx * dt / th, wy * dt / th, wz * dt / th
        c, sn = math.cos(th), math.sin(th)
        kv = (kx * ux + ky * uy + kz * uz) * (1 - c)
        ux, uy, uz = (ux * c + (ky * uz - kz * uy) * sn + kx * kv, uy * c + (kz * ux - kx * uz) * sn + ky * kv,
                      uz * c + (kx * uy - ky * ux) * sn + kz * kv)
    return np.array([[math.acos(max(-1.0, min(1.0, uz)))], [math.atan2(uy, ux)], [wx], [wy], [wz]])


def forward_difference(fun, x, columns, eps=1e-7):
    """Return the Jacobian of fun at x by forward differences over the first `columns` states (the rest zero)."""
    f0 = fun(x)
    out = np.zeros((f0.shape[0], x.shape[0]))
    for k in range(columns):
        dx = np.zeros_like(x)
        dx[k] = eps
        out[:, k:k + 1] = (fun(x + dx) - f0) / eps
    return out


def baseline_run(cal, block, u0, n, columns):
    """Plain filterpy EKF, state [polar, azimuth, wx, wy, wz]: F and H by forward differences, H over `columns`."""
    model = cal.model
    settings = FilterSettings()
    b = float(np.mean(block.f[0] / cal.gammas_hz_per_nt))
    ekf = ExtendedKalmanFilter(dim_x=5, dim_z=2 * model.n_channels)
    polar, azimuth = unit_to_spherical(u0)
    ekf.x = np.array([[polar], [azimuth], [0.0], [0.0], [0.0]])
    ekf.P = np.diag([1e-6, 1e-6] + [math.radians(settings.initial_rate_std_deg_s) ** 2] * 3)
    # The tracker's process noise without its direction-rate cross term (the chart differs): per axis filterpy's
    # continuous white-noise model of the rate, plus the angle random walk on the angles.
    cwn = Q_continuous_white_noise(dim=2, dt=DT, spectral_density=math.radians(settings.rate_random_walk_deg_s_rt_s) ** 2)
    q = np.zeros((5, 5))
    q[0, 0] = q[1, 1] = cwn[0, 0] + math.radians(settings.angle_random_walk_deg_rt_s) ** 2 * DT
    q[2, 2] = q[3, 3] = q[4, 4] = cwn[1, 1]
    ekf.Q = q
    ekf.R = np.diag(model.measurement_noise() ** 2)

    def fx(x):
        return rotate_angles(x, DT)

    def predict_x(u=0):
        ekf.F = forward_difference(fx, ekf.x, 5)
        ekf.x = fx(ekf.x)

    ekf.predict_x = predict_x       # filterpy's hook for a nonlinear transition

    def hx(x):
        return to_real(model.h(spherical_to_unit(x[0, 0], x[1, 0]), b))[0][:, None]

    def jacobian(x):
        return forward_difference(hx, x, columns)

    zr = to_real(block.z)
    out = np.empty((n, 3))
    for i in range(n):
        ekf.predict()
        ekf.update(zr[i][:, None], jacobian, hx)
        out[i] = spherical_to_unit(ekf.x[0, 0], ekf.x[1, 0])
    return out


@pytest.mark.parametrize("columns", [5, 2], ids=["generic-fd", "angle-columns-fd"])
def test_baseline_filterpy_ekf(benchmark, problem, columns):
    """Baseline: forward-difference Jacobians over all 5 states (6 model evaluations per update, 6 of the
    transition per prediction), and the hand-trimmed variant whose H skips the rate columns h does not
    depend on (3 model evaluations)."""
    cal, block, u, which = problem
    est = benchmark.pedantic(baseline_run, args=(cal, block, u[0], N_BASELINE, columns), rounds=3, iterations=1)
    mine = Tracker(cal, FilterSettings(), truth_initiator(u[0])).run_arrays(block)
    benchmark.extra_info.update(samples=N_BASELINE, rms_err_deg=rms_deg(est, u[:N_BASELINE]),
                                tracker_rms_err_deg_same_samples=rms_deg(mine.u[:N_BASELINE], u[:N_BASELINE]))
    record_rate(benchmark, ("baseline", columns, which), N_BASELINE)
    benchmark.extra_info["model_degree"] = cal.model.degree
    base, array, step = (RESULTS.get(k) for k in (("baseline", columns, which), ("array", which), ("step", which)))
    if base and array:
        step = step or math.nan
        benchmark.extra_info.update(array_over_baseline=round(array / base, 1), step_over_baseline=round(step / base, 1))
        print(f"\n[model degree {cal.model.degree}, baseline H over {columns} columns] tracker {array:.0f} updates/s "
              f"(step() {step:.0f}/s), filterpy EKF with finite differences {base:.0f}/s: {array / base:.1f}x "
              f"(step {step / base:.1f}x)")


def test_innovation_loglik_64_candidates(benchmark, problem):
    cal, block, u, which = problem
    if which:
        pytest.skip("measured on the ideal sensor only")
    n = 1000
    short = SampleBlock(block.t[:n], block.f[:n], block.z[:n], block.channels)
    base = FilterSettings()
    candidates = [base.replace(rate_random_walk_deg_s_rt_s=float(r), measurement_noise_scale=float(s))
                  for r in np.geomspace(0.1, 10, 8) for s in np.linspace(0.8, 1.2, 8)]
    scores = benchmark.pedantic(innovation_loglik, args=(cal, short, candidates, truth_initiator(u[0])),
                                rounds=3, iterations=1)
    best = candidates[int(np.argmax(scores.loglik))]
    benchmark.extra_info.update(candidates=len(candidates), samples=n,
                                best_rate_random_walk=best.rate_random_walk_deg_s_rt_s,
                                best_noise_scale=best.measurement_noise_scale)
    if benchmark.stats is not None:
        benchmark.extra_info["candidate_updates_per_s"] = round(n * len(candidates) / benchmark.stats.stats.min)


def test_long_replay_peak_memory(benchmark, problem):
    """Peak traced Python memory of replaying N_LONG samples through run_arrays (outputs included)."""
    cal, block, u, which = problem
    if which:
        pytest.skip("memory does not depend on the model degree; measured once")
    reps = N_LONG // N_TRACK
    long_block = SampleBlock(np.arange(N_LONG) * DT, np.tile(block.f, (reps, 1)), np.tile(block.z, (reps, 1)),
                             block.channels)
    tracker = Tracker(cal, FilterSettings(), GridInitiator(cal.model))
    input_mb = (long_block.z.nbytes + long_block.f.nbytes + long_block.t.nbytes) / 1e6

    def run():
        tracemalloc.start()
        rec = tracker.run_arrays(long_block)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        return rec, peak

    rec, peak = benchmark.pedantic(run, rounds=1, iterations=1)
    maxrss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    benchmark.extra_info.update(samples=N_LONG, input_mb=round(input_mb, 1), peak_traced_mb=round(peak / 1e6, 1),
                                peak_traced_bytes_per_sample=round(peak / N_LONG), process_maxrss_mb=round(maxrss_mb))
    print(f"\nlong replay {N_LONG} samples: peak traced {peak / 1e6:.1f} MB ({peak / N_LONG:.0f} B/sample, "
          f"input {input_mb:.1f} MB), process max RSS {maxrss_mb:.0f} MB")
    assert len(rec) == N_LONG
