"""Simulated recordings the benchmarks share (importable: pyproject.toml puts benchmarks/ on pytest's path)."""

import os

EXAMPLES = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "examples")


def drifting_bench_recordings(directory, durations_s: dict) -> None:
    """Write scan.csv, cal.json (examples/calibration_scan_lockin.toml) and one recording of
    examples/bench_probe_drifts.toml per name -> seconds (name.csv) into `directory`: the drifting lock-in bench
    the replay and tune benchmarks share."""
    from fieldvane.io.cli import main

    d = str(directory)
    assert main(["simulate", os.path.join(EXAMPLES, "calibration_scan_lockin.toml"), "-o", f"{d}/scan.csv"]) == 0
    assert main(["calibrate", f"{d}/scan.csv", "-o", f"{d}/cal.json"]) == 0
    for name, seconds in durations_s.items():
        assert main(["simulate", os.path.join(EXAMPLES, "bench_probe_drifts.toml"), "-o", f"{d}/{name}.csv",
                     "--duration", str(seconds)]) == 0
