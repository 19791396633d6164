"""`fieldvane report`: pictures and a short summary of an estimates CSV, for the logbook."""

from __future__ import annotations

import math
import sys

DESCRIPTION = """Turn an estimates CSV (from replay, run or the CSV logger) into a report folder.

Writes summary.md (a table of the numbers, links to the figures) and PNG figures: the track on
two equal-area hemispheres, the direction components, sigma_deg (with the error against truth),
the NIS with its 95% chi-square band, a flags timeline, and the magnitude from each isotope with
their ratio (a quantity constant within float resolution is stated, not drawn). The numbers are
also printed.

For the longest static stretch (still in the truth when --truth is given, else in the estimates;
or the one --static names) the report adds the overlapping Allan deviation (NIST SP 1065) of the
direction (deg) and of |B| (nT), their Welch noise spectra (deg/sqrt(Hz), nT/sqrt(Hz)) and the
white-noise levels.

With --truth (a simulator recording with true_ux, true_uy, true_uz, true_b_nT) each estimate is
matched to the nearest truth sample within half a truth sample period; the report adds the RMS
and 95th-percentile angle to truth, the share of samples within 1 and 2 sigma_deg (a consistent
filter gives about 63% and 98%), and the magnitude error.

With --site SITE.toml (docs/geographic.md) the report adds a geographic check: the run's mean
declination D, inclination I and total field F at the site, with their uncertainties, against the
IGRF main field at the site and date (the 'geo' extra: ppigrf), the differences printed and drawn
(geographic.png). The estimates' own geographic columns are used when they have them, else they are
computed from ux, uy, uz (mounting from --sensor or the estimates' '# mounting_rotation:' line); the
date comes from their utc column, their '# start_utc:' line or --start-utc. A first sanity check of
an installation against a main-field model, not a survey.

The figures need matplotlib (the 'plots' extra); without it, or with --no-plots, summary.md is
still written. The estimates columns: docs/estimates_columns.md.
The output is not a safety or navigation instrument by itself.

example:
  fieldvane report est.csv --truth rec.csv -o report/
"""


def add_arguments(parser) -> None:
    """Register report's options."""
    parser.add_argument("estimates", metavar="EST.csv", help="estimates CSV to report on (docs/estimates_columns.md)")
    parser.add_argument("--truth", metavar="REC.csv",
                        help="simulator recording with the true_* columns, to score against")
    from fieldvane.io.options import add_force, add_no_plots, add_output_dir

    add_output_dir(parser, "summary.md and the PNG figures")
    add_force(parser)
    add_no_plots(parser)
    parser.add_argument("--static", default=None, metavar="START:END",
                        help="time window (s, in the file's t column) of a static stretch for the Allan "
                             "deviation and noise spectrum (default: the longest still stretch found)")
    parser.add_argument("--channels", type=int, default=None, metavar="N",
                        help="lock-in channels (NIS degrees of freedom = 2 N) when the file has no "
                             "nis_dof column (default: from the phase_* columns, else 4)")
    from fieldvane.io.options import add_site_option, add_start_utc_option

    add_site_option(parser)
    add_start_utc_option(parser, "the estimates' utc column or '# start_utc:' line")
    parser.add_argument("--sensor", metavar="SENSOR.toml",
                        help="sensor TOML whose [mounting] turns the sensor frame to the platform's, when the "
                             "geographic columns are computed here (default: the estimates' mounting line)")


def run(args) -> int:
    """Write the report, print the numbers and the files; returns the exit code."""
    from pathlib import Path

    from fieldvane.io.errors import InputError
    from fieldvane.io.outputs import atomic_folder, check_folder_outputs, check_output
    from fieldvane.io.report import make_report, summary_text

    check_output(args.output, folder=True, force=True, option="--output")   # a file there: refused
    inputs = [args.estimates, args.truth, args.site, args.sensor]
    check_output(Path(args.output) / "summary.md", inputs=inputs, force=args.force, option="--output")
    site = mounting = None
    if args.site is not None:
        from fieldvane.io.sitefile import read_mounting, read_site_file

        site = read_site_file(args.site)
        mounting = read_mounting(args.sensor) if args.sensor else None
    if args.channels is not None and not 1 <= args.channels <= 64:
        raise InputError(f"--channels must be between 1 and 64, got {args.channels}")
    static = None
    if args.static is not None:
        start, sep, end = args.static.partition(":")
        try:
            static = (float(start), float(end))
        except ValueError:
            static = None
        if not sep or static is None or not all(map(math.isfinite, static)) or not static[0] < static[1]:
            raise InputError(f"--static expects START:END in seconds with START < END, got {args.static!r}")
    # Written to a temporary folder; each file must be new (or --force), never an input.
    with atomic_folder(args.output) as tmp:
        out = make_report(args.estimates, args.truth, tmp, channels=args.channels, static=static,
                          figures=not args.no_plots)
        geo_check = None
        if site is not None:                # appended to summary.md, with its own figure
            from fieldvane.io.geo_report import geographic_check

            geo_check = geographic_check(args.estimates, site, tmp, args.start_utc, mounting,
                                         f"the [mounting] of {args.sensor}", figures=not args.no_plots)
            with open(Path(tmp) / "summary.md", "a", encoding="utf-8") as fh:
                fh.write("\n" + geo_check.markdown)
            if geo_check.figure is not None:
                out.files.append(geo_check.figure)
            out.notes.extend(geo_check.notes)
        check_folder_outputs(tmp, args.output, inputs=inputs, force=args.force, option="--output")
    out.files[:] = [Path(args.output) / Path(p).relative_to(tmp) for p in out.files]
    for note in out.notes:
        print(f"note: {note}", file=sys.stderr)
    print(summary_text(out.summary))
    if geo_check is not None:
        print("\n".join(geo_check.lines))
    print("wrote:")
    for path in out.files:
        print(f"  {path}")
    if out.figures_skipped and not args.no_plots:
        print(f"fieldvane report: figures not drawn: {out.figures_skipped}", file=sys.stderr)
    return 0
