"""The geographic output end to end on a simulated pier (examples/pier.toml, pier_tilt.toml, examples/pier/).

The simulator is given the Earth's field in north-east-down at an invented site (48.2 uT) and turns it into the
sensor frame through its own copy of the rotations (firmware_sim/site.py); fieldvane calibrates the sensor from a
scan (examples/pier_scan.toml, sensor file with [mounting]), replays the recording with a site file and writes
IAGA-2002 files. The truth is the scenario's NED field; its elements are checked against the definitions in
docs/references.md ('Geomagnetism': H = sqrt(X^2+Y^2), D = atan2(Y, X), I = atan2(Z, H)) computed here with numpy.

Targets (the issue's): one-second means of D and I within 0.02 deg RMS of the truth, X, Y, Z within 15 nT RMS,
F within 2 nT RMS, with the attitude given as heading/pitch/roll, as a matrix and as a time series. The lock-in
noise is the simulator's default (the SNR of today's example streams).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from fieldvane.firmware_sim.scenario import load_scenario
from fieldvane.io.cli import main
from fieldvane.io.estimates_csv import read_estimates
from fieldvane.io.geo_output import read_metadata
from fieldvane.io.sitefile import parse_utc
from test_iaga2002 import parse_iaga2002

ROOT = Path(__file__).resolve().parents[1]
EX = ROOT / "examples"
PIER = EX / "pier"
SETTLE_S = 2.0              # acquisition: the first seconds are left out of the scores
DURATION_S = 150.0          # long enough for two one-minute values (the filter spans 91 s)


def _truth(name: str) -> dict[str, float]:
    """Return the scenario's true elements, from its NED field with numpy (docs/references.md definitions)."""
    x, y, z = load_scenario(EX / f"{name}.toml").site.field_ned_nT
    h = math.hypot(x, y)
    return {"X_nT": x, "Y_nT": y, "Z_nT": z, "H_nT": h, "F_nT": math.sqrt(h * h + z * z),
            "D_deg": math.degrees(math.atan2(y, x)), "I_deg": math.degrees(math.atan2(z, h))}


@pytest.fixture(scope="module")
def pier(tmp_path_factory):
    """Calibrate from the pier's scan (sensor file with [mounting]), simulate both pier days, replay with sites."""
    d = tmp_path_factory.mktemp("pier")
    assert main(["simulate", str(EX / "pier_scan.toml"), "-o", str(d / "scan.csv")]) == 0
    assert main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json"),
                 "--sensor", str(PIER / "pier_sensor.toml")]) == 0
    for name in ("pier", "pier_tilt"):
        assert main(["simulate", str(EX / f"{name}.toml"), "-o", str(d / f"{name}.csv"),
                     "--duration", str(DURATION_S)]) == 0
    # The tilting day's attitude log over the longer run: sampled from the scenario's motion at 10 Hz.
    scenario = load_scenario(EX / "pier_tilt.toml")
    t = np.round(np.arange(0.0, DURATION_S + 0.05, 0.1), 1)
    h, p, r = scenario.site.attitude_angles_deg(t)
    (d / "att.csv").write_text("t,heading_deg,pitch_deg,roll_deg\n" + "".join(
        f"{a:.1f},{b:.6f},{c:.6f},{e:.6f}\n" for a, b, c, e in zip(t, h, p, r)), encoding="utf-8")
    (d / "site_series.toml").write_text((PIER / "pier_site_series.toml").read_text(encoding="utf-8")
                                        .replace("pier_attitude.csv", "att.csv"), encoding="utf-8")
    runs = {"angles": ("pier", PIER / "pier_site_angles.toml"), "matrix": ("pier", PIER / "pier_site_matrix.toml"),
            "series": ("pier_tilt", d / "site_series.toml"),
            "series_as_fixed": ("pier_tilt", PIER / "pier_site_angles.toml")}
    for form, (name, site) in runs.items():
        assert main(["replay", str(d / f"{name}.csv"), "-c", str(d / "cal.json"), "-o", str(d / f"est_{form}.csv"),
                     "--site", str(site)]) == 0
    return d


def second_errors(path: Path, truth: dict[str, float]) -> dict[str, np.ndarray]:
    """Return, per element, the one-second means (centred on each UTC second) minus the truth."""
    est = read_estimates(path)
    keep = est["t"] >= est["t"][0] + SETTLE_S
    sec = np.floor(est["utc"][keep] + 0.5)
    _, idx = np.unique(sec, return_inverse=True)
    counts = np.bincount(idx)
    full = counts >= 0.9 * np.max(counts)            # whole seconds only (not the run's two ends)
    out = {}
    for key, want in truth.items():
        means = np.bincount(idx, weights=est[key][keep]) / counts
        out[key] = (means - want)[full]
    return out


def _rms(x: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(x))))


