"""Absolute time and the geographic options through the commands: the utc column as text, a capture's host
clock, the live loop's receive times, `export --raw`, the simulator's [site] table, and bad site, attitude and
time inputs (one line naming file, line and key; exit 2)."""

from __future__ import annotations

import math
import re
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from cli_helpers import make_small_bench, run_cli, write_still_estimates
from fieldvane.firmware_sim.scenario import ScenarioError, loads_scenario, simulate
from fieldvane.io.capture import Chunk, CaptureWriter
from fieldvane.io.cli import main
from fieldvane.io.estimates_csv import EstimatesWriter, estimate_columns, read_estimates
from fieldvane.io.geo_output import HostClock, read_metadata
from fieldvane.io.recording import read_recording
from fieldvane.io.sinks import make_formatter
from fieldvane.io.sitefile import parse_utc
from fieldvane.io.row_block import RowBlock
from fieldvane.io.utc_text import iso_texts, posix_from_texts
from fieldvane.io.wire import Frame, encode_frame

ROOT = Path(__file__).resolve().parents[1]
EX = ROOT / "examples"
PIER = EX / "pier"
EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


# ----------------------------------------------------------------------------------- utc as text

def test_iso_texts_match_the_standard_library():
    # Reference: Python's datetime arithmetic (standard library), microseconds rounded half to even.
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.uniform(-2e9, 4e9, 2000), [0.0, 1796207370.0000005, 1796207370.0000015, np.nan,
                                                       np.inf, 1e13]])
    got = iso_texts(x)
    for value, text in zip(x.tolist(), got):
        if not math.isfinite(value) or value > 2.5e11:
            assert text == ""
            continue
        want = (EPOCH + timedelta(microseconds=round(value * 1e6))).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
        assert text == want
    back = posix_from_texts(got[:2000])
    np.testing.assert_allclose(back, x[:2000], rtol=0, atol=1.01e-6)   # 0.5 us rounding + float spacing


def test_block_writer_writes_utc_as_the_csv_sink_does(tmp_path):
    rng = np.random.default_rng(5)
    n = 300
    utc = 1796207370.0 + np.arange(n) * 0.005 + rng.normal(0, 1e-7, n)
    utc[7] = np.nan
    cols = estimate_columns(np.arange(n) * 0.005, rng.normal(size=(n, 3)), 48000 + rng.normal(size=n),
                            rng.random(n), rng.integers(0, 9, n), {"utc": utc, "D_deg": rng.normal(size=n),
                                                                   "zeta": rng.normal(size=n)})
    with EstimatesWriter(tmp_path / "a.csv", metadata={"start_utc": "2026-12-02T10:29:30.000000Z"}) as w:
        w.write_columns(cols)
    fmt = make_formatter("csv")
    records = [{k: v[i].item() for k, v in cols.items()} for i in range(n)]
    fmt.bind(records[0])
    text = (tmp_path / "a.csv").read_text(encoding="utf-8")
    assert text == "# start_utc: 2026-12-02T10:29:30.000000Z\n" + fmt.header() + "".join(map(fmt.format, records))
    est = read_estimates(tmp_path / "a.csv")
    np.testing.assert_allclose(est["utc"], utc, rtol=0, atol=6e-7)
    assert np.isnan(est["utc"][7])


