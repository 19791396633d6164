"""Snapshot inverse speed on one core, beside per-sample scipy least squares from several starts.

Run: `pytest benchmarks/bench_snapshot.py --benchmark-enable -s` (the process is pinned to one CPU
while these run). Both solvers get the same two-probe samples at SNR 300 and must reach the same
accuracy; extra_info carries solutions per second, the ratio, and the error statistics.
"""


import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.response import ResponseModel, to_real
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.sphere import angle_between, exp_map, fibonacci_sphere, tangent_basis
from synthetic_sensor import make_sensor, scan

SNR = 300.0
N_BLOCK = 5000          # samples per snapshot block
N_BASELINE = 200        # samples for the (much slower) per-sample baseline
STARTS = fibonacci_sphere(6)
RESULTS = {}


# one_core (pinning to a single CPU) comes from benchmarks/conftest.py.

@pytest.fixture(scope="module")
def problem():
    sensor, pumps, probes = make_sensor(seed=1, n_probes=2, distortion=0.02)
    u, b, z, f, _ = scan(sensor, [5000, 20000, 50000], 900, snr=1e4, seed=2)
    cal = fit_calibration(u, b, z, f, sensor.channels, pumps, probes)
    noise = np.abs(sensor.gains) / SNR
    m = cal.model
    model = ResponseModel(m.channels, m.degree, m.basis.knots_nT, m.coef, noise)
    rng = np.random.default_rng(3)
    truth = fibonacci_sphere(N_BLOCK)[rng.permutation(N_BLOCK)]
    bb = rng.uniform(5000, 50000, N_BLOCK)
    zz = model.h(truth, bb)
    zz = zz + noise * (rng.normal(size=zz.shape) + 1j * rng.normal(size=zz.shape))
    return cal, model, truth, bb, zz, bb[:, None] * cal.gammas_hz_per_nt


def baseline_solve(model, z, b):
    """Per-sample scipy.optimize.least_squares on a tangent chart, from six starts; best cost wins."""
    from scipy.optimize import least_squares

    target = to_real(z)[0]
    sig = model.measurement_noise()
    best = None
    for u0 in STARTS:
        e1, e2 = tangent_basis(u0)

        def resid(x, u0=u0, e1=e1, e2=e2):
            return (to_real(model.h(exp_map(u0, x[0] * e1 + x[1] * e2), b)[0]) - target) / sig

        sol = least_squares(resid, np.zeros(2), method="lm")
        if best is None or sol.cost < best[0]:
            best = (sol.cost, exp_map(u0, sol.x[0] * e1 + sol.x[1] * e2))
    return best[1]


def error_stats(u_est, u_true):
    err = np.degrees(angle_between(u_est, u_true))
    return {"median_err_deg": round(float(np.median(err)), 4), "p99_err_deg": round(float(np.percentile(err, 99)), 4),
            "branch_errors": int(np.sum(err > 10))}


def test_snapshot_block(benchmark, problem):
    cal, model, truth, b, z, f = problem
    solver = SnapshotSolver(model, cal.gammas_hz_per_nt)
    res = benchmark.pedantic(solver.solve, args=(z, f), rounds=3, iterations=1)
    stats = error_stats(res.u, truth)
    benchmark.extra_info.update(stats, samples=N_BLOCK, evaluations_per_sample=solver.evaluations_per_sample)
    if benchmark.stats is not None:
        rate = N_BLOCK / benchmark.stats.stats.mean
        benchmark.extra_info["solutions_per_s"] = round(rate)
        RESULTS["snapshot"] = rate
    RESULTS["snapshot_err"] = stats
    assert stats["branch_errors"] == 0


def test_baseline_least_squares_per_sample(benchmark, problem):
    cal, model, truth, b, z, f = problem

    def run():
        return np.array([baseline_solve(model, z[i:i + 1], b[i]) for i in range(N_BASELINE)])

    u = benchmark.pedantic(run, rounds=1, iterations=1)
    stats = error_stats(u, truth[:N_BASELINE])
    benchmark.extra_info.update(stats, samples=N_BASELINE, starts=len(STARTS))
    # Equal accuracy: the snapshot inverse's errors on the same first samples match the baseline's.
    solver = SnapshotSolver(model, cal.gammas_hz_per_nt)
    mine = error_stats(solver.solve(z[:N_BASELINE], f[:N_BASELINE]).u, truth[:N_BASELINE])
    benchmark.extra_info["snapshot_on_same_samples"] = mine
    assert mine["median_err_deg"] <= 1.05 * stats["median_err_deg"] + 1e-6
    assert mine["p99_err_deg"] <= 1.05 * stats["p99_err_deg"] + 1e-6
    if benchmark.stats is not None:
        rate = N_BASELINE / benchmark.stats.stats.mean
        benchmark.extra_info["solutions_per_s"] = round(rate, 1)
        if "snapshot" in RESULTS:
            benchmark.extra_info["snapshot_over_baseline"] = round(RESULTS["snapshot"] / rate, 1)
            print(f"\nsnapshot {RESULTS['snapshot']:.0f}/s, baseline {rate:.1f}/s, "
                  f"ratio {RESULTS['snapshot'] / rate:.0f}x; errors snapshot {mine}, baseline {stats}")
