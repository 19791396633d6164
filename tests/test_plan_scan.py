"""Scan planning: the expected axis accuracy is what the calibration then reports, on the simulated sensor.

The planner (estimator/scan_design.py) evaluates the Fisher information of the calibration's
parameters at the nominal sensor; firmware_sim is an independent implementation of the cell physics
that the planner knows nothing of. The continuous optimal design is checked against scipy's SLSQP
on a small problem; the information against the full Fisher matrix with every linear term.
"""

import numpy as np
import pytest

from fieldvane.estimator.calibration import axis_errors_deg, fit_calibration
from fieldvane.estimator.scan_design import (DesignPool, PlanError, _covariance, _row_changes, continuous_design,
                                             expected_axis_std, plan_scan, sensor_guess, tour, uniform_directions)
from fieldvane.estimator.sphere import fibonacci_sphere
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import default_config
from fieldvane.io.cli import main

LEVELS = (1000.0, 4000.0, 20000.0)
SNR = 1000.0
# The realistic case of the issue, as in tests/test_calibration_physics.py: the simulator's sensor with
# its default isotope cross-talk (a few percent of the gain at 1 uT), pump efficiency 1 + 0.1 (p.u)^2
# (+-5 % about its mean), beams tilted 2 deg, lock-in noise 1/3000 of each channel's gain, 7 levels.
LOW = (1000.0, 1500.0, 2200.0, 3300.0, 5000.0, 10000.0, 20000.0)
SNR_REAL = 3000.0
UNIFORM_ROWS = 600
FIT_MINIMUM_ROWS = 27    # what the calibration needs per level: 3 rows per degree-2 harmonic (9)


def noisy_sensor(snr, **changes):
    cfg = default_config(2, misalignment_deg=2.0, **changes)
    g = np.array(cfg.gain_V)
    return cfg.replace(noise_x_V=tuple(g / snr), noise_y_V=tuple(g / snr))


def nominal_guess(cfg, snr):
    # The planner knows only the nominal axes (untilted), the gains and the lock-in noise.
    nominal = default_config(2)
    return sensor_guess(nominal.pump_array(), nominal.probe_array(), snr, gains=np.array(cfg.gain_V),
                        handedness=np.array(cfg.handedness))


@pytest.fixture(scope="module")
def bench():
    cfg = noisy_sensor(SNR)
    return cfg, nominal_guess(cfg, SNR)


@pytest.fixture(scope="module")
def realistic():
    cfg = noisy_sensor(SNR_REAL, pump_angle_efficiency=(0.1, 0.1))
    guess = nominal_guess(cfg, SNR_REAL)
    uniform = [uniform_directions(UNIFORM_ROWS, k) for k in range(len(LOW))]
    uniform_std = expected_axis_std(guess, uniform, LOW)
    plan = plan_scan(guess, LOW, float(uniform_std.max()), base_rows=FIT_MINIMUM_ROWS, candidates=600)
    uniform_field = np.vstack([u * b for u, b in zip(uniform, LOW)])
    return cfg, uniform_field, uniform_std, plan


def simulate_and_calibrate(cfg, field_nT, seed):
    b = np.linalg.norm(field_nT, axis=1)
    u = field_nT / b[:, None]
    rng = np.random.default_rng(seed)
    f, z0 = response(cfg, u, b)
    sx = np.array(cfg.noise_x_V)
    z = z0 + sx * (rng.standard_normal(z0.shape) + 1j * rng.standard_normal(z0.shape))
    return fit_calibration(u, b, z, f, cfg.channels)


def axis_errors(cal, cfg):
    return np.concatenate([axis_errors_deg(cal.physics.pump_axes, cfg.pump_array()),
                           axis_errors_deg(cal.physics.probe_axes, cfg.probe_array())])


def test_expected_accuracy_is_what_the_calibration_reports(bench):
    cfg, guess = bench
    uniform = [uniform_directions(300, k) for k in range(len(LEVELS))]
    expected = expected_axis_std(guess, uniform, LEVELS)
    field = np.vstack([u * b for u, b in zip(uniform, LEVELS)])
    cal = simulate_and_calibrate(cfg, field, seed=4)
    # The Fisher information of the planner and the fit's covariance describe the same parameters:
    # agreement within 20 % (the planner evaluates it at the nominal, not the fitted, sensor, and also
    # carries the efficiency's next terms, which the fit does not estimate).
    np.testing.assert_allclose(expected, cal.fit_info["covariance_std_deg"], rtol=0.2)