def test_reader_names_the_line_of_a_bad_utc(tmp_path):
    from fieldvane.io.errors import InputError

    path = tmp_path / "e.csv"
    path.write_text("t,ux,uy,uz,b_nT,bx_nT,by_nT,bz_nT,sigma_deg,flags,utc\n"
                    "0,0,0,1,1,0,0,1,0.1,1,2026-12-02T00:00:00Z\n"
                    "1,0,0,1,1,0,0,1,0.1,1,yesterday\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"e.csv:3: column 'utc': not a UTC time"):
        read_estimates(path)


# ----------------------------------------------------------------------------------- captures

@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    """A small calibration, a short still recording, and a capture of it whose chunks carry known host times."""
    d = tmp_path_factory.mktemp("geo_commands")
    make_small_bench(d, still_s=2)
    block, _ = read_recording(d / "rec.csv")
    host0 = 1796207370_000_000_000
    chunk_times = []
    for run in range(2):                         # two runs: the sensor restarts (its clock starts again)
        w = CaptureWriter(d / "cap", {"input_format": "binary", "source": "socket://127.0.0.1:7000"})
        for i in range(0, len(block), 7):
            data = b""
            for j in range(i, min(i + 7, len(block))):
                values = tuple(float(np.float32(v)) for c in block.z[j] for v in (c.real, c.imag))
                data += encode_frame(Frame(j + 1, int(round(block.t[j] * 1e9)), 0, float(block.f[j, 0]),
                                           float(block.f[j, 1]), values))
            host = host0 + run * 60_000_000_000 + int(block.t[min(i + 6, len(block) - 1)] * 1e9) + 4_000_000
            w.write(host, data)
            chunk_times += [host] * (min(i + 7, len(block)) - i)
        w.close()
    return d, block, np.array(chunk_times) * 1e-9


def test_capture_replay_takes_utc_from_the_host_clock(bench):
    d, block, host = bench
    assert main(["replay", str(d / "cap"), "-c", str(d / "cal.json"), "-o", str(d / "cap_est.csv")]) == 0
    est = read_estimates(d / "cap_est.csv")
    assert est["t"].size == 2 * len(block)
    # Each estimate's utc is the receive time of the chunk that completed its frame (to the microsecond).
    np.testing.assert_allclose(est["utc"], host, rtol=0, atol=1e-6)
    assert "start_utc" not in read_metadata(d / "cap_est.csv")
    # --start-utc wins over the host clock: utc = start + t.
    assert main(["replay", str(d / "cap"), "-c", str(d / "cal.json"), "-o", str(d / "cap_est2.csv"),
                 "--start-utc", "2026-12-02T00:00:00Z"]) == 0
    est2 = read_estimates(d / "cap_est2.csv")
    np.testing.assert_allclose(est2["utc"], parse_utc("2026-12-02T00:00:00Z") + est2["t"], rtol=0, atol=1e-6)
    assert read_metadata(d / "cap_est2.csv")["start_utc"] == "2026-12-02T00:00:00.000000Z"


def test_export_raw_writes_the_captured_samples_as_a_recording(bench, capsys):
    d, block, host = bench
    out = d / "raw.csv"
    assert main(["export", "--raw", str(d / "cap"), "-o", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    meta = read_metadata(out)
    assert meta["source"] == "socket://127.0.0.1:7000" and meta["input_format"] == "binary"
    # start_utc: the first sample's receive time minus its t, so that utc = start_utc + t.
    assert abs(parse_utc(meta["start_utc"]) - (host[0] - block.t[0])) < 1e-6
    # The second run's clock starts again: its rows are moved on by the host clock's 60 s, so t increases.
    assert len(re.findall(r"^# restart: capture run \S+ begins here; its t is moved by \+60.000000 s", text,
                          re.M)) == 1
    raw, _ = read_recording(out)
    assert len(raw) == 2 * len(block)
    np.testing.assert_array_equal(raw.t[:len(block)], block.t)
    np.testing.assert_allclose(raw.t[len(block):], block.t + 60.0, rtol=0, atol=1e-6)
    np.testing.assert_array_equal(raw.f[len(block):], block.f)
    # The wire carries float32 lock-in values: the text keeps them exactly.
    np.testing.assert_array_equal(raw.z, np.concatenate([block.z, block.z]).astype(np.complex64))
    # Replaying the exported recording gives the capture replay's first run exactly, and utc = start_utc + t
    # within a chunk's span (7 frames share one receive time) of the host times, through both runs.
    assert main(["replay", str(out), "-c", str(d / "cal.json"), "-o", str(d / "raw_est.csv")]) == 0
    assert main(["replay", str(d / "cap"), "-c", str(d / "cal.json"), "-o", str(d / "cap_est3.csv")]) == 0
    a, b = read_estimates(d / "raw_est.csv"), read_estimates(d / "cap_est3.csv")
    first = slice(0, len(block))
    for key in ("ux", "uy", "uz", "b_nT", "sigma_deg"):
        np.testing.assert_allclose(a[key][first], b[key][first], rtol=0, atol=1e-9)
    lag = b["utc"] - a["utc"]
    assert np.max(np.abs(lag)) <= 0.035
    # One run only, and the overwrite rule.
    runs = re.findall(r"capture_run: (\S+)", text)
    assert main(["export", "--raw", str(d / "cap"), "-o", str(d / "one.csv"), "--run", runs[0]]) == 0
    assert len(read_recording(d / "one.csv")[0]) == len(block)
    capsys.readouterr()
    assert main(["export", "--raw", str(d / "cap"), "-o", str(out)]) == 2
    assert "output file exists" in capsys.readouterr().err


def test_live_loop_hands_each_sample_its_chunks_receive_time(bench):
    from fieldvane.io.live import LiveLoop, make_decoder
    from fieldvane.io.serial_link import SerialLink

    d, block, _ = bench
    frames = [encode_frame(Frame(j + 1, int(round(block.t[j] * 1e9)), 0, float(block.f[j, 0]), float(block.f[j, 1]),
                                 tuple(float(np.float32(v)) for c in block.z[j] for v in (c.real, c.imag))))
              for j in range(10)]
    seen = []
    clock = HostClock()

    def batch(samples):
        seen.append((len(samples), clock.utc(len(samples))))
        return [None] * len(samples)

    loop = LiveLoop(SerialLink("loop://"), make_decoder("binary"), lambda s: None, [], None, log=None,
                    estimate_batch=batch)
    clock.attach(loop)
    # The second frame is split across two chunks: it belongs to the chunk that completes it.
    loop._process_many([Chunk(1_000_000_000, frames[0] + frames[1][:9]), Chunk(2_000_000_000, frames[1][9:]),
                        Chunk(3_000_000_000, b"".join(frames[2:5]))])
    assert seen[0][0] == 5
    np.testing.assert_array_equal(seen[0][1], [1.0, 2.0, 3.0, 3.0, 3.0])


# ----------------------------------------------------------------------------------- the simulator's [site]

SITE_SCENARIO = """version = 1
[run]
duration_s = 2
[site]
start_utc = "2026-12-02T10:29:30Z"
field_ned_nT = [21905.0, 1330.0, 42870.0]
mounting_rotation_deg = [10, -15, -75]
[site.attitude]
heading_deg = 131.5
pitch_deg = 0.35
roll_deg = -0.6
[[site.attitude.motion]]
angle = "roll"
amplitude_deg = 0.5
period_s = 30
[[site.attitude.motion]]
angle = "heading"
rate_deg_per_s = 0.01
"""


def test_site_scenario_turns_the_ned_field_into_the_sensor_frame():
    s = loads_scenario(SITE_SCENARIO)
    run = simulate(s)
    t = run.t
    # Reference: scipy's rotations. Attitude: intrinsic z-y'-x'' (heading, pitch, roll); mounting: rotate about
    # the fixed x, then y, then z (extrinsic 'xyz').
    roll = -0.6 + 0.5 * np.sin(2 * np.pi * t / 30.0)
    heading = 131.5 + 0.01 * t
    att = Rotation.from_euler("ZYX", np.column_stack([heading, np.full(t.size, 0.35), roll]), degrees=True)
    mount = Rotation.from_euler("xyz", [10, -15, -75], degrees=True)
    b_sensor = (att * mount).inv().apply(np.array([21905.0, 1330.0, 42870.0]))
    np.testing.assert_allclose(run.u * run.b_nT[:, None], b_sensor, rtol=0, atol=1e-7)
    assert run.metadata()["start_utc"] == "2026-12-02T10:29:30Z"
    # Elements instead of the vector: D, I, F give X = F cos I cos D, Y = F cos I sin D, Z = F sin I.
    el = loads_scenario(SITE_SCENARIO.replace("field_ned_nT = [21905.0, 1330.0, 42870.0]",
                                              "declination_deg = 3.0\ninclination_deg = 60.0\ntotal_nT = 50000"))
    np.testing.assert_allclose(el.site.field_ned_nT, [25000 * math.cos(math.radians(3)),
                                                      25000 * math.sin(math.radians(3)), 25000 * math.sqrt(3)])


@pytest.mark.parametrize("edit, key, words", [
    (("[site]", "[direction]\nstart = [0, 0, 1]\n[site]"), "direction", "with [site]"),
    (('start_utc = "2026-12-02T10:29:30Z"', 'start_utc = "2026-12-02T10:29:30"'), "site.start_utc", "no time zone"),
    (("field_ned_nT = [21905.0, 1330.0, 42870.0]", "field_ned_nT = [1, 2]"), "site.field_ned_nT", "three numbers"),
    (("field_ned_nT = [21905.0, 1330.0, 42870.0]", "declination_deg = 3.0"), "site.inclination_deg", "go together"),
    (("heading_deg = 131.5\n", ""), "site.attitude.heading_deg", "missing"),
    (('angle = "roll"', 'angle = "yaw"'), "site.attitude.motion[0].angle", "must be one of"),
    (("period_s = 30\n", ""), "site.attitude.motion[0].period_s", "needs period_s"),
    (("[run]\nduration_s = 2\n", ""), "run.duration_s", "required with [site]"),
])
def test_site_scenario_errors_name_the_key(edit, key, words):
    with pytest.raises(ScenarioError) as info:
        loads_scenario(SITE_SCENARIO.replace(*edit), "pier.toml")
    assert info.value.key == key and words in info.value.reason, str(info.value)
    assert info.value.line is not None or key == "run.duration_s"


# ----------------------------------------------------------------------------------- bad inputs

BAD_SITES = {
    "site_unknown_key.toml": ("latitude_deg = 46.8", "latitude_deg = 46.8\nlatitude = 46.8"),
    "site_lat.toml": ("latitude_deg = 46.8", "latitude_deg = 146.8"),
    "site_no_attitude_file.toml": ('heading_deg = 131.5\npitch_deg = 0.35\nroll_deg = -0.6',
                                   'file = "nowhere.csv"'),
    "site_bad_att.toml": ('heading_deg = 131.5\npitch_deg = 0.35\nroll_deg = -0.6', 'file = "bad_att.csv"'),
    "site_utc_clock.toml": ('heading_deg = 131.5\npitch_deg = 0.35\nroll_deg = -0.6',
                            'file = "good_att.csv"\nfile_clock = "utc"'),
}


@pytest.fixture(scope="module")
def bad_files(bench):
    d = bench[0]
    base = (PIER / "pier_site_angles.toml").read_text(encoding="utf-8")
    base = re.sub(r"\n(heading|pitch|roll)_std_deg = .*", "", base)
    base = re.sub(r" *#.*", "", base)               # no comments: the edits below match whole lines
    for name, (old, new) in BAD_SITES.items():
        assert old in base, name
        (d / name).write_text(base.replace(old, new), encoding="utf-8")
    (d / "bad_att.csv").write_text("t,heading_deg,pitch_deg,roll_deg\n0,10,0,0\n1,11,95,0\n", encoding="utf-8")
    (d / "good_att.csv").write_text("t,heading_deg,pitch_deg,roll_deg\n0,10,0,0\n1e10,11,0,0\n", encoding="utf-8")
    (d / "bad_start.csv").write_text("# start_utc: 2026-13-02T00:00:00Z\n" + (d / "rec.csv").read_text(), "utf-8")
    write_still_estimates(d / "est_plain.csv", b_nT=48000)
    return d


ROWS = [
    ("site-unknown-key", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv", "--site",
                          "{d}/site_unknown_key.toml"], r"site_unknown_key.toml:\d+: key 'site.latitude': unknown key"),
    ("site-latitude", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv", "--site", "{d}/site_lat.toml"],
     r"site_lat.toml:\d+: key 'site.latitude_deg': must be between -90 and 90"),
    ("site-missing", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv", "--site", "{d}/nope.toml"],
     r"nope.toml: cannot read"),
    ("attitude-file-missing", ["export", "{d}/est_plain.csv", "--site", "{d}/site_no_attitude_file.toml", "-o",
                               "{d}/iaga"], r"site_no_attitude_file.toml:\d+: key 'attitude.file': attitude file not found"),
    ("attitude-row-out-of-range", ["report", "{d}/est_plain.csv", "--site", "{d}/site_bad_att.toml", "-o",
                                   "{d}/rep"], r"bad_att.csv:3: column 'pitch_deg': must be between -90 and 90"),
    ("attitude-utc-clock-without-time", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv", "--site",
                                         "{d}/site_utc_clock.toml"],
     r"site_utc_clock.toml: key 'attitude.file_clock': the site's attitude file is on the UTC clock"),
    ("start-utc-no-zone", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv", "--start-utc",
                           "2026-12-02T00:00:00"], r"option '--start-utc': no time zone"),
    ("start-utc-metadata", ["replay", "{d}/bad_start.csv", "-c", "{d}/cal.json", "-o", "{d}/x.csv"],
     r"bad_start.csv: key 'start_utc': not an ISO 8601 time"),
    ("export-without-site", ["export", "{d}/est_plain.csv", "-o", "{d}/iaga"], r"option '--site': IAGA-2002 files need"),
    ("export-without-time", ["export", "{d}/est_plain.csv", "--site", str(PIER / "pier_site_angles.toml"), "-o",
                             "{d}/iaga"], r"est_plain.csv: option '--start-utc': the estimates have no utc"),
    ("report-without-time", ["report", "{d}/est_plain.csv", "--site", str(PIER / "pier_site_angles.toml"), "-o",
                             "{d}/rep"], r"est_plain.csv: option '--start-utc': the geographic check needs the date"),
    ("export-raw-with-site", ["export", "--raw", "{d}/cap", "-o", "{d}/r.csv", "--site", "{d}/site_lat.toml"],
     r"option '--site': applies to estimates"),
    ("export-raw-unknown-run", ["export", "--raw", "{d}/cap", "-o", "{d}/r.csv", "--run", "yesterday"],
     r"cap: option '--run': no run 'yesterday'"),
    ("export-output-is-input", ["export", "--raw", "{d}/cap", "-o", "{d}/cap", "--force"],
     r"option '--output': the output would overwrite an input"),
    ("run-site-typo", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--site", "{d}/site_lat.toml"],
     r"site_lat.toml:\d+: key 'site.latitude_deg'"),
]


