"""Speed of the wire decoder (beside a simple baseline) and live-loop latency at 1 kHz.

Run: pytest benchmarks/bench_wire.py --benchmark-enable -s
"""

from __future__ import annotations

import binascii
import os
import random
import struct
import threading
import time
import tty

import numpy as np
import pytest
from cobs import cobs

from fieldvane.io.live import LiveLoop, make_decoder
from fieldvane.io.serial_link import SerialLink
from fieldvane.io.sinks import CsvFormatter, Sink, Transport
from fieldvane.io.wire import Frame, FrameDecoder, encode_frame

N_FRAMES = 5000


def _stream(n=N_FRAMES, seed=1, mixed=True):
    rng = random.Random(seed)
    frames = []
    for s in range(n):
        k = 8 if s % 2 or not mixed else 4
        frames.append(Frame(s, 1_000_000 * s, 0, 350000.0 + rng.random(), 233500.0 + rng.random(),
                            tuple(float(np.float32(rng.uniform(-1, 1))) for _ in range(k))))
    return b"".join(encode_frame(f) for f in frames)


STREAM = _stream()                      # one- and two-probe frames in turn: the decoder's worst case
TWO_PROBES = _stream(mixed=False)       # a sensor's usual stream
_HDR = struct.Struct("<2sBBIQHBBdd")


def baseline_decode(stream):
    """Simple baseline: split at 0x00, `cobs` package decode, binascii CRC, struct unpack."""
    out = []
    for cand in stream.split(b"\x00"):
        if not cand or len(cand) > 256:
            continue
        try:
            p = cobs.decode(cand)
        except cobs.DecodeError:
            continue
        if len(p) < 38 or binascii.crc_hqx(p[:-2], 0xFFFF) != int.from_bytes(p[-2:], "little"):
            continue
        h = _HDR.unpack_from(p, 0)
        n = h[6]
        out.append((h, struct.unpack_from(f"<{n}f", p, 36)))
    return out


def _report(benchmark, label):
    fps = N_FRAMES / benchmark.stats.stats.mean
    benchmark.extra_info["frames_per_s"] = round(fps)
    print(f"\n{label}: {fps:,.0f} frames/s")


@pytest.mark.benchmark(group="decoder")
def test_decoder_frames(benchmark):
    out = benchmark(lambda: FrameDecoder().feed(STREAM))
    assert len(out) == N_FRAMES
    _report(benchmark, "FrameDecoder.feed -> Frame")


@pytest.mark.benchmark(group="decoder")
def test_decoder_samples(benchmark):
    dec = make_decoder  # the live loop's path: frames converted to Samples

    out = benchmark(lambda: dec("binary").feed(STREAM))
    assert len(out) == N_FRAMES
    _report(benchmark, "binary decoder -> Sample")


@pytest.mark.benchmark(group="decoder")
def test_decoder_samples_two_probes(benchmark):
    out = benchmark(lambda: make_decoder("binary").feed(TWO_PROBES))      # one SampleBlock
    assert len(out) == N_FRAMES
    _report(benchmark, "binary decoder -> SampleBlock, two-probe frames")


@pytest.mark.benchmark(group="decoder")
def test_baseline_cobs_package(benchmark):
    out = benchmark(lambda: baseline_decode(STREAM))
    assert len(out) == N_FRAMES
    _report(benchmark, "baseline (cobs package + binascii + struct)")


class StampTransport(Transport):
    """Records the time each line reaches the sink transport."""

    description = "stamp"

    def __init__(self, n):
        super().__init__()
        self.stamps = {}
        self.done = threading.Event()
        self.n = n

    def write(self, lines):
        now = time.perf_counter_ns()
        for ln in lines:
            self.stamps[ln.split(",", 1)[0]] = now
        if len(self.stamps) > self.n:          # header + n lines
            self.done.set()
        return len(lines)


def _estimate(s):
    return {"t": s.t, "ux": 1.0, "uy": 0.0, "uz": 0.0, "b_nT": s.f_a / 7.0, "bx_nT": 0.0,
            "by_nT": 0.0, "bz_nT": 0.0, "sigma_deg": 0.1, "flags": 0}


@pytest.mark.benchmark(group="latency")
def test_latency_1khz_pty(benchmark, tmp_path):
    n = 3000
    frames = [Frame(s, 1_000_000 * s, 0, 350000.0, 233500.0, (0.1, 0.2, 0.3, 0.4)) for s in range(n)]
    encoded = [encode_frame(f) for f in frames]
    keys = [repr(f.t_ns / 1e9) for f in frames]

    def run():
        master, slave = os.openpty()
        tty.setraw(slave)
        transport = StampTransport(n)
        link = SerialLink(os.ttyname(slave))
        loop = LiveLoop(link, make_decoder("binary"), _estimate, [Sink(CsvFormatter(), transport)],
                        None, log=None)
        th = threading.Thread(target=loop.run)
        th.start()
        assert link.wait_for(lambda l: l.opens == 1, 10)
        sent = {}
        t0 = time.perf_counter()
        for i, data in enumerate(encoded):     # paced at 1 kHz (benchmark only)
            delay = t0 + i * 1e-3 - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
            os.write(master, data)
            sent[keys[i]] = time.perf_counter_ns()
        assert transport.done.wait(30)
        loop.stop()
        th.join(10)
        os.close(master)
        os.close(slave)
        lat = np.array([transport.stamps[k] - sent[k] for k in keys]) / 1e6
        return lat

    lat = benchmark.pedantic(run, rounds=1, iterations=1)
    p50, p99, mx = np.percentile(lat, 50), np.percentile(lat, 99), lat.max()
    benchmark.extra_info.update(p50_ms=round(p50, 3), p99_ms=round(p99, 3), max_ms=round(mx, 3))
    print(f"\nframe written to pty -> line at sink transport, 1 kHz, {n} frames: "
          f"p50 {p50:.3f} ms, p99 {p99:.3f} ms, max {mx:.3f} ms")
