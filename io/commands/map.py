"""`fieldvane map`: the Cramer-Rao bound on the field direction over the sphere, for a calibration."""

from __future__ import annotations

import math
import sys

DESCRIPTION = """\
Map the Cramer-Rao bound on the field direction of one sample over the whole sphere, from a
calibration's response model and its lock-in noise. Writes, per probe set, a CSV
(polar_deg, azimuth_deg, ux, uy, uz, bound_deg, blind) and a PNG on two equal-area (Lambert
azimuthal) hemispheres with the pump and probe axes and the blind region marked, and prints the
median, 95th percentile, blind limit and blind share of the sphere. A direction is blind where its
bound exceeds --blind-factor (5) times the sphere median: the same rule as the tracker's BLIND flag.

With --gain-free each probe's overall gain is treated as unknown, so only amplitude ratios and
phases inform the direction (the bound for a sensor whose probe power drifts)."""

PROBE_CHOICES = ("1", "2", "both")


def add_arguments(parser) -> None:
    """Register this command's options on its argparse sub-parser."""
    from fieldvane.io.options import add_calibration, add_force, add_no_plots, add_output_dir

    add_calibration(parser)
    parser.add_argument("--noise", type=float, default=None, metavar="V",
                        help="lock-in noise std of X and of Y per channel, volts "
                             "(default: each channel's calibrated noise)")
    parser.add_argument("--b-nt", dest="b_nT", type=float, default=None, metavar="NT",
                        help="field magnitude in nT (default: middle of the calibrated range; "
                             "--b-nT works too)")
    parser.add_argument("--probes", choices=PROBE_CHOICES, default=None,
                        help="probe set to map (default: each probe alone and both together)")
    parser.add_argument("--gain-free", action="store_true",
                        help="treat each probe's gain as unknown (amplitude ratios only)")
    parser.add_argument("--points", type=int, default=4000, metavar="N",
                        help="directions in the CSV and the summary (near-uniform grid; default 4000)")
    parser.add_argument("--blind-factor", type=float, default=5.0, metavar="F",
                        help="a direction is blind where its bound exceeds F times the sphere median "
                             "(default 5)")
    parser.add_argument("--rate-hz", type=float, default=None, metavar="HZ",
                        help="sample rate the calibrated noise refers to, stated on the map "
                             "(default: the calibration's, when it records one)")
    add_no_plots(parser)
    add_output_dir(parser, "the map files (bound_*.csv, bound_*.png)", default=".", default_text="the current folder")
    add_force(parser)


def _check(args) -> None:
    from fieldvane.io.errors import InputError

    if args.noise is not None and not (math.isfinite(args.noise) and args.noise > 0):
        raise InputError(f"--noise must be a positive voltage, got {args.noise}")
    if args.b_nT is not None and not (math.isfinite(args.b_nT) and args.b_nT > 0):
        raise InputError(f"--b-nt must be a positive magnitude in nT, got {args.b_nT}")
    if args.points < 20:
        raise InputError(f"--points must be at least 20, got {args.points}")
    if not (math.isfinite(args.blind_factor) and args.blind_factor > 1):
        raise InputError(f"--blind-factor must be a number above 1, got {args.blind_factor}")
    if args.rate_hz is not None and not (math.isfinite(args.rate_hz) and args.rate_hz > 0):
        raise InputError(f"--rate-hz must be a positive sample rate in Hz, got {args.rate_hz}")


def run(args) -> int:
    """Run the command; returns the exit code."""
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.crlb_map import make_map, summary_lines
    from pathlib import Path

    from fieldvane.io.errors import InputError, JobError
    from fieldvane.io.outputs import atomic_folder, check_folder_outputs, check_output

    _check(args)
    check_output(args.output, folder=True, force=True, option="--output")   # a file there: refused
    plt = None
    if not args.no_plots:
        try:
            import matplotlib
            matplotlib.use("Agg")
            import matplotlib.pyplot as plt
        except ImportError:
            raise JobError("the PNG map needs matplotlib: install it with "
                           "`pip install 'fieldvane[plots]'`, or pass --no-plots for the CSV only") from None
    cal = load_calibration(args.calibration)
    lo, hi = cal.magnitude_range_nT
    if args.b_nT is not None and not (0.9 * lo <= args.b_nT <= 1.1 * hi):
        print(f"fieldvane map: warning: --b-nt {args.b_nT:g} lies outside the calibrated range "
              f"{lo:.0f}..{hi:.0f} nT; the model is extrapolated", file=sys.stderr)
    cal_path = Path(args.calibration)
    try:
        # Written to a temporary folder; each file must be new (or --force), never an input.
        with atomic_folder(args.output) as tmp:
            maps, files, b = make_map(cal, tmp, b_nT=args.b_nT, noise_std=args.noise,
                                      probes=args.probes, gain_free=args.gain_free, n_points=args.points,
                                      plt=plt, blind_factor=args.blind_factor,
                                      rate_hz=args.rate_hz)
            check_folder_outputs(tmp, args.output, inputs=[cal_path, cal_path.with_suffix(".npz")],
                                 force=args.force, option="--output")
        files = [Path(args.output) / Path(f).relative_to(tmp) for f in files]
    except ValueError as exc:
        raise InputError(str(exc), path=args.calibration) from None
    noise = "calibrated per channel" if args.noise is None else f"{args.noise:g} V"
    print(f"Cramer-Rao bound over the sphere at |B| = {b:.0f} nT, noise {noise}"
          f"{', gain-free' if args.gain_free else ''} ({args.points} directions)")
    for line in summary_lines(maps):
        print("  " + line)
    for f in files:
        print(f"wrote {f}")
    return 0
