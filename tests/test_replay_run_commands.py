"""`fieldvane replay`, `run` and `demo` end to end on the simulated sensor."""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.sphere import angle_between
from fieldvane.firmware_sim.emitter import Emitter, PtySink
from fieldvane.firmware_sim.scenario import load_scenario, simulate
from fieldvane.io.cli import main
from fieldvane.io.estimates_csv import read_estimates
from fieldvane.io.recording import read_recording

EXAMPLES = os.path.join(os.path.dirname(__file__), "..", "examples")


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    d = tmp_path_factory.mktemp("replay")
    assert main(["simulate", os.path.join(EXAMPLES, "calibration_scan.toml"), "-o", str(d / "scan.csv")]) == 0
    assert main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json")]) == 0
    assert main(["simulate", os.path.join(EXAMPLES, "rotation_blind_planes.toml"), "-o", str(d / "rot.csv"),
                 "--duration", "15"]) == 0
    return d


@pytest.mark.parametrize("mode", ["track", "snapshot"])
def test_replay_writes_estimates_close_to_truth(calibrated, mode, capsys):
    d = calibrated
    out = d / f"est_{mode}.csv"
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out), "--mode", mode]) == 0
    est = read_estimates(out)
    assert list(est)[:len(ESTIMATE_COLUMNS)] == list(ESTIMATE_COLUMNS)
    rec, _ = read_recording(d / "rot.csv")
    u = np.column_stack([est["ux"], est["uy"], est["uz"]])
    truth = np.column_stack([rec.truth["true_ux"], rec.truth["true_uy"], rec.truth["true_uz"]])
    err = np.degrees(angle_between(u, truth))
    assert len(err) == len(rec)
    assert np.nanmax(err) < 1.0              # no mirror or branch jumps
    assert np.nanmedian(err) < 3 * np.nanmedian(est["sigma_deg"])
    flag = EstimateFlag.SNAPSHOT if mode == "snapshot" else EstimateFlag.TRACKING
    assert np.mean((est["flags"] & int(flag)) > 0) > 0.99
    np.testing.assert_allclose(est["bx_nT"], est["b_nT"] * est["ux"], rtol=1e-12)
    # Refuses to overwrite without --force.
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out)]) == 2
    assert "output file exists" in capsys.readouterr().err


def test_replay_readouts_add_phase_columns(calibrated):
    d = calibrated
    out = d / "est_readouts.csv"
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out), "--readouts"]) == 0
    est = read_estimates(out)
    assert "phase_1a_deg" in est and np.all(np.abs(est["phase_1a_deg"]) <= 180)


def _wait_lines(path, n, timeout):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if path.exists() and path.read_text().count("\n") >= n:
            return True
        time.sleep(0.05)
    return False


