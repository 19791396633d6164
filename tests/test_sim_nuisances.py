"""Bench nuisances of the simulated sensor: power drifts, light fades, missing probes, and the
bench examples that combine them with the lock-in filter."""

from __future__ import annotations

import csv
import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from fieldvane.firmware_sim.emitter import encode_records, preamble
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.scenario import (
    GainDrift, ScenarioError, load_scenario, loads_scenario, simulate,
)

ROOT = Path(__file__).resolve().parents[1]
EX = ROOT / "examples"
QUIET = "[sensor]\nnoise_x_V = 0.0\nnoise_y_V = 0.0\n"


def _track(events: str, duration: float = 20.0, sensor: str = "", lockin: str = "", seed: int = 3) -> str:
    return (f"version = 1\n{sensor}\n[run]\nduration_s = {duration}\nseed = {seed}\n{lockin}\n"
            f"[direction]\nstart = [0.3, 0.4, 0.87]\n[[direction.segments]]\nkind = \"rotate\"\n"
            f"axis = [0, 0, 1]\nrate_deg_per_s = 2\nduration_s = {duration}\n"
            f"[magnitude]\nstart_nT = 20000\n{events}")


def _quiet(scenario):
    return dataclasses.replace(scenario, sensor=scenario.sensor.replace(noise_x_V=0.0, noise_y_V=0.0))


def _gain(run, scenario):
    """Return |z / clean response| (N, C): the signal multiplier the events applied."""
    return np.abs(run.z / response(scenario.sensor, run.u, run.b_nT)[1])


# ----- power drifts ---------------------------------------------------------------------------

def test_common_drift_moves_both_probes_together():
    s = loads_scenario(_track("[[events]]\nkind = \"gain_drift\"\nrate_pct_per_s = 0.1\nstart_s = 5\n"
                              "duration_s = 10\n", sensor=QUIET))
    assert s.events[0].probe is None
    g = _gain(simulate(s), s)
    t = np.arange(len(g)) / 200.0
    expected = 1.0 + 0.001 * np.clip(t - 5.0, 0.0, 10.0)
    np.testing.assert_allclose(g, np.repeat(expected[:, None], 4, axis=1), rtol=1e-12)


def test_random_walk_is_a_first_order_gauss_markov_process():
    ev = GainDrift(probe=1, mode="random_walk", rms_pct=2.0, correlation_time_s=10.0)
    t_knots, g = ev.walk_knots(seed=1, index=0, run_end_s=20000.0)
    assert g[0] == 1.0 and t_knots[1] - t_knots[0] == pytest.approx(0.1)
    x = (g - 1.0)[2000:]                       # past the start-up from zero
    # Outside reference (the textbook first-order Markov process, e.g. Gelb, Applied Optimal
    # Estimation, 1974, from memory): stationary std sigma, autocorrelation exp(-|lag| / T).
    # 200,000 knots cover 2,000 correlation times: the std is good to about 3 %.
    assert x.std() == pytest.approx(0.02, rel=0.06)
    for lag_s in (1.0, 10.0, 20.0):
        k = int(round(lag_s / 0.1))
        rho = np.corrcoef(x[:-k], x[k:])[0, 1]
        assert rho == pytest.approx(math.exp(-lag_s / 10.0), abs=0.05)
    again = ev.walk_knots(seed=1, index=0, run_end_s=20000.0)[1]
    np.testing.assert_array_equal(g, again)                                  # seeded
    other = ev.walk_knots(seed=1, index=1, run_end_s=20000.0)[1]
    assert abs(np.corrcoef(g - 1, other - 1)[0, 1]) < 0.15                     # independent per event


def test_random_walks_are_independent_per_probe_and_leave_the_noise_alone():
    walks = ("[[events]]\nkind = \"gain_drift\"\nprobe = 1\nmode = \"random_walk\"\nrms_pct = 3\n"
             "correlation_time_s = 5\n"
             "[[events]]\nkind = \"gain_drift\"\nprobe = 2\nmode = \"random_walk\"\nrms_pct = 3\n"
             "correlation_time_s = 5\n")
    s = loads_scenario(_track(walks, duration=60.0))
    plain = loads_scenario(_track("", duration=60.0))
    run, ref = simulate(s), simulate(plain)
    g = _gain(simulate(_quiet(s)), s)
    assert np.abs(g[:, 0] - 1).max() > 0.02 and np.abs(g[:, 2] - 1).max() > 0.02
    np.testing.assert_allclose(g[:, 0], g[:, 1], rtol=1e-12)      # one probe's channels together
    assert not np.allclose(g[:, 0], g[:, 2], atol=0.005)            # the probes apart
    clean = response(s.sensor, run.u, run.b_nT)[1]
    # Same seed, same noise: the drift only multiplies the signal.
    np.testing.assert_allclose(run.z - clean * g, ref.z - clean, atol=1e-12)


