"""Scenario files: every example parses and simulates, truth follows the trajectory, clear errors."""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial import SphericalVoronoi
from scipy.spatial.transform import Rotation

from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.scenario import (
    ScenarioError, builtin_scenario_names, builtin_scenario_path, direction_at, load_scenario,
    loads_scenario, locate_key, simulate, sphere_points,
)

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted((ROOT / "examples").glob("*.toml"))
BUILTIN = sorted((ROOT / "firmware_sim" / "scenarios").glob("*.toml"))
REQUIRED_EXAMPLES = {"static", "rotation_blind_planes", "turntable", "magnitude_ramp", "field_step",
                     "noise_burst", "gain_drift", "dropouts", "calibration_scan",
                     "calibration_scan_single", "calibration_scan_lockin", "lockin_filtered_turn",
                     "bench_power_drift", "bench_probe_drifts", "probe2_dropout", "probe2_fade",
                     "wide_bandwidth", "wide_bandwidth_burst"}
# Examples longer than a minute, because a check needs the length (tests shorten them).
LONG_EXAMPLES = {"bench_probe_drifts": 120.0}


def _rot(axis, angle_deg) -> Rotation:
    """Reference rotation from scipy.spatial.transform (an outside library)."""
    a = np.asarray(axis, float)
    return Rotation.from_rotvec(np.radians(angle_deg) * a / np.linalg.norm(a))


def _unit(v):
    v = np.asarray(v, float)
    return v / np.linalg.norm(v)


def _scenario(body: str, sensor: str = "") -> str:
    return f"version = 1\nname = \"t\"\n{sensor}\n{body}"


QUIET = "[sensor]\nnoise_x_V = 0.0\nnoise_y_V = 0.0\n"


# ----- every shipped scenario --------------------------------------------------------------

def test_required_examples_exist():
    assert REQUIRED_EXAMPLES <= {p.stem for p in EXAMPLES}
    assert {"demo_scan", "demo_track"} <= set(builtin_scenario_names())
    assert builtin_scenario_path("demo_track").name == "demo_track.toml"


@pytest.mark.parametrize("path", EXAMPLES + BUILTIN, ids=lambda p: p.stem)
def test_scenario_parses_and_simulates(path):
    scenario = load_scenario(path, duration_s=2.0)
    run = simulate(scenario)
    n = scenario.n_samples
    assert n == 400                       # 2 s at 200 Hz
    nc = len(scenario.sensor.channels)
    assert run.z.shape[1] == nc and run.f.shape[1] == 2 and run.u.shape[1] == 3
    assert len(run) <= n and np.all(np.diff(run.t) > 0) and np.all(np.diff(run.seq) > 0)
    np.testing.assert_allclose(np.linalg.norm(run.u, axis=1), 1.0, atol=1e-12)
    assert np.all(run.b_nT > 0)
    finite = np.isfinite(run.f).all(axis=1)
    # Modulation tracks the Larmor frequencies: f = gamma |B|, gamma of 87Rb F=2 and 85Rb F=3
    # (6.9958 and 4.6674 Hz/nT, docs/references.md 'Atomic constants').
    # A "locked" loop follows the pulled resonance (spin-exchange pulling, about k^2/dw), so its
    # frequencies sit near, not at, gamma |B|: within 1% is far wider than any realistic pull.
    rtol = 1e-2 if scenario.sensor.frequency_loop == "locked" else 1e-4
    ratio = run.f[finite] / run.b_nT[finite, None]
    np.testing.assert_allclose(ratio[:, 0], 6.9958, rtol=rtol)
    np.testing.assert_allclose(ratio[:, 1], 4.6674, rtol=rtol)
    if scenario.kind == "scan":
        np.testing.assert_allclose(run.applied_b_nT, run.u * run.b_nT[:, None])
    else:
        assert run.applied_b_nT is None
    assert 0.0 < scenario.duration_s and scenario.sample_rate_hz > 0


