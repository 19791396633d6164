"""Tuner speed on a 100,000-sample recording, beside scoring the same candidates one after another.

Run: `pytest benchmarks/bench_tune.py --benchmark-enable -s` (the process is pinned to one CPU).
The recording: the simulated two-probe sensor (calibrated from examples/calibration_scan.toml),
200 Hz for 500 s, the field following the tracker's own motion model (angle random walk 0.7
deg/sqrt(s), rate random walk 6 (deg/s)/sqrt(s), 1.5 mV noise). The tuner decimates it to its
default 20,000 samples. Measured side by side, on those 20,000 samples and the 36 candidates of
the tuner's first round:
  - vectorized: one innovation_loglik call advancing all 36 filters together (what the tuner does);
  - baseline A: Tracker.run_arrays once per candidate (one replay after another);
  - baseline B: innovation_loglik with one candidate at a time, timed on the first 6 candidates
    (36 would take minutes); extra_info gives the per-candidate time and the total it implies.
"""

import time

import numpy as np
import pytest

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.innovation import innovation_loglik
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.tracker import Tracker
from fieldvane.estimator.tuning import (KNOBS, MOTION_KNOBS, decimate, log_grid, measurement_noise,
                                        points_per_axis, settings_grid, tune)
from fieldvane.io.calfile import load_calibration
from fieldvane.io.cli import main
from fieldvane.io.recording import read_recording, write_recording
from fieldvane.io.table_cache import cache_dir_for, load_or_build_table
from test_tune import EXAMPLES, random_walk_columns

N_RECORDING = 100_000
MAX_SAMPLES = 20_000
N_BASELINE_B = 6
RESULTS = {}

pytestmark = pytest.mark.benchmark_suite


# one_core (pinning to a single CPU) comes from benchmarks/conftest.py.

@pytest.fixture(scope="module")
def problem(tmp_path_factory):
    d = tmp_path_factory.mktemp("bench_tune")
    assert main(["simulate", str(EXAMPLES / "calibration_scan.toml"), "-o", str(d / "scan.csv")]) == 0
    assert main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json")]) == 0
    cal = load_calibration(d / "cal.json")
    table, _ = load_or_build_table(cal, cache_dir_for(d / "cal.json"))
    solver = SnapshotSolver.from_calibration(cal, table)
    write_recording(d / "long.csv", random_walk_columns(N_RECORDING, seed=5))
    block, _ = read_recording(d / "long.csv")
    used, _ = decimate(block, MAX_SAMPLES)
    # The tuner's first-round candidates, around its noise estimate.
    scale = measurement_noise(cal, solver, used).scale
    first = np.array([KNOBS[k].first_round for k in MOTION_KNOBS])
    grid = log_grid(first.mean(axis=1), 0.5 * (first[:, 1] - first[:, 0]), points_per_axis(None, 2),
                    np.array([KNOBS[k].limits for k in MOTION_KNOBS]))
    candidates = settings_grid(FilterSettings(measurement_noise_scale=scale), MOTION_KNOBS, grid)
    return cal, solver, block, used, candidates


def _record(benchmark, key, candidate_samples):
    if benchmark.stats is not None:
        seconds = benchmark.stats.stats.min
        RESULTS[key] = seconds
        benchmark.extra_info["seconds"] = round(seconds, 2)
        benchmark.extra_info["candidate_samples_per_s"] = round(candidate_samples / seconds)


def test_tune_100k_samples(benchmark, problem):
    cal, solver, block, _, _ = problem
    result = benchmark.pedantic(tune, args=(cal, block, solver), kwargs={"max_samples": MAX_SAMPLES},
                                rounds=1, iterations=1)
    t = result.search.table
    benchmark.extra_info.update(samples=len(block), used=result.samples_used, decimation=result.decimation,
                                candidates_scored=len(t), rounds=result.search.rounds,
                                arw=round(result.settings.angle_random_walk_deg_rt_s, 4),
                                rrw=round(result.settings.rate_random_walk_deg_s_rt_s, 4),
                                noise_scale=round(result.noise.scale, 4))
    _record(benchmark, "tune", len(t) * result.samples_used)


def test_round_vectorized(benchmark, problem):
    cal, solver, _, used, candidates = problem
    scores = benchmark.pedantic(innovation_loglik, args=(cal, used, candidates, solver.initiate),
                                rounds=1, iterations=1)
    assert np.all(np.isfinite(scores.loglik))
    benchmark.extra_info.update(candidates=len(candidates), samples=len(used))
    _record(benchmark, "vectorized", len(candidates) * len(used))


def test_round_baseline_tracker_one_by_one(benchmark, problem):
    cal, solver, _, used, candidates = problem

    def run():
        return [Tracker(cal, c, solver.initiate).run_arrays(used) for c in candidates]

    benchmark.pedantic(run, rounds=1, iterations=1)
    benchmark.extra_info.update(candidates=len(candidates), samples=len(used))
    _record(benchmark, "tracker_one_by_one", len(candidates) * len(used))
    if "vectorized" in RESULTS:
        benchmark.extra_info["vectorized_speedup"] = round(RESULTS["tracker_one_by_one"] / RESULTS["vectorized"], 1)


def test_round_baseline_loglik_one_at_a_time(benchmark, problem):
    cal, solver, _, used, candidates = problem
    subset = candidates[:N_BASELINE_B]

    def run():
        return [innovation_loglik(cal, used, [c], solver.initiate) for c in subset]

    start = time.perf_counter()
    benchmark.pedantic(run, rounds=1, iterations=1)
    elapsed = time.perf_counter() - start
    per_candidate = elapsed / len(subset)
    benchmark.extra_info.update(candidates_timed=len(subset), samples=len(used),
                                seconds_per_candidate=round(per_candidate, 2),
                                implied_seconds_for_all=round(per_candidate * len(candidates), 1))
    _record(benchmark, "loglik_one_at_a_time", len(subset) * len(used))
    if "vectorized" in RESULTS:
        benchmark.extra_info["vectorized_speedup_implied"] = round(
            per_candidate * len(candidates) / RESULTS["vectorized"], 1)