@pytest.mark.parametrize("body,key,words", [
    ('mode = "random_walk"\nrms_pct = 2\n', "correlation_time_s", "required"),
    ('mode = "random_walk"\nrms_pct = 20\ncorrelation_time_s = 5\n', "rms_pct", "<= 10"),
    ('mode = "linear"\nrate_pct_per_s = 1\nrms_pct = 2\n', "rms_pct", "random_walk"),
    ('mode = "sine"\namplitude_pct = 2\nperiod_s = 3\nrate_pct_per_s = 1\n', "rate_pct_per_s", "linear"),
    ('mode = "wobble"\n', "mode", "must be one of"),
    ('probe = 3\nrate_pct_per_s = 1\n', "probe", "<= 2"),
])
def test_bad_drifts_name_file_line_and_key(tmp_path, body, key, words):
    path = tmp_path / "drift.toml"
    path.write_text(_track("[[events]]\nkind = \"gain_drift\"\n" + body))
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    err = info.value
    assert err.key == f"events[0].{key}" and words in err.reason and err.line is not None
    assert f"{path}:{err.line}:" in str(err)


# ----- fades ------------------------------------------------------------------------------------

def test_fade_falls_holds_and_comes_back_on_one_probe():
    s = loads_scenario(_track("[[events]]\nkind = \"fade\"\nprobe = 2\nstart_s = 4\nfall_s = 2\n"
                              "to_pct = 2\nhold_s = 3\nrise_s = 4\n", sensor=QUIET))
    g = _gain(simulate(s), s)
    at = lambda tt: int(round(tt * 200))  # noqa: E731
    np.testing.assert_allclose(g[:, :2], 1.0, rtol=1e-12)                       # probe 1 untouched
    np.testing.assert_allclose(g[at(3.9), 2:], 1.0, rtol=1e-12)
    np.testing.assert_allclose(g[at(5.0), 2:], 1 - 0.98 * 0.5, rtol=1e-12)      # half way down
    np.testing.assert_allclose(g[at(6.5), 2:], 0.02, rtol=1e-12)                # held at 2 %
    np.testing.assert_allclose(g[at(9.0) + 1, 2:], 0.02, rtol=1e-3)
    np.testing.assert_allclose(g[at(11.0), 2:], 0.02 + 0.98 * 0.5, rtol=1e-12)  # half way up
    np.testing.assert_allclose(g[at(13.5), 2:], 1.0, rtol=1e-12)
    assert np.all(np.diff(g[at(4.0):at(6.0), 2]) < 0)                           # smooth, monotone


def test_fade_without_hold_stays_low_and_its_errors_are_clear(tmp_path):
    s = loads_scenario(_track("[[events]]\nkind = \"fade\"\nprobe = 1\nstart_s = 2\nfall_s = 1\n"
                              "to_pct = 5\n", sensor=QUIET))
    g = _gain(simulate(s), s)
    np.testing.assert_allclose(g[600:, :2], 0.05, rtol=1e-12)
    path = tmp_path / "f.toml"
    text = _track("[[events]]\nkind = \"fade\"\nprobe = 1\nstart_s = 2\nfall_s = 1\nrise_s = 2\n")
    path.write_text(text)
    with pytest.raises(ScenarioError, match="only with hold_s") as info:
        load_scenario(path)
    assert info.value.key == "events[0].rise_s"
    assert text.splitlines()[info.value.line - 1] == "rise_s = 2"
    path.write_text(_track("[[events]]\nkind = \"fade\"\nprobe = 1\nstart_s = 2\nfall_s = 1\nto_pct = 0\n"))
    with pytest.raises(ScenarioError, match="> 0"):
        load_scenario(path)


# ----- missing probes -------------------------------------------------------------------------

def test_probe_missing_keeps_rows_and_blanks_one_probe():
    s = load_scenario(EX / "probe2_dropout.toml")
    run = simulate(s)
    assert len(run) == s.n_samples                            # no row lost
    window = (run.t >= 20.0) & (run.t < 30.0)
    assert window.sum() == 2000
    assert run.missing is not None and run.missing.shape == run.z.shape
    np.testing.assert_array_equal(run.missing[:, 2:], np.repeat(window[:, None], 2, axis=1))
    assert not run.missing[:, :2].any()
    assert np.all(np.isnan(run.z[window, 2:])) and np.all(np.isfinite(run.z[:, :2]))
    assert np.all(np.isfinite(run.z[~window]))
    assert np.all(np.isfinite(run.f))                         # the frequencies keep coming


def test_probe_missing_needs_a_second_probe(tmp_path):
    path = tmp_path / "one.toml"
    path.write_text(_track("[[events]]\nkind = \"probe_missing\"\nprobe = 1\nstart_s = 1\nduration_s = 1\n",
                           sensor="[sensor]\nprobe_axes = [[0, 0, 1]]\n"))
    with pytest.raises(ScenarioError, match="one-probe sensor") as info:
        load_scenario(path)
    assert info.value.key == "events[0].kind"