@pytest.mark.parametrize("path", EXAMPLES + BUILTIN, ids=lambda p: p.stem)
def test_full_length_is_modest(path):
    s = load_scenario(path)
    assert 1.0 <= s.duration_s <= LONG_EXAMPLES.get(path.stem, 60.0)   # seconds to a minute


def test_demo_scenarios_describe_the_same_sensor():
    scan = load_scenario(builtin_scenario_path("demo_scan"))
    track = load_scenario(builtin_scenario_path("demo_track"))
    assert scan.sensor == track.sensor
    lo, hi = min(scan.scan.magnitudes_nT), max(scan.scan.magnitudes_nT)
    b = track.true_field()[1]
    assert lo <= b.min() and b.max() <= hi      # the track stays inside the calibrated range


def test_same_seed_same_run_other_seed_other_noise():
    path = ROOT / "examples" / "noise_burst.toml"
    a = simulate(load_scenario(path, duration_s=1.0))
    b = simulate(load_scenario(path, duration_s=1.0))
    c = simulate(load_scenario(path, duration_s=1.0, seed=99))
    np.testing.assert_array_equal(a.z, b.z)
    assert not np.allclose(a.z, c.z)
    np.testing.assert_array_equal(a.u, c.u)


# ----- truth follows the trajectory --------------------------------------------------------

def test_rotation_blind_planes_rate_axis_and_crossings():
    s = load_scenario(ROOT / "examples" / "rotation_blind_planes.toml")
    run = simulate(s)
    t, u = run.t, run.u
    seg = t < 40.0
    # Rate measured from the truth: azimuth about z unwrapped, fitted slope.
    az = np.degrees(np.unwrap(np.arctan2(u[seg, 1], u[seg, 0])))
    slope = np.polyfit(t[seg], az, 1)[0]
    assert slope == pytest.approx(4.5, abs=1e-9)
    # Angle between successive samples: |rate| x dt x sin(angle to the axis) for a cone.
    step = np.degrees(np.arccos(np.clip(np.sum(u[1:2000] * u[:1999], axis=1), -1, 1)))
    np.testing.assert_allclose(step, 4.5 / 200 * math.sin(math.radians(30.0)), rtol=1e-4)
    # Against scipy's rotations: start rotated about z by 4.5 deg/s x t.
    start = _unit([0.4924, 0.0868, 0.8660])
    ref = Rotation.from_rotvec(np.radians(4.5 * t[seg])[:, None] * np.array([0, 0, 1.0])).apply(start)
    np.testing.assert_allclose(u[seg], ref, atol=1e-12)
    # The story of the file: it crosses x = 0, y = 0 (pumps) then z = 0 (probe 1).
    for k, t_cross in ((0, 17.8), (1, 37.8), (2, 53.4)):
        i = np.flatnonzero(np.diff(np.sign(u[:, k])) != 0)
        assert len(i) == 1 and t[i[0]] == pytest.approx(t_cross, abs=0.1)
    # Second segment: -90 deg about y at -4.5 deg/s, 20 s; the run ends there.
    assert s.duration_s == pytest.approx(60.0)
    end_ref = _rot([0, 1, 0], -4.5 * (t[-1] - 40.0)).apply(u[np.searchsorted(t, 40.0)])
    np.testing.assert_allclose(u[-1], end_ref, atol=1e-9)


def test_turntable_dwells_and_steps():
    s = load_scenario(ROOT / "examples" / "turntable.toml")
    t = np.array([0.0, 2.9, 3.5, 4.0, 6.9, 8.0, 47.9, 48.0, 50.9])
    u = direction_at(s.direction_start, s.direction_segments, t)
    # dwell 3 s, move 1 s (constant rate), 30 deg per step, 12 steps, then hold.
    angles = [0, 0, 15, 30, 30, 60, 330 + 30 * 0.9, 360, 360]
    start = _unit([0.6, 0.0, 0.8])
    for k, a in enumerate(angles):
        np.testing.assert_allclose(u[k], _rot([0, 0, 1], a).apply(start), atol=1e-12,
                                   err_msg=f"t = {t[k]}")


