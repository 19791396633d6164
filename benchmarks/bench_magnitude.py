"""Corrected |B| (MagnitudeModel.estimate, the compiled estimator/magnitude_core.py) beside plain f / gamma.

Run: `pytest benchmarks/bench_magnitude.py --benchmark-enable -s` (the process is pinned to one CPU).
The live loop estimates a few samples per call (about 5 at 10 kHz), so the small batch is the one
that matters; 500 rows is a replay block's share. The model is fitted to a realistic simulated cell
(exchange pull, light shift, heading error: harmonic degree above 0, all three envelopes). The
baseline is the uncorrected magnitude, f / gamma per isotope and their mean, in numpy: what a call
costs with no correction at all. extra_info carries microseconds per call and rows per second.
"""

import dataclasses

import numpy as np
import pytest

from fieldvane.estimator.magnitude_model import fit_magnitude_model
from fieldvane.estimator.sphere import normalize
from fieldvane.firmware_sim.cell import cell_rates
from fieldvane.firmware_sim.loop import locked_hz
from fieldvane.firmware_sim.sensor import default_config
from test_magnitude_model import GAMMAS, LEVELS, REALISTIC

RESULTS = {}

pytestmark = pytest.mark.benchmark_suite


# one_core (pinning to a single CPU) comes from benchmarks/conftest.py.

@pytest.fixture(scope="module")
def model():
    cfg = dataclasses.replace(default_config(2), **REALISTIC)
    rng = np.random.default_rng(1)
    u = normalize(rng.normal(size=(150 * len(LEVELS), 3)))
    b = np.repeat(np.array(LEVELS, float), 150)
    f = locked_hz(cell_rates(cfg, u, b)) + rng.normal(size=(u.shape[0], 2)) * 0.03 * GAMMAS
    m = fit_magnitude_model(u, b, f, GAMMAS)
    assert min(m.degrees) > 0
    return m, cfg


def _rows(cfg, n):
    rng = np.random.default_rng(n)
    u = normalize(rng.normal(size=(n, 3)))
    b = np.exp(rng.uniform(np.log(1000.0), np.log(50000.0), n))
    return locked_hz(cell_rates(cfg, u, b)), u, np.full(n, 1e-3), b


def _record(benchmark, key, n):
    if benchmark.stats is not None:
        us = benchmark.stats.stats.mean * 1e6
        benchmark.extra_info.update(us_per_call=round(us, 2), rows_per_s=round(n / us * 1e6))
        RESULTS[key] = us


@pytest.mark.parametrize("n", [5, 500])
def test_estimate(benchmark, model, n):
    mm, cfg = model
    f, u, sigma, b = _rows(cfg, n)
    est = mm.estimate(f, u, sigma)        # compiles or loads the kernel outside the timing
    benchmark.extra_info["degrees"] = list(mm.degrees)
    benchmark.extra_info["max_error_nT"] = float(np.max(np.abs(est.b_nT - b)))
    benchmark(mm.estimate, f, u, sigma)
    _record(benchmark, f"estimate_{n}", n)


@pytest.mark.parametrize("n", [5, 500])
def test_baseline_uncorrected(benchmark, model, n):
    mm, cfg = model
    f, u, sigma, b = _rows(cfg, n)
    gammas = mm.gammas_hz_per_nt

    def uncorrected():
        return (f / gammas[None, :]).mean(axis=1)

    benchmark.extra_info["max_error_nT"] = float(np.max(np.abs(uncorrected() - b)))
    benchmark(uncorrected)
    _record(benchmark, f"baseline_{n}", n)
    if f"estimate_{n}" in RESULTS and f"baseline_{n}" in RESULTS:
        ratio = RESULTS[f"estimate_{n}"] / RESULTS[f"baseline_{n}"]
        benchmark.extra_info["estimate_over_baseline"] = round(ratio, 1)
        print(f"\nN={n}: estimate {RESULTS[f'estimate_{n}']:.1f} us, uncorrected {RESULTS[f'baseline_{n}']:.1f} us "
              f"per call ({ratio:.0f}x)")
