"""Scan planning: the expected axis accuracy is what the calibration then reports, on the simulated sensor."""

import numpy as np
import pytest

from fieldvane.estimator.calibration import axis_errors_deg, fit_calibration
from fieldvane.estimator.scan_design import (PlanError, expected_axis_std, plan_scan, sensor_guess, tour,
                                             uniform_directions)
from fieldvane.estimator.sphere import fibonacci_sphere
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import default_config
from fieldvane.io.cli import main

LEVELS = (1000.0, 4000.0, 20000.0)
SNR = 1000.0


@pytest.fixture(scope="module")
def bench():
    cfg = default_config(2, misalignment_deg=2.0)
    g = np.array(cfg.gain_V)
    cfg = cfg.replace(noise_x_V=tuple(g / SNR), noise_y_V=tuple(g / SNR))
    # The planner knows only the nominal axes (untilted), the gains and the lock-in noise.
    nominal = default_config(2)
    guess = sensor_guess(nominal.pump_array(), nominal.probe_array(), SNR, gains=g,
                         handedness=np.array(cfg.handedness))
    return cfg, guess


def simulate_and_calibrate(cfg, field_nT, seed):
    b = np.linalg.norm(field_nT, axis=1)
    u = field_nT / b[:, None]
    rng = np.random.default_rng(seed)
    f, z0 = response(cfg, u, b)
    sx = np.array(cfg.noise_x_V)
    z = z0 + sx * (rng.standard_normal(z0.shape) + 1j * rng.standard_normal(z0.shape))
    return fit_calibration(u, b, z, f, cfg.channels)


def test_expected_accuracy_is_what_the_calibration_reports(bench):
    cfg, guess = bench
    uniform = [uniform_directions(300, k) for k in range(len(LEVELS))]
    expected = expected_axis_std(guess, uniform, LEVELS)
    field = np.vstack([u * b for u, b in zip(uniform, LEVELS)])
    cal = simulate_and_calibrate(cfg, field, seed=4)
    # The Fisher information of the planner and the fit's covariance describe the same parameters:
    # agreement within 20 % (the planner evaluates it at the nominal, not the fitted, sensor).
    np.testing.assert_allclose(expected, cal.fit_info["covariance_std_deg"], rtol=0.2)


def test_plan_reaches_its_target_with_fewer_rows_than_a_uniform_scan(bench):
    cfg, guess = bench
    uniform = expected_axis_std(guess, [uniform_directions(400, k) for k in range(len(LEVELS))], LEVELS)
    target = float(uniform.max())
    plan = plan_scan(guess, LEVELS, target, base_rows=48, candidates=600)
    assert plan.reached and np.all(plan.expected_std_deg <= target)
    # Optimal design needs fewer rows than 400 near-uniform directions per level for the same
    # worst axis (on this sensor about 0.6 of them; a continuous A-optimal design bounds it near 0.5).
    assert plan.n_rows < 0.8 * 400 * len(LEVELS), plan.n_rows
    assert set(np.round(np.linalg.norm(plan.field_nT, axis=1))) == set(LEVELS)
    # The simulator confirms: calibrating the planned scan gives that accuracy (within 25 %) and
    # axes within a few of it.
    cal = simulate_and_calibrate(cfg, plan.field_nT, seed=8)
    np.testing.assert_allclose(cal.fit_info["covariance_std_deg"], plan.expected_std_deg, rtol=0.25)
    err = np.concatenate([axis_errors_deg(cal.physics.pump_axes, cfg.pump_array()),
                          axis_errors_deg(cal.physics.probe_axes, cfg.probe_array())])
    assert np.all(err < 4 * plan.expected_std_deg), (err, plan.expected_std_deg)


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
