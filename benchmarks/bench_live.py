"""Fit for a small computer: `fieldvane run` start-up time to first estimate and its resident memory.

Baseline in the same run: a bare Python process that opens the same port with pyserial and
decodes the first frame (the floor set by the interpreter, numpy and the link).
"""

import os
import subprocess
import sys
import time

import pytest

from fieldvane.firmware_sim.emitter import Emitter, PtySink
from fieldvane.firmware_sim.scenario import load_scenario, simulate
from fieldvane.io.cli import main

EXAMPLES = os.path.join(os.path.dirname(__file__), "..", "examples")

BASELINE = """
import sys, serial
from fieldvane.io.wire import FrameDecoder
port = serial.serial_for_url(sys.argv[1], timeout=0.1)
dec = FrameDecoder()
while not dec.feed(port.read(256)):
    pass
print("first", flush=True)
"""


@pytest.fixture(scope="module")
def calibration(tmp_path_factory):
    d = tmp_path_factory.mktemp("live")
    main(["simulate", os.path.join(EXAMPLES, "calibration_scan.toml"), "-o", str(d / "scan.csv")])
    main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json")])
    # Build the lookup-table cache once, as a user's first replay or run would.
    main(["replay", str(d / "scan.csv"), "-c", str(d / "cal.json"), "-o", str(d / "warm.csv"), "--mode", "snapshot"])
    return d / "cal.json"


def _rss_kib(pid):
    with open(f"/proc/{pid}/status") as fh:
        fields = dict(line.split(":", 1) for line in fh if ":" in line)
    return int(fields["VmRSS"].split()[0]), int(fields["VmHWM"].split()[0])


def _start_sensor():
    sim = simulate(load_scenario(os.path.join(EXAMPLES, "static.toml"), duration_s=30))
    sink = PtySink()
    return Emitter(sim, sink, fmt="binary", realtime=True).start(), sink


def test_run_time_to_first_estimate_and_memory(benchmark, calibration, tmp_path):
    results = []

    def once():
        emitter, sink = _start_sensor()
        out = tmp_path / f"est{len(results)}.csv"
        start = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-m", "fieldvane", "run", "--port", sink.path, "-c", str(calibration),
                                 "--out", str(out), "--log-interval", "100"], stderr=subprocess.DEVNULL)
        first = None
        deadline = start + 60
        while time.perf_counter() < deadline:
            if out.exists() and out.read_text().count("\n") >= 2:
                first = time.perf_counter() - start
                break
            time.sleep(0.005)
        time.sleep(3.0)   # let it run: memory in steady state
        rss = _rss_kib(proc.pid)
        proc.terminate()
        proc.wait(20)
        emitter.stop()
        results.append((first, rss))

    benchmark.pedantic(once, rounds=3, iterations=1)
    benchmark.extra_info["first_estimate_s"] = [round(r[0], 3) for r in results]
    benchmark.extra_info["rss_MiB"] = [round(r[1][0] / 1024, 1) for r in results]
    benchmark.extra_info["peak_rss_MiB"] = [round(r[1][1] / 1024, 1) for r in results]
    print("\nfieldvane run:", benchmark.extra_info)


def test_baseline_bare_reader_time_to_first_frame(benchmark):
    results = []

    def once():
        emitter, sink = _start_sensor()
        start = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-c", BASELINE, sink.path], stdout=subprocess.PIPE)
        proc.stdout.readline()
        results.append(time.perf_counter() - start)
        rss = _rss_kib(proc.pid) if proc.poll() is None else (0, 0)
        proc.wait(20)
        emitter.stop()
        results[-1] = (results[-1], rss)

    benchmark.pedantic(once, rounds=3, iterations=1)
    benchmark.extra_info["first_frame_s"] = [round(r[0], 3) for r in results]
    print("\nbaseline:", benchmark.extra_info)
