"""`fieldvane calibrate`: fit a calibration from a scan recording and print a summary to check."""

from __future__ import annotations

import sys

DESCRIPTION = """Fit the sensor's response model from a calibration scan.

The scan is a recording CSV with the applied field columns bx_nT, by_nT, bz_nT (sensor frame):
a coil system or rotation stage steps the field over the sphere at one or several magnitudes.
Each pump's isotope is identified from f/|B|. The fit finds the pump and probe axes, each
channel's gain, phase offset and handedness at every magnitude, and smooth corrections whose
order is chosen by held-out residual. Output: CAL.json plus CAL.npz (same name) beside it.

example:
  fieldvane calibrate scan.csv -o cal.json --sensor sensor.toml
"""


def add_arguments(parser) -> None:
    """Register calibrate's options."""
    parser.add_argument("scan", help="calibration scan recording CSV (with bx_nT, by_nT, bz_nT)")
    parser.add_argument("-o", "--output", required=True, help="calibration JSON to write (CAL.npz is written beside it)")
    parser.add_argument("--sensor", help="sensor TOML: names, nominal axes, mounting rotation")
    parser.add_argument("--cell", default=None, help="alkali of the cell (default Rb: 87Rb and 85Rb)")
    parser.add_argument("--max-degree", type=int, default=6,
                        help="highest spherical-harmonic degree tried for the corrections (default 6)")
    parser.add_argument("--folds", type=int, default=5, help="folds for the held-out residual (default 5)")


def run(args) -> int:
    """Calibrate and print the summary; returns the exit code."""
    from fieldvane.io.sensorfile import read_sensor_file

    sensor = read_sensor_file(args.sensor) if args.sensor else None
    cal, block, out = calibrate_file(args.scan, args.output, sensor, args.cell, args.max_degree, args.folds,
                                     sensor_path=args.sensor)
    print(summary_text(cal, args.scan, len(block), block.skipped_rows, sensor))
    print(f"wrote {out} and {out.with_suffix('.npz').name}")
    return 0


def calibrate_file(scan, output, sensor: dict | None = None, cell: str | None = None,
                   max_degree: int = 6, folds: int = 5, sensor_path: str | None = None):
    """Fit a scan recording and write CAL.json + .npz; returns (Calibration, SampleBlock, JSON path)."""
    import numpy as np

    from fieldvane.estimator.calibration import CalibrationError, fit_calibration
    from fieldvane.io.calfile import save_calibration
    from fieldvane.io.errors import InputError
    from fieldvane.io.recording import read_recording

    block, warnings = read_recording(scan)
    for w in warnings:
        print(f"warning: {w}", file=sys.stderr)
    if block.applied_b_nT is None:
        raise InputError("a calibration scan needs the applied-field columns bx_nT, by_nT, bz_nT",
                         scan, 1, "bx_nT")
    b_vec = block.applied_b_nT
    b = np.linalg.norm(b_vec, axis=1)
    if np.any(b <= 0):
        line = int(np.argmax(b <= 0))
        raise InputError(f"applied field is zero in data row {line + 1}", scan, column="bx_nT")
    cell = cell or (sensor or {}).get("cell", "Rb")
    nominal_pumps = nominal_probes = None
    if sensor is not None:
        nominal_pumps = sensor["nominal_pumps"]
        nominal_probes = sensor["nominal_probes"]
        if nominal_probes.shape[0] != len(block.channels) // 2:
            raise InputError(f"sensor file describes {nominal_probes.shape[0]} probe(s) but the scan "
                             f"has {len(block.channels) // 2}", sensor_path, column="probes")
    try:
        cal = fit_calibration(b_vec / b[:, None], b, block.z, block.f, block.channels,
                              nominal_pumps, nominal_probes, max_correction_degree=max_degree,
                              folds=folds, cell=cell)
    except CalibrationError as exc:
        raise InputError(str(exc), scan) from None
    source = {"scan": str(scan), "rows": len(block), "skipped_rows": block.skipped_rows}
    return cal, block, save_calibration(cal, output, source=source, sensor=sensor)


def summary_text(cal, scan_name, rows, skipped, sensor=None) -> str:
    """Return the human-readable calibration summary (axes, residuals, coverage)."""
    import numpy as np

    from fieldvane.estimator.sphere import axis_angle_deg

    ph, m = cal.physics, cal.model
    lo, hi = cal.magnitude_range_nT
    lines = [f"scan {scan_name}: {rows} rows ({skipped} skipped), {ph.probe_axes.shape[0]} probe(s), "
             f"|B| {lo:.0f}..{hi:.0f} nT at {m.basis.size} magnitude knot(s)"]

    def axis(v):
        return "(" + ", ".join(f"{x:+.4f}" for x in v) + ")"

    lines.append("pumps:")
    for j, pid in enumerate("ab"):
        extra = ""
        if cal.nominal_pump_axes is not None:
            extra = f"  {axis_angle_deg(ph.pump_axes[j], cal.nominal_pump_axes[j]):.2f} deg from nominal"
        lines.append(f"  {pid}  {cal.pump_isotopes[j]:5s} {cal.gammas_hz_per_nt[j]:.4f} Hz/nT  "
                     f"axis {axis(ph.pump_axes[j])}{extra}")
    lines.append(f"  angle between pumps: {axis_angle_deg(ph.pump_axes[0], ph.pump_axes[1]):.3f} deg")
    lines.append("probes:")
    for i in range(ph.probe_axes.shape[0]):
        extra = ""
        if cal.nominal_probe_axes is not None:
            extra = f"  {axis_angle_deg(ph.probe_axes[i], cal.nominal_probe_axes[i]):.2f} deg from nominal"
        lines.append(f"  {i + 1}  axis {axis(ph.probe_axes[i])}{extra}")
    lines.append("channels (held-out residual):")
    for k, rep in enumerate(cal.channel_reports):
        g = np.abs(ph.gains[k])
        lines.append(f"  {rep.channel}  handedness {int(ph.handedness[k]):+d}  gain {g.min():.3g}..{g.max():.3g} V  "
                     f"noise {rep.noise_std:.3g} V  phase {rep.heldout_phase_deg:.3f} deg  "
                     f"amplitude {rep.heldout_amplitude_pct:.3f} %")
    scores = ", ".join(f"{'none' if d < 0 else d}: {s:.3g}" for d, s in sorted(cal.degree_scores.items()))
    chosen = "none (physics part only)" if cal.correction_degree < 0 else f"degree {cal.correction_degree}"
    lines.append(f"corrections: {chosen}; held-out RMS (V) by degree: {scores}")
    lines.append(f"sphere coverage: {cal.coverage_fraction:.0%} of 60 equal cells hold >= 3 samples")
    if cal.sparse_regions:
        regions = "; ".join(f"polar {p:.0f} az {a:.0f}" for p, a in cal.sparse_regions[:8])
        more = f" (+{len(cal.sparse_regions) - 8} more)" if len(cal.sparse_regions) > 8 else ""
        lines.append(f"  too sparse to trust near (deg): {regions}{more}")
    for w in cal.warnings:
        lines.append(f"note: {w}")
    return "\n".join(lines)
