"""`fieldvane simulate`: write a simulated recording CSV from a scenario TOML."""

from __future__ import annotations

DESCRIPTION = """Run the simulated sensor through a scenario and write a recording CSV.

The scenario (docs/scenarios.md) gives the sensor, the sample rate, the field's path in the
sensor frame (or a calibration scan over the sphere) and events such as noise bursts, gain
drift and dropouts. The recording has the columns t, f_a, f_b, x/y per channel, the applied
field bx_nT, by_nT, bz_nT for scans, and the ground truth true_ux, true_uy, true_uz, true_b_nT.
SCENARIO may also name a built-in scenario: demo_scan or demo_track.

example:
  fieldvane simulate examples/calibration_scan.toml -o scan.csv
  fieldvane simulate examples/turntable.toml -o turn.csv --seed 5 --duration 20
"""


def add_arguments(parser) -> None:
    """Register simulate's options."""
    parser.add_argument("scenario", help="scenario TOML file (or a built-in name: demo_scan, demo_track)")
    parser.add_argument("-o", "--output", required=True, help="recording CSV to write")
    parser.add_argument("--seed", type=int, default=None, help="noise seed (overrides [run] seed)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="run length in seconds (overrides [run] duration_s; scans can only be shortened)")


def resolve_scenario_path(name: str) -> str:
    """Return a scenario file path: name itself if it exists, else a built-in scenario's path."""
    from pathlib import Path

    if Path(name).exists() or name.endswith(".toml") or "/" in name:
        return name
    from fieldvane.firmware_sim.scenario import builtin_scenario_path

    try:
        return str(builtin_scenario_path(name))
    except ValueError:
        return name


def load_or_fail(name: str, seed=None, duration=None):
    """Return the validated Scenario, turning scenario problems into InputError (file, line, key)."""
    from fieldvane.firmware_sim.scenario import ScenarioError, load_scenario
    from fieldvane.io.errors import InputError

    path = resolve_scenario_path(name)
    try:
        scenario = load_scenario(path)
    except ScenarioError as exc:
        raise InputError(exc.reason, exc.source or path, exc.line, exc.key) from None
    try:
        return scenario.with_overrides(seed=seed, duration_s=duration)
    except ScenarioError as exc:
        option = "--seed" if exc.key and "seed" in exc.key else "--duration"
        raise InputError(f"{option}: {exc.reason}") from None


def run(args) -> int:
    """Simulate the scenario, write the recording and print a one-line summary; returns 0."""
    import numpy as np

    from fieldvane.firmware_sim.scenario import simulate
    from fieldvane.io.errors import JobError
    from fieldvane.io.recording import write_recording

    scenario = load_or_fail(args.scenario, args.seed, args.duration)
    sim = simulate(scenario)
    metadata = sim.metadata()
    metadata["scenario_file"] = resolve_scenario_path(args.scenario)
    metadata["duration_s"] = f"{sim.duration_s:g}"
    try:
        write_recording(args.output, sim.recording_columns(), metadata)
    except OSError as exc:
        raise JobError(f"cannot write {args.output}: {exc.strerror}") from None
    missing = sim.n_samples - len(sim)
    nan_rows = int(np.count_nonzero(~np.isfinite(sim.z).all(axis=1)))
    b = sim.b_nT
    extra = ""
    if missing or nan_rows:
        extra = f", {missing} rows missing, {nan_rows} NaN rows"
    print(f"wrote {args.output}: {len(sim)} rows ({sim.duration_s:g} s at {sim.sample_rate_hz:g} Hz"
          f"{extra}), {len(sim.channels)} channels, |B| {b.min():.0f}..{b.max():.0f} nT, "
          f"{scenario.kind} scenario '{scenario.name}', seed {scenario.seed}")
    return 0