def test_magnitude_ramp_endpoints_and_linearity():
    s = load_scenario(ROOT / "examples" / "magnitude_ramp.toml")
    run = simulate(s)
    b = run.b_nT
    assert np.all(b[run.t < 5.0] == 1000.0)
    assert np.all(b[run.t >= 35.0] == pytest.approx(20000.0))
    mid = (run.t >= 5.0) & (run.t < 35.0)
    np.testing.assert_allclose(b[mid], 1000.0 + 19000.0 * (run.t[mid] - 5.0) / 30.0, rtol=1e-12)
    # f_a follows gamma(87Rb) |B| (6.9958 Hz/nT, docs/references.md): 7.0 kHz -> 139.9 kHz.
    assert run.f[0, 0] == pytest.approx(6995.8, abs=1.0)
    assert run.f[-1, 0] == pytest.approx(139916.0, abs=20.0)


def test_log_ramp_keeps_a_constant_ratio():
    text = _scenario("[run]\nduration_s = 10\n[direction]\nstart = [0,0,1]\n[magnitude]\n"
                     "start_nT = 1000\n[[magnitude.segments]]\nkind = \"ramp\"\nto_nT = 16000\n"
                     "duration_s = 8\nshape = \"log\"\n")
    s = loads_scenario(text)
    b = s.true_field(np.array([0.0, 2.0, 4.0, 6.0, 8.0, 9.0]))[1]
    np.testing.assert_allclose(b, [1000, 2000, 4000, 8000, 16000, 16000], rtol=1e-12)


def test_field_step_directions_and_magnitude():
    s = load_scenario(ROOT / "examples" / "field_step.toml")
    t = np.array([9.995, 10.0, 19.995, 20.0, 29.995])
    u, b = s.true_field(t)
    first, second = _unit([0.20, 0.30, 0.93]), _unit([0.70, -0.40, 0.59])
    np.testing.assert_allclose(u[0], first, atol=1e-12)
    np.testing.assert_allclose(u[1], second, atol=1e-12)
    np.testing.assert_allclose(u[2], second, atol=1e-12)
    third = _rot([1, 0, 0], 45.0).apply(second)
    np.testing.assert_allclose(u[3], third, atol=1e-12)
    np.testing.assert_allclose(u[4], third, atol=1e-12)
    np.testing.assert_allclose(b, [20000, 20000, 15000, 15000, 15000])


def test_scan_points_cover_the_sphere_evenly():
    pts = sphere_points(200)
    np.testing.assert_allclose(np.linalg.norm(pts, axis=1), 1.0, atol=1e-12)
    # Reference: scipy's spherical Voronoi cells; near-uniform points have near-equal cells.
    areas = SphericalVoronoi(pts).calculate_areas()
    assert areas.sum() == pytest.approx(4 * np.pi, rel=1e-9)
    ratio = areas / (4 * np.pi / 200)
    assert ratio.min() > 0.85 and ratio.max() < 1.15
    assert np.linalg.norm(pts.mean(axis=0)) < 0.01


def test_calibration_scan_layout_and_truncation():
    s = load_scenario(ROOT / "examples" / "calibration_scan.toml")
    assert s.duration_s == pytest.approx(4 * 150 * 8 / 200)
    run = simulate(s)
    assert len(run) == 4800
    per_mag = run.b_nT.reshape(4, -1)
    np.testing.assert_array_equal(per_mag[:, 0], [1000, 5000, 10000, 20000])
    assert np.all(per_mag == per_mag[:, :1])
    dirs = run.u.reshape(4, 150, 8, 3)
    assert np.all(dirs == dirs[:, :, :1, :])                 # 8 samples dwell at each point
    assert not np.allclose(dirs[0, :, 0], dirs[1, :, 0])     # lattice turned between magnitudes
    np.testing.assert_allclose(run.applied_b_nT, run.u * run.b_nT[:, None])
    short = simulate(s.with_overrides(duration_s=1.0))
    np.testing.assert_array_equal(short.applied_b_nT, run.applied_b_nT[:200])
    with pytest.raises(ScenarioError, match="longer than the scan"):
        s.with_overrides(duration_s=25.0)


