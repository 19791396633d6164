"""IAGA-2002 writer: layout against the published format, the INTERMAGNET minute filter, round trips."""

import calendar
import re
from datetime import datetime

import numpy as np
import pytest
from scipy.ndimage import correlate1d
from scipy.signal.windows import gaussian

from fieldvane.io import iaga2002 as ia
from fieldvane.io.errors import InputError

# INTERMAGNET Technical Reference Manual, appendix "Filter coefficients to produce one minute values",
# column "One Second Data": t0 (the minute itself) to t45 (45 s either side); symmetric.
INTERMAGNET_ONE_SECOND = [
    0.0251958, 0.02514602, 0.02499727, 0.02475132, 0.02441104, 0.0239804, 0.02346437, 0.02286881,
    0.02220039, 0.02146643, 0.0206748, 0.01983377, 0.01895183, 0.01803763, 0.01709976, 0.01614667,
    0.01518651, 0.01422707, 0.01327563, 0.01233892, 0.01142303, 0.01053338, 0.0096747, 0.0088509,
    0.0080653, 0.0073204, 0.0066181, 0.0059596, 0.0053454, 0.0047755, 0.0042496, 0.0037667, 0.0033254,
    0.0029243, 0.0025614, 0.0022347, 0.0019419, 0.0016809, 0.0014492, 0.0012445, 0.0010645, 0.000907,
    0.00077, 0.000651, 0.000548, 0.000459,
]

HEADER = ia.IagaHeader(source="Example Field School", station="Hill pier", code="HPR", latitude_deg=47.25,
                       longitude_deg=350.5, elevation_m=812.0, digital_sampling_s=0.1,
                       comments=ia.standard_comments(60) + ("A comment that is long enough to need wrapping onto "
                                                            "a second comment record of the file header.",))


def _posix(*args) -> int:
    return calendar.timegm(datetime(*args).timetuple())


def test_gaussian_weights_reproduce_the_intermagnet_table():
    # Source: INTERMAGNET Technical Reference Manual (table above). The table prints 3-7 significant
    # digits; a Gaussian of sigma 15.90 s over 91 one-second values matches every entry to 0.15 %.
    w = ia.gaussian_minute_weights()
    assert w.size == 91 and w.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(w[45:], INTERMAGNET_ONE_SECOND, rtol=1.5e-3)
    np.testing.assert_allclose(w[:46][::-1], INTERMAGNET_ONE_SECOND, rtol=1.5e-3)
    # Reference library: scipy's Gaussian window of the same length and standard deviation.
    ref = gaussian(91, std=15.90)
    np.testing.assert_allclose(w, ref / ref.sum(), rtol=1e-12)


def test_records_match_a_published_iaga2002_file():
    # Source: a published IAGA-2002 file, Eskdalemuir (BGS) definitive one-minute data for 2003-04-11 as
    # distributed by INTERMAGNET (a copy is kept in the public MagneticEarth/IAGA_SummerSchool2019
    # repository, data/external/ESK_2003/esk20030411dmin.min). Byte for byte, these records:
    assert ia.header_record("Format", "IAGA-2002") == \
        " Format                 IAGA-2002                                    |"
    assert ia.header_record("Geodetic Latitude", "55.300") == \
        " Geodetic Latitude      55.300                                       |"
    assert ia.data_header_record("ESK") == \
        "DATE       TIME         DOY     ESKX      ESKY      ESKZ      ESKF   |"
    assert ia.data_record(_posix(2003, 4, 11, 0, 0, 0), [17336.70, -1468.90, 46212.00, 49378.80]) == \
        "2003-04-11 00:00:00.000 101     17336.70  -1468.90  46212.00  49378.80"
    assert ia.data_record(_posix(2003, 4, 11, 0, 1, 0), [17336.70, -1468.60, 46212.00, 49378.80]) == \
        "2003-04-11 00:01:00.000 101     17336.70  -1468.60  46212.00  49378.80"


def test_file_names_follow_the_recommended_pattern():
    # Source: the IAGA-2002 description's file-name examples (naq20020101pmin.min, naq20020211vsec.sec,
    # clf200306121320vmin.min, clf20030612132000vsec.sec).
    assert ia.file_name("NAQ", _posix(2002, 1, 1), 60, "Provisional", False) == "naq20020101pmin.min"
    assert ia.file_name("NAQ", _posix(2002, 2, 11), 1, "Variation", False) == "naq20020211vsec.sec"
    assert ia.file_name("CLF", _posix(2003, 6, 12, 13, 20), 60, "Variation", True) == "clf200306121320vmin.min"
    assert ia.file_name("CLF", _posix(2003, 6, 12, 13, 20), 1, "Variation", True) == "clf20030612132000vsec.sec"


