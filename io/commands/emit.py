"""`fieldvane emit`: stream the simulated sensor as wire frames or CSV lines."""

from __future__ import annotations

import sys

DESCRIPTION = """Play the simulated sensor electronics: stream a scenario as binary wire frames
(docs/wire_format.md) or recording-CSV lines (docs/recording_format.md) to a pseudo-terminal, a
TCP client or a file.

--to pty         opens a pseudo-terminal pair and prints the path to read from (e.g. /dev/pts/5)
--to tcp:PORT    serves one client at a time on 127.0.0.1:PORT (0 picks a free port)
--to file:PATH   writes the byte stream to a file (refused if it exists, unless --force)

A pty or TCP stream waits for its first reader before the scenario starts (--no-wait starts at
once), then keeps running in real time: it paces samples by the sample rate and drops what nobody
reads, like a sensor would; --fast (the default for files) sends as fast as the reader takes.
Faults for testing receivers: --flip-every, --garbage-every, --pause. Run the reader (e.g.
`fieldvane run --port /dev/pts/5 ...`) in a second terminal: emit keeps this one until Ctrl-C.

examples:
  fieldvane emit rotation_blind_planes --to pty
  fieldvane emit demo_track --to tcp:50020 --output-format csv --repeat
  fieldvane emit examples/static.toml --to file:static.bin --fast --flip-every 100
"""


def add_arguments(parser) -> None:
    """Register emit's options."""
    from fieldvane.io.commands.simulate import add_scenario, add_seed_duration
    from fieldvane.io.options import INPUT_FORMATS, add_force, add_renamed

    add_scenario(parser)
    parser.add_argument("--to", required=True, metavar="DEST", help="where the stream goes: pty, tcp:PORT or file:PATH")
    add_force(parser)
    parser.add_argument("--output-format", choices=INPUT_FORMATS, default="binary",
                        help="binary wire frames (default) or recording-CSV lines: what `run --input-format` reads")
    add_renamed(parser, "--format", "--output-format", "output_format", choices=INPUT_FORMATS)
    parser.add_argument("--no-wait", action="store_true",
                        help="pty and tcp: start at once instead of waiting for the first reader")
    pace = parser.add_mutually_exclusive_group()
    pace.add_argument("--realtime", dest="realtime", action="store_true", default=None,
                      help="pace samples by the sample rate (default for pty and tcp)")
    pace.add_argument("--fast", dest="realtime", action="store_false",
                      help="send as fast as the reader takes them (default for files)")
    add_seed_duration(parser)
    parser.add_argument("--repeat", action="store_true",
                        help="start over at the end (sequence numbers and time go on) until Ctrl-C")
    parser.add_argument("--with-truth", action="store_true",
                        help="CSV only: add the columns true_ux, true_uy, true_uz, true_b_nT")
    parser.add_argument("--zero-before-each-frame", action="store_true",
                        help="binary only: send a 0x00 before every frame too (a damaged frame then "
                             "never spoils the next one)")
    parser.add_argument("--flip-every", type=int, default=0, metavar="N",
                        help="flip one random bit in every Nth record")
    parser.add_argument("--garbage-every", type=int, default=0, metavar="N",
                        help="send 16 random bytes (ended by a delimiter) before every Nth record")
    parser.add_argument("--pause", default=None, metavar="AT:SECONDS",
                        help="stall the link for SECONDS before the sample at time AT (s)")


def _parse_pause(text: str, run) -> tuple[int, float]:
    """Return (record index, seconds) of a --pause AT:SECONDS option."""
    import numpy as np

    from fieldvane.io.errors import InputError

    try:
        at_text, s_text = text.split(":", 1)
        at, seconds = float(at_text), float(s_text)
    except ValueError:
        raise InputError(f"--pause: expected AT:SECONDS, e.g. 5:2, got {text!r}") from None
    if not (np.isfinite(at) and np.isfinite(seconds)) or at < 0 or seconds <= 0:
        raise InputError(f"--pause: AT must be >= 0 and SECONDS > 0, got {text!r}")
    return int(np.searchsorted(run.t, at)), seconds


def run(args) -> int:
    """Emit the scenario until it ends (or Ctrl-C) and print what was sent; returns the exit code.

    A file: destination follows the overwrite rule (io/outputs.py): an existing file is refused
    unless --force, the scenario never; the bytes go to a temporary name renamed when the run
    ends (with --repeat, Ctrl-C is that end), so a failed run leaves nothing behind.
    """
    restore = _sigterm_as_ctrl_c()
    try:
        return _run(args)
    finally:
        restore()


