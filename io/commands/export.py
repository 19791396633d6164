"""`fieldvane export`: estimates as IAGA-2002 files, or a capture's raw samples as a recording CSV."""

from __future__ import annotations

import sys

DESCRIPTION = """Write estimates in a data exchange format, or a raw capture as a recording CSV.

IAGA-2002 (the default --file-format): the field at the site as X, Y, Z (north, east, down) and F,
one file per UTC day, in the folder -o names (docs/geographic.md). Second values are the means of
the samples from 0.5 s before to 0.5 s after each second; minute values come from the second values
through the Gaussian filter INTERMAGNET recommends (91 values, centred on the minute), missing when
less than 90 % of its weight has data. Samples without a value (no attitude, no estimate) are
missing (99999.00), never invented; samples flagged NO_ESTIMATE, COASTING, BAD_INPUT or
COVARIANCE_FAULT are left out. The files are 'Provisional' data: not observatory-baselined values.

EST.csv must place its samples in UTC: a utc column, a '# start_utc:' line, or --start-utc (utc =
start_utc + t). --site gives the header (station name, IAGA code, position) and, when EST.csv lacks
the geographic columns X_nT..I_deg, computes them from ux, uy, uz, b_nT, sigma_deg with the mounting
of --sensor (else the estimates' '# mounting_rotation:' line, else none) and the site's attitude.

--raw CAPTURE: the raw samples of a capture folder or file (written by `run --capture`), decoded
exactly as the live run decoded them, as a recording CSV (docs/recording_format.md) whose metadata
gives the capture's source, its input format and start_utc (the host receive time of the first
sample's bytes minus its t, so utc = start_utc + t). Every run of the capture goes in, one after the
other, with a '# restart:' comment where a run begins or the sensor restarted; where the sensor's
clock started again, the rows after it have their t moved on by the host clock's difference (said in
the comment), so t keeps increasing and utc = start_utc + t holds throughout. `--run ID` writes one
run only. Status bits are not kept.

Not a navigation or safety instrument by itself. An existing output is refused unless --force; an
input is never overwritten.

examples:
  fieldvane export est.csv --site examples/pier/pier_site_angles.toml --interval minute -o iaga/
  fieldvane export est.csv --site site.toml --start-utc 2026-12-02T00:00:00Z -o iaga/
  fieldvane export --raw capture/ -o rec.csv
"""

FORMATS = ("iaga2002",)
INTERVALS = {"second": (1,), "minute": (60,), "both": (1, 60)}
BLOCK_ROWS = 65536


def add_arguments(parser) -> None:
    """Register export's options."""
    from fieldvane.io.options import add_site_option, add_start_utc_option
    from fieldvane.io.options import add_force, add_input_format, add_renamed

    parser.add_argument("estimates", nargs="?", metavar="EST.csv",
                        help="estimates CSV to export (docs/estimates_columns.md); not with --raw")
    parser.add_argument("-o", "--output", required=True, metavar="DIR",
                        help="folder for the IAGA-2002 files (created if missing); with --raw, the recording "
                             "CSV file to write")
    parser.add_argument("--file-format", choices=FORMATS, default="iaga2002",
                        help="exchange format of the estimates (default iaga2002, the only one so far)")
    # `--format iaga2002` reads naturally here; elsewhere --format is an old spelling of a stream's
    # format, so it stays a hidden alias that names its new spelling.
    add_renamed(parser, "--format", "--file-format", "file_format", choices=FORMATS)
    parser.add_argument("--interval", choices=tuple(INTERVALS), default="both",
                        help="one-second values, one-minute values, or both (default both)")
    add_site_option(parser)
    add_start_utc_option(parser, "the estimates' utc column or '# start_utc:' line")
    parser.add_argument("--sensor", metavar="SENSOR.toml",
                        help="sensor TOML whose [mounting] turns the sensor frame to the platform's, when the "
                             "geographic columns are computed here (default: the estimates' mounting line)")
    parser.add_argument("--source", metavar="TEXT",
                        help="IAGA-2002 'Source of Data', at most 45 ASCII characters (default: the site's "
                             "institute)")
    parser.add_argument("--raw", metavar="CAPTURE",
                        help="capture folder or file: write its raw samples as a recording CSV instead")
    parser.add_argument("--run", metavar="ID", dest="run_id",
                        help="with --raw: only this run of the capture (default: every run, restarts noted)")
    add_input_format(parser, None, "with --raw, a capture's format when it does not record it")
    add_force(parser)


def run(args) -> int:
    """Export; returns the exit code."""
    from fieldvane.io.errors import InputError

    if args.raw is not None:
        if args.estimates is not None:
            raise InputError("give EST.csv or --raw CAPTURE, not both", args.estimates, column="--raw")
        for option, value in (("--site", args.site), ("--start-utc", args.start_utc), ("--sensor", args.sensor),
                              ("--source", args.source)):
            if value is not None:
                raise InputError("applies to estimates, not to --raw", column=option)
        return export_raw(args)
    if args.estimates is None:
        raise InputError("give an estimates CSV to export (or --raw CAPTURE)", column="EST.csv")
    if args.run_id is not None:
        raise InputError("only with --raw", column="--run")
    return export_iaga2002(args)