@pytest.mark.parametrize("form", ["angles", "matrix", "series"])
def test_one_second_means_meet_the_targets(pier, form):
    name = "pier_tilt" if form == "series" else "pier"
    err = second_errors(pier / f"est_{form}.csv", _truth(name))
    assert err["D_deg"].size >= DURATION_S - 2 * SETTLE_S - 2
    numbers = {k: (_rms(v), float(np.max(np.abs(v)))) for k, v in err.items()}
    print(form, {k: f"rms {a:.4f} max {b:.4f}" for k, (a, b) in numbers.items()})
    assert numbers["D_deg"][0] <= 0.02 and numbers["I_deg"][0] <= 0.02, numbers
    for key in ("X_nT", "Y_nT", "Z_nT"):
        assert numbers[key][0] <= 15.0, numbers
    assert numbers["F_nT"][0] <= 2.0, numbers


def test_a_moving_platform_needs_its_attitude_series(pier):
    # The same tilting day with the pier's fixed attitude: the rocking (0.5 deg in roll) goes into D and I.
    fixed = second_errors(pier / "est_series_as_fixed.csv", _truth("pier_tilt"))
    series = second_errors(pier / "est_series.csv", _truth("pier_tilt"))
    assert _rms(fixed["I_deg"]) > 5 * _rms(series["I_deg"]) and _rms(fixed["D_deg"]) > 0.1


def test_angles_and_matrix_forms_give_the_same_columns(pier):
    a, m = read_estimates(pier / "est_angles.csv"), read_estimates(pier / "est_matrix.csv")
    for key in ("X_nT", "Y_nT", "Z_nT", "D_deg", "I_deg", "sigma_D_deg", "sigma_I_deg"):
        np.testing.assert_allclose(a[key], m[key], rtol=0, atol=1e-5 if key.endswith("deg") else 2e-3)


def test_estimates_carry_utc_and_their_start_line(pier):
    meta = read_metadata(pier / "est_angles.csv")
    start = parse_utc(load_scenario(EX / "pier.toml").site.start_utc)
    assert parse_utc(meta["start_utc"]) == start and "mounting_rotation" in meta
    est = read_estimates(pier / "est_angles.csv")
    np.testing.assert_allclose(est["utc"], start + est["t"], rtol=0, atol=1e-6)
    first_row = (pier / "est_angles.csv").read_text(encoding="utf-8").split("\n")
    header = next(line for line in first_row if not line.startswith("#")).split(",")
    row = first_row[first_row.index(",".join(header)) + 1].split(",")
    assert row[header.index("utc")] == "2026-12-02T10:29:30.000000Z"


def test_uncertainties_are_honest_per_sample(pier):
    # 1-D Gaussian: 95 % of errors within 2 sigma (accepted >= 90 %; common practice). The direction's
    # sigma dominates sigma_D and sigma_I here (the attitude's is a few thousandths of a degree).
    est = read_estimates(pier / "est_angles.csv")
    truth = _truth("pier")
    keep = est["t"] >= est["t"][0] + SETTLE_S
    for key in ("D_deg", "I_deg"):
        err = np.abs(est[key][keep] - truth[key])
        share = np.mean(err < 2 * est[f"sigma_{key}"][keep])
        assert share >= 0.90, (key, share)


