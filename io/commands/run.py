"""`fieldvane run`: the live loop — serial in, estimates out to loggers, every raw byte captured."""

from __future__ import annotations

import sys
import threading

DESCRIPTION = """Read the sensor electronics on a serial port, track the field direction, and stream
the estimates to one or more loggers, keeping every received byte in a capture folder.

PORT is a device (/dev/ttyUSB0, COM3), a pty path, or a pyserial URL (socket://127.0.0.1:7000,
loop://). --input-format binary reads the frames of docs/wire_format.md; --input-format csv reads
recording-CSV lines (docs/recording_format.md; header first, or --columns). The link reconnects
by itself when the port vanishes. A slow or absent logger never stalls reading or estimation:
its records are dropped and counted.

--out SINK (repeatable; without it no estimates are written, only the capture is kept):
  est.csv | est.jsonl | est.nmea          a new file in that format (never overwritten)
  FORMAT:stdout | FORMAT:file:PATH        FORMAT is csv, jsonl or nmea
  FORMAT:tcp:PORT | FORMAT:tcp:HOST:PORT  a TCP server for loggers (127.0.0.1 unless HOST given)
  FORMAT:udp:HOST:PORT                    datagrams
  FORMAT:serial:DEVICE:BAUD               a serial port
  (full grammar: docs/sinks.md; the estimates columns: docs/estimates_columns.md)

A status line on stderr shows the latest estimate (t, direction u in the sensor frame, |B|,
sigma, flags by name) and the link (frames, CRC errors, missing frames, capture size, bytes
lost); on a terminal it is rewritten in place, otherwise written as a plain line every
--log-interval seconds. `kill -USR1 PID` prints the counters as a table at any time; they are
printed at the end too.

Every byte read goes to the --capture folder first, through its own buffer and writer: if the
disk is full or too slow the run says so at once, counts exactly what was lost and ends with
exit 4. An existing --out file is refused unless --force; --out never replaces an input.

Stop with Ctrl-C or SIGTERM: within about 1.5 s every sink is flushed and the final counters
printed (exit 130); samples not estimated by then are in the capture (replay it). A second
Ctrl-C abandons the capture's last writes too. Exit 3 when the port never opened within
--link-timeout; exit 4 when raw bytes were lost or the capture could not be closed; exit 1 when a
logger's file or stream failed or did not finish writing.

Every estimate carries utc: the host clock's receive time of the bytes that completed its frame
(POSIX seconds in records, ISO 8601 in CSV and JSON lines, hhmmss.sss in NMEA; as good as the host
clock plus the link's delay, a few ms to tens of ms). --site SITE.toml adds the field at the site in
north-east-down (X_nT, Y_nT, Z_nT, H_nT, F_nT, D_deg, I_deg and their sigmas; docs/geographic.md),
turned through the calibration's mounting and the site's attitude at each estimate's time.

Not a safety or navigation instrument by itself: check the flags and sigma_deg.

example:
  fieldvane run --port /dev/ttyUSB0 -c cal.json --out est.csv --out nmea:tcp:10110 --capture capture/
"""


def add_arguments(parser) -> None:
    """Register run's options."""
    from fieldvane.io.options import add_calibration, add_force, add_input_format

    parser.add_argument("--port", required=True, help="serial device, pty path or pyserial URL")
    parser.add_argument("--baud", type=int, default=115200, help="baud rate (default 115200)")
    add_input_format(parser, "binary", "what the port sends (default binary)")
    parser.add_argument("--columns", help="comma-separated CSV column names when the stream has no header line")
    add_calibration(parser)
    parser.add_argument("--filter", metavar="FILTER.toml",
                        help="filter settings TOML (docs/config_files.md); defaults otherwise")
    parser.add_argument("--out", action="append", default=[], metavar="SINK",
                        help="logger output (repeatable; see above and docs/sinks.md)")
    parser.add_argument("--capture", metavar="DIR", help="folder for the raw capture (strongly advised)")
    parser.add_argument("--capture-file-mib", type=float, default=64.0,
                        help="rotate capture files at this size (default 64 MiB, at least 1)")
    parser.add_argument("--capture-buffer-mib", type=float, default=64.0,
                        help="memory that absorbs a slow disk before raw bytes are lost (default 64 MiB)")
    add_force(parser)
    parser.add_argument("--readouts", action="store_true",
                        help="add demodulated phases (deg) and amplitude ratios as extra columns")
    parser.add_argument("--log-interval", type=float, default=10.0, metavar="S",
                        help="seconds between status lines when stderr is not a terminal (default 10, at least 1)")
    parser.add_argument("--no-status", action="store_true",
                        help="no status line (messages and the final counters are still printed)")
    parser.add_argument("--link-timeout", type=float, default=30.0, metavar="S",
                        help="give up (exit 3) if the port never opens within this many seconds (default 30)")
    from fieldvane.io.options import add_site_option

    add_site_option(parser)


