"""`fieldvane demo`: the whole job on the built-in simulated sensor, end to end, in about a minute."""

from __future__ import annotations

import sys
import threading
import time

MIN_DURATION_S, MAX_DURATION_S = 5.0, 60.0

DESCRIPTION = f"""Run the whole job on the built-in simulated sensor, with no hardware:

  1. simulate a calibration scan (a coil system steps the field over the sphere at 5-25 uT),
  2. calibrate, and map where the sensor is blind (Cramer-Rao bound),
  3. bring the simulated sensor up on a virtual serial port (pty) streaming wire frames,
  4. track the field live (capture, estimate, stream to logger files, a status line) while the
     test mount turns it, is nudged, and carries it across probe 1's axis with probe 2's cable
     pulled: probe 1 alone, its gain unknown to a single sample, is blind there,
  5. replay the capture and check it reproduces the live estimates exactly,
  6. summarize: error against truth, the Cramer-Rao bound, where the sensor was blind and what
     the tracker and the single-sample inverse did there, link counters, and plots.

Everything lands in a new folder (named by the date and time) inside -o DIR (default demo_out/);
nothing is ever replaced. The story (a sensor on a slowly turning test mount inside coils) is
invented for the demo; the scenarios are the built-in demo_scan and demo_track
(`fieldvane emit demo_track --to pty` streams the same sensor).

example:
  fieldvane demo --duration {MAX_DURATION_S - 15:g} -o demo_out/
"""

PROBE_GONE_NOTE = "probe 2's cable pulled"


def add_arguments(parser) -> None:
    """Register demo's options."""
    from fieldvane.io.options import add_no_plots, add_output_dir, add_renamed

    add_output_dir(parser, "the demo's new dated folders", default="demo_out")
    add_renamed(parser, "--out", "--output", "output")
    parser.add_argument("--duration", type=float, default=45.0, metavar="S",
                        help=f"seconds of live tracking, streamed in real time (default 45, "
                             f"{MIN_DURATION_S:g} to {MAX_DURATION_S:g})")
    add_no_plots(parser)


def _say(text: str) -> None:
    print(text, flush=True)


def _first_difference(live: list[bytes], replayed: list[bytes]) -> str:
    """Return where the replay's CSV lines first differ from the live ones (both with their header line)."""
    for k, (a, b) in enumerate(zip(live, replayed)):
        if a != b:
            return f"first difference at line {k + 1} of estimates.csv and replay.csv"
    return f"estimates.csv has {max(len(live) - 1, 0)} rows, replay.csv {max(len(replayed) - 1, 0)}"


def check_options(args):
    """Return the demo's new output folder (not created yet) after checking the options; raise InputError."""
    import datetime as dt
    import math
    from pathlib import Path

    from fieldvane.io.errors import InputError
    from fieldvane.io.outputs import check_output

    d = args.duration
    if not (math.isfinite(d) and MIN_DURATION_S <= d <= MAX_DURATION_S):
        raise InputError(f"must be between {MIN_DURATION_S:g} and {MAX_DURATION_S:g} seconds, got {d:g}",
                         column="--duration")
    parent = check_output(args.output, folder=True, force=True, option="--output")   # a file there: refused
    stamp = dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    out, k = Path(parent) / stamp, 1
    while out.exists():                  # two demos in the same second: never reuse a folder
        k += 1
        out = Path(parent) / f"{stamp}-{k}"
    return out