def test_emitter_sends_nan_frames_and_empty_csv_fields_for_a_missing_probe():
    wire = pytest.importorskip("fieldvane.io.wire")
    run = simulate(load_scenario(EX / "probe2_dropout.toml", duration_s=25.0))
    data = preamble(run, "binary") + b"".join(rec for _, rec in encode_records(run, "binary"))
    frames = wire.FrameDecoder().feed(data)
    assert len(frames) == len(run)
    z = np.array([fr.to_sample().z for fr in frames])
    gone = run.missing[:, 2]
    assert np.all(np.isnan(z[gone, 2:])) and np.all(np.isfinite(z[~gone]))
    np.testing.assert_allclose(z[~gone], run.z[~gone].astype(np.complex64), rtol=1e-6, atol=1e-6)
    text = b"".join(rec for _, rec in encode_records(run, "csv")).decode()
    rows = list(csv.reader(text.splitlines()))                 # Python's csv module as the reader
    assert all(len(r) == 11 for r in rows)
    for r, g in zip(rows, gone):
        assert (r[7:11] == ["", "", "", ""]) == bool(g)
        assert all(field != "" for field in r[:7])
        if not g:
            assert all(math.isfinite(float(v)) for v in r[7:11])


# ----- the bench examples ---------------------------------------------------------------------

def test_bench_power_drift_is_one_and_a_half_percent_common():
    s = load_scenario(EX / "bench_power_drift.toml")
    g = _gain(simulate(_quiet(dataclasses.replace(s, lockin=None))), s)
    assert g.max() == pytest.approx(1.015, rel=1e-9) and g.min() == pytest.approx(1.0, rel=1e-12)
    np.testing.assert_allclose(g, np.repeat(g[:, :1], 4, axis=1), rtol=1e-12)


def test_bench_probe_drifts_are_a_few_percent_and_independent():
    s = load_scenario(EX / "bench_probe_drifts.toml")
    assert s.duration_s == 120.0
    g = _gain(simulate(_quiet(dataclasses.replace(s, lockin=None))), s)
    peak1, peak2 = np.abs(g[:, 0] - 1).max(), np.abs(g[:, 2] - 1).max()
    assert 0.03 <= peak1 <= 0.05 and 0.03 <= peak2 <= 0.05
    assert abs(np.corrcoef(g[:, 0], g[:, 2])[0, 1]) < 0.5
    short = load_scenario(EX / "bench_probe_drifts.toml", duration_s=5.0)   # tests may shorten it
    g_short = _gain(simulate(_quiet(dataclasses.replace(short, lockin=None))), short)
    np.testing.assert_allclose(g_short, g[:1000], rtol=1e-12)  # the same drifts, cut short (to rounding)


def test_probe2_fade_reaches_two_percent_through_the_lockin():
    s = load_scenario(EX / "probe2_fade.toml")
    q = _quiet(s)
    run = simulate(q)
    u, b = q.true_field(run.t - q.lockin.group_delay_s)     # the outputs are 4 x 5 ms late
    g = np.abs(run.z / response(q.sensor, u, b)[1])
    t = run.t
    held = (t >= 20.5) & (t < 29.5)
    np.testing.assert_allclose(g[held, 2:], 0.02, rtol=1e-4)
    np.testing.assert_allclose(g[(t < 14.9) | (t > 35.1), 2:], 1.0, rtol=1e-4)
    np.testing.assert_allclose(g[t > 0.2, :2], 1.0, rtol=1e-4)   # once the turn's start has passed


def test_wide_bandwidth_examples_share_the_scan_sensor_and_reference():
    scan = load_scenario(EX / "calibration_scan_lockin.toml")
    for name in ("wide_bandwidth", "wide_bandwidth_burst", "lockin_filtered_turn", "bench_power_drift",
                 "bench_probe_drifts", "probe2_dropout", "probe2_fade"):
        s = load_scenario(EX / f"{name}.toml")
        assert s.sensor == scan.sensor and s.sample_rate_hz == scan.sample_rate_hz, name
        b = s.true_field()[1]
        assert min(scan.scan.magnitudes_nT) <= b.min() and b.max() <= max(scan.scan.magnitudes_nT)
        ref = s.lockin.noise_reference_bandwidth_hz or s.lockin.noise_bandwidth_hz
        assert ref == pytest.approx(scan.lockin.noise_bandwidth_hz, rel=1e-12), name


def test_wide_bandwidth_burst_is_ten_times_the_noise_inside():
    s = load_scenario(EX / "wide_bandwidth_burst.toml", duration_s=27.0)
    run = simulate(s)
    u, b = s.true_field(run.t - s.lockin.group_delay_s)
    noise = run.z - response(s.sensor, u, b)[1]            # the filtered signal is 3.3 ms late
    t = run.t
    inside, outside = (t >= 20.1) & (t < 25.9), (t < 19.9)
    ratio = np.std(noise[inside].real) / np.std(noise[outside].real)
    assert ratio == pytest.approx(10.0, rel=0.05)
    assert np.std(noise[outside].real) == pytest.approx(1e-3 * math.sqrt(6.0), rel=0.03)