def _samples(start, seconds, rate=10.0, seed=7):
    """Return (utc, XYZF) of a synthetic Earth-field record: slow variations plus seeded noise, nT."""
    rng = np.random.default_rng(seed)
    t = start + np.arange(0.0, seconds, 1.0 / rate)
    xyzf = np.column_stack([
        20900.0 + 12.0 * np.sin(2 * np.pi * t / 900.0),
        -1180.0 + 4.0 * np.cos(2 * np.pi * t / 400.0),
        42950.0 + 0.01 * (t - start),
        47770.0 + 3.0 * np.sin(2 * np.pi * t / 1300.0),
    ]) + rng.normal(0.0, 0.05, (t.size, 4))
    return t, xyzf


def parse_iaga2002(text: str) -> dict:
    """An independent reader written from the format description: fixed columns, nothing shared with the writer."""
    records = text.split("\n")
    assert records[-1] == ""
    records = records[:-1]
    header, comments, i = {}, [], 0
    while records[i].startswith(" "):
        rec = records[i]
        assert len(rec) == 70 and rec[69] == "|"
        if rec[1] == "#":
            comments.append(rec[2:69].rstrip())
        else:
            assert rec[1] != " " and rec[23] == " "          # label from column 2, description from column 25
            header[rec[1:24].strip()] = rec[24:69].strip()
        i += 1
    names = records[i]
    assert len(names) == 70 and names[69] == "|"
    assert (names[0:4], names[11:15], names[24:27]) == ("DATE", "TIME", "DOY")
    columns = [names[32 + 10 * k:36 + 10 * k] for k in range(4)]
    rows = []
    for rec in records[i + 1:]:
        assert len(rec) == 70
        assert re.fullmatch(r"\d{4}-\d\d-\d\d", rec[0:10]) and rec[10] == " "
        assert re.fullmatch(r"\d\d:\d\d:\d\d\.\d{3}", rec[11:23]) and rec[23] == " "
        assert re.fullmatch(r"\d{3}", rec[24:27]) and rec[27:30] == "   "
        when = datetime.strptime(rec[0:23], "%Y-%m-%d %H:%M:%S.%f")
        assert int(rec[24:27]) == when.timetuple().tm_yday
        values = []
        for k in range(4):
            field = rec[30 + 10 * k:40 + 10 * k]
            assert field[0] == " " and re.fullmatch(r" *-?\d+\.\d\d", field[1:])   # 1X, F9.2
            v = float(field)
            values.append(np.nan if v == 99999.0 else (None if v == 88888.0 else v))
        rows.append((calendar.timegm(when.timetuple()), values))
    return {"header": header, "comments": comments, "columns": columns, "rows": rows}


def test_layout_field_by_field_and_round_trip_of_second_and_minute_files():
    # Layout from the IAGA-2002 description (INTERMAGNET Technical Reference Manual appendix): 12 header
    # records in a fixed order, comments, the data header, 70-character data records.
    start = _posix(2026, 12, 2, 23, 40, 0) + 0.03
    t, xyzf = _samples(start, 40 * 60)                       # crosses UTC midnight
    gap = (t > start + 1200.2) & (t < start + 1230.6)        # 30 s without data
    t, xyzf = t[~gap], xyzf[~gap]
    for interval in (1, 60):
        times, values = ia.xyzf_series(t, xyzf, interval)
        files = ia.day_files(HEADER, interval, times, values)
        assert len(files) == 2 and files[1][0].startswith("hpr20261203")
        got_t, got_v = [], []
        for name, text in files:
            parsed = parse_iaga2002(text)
            h = parsed["header"]
            assert list(h) == ["Format", "Source of Data", "Station Name", "IAGA Code", "Geodetic Latitude",
                               "Geodetic Longitude", "Elevation", "Reported", "Sensor Orientation",
                               "Digital Sampling", "Data Interval Type", "Data Type"]
            assert (h["Format"], h["IAGA Code"], h["Reported"], h["Data Type"]) == \
                ("IAGA-2002", "HPR", "XYZF", "Provisional")
            assert (h["Geodetic Latitude"], h["Geodetic Longitude"], h["Elevation"]) == ("47.250", "350.500", "812")
            assert parsed["columns"] == ["HPRX", "HPRY", "HPRZ", "HPRF"]
            assert any(c.startswith("Start Time ") for c in parsed["comments"])      # part days
            assert "onto a second comment record of the file header." in " ".join(c.strip() for c in parsed["comments"])
            steps = np.diff([r[0] for r in parsed["rows"]])
            assert np.all(steps == interval)
            got_t += [r[0] for r in parsed["rows"]]
            got_v += [r[1] for r in parsed["rows"]]
        np.testing.assert_array_equal(got_t, times)
        got = np.array(got_v, float)
        assert np.array_equal(np.isnan(got), np.isnan(values))
        np.testing.assert_allclose(got[~np.isnan(got)], values[~np.isnan(values)], atol=0.005 + 1e-9)
        assert np.isnan(values).any()                          # the gap is written as missing