def test_plan_reaches_its_target_with_fewer_rows_than_a_uniform_scan(bench):
    cfg, guess = bench
    uniform = expected_axis_std(guess, [uniform_directions(400, k) for k in range(len(LEVELS))], LEVELS)
    target = float(uniform.max())
    plan = plan_scan(guess, LEVELS, target, base_rows=48, candidates=600)
    assert plan.reached and np.all(plan.expected_std_deg <= target * (1 + 1e-9))
    # Optimal design needs fewer rows than 400 near-uniform directions per level for the same worst
    # axis: measured 686 of 1200 rows (0.572). The continuous optimal design (continuous_design, over
    # the same 600 directions x 3 levels, with the same 48 base rows per level) needs 0.572 of them
    # (certified: no design over those candidates needs fewer than 0.569); without any base rows
    # 0.546 (certified at least 0.543; design_bound(guess, LEVELS, 400, 600)). So 0.5 is out of reach
    # for this sensor; the rounded plan stays within 1 % of its own continuous design.
    assert plan.bound_rows_lower <= plan.n_rows <= 1.01 * plan.bound_rows, (plan.n_rows, plan.bound_rows)
    assert plan.n_rows < 0.6 * 400 * len(LEVELS), plan.n_rows
    assert set(np.round(np.linalg.norm(plan.field_nT, axis=1))) == set(LEVELS)
    # The simulator confirms: calibrating the planned scan gives at least that accuracy (within 25 %)
    # and axes within a few of it. The fit keeps the s' leak law only where it is significant (not
    # on this sensor at this noise: measured 0.0068, 0.0059, 0.0052, 0.0065 against the promised
    # 0.0081, 0.0081, 0.0053, 0.0081 deg); the planner always carries it.
    cal = simulate_and_calibrate(cfg, plan.field_nT, seed=8)
    fitted = np.asarray(cal.fit_info["covariance_std_deg"])
    assert np.all(fitted <= 1.25 * plan.expected_std_deg) and np.all(fitted >= 0.6 * plan.expected_std_deg), fitted
    err = axis_errors(cal, cfg)
    assert np.all(err < 4 * plan.expected_std_deg), (err, plan.expected_std_deg)


def test_realistic_plan_needs_half_the_rows_of_a_uniform_scan(realistic):
    cfg, uniform_field, uniform_std, plan = realistic
    n_uniform = uniform_field.shape[0]
    assert plan.reached
    # Measured: 2097 of 4200 rows (0.4993), in about 3 s. The continuous optimal design over the same
    # candidates with the same 27 base rows per level needs 0.4991 of the uniform rows, and no design
    # over them fewer than 0.4968 (the certificate of continuous_design); without base rows (levels
    # left empty, which the calibration refuses) 0.488, certified at least 0.484 (design_bound(guess,
    # LOW, 600, 600), 9 s). So 0.5 is reachable here only just, with the fewest base rows the fit takes.
    assert plan.n_rows <= 0.5 * n_uniform, plan.n_rows
    assert plan.bound_rows_lower <= plan.n_rows <= 1.005 * plan.bound_rows, (plan.n_rows, plan.bound_rows)
    assert np.all(np.bincount(plan.level, minlength=len(LOW)) >= FIT_MINIMUM_ROWS)
    # Both scans calibrated on the simulated sensor (seed 1): the plan's fitted accuracy is what it
    # promised (within 20 %), its worst axis as good as the uniform scan's (measured 0.00136 against
    # 0.00134 deg), and every axis within a few of its sigma.
    cal_u = simulate_and_calibrate(cfg, uniform_field, seed=1)
    cal_p = simulate_and_calibrate(cfg, plan.field_nT, seed=1)
    std_u = np.asarray(cal_u.fit_info["covariance_std_deg"])
    std_p = np.asarray(cal_p.fit_info["covariance_std_deg"])
    np.testing.assert_allclose(std_p, plan.expected_std_deg, rtol=0.2)
    np.testing.assert_allclose(std_u, uniform_std, rtol=0.2)
    assert std_p.max() <= 1.1 * std_u.max(), (std_p, std_u)
    # The simulated cross-talk's s' leak law is found on the planned scan too (it has far fewer
    # rows at the lowest levels; the fit's leak test must judge against the noise, not against a
    # residual still holding the heading shift, or it drops the leak and the pump axes move).
    assert cal_p.fit_info["terms"]["leak_terms"] == 2 and cal_u.fit_info["terms"]["leak_terms"] == 2
    assert np.all(axis_errors(cal_p, cfg) < 4 * plan.expected_std_deg), axis_errors(cal_p, cfg)
    assert np.all(axis_errors(cal_u, cfg) < 4 * uniform_std), axis_errors(cal_u, cfg)


