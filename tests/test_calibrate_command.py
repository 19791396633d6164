"""`fieldvane calibrate` end to end: the files it writes, its summary, its errors and the calibration file reader."""

import hashlib
import json

import numpy as np
import pytest

from fieldvane.io.calfile import load_calibration
from fieldvane.io.cli import main
from fieldvane.io.errors import InputError
from fieldvane.io.recording import write_recording
from synthetic_sensor import make_sensor, scan


def write_scan(path, sensor, magnitudes, points, seed=2):
    u, b, z, f, _ = scan(sensor, magnitudes, points, snr=1000, seed=seed)
    cols = {"t": np.arange(len(b)) * 0.01, "f_a": f[:, 0], "f_b": f[:, 1]}
    for k, ch in enumerate(sensor.channels):
        cols[f"x_{ch}"] = z[:, k].real
        cols[f"y_{ch}"] = z[:, k].imag
    bv = u * b[:, None]
    cols.update({"bx_nT": bv[:, 0], "by_nT": bv[:, 1], "bz_nT": bv[:, 2]})
    write_recording(path, cols)
    return u, b, z


def data_lines(path):
    """Return (lines, index of the header line): write_recording puts '# key: value' lines first."""
    lines = path.read_text().splitlines()
    return lines, next(i for i, ln in enumerate(lines) if ln.startswith("t,"))


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    d = tmp_path_factory.mktemp("cal")
    sensor, nominal_pumps, nominal_probes = make_sensor(seed=4, n_probes=2, distortion=0.01)
    write_scan(d / "scan.csv", sensor, [1000, 3000, 10000, 20000], 600)
    (d / "sensor.toml").write_text(
        'version = 1\nname = "bench mount"\n'
        '[pumps.a]\naxis = [1, 0, 0]\nname = "pump east"\n[pumps.b]\naxis = [0, 1, 0]\n'
        f'[probes.1]\naxis = [0, 0, 1]\n[probes.2]\naxis = {list(map(float, nominal_probes[1]))}\n'
        '[mounting]\nrotation_deg = [0, 0, 90]\n')
    assert main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json"), "--sensor",
                 str(d / "sensor.toml")]) == 0
    return d, sensor


def test_calibrate_writes_versioned_json_and_summary(calibrated, tmp_path, capsys):
    d, sensor = calibrated
    rc = main(["calibrate", str(d / "scan.csv"), "-o", str(tmp_path / "cal.json"), "--sensor", str(d / "sensor.toml")])
    out = capsys.readouterr().out
    assert rc == 0
    doc = json.loads((tmp_path / "cal.json").read_text())
    assert doc["format"] == "fieldvane-calibration" and doc["version"] == 2
    assert [p["id"] for p in doc["pumps"]] == ["a", "b"]
    assert [p["isotope"] for p in doc["pumps"]] == ["87Rb", "85Rb"]
    assert [p["id"] for p in doc["probes"]] == ["1", "2"]
    for entry, truth in zip(doc["pumps"], sensor.pump_axes):
        assert abs(abs(np.dot(entry["direction"], truth)) - 1) < 1e-5
        assert 0 < entry["direction_std_deg"] < 0.05
    assert all(0 < p["direction_std_deg"] < 0.05 for p in doc["probes"])
    assert doc["pumps"][0]["name"] == "pump east"
    assert doc["mounting_rotation"] and doc["sensor_name"] == "bench mount"
    assert doc["magnitude_check"]["levels_nT"] == pytest.approx([1000, 3000, 10000, 20000])
    assert doc["diagnostics"]["rejected_rows"] == 0
    for needle in ("angle between pumps", "deg from nominal", "held-out", "sphere coverage",
                   "|B| 1000..20000 nT at 4 magnitude knot(s)", "+- 0.0", "rejected rows: none",
                   "magnitudes: levels 1000, 3000, 10000, 20000 nT"):
        assert needle in out
    cal = load_calibration(tmp_path / "cal.json")
    assert cal.model.h(np.array([[0.6, 0.0, 0.8]]), 5000.0).shape == (1, 4)
    np.testing.assert_allclose(cal.direction_std_deg, [p["direction_std_deg"] for p in doc["pumps"] + doc["probes"]])


def test_calibration_file_round_trip_and_tamper_detection(calibrated, tmp_path):
    d, _ = calibrated
    for name in ("cal.json", "cal.npz"):
        (tmp_path / name).write_bytes((d / name).read_bytes())
    cal = load_calibration(tmp_path / "cal.json")
    u = np.random.default_rng(0).normal(size=(20, 3))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    again = load_calibration(tmp_path / "cal.json")
    np.testing.assert_array_equal(cal.model.h(u, 4000.0), again.model.h(u, 4000.0))
    np.testing.assert_array_equal(cal.model_error_ratio([2000.0, 40000.0]), again.model_error_ratio([2000.0, 40000.0]))
    np.testing.assert_allclose(cal.physics.knot_responses(u), again.physics.knot_responses(u), rtol=1e-6, atol=1e-9)
    npz = tmp_path / "cal.npz"
    raw = bytearray(npz.read_bytes())
    raw[-30] ^= 0xFF
    npz.write_bytes(bytes(raw))
    with pytest.raises(InputError, match="does not match the checksum"):
        load_calibration(tmp_path / "cal.json")