def test_run_live_then_replay_capture_is_identical(calibrated, tmp_path):
    d = calibrated
    scenario = load_scenario(os.path.join(EXAMPLES, "static.toml"), duration_s=3)
    sim = simulate(scenario)
    sink = PtySink()
    live_csv = tmp_path / "live.csv"
    proc = subprocess.Popen([sys.executable, "-m", "fieldvane", "run", "--port", sink.path, "-c", str(d / "cal.json"),
                             "--out", str(live_csv), "--capture", str(tmp_path / "cap"), "--log-interval", "100"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    emitter = None
    try:
        # The port is a pty that exists already; start sending once the run writes its first line is
        # not possible (it writes only after data), so send everything and wait for the lines.
        emitter = Emitter(sim, sink, fmt="binary", realtime=False).start()
        assert emitter.sent_all.wait(20)
        assert _wait_lines(live_csv, sim.n_samples // 2, 30), "run produced too few lines"
        # Everything sent may not be read yet; wait until the count stops growing, bounded.
        last, deadline = -1, time.monotonic() + 20
        while time.monotonic() < deadline:
            now = live_csv.read_text().count("\n")
            if now == last:
                break
            last = now
            time.sleep(0.3)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
        if emitter is not None:
            emitter.stop()
    assert proc.returncode == 130, err.decode()
    assert b"final" in err
    assert main(["replay", str(tmp_path / "cap"), "-c", str(d / "cal.json"), "-o", str(tmp_path / "replay.csv")]) == 0
    assert (tmp_path / "replay.csv").read_bytes() == live_csv.read_bytes()
    est = read_estimates(live_csv)
    assert len(est["t"]) > sim.n_samples // 2
    # With a calibration whose scan came through a 4-stage 5 ms lock-in, the capture (a wire stream: no lock-in
    # metadata) is taken through the same filter: its group delay 4 x 5 ms (n tau for n RC stages) is removed.
    import json
    doc = json.loads((d / "cal.json").read_text())
    doc["scan_lockin"] = {"time_constant_s": 0.005, "filter_order": 4}
    (tmp_path / "lockin_cal.json").write_text(json.dumps(doc))
    (tmp_path / "cal.npz").write_bytes((d / "cal.npz").read_bytes())
    assert main(["replay", str(tmp_path / "cap"), "-c", str(tmp_path / "lockin_cal.json"), "-o",
                 str(tmp_path / "lockin.csv")]) == 0
    shifted = read_estimates(tmp_path / "lockin.csv")
    assert np.allclose(est["t"] - shifted["t"], 0.020, rtol=0, atol=1e-12)


def test_run_exits_3_when_the_port_never_opens(calibrated, tmp_path):
    d = calibrated
    proc = subprocess.run([sys.executable, "-m", "fieldvane", "run", "--port", str(tmp_path / "no-such-port"),
                           "-c", str(d / "cal.json"), "--out", str(tmp_path / "x.csv"), "--link-timeout", "1"],
                          capture_output=True, timeout=60)
    assert proc.returncode == 3, proc.stderr.decode()
    assert b"never opened" in proc.stderr


def test_demo_runs_to_its_summary(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "fieldvane", "demo", "--duration", "6", "--no-plots",
                           "--out", str(tmp_path)], capture_output=True, timeout=300)
    out = proc.stdout.decode()
    assert proc.returncode == 0, out + proc.stderr.decode()
    for needle in ("[6/6] summary", "reproduces the live estimates exactly: yes", "error against truth",
                   "Cramer-Rao bound", "frames ok"):
        assert needle in out


def test_single_magnitude_calibration_flags_replay_far_from_it(tmp_path, capsys):
    # A scan at one magnitude is legitimate; replay far from that magnitude is flagged.
    assert main(["simulate", os.path.join(EXAMPLES, "calibration_scan_single.toml"), "-o", str(tmp_path / "s.csv")]) == 0
    assert main(["calibrate", str(tmp_path / "s.csv"), "-o", str(tmp_path / "cal.json")]) == 0
    assert "single magnitude" in capsys.readouterr().out
    assert main(["simulate", os.path.join(EXAMPLES, "magnitude_ramp.toml"), "-o", str(tmp_path / "ramp.csv")]) == 0
    assert main(["replay", str(tmp_path / "ramp.csv"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "e.csv"),
                 "--mode", "snapshot"]) == 0
    est = read_estimates(tmp_path / "e.csv")
    outside = (est["flags"] & int(EstimateFlag.OUTSIDE_CALIBRATION)) > 0
    far = np.abs(est["b_nT"] / 20000 - 1) > 0.11
    near = np.abs(est["b_nT"] / 20000 - 1) < 0.09
    assert far.any() and near.any()
    assert outside[far].all() and not outside[near].any()


def test_replay_pipeline_writes_what_the_whole_block_gives(calibrated, monkeypatch):
    # replay filters in pieces (prepared in a helper thread) and builds and writes each final stretch in the
    # writer thread: the estimates must be those of the tracker run over the whole block at once, bit for bit.
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.commands import replay
    from fieldvane.io.estimation import sample_rate_from, settings_for_stream

    d = calibrated
    monkeypatch.setattr(replay, "PIECE", 700)
    out = d / "est_pieces.csv"
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out), "--readouts",
                 "--force"]) == 0
    est = read_estimates(out)
    cal = load_calibration(d / "cal.json")
    assert cal.magnitude_model is not None            # |B| goes through the magnitude knots
    block, _ = read_recording(d / "rot.csv")
    tracker = Tracker(cal, settings_for_stream(None, block.metadata, str(d / "rot.csv")),
                      SnapshotSolver.from_calibration(cal).initiate, report_channels=True,
                      sample_rate_hz=sample_rate_from(block.metadata, str(d / "rot.csv")))
    assert len(block) > 3 * 700
    rec = tracker.run_arrays(block, 1 << 20)
    for name, values in {"t": rec.t, "ux": rec.u[:, 0], "uy": rec.u[:, 1], "b_nT": rec.b_nT, "flags": rec.flags,
                         "sigma_deg": rec.sigma_deg, "nis": rec.nis, "sigma_b_nT": rec.sigma_b_nT,
                         **rec.channel_readouts}.items():
        np.testing.assert_array_equal(est[name], values, err_msg=name)


