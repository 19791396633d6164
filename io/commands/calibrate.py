"""`fieldvane calibrate`: fit a calibration from a scan recording and print a summary to check."""

from __future__ import annotations

import sys

DESCRIPTION = """Fit the sensor's response model from a calibration scan.

The scan is a recording CSV with the applied field columns bx_nT, by_nT, bz_nT (sensor frame):
a coil system or rotation stage steps the field over the sphere at one or several magnitudes.
Each pump's isotope is identified from f/|B|. Rows that cannot be used (non-finite or absurd
values, a frequency that disagrees with the applied field, wild outliers) are left out and named
by line. The fit finds the pump and probe axes with their uncertainty, each channel's gain, phase
and handedness at every magnitude, the other pump's leak into each channel, each pump's
efficiency versus the pump-field angle and the heading detuning, then smooth corrections whose
order is chosen by held-out residual. It also checks how well the model holds between the scanned
magnitudes. Output: CAL.json plus CAL.npz (same name) beside it; --plots adds quality figures.

example:
  fieldvane calibrate scan.csv -o cal.json --sensor sensor.toml --plots cal_plots
"""

MAX_FOLDS = 50


def add_arguments(parser) -> None:
    """Register calibrate's options."""
    from fieldvane.io.options import add_force, add_output_file

    parser.add_argument("scan", metavar="SCAN.csv",
                        help="calibration scan recording CSV with the applied field bx_nT, by_nT, bz_nT "
                             "(docs/recording_format.md)")
    add_output_file(parser, "CAL.json", "the calibration JSON (CAL.npz is written beside it)")
    parser.add_argument("--sensor", metavar="SENSOR.toml",
                        help="sensor TOML: names, nominal axes, mounting rotation (docs/config_files.md)")
    parser.add_argument("--cell", default=None, help="alkali of the cell (default Rb: 87Rb and 85Rb)")
    parser.add_argument("--max-degree", type=int, default=6,
                        help="highest spherical-harmonic degree tried for the corrections, -1..10 (default 6)")
    parser.add_argument("--folds", type=int, default=5,
                        help=f"folds for the held-out residual, 2..{MAX_FOLDS} (default 5)")
    parser.add_argument("--plots", metavar="DIR", help="folder for calibration quality figures (created if missing)")
    add_force(parser)


def check_options(args) -> None:
    """Raise InputError naming the option when a value is out of range."""
    from fieldvane.io.errors import InputError

    if not 2 <= args.folds <= MAX_FOLDS:
        raise InputError(f"must be a whole number from 2 to {MAX_FOLDS}, got {args.folds}", column="--folds")
    if not -1 <= args.max_degree <= 10:
        raise InputError(f"must be a whole number from -1 to 10, got {args.max_degree}", column="--max-degree")


def run(args) -> int:
    """Calibrate and print the summary; returns the exit code."""
    from fieldvane.io.outputs import check_output
    from fieldvane.io.sensorfile import read_sensor_file

    check_options(args)
    inputs = [args.scan, args.sensor]
    plots_dir = None
    if args.plots:
        plots_dir = check_output(args.plots, inputs=inputs + [args.output], force=args.force, option="--plots",
                                 folder=True)
    sensor = read_sensor_file(args.sensor) if args.sensor else None
    cal, block, out = calibrate_file(args.scan, args.output, sensor, args.cell, args.max_degree, args.folds,
                                     sensor_path=args.sensor, force=args.force)
    print(summary_text(cal, args.scan, len(block), block.skipped_rows, sensor))
    print(f"wrote {out} and {out.with_suffix('.npz').name}")
    if plots_dir is not None:
        from fieldvane.io.calibration_plots import write_calibration_plots

        written = write_calibration_plots(cal, block, plots_dir)
        if written:
            print(f"figures: {', '.join(str(p) for p in written)}")
    return 0


