"""Fit for a small computer: `fieldvane run` start-up time to first estimate and its resident memory.

Baseline in the same run: a bare Python process that opens the same port with pyserial and
decodes the first frame (the floor set by the interpreter, numpy and the link).
"""

import os
import subprocess
import sys
import threading
import time

import pytest

from fieldvane.firmware_sim.emitter import Emitter, PtySink
from fieldvane.firmware_sim.scenario import load_scenario, simulate
from fieldvane.io.cli import main

EXAMPLES = os.path.join(os.path.dirname(__file__), "..", "examples")
# A field turning slowly at 20 uT, sampled at %d Hz for %g s (the live latency benchmark).
EXAMPLE_10KHZ = """version = 1
name = "fast_stream"
[run]
sample_rate_hz = %d
duration_s = %g
seed = 3
[direction]
start = [0.5, 0.5, 0.707]
[[direction.segments]]
kind = "rotate"
axis = [0, 0, 1]
rate_deg_per_s = 2.0
duration_s = 100
[magnitude]
start_nT = 20000
"""

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


SENSOR_PROCESS = """
import os, sys, time
if os.environ.get("FIELDVANE_BENCH_SENSOR_CPUS"):     # e.g. 0, with this benchmark run under `taskset -c 1`
    os.sched_setaffinity(0, {int(c) for c in os.environ["FIELDVANE_BENCH_SENSOR_CPUS"].split(",")})
from fieldvane.firmware_sim.emitter import Emitter, PtySink
from fieldvane.firmware_sim.scenario import loads_scenario, simulate
run = simulate(loads_scenario(sys.stdin.read()))
sink = PtySink()
print(sink.path, flush=True)
starts = []
def clock():
    now = time.monotonic()          # CLOCK_MONOTONIC: the same clock in every process of this machine
    if not starts:
        starts.append(now)
        print(repr(now), flush=True)
    return now
sent = []                           # when each frame's write into the pty returned (CLOCK_MONOTONIC)
send = sink.send
def stamped_send(data, wait, stop):
    ok = send(data, wait, stop)
    sent.append(time.monotonic())
    return ok
sink.send = stamped_send
emitter = Emitter(run, sink, clock=clock)
time.sleep(float(sys.argv[1]))
emitter.start()
emitter.wait_sent(1e6)
print(emitter.stats.records_dropped, flush=True)
import numpy
numpy.save(sys.argv[2], numpy.array(sent))
emitter.stop()
"""