# ----- events ----------------------------------------------------------------------------

def _clean(run, scenario):
    return response(scenario.sensor, run.u, run.b_nT)[1]


def test_noise_burst_scales_the_noise():
    s = load_scenario(ROOT / "examples" / "noise_burst.toml")
    run = simulate(s)
    res = run.z - _clean(run, s)
    quiet = (run.t < 8.0)
    burst = (run.t >= 8.0) & (run.t < 11.0)
    probe2 = (run.t >= 20.0) & (run.t < 24.0)
    std = lambda rows, cols: np.std(res[np.ix_(rows, cols)].real)  # noqa: E731
    base = std(quiet, [0, 1, 2, 3])
    assert base == pytest.approx(1e-3, rel=0.05)          # the sensor's noise_x_V
    assert std(burst, [0, 1, 2, 3]) / base == pytest.approx(20.0, rel=0.1)
    assert std(probe2, [2, 3]) / base == pytest.approx(10.0, rel=0.1)
    assert std(probe2, [0, 1]) / base == pytest.approx(1.0, rel=0.1)


def test_gain_drift_linear_and_sine():
    text = _scenario("[run]\nduration_s = 20\n[direction]\nstart = [0.3, 0.4, 0.87]\n"
                     "[magnitude]\nstart_nT = 20000\n"
                     "[[events]]\nkind = \"gain_drift\"\nprobe = 1\nrate_pct_per_s = 0.5\n"
                     "start_s = 5\nduration_s = 10\n"
                     "[[events]]\nkind = \"gain_drift\"\nprobe = 2\nmode = \"sine\"\n"
                     "amplitude_pct = 5\nperiod_s = 8\n", QUIET)
    s = loads_scenario(text)
    run = simulate(s)
    ratio = np.abs(run.z / _clean(run, s))
    at = lambda tt: int(np.searchsorted(run.t, tt))  # noqa: E731
    np.testing.assert_allclose(ratio[at(4.0), :2], 1.0, rtol=1e-12)
    np.testing.assert_allclose(ratio[at(10.0), :2], 1.025, rtol=1e-12)
    np.testing.assert_allclose(ratio[at(18.0), :2], 1.05, rtol=1e-12)     # held after the window
    np.testing.assert_allclose(ratio[at(2.0), 2:], 1.05, rtol=1e-12)       # sin(pi/2)
    np.testing.assert_allclose(ratio[at(6.0), 2:], 0.95, rtol=1e-12)
    np.testing.assert_allclose(ratio[at(10.0), 2:], 1.05, rtol=1e-12)      # sin(5 pi / 2)


def test_dropouts_outliers_and_status():
    s = load_scenario(ROOT / "examples" / "dropouts.toml")
    run = simulate(s)
    assert s.n_samples - len(run) == 400                    # 2 s missing at 200 Hz
    gap = np.flatnonzero(np.diff(run.seq) > 1)
    assert len(gap) == 1 and run.seq[gap[0] + 1] - run.seq[gap[0]] == 401
    nan_rows = ~np.isfinite(run.z).all(axis=1)
    assert nan_rows.sum() == 100 and np.all(np.isnan(run.f[nan_rows]))
    assert np.all((run.t[nan_rows] >= 12.0) & (run.t[nan_rows] < 12.5))
    assert np.all(np.isfinite(run.u[nan_rows]))              # truth kept
    res = np.abs(run.z - _clean(run, s))
    spikes = np.argwhere(res[~nan_rows] > 0.25)               # size 0.5 V vs 1 mV noise
    assert len(spikes) == 12
    assert np.all(np.abs(res[~nan_rows][res[~nan_rows] > 0.25] - 0.5) < 0.01)
    flagged = run.status != 0
    assert np.all(run.status[flagged] == 0b100)               # PUMP_B_UNLOCKED is bit 2
    assert flagged.sum() == 200


# ----- errors name the file, the line and the key -------------------------------------------