def run(args) -> int:
    """Run the demo; returns the exit code."""
    import numpy as np

    from fieldvane.estimator.fisher import crlb_deg
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.sphere import angle_between
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.firmware_sim.emitter import Emitter, PtySink
    from fieldvane.firmware_sim.scenario import builtin_scenario_path, load_scenario, simulate
    from fieldvane.io.commands.calibrate import calibrate_file, summary_text
    from fieldvane.io.errors import InputError, JobError
    from fieldvane.io.estimates_csv import live_block
    from fieldvane.io.estimation import settings_for_stream
    from fieldvane.io.live import run_live, runs_from_capture
    from fieldvane.io.recording import read_recording, write_recording
    from fieldvane.io.sinks import close_sinks, open_sink
    from fieldvane.io.status import StatusLine
    from fieldvane.io.table_cache import load_or_build_table

    out = check_options(args)
    try:
        out.mkdir(parents=True)
    except OSError as exc:
        raise InputError(f"cannot create the demo folder: {exc.strerror}", str(out), column="--output") from None
    started = time.perf_counter()
    duration = float(args.duration)
    _say(f"fieldvane demo -> {out}/")
    _say("(simulated sensor; not a safety or navigation instrument)")

    # 1. calibration scan
    scan_run = simulate(load_scenario(builtin_scenario_path("demo_scan")))
    write_recording(out / "scan.csv", scan_run.recording_columns(), scan_run.metadata())
    _say(f"\n[1/6] calibration scan: {scan_run.n_samples} samples at "
         f"{', '.join(f'{b / 1000:g}' for b in sorted(set(np.round(scan_run.b_nT, -2))))} uT -> scan.csv")

    # 2. calibrate (as `fieldvane calibrate` does), cache the lookup table, map the bound at the track's |B|
    cal, _, _ = calibrate_file(out / "scan.csv", out / "cal.json")
    _say("\n[2/6] calibration (cal.json):")
    _say("  " + summary_text(cal, "scan.csv", scan_run.n_samples, 0).replace("\n", "\n  "))
    table, info = load_or_build_table(cal, out / "tables")
    _say(f"  lookup table: {table.size} directions, built in {info.build_seconds:.2f} s, "
         f"{info.size_bytes / 1024:.0f} KiB")
    track = simulate(load_scenario(builtin_scenario_path("demo_track"), duration_s=duration))
    b_track = float(np.median(track.b_nT))
    plt = None if args.no_plots else _pyplot()
    from fieldvane.io.crlb_map import make_map, summary_lines
    maps, map_files, b_map = make_map(cal, out / "map", plt=plt, b_nT=b_track)
    _say(f"  where is this sensor blind? Cramer-Rao bound at {b_map:.0f} nT (the track's |B|), per probe set:")
    for line in summary_lines(maps):
        _say("    " + line)
    zone = _blind_zone_deg(maps, cal)
    if zone is not None:
        _say(f"    with both probes it is hardly blind anywhere; probe 1 alone, with its gain unknown, is blind "
             f"within about {zone:.0f} deg of its own axis (and its opposite)")

    # 3. simulated sensor on a pty
    write_recording(out / "track_truth.csv", track.recording_columns(), track.metadata())
    sink = PtySink()
    emitter = Emitter(track, sink, fmt="binary", realtime=True)
    _say(f"\n[3/6] simulated sensor streaming wire frames on virtual serial port {sink.path} "
         f"({track.n_samples} samples, {duration:g} s at {track.sample_rate_hz:g} Hz)")

    # 4. live tracking, with the same status line as `fieldvane run`
    solver = SnapshotSolver.from_calibration(cal, table)
    stream = settings_for_stream(None, None, "demo", cal)      # the lock-in as `fieldvane run` takes it
    tracker = Tracker(cal, stream, solver.initiate)
    # The filter core is compiled on its first call (seconds on a fresh install): do it before the sensor
    # starts streaming, so the live part keeps up from the first sample.
    warm, _ = read_recording(out / "track_truth.csv")
    Tracker(cal, None, solver.initiate).step_record([warm.sample(i) for i in range(min(64, len(warm)))])
    live_csv = out / "estimates.csv"
    outputs = [str(live_csv), str(out / "estimates.nmea")]
    status = StatusLine(sys.stderr, interval_s=5.0)
    live = {}

    def drive(loop):
        live["loop"] = loop

        def body():
            # Start the sensor once the port is open, so the first frame is not cut in half.
            loop.wait_for(lambda lp: lp.link.counters().get("connected", 0) > 0, 10.0)
            emitter.start()
            while not emitter.sent_all.wait(0.25):
                if emitter.finished.is_set():
                    break
            loop.wait_for(lambda lp: lp.samples >= emitter.stats.records_sent, 20.0)
            loop.stop()
        threading.Thread(target=body, name="demo-driver", daemon=True).start()

    _say("\n[4/6] tracking live (capture -> decode -> track -> logger files):")
    summary = run_live(sink.path, "binary", lambda s: tracker.step(s).row(), outputs, str(out / "capture"),
                       log=None, on_ready=drive, status=lambda lp: status.update(lp.last_record, lp.counters()),
                       estimate_batch=lambda samples: live_block(tracker, samples))
    status.close()
    emitter.stop()
    if summary.interrupted:
        _say("interrupted")
        return 130
    if emitter.error is not None:
        raise JobError(f"the simulated sensor failed: {emitter.error}")

    # 5. replay the capture as `fieldvane replay` does: each capture run with a fresh tracker, in batches
    replay_sink = open_sink(str(out / "replay.csv"))
    for _run, samples in runs_from_capture(out / "capture"):
        replay_tracker = Tracker(cal, stream, SnapshotSolver.from_calibration(cal, table).initiate)
        samples = list(samples)
        for k in range(0, len(samples), 8192):
            for est in replay_tracker.step_record(samples[k:k + 8192]).estimates():
                replay_sink.emit_wait(est.row(), timeout=60.0)
    if not close_sinks([replay_sink], timeout=60.0):
        raise JobError("the replay's logger did not finish writing replay.csv in 60 s")
    replayed, lived = (out / "replay.csv").read_bytes(), live_csv.read_bytes()
    same = replayed == lived
    _say(f"\n[5/6] replay of the capture reproduces the live estimates exactly: {'yes' if same else 'NO'}")
    if not same:
        _say("  " + _first_difference(lived.splitlines(), replayed.splitlines()))

    # 6. summary against truth
    from fieldvane.io.estimates_csv import read_estimates
    est = read_estimates(live_csv)
    c = summary.counters
    _say("\n[6/6] summary")
    _say(f"  link: {c['decoder']['frames_ok']} frames ok, {c['decoder']['crc_errors']} CRC errors, "
         f"{c['decoder']['seq_gaps']} missing by sequence, {c['decoder']['bytes_discarded']} bytes discarded; "
         f"sent {emitter.stats.records_sent}")
    for line in _truth_summary(est, track, cal, crlb_deg, angle_between):
        _say("  " + line)
    for line in _blind_summary(est, track, cal, table, out / "capture"):
        _say("  " + line)
    if plt is not None:
        from fieldvane.io.report import make_report
        rep = make_report(live_csv, out / "track_truth.csv", out / "report")
        _say(f"  plots: {', '.join(str(p.relative_to(out)) for p in rep.files[1:] + map_files if p.suffix == '.png')}")
    _say(f"\ndone in {time.perf_counter() - started:.0f} s; files in {out}/")
    return 0 if same else 1


