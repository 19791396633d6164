"""`fieldvane plan-scan`: propose the field vectors of a calibration scan that reach a target axis accuracy."""

from __future__ import annotations

import math

DESCRIPTION = """Propose a calibration scan: the field vectors (sensor frame) to apply, in order.

From the sensor file's nominal beam axes and the stated lock-in noise, the Fisher information of
the calibration's parameters says how well each pump and probe axis will be fitted. Every
magnitude level gets a near-uniform base set of directions (for the model's smooth corrections and
its sphere coverage); on top of them the optimal design for the worst axis (the continuous optimal
design over a grid of directions at every level, rounded to whole rows, completed and trimmed)
gives every axis the target (1 sigma: sqrt of the trace of its 2x2 covariance) with few rows. The
summary says how many rows the continuous optimal design needs and how few any design could need.
Rows are ordered level by level, ascending |B|, along a short tour so the coils step little. A
field vector may repeat on consecutive lines: each copy is one independent measurement (let the
lock-in settle for several time constants between them). Output: a CSV with columns bx_nT, by_nT,
bz_nT (comment lines above them record the plan). Check the field values against your coil
driver's limits before running it.

example:
  fieldvane plan-scan --sensor sensor.toml --target-axis-deg 0.005 --snr 2000 \\
      --magnitudes 1000,2000,5000,10000,20000 -o scan_plan.csv
"""

DEFAULT_MAGNITUDES = "1000,2000,5000,10000,20000"


def add_arguments(parser) -> None:
    """Register plan-scan's options."""
    from fieldvane.io.options import CALIBRATION_HELP, add_force, add_output_file

    parser.add_argument("--sensor", required=True, metavar="SENSOR.toml",
                        help="sensor TOML with the nominal pump and probe axes (docs/config_files.md)")
    add_output_file(parser, "PLAN.csv", "the scan plan CSV (bx_nT, by_nT, bz_nT)")
    parser.add_argument("--target-axis-deg", type=float, default=0.01,
                        help="1-sigma accuracy every beam axis must reach, degrees (default 0.01)")
    parser.add_argument("--magnitudes", default=DEFAULT_MAGNITUDES,
                        help=f"field magnitudes of the scan levels, nT, comma-separated (default {DEFAULT_MAGNITUDES})")
    parser.add_argument("--snr", type=float, default=1000.0,
                        help="lock-in signal-to-noise: channel gain over the noise std of X and of Y (default 1000)")
    parser.add_argument("-c", "--calibration", metavar="CAL.json",
                        help=CALIBRATION_HELP + ": take axes, gains, noise and handedness from it instead")
    parser.add_argument("--min-rows-per-level", type=int, default=100,
                        help="near-uniform directions every level starts with (default 100; at least 27)")
    add_force(parser)


def _magnitudes(text: str):
    import numpy as np

    from fieldvane.io.errors import InputError

    try:
        values = np.array([float(x) for x in str(text).split(",") if x.strip()])
    except ValueError:
        raise InputError(f"expected comma-separated numbers of nT, got {text!r}", column="--magnitudes") from None
    if values.size == 0 or np.any(~np.isfinite(values)) or np.any(values <= 0) or np.any(values > 1e7):
        raise InputError(f"magnitudes must be positive numbers of nT (at most 1e7), got {text!r}",
                         column="--magnitudes")
    return values


