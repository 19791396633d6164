"""`fieldvane replay`: estimates from a recording CSV or a raw capture, tracked or snapshot by snapshot."""

from __future__ import annotations

import sys
import time

from fieldvane.io.errors import EXIT_FAILURE, EXIT_OK

DESCRIPTION = """Estimate field directions from a recording CSV or a raw capture folder.

INPUT is a recording CSV (docs/recording_format.md), or a capture folder / capture file written by
`fieldvane run --capture` (replayed byte for byte through the same decoder; each run of a capture
gets a fresh tracker, as it had live, so the estimates equal the live run's). Tracking (the extended
Kalman filter) is the default; `--mode snapshot` solves every sample on its own with the lookup-table
inverse.

A recording may hold fewer probes than the calibration, or a probe's fields may be empty for a while:
each estimate uses the probes present (extra column probes_used: 1 = probe 1, 2 = probe 2, 3 = both).
The lock-in's filter (time constant, order) is read from the recording's metadata lines when the
filter settings do not give it: correlated samples are then weighted honestly and the lock-in's
delay is removed from t.

Absolute time: with a '# start_utc: 2026-12-02T00:00:00Z' line in the recording, or --start-utc, every
estimate gets utc = start_utc + t (extra column utc: ISO 8601 in text files, POSIX seconds in records),
and the estimates carry their own '# start_utc:' line. A capture without either takes utc from the
host clock: the receive time of the bytes that completed each frame (good to the host clock plus the
link's delay, a few ms to tens of ms). --site adds the field at the site in north-east-down (X_nT,
Y_nT, Z_nT, H_nT, F_nT, D_deg, I_deg and their sigmas; docs/geographic.md), turned through the
calibration's mounting and the site's attitude at each estimate's time: a first sanity check of an
installation, not a navigation or safety instrument by itself.

The output is the estimates CSV: t, ux, uy, uz, b_nT, bx_nT, by_nT, bz_nT, sigma_deg, flags, then
extra columns (nis, nis_dof, b_a_nT, b_b_nT, bound_deg, noise_scale, probes_used, ...; see
docs/estimates_columns.md). The output's format follows its suffix (.csv, .jsonl, .nmea); --out adds
more outputs with the grammar of `run --out`. The lookup table is cached beside the calibration in
.fieldvane-tables/. An existing output is refused unless --force; an input is never overwritten.
Exit 1 when an output did not get every estimate (a full disk, a broken stream): each is named (UDP
outputs, which may lose datagrams by design, get a warning).

examples:
  fieldvane replay rec.csv -c cal.json -o est.csv
  fieldvane replay capture/ -c cal.json -o est.csv --filter filter.toml
  fieldvane replay rec.csv -c cal.json -o snap.csv --mode snapshot --gain-free
  fieldvane replay pier.csv -c cal.json -o est.csv --site examples/pier/pier_site_angles.toml
"""

CHUNK = 8192     # samples of a capture estimated together
PIECE = 8192     # samples of a recording's block filtered before the final ones are handed to the writer


