"""`fieldvane simulate` and `fieldvane emit` from the command line: outputs, summaries, errors."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fieldvane.firmware_sim.scenario import load_scenario, simulate
from fieldvane.io.cli import main
from fieldvane.io.recording import read_recording

ROOT = Path(__file__).resolve().parents[1]
EX = ROOT / "examples"
CHANNEL_COLUMNS = ["x_1a", "y_1a", "x_1b", "y_1b", "x_2a", "y_2a", "x_2b", "y_2b"]
TRUTH = ["true_ux", "true_uy", "true_uz", "true_b_nT"]


def header_of(path: Path) -> list[str]:
    for line in path.read_text().splitlines():
        if not line.startswith("#"):
            return line.split(",")
    raise AssertionError("no header")


def test_track_recording_columns_metadata_and_summary(tmp_path, capsys):
    out = tmp_path / "turn.csv"
    assert main(["simulate", str(EX / "turntable.toml"), "-o", str(out), "--duration", "3"]) == 0
    summary = capsys.readouterr().out.strip().splitlines()
    assert len(summary) == 1 and "600 rows" in summary[0] and "turntable" in summary[0]
    assert header_of(out) == ["t", "f_a", "f_b"] + CHANNEL_COLUMNS + TRUTH
    block, warnings = read_recording(out)
    assert warnings == [] and len(block) == 600
    assert block.metadata["scenario"] == "turntable"
    assert block.metadata["seed"] == "4" and block.metadata["sample_rate_hz"] == "200"
    # The file holds the simulation (to the writer's 10 significant digits).
    sim = simulate(load_scenario(EX / "turntable.toml", duration_s=3))
    np.testing.assert_allclose(block.z, sim.z, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(block.truth["true_b_nT"], sim.b_nT)
    np.testing.assert_allclose(np.column_stack([block.truth[c] for c in TRUTH[:3]]), sim.u, atol=1e-9)


def test_scan_recording_has_the_applied_field(tmp_path):
    out = tmp_path / "scan.csv"
    assert main(["simulate", str(EX / "calibration_scan_single.toml"), "-o", str(out),
                 "--duration", "2"]) == 0
    assert header_of(out) == (["t", "f_a", "f_b"] + CHANNEL_COLUMNS + ["bx_nT", "by_nT", "bz_nT"]
                              + TRUTH)
    block, _ = read_recording(out)
    u = np.column_stack([block.truth[c] for c in TRUTH[:3]])
    np.testing.assert_allclose(block.applied_b_nT, u * block.truth["true_b_nT"][:, None],
                               rtol=1e-8, atol=1e-5)
    assert block.metadata["kind"] == "scan"


def test_one_probe_recording_has_four_channel_columns(tmp_path):
    out = tmp_path / "one.csv"
    assert main(["simulate", str(EX / "static_one_probe.toml"), "-o", str(out), "--duration", "1"]) == 0
    assert header_of(out) == ["t", "f_a", "f_b"] + CHANNEL_COLUMNS[:4] + TRUTH


def test_seed_override_changes_noise_and_is_recorded(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    assert main(["simulate", str(EX / "static.toml"), "-o", str(a), "--duration", "1"]) == 0
    assert main(["simulate", str(EX / "static.toml"), "-o", str(b), "--duration", "1",
                 "--seed", "77"]) == 0
    ra, rb = read_recording(a)[0], read_recording(b)[0]
    assert rb.metadata["seed"] == "77"
    assert not np.allclose(ra.z, rb.z)
    np.testing.assert_array_equal(ra.truth["true_ux"], rb.truth["true_ux"])


def test_dropouts_show_as_gaps_and_skipped_nan_rows(tmp_path, capsys):
    out = tmp_path / "drop.csv"
    assert main(["simulate", str(EX / "dropouts.toml"), "-o", str(out)]) == 0
    assert "400 rows missing, 100 NaN rows" in capsys.readouterr().out
    block, warnings = read_recording(out)
    assert block.skipped_rows == 100 and warnings          # NaN rows are counted, not silent
    assert np.count_nonzero(np.diff(block.t) > 1.5 / 200) == 2    # the missing rows and the NaN rows


def test_lockin_settings_and_rate_are_recorded_as_metadata(tmp_path, capsys):
    out = tmp_path / "turn.csv"
    assert main(["simulate", str(EX / "lockin_filtered_turn.toml"), "-o", str(out), "--duration", "2"]) == 0
    assert "lock-in 4 x 5 ms" in capsys.readouterr().out
    lines = out.read_text().splitlines()
    # The exact lines the estimator reads (docs/scenarios.md).
    for line in ("# lockin_time_constant_s: 0.005", "# lockin_filter_order: 4", "# sample_rate_hz: 200",
                 "# lockin_noise_bandwidth_hz: 15.625"):
        assert line in lines
    block, warnings = read_recording(out)
    assert warnings == [] and len(block) == 400
    assert block.metadata["lockin_filter_order"] == "4"
    plain = tmp_path / "plain.csv"
    assert main(["simulate", str(EX / "static.toml"), "-o", str(plain), "--duration", "1"]) == 0
    assert "lockin" not in plain.read_text()


def test_lockin_scan_summary_counts_the_settling_samples(tmp_path, capsys):
    out = tmp_path / "scan.csv"
    assert main(["simulate", str(EX / "calibration_scan_lockin.toml"), "-o", str(out), "--duration", "6"]) == 0
    text = capsys.readouterr().out
    # 6 s = 1200 samples = 50 points x (16 settling + 8 recorded): 400 rows, 800 left out.
    assert "400 rows" in text and "800 samples left out while the lock-in settled" in text
    assert "rows missing" not in text


def test_missing_probe_fields_are_empty_in_the_recording(tmp_path, capsys):
    out = tmp_path / "drop2.csv"
    assert main(["simulate", str(EX / "probe2_dropout.toml"), "-o", str(out), "--duration", "32"]) == 0
    assert "a probe's values missing in 2000 rows" in capsys.readouterr().out
    rows = [ln for ln in out.read_text().splitlines() if not ln.startswith("#")]
    header, data = rows[0].split(","), [r.split(",") for r in rows[1:]]
    assert len(data) == 6400 and all(len(r) == len(header) for r in data)
    probe2 = [header.index(c) for c in CHANNEL_COLUMNS[4:]]
    others = [i for i in range(len(header)) if i not in probe2]
    for r in data:
        t = float(r[0])
        empty = [r[i] == "" for i in probe2]
        assert all(empty) if 20.0 <= t < 30.0 else not any(empty)
        assert all(r[i] != "" and np.isfinite(float(r[i])) for i in others)
    sim = simulate(load_scenario(EX / "probe2_dropout.toml", duration_s=32))
    first = np.array([float(v) for v in data[0][3:11]])
    np.testing.assert_allclose(first, np.column_stack([sim.z[0].real, sim.z[0].imag]).ravel(), rtol=1e-9)


def test_emit_csv_leaves_a_missing_probe_empty(tmp_path):
    out = tmp_path / "drop2.csv"
    assert main(["emit", str(EX / "probe2_dropout.toml"), "--to", f"file:{out}", "--format", "csv",
                 "--duration", "21"]) == 0
    rows = [ln.split(",") for ln in out.read_text().splitlines() if not ln.startswith("#")][1:]
    assert len(rows) == 4200
    assert all(r[7:] == ["", "", "", ""] for r in rows[4000:])
    assert all("" not in r for r in rows[:4000])


def test_builtin_scenario_by_name(tmp_path, capsys):
    out = tmp_path / "demo.csv"
    assert main(["simulate", "demo_track", "-o", str(out), "--duration", "1"]) == 0
    assert "demo_track" in capsys.readouterr().out
    assert read_recording(out)[0].metadata["scenario"] == "demo_track"


def test_bad_scenario_is_a_clear_error(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text((EX / "static.toml").read_text().replace("start_nT = 20000", "start_nT = -1"))
    out = tmp_path / "never.csv"
    assert main(["simulate", str(bad), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert f"{bad}:16:" in err and "magnitude.start_nT" in err and "> 0" in err
    assert "Traceback" not in err and not out.exists()


@pytest.mark.parametrize("argv,words", [
    (["--duration", "100"], "--duration"),
    (["--duration", "-1"], "--duration"),
    (["--seed", "-3"], "--seed"),
])
def test_bad_overrides_are_clear_errors(tmp_path, capsys, argv, words):
    out = tmp_path / "x.csv"
    assert main(["simulate", str(EX / "calibration_scan.toml"), "-o", str(out)] + argv) == 2
    assert words in capsys.readouterr().err and not out.exists()


def test_missing_scenario_file(tmp_path, capsys):
    assert main(["simulate", str(tmp_path / "nope.toml"), "-o", str(tmp_path / "x.csv")]) == 2
    assert "cannot read scenario" in capsys.readouterr().err


# ----- emit -----------------------------------------------------------------------------

def test_emit_to_file_binary_with_faults(tmp_path, capsys):
    wire = pytest.importorskip("fieldvane.io.wire")
    out = tmp_path / "s.bin"
    assert main(["emit", str(EX / "static.toml"), "--to", f"file:{out}", "--duration", "1",
                 "--flip-every", "50"]) == 0
    text = capsys.readouterr().out
    assert "sent 200 records" in text and "4 bit flips" in text
    dec = wire.FrameDecoder()
    frames = dec.feed(out.read_bytes())
    assert len(frames) == 196 and dec.seq_gaps == 3     # records 49, 99, 149, 199 (last: no gap after)


def test_emit_to_file_csv_reads_as_a_recording(tmp_path):
    out = tmp_path / "s.csv"
    assert main(["emit", str(EX / "static.toml"), "--to", f"file:{out}", "--format", "csv",
                 "--with-truth", "--duration", "1"]) == 0
    block, warnings = read_recording(out)
    assert len(block) == 200 and warnings == [] and block.metadata["scenario"] == "static"
    sim = simulate(load_scenario(EX / "static.toml", duration_s=1))
    np.testing.assert_array_equal(block.z, sim.z)         # CSV lines keep every digit


@pytest.mark.parametrize("argv,words", [
    (["--to", "serial"], "--to"),
    (["--to", "tcp:http"], "--to"),
    (["--to", "file:x.bin", "--with-truth"], "--with-truth"),
    (["--to", "file:x.bin", "--pause", "soon"], "--pause"),
])
def test_emit_bad_options(tmp_path, capsys, argv, words, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["emit", str(EX / "static.toml")] + argv) == 2
    assert words in capsys.readouterr().err