def run(args) -> int:
    """Plan the scan, write the CSV and print the expected accuracy; returns the exit code."""
    import numpy as np

    from fieldvane.estimator.scan_design import PlanError, plan_scan, sensor_guess
    from fieldvane.io.errors import InputError
    from fieldvane.io.outputs import atomic_file, check_output
    from fieldvane.io.sensorfile import read_sensor_file

    if not (math.isfinite(args.target_axis_deg) and 0 < args.target_axis_deg <= 10):
        raise InputError(f"must be a number of degrees in (0, 10], got {args.target_axis_deg}",
                         column="--target-axis-deg")
    if not (math.isfinite(args.snr) and 1 <= args.snr <= 1e9):
        raise InputError(f"must be a number from 1 to 1e9, got {args.snr}", column="--snr")
    if not 27 <= args.min_rows_per_level <= 100000:
        raise InputError(f"must be a whole number from 27 to 100000, got {args.min_rows_per_level}",
                         column="--min-rows-per-level")
    levels = _magnitudes(args.magnitudes)
    out = check_output(args.output, inputs=[args.sensor, args.calibration], force=args.force, option="--output")
    sensor = read_sensor_file(args.sensor)
    if args.calibration:
        from fieldvane.io.calfile import load_calibration

        cal = load_calibration(args.calibration)
        ph = cal.physics
        guess = sensor_guess(ph.pump_axes, ph.probe_axes, args.snr, gains=np.abs(ph.gains).mean(axis=1),
                             noise_std=cal.model.noise_std, handedness=ph.handedness)
        noise_note = f"noise and gains from {args.calibration}"
    else:
        guess = sensor_guess(sensor["nominal_pumps"], sensor["nominal_probes"], args.snr)
        noise_note = f"signal-to-noise {args.snr:g}"
    try:
        plan = plan_scan(guess, levels, args.target_axis_deg, base_rows=args.min_rows_per_level)
    except PlanError as exc:
        raise InputError(str(exc), column="--magnitudes" if "magnitude" in str(exc) else None) from None

    beams = ["pump a", "pump b"] + [f"probe {i + 1}" for i in range(guess.probe_axes.shape[0])]
    header = [f"# plan: fieldvane plan-scan for {args.sensor} ({noise_note})",
              f"# target_axis_deg: {args.target_axis_deg:g}",
              f"# levels_nT: {', '.join(f'{b:g}' for b in plan.levels_nT)}",
              f"# rows_per_level: {', '.join(str(int(n)) for n in np.bincount(plan.level, minlength=len(plan.levels_nT)))}",
              "# expected_axis_std_deg: " + ", ".join(f"{n} {s:.5f}" for n, s in zip(beams, plan.expected_std_deg)),
              f"# continuous_design_rows: {plan.bound_rows:.0f} "
              f"(no design needs fewer than {plan.bound_rows_lower:.0f})",
              "bx_nT,by_nT,bz_nT"]
    body = "\n".join(",".join(f"{x:.3f}" for x in row) for row in plan.field_nT)
    with atomic_file(out) as tmp:
        tmp.write_text("\n".join(header) + "\n" + body + "\n", encoding="utf-8")

    counts = np.bincount(plan.level, minlength=len(plan.levels_nT))
    print(f"scan plan: {plan.n_rows} field vectors at {len(plan.levels_nT)} level(s) ({noise_note})")
    for b, n in zip(plan.levels_nT, counts):
        print(f"  {b:9.0f} nT: {n} directions")
    status = "reached" if plan.reached else "NOT reached (row limit)"
    print(f"expected axis accuracy (1 sigma), target {args.target_axis_deg:g} deg {status}:")
    for name, s, su in zip(beams, plan.expected_std_deg, plan.uniform_std_deg):
        print(f"  {name:8s} {s:.5f} deg   (a near-uniform scan with as many rows per level: {su:.5f} deg)")
    print(f"continuous optimal design with the same base rows: {plan.bound_rows:.0f} rows "
          f"(with them, no design over the direction grid needs fewer than {plan.bound_rows_lower:.0f})")
    repeats = plan.n_rows - len(np.unique(plan.field_nT, axis=0))
    if repeats:
        print(f"{repeats} rows repeat a field vector of the plan: each copy is a separate measurement")
    print(f"coil path: {plan.path_nT:.0f} nT in all, largest step {plan.max_step_nT:.0f} nT")
    print(f"wrote {out}")
    print("note: check the field values against the coil driver's limits before running the scan")
    return 0
