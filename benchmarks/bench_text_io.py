"""Text I/O speed on one core: recording CSV reading and estimates CSV writing, beside numpy baselines.

Run: `pytest benchmarks/bench_text_io.py --benchmark-enable --benchmark-only -s`.
Reading: 100,000 two-probe rows (15 columns, as `fieldvane simulate` writes them, 10 significant
digits) through RecordingReader, beside np.loadtxt of the same file (numpy's compiled reader, no
checks) and the reader's own line-by-line reference path; and the same rows written by repr()
(17 digits, as `export --raw` writes them) beside np.loadtxt of that file. Writing: 100,000 estimates with the tracker's 16
columns through EstimatesWriter.write_columns (repr-exact text), beside np.savetxt with '%.17g'
(also exact, not shortest) and the per-record write() path. extra_info carries samples/s; the
ratios print at the end. A last check reports the reader's peak Python memory while streaming.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from fieldvane.estimator.estimate import Estimate
from fieldvane.io.estimates_csv import EstimatesWriter, estimate_columns
from fieldvane.io.recording import RecordingReader, write_recording

N = 100_000
RESULTS: dict[str, float] = {}

pytestmark = pytest.mark.benchmark_suite


@pytest.fixture(scope="module")
def recording(tmp_path_factory):
    """A 100,000-row, two-probe recording with truth columns (500 s at 200 Hz)."""
    rng = np.random.default_rng(7)
    t = np.arange(N) * 0.005
    cols = {"t": t, "f_a": 140000 + rng.normal(0, 0.05, N), "f_b": 93340 + rng.normal(0, 0.05, N)}
    for ch in ("1a", "1b", "2a", "2b"):
        cols[f"x_{ch}"] = rng.normal(0, 1e-3, N)
        cols[f"y_{ch}"] = rng.normal(0, 1e-3, N)
    u = rng.normal(size=(N, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    cols.update(true_ux=u[:, 0], true_uy=u[:, 1], true_uz=u[:, 2], true_b_nT=np.full(N, 20000.0))
    path = tmp_path_factory.mktemp("textio") / "rec.csv"
    write_recording(path, cols, {"scenario": "benchmark"})
    return path


@pytest.fixture(scope="module")
def estimates():
    """Columns of 100,000 tracker-like estimates: the 10 fixed columns and 6 extras."""
    rng = np.random.default_rng(8)
    u = rng.normal(size=(N, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    b = 20000 + rng.normal(0, 0.3, N)
    extras = {"nis": rng.chisquare(8, N), "nis_dof": np.full(N, 8), "b_a_nT": b + rng.normal(0, 0.1, N),
              "b_b_nT": b + rng.normal(0, 0.1, N), "bound_deg": rng.uniform(0.01, 0.03, N),
              "noise_scale": rng.uniform(0.9, 1.1, N)}
    return estimate_columns(np.arange(N) * 0.005, u, b, rng.uniform(0.005, 0.02, N),
                            rng.integers(0, 4, N) * 2, extras)


def _rate(benchmark, key, label):
    rate = N / benchmark.stats.stats.mean
    benchmark.extra_info["samples_per_s"] = round(rate)
    RESULTS[key] = rate
    print(f"\n{label}: {rate:,.0f} samples/s")


@pytest.fixture(scope="module")
def recording_repr(recording, tmp_path_factory):
    """The same rows with every value as repr() writes it (up to 17 digits: what `export --raw` and the wire's
    CSV mode write), which the parser reads through the Eisel-Lemire path rather than Clinger's fast path."""
    from fieldvane.io.float_text import format_rows

    block = next(iter(RecordingReader(recording, chunk_rows=N)))
    cols = [block.t, block.f[:, 0], block.f[:, 1]]
    for k in range(block.z.shape[1]):
        cols += [block.z[:, k].real + np.pi * 1e-9, block.z[:, k].imag]
    cols += [block.truth[c] for c in ("true_ux", "true_uy", "true_uz", "true_b_nT")]
    header = "t,f_a,f_b," + ",".join(f"x_{c},y_{c}" for c in block.channels) + ",true_ux,true_uy,true_uz,true_b_nT\n"
    path = tmp_path_factory.mktemp("textio_repr") / "rec_repr.csv"
    path.write_bytes(header.encode() + bytes(format_rows(cols)))
    return path


_FILES = {"10 digits": ("recording", 2, ""), "17 digits": ("recording_repr", 1, "_repr")}   # fixture, skiprows, key


@pytest.mark.benchmark(group="read")
@pytest.mark.parametrize("digits", list(_FILES))
def test_read_recording(benchmark, request, digits):
    fixture, _, key = _FILES[digits]
    path = request.getfixturevalue(fixture)
    rows = benchmark(lambda: sum(len(b) for b in RecordingReader(path)))
    assert rows == N
    _rate(benchmark, "read" + key, f"RecordingReader, values of {digits}")


