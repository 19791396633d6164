"""`fieldvane replay`: estimates from a recording CSV or a raw capture, tracked or snapshot by snapshot."""

from __future__ import annotations

import sys
import time

DESCRIPTION = """Estimate field directions from a recording CSV or a raw capture folder.

INPUT is a recording CSV (DESIGN columns), or a capture folder / capture file written by
`fieldvane run --capture` (replayed byte for byte through the same decoder, so the estimates
equal the live run's). Tracking (the extended Kalman filter) is the default; `--mode snapshot`
solves every sample on its own with the lookup-table inverse.

The output is the estimates CSV: t, ux, uy, uz, b_nT, bx_nT, by_nT, bz_nT, sigma_deg, flags,
then extra columns (nis, nis_dof, b_a_nT, b_b_nT, bound_deg, ...). The lookup table is cached
beside the calibration in .fieldvane-tables/.

examples:
  fieldvane replay rec.csv -c cal.json -o est.csv
  fieldvane replay capture/ -c cal.json -o est.csv --filter filter.toml
  fieldvane replay rec.csv -c cal.json -o snap.csv --mode snapshot --gain-free
"""


def add_arguments(parser) -> None:
    """Register replay's options."""
    parser.add_argument("input", help="recording CSV, capture folder or capture file")
    parser.add_argument("-c", "--calibration", required=True, help="calibration JSON from `fieldvane calibrate`")
    parser.add_argument("-o", "--output", required=True, help="estimates CSV to write")
    parser.add_argument("--mode", choices=("track", "snapshot"), default="track",
                        help="track: extended Kalman filter (default); snapshot: each sample on its own")
    parser.add_argument("--filter", help="filter settings TOML (see docs/config_files.md); defaults otherwise")
    parser.add_argument("--gain-free", action="store_true",
                        help="treat each probe's common gain as unknown (unstable optical power)")
    parser.add_argument("--readouts", action="store_true",
                        help="add demodulated phases (deg) and amplitude ratios as extra columns")
    parser.add_argument("--input-format", choices=("binary", "csv"),
                        help="format of a capture that does not record it")
    parser.add_argument("--force", action="store_true", help="overwrite the output file if it exists")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


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


def run(args) -> int:
    """Replay and write the estimates CSV; returns the exit code."""
    from collections import Counter
    from pathlib import Path

    from fieldvane.estimator.flags import EstimateFlag
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.errors import InputError
    from fieldvane.io.estimates_csv import EstimatesWriter
    from fieldvane.io.filterfile import read_filter_settings
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    out = Path(args.output)
    if out.exists() and not args.force:
        raise InputError("output exists (use --force to overwrite)", str(out))
    if not Path(args.input).exists():
        raise InputError("no such file or folder", args.input)
    cal = load_calibration(args.calibration)
    settings = read_filter_settings(args.filter) if args.filter else None
    table, info = load_or_build_table(cal, cache_dir_for(args.calibration))
    if info.built:
        where = info.path if info.path is not None else "not cached"
        print(f"lookup table: {table.size} directions, built in {info.build_seconds:.2f} s, "
              f"{info.size_bytes / 1024:.0f} KiB ({where})", file=sys.stderr)
    solver = SnapshotSolver.from_calibration(cal, table, gain_free=args.gain_free)

    start = time.perf_counter()
    flag_words: Counter = Counter()    # flags value -> samples; split into bits once at the end
    with EstimatesWriter(out) as writer:
        def emit(est):
            writer.write(est)
            flag_words[int(est.flags)] += 1

        if args.mode == "track":
            tracker = Tracker(cal, settings, solver.initiate, report_channels=args.readouts)
        if _is_capture(args.input):
            from fieldvane.io.live import frames_from_capture

            decoder_counters: dict = {}
            step = tracker.step if args.mode == "track" else solver.solve_sample
            for sample in _progress(frames_from_capture(args.input, args.input_format, counters=decoder_counters),
                                    None, args.no_progress):
                emit(step(sample))
            print("capture decoder: " + ", ".join(f"{k} {v}" for k, v in decoder_counters.items()), file=sys.stderr)
        else:
            from fieldvane.io.recording import RecordingReader
            from fieldvane.estimator.snapshot import solve_block

            reader = RecordingReader(args.input)
            for block in _progress(reader, "chunks", args.no_progress):
                ests = tracker.run(block) if args.mode == "track" else solve_block(solver, block)
                for est in ests:
                    emit(est)
            for w in reader.warnings:
                print(f"warning: {w}", file=sys.stderr)
    seconds = time.perf_counter() - start
    rows = sum(flag_words.values())
    counts = {bit: sum(n for word, n in flag_words.items() if word & bit) for bit in EstimateFlag}
    counts = {bit: n for bit, n in counts.items() if n}
    rate = rows / seconds if seconds > 0 else float("inf")
    print(f"replay ({args.mode}): {rows} estimates in {seconds:.2f} s ({rate:,.0f}/s) -> {out}")
    if counts:
        print("flags: " + ", ".join(f"{bit.name} {n}" for bit, n in counts.items()))
    if args.mode == "track":
        print(f"tracker: {tracker.counters}")
    return 0


def _progress(iterable, unit, disabled):
    """Wrap an iterable in a tqdm progress bar on stderr when tqdm is installed and stderr is a terminal."""
    if disabled or not sys.stderr.isatty():
        return iterable
    try:
        from tqdm import tqdm
    except ImportError:
        return iterable
    return tqdm(iterable, unit=unit or "sample", file=sys.stderr, leave=False)