def _check_number(value, option: str, low: float, high: float = float("inf"), what: str = "") -> None:
    """Raise InputError naming the option unless low <= value <= high and value is finite."""
    import math

    from fieldvane.io.errors import InputError

    if not (isinstance(value, (int, float)) and math.isfinite(value) and low <= value <= high):
        bound = f"at least {low:g}" if high == float("inf") else f"between {low:g} and {high:g}"
        raise InputError(f"must be {what or 'a number'} {bound}, got {value!r}", column=option)


def check_options(args) -> tuple[list[str] | None, list]:
    """Return (columns, parsed --out specs) after checking every option; raise InputError (exit 2)."""
    from fieldvane.io.csv_lines import CsvLayout
    from fieldvane.io.errors import InputError
    from fieldvane.io.sinks import parse_sink_spec

    _check_number(args.baud, "--baud", 1, 100_000_000, "a baud rate")
    _check_number(args.capture_file_mib, "--capture-file-mib", 1, 1 << 20, "a size in MiB")
    _check_number(args.capture_buffer_mib, "--capture-buffer-mib", 1, 1 << 20, "a size in MiB")
    _check_number(args.log_interval, "--log-interval", 1, 1e9, "a time in seconds")
    _check_number(args.link_timeout, "--link-timeout", 0.1, 1e9, "a time in seconds")
    columns = None
    if args.columns is not None:
        if args.input_format != "csv":
            raise InputError("only for --input-format csv", column="--columns")
        columns = [c.strip() for c in args.columns.split(",")]
        CsvLayout(columns, source="--columns")
    specs = [parse_sink_spec(o) for o in args.out]
    return columns, specs


def _check_outputs(args, specs) -> None:
    """Apply the overwrite rule to --out files and --capture; with --force remove old --out files."""
    from pathlib import Path

    from fieldvane.io.errors import InputError
    from fieldvane.io.outputs import check_output, same_path

    cal = Path(args.calibration)
    inputs = [cal, cal.with_suffix(".npz"), args.filter, args.site]
    files = [s.path for s in specs if s.transport == "file"]
    for i, path in enumerate(files):
        if any(same_path(path, other) for other in files[:i]):
            raise InputError("given twice", path, column="--out")
        check_output(path, inputs=inputs, force=args.force, option="--out")
    if args.capture is not None:
        for item in inputs + files:
            if item is not None and same_path(args.capture, item):
                raise InputError("the capture folder would overwrite an input or an --out file",
                                 args.capture, column="--capture")
    for path in files:
        if args.force and Path(path).is_file():
            Path(path).unlink()


def _remove_empty_outputs(specs, summary) -> None:
    """Delete the empty --out files and record-less capture files of a run that never started."""
    from pathlib import Path

    for spec in specs:
        if spec.transport == "file" and Path(spec.path).is_file() and Path(spec.path).stat().st_size == 0:
            Path(spec.path).unlink()
    if summary.counters.get("capture", {}).get("records", 1) == 0:
        for f in summary.capture_files:
            Path(f).unlink(missing_ok=True)