def add_arguments(parser) -> None:
    """Register replay's options."""
    parser.add_argument("input", help="recording CSV, capture folder or capture file")
    parser.add_argument("-c", "--calibration", required=True, metavar="CAL.json",
                        help="calibration JSON written by `fieldvane calibrate` (its .npz beside it)")
    parser.add_argument("-o", "--output", required=True, metavar="EST.csv",
                        help="file to write: the estimates (.csv, .jsonl or .nmea; CSV for other suffixes)")
    parser.add_argument("--out", action="append", default=[], metavar="SINK",
                        help="a further output with the grammar of `run --out` (repeatable)")
    parser.add_argument("--mode", choices=("track", "snapshot"), default="track",
                        help="track: extended Kalman filter (default); snapshot: each sample on its own")
    parser.add_argument("--filter", metavar="FILTER.toml",
                        help="filter settings TOML (docs/config_files.md); defaults otherwise")
    parser.add_argument("--gain-free", action="store_true",
                        help="snapshot mode: treat each probe's common gain as unknown (unstable optical power)")
    parser.add_argument("--readouts", action="store_true",
                        help="add demodulated phases (deg) and amplitude ratios as extra columns")
    parser.add_argument("--input-format", choices=("binary", "csv"),
                        help="binary wire frames or recording-CSV lines: a capture's format when it does not record it")
    parser.add_argument("--force", action="store_true", help="replace existing output files (never an input)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    from fieldvane.io.options import add_site_option, add_start_utc_option

    add_site_option(parser)
    add_start_utc_option(parser, "the recording's '# start_utc:' line; a capture's host clock")


def _is_capture(path) -> bool:
    from pathlib import Path

    p = Path(path)
    if p.is_dir():
        return True
    try:
        with open(p, "rb") as fh:
            head = fh.read(16)
    except OSError:
        return False
    from fieldvane.io.capture import MAGIC as CAPTURE_MAGIC
    return head.startswith(CAPTURE_MAGIC)


class _Outputs:
    """The estimates file (fast block writer for CSV, a sink otherwise) plus any --out sinks."""

    def __init__(self, path, specs, force):
        from pathlib import Path

        from fieldvane.io.estimates_csv import EstimatesWriter
        from fieldvane.io.sinks import FILE_SUFFIXES

        self.path = Path(path)
        fmt = FILE_SUFFIXES.get(self.path.suffix.lower(), "csv")
        self.metadata: dict[str, str] = {}       # '# key: value' lines, as they stand at the first row
        self.writer = EstimatesWriter(self.path, metadata=self.metadata) if fmt == "csv" else None
        self.sinks = []
        self._specs = ([] if fmt == "csv" else [f"{fmt}:file:{self.path}"]) + list(specs)
        self._force = force

    def _open_sinks(self, extras):
        from fieldvane.io.sinks import open_sink

        for spec in self._specs:
            self.sinks.append(open_sink(spec, extras))
        self._specs = []

    def write_record(self, record, more=None):
        """Write one track record (arrays), with `more` columns (name -> (N,) array: utc, geographic)."""
        from fieldvane.io.estimates_csv import estimate_columns

        if len(record) == 0:
            return
        extras = record.extra_columns()
        extras.update(more or {})
        if self._specs:
            self._open_sinks(list(extras))
        if self.writer is not None:
            self.writer.write_columns(estimate_columns(record.t, record.u, record.b_nT, record.sigma_deg,
                                                       record.flags, extras))
        if self.sinks:
            added = {k: v.tolist() for k, v in (more or {}).items()}
            for i, est in enumerate(record.estimates()):
                row = est.row()
                row.update({k: v[i] for k, v in added.items()})
                for sink in self.sinks:
                    sink.emit_wait(row, timeout=60.0)

    def write_estimates(self, estimates, more=None):
        """Write Estimate objects (snapshot mode), with `more` columns (name -> (N,) array)."""
        if not estimates:
            return
        for k, v in (more or {}).items():
            for est, value in zip(estimates, v.tolist()):
                est.extras[k] = value
        if self._specs:
            self._open_sinks(list(estimates[0].extras))
        if self.writer is not None:
            self.writer.write_estimates(estimates)
        for sink in self.sinks:
            for est in estimates:
                sink.emit_wait(est.row(), timeout=60.0)

    def close(self, ok: bool) -> list[str]:
        """Close every output; return one line per output that did not get every estimate (none: all did)."""
        from fieldvane.io.sinks import close_sinks

        if self._specs:
            self._open_sinks([])
        if self.writer is not None:
            if ok:
                self.writer.close()
            else:                          # a failed replay leaves no partial file behind
                failure = RuntimeError("replay failed")
                self.writer.__exit__(type(failure), failure, None)
        problems = []
        if self.sinks and not close_sinks(self.sinks, 30.0):
            problems.append("some outputs did not finish writing in 30 s")
        for sink in self.sinks:
            c = sink.counters()
            missing = c["dropped"] + c["write_errors"] + c["format_errors"] + c["queued"]
            if missing or sink.failed:
                why = f" ({sink.last_error})" if sink.last_error else ""
                line = f"output {sink.name}: {missing} of {c['accepted'] + c['dropped']} estimates not written{why}"
                if sink.transport.delivers_every_line:
                    problems.append(line)
                else:                       # (UDP: datagrams a full send buffer refused; the medium's way)
                    print(f"warning: {line}", file=sys.stderr)
        return problems


def run(args) -> int:
    """Replay and write the estimates; returns the exit code."""
    from pathlib import Path

    from fieldvane.io.errors import InputError

    if not Path(args.input).exists():
        raise InputError("no such file or folder", args.input)
    reader = blocks = None
    if not _is_capture(args.input):     # a recording is read (in a thread) while the calibration loads
        from fieldvane.io.pipeline import ReadAhead
        from fieldvane.io.recording import RecordingReader

        reader = RecordingReader(args.input)
        blocks = ReadAhead(reader)
    try:
        return _replay(args, reader, blocks)
    finally:
        if blocks is not None:
            blocks.close()


def _replay(args, reader, blocks) -> int:
    """Replay a recording (reader and its blocks, read ahead) or a capture (both None); return the exit code."""
    from collections import Counter

    from fieldvane.estimator.flags import EstimateFlag
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.estimation import counters_table, health_warnings, noise_line, probe_use_line, resets_lines
    from fieldvane.io.outputs import check_output
    from fieldvane.io.pipeline import WriteBehind
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    from fieldvane.io import geo_output

    # utc and the site's columns; a recording's '# start_utc:' line is taken at its first block
    geo = geo_output.setup(args.site, args.start_utc, args.calibration)
    out = check_output(args.output, inputs=[args.input, args.calibration, args.filter, *geo.inputs],
                       force=args.force, option="--output")
    cal = load_calibration(args.calibration)
    settings = None
    if args.filter:
        from fieldvane.io.filterfile import read_filter_settings
        settings = read_filter_settings(args.filter)
    table, info = load_or_build_table(cal, cache_dir_for(args.calibration))
    if info.built:
        where = info.path if info.path is not None else "not cached"
        print(f"lookup table: {table.size} directions, built in {info.build_seconds:.2f} s, "
              f"{info.size_bytes / 1024:.0f} KiB ({where})", file=sys.stderr)
    solver = SnapshotSolver.from_calibration(cal, table, gain_free=args.gain_free)
    track = args.mode == "track"

    start = time.perf_counter()
    flag_words: Counter = Counter()     # flags value -> samples; split into bits once at the end
    probe_sets: Counter = Counter()
    trackers = []
    capture_lines: list[str] = []
    warnings: list[str] = []
    outputs = _Outputs(out, args.out, args.force)
    behind = WriteBehind()                # a recording's estimates are written behind the estimator
    ok = False
    try:
        def note(flags, probes):
            flag_words.update(flags.tolist())
            probe_sets.update(probes.tolist())

        def write_stretch(run, stop):     # in the writer thread: the estimates made final by the filter up to stop
            lo, hi = run.final_through(stop)
            if hi > lo:
                rec = run.record(lo, hi)
                outputs.write_record(rec, geo.for_record(rec))
                note(rec.flags, rec.probes_used)

        if reader is None:
            from fieldvane.io.live import capture_problem_lines, runs_from_capture

            decoder_counters: dict = {}
            capture_counters: dict = {}
            cap_warnings: list[str] = []
            host_ns: list[int] = []           # receive time of the chunk that completed each sample
            geo.host_clock = True
            geo.check_clock()
            from fieldvane.io.estimation import settings_for_stream
            stream = settings_for_stream(settings, None, args.input, cal)    # as the live run took it
            if args.site or geo.start_utc is not None:    # else the same bytes as the live run's CSV logger
                outputs.metadata.update(geo.metadata())
            for _run_id, samples in runs_from_capture(args.input, args.input_format, counters=decoder_counters,
                                                      capture_counters=capture_counters, warnings=cap_warnings,
                                                      host_times=host_ns):
                tracker = Tracker(cal, stream, solver.initiate, report_channels=args.readouts) if track else None
                trackers.append(tracker)
                for batch in _batches(_progress(samples, None, args.no_progress), CHUNK):
                    host_utc = geo_output.take_host_times(host_ns, len(batch))
                    if track:
                        rec = tracker.step_record(batch)
                        outputs.write_record(rec, geo.for_record(rec, host_utc))
                        note(rec.flags, rec.probes_used)
                    else:
                        ests = [solver.solve_sample(s) for s in batch]
                        outputs.write_estimates(ests, geo.for_estimates(ests, host_utc))
                        note(_flags_of(ests), _probes_of(ests))
            print(counters_table(decoder_counters, "capture decoder:"), file=sys.stderr)
            capture_lines = capture_problem_lines(capture_counters, cap_warnings)
        else:
            from fieldvane.estimator.snapshot import solve_block

            tracker = None
            geo_ready = False
            reader.header_read.wait()     # the tracker is set up while the reader parses the first block
            if track and reader.layout is not None:
                tracker = _recording_tracker(cal, settings, solver, args, reader, reader.layout.channels)
            for block in _progress(blocks, "chunks", args.no_progress):
                if not geo_ready:             # the metadata lines are read with the first block
                    geo.take_metadata(reader.metadata, args.input)
                    outputs.metadata.update(geo.metadata())
                    geo_ready = True
                if tracker is None and track:
                    tracker = _recording_tracker(cal, settings, solver, args, reader, block.channels)
                if track and not trackers:    # summarized only once it has seen samples
                    trackers.append(tracker)
                elif not track and not probe_sets:
                    _check_channels(block.channels, cal, args.input, reader)
                if track:
                    _track_block(tracker, block, behind, write_stretch)
                else:
                    ests = solve_block(solver, block)
                    behind.submit(outputs.write_estimates, ests, geo.for_estimates(ests))
                    note(_flags_of(ests), _probes_of(ests))
            behind.finish()
            warnings += reader.warnings
        ok = True
    finally:
        if not ok:
            behind.finish(raise_error=False)     # the block being written ends before the file is dropped
        problems = outputs.close(ok)
    seconds = time.perf_counter() - start
    rows = sum(flag_words.values())
    for w in warnings:
        print(f"warning: {w}", file=sys.stderr)
    for line in capture_lines:
        print(line, file=sys.stderr)
    counts = {bit: sum(n for word, n in flag_words.items() if word & bit) for bit in EstimateFlag}
    counts = {bit: n for bit, n in counts.items() if n}
    rate = rows / seconds if seconds > 0 else float("inf")
    print(f"replay ({args.mode}): {rows} estimates in {seconds:.2f} s ({rate:,.0f}/s) -> {out}")
    print(probe_use_line(probe_sets))
    for line in geo.describe():
        print(line)
    if counts:
        print("flags: " + ", ".join(f"{bit.name} {n}" for bit, n in counts.items()))
    for k, tracker in enumerate(trackers):
        label = f" (capture run {k + 1} of {len(trackers)})" if len(trackers) > 1 else ""
        print(noise_line(tracker) + label)
        print(counters_table(tracker.counters.as_dict(), "tracker" + label + ":"))
        print("(re)acquisitions:")
        print("\n".join(resets_lines(tracker.resets)))
        for w in health_warnings(tracker.counters, tracker.counters.samples):
            print(f"warning: {w}", file=sys.stderr)
    for line in problems:
        print(f"error: {line}", file=sys.stderr)
    return EXIT_FAILURE if problems else EXIT_OK


def _recording_tracker(cal, settings, solver, args, reader, channels):
    """Return the tracker of a recording (its channels checked, lock-in and rate from its metadata lines)."""
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.estimation import sample_rate_from, settings_for_stream

    _check_channels(channels, cal, args.input, reader)
    stream = settings_for_stream(settings, reader.metadata, args.input)
    return Tracker(cal, stream, solver.initiate, report_channels=args.readouts,
                   sample_rate_hz=sample_rate_from(reader.metadata, args.input))


def _track_block(tracker, block, behind, write_stretch) -> None:
    """Filter a block PIECE samples at a time in this thread, while a helper thread prepares the next piece's input
    and the writer thread (behind) builds and writes the estimates each piece made final."""
    from fieldvane.estimator.tracker import BlockRun
    from fieldvane.io.pipeline import Background

    run = BlockRun(tracker, block)
    ahead = Background(run.prepare, 0, min(PIECE, run.n), name="fieldvane-prepare")
    try:
        for start in range(0, run.n, PIECE):
            stop = min(start + PIECE, run.n)
            prepared = ahead.result()
            if stop < run.n:
                ahead = Background(run.prepare, stop, min(stop + PIECE, run.n), name="fieldvane-prepare")
            run.filter(start, stop, prepared)
            behind.submit(write_stretch, run, stop)
    finally:
        ahead.wait()                  # no helper outlives a failure


def _check_channels(channels, cal, path, reader) -> None:
    """Stop with a message naming file, line and columns when the recording holds no calibrated probe."""
    from fieldvane.io.errors import InputError

    calibrated = tuple(cal.model.channels)
    if not any(c in channels for c in calibrated):
        line = getattr(reader, "header_line", None)
        wanted = ", ".join(f"x_{c}, y_{c}" for c in calibrated)
        raise InputError(f"the recording holds none of the calibrated channels (missing columns {wanted}; "
                         f"it has {', '.join(channels) or 'no lock-in columns'})", str(path), line)


def _flags_of(estimates):
    import numpy as np

    return np.array([int(e.flags) for e in estimates], np.int64)


def _probes_of(estimates):
    import numpy as np

    return np.array([int(e.extras.get("probes_used", 0)) for e in estimates], np.int64)


def _batches(iterable, size):
    """Yield lists of up to `size` items."""
    batch = []
    for item in iterable:
        batch.append(item)
        if len(batch) >= size:
            yield batch
            batch = []
    if batch:
        yield batch


def _progress(iterable, unit, disabled):
    """Wrap an iterable in a tqdm progress bar on stderr when tqdm is installed and stderr is a terminal."""
    if disabled or not sys.stderr.isatty():
        return iterable
    try:
        from tqdm import tqdm
    except ImportError:
        return iterable
    return tqdm(iterable, unit=unit or "sample", file=sys.stderr, leave=False)