@pytest.mark.parametrize("name, argv, pattern", ROWS, ids=[r[0] for r in ROWS])
def test_bad_geographic_input_gets_one_line_and_exit_2(bad_files, capsys, name, argv, pattern):
    d = bad_files
    before = sorted(p.name for p in d.iterdir())
    code, out, err = run_cli([a.replace("{d}", str(d)) for a in argv], capsys)
    assert "Traceback" not in out + err
    assert code == 2, out + err
    lines = [x for x in err.splitlines() if "error" in x]
    assert len(lines) == 1 and re.search(pattern, lines[0]), err
    after = sorted(p.name for p in d.iterdir())
    assert [n for n in after if n not in before and n != ".fieldvane-tables"] == []


def test_live_rows_get_utc_and_the_sites_columns():
    # What `run --site` adds to each logger record: the same numbers as the block path of replay.
    from fieldvane.estimator.geomagnetic import attitude_matrix, elements, mounting_from_rotation_deg
    from fieldvane.io.geo_output import setup

    geo = setup(str(PIER / "pier_site_angles.toml"), host_clock=True)
    geo.mounting = mounting_from_rotation_deg([0, -15, -75])
    b_ned = np.array([21905.0, 1330.0, 42870.0])
    b_s = (attitude_matrix(131.5, 0.35, -0.6) @ geo.mounting).T @ b_ned
    n = 4
    u = np.tile(b_s / np.linalg.norm(b_s), (n, 1))
    given = RowBlock({"t": np.arange(n) * 0.005, "ux": u[:, 0], "uy": u[:, 1], "uz": u[:, 2],
                      "b_nT": np.full(n, np.linalg.norm(b_s)), "sigma_deg": np.full(n, 0.03),
                      "sigma_b_nT": np.full(n, 0.5)})
    block = geo.add_to_block(given, np.array([1.0, 1.0, 2.0, 2.0]) + 1.8e9)
    rows = list(block)
    want = elements(b_ned[None])
    for row in rows:
        assert row["D_deg"] == pytest.approx(float(want.d_deg[0]), abs=1e-9)
        assert row["X_nT"] == pytest.approx(b_ned[0], abs=1e-6) and row["sigma_F_nT"] == 0.5
        assert isinstance(row["utc"], float)
    assert [r["utc"] for r in rows] == [1.8e9 + 1, 1.8e9 + 1, 1.8e9 + 2, 1.8e9 + 2]
