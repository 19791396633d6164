"""Scan planning speed: 600 candidate directions x 7 levels, beside a simple baseline in the same run.

The case of tests/test_plan_scan.py (the simulator's sensor, lock-in noise 1/3000 of the gain, 7
levels from 1 to 20 uT, 27 base rows per level, the worst axis of 600 near-uniform directions per
level as target). The baseline is one evaluation of the expected axis accuracy of that uniform
scan (the information of 4200 rows): the plan costs a few hundred such evaluations.
"""

import numpy as np
import pytest

from fieldvane.estimator.scan_design import expected_axis_std, plan_scan, sensor_guess, uniform_directions
from fieldvane.firmware_sim.sensor import default_config

LEVELS = (1000.0, 1500.0, 2200.0, 3300.0, 5000.0, 10000.0, 20000.0)


@pytest.fixture(scope="module")
def case():
    cfg = default_config(2)
    guess = sensor_guess(cfg.pump_array(), cfg.probe_array(), 3000.0, gains=np.array(cfg.gain_V),
                         handedness=np.array(cfg.handedness))
    uniform = [uniform_directions(600, k) for k in range(len(LEVELS))]
    return guess, uniform, float(expected_axis_std(guess, uniform, LEVELS).max())


def test_plan_600_candidates_7_levels(benchmark, case):
    guess, _, target = case
    plan = benchmark.pedantic(lambda: plan_scan(guess, LEVELS, target, base_rows=27, candidates=600),
                              rounds=2, iterations=1)
    benchmark.extra_info["rows"] = plan.n_rows
    benchmark.extra_info["rows_over_uniform"] = round(plan.n_rows / 4200, 4)


def test_baseline_expected_accuracy_of_the_uniform_scan(benchmark, case):
    """Baseline: the expected axis accuracy of 600 near-uniform directions at each of the 7 levels."""
    guess, uniform, _ = case
    benchmark.pedantic(lambda: expected_axis_std(guess, uniform, LEVELS), rounds=5, iterations=1)