GOOD = """version = 1
name = "bad"
[run]
duration_s = 5
[direction]
start = [0, 0, 1]
[[direction.segments]]
kind = "rotate"
axis = [0, 0, 1]
rate_deg_per_s = 3
duration_s = 5
[magnitude]
start_nT = 20000
[[events]]
kind = "noise_burst"
start_s = 1
duration_s = 1
factor = 4
"""

BAD_CASES = [
    ("version = 1", "version = 3", "version", 1, "unsupported"),
    ("version = 1\n", "", "version", None, "missing"),
    ("duration_s = 5", "duration_s = -5", "run.duration_s", 4, "> 0"),
    ("duration_s = 5", "duraton_s = 5", "run.duraton_s", 4, "unknown key"),
    ("start = [0, 0, 1]", "start = [0, 0]", "direction.start", 6, "3-vector"),
    ("start = [0, 0, 1]", "start = [0, 0, 0]", "direction.start", 6, "nonzero"),
    ('kind = "rotate"', 'kind = "spin"', "direction.segments[0].kind", 8, "must be one of"),
    ("rate_deg_per_s = 3", 'rate_deg_per_s = "3"', "direction.segments[0].rate_deg_per_s", 10,
     "expected a number"),
    ("start_nT = 20000", "start_nT = 0", "magnitude.start_nT", 13, "> 0"),
    ("start_nT = 20000", "", "magnitude.start_nT", 12, "required key is missing"),
    ("factor = 4", "factor = true", "events[0].factor", 18, "expected a number"),
    ('kind = "noise_burst"', 'kind = "earthquake"', "events[0].kind", 15, "must be one of"),
    ('name = "bad"', 'name = "bad"\n[sensor]\ngain_V = { 1a = -1.0 }', "sensor.gain_V[1a]", 4, "> 0"),
    ('name = "bad"', 'name = "bad"\n[sensor]\nprobes = 2', "sensor.probes", 4, "unknown key"),
    ('name = "bad"', 'name = "bad"\nkind = "scan"', "direction", 6, "[scan]"),
    ("factor = 4", "factor = 4\nchannels = [\"3a\"]", "events[0].channels", 19, "unknown name"),
    ("duration_s = 5\n", "duration_s = 5\nseed = 1.5\n", "run.seed", 5, "whole number"),
]


LOCKIN = "[lockin]\ntime_constant_s = 0.005\n"
BAD_CASES += [
    ("[direction]", LOCKIN.replace("0.005", "0") + "[direction]", "lockin.time_constant_s", 6, "> 0"),
    ("[direction]", LOCKIN + "filter_order = 9\n[direction]", "lockin.filter_order", 7, "<= 8"),
    ("[direction]", LOCKIN + "filter_order = 2.0\n[direction]", "lockin.filter_order", 7, "whole number"),
    ("[direction]", LOCKIN + "stages = 4\n[direction]", "lockin.stages", 7, "unknown key"),
    ("[direction]", LOCKIN + "noise_reference_bandwidth_hz = -1\n[direction]",
     "lockin.noise_reference_bandwidth_hz", 7, "> 0"),
    ("[direction]", LOCKIN + "oversample = 0\n[direction]", "lockin.oversample", 7, ">= 1"),
    ("[direction]", "[lockin]\nfilter_order = 4\n[direction]", "lockin.time_constant_s", 5, "required"),
    ("[direction]", LOCKIN.replace("0.005", "1e-8") + "[direction]", "lockin.time_constant_s", 6,
     "internal samples"),
    ('kind = "noise_burst"\nstart_s = 1\nduration_s = 1\nfactor = 4',
     'kind = "probe_missing"\nprobe = 2\nstart_s = 1\nduration_s = -1', "events[0].duration_s", 18, "> 0"),
    ('kind = "noise_burst"\nstart_s = 1\nduration_s = 1\nfactor = 4',
     'kind = "probe_missing"\nprobe = 3\nstart_s = 1\nduration_s = 1', "events[0].probe", 16, "<= 2"),
    ('kind = "noise_burst"\nstart_s = 1\nduration_s = 1\nfactor = 4',
     'kind = "fade"\nprobe = 1\nstart_s = 1\nfall_s = 0', "events[0].fall_s", 18, "> 0"),
    ('kind = "noise_burst"\nstart_s = 1\nduration_s = 1\nfactor = 4',
     'kind = "fade"\nprobe = 1\nstart_s = 1\nfall_s = 2\nto_pct = 120', "events[0].to_pct", 19, "<= 100"),
]