def _tampered_json(src, dst, change):
    doc = json.loads(src.read_text())
    change(doc)
    dst.write_text(json.dumps(doc))
    return dst


@pytest.mark.parametrize("case,needle", [
    ("version-true", "key 'version': must be the whole number 1 or 2, got true"),
    ("version-float", "key 'version': must be the whole number 1 or 2, got 1.0"),
    ("version-string", "key 'version': must be the whole number 1 or 2, got \"2\""),
    ("version-99", "key 'version': must be the whole number 1 or 2, got 99"),
    ("channel-id", "key 'channels[1].id': channel ids must be"),
    ("isotope", "key 'pumps[0].isotope': unknown isotope \"87Xx\""),
    ("noise-missing", "key 'channels[0].noise_V': required field missing"),
    ("knots-missing", "key 'magnitude_knots_nT': required field missing"),
    ("noise-negative", "key 'channels[2].noise_V': must be > 0"),
    ("handedness", "key 'channels[0].handedness': must be 1 or -1, got 0.5"),
    ("direction-short", "key 'probes[1].direction': must be a list of 3 numbers"),
    ("nan-in-json", "numbers must be finite"),
    ("not-an-object", "not a fieldvane calibration"),
    ("lockin-order", "key 'scan_lockin.filter_order': must be a whole number of RC stages 1..16, got 2.5"),
    ("lockin-tau", "key 'scan_lockin.time_constant_s': must be >= 0 s"),
])
def test_bad_calibration_json_is_one_line_naming_the_key(calibrated, tmp_path, case, needle):
    d, _ = calibrated
    (tmp_path / "cal.npz").write_bytes((d / "cal.npz").read_bytes())
    src, dst = d / "cal.json", tmp_path / "cal.json"
    edits = {
        "version-true": lambda doc: doc.update(version=True),
        "version-float": lambda doc: doc.update(version=1.0),
        "version-string": lambda doc: doc.update(version="2"),
        "version-99": lambda doc: doc.update(version=99),
        "channel-id": lambda doc: doc["channels"][1].update(id="1c"),
        "isotope": lambda doc: doc["pumps"][0].update(isotope="87Xx"),
        "noise-missing": lambda doc: doc["channels"][0].pop("noise_V"),
        "knots-missing": lambda doc: doc.pop("magnitude_knots_nT"),
        "noise-negative": lambda doc: doc["channels"][2].update(noise_V=-1.0),
        "handedness": lambda doc: doc["channels"][0].update(handedness=0.5),
        "direction-short": lambda doc: doc["probes"][1].update(direction=[0, 1]),
        "lockin-order": lambda doc: doc.update(scan_lockin={"time_constant_s": 0.005, "filter_order": 2.5}),
        "lockin-tau": lambda doc: doc.update(scan_lockin={"time_constant_s": -0.005, "filter_order": 4}),
    }
    if case == "nan-in-json":
        dst.write_text(src.read_text().replace('"noise_V": ', '"noise_V": NaN, "x": ', 1))
    elif case == "not-an-object":
        dst.write_text("[1, 2, 3]\n")
    else:
        _tampered_json(src, dst, edits[case])
    with pytest.raises(InputError) as info:
        load_calibration(dst)
    message = str(info.value)
    assert needle in message and "\n" not in message, message
    assert message.startswith(str(dst))


def test_bad_calibration_tables_and_binary_files(calibrated, tmp_path):
    d, _ = calibrated
    # -c pointing at the tables file, at any binary file, at a file that is not UTF-8.
    with pytest.raises(InputError, match="table file"):
        load_calibration(d / "cal.npz")
    (tmp_path / "image.json").write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00")
    with pytest.raises(InputError, match="binary or not UTF-8"):
        load_calibration(tmp_path / "image.json")
    (tmp_path / "latin1.json").write_bytes('{"format": "fieldvane-calibration", "name": "caf\xe9"}'.encode("latin-1"))
    with pytest.raises(InputError, match="binary or not UTF-8"):
        load_calibration(tmp_path / "latin1.json")
    # A NaN coefficient in the tables (checksum updated, as a careless tool would).
    with np.load(d / "cal.npz", allow_pickle=False) as z:
        arrays = {k: z[k].copy() for k in z.files}
    arrays["coef_real"][0, 0, 0] = np.nan
    np.savez(tmp_path / "cal.npz", **arrays)
    doc = json.loads((d / "cal.json").read_text())
    doc["model"]["tables_sha256"] = hashlib.sha256((tmp_path / "cal.npz").read_bytes()).hexdigest()
    (tmp_path / "cal.json").write_text(json.dumps(doc))
    with pytest.raises(InputError, match="'coef_real' holds a non-finite value"):
        load_calibration(tmp_path / "cal.json")


