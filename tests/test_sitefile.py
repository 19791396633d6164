"""Site TOML, attitude CSV, the sensor file's [mounting] table and UTC time helpers (io/sitefile.py)."""

import calendar
import math
from datetime import datetime, timezone

import numpy as np
import pytest

from cli_helpers import MINIMAL_SENSOR
from fieldvane.estimator.geomagnetic import attitude_matrix, mounting_from_rotation_deg
from fieldvane.io.errors import InputError
from fieldvane.io.sensorfile import read_sensor_file
from fieldvane.io.sitefile import (format_utc, mounting_from_table, parse_utc, read_attitude_csv, read_mounting,
                                   read_site_file)

SITE = """\
version = 1

[site]
name = "Hill pier"
iaga_code = "hpr"
latitude_deg = 47.25
longitude_deg = 350.5
elevation_m = 812.0
institute = "Example Field School"

[attitude]
{attitude}
"""


def _site(tmp_path, attitude="heading_deg = 12.5\npitch_deg = -1.0\nroll_deg = 0.5", body=None, name="site.toml"):
    path = tmp_path / name
    path.write_text(body if body is not None else SITE.format(attitude=attitude), encoding="utf-8")
    return path


def _error(fn, *args) -> InputError:
    with pytest.raises(InputError) as info:
        fn(*args)
    assert "\n" not in str(info.value)           # one line, always
    return info.value


def test_site_with_angles(tmp_path):
    site = read_site_file(_site(tmp_path, "heading_deg = 12.5\npitch_deg = -1.0\nroll_deg = 0.5\n"
                                          "heading_std_deg = 0.3\nroll_std_deg = 0.05"))
    assert (site.name, site.iaga_code, site.institute) == ("Hill pier", "HPR", "Example Field School")
    assert (site.latitude_deg, site.longitude_deg, site.elevation_m) == (47.25, 350.5, 812.0)
    assert site.attitude.kind == "angles" and site.attitude.sigma_deg == (0.3, 0.0, 0.05)
    mats = site.attitude.at(np.array([0.0, 5.0]))
    np.testing.assert_allclose(mats, np.broadcast_to(attitude_matrix(12.5, -1.0, 0.5), (2, 3, 3)))


def test_site_with_matrix(tmp_path):
    site = read_site_file(_site(tmp_path, "matrix = [[0, -1, 0], [1, 0, 0], [0, 0, 1]]\npitch_std_deg = 0.1"))
    assert site.attitude.kind == "matrix"
    np.testing.assert_allclose(site.attitude.matrix, attitude_matrix(90, 0, 0), atol=1e-15)


def test_site_with_attitude_file(tmp_path):
    (tmp_path / "att").mkdir()
    (tmp_path / "att" / "ATT.csv").write_text(
        "# from the platform's attitude unit\nt, heading_deg, pitch_deg, roll_deg\n0, 10, 0, 0\n10, 30, 0, 0\n",
        encoding="utf-8")
    site = read_site_file(_site(tmp_path, 'file = "att/ATT.csv"'))
    assert site.attitude.kind == "file" and site.attitude.clock == "recording"
    mats = site.attitude.at([5.0, 11.0])
    np.testing.assert_allclose(mats[0], attitude_matrix(20, 0, 0), atol=1e-12)
    assert np.all(np.isnan(mats[1]))
    site = read_site_file(_site(tmp_path, 'file = "att/ATT.csv"\nfile_clock = "utc"', name="utc.toml"))
    with pytest.raises(ValueError, match="UTC"):
        site.attitude.at([5.0])
    np.testing.assert_allclose(site.attitude.at([99.0], utc=[5.0])[0], attitude_matrix(20, 0, 0), atol=1e-12)