@pytest.mark.parametrize("outputs", ["floor", "none", "capture+csv"])
@pytest.mark.parametrize("rate", [1_000, 10_000])
def test_live_latency_frame_to_sink(calibration, tmp_path, rate, outputs):
    """A simulated sensor in its own process streaming 1,000 or 10,000 frames/s over a pty for 8 s into the live loop (link
    reader thread, decoder, the tracker on whatever has arrived, a batch at a time), bare or as `fieldvane run
    --capture DIR --out est.csv` runs it (raw bytes to the capture's writer thread, records to a CSV logger's thread):
    latency from each frame's scheduled send time to the moment its estimate is handed to the last logger (p50, p99,
    max), the part of it after the frame reached the host, frames lost, and the process's CPU time per frame. The
    baseline in the same run ("floor"): the same loop and decoder with the estimation taken out.

    A real sensor is its own hardware; this one is a Python process on the same cores. To keep them apart, run
    `FIELDVANE_BENCH_SENSOR_CPUS=0 taskset -c 1 pytest benchmarks/bench_live.py ...` (the sensor on core 0, this
    process on core 1).

    "After arrival" starts at the read that brought the frame: a frame that waited in the kernel while the loop was
    busy is stamped when the loop reads it (the loop reads the port itself), so between designs compare "from the
    frame's write into the pty", which starts when the sensor process's write returned (the same clock)."""
    import gc
    import math
    import resource

    import numpy as np

    from fieldvane.estimator.samples import SampleBlock
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.capture import CaptureWriter
    from fieldvane.io import geo_output
    from fieldvane.io.live import BinarySampleDecoder, LiveLoop
    from fieldvane.io.serial_link import SerialLink
    from fieldvane.io.sinks import Sink, open_sink
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    seconds = 8.0
    cal = load_calibration(calibration)
    table, _ = load_or_build_table(cal, cache_dir_for(calibration))
    solver = SnapshotSolver.from_calibration(cal, table)
    tracker = Tracker(cal, None, solver.initiate, sample_rate_hz=rate)
    geo = geo_output.setup(None, None, calibration, host_clock=True)     # utc from the host's receive times
    host_clock = geo_output.HostClock()
    sent_path = tmp_path / "sent.npy"
    proc = subprocess.Popen([sys.executable, "-c", SENSOR_PROCESS, "2.0", str(sent_path)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True)
    proc.stdin.write(EXAMPLE_10KHZ % (rate, seconds))
    proc.stdin.close()
    path = proc.stdout.readline().strip()
    latencies, after_arrival, t_start = [], [], []
    done_t: list[float] = []          # sensor time (s) of each sample whose estimate was handed over ...
    done_at: list[float] = []         # ... and when (CLOCK_MONOTONIC s)
    in_situ: list[tuple[float, float]] = []          # (wall, thread CPU) s of each batch's estimation
    host_ns: list[int] = []

    def handed(count):
        now = time.monotonic()
        if t_start:
            latencies.extend(now - (t_start[0] + t) for t in batch[-1][:count])
            done_t.extend(batch[-1][:count])
            done_at.extend([now] * count)
            # the part this tool adds: from the read that brought the frame's last byte
            after_arrival.extend(now - ns * 1e-9 for ns in host_ns[:count])
        del batch[-1][:count]
        del host_ns[:count]

    class StampedSink(Sink):
        """The CSV logger, noting when each record is handed to it."""

        def emit(self, record):
            ok = Sink.emit(self, record)
            handed(1)
            return ok

        def emit_block(self, block):
            taken = Sink.emit_block(self, block)
            handed(len(block))
            return taken

    batch: list = [[]]

    def estimate_batch(samples):
        batch[-1] = samples.t.tolist() if isinstance(samples, SampleBlock) else [s.t for s in samples]
        host_ns[:] = loop.sample_host_times_ns
        if outputs == "floor":              # the baseline: the same loop with the estimation taken out
            handed(len(samples))
            return [None] * len(samples)
        wall, cpu = time.perf_counter(), time.thread_time()
        rows = geo.live_block(tracker, samples, host_clock.utc(len(samples)))     # as `fieldvane run` does
        in_situ.append((time.perf_counter() - wall, time.thread_time() - cpu))
        if not sinks:
            handed(len(samples))
        return rows

    sinks, capture = [], None
    if outputs == "capture+csv":
        sink = open_sink(str(tmp_path / "est.csv"))
        sink.__class__ = StampedSink
        sinks.append(sink)
        capture = CaptureWriter(tmp_path / "capture", {})
    link = SerialLink(path, clock=time.monotonic_ns)      # arrival times on the sensor process's clock
    loop = LiveLoop(link, BinarySampleDecoder(), lambda s: None, sinks, capture, log=None,
                    estimate_batch=estimate_batch)
    host_clock.attach(loop)
    gcs: list[list[float]] = []         # [duration s, generation] of each garbage collection in the process

    def collected(phase, info):
        if phase == "start":
            gcs.append([time.perf_counter(), info["generation"]])
        elif gcs:
            gcs[-1][0] = time.perf_counter() - gcs[-1][0]

    gc.callbacks.append(collected)
    thread = threading.Thread(target=loop.run, daemon=True)
    try:
        thread.start()
        t_start.append(float(proc.stdout.readline()))
        cpu = resource.getrusage(resource.RUSAGE_SELF)         # from the first frame sent to the last
        dropped = int(proc.stdout.readline())
        used = resource.getrusage(resource.RUSAGE_SELF)
        time.sleep(0.5)
        loop.stop()
        thread.join(10)
    finally:
        proc.wait(20)
    cpu_us = (used.ru_utime - cpu.ru_utime + used.ru_stime - cpu.ru_stime) / (rate * seconds) * 1e6
    lat = np.array(latencies[rate // 2:]) * 1e3        # after the first half second (acquisition, caches)
    p50, p99, worst = np.percentile(lat, 50), np.percentile(lat, 99), lat.max()
    ours = np.array(after_arrival[rate // 2:]) * 1e3
    # The measure that does not depend on where this process stamps arrival: from the sensor process's write of
    # the frame into the pty returning to the estimate being handed over (both on CLOCK_MONOTONIC).
    sent = np.load(sent_path)
    k = np.rint(np.array(done_t) * rate).astype(np.int64)
    from_write = ((np.array(done_at) - sent[k]) * 1e3)[rate // 2:]
    total = int(rate * seconds)
    print(f"\n{rate / 1000:g} kHz live, outputs {outputs}: {loop.samples} of {total} frames estimated "
          f"({loop.samples / max(loop.chunks, 1):.1f} per chunk), latency p50 {p50:.3f} ms, p99 {p99:.3f} ms, max "
          f"{worst:.2f} ms; sensor dropped {dropped}; CPU {cpu_us:.0f} us per frame"
          f"\n  of which after arrival at the host: p50 {np.percentile(ours, 50):.3f} ms, "
          f"p99 {np.percentile(ours, 99):.3f} ms, max {ours.max():.2f} ms (the rest is the simulated sensor's "
          f"own lateness in sending and the pty)"
          f"\n  from the frame's write into the pty: p50 {np.percentile(from_write, 50):.3f} ms, "
          f"p99 {np.percentile(from_write, 99):.3f} ms, max {from_write.max():.2f} ms")
    gc.callbacks.remove(collected)
    g = np.array(gcs).reshape(-1, 2)
    print("  garbage collections from the loop's start (generation: count, longest): " + ", ".join(
        f"{gen}: {int(np.sum(g[:, 1] == gen))}, {np.max(g[g[:, 1] == gen, 0], initial=0) * 1e3:.2f} ms" for gen in range(3)))
    if loop.samples < total:
        print("  counters:", loop.counters())
    if in_situ:
        cost = np.array(in_situ[len(in_situ) // 16:]) * 1e6
        print(f"  estimation per batch in the loop: wall p50 {np.percentile(cost[:, 0], 50):.0f} us, p99 "
              f"{np.percentile(cost[:, 0], 99):.0f} us; its thread's CPU p50 {np.percentile(cost[:, 1], 50):.0f} us, "
              f"p99 {np.percentile(cost[:, 1], 99):.0f} us (cold caches: compare bench_tracker's warm step)")
    assert loop.samples > 0 and not math.isnan(p99)