def test_version_1_files_still_load(calibrated, tmp_path):
    # The golden calibration of the replay tests is version 1: read as before, with a magnitude
    # check rebuilt from its table.
    from pathlib import Path

    golden = Path(__file__).parent / "golden" / "golden_cal.json"
    cal = load_calibration(golden)
    assert cal.model.coef.shape[1] == cal.model.basis.size
    ratio = cal.model_error_ratio([1000.0, 3000.0, 60000.0])
    assert np.all(ratio[0] == 0) and np.all(ratio[1] > 0) and np.all(ratio[2] > ratio[1])


@pytest.mark.parametrize("case,needle", [
    ("missing_field", "column 'bx_nT'"),
    ("too_few", "at least 40"),
    ("garbage", "not text"),
    ("cap", "covers only"),
    ("zero-channel", "channel 1b is zero in every row"),
    ("all-absurd", "rows are unusable"),
])
def test_bad_scans_exit_2_with_a_message_not_a_traceback(tmp_path, capsys, case, needle):
    sensor, _, _ = make_sensor(seed=1)
    p = tmp_path / "scan.csv"
    if case == "missing_field":
        p.write_text("t,f_a,f_b,x_1a,y_1a,x_1b,y_1b,x_2a,y_2a,x_2b,y_2b\n" + "0,1,1,1,1,1,1,1,1,1,1\n")
    elif case == "too_few":
        write_scan(p, sensor, [5000], 20)
    elif case == "garbage":
        p.write_bytes(b"\x00\xff garbage\n")
    elif case == "cap":
        u, b, z = write_scan(p, sensor, [5000], 1000)
        lines, h = data_lines(p)
        keep = lines[:h + 1] + [ln for ln, uu in zip(lines[h + 1:], u) if uu[2] > 0.7]
        p.write_text("\n".join(keep) + "\n")
    elif case in ("zero-channel", "all-absurd"):
        write_scan(p, sensor, [2000, 8000], 300)
        lines, h = data_lines(p)
        cols = lines[h].split(",")
        out = lines[:h + 1]
        for ln in lines[h + 1:]:
            v = ln.split(",")
            if case == "zero-channel":
                v[cols.index("x_1b")] = v[cols.index("y_1b")] = "0"
            else:
                v[cols.index("x_1a")] = "1e160"
            out.append(",".join(v))
        p.write_text("\n".join(out) + "\n")
    rc = main(["calibrate", str(p), "-o", str(tmp_path / "cal.json")])
    err = capsys.readouterr().err
    assert rc == 2
    assert needle in err and "Traceback" not in err and len(err.strip().splitlines()) == 1, err
    assert not (tmp_path / "cal.json").exists() and not (tmp_path / "cal.npz").exists()


def test_a_spike_in_the_scan_is_left_out_and_named_by_line(tmp_path, capsys):
    sensor, _, _ = make_sensor(seed=3)
    p = tmp_path / "scan.csv"
    write_scan(p, sensor, [1000, 5000, 20000], 500)
    lines, h = data_lines(p)
    cols = lines[h].split(",")
    v = lines[h + 58].split(",")
    v[cols.index("x_1a")] = "100"
    lines[h + 58] = ",".join(v)
    v = lines[h + 700].split(",")
    v[cols.index("y_2b")] = "1e160"
    lines[h + 700] = ",".join(v)
    p.write_text("\n".join(lines) + "\n")
    rc = main(["calibrate", str(p), "-o", str(tmp_path / "cal.json")])
    out = capsys.readouterr().out
    assert rc == 0
    assert f"line {h + 59}: outlier, channel 1a" in out
    assert f"line {h + 701}: absurd, channel 2b" in out
    doc = json.loads((tmp_path / "cal.json").read_text())
    assert doc["diagnostics"]["rejected_rows"] == 2
    assert {r["line"] for r in doc["diagnostics"]["rejected"]} == {h + 59, h + 701}
    noise = [c["noise_V"] for c in doc["channels"]]
    injected = np.abs(sensor.gains) / 1000
    np.testing.assert_allclose(noise, injected, rtol=0.1)