@pytest.mark.parametrize("edit, line, key, words", [
    (("version = 1", "version = 1.0"), 1, "version", "integer 1"),
    (("version = 1", 'version = "1"'), 1, "version", "integer 1"),
    (("version = 1", "version = 2"), 1, "version", "integer 1"),
    (("[attitude]", "[place]\nx = 1\n[attitude]"), 11, "place", "unknown section"),
    (('name = "Hill pier"', 'name = "Hill pier"\ncolour = "red"'), 5, "site.colour", "unknown key"),
    (("latitude_deg = 47.25", "latitude_deg = 97.25"), 6, "site.latitude_deg", "between -90 and 90"),
    (("latitude_deg = 47.25", 'latitude_deg = "47"'), 6, "site.latitude_deg", "expected a number"),
    (("elevation_m = 812.0", "elevation_m = nan"), 8, "site.elevation_m", "between"),
    (('iaga_code = "hpr"', 'iaga_code = "HP1"'), 5, "site.iaga_code", "3 letters"),
    (('name = "Hill pier"\n', ""), 3, "site.name", "required key missing"),
    (('name = "Hill pier"', 'name = "' + "x" * 46 + '"'), 4, "site.name", "at most 45"),
    (("heading_deg = 12.5", "heading_deg = 12.5\nspeed = 3"), 13, "attitude.speed", "unknown key"),
    (("roll_deg = 0.5", "roll_deg = 0.5\nmatrix = [[1,0,0],[0,1,0],[0,0,1]]"), 15, "attitude.matrix", "only one of"),
    (("roll_deg = 0.5", ""), 11, "attitude.roll_deg", "go together"),
    (("pitch_deg = -1.0", "pitch_deg = -91.0"), 13, "attitude.pitch_deg", "between -90 and 90"),
    (("roll_deg = 0.5", "roll_deg = 0.5\nheading_std_deg = -1"), 15, "attitude.heading_std_deg", "between 0"),
])
def test_site_errors_name_file_line_and_key(tmp_path, edit, line, key, words):
    text = SITE.format(attitude="heading_deg = 12.5\npitch_deg = -1.0\nroll_deg = 0.5").replace(*edit, 1)
    err = _error(read_site_file, _site(tmp_path, body=text))
    assert err.path.endswith("site.toml") and err.line == line and err.column == key
    assert f":{line}: key '{key}': " in str(err) and words in str(err)


def test_site_attitude_matrix_errors(tmp_path):
    err = _error(read_site_file, _site(tmp_path, "matrix = [[1, 0, 0], [0, 1, 0], [0, 0, -1]]"))
    assert err.column == "attitude.matrix" and err.line == 12 and "reflection" in str(err)
    err = _error(read_site_file, _site(tmp_path, "matrix = [[1, 0.01, 0], [0, 1, 0], [0, 0, 1]]"))
    assert "not orthonormal" in str(err)
    err = _error(read_site_file, _site(tmp_path, "matrix = [[1, 0, 0], [0, 1, 0]]"))
    assert "3 rows of 3 numbers" in str(err)
    err = _error(read_site_file, _site(tmp_path, 'file = "missing.csv"'))
    assert err.column == "attitude.file" and "not found" in str(err)
    err = _error(read_site_file, _site(tmp_path, body=SITE.format(attitude="").replace("[attitude]\n", "")))
    assert err.column == "attitude"


def test_site_not_utf8_and_not_toml(tmp_path):
    path = tmp_path / "latin.toml"
    path.write_bytes(SITE.format(attitude="heading_deg = 0\npitch_deg = 0\nroll_deg = 0")
                     .replace("Hill pier", "Hill pi\u00e9r").encode("latin-1"))
    err = _error(read_site_file, path)
    assert err.line == 4 and "not UTF-8" in str(err)
    path.write_text("version = 1\n[site\n", encoding="utf-8")
    err = _error(read_site_file, path)
    assert err.line == 2 and "not valid TOML" in str(err)


@pytest.mark.parametrize("body, line, column, words", [
    ("t,heading_deg,pitch_deg\n0,1,2\n", 1, "roll_deg", "required column missing"),
    ("t,heading_deg,pitch_deg,roll_deg,yaw\n", 1, "yaw", "unknown column"),
    ("t,heading_deg,pitch_deg,roll_deg\n0,1,2,3\n1,1,x,3\n", 3, "pitch_deg", "not a number"),
    ("t,heading_deg,pitch_deg,roll_deg\n0,1,2,3\n0,1,2,3\n", 3, "t", "time must increase"),
    ("t,heading_deg,pitch_deg,roll_deg\n0,1,2,3\n1,1,95,3\n", 3, "pitch_deg", "between -90 and 90"),
    ("t,heading_deg,pitch_deg,roll_deg\n0,1,2,3\n1,1,2\n", 3, None, "expected 4 values"),
    ("t,heading_deg,pitch_deg,roll_deg\n0,1,2,3\n", 1, None, "at least two"),
    ("# nothing\n", None, None, "empty"),
])
def test_attitude_csv_errors(tmp_path, body, line, column, words):
    path = tmp_path / "ATT.csv"
    path.write_text(body, encoding="utf-8")
    err = _error(read_attitude_csv, path)
    assert err.line == line and err.column == column and words in str(err)


