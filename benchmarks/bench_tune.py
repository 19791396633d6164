"""Speed of `fieldvane tune` on a 100,000-sample two-probe recording, beside one plain replay of the same data.

Run: `pytest benchmarks/bench_tune.py --benchmark-enable -s`. Unlike the other benchmarks this module
does not pin the process to one CPU: the target is the whole command on the project's 2-core
machine (the tuner scores candidates on threads), so this module sets BOTH_CORES.

The recording: examples/bench_probe_drifts.toml run for 500 s at 200 Hz (100,000 samples, two
probes, each probe's light drifting a few percent, a 4 x 5 ms lock-in stated in the metadata); the
calibration from examples/calibration_scan_lockin.toml. Measured, each as a fresh process
(`python -m fieldvane ...`, interpreter start and imports included):
  - tune: the whole command (noise and lock-in, three state sets searched, before/after replays,
    verdict, file written); target <= 10 s;
  - baseline: `replay` of the same recording with default settings, writing the estimates CSV.
"""

import subprocess
import sys
import time

import pytest

from recordings import drifting_bench_recordings

pytestmark = pytest.mark.benchmark_suite

DURATION_S = 500           # 100,000 samples at 200 Hz
TARGET_S = 10.0
RESULTS: dict[str, float] = {}
BOTH_CORES = True          # benchmarks/conftest.py pins other modules to one CPU


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    d = tmp_path_factory.mktemp("bench_tune")
    drifting_bench_recordings(d, {"long": DURATION_S})
    return d


def _command(args: list[str]) -> tuple[float, str]:
    """Return (wall seconds, stdout) of `python -m fieldvane args` in a fresh process."""
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "fieldvane"] + args, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - start
    assert done.returncode == 0, done.stderr
    return seconds, done.stdout


def test_baseline_plain_replay(benchmark, data):
    args = ["replay", str(data / "long.csv"), "-c", str(data / "cal.json"), "-o", str(data / "est.csv"),
            "--force", "--no-progress"]
    _command(args)                                     # builds the lookup-table cache and loads compiled code
    seconds, _ = benchmark.pedantic(_command, args=(args,), rounds=1, iterations=1)
    RESULTS["replay"] = seconds
    benchmark.extra_info.update(samples=100_000, seconds=round(seconds, 2))


def test_tune_whole_command_100k(benchmark, data):
    args = ["tune", str(data / "long.csv"), "-c", str(data / "cal.json"), "-o", str(data / "filter.toml"),
            "--force", "--no-progress"]
    seconds, out = benchmark.pedantic(_command, args=(args,), rounds=1, iterations=1)
    RESULTS["tune"] = seconds
    chosen = next((ln.split("chosen: ")[1].split(";")[0] for ln in out.splitlines() if "chosen: " in ln), "?")
    verdict = out.strip().splitlines()[-1]
    benchmark.extra_info.update(samples=100_000, seconds=round(seconds, 2), target_seconds=TARGET_S,
                                within_target=seconds <= TARGET_S, chosen=chosen, verdict=verdict[:80])
    if "replay" in RESULTS:
        benchmark.extra_info["over_plain_replay"] = round(seconds / RESULTS["replay"], 2)
    print(f"\ntune 100k samples: {seconds:.2f} s (target {TARGET_S:g} s); plain replay "
          f"{RESULTS.get('replay', float('nan')):.2f} s; chosen {chosen}; {verdict}")