def test_overwrite_rules_and_option_values(calibrated, tmp_path, capsys):
    d, _ = calibrated
    scan_csv = tmp_path / "scan.csv"
    scan_csv.write_bytes((d / "scan.csv").read_bytes())
    cases = [
        (["-o", str(scan_csv)], "option '--output': the output would overwrite an input"),
        (["-o", str(tmp_path / "x.npz")], "written over its own tables file"),
        (["-o", str(tmp_path / "c.json"), "--folds", "0"], "option '--folds': must be a whole number from 2"),
        (["-o", str(tmp_path / "c.json"), "--folds", "51"], "option '--folds'"),
        (["-o", str(tmp_path / "c.json"), "--max-degree", "-2"], "option '--max-degree'"),
    ]
    for extra, needle in cases:
        rc = main(["calibrate", str(scan_csv)] + extra)
        err = capsys.readouterr().err
        assert rc == 2 and needle in err, (extra, err)
    before = scan_csv.read_bytes()
    assert main(["calibrate", str(scan_csv), "-o", str(scan_csv), "--force"]) == 2
    assert scan_csv.read_bytes() == before
    capsys.readouterr()
    # An existing JSON or tables file is refused without --force; with it both are replaced together.
    assert main(["calibrate", str(scan_csv), "-o", str(tmp_path / "c.json")]) == 0
    capsys.readouterr()
    assert main(["calibrate", str(scan_csv), "-o", str(tmp_path / "c.json")]) == 2
    assert "output file exists" in capsys.readouterr().err
    (tmp_path / "c.json").unlink()
    assert main(["calibrate", str(scan_csv), "-o", str(tmp_path / "c.json")]) == 2   # c.npz still there
    assert "c.npz" in capsys.readouterr().err
    assert main(["calibrate", str(scan_csv), "-o", str(tmp_path / "c.json"), "--force"]) == 0
    load_calibration(tmp_path / "c.json")
    assert not list(tmp_path.glob(".*partial*"))


def test_plots_are_written_or_their_absence_is_said(calibrated, tmp_path, capsys, monkeypatch):
    d, _ = calibrated
    rc = main(["calibrate", str(d / "scan.csv"), "-o", str(tmp_path / "c.json"), "--plots", str(tmp_path / "figs")])
    assert rc == 0
    for name in ("residual_sphere.png", "residual_magnitude.png", "model_error_magnitude.png"):
        assert (tmp_path / "figs" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    capsys.readouterr()
    import fieldvane.io.plots as plots

    def missing():
        raise plots.PlotsUnavailable("matplotlib is not available (test)")

    monkeypatch.setattr(plots, "require_matplotlib", missing)
    rc = main(["calibrate", str(d / "scan.csv"), "-o", str(tmp_path / "c2.json"), "--plots", str(tmp_path / "figs2")])
    captured = capsys.readouterr()
    assert rc == 0 and "no calibration figures" in captured.err
    assert (tmp_path / "c2.json").exists() and not (tmp_path / "figs2").exists()


def test_the_scan_lockin_filter_is_kept_and_taken_for_streams_that_do_not_state_one(calibrated, tmp_path):
    # A wire stream (a live run, a capture) says nothing about the lock-in; the calibration scan's filter is the
    # one to assume (the same electronics). A recording's own metadata and a filter file still win.
    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.io.estimation import settings_for_stream

    d, sensor = calibrated
    assert load_calibration(d / "cal.json").scan_lockin is None            # a scan without lock-in metadata
    u, b, z, f, _ = scan(sensor, [1000, 3000, 10000, 20000], 600, snr=1000, seed=2)
    cols = {"t": np.arange(len(b)) * 0.01, "f_a": f[:, 0], "f_b": f[:, 1]}
    for k, ch in enumerate(sensor.channels):
        cols[f"x_{ch}"], cols[f"y_{ch}"] = z[:, k].real, z[:, k].imag
    cols.update({"bx_nT": u[:, 0] * b, "by_nT": u[:, 1] * b, "bz_nT": u[:, 2] * b})
    write_recording(tmp_path / "scan.csv", cols, {"lockin_time_constant_s": "0.005", "lockin_filter_order": "3"})
    assert main(["calibrate", str(tmp_path / "scan.csv"), "-o", str(tmp_path / "cal.json")]) == 0
    cal = load_calibration(tmp_path / "cal.json")
    assert cal.scan_lockin == (0.005, 3)
    live = settings_for_stream(None, None, "live", cal)
    assert (live.lockin_time_constant_s, live.lockin_filter_order) == (0.005, 3)
    stated = settings_for_stream(FilterSettings(lockin_time_constant_s=0.002, lockin_filter_order=2), None, "f", cal)
    assert (stated.lockin_time_constant_s, stated.lockin_filter_order) == (0.002, 2)
    white = settings_for_stream(None, {"lockin_time_constant_s": "0"}, "rec.csv", cal)     # stated: none
    assert white.lockin_time_constant_s == 0.0
    assert settings_for_stream(None, None, "rec.csv").lockin_time_constant_s == 0.0       # no calibration given