def test_attitude_csv_reads_in_any_column_order(tmp_path):
    path = tmp_path / "ATT.csv"
    path.write_text("roll_deg,t,pitch_deg,heading_deg\n1,0,2,3\n4,1,5,6\n", encoding="utf-8")
    t, mats = read_attitude_csv(path)
    np.testing.assert_array_equal(t, [0.0, 1.0])
    np.testing.assert_allclose(mats[1], attitude_matrix(6, 5, 4))


SENSOR = MINIMAL_SENSOR + """\
[mounting]
{mounting}
"""


def test_mounting_rotation_deg_agrees_with_the_sensor_file_reader(tmp_path):
    path = tmp_path / "sensor.toml"
    path.write_text(SENSOR.format(mounting="rotation_deg = [10, -20, 35]"), encoding="utf-8")
    np.testing.assert_allclose(read_mounting(path), read_sensor_file(path)["mounting_rotation"], atol=1e-12)
    np.testing.assert_allclose(read_mounting(path), mounting_from_rotation_deg([10, -20, 35]), atol=1e-12)


def test_mounting_matrix_and_errors(tmp_path):
    path = tmp_path / "sensor.toml"
    path.write_text(SENSOR.format(mounting="matrix = [[0, 0, 1], [0, 1, 0], [-1, 0, 0]]"), encoding="utf-8")
    np.testing.assert_allclose(read_mounting(path), mounting_from_rotation_deg([0, 90, 0]), atol=1e-15)
    np.testing.assert_allclose(mounting_from_table(None, "x.toml"), np.eye(3))
    np.testing.assert_allclose(mounting_from_table({}, "x.toml"), np.eye(3))
    path.write_text(SENSOR.format(mounting="matrix = [[0, 0, 1], [0, 1, 0], [1, 0, 0]]"), encoding="utf-8")
    err = _error(read_mounting, path)
    assert (err.line, err.column) == (9, "mounting.matrix") and "reflection" in str(err)
    path.write_text(SENSOR.format(mounting="rotation_deg = [0, 0, 9]\nmatrix = [[1,0,0],[0,1,0],[0,0,1]]"),
                    encoding="utf-8")
    assert "not both" in str(_error(read_mounting, path))
    path.write_text(SENSOR.format(mounting="rotation = [0, 0, 9]"), encoding="utf-8")
    err = _error(read_mounting, path)
    assert err.column == "mounting.rotation" and "unknown key" in str(err)
    path.write_text(SENSOR.format(mounting="rotation_deg = [0, 0]"), encoding="utf-8")
    assert "three angles" in str(_error(read_mounting, path))


def test_parse_utc_against_the_standard_library():
    # Reference: calendar.timegm (POSIX seconds of a UTC calendar time, Python standard library).
    want = calendar.timegm((2026, 12, 2, 0, 0, 0))
    assert parse_utc("2026-12-02T00:00:00Z") == want
    assert parse_utc("2026-12-02T00:00:00+00:00") == want
    assert parse_utc("2026-12-02T13:20:05.250Z") == pytest.approx(calendar.timegm((2026, 12, 2, 13, 20, 5)) + 0.25)
    assert parse_utc("1999-12-31T23:59:59Z") == calendar.timegm((1999, 12, 31, 23, 59, 59))
    for bad, words in (("2026-12-02T00:00:00", "add Z"), ("2026-12-02T01:00:00+01:00", "not UTC"),
                       ("2026-12-02", "date and a time"), ("yesterday", "not an ISO 8601")):
        err = _error(parse_utc, bad)
        assert words in str(err)


def test_format_utc_round_trip():
    rng = np.random.default_rng(2)
    for s in rng.uniform(0, 4e9, 20):
        s = round(s, 3)
        text = format_utc(s)
        assert text.endswith("Z") and parse_utc(text) == pytest.approx(s, abs=1e-6)
        ref = datetime.fromtimestamp(math.floor(s), timezone.utc).strftime("%Y-%m-%dT%H:%M:%S")
        assert text.startswith(ref)
    assert format_utc(1796169600.9996) == "2026-12-02T00:00:01.000Z"
    assert format_utc(1796169600.0, decimals=0) == "2026-12-02T00:00:00Z"