def _pyplot():
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        return plt
    except ImportError:
        print("note: install fieldvane[plots] for the figures", file=sys.stderr)
        return None


def _blind_zone_deg(maps, cal) -> float | None:
    """Return the radius (deg) of the blind cap around probe 1's axis for probe 1 alone, gains unknown."""
    import numpy as np

    from fieldvane.estimator.blind import blind_mask

    m = next((m for m in maps if m.name == "1" and m.gain_free_bound_deg is not None), None)
    if m is None:
        return None
    blind = blind_mask(m.gain_free_bound_deg, m.gain_free_median_deg, m.blind_factor)
    axis = np.asarray(cal.physics.probe_axes[0], float)
    near = np.degrees(np.arccos(np.clip(np.abs(m.u @ axis) / np.linalg.norm(axis), -1.0, 1.0)))
    cap = blind & (near < 60.0)
    if not cap.any():
        return None
    return float(np.percentile(near[cap], 95))


def _blind_summary(est, track, cal, table, capture) -> list[str]:
    """Return the lines on the one-probe stretch: where the map calls it blind, and what the estimators did."""
    import numpy as np

    from fieldvane.estimator.blind import BLIND_FACTOR, blind_mask, median_bound_deg
    from fieldvane.estimator.fisher import crlb_deg
    from fieldvane.estimator.flags import EstimateFlag
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.sphere import angle_between
    from fieldvane.io.live import frames_from_capture

    t = est["t"]
    idx = np.clip(np.searchsorted(track.t, t), 0, len(track.t) - 1)
    gone = np.zeros(len(track.t), bool)
    if track.missing is not None:
        gone = track.missing[:, [k for k, ch in enumerate(track.channels) if ch.startswith("2")]].all(axis=1)
    alone = gone[idx] & (np.abs(track.t[idx] - t) < 1e-6)
    if not alone.any():
        return ["blindness: probe 2 was never missing in this run (its cable is pulled at 26 s: run 30 s or more)"]
    u_true = track.u[idx]
    b = float(np.median(track.b_nT))
    bound = crlb_deg(cal.model, u_true, b, (1,), True)
    median = median_bound_deg(cal.model, b, (1,), True)
    map_blind = alone & blind_mask(bound, median, BLIND_FACTOR)
    seen = alone & ~map_blind
    lines = [f"blindness: probe 2 missing ({PROBE_GONE_NOTE}) from {t[alone][0]:.1f} to {t[alone][-1]:.1f} s; "
             f"the map (probe 1 alone, gains unknown, {b:.0f} nT) calls {map_blind.sum() / track.sample_rate_hz:.1f} s "
             f"of it blind (bound above {BLIND_FACTOR:g} x its sphere median = {BLIND_FACTOR * median:.2f} deg)"]
    # The single-sample inverse with the gain unknown, on the same captured samples.
    solver = SnapshotSolver.from_calibration(cal, table, gain_free=True)
    lo, hi = t[alone][0], t[alone][-1]
    samples = [s for s in frames_from_capture(capture) if lo <= s.t <= hi]
    res = solver.solve(np.array([s.z for s in samples]), np.array([(s.f_a, s.f_b) for s in samples]),
                       np.array([s.t for s in samples]), samples[0].channels)
    k = np.clip(np.searchsorted(res.t, t), 0, len(res.t) - 1)
    has = alone & (np.abs(res.t[k] - t) < 1e-9)
    snap_u = np.where(has[:, None], res.u[k], np.nan)
    snap_blind = has & ((res.flags[k] & int(EstimateFlag.BLIND)) > 0)
    snap_err = np.degrees(angle_between(snap_u, u_true))

    def share(mask, among) -> str:
        n = int(among.sum())
        return f"{100.0 * np.count_nonzero(mask & among) / n:.0f} %" if n else "-"

    def err_text(err, among) -> str:
        e = err[among & np.isfinite(err)]
        return f"RMS {np.sqrt(np.mean(e ** 2)):.2f} deg, max {e.max():.1f} deg" if e.size else "-"

    lines.append(f"  single-sample inverse, gain unknown (replay --mode snapshot --gain-free): BLIND on "
                 f"{share(snap_blind, map_blind & has)} of the samples the map calls blind (and on "
                 f"{share(snap_blind, seen & has)} of the rest of the stretch: it measures against both probes' "
                 f"median); error {err_text(snap_err, map_blind & has)} there, {err_text(snap_err, seen & has)} "
                 "elsewhere")
    u_est = np.column_stack([est["ux"], est["uy"], est["uz"]])
    trk_err = np.degrees(angle_between(u_est, u_true))
    trk_blind = (est["flags"].astype(np.int64) & int(EstimateFlag.BLIND)) > 0
    lines.append(f"  tracker: BLIND on {share(trk_blind, map_blind)} of the samples the map calls blind and "
                 f"{share(trk_blind, seen)} of the others; error {err_text(trk_err, map_blind)} there, median "
                 f"sigma_deg {np.nanmedian(est['sigma_deg'][map_blind]) if map_blind.any() else float('nan'):.2f}; "
                 "it carries probe 1's gain learned while both probes were there, which one sample cannot do")
    return lines


