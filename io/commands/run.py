"""`fieldvane run`: the live loop — serial in, estimates out to loggers, every raw byte captured."""

from __future__ import annotations

import sys
import threading

DESCRIPTION = """Read the sensor electronics on a serial port, track the field direction, and stream
the estimates to one or more loggers, keeping every received byte in a capture folder.

PORT is a device (/dev/ttyUSB0, COM3), a pty path, or a pyserial URL (socket://127.0.0.1:7000,
loop://). --input binary reads the frames of docs/wire_format.md; --input csv reads recording
CSV lines (header first, or --columns). The link reconnects by itself when the port vanishes.
A slow or absent logger never stalls reading or estimation: its records are dropped and counted.

--out (repeatable; default csv:stdout):
  est.csv | est.jsonl | est.nmea          a new file in that format (never overwritten)
  FORMAT:stdout | FORMAT:file:PATH        FORMAT is csv, jsonl or nmea
  FORMAT:tcp:PORT | FORMAT:tcp:HOST:PORT  a TCP server for loggers (127.0.0.1 unless HOST given)
  FORMAT:udp:HOST:PORT                    datagrams
  FORMAT:serial:DEVICE:BAUD               a serial port
  (full grammar: docs/sinks.md)

Stop with Ctrl-C or SIGTERM: every sink is flushed and the final counters printed (exit 130).
Exit 3 when the port never opened within --link-timeout.

example:
  fieldvane run --port /dev/ttyUSB0 -c cal.json --out est.csv --out nmea:tcp:5600 --capture capture/
"""


def add_arguments(parser) -> None:
    """Register run's options."""
    parser.add_argument("--port", required=True, help="serial device, pty path or pyserial URL")
    parser.add_argument("--baud", type=int, default=115200, help="baud rate (default 115200)")
    parser.add_argument("--input", choices=("binary", "csv"), default="binary",
                        help="binary frames (default) or recording-CSV lines")
    parser.add_argument("--columns", help="comma-separated CSV column names when the stream has no header line")
    parser.add_argument("-c", "--calibration", required=True, help="calibration JSON")
    parser.add_argument("--filter", help="filter settings TOML (defaults otherwise)")
    parser.add_argument("--out", action="append", default=[], metavar="SINK",
                        help="logger output (repeatable; see above)")
    parser.add_argument("--capture", metavar="DIR", help="folder for the raw capture (strongly advised)")
    parser.add_argument("--capture-file-mib", type=float, default=64.0,
                        help="rotate capture files at this size (default 64 MiB)")
    parser.add_argument("--readouts", action="store_true",
                        help="add demodulated phases and amplitude ratios to the records")
    parser.add_argument("--log-interval", type=float, default=60.0,
                        help="seconds between counter lines on stderr (default 60)")
    parser.add_argument("--link-timeout", type=float, default=30.0,
                        help="give up (exit 3) if the port never opens within this many seconds")


def run(args) -> int:
    """Run the live loop until Ctrl-C / SIGTERM; returns the exit code."""
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.errors import EXIT_INTERRUPTED, EXIT_LINK
    from fieldvane.io.filterfile import read_filter_settings
    from fieldvane.io.live import run_live
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    if args.capture is None:
        print("note: no --capture folder: raw bytes are not kept and this run cannot be replayed",
              file=sys.stderr)
    cal = load_calibration(args.calibration)
    settings = read_filter_settings(args.filter) if args.filter else None
    table, _ = load_or_build_table(cal, cache_dir_for(args.calibration))
    solver = SnapshotSolver.from_calibration(cal, table)
    tracker = Tracker(cal, settings, solver.initiate, report_channels=args.readouts)
    columns = [c.strip() for c in args.columns.split(",")] if args.columns else None
    outputs = args.out or ["csv:stdout"]
    link_failed = threading.Event()

    def estimate(sample):
        return tracker.step(sample).row()

    def watch_link(loop):
        def check():
            if not loop.wait_for(lambda lp: lp.link.counters().get("opens", 0) > 0, args.link_timeout):
                if loop.link.counters().get("opens", 0) == 0:
                    link_failed.set()
                    loop.stop()
        threading.Thread(target=check, name="link-watch", daemon=True).start()

    summary = run_live(args.port, args.input, estimate, outputs, args.capture, columns=columns,
                       baudrate=args.baud, log_interval_s=args.log_interval,
                       max_capture_file_bytes=int(args.capture_file_mib * 2**20), on_ready=watch_link)
    c = tracker.counters
    print(f"fieldvane run: tracker {c}", file=sys.stderr)
    if link_failed.is_set():
        print(f"fieldvane run: failed: {args.port} never opened within {args.link_timeout:g} s", file=sys.stderr)
        return EXIT_LINK
    return EXIT_INTERRUPTED if summary.interrupted else 0
