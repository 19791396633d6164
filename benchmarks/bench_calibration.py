"""Calibration speed and peak memory on a 5,000-row scan, beside a plain least-squares baseline.

Two scans: the synthetic sensor of the tests (5 magnitudes x 1,000 directions) and the simulated
sensor of the acceptance numbers (tests/test_calibration_physics.py: 7 magnitudes x 600
directions, leak and pump efficiency). The whole fit runs: row screening, the physics part with
its uncertainty and level dispersion, the corrections' cross-validation and the magnitude check.
"""

import tracemalloc

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.harmonics import harmonics
from fieldvane.estimator.magnitude_basis import MagnitudeBasis
from synthetic_sensor import make_sensor, scan


@pytest.fixture(scope="module")
def scan_5000():
    sensor, _, _ = make_sensor(seed=1, n_probes=2, distortion=0.01)
    return sensor, scan(sensor, [1000, 2000, 5000, 10000, 20000], 1000, snr=1000)


@pytest.fixture(scope="module")
def simulated_4200():
    from test_calibration_physics import LOW, scan as sim_scan, sensor as sim_sensor

    cfg = sim_sensor()
    return cfg, sim_scan(cfg, LOW)


def _peak_mib(fn):
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / 2**20


def test_calibrate_5000_rows(benchmark, scan_5000):
    sensor, (u, b, z, f, _) = scan_5000
    run = lambda: fit_calibration(u, b, z, f, sensor.channels)  # noqa: E731
    benchmark.extra_info["peak_MiB"] = round(_peak_mib(run), 1)
    benchmark.pedantic(run, rounds=3, iterations=1)


def test_calibrate_simulated_4200_rows(benchmark, simulated_4200):
    cfg, (u, b, z, f) = simulated_4200
    run = lambda: fit_calibration(u, b, z, f, cfg.channels)  # noqa: E731
    benchmark.extra_info["peak_MiB"] = round(_peak_mib(run), 1)
    benchmark.pedantic(run, rounds=3, iterations=1)


def test_baseline_single_lstsq_5000_rows(benchmark, scan_5000):
    """Baseline: one degree-4 harmonic x spline least-squares fit, no physics part, no order search."""
    _, (u, b, z, f, _) = scan_5000

    def run():
        s = MagnitudeBasis([1000, 2000, 5000, 10000, 20000])(b)
        design = (s[:, :, None] * harmonics(4, u)[:, None, :]).reshape(len(b), -1)
        return np.linalg.lstsq(design, z, rcond=None)[0]

    benchmark.extra_info["peak_MiB"] = round(_peak_mib(run), 1)
    benchmark.pedantic(run, rounds=3, iterations=1)