def calibrate_file(scan, output, sensor: dict | None = None, cell: str | None = None,
                   max_degree: int = 6, folds: int = 5, sensor_path: str | None = None, force: bool = False):
    """Fit a scan recording and write CAL.json + .npz; returns (Calibration, SampleBlock, JSON path).

    The overwrite rule: an existing output is refused unless force, an input never overwritten,
    and the JSON may not be named like its own tables (*.npz).
    """
    import numpy as np

    from fieldvane.estimator.calibration import CalibrationError, fit_calibration
    from fieldvane.io.calfile import save_calibration, tables_path
    from fieldvane.io.errors import InputError, JobError
    from fieldvane.io.estimation import scan_lockin
    from fieldvane.io.outputs import check_output, same_path
    from fieldvane.io.recording import read_recording

    inputs = [scan, sensor_path]
    npz = tables_path(output)
    if same_path(npz, output):
        raise InputError("the calibration JSON would be written over its own tables file (*.npz); "
                         "name the output *.json", str(output), column="--output")
    out = check_output(output, inputs=inputs, force=force, option="--output")
    check_output(npz, inputs=inputs, force=force, option="--output")
    block, warnings = read_recording(scan)
    for w in warnings:
        print(f"warning: {w}", file=sys.stderr)
    if block.applied_b_nT is None:
        raise InputError("a calibration scan needs the applied-field columns bx_nT, by_nT, bz_nT",
                         scan, 1, "bx_nT")
    b_vec = block.applied_b_nT
    with np.errstate(invalid="ignore", over="ignore"):
        b = np.linalg.norm(b_vec, axis=1)
    u = np.divide(b_vec, b[:, None], out=np.full_like(b_vec, np.nan), where=b[:, None] > 0)
    cell = cell or (sensor or {}).get("cell", "Rb")
    nominal_pumps = nominal_probes = None
    if sensor is not None:
        nominal_pumps = sensor["nominal_pumps"]
        nominal_probes = sensor["nominal_probes"]
        if nominal_probes.shape[0] != len(block.channels) // 2:
            raise InputError(f"sensor file describes {nominal_probes.shape[0]} probe(s) but the scan "
                             f"has {len(block.channels) // 2}", sensor_path, column="probes", kind="key")
    try:
        cal = fit_calibration(u, b, block.z, block.f, block.channels, nominal_pumps, nominal_probes,
                              max_correction_degree=max_degree, folds=folds, cell=cell,
                              line_numbers=getattr(block, "lines", None))
    except CalibrationError as exc:
        if exc.unusable:
            raise InputError(str(exc), scan) from None
        raise JobError(f"{scan}: {exc}") from None
    cal.scan_lockin = scan_lockin(block.metadata, str(scan))
    source = {"scan": str(scan), "rows": len(block), "skipped_rows": block.skipped_rows}
    return cal, block, save_calibration(cal, out, source=source, sensor=sensor)


def _axis(v) -> str:
    return "(" + ", ".join(f"{x:+.4f}" for x in v) + ")"


def summary_text(cal, scan_name, rows, skipped, sensor=None) -> str:
    """Return the human-readable calibration summary (axes with 1-sigma, residuals, rejected rows, magnitudes)."""
    import numpy as np

    from fieldvane.estimator.sphere import axis_angle_deg

    ph, m = cal.physics, cal.model
    lo, hi = cal.magnitude_range_nT
    lines = [f"scan {scan_name}: {rows} rows ({skipped} skipped), {ph.probe_axes.shape[0]} probe(s), "
             f"|B| {lo:.0f}..{hi:.0f} nT at {m.basis.size} magnitude knot(s)"]
    std = cal.direction_std_deg

    def sigma(i):
        return "" if std is None else f" +- {std[i]:.4f} deg"

    lines.append("pumps (axis +- 1 sigma: sqrt of the trace of its 2x2 covariance; the true axis lies within it "
                 "about 63 % of the time):")
    for j, pid in enumerate("ab"):
        extra = ""
        if cal.nominal_pump_axes is not None:
            extra = f"  {axis_angle_deg(ph.pump_axes[j], cal.nominal_pump_axes[j]):.2f} deg from nominal"
        eff = float(np.real(ph.efficiency[j, j]))
        lines.append(f"  {pid}  {cal.pump_isotopes[j]:5s} {cal.gammas_hz_per_nt[j]:.4f} Hz/nT  "
                     f"axis {_axis(ph.pump_axes[j])}{sigma(j)}{extra}  "
                     f"efficiency {100 * eff / (2 + eff):+.1f} % with the pump-field angle (+: higher along the pump)")
    lines.append(f"  angle between pumps: {axis_angle_deg(ph.pump_axes[0], ph.pump_axes[1]):.3f} deg")
    lines.append("probes:")
    for i in range(ph.probe_axes.shape[0]):
        extra = ""
        if cal.nominal_probe_axes is not None:
            extra = f"  {axis_angle_deg(ph.probe_axes[i], cal.nominal_probe_axes[i]):.2f} deg from nominal"
        lines.append(f"  {i + 1}  axis {_axis(ph.probe_axes[i])}{sigma(2 + i)}{extra}")
    lines.append("channels (held-out residual; leak: the other pump's signal, % of this channel's gain, at the "
                 "lowest and highest knot):")
    corr = cal.correction_rms_V if cal.correction_rms_V is not None else np.zeros(m.n_channels)
    for k, rep in enumerate(cal.channel_reports):
        g = np.abs(ph.gains[k])
        leak = 100 * np.abs(ph.leak[k]) / np.maximum(g, 1e-300)
        lines.append(f"  {rep.channel}  handedness {int(ph.handedness[k]):+d}  gain {g.min():.3g}..{g.max():.3g} V  "
                     f"noise {rep.noise_std:.3g} V  phase {rep.heldout_phase_deg:.3f} deg  "
                     f"amplitude {rep.heldout_amplitude_pct:.3f} %  leak {leak[0]:.2f}..{leak[-1]:.2f} %  "
                     f"corrections {corr[k] / rep.noise_std:.2f}x noise")
    terms = cal.fit_info.get("terms") or {}
    if terms:
        parts = ["gain and phase per knot"]
        parts.append("counter-rotating part, other pump's leak and offset per knot" if terms.get("full_linear")
                     else "no leak or counter-rotating part (not significant)")
        parts.append("pump efficiency vs angle" if terms.get("efficiency") else "no efficiency term")
        parts.append("heading detuning" if terms.get("detuning") else "no heading detuning (not significant)")
        parts.append(f"{terms.get('leak_terms', 0)} term(s) of the 1/|B| quadrature leak")
        lines.append("physics part: " + "; ".join(parts))
    scores = ", ".join(f"{'none' if d < 0 else d}: {s:.3g}" for d, s in sorted(cal.degree_scores.items()))
    chosen = "none (physics part only)" if cal.correction_degree < 0 else f"degree {cal.correction_degree}"
    lines.append(f"corrections: {chosen}; held-out RMS (V) by degree: {scores}")
    lines.append(f"sphere coverage: {cal.coverage_fraction:.0%} of 60 equal cells hold >= 3 samples")
    if cal.sparse_regions:
        regions = "; ".join(f"polar {p:.0f} az {a:.0f}" for p, a in cal.sparse_regions[:8])
        more = f" (+{len(cal.sparse_regions) - 8} more)" if len(cal.sparse_regions) > 8 else ""
        lines.append(f"  too sparse to trust near (deg): {regions}{more}")
    lines.extend(rejected_lines(cal.rejected_rows))
    lines.extend(magnitude_lines(cal))
    lines.extend(magnitude_model_lines(cal))
    for w in cal.warnings:
        lines.append(f"note: {w}")
    return "\n".join(lines)


