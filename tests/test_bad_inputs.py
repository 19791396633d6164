"""A careful user's worst day: bad files, typos and bad option values through every command.

Each row runs `fieldvane ...` in-process (fieldvane.io.cli.main) and checks the exit code, that
the error is one line naming the file/line/key/option, and that no traceback appears.
"""

from __future__ import annotations

import errno
import json
import os
import re
import struct
from pathlib import Path

import numpy as np
import pytest

from cli_helpers import MINIMAL_SENSOR, make_small_bench, run_cli, write_still_estimates
from fieldvane.io.capture import MAGIC, CaptureWriter
from fieldvane.io.wire import Frame, encode_frame

ROOT = Path(__file__).resolve().parent.parent
EX = ROOT / "examples"

SENSOR = MINIMAL_SENSOR + """[probes.2]
axis = [0.6, 0.3, 0.74]
"""
FILTER = "version = 1\n[filter]\nmax_gap_s = 2\n"


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    """A small bench: calibration, a short recording, an estimates file, a capture, config files."""
    d = tmp_path_factory.mktemp("bad_inputs")
    make_small_bench(d, still_s=1)
    write_still_estimates(d / "est.csv", b_nT=20000)
    # A capture of the recording's samples as wire frames.
    from fieldvane.io.recording import read_recording
    block, _ = read_recording(d / "rec.csv")
    w = CaptureWriter(d / "cap", {"input_format": "binary"})
    for i in range(len(block)):
        z = block.z[i]
        values = tuple(float(np.float32(v)) for c in z for v in (c.real, c.imag))
        w.write(i, encode_frame(Frame(i + 1, int(round(block.t[i] * 1e9)), 0, float(block.f[i, 0]),
                                      float(block.f[i, 1]), values)))
    w.close()
    files = {
        "sensor_ok": SENSOR,
        "sensor_pumps5": "version = 1\npumps = 5\n[probes.1]\naxis = [0, 0, 1]\n",
        "sensor_unknown": SENSOR + "[probes.1.extra]\n",
        "sensor_topkey": "colour = 'red'\n" + SENSOR,
        "sensor_nan": SENSOR + "[mounting]\nrotation_deg = [nan, 0, 90]\n",
        "sensor_true": SENSOR.replace("version = 1", "version = true"),
        "sensor_float": SENSOR.replace("version = 1", "version = 1.0"),
        "filter_filtre": "version = 1\n[filtre]\nmax_gap_s = 2\n",
        "filter_none": "version = 1\n",
        "filter_top": "version = 1\nmax_gap_s = 2\n",
        "filter_huge": "version = 1\n[filter]\nangle_random_walk_deg_rt_s = 1e308\n",
        "filter_true": FILTER.replace("version = 1", "version = true"),
        "filter_float": FILTER.replace("version = 1", "version = 1.0"),
        "filter_unknown": FILTER + "gate_prob = 0.9\n",
        "filter_type": "version = 1\n[filter]\nlost_after_gated = 2.5\n",
    }
    for name, text in files.items():
        (d / f"{name}.toml").write_text(text, encoding="utf-8")
    (d / "sensor_latin1.toml").write_bytes(SENSOR.encode() + b"name = \"caf\xe9\"\n")
    (d / "filter_latin1.toml").write_bytes(b"version = 1\n# r\xe9glage\n[filter]\n")
    # Capture folders with problems.
    import shutil
    shutil.copytree(d / "cap", d / "cap_subfolder")
    (d / "cap_subfolder" / "notes.fvcap").mkdir()
    for name, meta in (("cap_meta_type", {"input_format": 5}), ("cap_meta_key", {"speed": 9})):
        (d / name).mkdir()
        raw = json.dumps(meta).encode()
        (d / name / "x-000000.fvcap").write_bytes(MAGIC + struct.pack("<HHIQI", 2, 0, 0, 0, len(raw)) + raw)
    shutil.copytree(d / "cap", d / "cap_cut")
    cut = next((d / "cap_cut").glob("*.fvcap"))
    cut.write_bytes(cut.read_bytes()[:-7])
    # Other files.
    (d / "cal_bad.json").write_text("{ not json", encoding="utf-8")
    (d / "cal_type.json").write_text(json.dumps({"format": "fieldvane-calibration", "version": "one"}))
    (d / "no_channels.csv").write_text("t,f_a,f_b\n0,1,2\n0.005,1,2\n", encoding="utf-8")
    (d / "exists.csv").write_text("already here\n", encoding="utf-8")
    (d / "afile").write_text("not a folder\n", encoding="utf-8")
    (d / "report_done").mkdir()
    (d / "report_done" / "summary.md").write_text("old report\n", encoding="utf-8")
    return d


