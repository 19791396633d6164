"""`fieldvane calibrate` end to end: the file it writes, its summary, and its errors."""

import json

import numpy as np
import pytest

from fieldvane.io.calfile import load_calibration
from fieldvane.io.cli import main
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
    return d, sensor


def test_calibrate_writes_versioned_json_and_summary(calibrated, capsys):
    d, sensor = calibrated
    rc = main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json"), "--sensor", str(d / "sensor.toml")])
    out = capsys.readouterr().out
    assert rc == 0
    doc = json.loads((d / "cal.json").read_text())
    assert doc["format"] == "fieldvane-calibration" and doc["version"] == 1
    assert [p["id"] for p in doc["pumps"]] == ["a", "b"]
    assert [p["isotope"] for p in doc["pumps"]] == ["87Rb", "85Rb"]
    assert [p["id"] for p in doc["probes"]] == ["1", "2"]
    for entry, truth in zip(doc["pumps"], sensor.pump_axes):
        assert abs(abs(np.dot(entry["direction"], truth)) - 1) < 1e-5
    assert doc["pumps"][0]["name"] == "pump east"
    for needle in ("angle between pumps", "deg from nominal", "held-out", "sphere coverage",
                   "|B| 1000..20000 nT at 4 magnitude knot(s)"):
        assert needle in out
    cal = load_calibration(d / "cal.json")
    u = np.array([[0.6, 0.0, 0.8]])
    assert cal.model.h(u, 5000.0).shape == (1, 4)


def test_calibration_file_round_trip_and_tamper_detection(calibrated, tmp_path):
    d, _ = calibrated
    main(["calibrate", str(d / "scan.csv"), "-o", str(tmp_path / "c.json")])
    cal = load_calibration(tmp_path / "c.json")
    u = np.random.default_rng(0).normal(size=(20, 3))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    again = load_calibration(tmp_path / "c.json")
    np.testing.assert_array_equal(cal.model.h(u, 4000.0), again.model.h(u, 4000.0))
    npz = tmp_path / "c.npz"
    raw = bytearray(npz.read_bytes())
    raw[-30] ^= 0xFF
    npz.write_bytes(bytes(raw))
    from fieldvane.io.errors import InputError
    with pytest.raises(InputError, match="does not match the checksum"):
        load_calibration(tmp_path / "c.json")
    doc = json.loads((tmp_path / "c.json").read_text())
    doc["version"] = 99
    (tmp_path / "c.json").write_text(json.dumps(doc))
    with pytest.raises(InputError, match="version 99 is not supported"):
        load_calibration(tmp_path / "c.json")


@pytest.mark.parametrize("case,needle", [
    ("missing_field", "column 'bx_nT'"),
    ("too_few", "at least 40"),
    ("garbage", "not text"),
    ("cap", "covers only"),
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
        lines = p.read_text().splitlines()
        keep = [lines[0]] + [ln for ln, uu in zip(lines[1:], u) if uu[2] > 0.7]
        p.write_text("\n".join(keep) + "\n")
    rc = main(["calibrate", str(p), "-o", str(tmp_path / "cal.json")])
    err = capsys.readouterr().err
    assert rc == 2
    assert needle in err and "Traceback" not in err
    assert not (tmp_path / "cal.json").exists()