@pytest.mark.slow
def test_realistic_plan_errors_over_seeds_match_the_uniform_scan(realistic):
    from scipy.stats import chi2

    cfg, uniform_field, uniform_std, plan = realistic
    seeds = range(100, 108)
    err_u = np.array([axis_errors(simulate_and_calibrate(cfg, uniform_field, s), cfg) for s in seeds])
    err_p = np.array([axis_errors(simulate_and_calibrate(cfg, plan.field_nT, s), cfg) for s in seeds])
    rms_u, rms_p = np.sqrt(np.mean(err_u ** 2, axis=0)), np.sqrt(np.mean(err_p ** 2, axis=0))
    # An unbiased axis error of trace std s has squared size s^2 chi-square(2) / 2; over n seeds the
    # mean square is s^2 chi-square(2n) / (2n): its 0.999 quantile (scipy.stats.chi2) bounds the RMS.
    limit = np.sqrt(chi2.ppf(0.999, 2 * len(seeds)) / (2 * len(seeds)))
    assert np.all(rms_p <= limit * plan.expected_std_deg), (rms_p, plan.expected_std_deg)
    assert np.all(rms_u <= limit * uniform_std), (rms_u, uniform_std)
    # Half the rows, the same worst axis: measured over these 8 seeds, RMS of the worst beam 0.00130
    # (plan) against 0.00128 deg (uniform); over 12 seeds (100-111) 0.00145 against 0.00141. The ratio
    # of two RMS over 8 seeds spreads by about 25 % (chi-square with 16 degrees of freedom each).
    assert rms_p.max() <= 1.25 * rms_u.max(), (rms_p, rms_u)


def small_pool(n_cand=24):
    guess = sensor_guess(default_config(1).pump_array(), default_config(1).probe_array(), 1000.0)
    levels = np.array([2000.0, 8000.0])
    return DesignPool(guess, levels, [np.zeros((0, 3)), np.zeros((0, 3))], fibonacci_sphere(n_cand))


def test_continuous_design_is_the_optimum_scipy_finds():
    from scipy.optimize import minimize

    pool = small_pool()
    targets = np.ones(len(pool.groups))
    ours = continuous_design(pool, targets, 1.0, meet=False, iterations=3000, tolerance=1e-4)
    m = pool.n_cand

    def variances(x):
        return pool.variances([x[:m], x[m:2 * m]])

    # The same min-max (worst beam's variance of a design measure over the candidates) as a smooth
    # problem for scipy's SLSQP: minimize t subject to every variance <= t, weights summing to 1.
    x0 = np.concatenate([np.full(2 * m, 0.5 / m), [float(variances(np.full(2 * m, 0.5 / m)).max())]])
    res = minimize(lambda x: x[-1], x0, method="SLSQP",
                   constraints=[{"type": "ineq", "fun": lambda x: x[-1] - variances(x[:-1])},
                                {"type": "eq", "fun": lambda x: np.sum(x[:-1]) - 1.0}],
                   bounds=[(0.0, 1.0)] * (2 * m) + [(0.0, None)], options={"maxiter": 500, "ftol": 1e-12})
    assert res.success, res.message
    best = float(variances(res.x[:-1]).max())
    achieved = float(ours.ratio.max())
    # The certificate is a true lower bound, and the two optima agree within the tolerance.
    assert ours.worst_lower <= best * (1 + 1e-6) and ours.worst_lower <= achieved
    assert abs(achieved / best - 1.0) < 2e-3, (achieved, best)