def run(args) -> int:
    """Run the live loop until Ctrl-C / SIGTERM; returns the exit code (see DESCRIPTION)."""
    import os

    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.errors import EXIT_CAPTURE_LOST, EXIT_FAILURE, EXIT_LINK
    from fieldvane.io.estimation import counters_table, lockin_line, noise_line, settings_for_stream
    from fieldvane.io.filterfile import read_filter_settings
    from fieldvane.io.live import run_live
    from fieldvane.io.status import StatusLine
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    from fieldvane.io import geo_output

    columns, specs = check_options(args)
    # utc from the host receive times; the site's columns with --site
    geo = geo_output.setup(args.site, None, args.calibration, host_clock=True)
    host_clock = geo_output.HostClock()
    cal = load_calibration(args.calibration)
    # A wire stream carries no lock-in description: the filter file's, else the calibration scan's.
    settings = settings_for_stream(read_filter_settings(args.filter) if args.filter else None, None,
                                   args.port, cal)
    _check_outputs(args, specs)
    table, _ = load_or_build_table(cal, cache_dir_for(args.calibration))
    solver = SnapshotSolver.from_calibration(cal, table)
    tracker = Tracker(cal, settings, solver.initiate, report_channels=args.readouts)
    link_failed = threading.Event()
    status = StatusLine(sys.stderr, interval_s=args.log_interval)

    def estimate_batch(samples):
        return geo.live_block(tracker, samples, host_clock.utc(len(samples)))

    def estimate(sample):
        return estimate_batch([sample])[0]

    def watch_link(loop):
        host_clock.attach(loop)
        def check():
            if not loop.wait_for(lambda lp: lp.link.counters().get("opens", 0) > 0, args.link_timeout):
                if loop.link.counters().get("opens", 0) == 0:
                    link_failed.set()
                    loop.stop()
        threading.Thread(target=check, name="link-watch", daemon=True).start()

    def show_status(loop):
        status.update(loop.last_record, loop.counters())

    def show_counters(loop, final):
        if final:
            status.close()
        status.log(counters_table(loop.counters(), "fieldvane run: " + ("final counters:" if final else
                                                                         "counters now:")))
        if not final:
            status.log(counters_table(tracker.counters.as_dict(), "fieldvane run: tracker now:"))

    for line in start_lines(args, specs, os.getpid()) + [lockin_line(settings, cal, "fieldvane run")]:
        status.log(line)
    for line in geo.describe():
        status.log(f"fieldvane run: {line}")
    summary = run_live(args.port, args.input_format, estimate, specs, args.capture, columns=columns,
                       baudrate=args.baud, log=status.log, log_interval_s=args.log_interval,
                       max_capture_file_bytes=int(args.capture_file_mib * 2**20),
                       capture_buffer_bytes=int(args.capture_buffer_mib * 2**20), on_ready=watch_link,
                       estimate_batch=estimate_batch, status=None if args.no_status else show_status,
                       counters_report=show_counters)
    status.close()
    print(noise_line(tracker), file=sys.stderr)
    print(counters_table(tracker.counters.as_dict(), "fieldvane run: tracker:"), file=sys.stderr)
    if link_failed.is_set():
        _remove_empty_outputs(specs, summary)
        print(f"fieldvane run: failed: {args.port} never opened within {args.link_timeout:g} s", file=sys.stderr)
        return EXIT_LINK
    code = summary.exit_code()
    if code == EXIT_CAPTURE_LOST:
        what = [f"raw bytes lost: {summary.capture_bytes_lost} bytes are not in the capture"] \
            if summary.capture_bytes_lost or summary.capture_bytes_unconfirmed else []
        if summary.capture_failures:
            what.append("the capture may be incomplete: its last writes or its close failed")
        print(f"fieldvane run: {'; '.join(what)} (exit {EXIT_CAPTURE_LOST}); see the CAPTURE PROBLEM lines above",
              file=sys.stderr)
    elif code == EXIT_FAILURE and summary.failed_sinks:
        print(f"fieldvane run: failed: logger output(s) {', '.join(summary.failed_sinks)} could not be "
              "written", file=sys.stderr)
    elif code == EXIT_FAILURE:
        print("fieldvane run: failed: logger output(s) did not finish writing; their last records may be "
              "missing", file=sys.stderr)
    return code


def start_lines(args, specs, pid: int) -> list[str]:
    """Return the lines run prints before reading: where estimates and raw bytes go, what is not kept."""
    import signal

    fmt = "binary frames" if args.input_format == "binary" else "CSV lines"
    ask = f", counters with kill -USR1 {pid}" if hasattr(signal, "SIGUSR1") else ""
    lines = [f"fieldvane run: reading {args.port} ({fmt}); stop with Ctrl-C{ask}"]
    if specs:
        lines.append("fieldvane run: estimates to " + ", ".join(str(s) for s in specs))
    else:
        lines.append("fieldvane run: warning: no --out: the estimates are not written anywhere "
                     "(add e.g. --out est.csv, or --out csv:stdout)")
    if args.capture is None:
        lines.append("fieldvane run: warning: no --capture folder: raw bytes are not kept and this run cannot "
                     "be replayed")
    else:
        lines.append(f"fieldvane run: raw bytes to {args.capture}")
    lines.append("fieldvane run: note: not a safety or navigation instrument by itself; check flags and sigma_deg")
    return lines