@pytest.mark.benchmark(group="read")
@pytest.mark.parametrize("digits", list(_FILES))
def test_read_baseline_loadtxt(benchmark, request, digits):
    fixture, skip, key = _FILES[digits]
    path = request.getfixturevalue(fixture)
    data = benchmark(lambda: np.loadtxt(path, delimiter=",", comments="#", skiprows=skip))
    assert data.shape == (N, 15)
    _rate(benchmark, "loadtxt" + key, f"baseline np.loadtxt of the same file, values of {digits} (no checks)")


@pytest.mark.benchmark(group="read")
def test_read_line_by_line_reference(benchmark, recording):
    rows = benchmark.pedantic(lambda: sum(len(b) for b in RecordingReader(recording, fast=False)),
                              rounds=2, iterations=1)
    assert rows == N
    _rate(benchmark, "read_lines", "RecordingReader line-by-line reference path")


def _write_block(path, cols):
    with EstimatesWriter(path) as w:
        w.write_columns(cols)


@pytest.mark.benchmark(group="write")
def test_write_estimates_block(benchmark, estimates, tmp_path):
    p = tmp_path / "e.csv"
    benchmark(lambda: _write_block(p, estimates))
    assert sum(1 for _ in open(p)) == N + 1
    _rate(benchmark, "write", "EstimatesWriter.write_columns (repr-exact)")


@pytest.mark.benchmark(group="write")
def test_write_baseline_savetxt(benchmark, estimates, tmp_path):
    p = tmp_path / "s.csv"
    data = np.column_stack([np.asarray(v, float) for v in estimates.values()])
    benchmark(lambda: np.savetxt(p, data, delimiter=",", fmt="%.17g", header=",".join(estimates), comments=""))
    _rate(benchmark, "savetxt", "baseline np.savetxt %.17g")


@pytest.mark.benchmark(group="write")
def test_write_per_record(benchmark, estimates, tmp_path):
    p = tmp_path / "r.csv"
    names = list(estimates)
    lists = {k: np.asarray(v).tolist() for k, v in estimates.items()}
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])
    ests = [Estimate(lists["t"][i], u[i], lists["b_nT"][i], lists["sigma_deg"][i], lists["flags"][i],
                     {k: lists[k][i] for k in names[10:]}) for i in range(N)]

    def run():
        with EstimatesWriter(p) as w:
            for e in ests:
                w.write(e)

    benchmark.pedantic(run, rounds=1, iterations=1)
    assert sum(1 for _ in open(p)) == N + 1
    _rate(benchmark, "write_rows", "EstimatesWriter.write per record (live path)")


@pytest.mark.benchmark(group="replay_io")
def test_replay_text_io_only(benchmark, recording, tmp_path):
    """What replay spends on text alone: read every block, write one 16-column estimate per sample."""
    p = tmp_path / "io.csv"

    def run():
        with EstimatesWriter(p) as w:
            for block in RecordingReader(recording):
                n = len(block)
                u = np.column_stack([block.truth[c] for c in ("true_ux", "true_uy", "true_uz")])
                b = block.f[:, 0] / 7.0
                extras = {"nis": block.z[:, 0].real ** 2, "nis_dof": np.full(n, 8), "b_a_nT": b,
                          "b_b_nT": block.f[:, 1] / 4.667, "bound_deg": np.abs(block.z[:, 1].imag),
                          "noise_scale": np.abs(block.z[:, 2].real)}
                w.write_columns(estimate_columns(block.t, u, b, np.abs(block.z[:, 3].imag), np.zeros(n, np.int64),
                                                 extras))
        return w.rows

    assert benchmark.pedantic(run, rounds=3, iterations=1) == N
    _rate(benchmark, "replay_io", "replay text I/O only (read recording + write estimates)")


@pytest.mark.benchmark(group="memory")
def test_streaming_peak_memory(benchmark, recording):
    def run():
        tracemalloc.start()
        try:
            rows = sum(len(b) for b in RecordingReader(recording))
            return rows, tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()

    rows, peak = benchmark.pedantic(run, rounds=1, iterations=1)
    assert rows == N
    benchmark.extra_info["peak_mib"] = round(peak / 2 ** 20, 1)
    print(f"\nstreaming peak Python memory (chunk of 65,536 rows): {peak / 2 ** 20:.1f} MiB")
    if {"read", "loadtxt", "write", "savetxt"} <= RESULTS.keys():
        print(f"read: {RESULTS['read']:,.0f}/s = {RESULTS['loadtxt'] / RESULTS['read']:.2f}x loadtxt's time; "
              f"write: {RESULTS['write']:,.0f}/s = {RESULTS['write'] / RESULTS['savetxt']:.1f}x savetxt's speed")
    if "replay_io" in RESULTS:
        print(f"replay text I/O alone: {RESULTS['replay_io']:,.0f} samples/s "
              f"({1e6 / RESULTS['replay_io']:.2f} us per sample)")