# ------------------------------------------------------------------------------------ IAGA-2002

def export_iaga2002(args) -> int:
    """Write the IAGA-2002 second and/or minute files of an estimates CSV; returns 0."""
    from pathlib import Path

    import numpy as np

    from fieldvane.io import iaga2002
    from fieldvane.io.errors import InputError
    from fieldvane.io.estimates_csv import read_estimates
    from fieldvane.io.geo_output import CAUTION, estimates_time_and_site, unusable
    from fieldvane.io.outputs import check_output
    from fieldvane.io.sitefile import format_utc, read_mounting, read_site_file

    if args.site is None:
        raise InputError("IAGA-2002 files need the site (station name, IAGA code, position): give --site "
                         "SITE.toml", column="--site")
    if not Path(args.estimates).is_file():
        raise InputError("no such file", args.estimates)
    site = read_site_file(args.site)
    inputs = [args.estimates, args.site, args.sensor]
    if site.attitude.kind == "file":
        inputs.append(site.attitude.source)
    check_output(args.output, folder=True, force=True, option="--output")     # a file there: refused
    mounting = read_mounting(args.sensor) if args.sensor else None
    est = read_estimates(args.estimates)
    if est["t"].size == 0:
        raise InputError("no estimates in the file", args.estimates)
    utc, cols, geo, how = estimates_time_and_site(est, args.estimates, site, args.start_utc, mounting,
                                                  f"the [mounting] of {args.sensor}")
    if utc is None:
        raise InputError("the estimates have no utc column and no '# start_utc:' line: give --start-utc "
                         "(ISO 8601 UTC of t = 0)", args.estimates, column="--start-utc")
    bad = unusable(est["flags"])
    xyzf = np.column_stack([cols["X_nT"], cols["Y_nT"], cols["Z_nT"], cols["F_nT"]])
    xyzf[bad] = np.nan
    usable = np.isfinite(utc) & np.all(np.isfinite(xyzf), axis=1)
    if not np.any(usable):
        raise InputError("no sample has both a UTC time and the geographic values (attitude outside its "
                         "file's span, or every sample flagged)", args.estimates)
    dt = np.diff(est["t"])
    dt = dt[np.isfinite(dt) & (dt > 0)]
    sampling = float(np.median(dt)) if dt.size else 1.0
    files = []
    for interval in INTERVALS[args.interval]:
        times, values = iaga2002.xyzf_series(utc[usable], xyzf[usable], interval)
        if times.size == 0 or not np.any(np.isfinite(values)):
            print(f"fieldvane export: note: no {('one-second', 'one-minute')[interval == 60]} value can be "
                  "made (a minute needs data over 90 % of its filter's weight, about 80 s around it)",
                  file=sys.stderr)
            continue
        header = iaga2002.header_from_site(site, round(sampling, 6), interval, source=args.source)
        files += iaga2002.day_files(header, interval, times, values)
    if not files:
        raise InputError("nothing to write: the estimates are too short for the interval asked for",
                         args.estimates, column="--interval")
    paths = iaga2002.write_files(args.output, files, force=args.force, inputs=inputs, option="--output")
    first, last = float(np.nanmin(utc[usable])), float(np.nanmax(utc[usable]))
    print(f"export: {int(usable.sum())} of {usable.size} samples ({format_utc(first, 3)} to "
          f"{format_utc(last, 3)}), values {how}; {int(bad.sum())} flagged samples left out")
    print(f"site {site.name} ({site.iaga_code}); sampling {sampling:g} s; data type Provisional")
    for path, (_, text) in zip(paths, files):
        print(f"  {path}  ({text.count(chr(10)) - _header_lines(text)} data records)")
    print(f"note: {CAUTION}", file=sys.stderr)
    return 0


def _header_lines(text: str) -> int:
    """Return the number of header, comment and data-header records of an IAGA-2002 text."""
    n = 0
    for line in text.split("\n"):
        n += 1
        if line.startswith("DATE "):
            return n
    return n


# ------------------------------------------------------------------------------------ raw capture