@pytest.mark.parametrize("old,new,key,line,words", BAD_CASES, ids=[c[2] + ":" + c[4] for c in BAD_CASES])
def test_bad_scenario_names_file_line_and_key(tmp_path, old, new, key, line, words):
    assert old in GOOD
    path = tmp_path / "broken.toml"
    path.write_text(GOOD.replace(old, new, 1))
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    err = info.value
    assert err.key == key and err.line == line and words in err.reason
    assert str(path) in str(err) and key in str(err)


def test_scan_settle_s_validation_and_default(tmp_path):
    base = ('version = 1\nkind = "scan"\n[run]\nsample_rate_hz = 200\n[lockin]\ntime_constant_s = 0.01\n'
            'filter_order = 2\n[scan]\nmagnitudes_nT = [20000]\npoints = 10\ndwell_samples = 5\n')
    s = loads_scenario(base)
    # Default with a lock-in: tau x gammaincinv(n, 1 - 1e-4), the step response's settling
    # (scipy.special, an outside library): 2 stages of 10 ms need 0.1175 s = 24 samples at 200 Hz.
    from scipy.special import gammaincinv
    assert s.scan.settle_samples == math.ceil(0.01 * gammaincinv(2, 1 - 1e-4) * 200) == 24
    assert s.duration_s == pytest.approx(10 * (24 + 5) / 200)
    assert loads_scenario(base + "settle_s = 0\n").scan.settle_samples == 0
    assert loads_scenario(base + "settle_s = 0.051\n").scan.settle_samples == 11
    no_lockin = base.replace("[lockin]\ntime_constant_s = 0.01\nfilter_order = 2\n", "")
    assert loads_scenario(no_lockin).scan.settle_samples == 0
    path = tmp_path / "scan.toml"
    path.write_text(base + "settle_s = -1\n")
    with pytest.raises(ScenarioError, match=">= 0") as info:
        load_scenario(path)
    assert info.value.key == "scan.settle_s" and info.value.line == 12


def test_good_base_case_loads(tmp_path):
    path = tmp_path / "good.toml"
    path.write_text(GOOD)
    assert load_scenario(path).n_samples == 1000


def test_toml_syntax_error_names_the_line(tmp_path):
    path = tmp_path / "syntax.toml"
    path.write_text(GOOD.replace("factor = 4", "factor = = 4"))
    with pytest.raises(ScenarioError, match=r"syntax.toml:18: not valid TOML") as info:
        load_scenario(path)
    assert info.value.line == 18


def test_missing_file_is_a_scenario_error(tmp_path):
    with pytest.raises(ScenarioError, match="cannot read scenario"):
        load_scenario(tmp_path / "nope.toml")


def test_locate_key_finds_array_tables_and_falls_back_to_the_table():
    text = "version = 1\n[run]\nseed = 1\n[[events]]\nkind = \"a\"\n[[events]]\nkind = \"b\"\nfactor = 2\n"
    assert locate_key(text, "run.seed") == 3
    assert locate_key(text, "events[1].factor") == 8
    assert locate_key(text, "events[1].start_s") == 6          # absent: its [[events]] header
    assert locate_key(text, "events[0].kind") == 5
    assert locate_key(text, "scan.points") is None
    assert tomllib.loads(text)["events"][1]["factor"] == 2


# ----- architecture --------------------------------------------------------------------------

def test_firmware_sim_imports_neither_estimator_nor_io():
    code = ("import sys\n"
            "import fieldvane.firmware_sim.scenario, fieldvane.firmware_sim.frames, "
            "fieldvane.firmware_sim.emitter\n"
            "bad = [m for m in sys.modules if m.startswith(('fieldvane.io', 'fieldvane.estimator'))]\n"
            "print(','.join(bad))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == ""