def rejected_lines(rejected, listed: int = 10) -> list[str]:
    """Return summary lines naming rejected rows by file line (the first `listed`)."""
    if not rejected:
        return ["rejected rows: none"]
    out = [f"rejected rows: {len(rejected)} left out of the fit (all listed in the calibration file):"]
    for r in rejected[:listed]:
        ch = f", channel {r.channel}" if r.channel else ""
        out.append(f"  {r.where()}: {r.reason}{ch}: {r.detail}")
    if len(rejected) > listed:
        out.append(f"  ... and {len(rejected) - listed} more")
    return out


def magnitude_model_lines(cal) -> list[str]:
    """Return summary lines of the magnitude model: per isotope the residual and the size of each fitted effect."""
    mm = getattr(cal, "magnitude_model", None)
    if mm is None:
        return ["magnitude model: none (|B| is f / gamma, uncorrected)"]
    names = {"inverse": "exchange pull", "constant": "light shift", "square": "heading"}
    out = [f"magnitude model (frequency error f/gamma - |B| per isotope; mean and sphere RMS of each effect; "
           f"rows left out: {mm.rejected_rows[0]}, {mm.rejected_rows[1]}):"]
    for iso, res, deg, sizes in zip(mm.isotopes, mm.residual_nT(), mm.degrees, mm.effect_sizes()):
        parts = [f"{names.get(k, k)} {mean:+.3f} / {spread:.3f} nT at {b:.0f} nT"
                 for k, (mean, spread, b) in sizes.items()]
        out.append(f"  {iso:5s} residual {res:.2g} nT (degree {deg}); " + "; ".join(parts))
    return out


def magnitude_lines(cal) -> list[str]:
    """Return summary lines on the magnitude coverage: levels and where the model error exceeds the noise."""
    import numpy as np

    mc = cal.magnitude_check
    if mc is None:
        return []
    levels = ", ".join(f"{b:.0f}" for b in mc.levels_nT)
    kind = "levels" if mc.stepped else "knots of a continuous scan"
    out = [f"magnitudes: {kind} {levels} nT"]
    lo, hi = mc.levels_nT.min(), mc.levels_nT.max()
    if mc.levels_nT.size < 2:
        out.append("  one level only: the model holds near it (within 10 %) and is unknown elsewhere")
        return out
    grid = np.geomspace(lo, hi, 400)
    ratio = cal.model_error_ratio(grid).max(axis=1)
    weak = ratio > 1.0
    if not weak.any():
        out.append("  between the levels the expected model error stays below the noise (leave-one-level-out check)")
        return out
    edges = np.flatnonzero(np.diff(np.concatenate([[0], weak.astype(int), [0]])))
    for start, stop in zip(edges[::2], edges[1::2]):
        worst = float(np.sqrt(ratio[start:stop].max()))
        mid = float(grid[start + np.argmax(ratio[start:stop])])
        out.append(f"  {grid[start]:.0f}..{grid[stop - 1]:.0f} nT: model error up to {worst:.1f}x the noise "
                   f"(std) between levels; the tracker widens sigma there; a scan level near {mid:.0f} nT "
                   f"would remove it")
    return out
