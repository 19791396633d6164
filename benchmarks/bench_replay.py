"""End-to-end `fieldvane replay` as a user runs it: a fresh process, CSV in, CSV out, beside numpy alone.

Run: `pytest benchmarks/bench_replay.py --benchmark-enable -s`. Like bench_tune.py this module does
not pin the process to one CPU (replay formats one block in a thread while the next is estimated).

The recordings: examples/bench_probe_drifts.toml (two probes, each probe's light drifting a few
percent, a 4 x 5 ms lock-in) for 500 s and 5 s at 200 Hz: 100,000 and 1,000 samples; the calibration
from examples/calibration_scan_lockin.toml. Every measurement is a fresh process
(`python -m fieldvane replay ...`: interpreter start, imports, calibration and lookup table, reading,
the tracker, writing), after one warm-up run that builds the lookup-table cache:
  - replay of 100,000 samples, beside a process that only loads the same file with np.loadtxt
    (numpy's compiled reader, no checks, nothing estimated or written);
  - replay of 1,000 samples (start-up dominates), beside a process that only imports numpy, and beside
    the same replay with FIELDVANE_JIT=1 (numba's JIT with its on-disk cache warm: what start-up cost
    before the kernels were compiled at install).
Issue-12 targets: 100,000 samples at >= 200,000 samples/s and within 3x numpy's load; the short
replay within 0.5 s.
"""

import os
import subprocess
import sys
import time

import pytest

from recordings import drifting_bench_recordings

pytestmark = pytest.mark.benchmark_suite

RESULTS: dict[str, float] = {}
BOTH_CORES = True          # benchmarks/conftest.py pins other modules to one CPU
ROUNDS = 5


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    d = tmp_path_factory.mktemp("bench_replay")
    drifting_bench_recordings(d, {"long": 500, "short": 5})
    _process(_replay_args(d, "short"))                # builds the lookup-table cache
    _process(_replay_args(d, "short"), {"FIELDVANE_JIT": "1"})    # fills numba's cache for the JIT comparison
    return d


def _replay_args(d, name):
    return ["-m", "fieldvane", "replay", str(d / f"{name}.csv"), "-c", str(d / "cal.json"), "-o",
            str(d / f"{name}_est.csv"), "--force", "--no-progress"]


def _process(args, env=None):
    """Return the wall seconds of `python args` in a fresh process."""
    start = time.perf_counter()
    done = subprocess.run([sys.executable] + args, capture_output=True, text=True, check=False,
                          env=dict(os.environ, **(env or {})))
    seconds = time.perf_counter() - start
    assert done.returncode == 0, done.stderr[-2000:]
    return seconds


def _measure(benchmark, key, args, env=None, samples=None):
    benchmark.pedantic(_process, args=(args, env), rounds=ROUNDS, iterations=1)
    seconds = benchmark.stats.stats.median
    RESULTS[key] = seconds
    benchmark.extra_info["median_s"] = round(seconds, 3)
    if samples:
        benchmark.extra_info["samples_per_s"] = round(samples / seconds)
    print(f"\n{key}: median {seconds:.3f} s" + (f" ({samples / seconds:,.0f} samples/s)" if samples else ""))


@pytest.mark.benchmark(group="replay 100k")
def test_replay_100k_whole_process(benchmark, data):
    _measure(benchmark, "replay_100k", _replay_args(data, "long"), samples=100_000)


@pytest.mark.benchmark(group="replay 100k")
def test_baseline_numpy_loads_the_same_file(benchmark, data):
    with open(data / "long.csv") as fh:
        skip = next(k for k, line in enumerate(fh) if not line.startswith("#")) + 1     # comments and the header
    code = (f"import numpy as np; a = np.loadtxt({str(data / 'long.csv')!r}, delimiter=',', skiprows={skip}); "
            f"assert a.shape[0] == 100_000")
    _measure(benchmark, "loadtxt_100k", ["-c", code])


@pytest.mark.benchmark(group="replay 1k")
def test_replay_1k_whole_process(benchmark, data):
    _measure(benchmark, "replay_1k", _replay_args(data, "short"), samples=1_000)


@pytest.mark.benchmark(group="replay 1k")
def test_replay_1k_with_the_jit(benchmark, data):
    _measure(benchmark, "replay_1k_jit", _replay_args(data, "short"), {"FIELDVANE_JIT": "1"}, samples=1_000)


@pytest.mark.benchmark(group="replay 1k")
def test_baseline_interpreter_and_numpy(benchmark, data):
    _measure(benchmark, "import_numpy", ["-c", "import numpy"])


def test_summary():
    if len(RESULTS) < 5:
        pytest.skip("run the whole module for the ratios")
    print(f"\nreplay 100,000 samples: {RESULTS['replay_100k']:.2f} s, {100_000 / RESULTS['replay_100k']:,.0f} samples/s "
          f"(target >= 200,000); {RESULTS['replay_100k'] / RESULTS['loadtxt_100k']:.1f}x numpy's load of the same file "
          f"({RESULTS['loadtxt_100k']:.2f} s; target <= 3x)")
    print(f"replay 1,000 samples: {RESULTS['replay_1k']:.2f} s (target <= 0.5 s); with the JIT "
          f"{RESULTS['replay_1k_jit']:.2f} s; interpreter + numpy alone {RESULTS['import_numpy']:.2f} s")
