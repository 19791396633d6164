"""`fieldvane simulate`: write a simulated recording CSV from a scenario TOML."""

from __future__ import annotations

DESCRIPTION = """Run the simulated sensor through a scenario and write a recording CSV.

The scenario (docs/scenarios.md) gives the sensor, the sample rate, the field's path in the
sensor frame (or a calibration scan over the sphere) and events such as noise bursts, gain
drift and dropouts. The recording has the columns t, f_a, f_b, x/y per channel, the applied
field bx_nT, by_nT, bz_nT for scans, and the ground truth true_ux, true_uy, true_uz, true_b_nT.
With a [lockin] table the outputs go through the lock-in's RC filter (they lag a moving field and
neighbouring samples share noise) and the recording notes its settings in '# lockin_...' lines;
a probe whose values are missing has empty x/y fields in those rows.
SCENARIO may also name an example (`fieldvane examples` lists them) or a built-in scenario
(demo_scan, demo_track). The recording's columns: docs/recording_format.md.

example:
  fieldvane simulate calibration_scan -o scan.csv
  fieldvane simulate examples/turntable.toml -o turn.csv --seed 5 --duration 20
  fieldvane simulate lockin_filtered_turn -o turn_lockin.csv
"""


def add_arguments(parser) -> None:
    """Register simulate's options."""
    from fieldvane.io.options import add_force, add_output_file

    add_scenario(parser)
    add_output_file(parser, "REC.csv", "the recording CSV (docs/recording_format.md)")
    add_force(parser)
    add_seed_duration(parser, "scans can only be shortened")


SCENARIO_HELP = ("scenario TOML file, or the name of an example (`fieldvane examples` lists them) or of a "
                 "built-in scenario (demo_scan, demo_track)")


def add_scenario(parser) -> None:
    """Register the SCENARIO argument (a file or a shipped scenario's name)."""
    parser.add_argument("scenario", metavar="SCENARIO", help=SCENARIO_HELP)


def add_seed_duration(parser, note: str = "") -> None:
    """Register --seed and --duration, which override a scenario's [run] seed and duration_s."""
    parser.add_argument("--seed", type=int, default=None, help="noise seed (overrides the scenario's [run] seed)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="run length in seconds (overrides the scenario's [run] duration_s"
                             + (f"; {note})" if note else ")"))


def resolve_scenario_path(name: str) -> str:
    """Return a scenario file path: name itself if it exists, else a built-in or example scenario's path.

    A bare name (no folder, no .toml) that is neither raises InputError listing the known names.
    """
    from pathlib import Path

    if Path(name).exists() or name.endswith(".toml") or "/" in name or "\\" in name:
        return name
    from fieldvane.firmware_sim.scenario import builtin_scenario_names, builtin_scenario_path
    from fieldvane.io.errors import InputError
    from fieldvane.io.resources import example_scenarios

    try:
        return str(builtin_scenario_path(name))
    except ValueError:
        pass
    examples = example_scenarios()
    if name in examples:
        return str(examples[name])
    known = ", ".join(builtin_scenario_names() + list(examples))
    raise InputError(f"no such scenario file, built-in scenario or example (known names: {known})", name)


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


def write_run_recording(path, sim, metadata: dict[str, str]) -> None:
    """Write a SimulatedRun as a recording CSV; a missing probe's x/y fields are left empty.

    Without missing probes this is io.recording.write_recording; with them the rows are
    formatted the same way ('%.10g', NaN rows as 'nan') except for the empty fields.
    """
    import numpy as np

    from fieldvane.io.recording import write_recording

    columns = sim.recording_columns()
    if sim.missing is None:
        write_recording(path, columns, metadata)
        return
    names = list(columns)
    text = np.char.mod("%.10g", np.column_stack([np.asarray(columns[n], float) for n in names]))
    for k, ch in enumerate(sim.channels):
        for col in (f"x_{ch}", f"y_{ch}"):
            text[sim.missing[:, k], names.index(col)] = ""
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.writelines(f"# {k}: {v}\n" for k, v in metadata.items())
        fh.write(",".join(names) + "\n")
        fh.writelines(",".join(row) + "\n" for row in text)


def run(args) -> int:
    """Simulate the scenario, write the recording and print a one-line summary; returns 0."""
    import numpy as np

    from fieldvane.firmware_sim.scenario import simulate
    from fieldvane.io.errors import JobError

    from fieldvane.io.outputs import atomic_file, check_output

    check_output(args.output, inputs=[resolve_scenario_path(args.scenario)], force=args.force,
                 option="--output")
    scenario = load_or_fail(args.scenario, args.seed, args.duration)
    sim = simulate(scenario)
    metadata = sim.metadata()
    metadata["scenario_file"] = resolve_scenario_path(args.scenario)
    metadata["duration_s"] = f"{sim.duration_s:g}"
    try:
        with atomic_file(args.output) as tmp:
            write_run_recording(tmp, sim, metadata)
    except OSError as exc:
        raise JobError(f"cannot write {args.output}: {exc.strerror}") from None
    recorded = np.ones(sim.n_samples, bool)
    if scenario.kind == "scan":                       # points' settling samples are not recorded
        recorded = scenario.scan.recorded()[:sim.n_samples]
    present = np.zeros(sim.n_samples, bool)
    present[sim.seq] = True
    missing = int(np.count_nonzero(recorded & ~present))
    gone = np.zeros(sim.z.shape, bool) if sim.missing is None else sim.missing
    nan_rows = int(np.count_nonzero((~np.isfinite(sim.z) & ~gone).any(axis=1)))
    b = sim.b_nT
    extra = ""
    if missing or nan_rows:
        extra = f", {missing} rows missing, {nan_rows} NaN rows"
    if not recorded.all():
        extra += f", {int(np.count_nonzero(~recorded))} samples left out while the lock-in settled"
    if gone.any():
        extra += f", a probe's values missing in {int(np.count_nonzero(gone.any(axis=1)))} rows"
    if sim.lockin is not None:
        lk = sim.lockin
        extra += (f", lock-in {lk.order} x {lk.time_constant_s * 1e3:g} ms "
                  f"(noise bandwidth {lk.noise_bandwidth_hz:.3g} Hz)")
    print(f"wrote {args.output}: {len(sim)} rows ({sim.duration_s:g} s at {sim.sample_rate_hz:g} Hz"
          f"{extra}), {len(sim.channels)} channels, |B| {b.min():.0f}..{b.max():.0f} nT, "
          f"{scenario.kind} scenario '{scenario.name}', seed {scenario.seed}")
    return 0