def test_second_means_are_centred_on_the_second():
    s0 = _posix(2026, 1, 1, 12, 0, 0)
    t = np.array([s0 - 0.5, s0 + 0.49, s0 + 0.5, s0 + 3.2, s0 + 3.4])
    v = np.array([[1.0], [3.0], [10.0], [4.0], [np.nan]])
    seconds, means = ia.second_means(t, v)
    np.testing.assert_array_equal(seconds, s0 + np.arange(4))
    np.testing.assert_allclose(means[:, 0], [2.0, 10.0, np.nan, 4.0])     # a NaN sample is ignored
    # Independent reference: a plain loop over the seconds of a random record.
    rng = np.random.default_rng(1)
    t = np.sort(s0 + rng.uniform(0, 30, 500))
    v = rng.normal(size=(500, 2))
    seconds, means = ia.second_means(t, v)
    for s, m in zip(seconds, means):
        sel = (t >= s - 0.5) & (t < s + 0.5)
        np.testing.assert_allclose(m, v[sel].mean(axis=0) if sel.any() else [np.nan, np.nan])


def test_minute_filter_matches_scipy_and_follows_the_missing_data_rule():
    rng = np.random.default_rng(9)
    s0 = _posix(2026, 3, 1, 6, 0, 0) - 100
    seconds = s0 + np.arange(600)
    v = rng.normal(size=(600, 1)).cumsum(axis=0)
    minutes, out = ia.minute_values(seconds, v)
    w = ia.gaussian_minute_weights()
    # Reference library: scipy.ndimage.correlate1d with the same weights, read at the minutes.
    ref = correlate1d(v[:, 0], w, mode="constant", cval=np.nan)
    inside = (minutes - s0 >= 45) & (minutes - s0 + 45 < 600)
    np.testing.assert_allclose(out[inside, 0], ref[minutes[inside] - s0], rtol=1e-12)
    assert np.all(minutes % 60 == 0)
    # Constant and linear series pass unchanged (normalized, symmetric filter).
    _, flat = ia.minute_values(seconds, np.full((600, 1), 48000.0))
    np.testing.assert_allclose(flat[inside, 0], 48000.0)
    _, ramp = ia.minute_values(seconds, (seconds - s0)[:, None] * 0.25)
    np.testing.assert_allclose(ramp[inside, 0], (minutes[inside] - s0) * 0.25)
    # INTERMAGNET rule: at least 90 % of the filter's weight. Ten seconds missing at the window's centre
    # (about 25 % of the weight) lose the minute; ten at its edge (about 2 %) do not.
    m = int(minutes[inside][1])
    centre = v.copy()
    centre[(seconds >= m - 4) & (seconds <= m + 5)] = np.nan
    edge = v.copy()
    edge[(seconds >= m + 36) & (seconds <= m + 45)] = np.nan
    _, a = ia.minute_values(seconds, centre)
    _, b = ia.minute_values(seconds, edge)
    k = list(minutes).index(m)
    assert np.isnan(a[k, 0]) and np.isfinite(b[k, 0])
    keep = ~np.isnan(edge[:, 0])
    assert b[k, 0] == pytest.approx(np.nansum(edge[m - 45 - s0:m + 46 - s0, 0] * w)
                                    / np.sum(w[keep[m - 45 - s0:m + 46 - s0]]))