# (id, argv with {d} for the bench folder, exit code, regex the error line must match)
ROWS = [
    # simulate and emit: the overwrite rule, inputs never overwritten
    ("simulate-output-exists", ["simulate", EX / "static.toml", "-o", "{d}/exists.csv", "--duration", "1"],
     2, r"exists.csv: option '--output': output file exists \(use --force"),
    ("simulate-output-is-scenario", ["simulate", "{d}/scen.toml", "-o", "{d}/scen.toml", "--force"],
     2, r"scen.toml: option '--output': the output would overwrite an input"),
    ("simulate-parent-is-file", ["simulate", EX / "static.toml", "-o", "{d}/afile/x.csv"],
     2, r"afile/x.csv: option '--output': the output's parent is not a folder"),
    ("emit-file-exists", ["emit", EX / "static.toml", "--to", "file:{d}/exists.csv", "--duration", "1"],
     2, r"exists.csv: option '--to': output file exists"),
    ("emit-file-is-scenario", ["emit", "{d}/scen.toml", "--to", "file:{d}/scen.toml", "--force"],
     2, r"option '--to': the output would overwrite an input"),
    ("emit-bad-destination", ["emit", EX / "static.toml", "--to", "carrier-pigeon"],
     2, r"--to: unknown destination"),
    # calibrate: the sensor file (strict) and the other engineer's options
    ("sensor-not-utf8", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/sensor_latin1.toml"],
     2, r"sensor_latin1.toml:10: not UTF-8 text"),
    ("sensor-pumps-5", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/sensor_pumps5.toml"],
     2, r"sensor_pumps5.toml:2: key 'pumps': must be a table"),
    ("sensor-unknown-section", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor",
                                "{d}/sensor_unknown.toml"],
     2, r"sensor_unknown.toml:10: key 'probes.1.extra': unknown section"),
    ("sensor-unknown-key", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/sensor_topkey.toml"],
     2, r"sensor_topkey.toml:1: key 'colour': unknown key"),
    ("sensor-rotation-nan", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/sensor_nan.toml"],
     2, r"sensor_nan.toml:11: key 'mounting.rotation_deg'"),
    ("sensor-version-true", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/sensor_true.toml"],
     2, r"sensor_true.toml:1: key 'version': must be the whole number 1, got true"),
    ("sensor-version-float", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor",
                              "{d}/sensor_float.toml"],
     2, r"sensor_float.toml:1: key 'version': must be the whole number 1, got 1.0"),
    ("sensor-missing", ["calibrate", "{d}/scan.csv", "-o", "{d}/c1.json", "--sensor", "{d}/nope.toml"],
     2, r"nope.toml: cannot read"),
    ("calibrate-folds-0", ["calibrate", "{d}/scan.csv", "-o", "{d}/c2.json", "--folds", "0"],
     2, r"--folds"),
    # replay: filter files, calibration files, recordings, captures
    ("filter-not-utf8", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                         "--filter", "{d}/filter_latin1.toml"],
     2, r"filter_latin1.toml:2: not UTF-8 text"),
    ("filter-misspelled-table", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                                 "--filter", "{d}/filter_filtre.toml"],
     2, r"filter_filtre.toml:2: key 'filtre': unknown section \(did you mean filter\?\)"),
    ("filter-no-table", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                         "--filter", "{d}/filter_none.toml"],
     2, r"filter_none.toml: key 'filter': missing"),
    ("filter-top-level-key", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                              "--filter", "{d}/filter_top.toml"],
     2, r"filter_top.toml:2: key 'max_gap_s': unknown key"),
    ("filter-1e308", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                      "--filter", "{d}/filter_huge.toml"],
     2, r"filter_huge.toml:3: key 'filter.angle_random_walk_deg_rt_s'"),
    ("filter-version-true", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                             "--filter", "{d}/filter_true.toml"],
     2, r"filter_true.toml:1: key 'version'"),
    ("filter-version-float", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                              "--filter", "{d}/filter_float.toml"],
     2, r"filter_float.toml:1: key 'version'"),
    ("filter-unknown-setting", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                                "--filter", "{d}/filter_unknown.toml"],
     2, r"filter_unknown.toml:4: key 'filter.gate_prob': unknown key \(did you mean gate_probability\?\)"),
    ("filter-wrong-type", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv",
                           "--filter", "{d}/filter_type.toml"],
     2, r"filter_type.toml:3: key 'filter.lost_after_gated': must be a whole number"),
    ("capture-subfolder-named-fvcap", ["replay", "{d}/cap_subfolder", "-c", "{d}/cal.json", "-o", "{d}/r.csv"],
     2, r"notes.fvcap: is a folder, not a capture file"),
    ("capture-metadata-type", ["replay", "{d}/cap_meta_type", "-c", "{d}/cal.json", "-o", "{d}/r.csv"],
     2, r"x-000000.fvcap: key 'input_format': must be text"),
    ("capture-metadata-unknown", ["replay", "{d}/cap_meta_key", "-c", "{d}/cal.json", "-o", "{d}/r.csv"],
     2, r"x-000000.fvcap: key 'speed': unknown capture metadata key"),
    ("calibration-not-json", ["replay", "{d}/rec.csv", "-c", "{d}/cal_bad.json", "-o", "{d}/r.csv"],
     2, r"cal_bad.json"),
    ("calibration-wrong-type", ["replay", "{d}/rec.csv", "-c", "{d}/cal_type.json", "-o", "{d}/r.csv"],
     2, r"cal_type.json"),
    ("calibration-is-the-npz", ["replay", "{d}/rec.csv", "-c", "{d}/cal.npz", "-o", "{d}/r.csv"],
     2, r"cal.npz"),
    ("recording-without-channels", ["replay", "{d}/no_channels.csv", "-c", "{d}/cal.json", "-o", "{d}/r.csv"],
     2, r"no_channels.csv"),
    ("replay-output-is-input", ["replay", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/rec.csv", "--force"],
     2, r"rec.csv"),
    # run: option values, the capture folder, outputs (all refused before the port is opened)
    ("run-baud-negative", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--baud", "-5"],
     2, r"option '--baud': must be a baud rate between 1 and 1e\+08, got -5"),
    ("run-baud-not-a-number", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--baud", "fast"],
     2, r"argument --baud: invalid int value"),
    ("run-capture-file-negative", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json",
                                   "--capture-file-mib", "-5"],
     2, r"option '--capture-file-mib': must be a size in MiB between 1 and"),
    ("run-capture-file-tiny", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json",
                               "--capture-file-mib", "0.001"],
     2, r"option '--capture-file-mib'"),
    ("run-capture-buffer-zero", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json",
                                 "--capture-buffer-mib", "0"],
     2, r"option '--capture-buffer-mib'"),
    ("run-log-interval-zero", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--log-interval", "0"],
     2, r"option '--log-interval': must be a time in seconds"),
    ("run-log-interval-nan", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--log-interval", "nan"],
     2, r"option '--log-interval'"),
    ("run-link-timeout-zero", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--link-timeout", "0"],
     2, r"option '--link-timeout'"),
    ("run-columns-with-binary", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--columns", "t,f_a"],
     2, r"option '--columns': only for --input-format csv"),
    ("run-columns-incomplete", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--input", "csv",
                                "--columns", "t,f_a,f_b,x_1a"],
     2, r"--columns: column 'y_1a'"),
    ("run-out-bad-spec", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--out", "csv:carrier"],
     2, r"option '--out csv:carrier'"),
    ("run-out-exists", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--out", "{d}/exists.csv"],
     2, r"exists.csv: option '--out': output file exists"),
    ("run-out-is-calibration", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--out",
                                "csv:file:{d}/cal.json", "--force"],
     2, r"cal.json: option '--out': the output would overwrite an input"),
    ("run-capture-is-a-file", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--out", "{d}/o1.csv",
                               "--capture", "{d}/afile"],
     2, r"afile: option '--capture': exists and is not a folder"),
    ("run-capture-uncreatable", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--out", "{d}/o2.csv",
                                 "--capture", "/proc/fieldvane-capture/here"],
     2, r"option '--capture': cannot create the capture folder"),
    ("run-filter-typo", ["run", "--port", "{d}/no-port", "-c", "{d}/cal.json", "--filter",
                         "{d}/filter_filtre.toml"],
     2, r"key 'filtre': unknown section"),
    # map and report: the overwrite rule for folders of outputs
    ("map-output-is-a-file", ["map", "-c", "{d}/cal.json", "--no-png", "--points", "100", "-o", "{d}/afile"],
     2, r"afile: option '--output': exists and is not a folder"),
    ("map-points-too-few", ["map", "-c", "{d}/cal.json", "--points", "5", "-o", "{d}/m"],
     2, r"--points must be at least 20"),
    ("report-summary-exists", ["report", "{d}/est.csv", "-o", "{d}/report_done"],
     2, r"summary.md: option '--output': output file exists \(use --force"),
    ("report-output-is-a-file", ["report", "{d}/est.csv", "-o", "{d}/afile"],
     2, r"afile: option '--output': exists and is not a folder"),
    ("report-estimates-missing", ["report", "{d}/nope.csv", "-o", "{d}/rep2"],
     2, r"nope.csv"),
    ("report-channels-zero", ["report", "{d}/est.csv", "-o", "{d}/rep3", "--channels", "0"],
     2, r"--channels must be between 1 and 64"),
    # tune and demo
    ("tune-recording-missing", ["tune", "{d}/nope.csv", "-c", "{d}/cal.json", "-o", "{d}/f.toml"],
     2, r"nope.csv"),
    ("tune-filter-typo", ["tune", "{d}/rec.csv", "-c", "{d}/cal.json", "-o", "{d}/f.toml",
                          "--filter", "{d}/filter_filtre.toml"],
     2, r"key 'filtre': unknown section"),
    # (--out at a file keeps the demo rows cheap even if a check were lost: the demo would stop at
    # its first write instead of running whole)
    ("demo-out-is-a-file", ["demo", "--out", "{d}/afile", "--duration", "5"],
     2, r"afile"),
    ("demo-negative-duration", ["demo", "--duration", "-1", "--out", "{d}/afile"],
     2, r"--duration|afile"),
]