def _truth_summary(est, track, cal, crlb_deg, angle_between) -> list[str]:
    """Return the printed lines comparing the live track with the simulator's truth."""
    import numpy as np

    from fieldvane.estimator.flags import EstimateFlag

    t_truth = track.t
    idx = np.searchsorted(t_truth, est["t"])
    idx = np.clip(idx, 0, len(t_truth) - 1)
    ok = np.abs(t_truth[idx] - est["t"]) < 1e-6
    u_est = np.column_stack([est["ux"], est["uy"], est["uz"]])
    flags = est["flags"]
    has = ok & np.all(np.isfinite(u_est), axis=1)
    lines = []
    # A sudden step of the field (the scenario's nudge) is unmodeled: the filter gates the first
    # samples after it and re-acquires. Report the time that took, and the steady-state numbers
    # outside those transients beside the all-sample ones.
    transient = np.zeros(len(est["t"]), bool)
    jumps = np.flatnonzero(np.degrees(angle_between(track.u[1:], track.u[:-1])) > 5.0) + 1
    reacq = np.flatnonzero((flags & int(EstimateFlag.REACQUIRED)) > 0)
    for j in jumps:
        start = np.searchsorted(est["t"], track.t[j])
        after = reacq[reacq >= start]
        if after.size:
            transient[start:after[0] + 1] = True
            size = np.degrees(angle_between(track.u[j], track.u[j - 1]))
            lines.append(f"the {size:.0f} deg step of the field at t = {track.t[j]:.1f} s was re-acquired after "
                         f"{after[0] - start + 1} samples ({(est['t'][after[0]] - track.t[j]) * 1000:.0f} ms)")
    steady = has & ~transient
    tracking = steady & ((flags & int(EstimateFlag.TRACKING)) > 0)
    err_all = np.degrees(angle_between(u_est[has], track.u[idx[has]]))
    err = np.degrees(angle_between(u_est[steady], track.u[idx[steady]]))
    err_tr = np.degrees(angle_between(u_est[tracking], track.u[idx[tracking]]))
    bound = crlb_deg(cal.model, track.u[idx[steady]], track.b_nT[idx[steady]])
    sigma = est["sigma_deg"][steady]
    rms = np.sqrt(np.mean(err ** 2))
    lines += [f"estimates with a direction: {has.sum()} of {len(est['t'])} "
              f"({int((has & ((flags & int(EstimateFlag.TRACKING)) > 0)).sum())} fused a measurement, the rest "
              f"coasted through gated or missing samples)",
              f"error against truth, outside step transients: RMS {rms:.4f} deg, 95th pct "
              f"{np.percentile(err, 95):.4f} deg, max {err.max():.3f} deg (fused samples only: RMS "
              f"{np.sqrt(np.mean(err_tr ** 2)):.4f} deg); all samples: RMS {np.sqrt(np.mean(err_all ** 2)):.3f} deg",
              f"single-sample Cramer-Rao bound along the track (both probes, gains known): median "
              f"{np.median(bound):.4f} deg (RMS error / RMS bound = {rms / np.sqrt(np.mean(bound ** 2)):.2f})",
              f"honesty: {np.mean(err < sigma):.1%} within sigma_deg (expect ~63%), "
              f"{np.mean(err < 2 * sigma):.1%} within 2 sigma (expect ~98%)"]
    return lines