def export_raw(args) -> int:
    """Write a capture's samples (decoded as live) as a recording CSV; returns 0."""
    import math
    from collections import deque
    from pathlib import Path

    from fieldvane import __version__
    from fieldvane.io.capture import capture_files
    from fieldvane.io.errors import InputError, JobError
    from fieldvane.io.live import capture_problem_lines, runs_from_capture
    from fieldvane.io.outputs import atomic_file, check_output
    from fieldvane.io.sitefile import format_utc

    if not Path(args.raw).exists():
        raise InputError("no such capture file or folder", args.raw, column="--raw")
    out = check_output(args.output, inputs=[args.raw], force=args.force, option="--output")
    warnings: list[str] = []
    infos = capture_files(args.raw, warnings)
    runs = list(dict.fromkeys(i.run_id for i in infos))
    if args.run_id is not None and args.run_id not in runs:
        raise InputError(f"no run {args.run_id!r} in this capture (runs: {', '.join(runs)})", args.raw,
                         column="--run")
    first_meta = next(i.metadata for i in infos if args.run_id is None or i.run_id == args.run_id)
    fmt = args.input_format or first_meta.get("input_format")
    counters: dict = {}
    capture_counters: dict = {}
    host_ns: deque = deque()          # receive time (ns) of the chunk that completed each sample
    channels: tuple[str, ...] | None = None
    rows = dropped_values = with_status = 0
    run_lines: list[str] = []
    first_start = None                # start_utc of the file: the first sample's receive time minus its t
    shift = 0.0                       # s added to t after a restart, so that t increases and utc = start_utc + t
    last_t = -math.inf
    try:
        with atomic_file(out) as tmp, open(tmp, "w", encoding="utf-8", newline="\n") as fh:
            for k, (run_id, samples) in enumerate(runs_from_capture(
                    args.raw, args.input_format, run_id=args.run_id, counters=counters,
                    capture_counters=capture_counters, warnings=warnings, host_times=host_ns)):
                new_run = True
                block: list = []
                for sample in samples:
                    host = host_ns.popleft()
                    start_here = host * 1e-9 - float(sample.t)
                    if first_start is None:
                        first_start = start_here
                        channels = tuple(sample.channels)
                        meta = {"source": first_meta.get("source", "unknown"), "input_format": fmt or "unknown",
                                "capture": str(args.raw),
                                "capture_run": run_id if args.run_id is not None else f"{run_id} (first of {len(runs)})",
                                "start_utc": format_utc(first_start, 6),
                                "start_utc_source": "host receive time of the first sample's bytes minus its t "
                                                    "(host clock)",
                                "written_by": f"fieldvane {__version__} export --raw"}
                        fh.writelines(f"# {key}: {value}\n" for key, value in meta.items())
                        names = ["t", "f_a", "f_b"] + [f"{c}_{ch}" for ch in channels for c in ("x", "y")]
                        fh.write(",".join(names) + "\n")
                        run_lines.append(f"  run {run_id}: start_utc {format_utc(first_start, 3)}")
                    elif new_run or sample.restarted:
                        fh.write(_flush(block, channels, shift))
                        block = []
                        what = f"capture run {run_id} begins here" if new_run else "the sensor restarted here"
                        if float(sample.t) + shift <= last_t:      # its clock started again: move it on
                            shift = start_here - first_start
                            fh.write(f"# restart: {what}; its t is moved by {shift:+.6f} s (start_utc "
                                     f"{format_utc(start_here, 6)}), so t increases and utc = start_utc + t\n")
                        else:
                            fh.write(f"# restart: {what}; its clock runs on\n")
                        if new_run:
                            run_lines.append(f"  run {run_id}: start_utc {format_utc(start_here, 3)}"
                                             + (f", t moved by {shift:+.3f} s" if shift else ""))
                    new_run = False
                    last_t = float(sample.t) + shift
                    if sample.status:
                        with_status += 1
                    dropped_values += sum(1 for ch in sample.channels if ch not in channels)
                    block.append(sample)
                    rows += 1
                    if len(block) >= BLOCK_ROWS:
                        fh.write(_flush(block, channels, shift))
                        block = []
                fh.write(_flush(block, channels, shift))
            if first_start is None:
                raise InputError("the capture holds no complete sample", args.raw, column="--raw")
    except OSError as exc:
        raise JobError(f"cannot write {out}: {exc.strerror}") from None
    for line in capture_problem_lines(capture_counters, warnings):
        print(line, file=sys.stderr)
    print(f"export: {rows} samples of {len(run_lines)} run(s) -> {out} ({', '.join(channels or ())})")
    for line in run_lines:
        print(line)
    if with_status:
        print(f"note: {with_status} samples carried status bits, which a recording CSV does not keep",
              file=sys.stderr)
    if dropped_values:
        print(f"warning: {dropped_values} channel values of samples with more channels than the first "
              "were left out", file=sys.stderr)
    return 0


def _flush(samples, channels, shift: float = 0.0) -> str:
    """Return the recording CSV rows (float repr, lossless) of samples in the header's channel order, t + shift."""
    import numpy as np

    from fieldvane.io.float_text import format_rows

    if not samples:
        return ""
    n = len(samples)
    t = np.array([float(s.t) for s in samples])
    cols = [t + shift if shift else t, np.array([float(s.f_a) for s in samples]),
            np.array([float(s.f_b) for s in samples])]
    z = np.full((n, len(channels)), complex(np.nan, np.nan))
    for i, s in enumerate(samples):
        values = np.asarray(s.z, complex)
        for j, ch in enumerate(s.channels):
            if ch in channels:
                z[i, channels.index(ch)] = values[j]
    for j in range(len(channels)):
        cols += [np.ascontiguousarray(z[:, j].real), np.ascontiguousarray(z[:, j].imag)]
    return bytes(format_rows(cols)).decode("ascii")