def _argv(row_argv, d):
    return [str(a).replace("{d}", str(d)) for a in row_argv]


@pytest.mark.parametrize("name, argv, code, pattern", ROWS, ids=[r[0] for r in ROWS])
def test_bad_input_gets_one_line_and_exit_code(bench, capsys, name, argv, code, pattern):
    (bench / "scen.toml").write_text((EX / "static.toml").read_text())
    before = sorted(p.name for p in bench.iterdir())
    got, out, err = run_cli(_argv(argv, bench), capsys)
    text = out + err
    assert "Traceback" not in text
    assert got == code, text[-1500:]
    lines = [x for x in err.splitlines() if "error" in x]
    assert lines and re.search(pattern, lines[-1]), err[-1500:]
    # Nothing half-written is left behind to block the retry.
    after = sorted(p.name for p in bench.iterdir())
    new = [n for n in after if n not in before and n not in ("scen.toml", ".fieldvane-tables")]
    assert not new, f"left behind: {new}"


def test_force_replaces_outputs_but_never_inputs(bench, capsys):
    d = bench
    out = d / "forced.csv"
    out.write_text("old\n")
    assert run_cli(["simulate", EX / "static.toml", "-o", out, "--duration", "0.5", "--force"], capsys)[0] == 0
    assert out.read_text().startswith("#")
    assert run_cli(["emit", EX / "static.toml", "--to", f"file:{out}", "--duration", "0.5", "--force"], capsys)[0] == 0
    assert out.read_bytes()[:1] == b"\x00"                # binary frames now
    m = d / "map_forced"
    assert run_cli(["map", "-c", d / "cal.json", "--no-png", "--points", "100", "-o", m], capsys)[0] == 0
    code, _, err = run_cli(["map", "-c", d / "cal.json", "--no-png", "--points", "100", "-o", m], capsys)
    assert code == 2 and "output file exists" in err
    assert run_cli(["map", "-c", d / "cal.json", "--no-png", "--points", "100", "-o", m, "--force"], capsys)[0] == 0
    r = d / "report_forced"
    assert run_cli(["report", d / "est.csv", "-o", r], capsys)[0] == 0
    assert run_cli(["report", d / "est.csv", "-o", r], capsys)[0] == 2
    assert run_cli(["report", d / "est.csv", "-o", r, "--force"], capsys)[0] == 0
    # The temporary names never outlive the command.
    assert not [p for p in d.rglob(".*partial*")]