def test_full_day_has_no_part_day_comments_and_not_recorded_f():
    day = _posix(2026, 12, 2)
    times = day + 60 * np.arange(1440)
    values = np.tile([20000.0, 100.0, 43000.0, 47500.0], (1440, 1))
    (name, text), = ia.day_files(HEADER, 60, times, values, f_recorded=False)
    assert name == "hpr20261202pmin.min"
    assert "#Start Time" not in text and "#Duration" not in text
    parsed = parse_iaga2002(text)
    assert len(parsed["rows"]) == 1440 and parsed["rows"][0][1][3] is None     # 88888.00: not recorded


def test_values_the_format_cannot_hold_are_refused():
    with pytest.raises(ValueError, match="reserved"):
        ia.data_record(_posix(2026, 1, 1), [90000.0, 0.0, 0.0, 90000.0])
    with pytest.raises(ValueError, match="45"):
        ia.header_record("Station Name", "x" * 46)
    with pytest.raises(ValueError, match="ASCII"):
        ia.header_record("Station Name", "Hill pi\u00e9r")


def test_write_files_follows_the_overwrite_rule(tmp_path):
    files = [("a.min", "one\n"), ("b.min", "two\n")]
    paths = ia.write_files(tmp_path, files)
    assert [p.read_text() for p in paths] == ["one\n", "two\n"]
    with pytest.raises(InputError, match="exists"):
        ia.write_files(tmp_path, [("c.min", "x\n"), ("a.min", "x\n")])
    assert not (tmp_path / "c.min").exists()                   # all or nothing
    ia.write_files(tmp_path, [("a.min", "three\n")], force=True)
    assert (tmp_path / "a.min").read_text() == "three\n"
    with pytest.raises(InputError, match="overwrite an input"):
        ia.write_files(tmp_path, [("a.min", "x\n")], force=True, inputs=[tmp_path / "a.min"])


def test_from_sensor_frame_samples_and_a_site_file_to_an_iaga2002_file(tmp_path):
    # The whole chain the commands will run: sensor-frame estimates + mounting + site attitude ->
    # NED columns -> one-second file; read back with the independent parser.
    from fieldvane.estimator.geomagnetic import geographic_columns, mounting_from_rotation_deg
    from fieldvane.io.sitefile import parse_utc, read_site_file

    site_path = tmp_path / "site.toml"
    site_path.write_text('version = 1\n[site]\nname = "Hill pier"\niaga_code = "hpr"\nlatitude_deg = 47.25\n'
                         'longitude_deg = -9.5\nelevation_m = 812\n[attitude]\nheading_deg = 33\npitch_deg = 2\n'
                         'roll_deg = -1\n', encoding="utf-8")
    site = read_site_file(site_path)
    mount = mounting_from_rotation_deg([0, 0, 90])
    b_ned = np.array([20900.0, -1180.0, 42950.0])
    b_sensor = (site.attitude.matrix @ mount).T @ b_ned
    t = np.arange(0.0, 30.0, 0.01)
    utc = parse_utc("2026-12-02T10:00:00Z") + t
    u = np.broadcast_to(b_sensor / np.linalg.norm(b_sensor), (t.size, 3))
    cols = geographic_columns(u, np.full(t.size, np.linalg.norm(b_sensor)), mount, site.attitude.at(t),
                              sigma_deg=np.full(t.size, 0.05))
    xyzf = np.column_stack([cols["X_nT"], cols["Y_nT"], cols["Z_nT"], cols["F_nT"]])
    header = ia.header_from_site(site, 0.01, 1, source="Example Field School")
    (name, text), = ia.day_files(header, 1, *ia.xyzf_series(utc, xyzf, 1))
    assert name == "hpr20261202100000psec.sec"
    parsed = parse_iaga2002(text)
    assert parsed["header"]["Station Name"] == "Hill pier" and parsed["header"]["Digital Sampling"] == "0.01 seconds"
    values = np.array([r[1] for r in parsed["rows"]], float)
    assert values.shape == (31, 4)
    np.testing.assert_allclose(values, np.tile([*b_ned, np.linalg.norm(b_ned)], (31, 1)), atol=0.005 + 1e-6)
    with pytest.raises(InputError, match="ASCII"):
        ia.header_from_site(site, 0.01, 1, source="Institut f\u00fcr Erdmagnetismus")