def test_replay_stops_cleanly_when_writing_fails_mid_file(calibrated, monkeypatch, capsys):
    # The disk fills up while the writer thread writes the third stretch: exit 1 with the file's message, no
    # partial estimates file and no pipeline thread left behind.
    import threading

    from fieldvane.io.commands import replay
    from fieldvane.io.estimates_csv import EstimatesWriter

    class FullDisk:
        def __init__(self, fh):
            self.fh = fh

        def write(self, data):
            raise OSError(28, "No space left on device")

        def close(self):
            self.fh.close()

    real_put, puts = EstimatesWriter._put, []

    def put(self, data):
        puts.append(len(data))
        if len(puts) == 3:
            self._fh = FullDisk(self._fh)
        return real_put(self, data)

    d = calibrated
    monkeypatch.setattr(replay, "PIECE", 500)
    monkeypatch.setattr(EstimatesWriter, "_put", put)
    out = d / "est_full_disk.csv"
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out)]) == 1
    assert "cannot write estimates: No space left on device" in capsys.readouterr().err
    assert len(puts) == 3 and not [p for p in d.iterdir() if "est_full_disk" in p.name]
    assert not [t for t in threading.enumerate() if t.name.startswith("fieldvane-")]


def test_replay_exits_1_when_an_output_does_not_get_every_estimate(calibrated, monkeypatch, capsys):
    # The disk fills up under a --out logger: the replay names the output and how many estimates it did not get,
    # and exits 1 (it exited 0 with that output cut short).
    from fieldvane.io import sinks

    class FullDisk:
        def write(self, data):
            raise OSError(28, "No space left on device")

        def flush(self):
            pass

        def close(self):
            pass

    real_write, calls = sinks.FileTransport.write, []

    def write(self, lines):
        calls.append(len(lines))
        if len(calls) == 3:
            self.stream.close()
            self.stream = FullDisk()
        return real_write(self, lines)

    monkeypatch.setattr(sinks.FileTransport, "write", write)
    d = calibrated
    out, extra = d / "est_out_full.csv", d / "est_out_full.jsonl"
    assert main(["replay", str(d / "rot.csv"), "-c", str(d / "cal.json"), "-o", str(out),
                 "--out", f"jsonl:file:{extra}", "--no-progress"]) == 1
    err = capsys.readouterr().err
    n = len(read_estimates(out)["t"])
    written = len(extra.read_text().splitlines())
    assert 0 < written < n
    assert f"error: output jsonl:file:{extra}: {n - written} of {n} estimates not written (No space left on device)" \
        in err


def test_replay_writes_blocks_in_order_behind_the_estimator_and_hands_on_a_write_error():
    from fieldvane.io.pipeline import WriteBehind

    written = []

    def slow_write(k):
        time.sleep(0.01 * (k % 3))            # later blocks may finish sooner if they ran in parallel
        written.append(k)

    behind = WriteBehind()
    for k in range(12):
        behind.submit(slow_write, k)
    behind.finish()
    assert written == list(range(12))

    def failing_write(k):
        if k == 2:
            raise OSError(28, "No space left on device")
        written.append(k)

    written.clear()
    with pytest.raises(OSError, match="No space left"):
        for k in range(6):
            behind.submit(failing_write, k)
        behind.finish()
    assert written == [0, 1]                  # the error stops the replay at the next block, nothing after it