def test_run_refuses_a_read_only_capture_folder_before_opening_the_port(bench, capsys, monkeypatch):
    from fieldvane.io import capture as capture_module

    def refuse(*a, **k):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))
    monkeypatch.setattr(capture_module, "_os_open", refuse)
    code, out, err = run_cli(["run", "--port", bench / "no-port", "-c", bench / "cal.json", "--out", bench / "o3.csv",
                          "--capture", bench / "ro_cap"], capsys)
    assert code == 2 and "Traceback" not in err
    assert "ro_cap: option '--capture': cannot write capture files here: Read-only file system" in err
    assert not (bench / "o3.csv").exists()


def test_truncated_capture_replays_with_a_warning(bench, capsys):
    code, out, err = run_cli(["replay", bench / "cap_cut", "-c", bench / "cal.json", "-o", bench / "cut.csv"], capsys)
    assert code == 0 and "Traceback" not in err
    assert "file ends inside the record at byte" in err


def test_numpy_warnings_become_one_line_notes(capsys):
    import warnings

    from fieldvane.io import cli as cli_module

    with cli_module._warnings_as_notes("replay"):
        for _ in range(3):
            np.array([0.0]) / np.array([0.0])
        warnings.warn("something odd", RuntimeWarning)
    err = capsys.readouterr().err
    lines = err.splitlines()
    assert lines[0].startswith("fieldvane replay: note: RuntimeWarning: invalid value encountered in divide")
    assert "came 2 more time(s)" in lines[-1] and len(lines) == 3