def test_information_is_the_full_fisher_matrix_with_every_linear_term():
    pool = small_pool(16)
    rng = np.random.default_rng(3)
    counts = [rng.integers(0, 4, pool.n_cand) for _ in range(2)]
    info, proj = pool.information(counts)
    # The definition: one row per observation (row copy, channel, real/imaginary part), one column per
    # global parameter and per linear coefficient of every level, channel and part; numpy's inverse of
    # its normal matrix, global block.
    n, n_lin = pool.n, pool.a[0].shape[2]
    parts = pool.a[0].shape[0]
    blocks = []
    for k, c in enumerate(counts):
        for row in np.flatnonzero(c):
            for _ in range(c[row]):
                for p in range(parts):
                    line = np.zeros(n + 2 * parts * n_lin)
                    line[:n] = pool.d[k][p, row]
                    start = n + (k * parts + p) * n_lin
                    line[start:start + n_lin] = pool.a[k][p, row]
                    blocks.append(line)
    x = np.array(blocks)
    f = x.T @ x
    schur = f[:n, :n] - f[:n, n:] @ np.linalg.solve(f[n:, n:], f[n:, :n])
    np.testing.assert_allclose(info, schur, rtol=0, atol=1e-9 * np.abs(schur).max())
    full = np.linalg.inv(f)[:n, :n]
    scale = np.sqrt(np.outer(np.diag(full), np.diag(full)))
    assert np.max(np.abs(_covariance(info) - full) / scale) < 1e-6
    # One row more or less: the rank-2C update equals the recomputed covariance.
    cov = _covariance(info)
    v = pool.group_variances(cov)
    for sign in (+1.0, -1.0):
        k, (rows, change) = 1, _row_changes(pool, counts, cov, proj, sign)[1]
        i = int(np.argmax(counts[1][rows])) if sign < 0 else 5
        moved = [c.copy() for c in counts]
        moved[k][rows[i]] += int(sign)
        np.testing.assert_allclose(v + change[i], pool.variances(moved), rtol=1e-8)


def test_tour_steps_less_than_the_grid_order():
    pts = fibonacci_sphere(400)
    rng = np.random.default_rng(2)
    pts = pts[rng.permutation(400)]
    order = tour(pts)
    assert sorted(order) == list(range(400))
    path = np.linalg.norm(np.diff(pts[order], axis=0), axis=1).sum()
    shuffled = np.linalg.norm(np.diff(pts, axis=0), axis=1).sum()
    # A nearest-neighbour tour of n near-uniform points on the unit sphere is about sqrt(4 pi n)
    # long (common practice for such tours: the points' mean spacing times n); a random order
    # about 4/3 n (the mean chord between random points).
    assert path < 1.2 * np.sqrt(4 * np.pi * 400) and path < 0.15 * shuffled


def test_bad_requests_are_refused():
    guess = sensor_guess(np.eye(3)[:2], np.eye(3)[2:], 1000.0)
    with pytest.raises(PlanError, match="magnitudes"):
        plan_scan(guess, [-5.0], 0.01)
    with pytest.raises(PlanError, match="5 %"):
        plan_scan(guess, [1000.0, 1010.0], 0.01)
    with pytest.raises(PlanError, match="target"):
        plan_scan(guess, [1000.0], 0.0)
    with pytest.raises(PlanError, match="base rows"):
        plan_scan(guess, [1000.0], 0.01, base_rows=3)


def test_plan_scan_command_writes_the_csv_and_says_the_accuracy(tmp_path, capsys):
    (tmp_path / "sensor.toml").write_text(
        "version = 1\n[pumps.a]\naxis = [1, 0, 0]\n[pumps.b]\naxis = [0, 1, 0]\n"
        "[probes.1]\naxis = [0, 0, 1]\n[probes.2]\naxis = [0.6, 0.3, 0.7416198487095663]\n")
    out = tmp_path / "plan.csv"
    args = ["plan-scan", "--sensor", str(tmp_path / "sensor.toml"), "-o", str(out), "--snr", "2000",
            "--target-axis-deg", "0.005", "--magnitudes", "2000,20000", "--min-rows-per-level", "48"]
    assert main(args) == 0
    text = capsys.readouterr().out
    assert "expected axis accuracy" in text and "reached" in text and "coil" in text
    assert "continuous optimal design" in text
    lines = out.read_text().splitlines()
    header = next(i for i, ln in enumerate(lines) if not ln.startswith("#"))
    assert lines[header] == "bx_nT,by_nT,bz_nT"
    field = np.array([[float(v) for v in ln.split(",")] for ln in lines[header + 1:]])
    b = np.linalg.norm(field, axis=1)
    assert set(np.round(b, -1)) == {2000.0, 20000.0}
    assert np.all(np.diff(b) >= -1.0)                       # ascending levels
    assert main(args) == 2                                   # exists: refused without --force
    assert "output file exists" in capsys.readouterr().err
    for bad, needle in ((["--magnitudes", "1000,abc"], "option '--magnitudes'"),
                        (["--target-axis-deg", "0"], "option '--target-axis-deg'"),
                        (["--snr", "nan"], "option '--snr'"),
                        (["--min-rows-per-level", "3"], "option '--min-rows-per-level'")):
        rc = main(args[:-2] + ["--min-rows-per-level", "48", "--force"] + bad)
        err = capsys.readouterr().err
        assert rc == 2 and needle in err, (bad, err)