def _run(args) -> int:
    """Emit to args.to; a file destination is written under a temporary name and renamed at the end."""
    from fieldvane.io.commands.simulate import resolve_scenario_path
    from fieldvane.io.outputs import atomic_file, check_output

    target = args.to[5:] if args.to.startswith("file:") and len(args.to) > 5 else None
    if target is None:
        return _emit(args, args.to)
    check_output(target, inputs=[resolve_scenario_path(args.scenario)], force=args.force, option="--to")
    stopped = False
    with atomic_file(target) as tmp:
        try:
            code = _emit(args, f"file:{tmp}", f"file {target}")
        except KeyboardInterrupt:
            if not args.repeat:
                raise
            stopped = True
    if stopped:
        raise KeyboardInterrupt
    return code


def _sigterm_as_ctrl_c():
    """Make SIGTERM end emit like Ctrl-C does (counters printed, a file output finished or removed); return a restorer."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return lambda: None

    def _stop(signum, frame):
        raise KeyboardInterrupt
    old = signal.signal(signal.SIGTERM, _stop)
    return lambda: signal.signal(signal.SIGTERM, old)


def _emit(args, dest: str, shown: str | None = None) -> int:
    """Emit to dest (shown to the user as `shown`); returns the exit code."""
    from fieldvane.firmware_sim.emitter import Emitter, FaultPlan, PtySink, TcpSink, open_sink
    from fieldvane.firmware_sim.scenario import simulate
    from fieldvane.io.commands.simulate import load_or_fail
    from fieldvane.io.errors import InputError, JobError

    if args.with_truth and args.output_format != "csv":
        raise InputError("--with-truth: only the CSV format has room for truth columns")
    if args.zero_before_each_frame and args.output_format != "binary":
        raise InputError("--zero-before-each-frame: only for binary frames")
    for name in ("flip_every", "garbage_every"):
        if getattr(args, name) < 0:
            raise InputError(f"--{name.replace('_', '-')}: must be >= 0")
    scenario = load_or_fail(args.scenario, args.seed, args.duration)
    sim = simulate(scenario)
    pause_at, pause_s = _parse_pause(args.pause, sim) if args.pause else (None, 0.0)
    faults = FaultPlan(bit_flip_every=args.flip_every, garbage_every=args.garbage_every,
                       pause_at=pause_at, pause_s=pause_s, seed=scenario.seed)
    try:
        sink = open_sink(dest)
    except ValueError as exc:
        raise InputError(f"--to: {exc}") from None
    except OSError as exc:
        raise JobError(f"cannot open {args.to}: {exc.strerror or exc}") from None
    realtime = args.realtime if args.realtime is not None else args.to.split(":")[0] != "file"
    emitter = Emitter(sim, sink, fmt=args.output_format, realtime=realtime, faults=faults,
                      repeat=args.repeat, include_truth=args.with_truth,
                      zero_before_each=args.zero_before_each_frame)
    pacing = "real time" if realtime else "as fast as possible"
    where = shown or sink.description
    if isinstance(sink, PtySink):
        where = f"pty {sink.path} (open it as the serial port)"
    elif isinstance(sink, TcpSink):
        where = f"tcp {sink.host}:{sink.port} (one client at a time)"
    print(f"emitting '{scenario.name}': {len(sim)} samples at {sim.sample_rate_hz:g} Hz as "
          f"{args.output_format} to {where}, {pacing}{', repeating' if args.repeat else ''}; Ctrl-C stops",
          flush=True)
    if sink.holds_open and not args.no_wait:
        reader = f"fieldvane run --port {sink.path}" if isinstance(sink, PtySink) else "a client"
        print(f"waiting for a reader (start {reader} ... in another terminal; --no-wait starts at once)",
              flush=True)
        if not sink.wait_for_reader(emitter.stop_event):
            return 0
        print("reader connected: streaming", flush=True)
    emitter.start()
    try:
        while not emitter.wait_sent(0.2):
            if emitter.finished.is_set():
                break
    except KeyboardInterrupt:
        emitter.stop()
        _report(emitter, file=sys.stderr)
        raise
    if emitter.error is not None:
        emitter.stop()
        raise JobError(f"emitter stopped: {emitter.error}")
    # From here the run is complete: Ctrl-C or SIGTERM only closes what is held open, even when it arrives
    # between the lines below (a reader that stops at the 'sent' line and signals at once).
    try:
        _report(emitter)
        if sink.holds_open:
            print(f"run finished; holding {sink.description} open for readers; Ctrl-C closes it", flush=True)
            while not emitter.join(0.5):
                pass
    except KeyboardInterrupt:
        pass
    emitter.stop()
    return 0


def _report(emitter, file=None) -> None:
    s = emitter.stats
    faults = ""
    if s.bit_flips or s.garbage_bursts or s.pauses:
        faults = f"; faults: {s.bit_flips} bit flips, {s.garbage_bursts} garbage bursts, {s.pauses} pauses"
    print(f"sent {s.records_sent} records ({s.bytes_sent} bytes) in {s.passes} pass(es), "
          f"{s.records_dropped} dropped{faults}", file=file or sys.stdout, flush=True)
