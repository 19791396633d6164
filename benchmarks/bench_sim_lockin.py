"""Simulating 60 s at 200 Hz through a 4-stage 5 ms lock-in filter, beside the same run without it."""

import dataclasses
from pathlib import Path

import pytest

from fieldvane.firmware_sim.scenario import load_scenario, simulate

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "lockin_filtered_turn.toml"


@pytest.fixture(scope="module")
def turn():
    return load_scenario(EXAMPLE)


def test_simulate_60s_through_the_lockin_filter(benchmark, turn):
    run = benchmark.pedantic(simulate, args=(turn,), rounds=5, iterations=1)
    assert len(run) == 12000 and run.lockin.oversample == 10


def test_baseline_60s_without_the_filter(benchmark, turn):
    """Baseline: the same scenario with independent samples (no [lockin]): 12,000 evaluations."""
    plain = dataclasses.replace(turn, lockin=None)
    run = benchmark.pedantic(simulate, args=(plain,), rounds=5, iterations=1)
    assert len(run) == 12000


def test_simulate_60s_wide_bandwidth(benchmark):
    """The 0.833 ms lock-in runs 61x oversampled (12.2 kHz internal): the heaviest example."""
    wide = load_scenario(EXAMPLE.parent / "wide_bandwidth.toml")
    run = benchmark.pedantic(simulate, args=(wide,), rounds=3, iterations=1)
    assert len(run) == 12000