def test_export_writes_second_and_minute_files_the_independent_parser_reads(pier, capsys):
    out = pier / "iaga"
    assert main(["export", str(pier / "est_angles.csv"), "--site", str(PIER / "pier_site_angles.toml"),
                 "-o", str(out)]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == ["fhp20261202102930psec.sec", "fhp202612021030pmin.min"]
    truth = _truth("pier")
    want = np.array([truth["X_nT"], truth["Y_nT"], truth["Z_nT"], truth["F_nT"]])
    sec = parse_iaga2002((out / names[0]).read_text(encoding="ascii"))
    assert sec["header"]["IAGA Code"] == "FHP" and sec["header"]["Data Interval Type"].startswith("Average 1-second")
    assert sec["columns"] == ["FHPX", "FHPY", "FHPZ", "FHPF"]
    times = np.array([r[0] for r in sec["rows"]])
    values = np.array([r[1] for r in sec["rows"]], float)
    assert times[0] == parse_utc("2026-12-02T10:29:30Z") and np.all(np.diff(times) == 1)
    inner = times >= times[0] + SETTLE_S + 1
    err = values[inner] - want
    assert np.sqrt(np.mean(err[:, :3] ** 2, axis=0)).max() <= 15.0 and np.sqrt(np.mean(err[:, 3] ** 2)) <= 2.0
    minute = parse_iaga2002((out / names[1]).read_text(encoding="ascii"))
    rows = {t: v for t, v in minute["rows"]}
    m0 = parse_utc("2026-12-02T10:30:00Z")
    assert sorted(rows) == [m0, m0 + 60, m0 + 120]
    for t in (m0, m0 + 60):                       # covered by the run: filtered values near the truth
        np.testing.assert_allclose(rows[t], want, atol=15.0)
    assert all(np.isnan(v) for v in rows[m0 + 120])   # the run ends 0 s after it: under 90 % of the weight
    # The overwrite rule: a second export refuses, --force replaces.
    capsys.readouterr()
    assert main(["export", str(pier / "est_angles.csv"), "--site", str(PIER / "pier_site_angles.toml"),
                 "-o", str(out)]) == 2
    assert "output file exists" in capsys.readouterr().err
    assert main(["export", str(pier / "est_angles.csv"), "--site", str(PIER / "pier_site_angles.toml"),
                 "-o", str(out), "--interval", "second", "--force"]) == 0


def test_export_computes_the_columns_from_plain_estimates(pier):
    # Strip the geographic columns: export --site recomputes them from ux..uz with the mounting line.
    est = read_estimates(pier / "est_angles.csv")
    text = (pier / "est_angles.csv").read_text(encoding="utf-8").split("\n")
    meta = [line for line in text if line.startswith("#")]
    header = text[len(meta)].split(",")
    keep = [i for i, name in enumerate(header) if name not in ("X_nT", "Y_nT", "Z_nT", "H_nT", "F_nT", "D_deg",
                                                                "I_deg", "sigma_D_deg", "sigma_I_deg",
                                                                "sigma_F_nT")]
    rows = [",".join(line.split(",")[i] for i in keep) for line in text[len(meta):] if line]
    plain = pier / "plain.csv"
    plain.write_text("\n".join(meta + rows) + "\n", encoding="utf-8")
    assert main(["export", str(plain), "--site", str(PIER / "pier_site_angles.toml"), "-o", str(pier / "iaga2"),
                 "--interval", "second"]) == 0
    a = parse_iaga2002(next((pier / "iaga2").glob("*.sec")).read_text(encoding="ascii"))
    b = parse_iaga2002(next((pier / "iaga").glob("*.sec")).read_text(encoding="ascii"))
    np.testing.assert_allclose(np.array([r[1] for r in a["rows"]], float),
                               np.array([r[1] for r in b["rows"]], float), atol=0.011)
    assert est["t"].size == len(rows) - 1


def test_report_checks_the_site_against_igrf(pier, capsys):
    assert main(["report", str(pier / "est_angles.csv"), "--site", str(PIER / "pier_site_angles.toml"),
                 "-o", str(pier / "report"), "--no-plots"]) == 0
    out = capsys.readouterr().out
    assert "geographic check against IGRF14 at Fernhill test pier" in out
    lines = {line.split()[0]: line for line in out.splitlines() if line.startswith("  ") and "model" in line}
    assert set(lines) >= {"D", "I", "F"} and all(line.endswith("consistent") for line in lines.values())
    assert "not a survey" in out
    assert "## Geographic check (IGRF14)" in (pier / "report" / "summary.md").read_text(encoding="utf-8")


def test_example_attitude_file_is_the_scenarios_motion():
    # examples/pier/pier_attitude.csv was sampled from pier_tilt.toml's motion (6 decimals printed).
    rows = np.loadtxt(PIER / "pier_attitude.csv", delimiter=",", comments="#", skiprows=3)
    h, p, r = load_scenario(EX / "pier_tilt.toml").site.attitude_angles_deg(rows[:, 0])
    np.testing.assert_allclose(rows[:, 1:], np.column_stack([h, p, r]), atol=5.1e-7)
    assert rows[0, 0] == 0.0 and rows[-1, 0] >= load_scenario(EX / "pier_tilt.toml").duration_s


def test_attitude_file_on_the_utc_clock_gives_the_same_columns(pier):
    # The same attitude log with POSIX UTC times (file_clock = "utc", as a GNSS/INS log has them).
    start = parse_utc(load_scenario(EX / "pier_tilt.toml").site.start_utc)
    rows = np.loadtxt(pier / "att.csv", delimiter=",", skiprows=1)
    (pier / "att_utc.csv").write_text("t,heading_deg,pitch_deg,roll_deg\n" + "".join(
        f"{start + r[0]:.3f},{r[1]:.6f},{r[2]:.6f},{r[3]:.6f}\n" for r in rows), encoding="utf-8")
    site = (pier / "site_series.toml").read_text(encoding="utf-8").replace("att.csv", "att_utc.csv")
    (pier / "site_utc.toml").write_text(site.replace('file_clock = "recording"', 'file_clock = "utc"'), "utf-8")
    assert main(["replay", str(pier / "pier_tilt.csv"), "-c", str(pier / "cal.json"), "-o", str(pier / "est_utc.csv"),
                 "--site", str(pier / "site_utc.toml")]) == 0
    a, b = read_estimates(pier / "est_utc.csv"), read_estimates(pier / "est_series.csv")
    for key in ("D_deg", "I_deg", "X_nT"):
        np.testing.assert_allclose(a[key], b[key], rtol=0, atol=1e-6 if key.endswith("deg") else 1e-3)
