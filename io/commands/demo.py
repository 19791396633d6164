"""`fieldvane demo`: the whole job on the built-in simulated sensor, end to end, in about a minute."""

from __future__ import annotations

import sys
import threading
import time

DESCRIPTION = """Run the whole job on the built-in simulated sensor, with no hardware:

  1. simulate a calibration scan (a coil system steps the field over the sphere at 5-25 uT),
  2. calibrate, and map where the sensor is blind (Cramer-Rao bound),
  3. bring the simulated sensor up on a virtual serial port (pty) streaming wire frames,
  4. track a field turning through the blind planes live: capture, estimate, stream to a
     logger file, with a status line,
  5. replay the capture and check it reproduces the live estimates exactly,
  6. summarize: error against truth, the Cramer-Rao bound, link counters, and plots.

Everything lands in a new folder under --out (default demo_out/). The story (a sensor on a
slowly turning test mount inside coils) is invented for the demo.
"""


def add_arguments(parser) -> None:
    """Register demo's options."""
    parser.add_argument("--out", default="demo_out", help="parent folder for the demo's files (default demo_out)")
    parser.add_argument("--duration", type=float, default=45.0,
                        help="seconds of live tracking, streamed in real time (default 45, at most 60)")
    parser.add_argument("--no-plots", action="store_true", help="skip the figures")


def _say(text: str) -> None:
    print(text, flush=True)


def run(args) -> int:
    """Run the demo; returns the exit code."""
    import datetime as dt
    from pathlib import Path

    import numpy as np

    from fieldvane.estimator.fisher import crlb_deg
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.sphere import angle_between
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.firmware_sim.emitter import Emitter, PtySink
    from fieldvane.firmware_sim.scenario import builtin_scenario_path, load_scenario, simulate
    from fieldvane.io.commands.calibrate import calibrate_file, summary_text
    from fieldvane.io.errors import JobError
    from fieldvane.io.live import replay_capture, run_live
    from fieldvane.io.recording import write_recording
    from fieldvane.io.sinks import close_sinks, open_sink
    from fieldvane.io.table_cache import load_or_build_table

    started = time.perf_counter()
    stamp = dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    out = Path(args.out) / stamp
    out.mkdir(parents=True, exist_ok=False)
    duration = max(5.0, min(float(args.duration), 60.0))
    _say(f"fieldvane demo -> {out}/")
    _say("(simulated sensor; not a safety or navigation instrument)")

    # 1. calibration scan
    scan_run = simulate(load_scenario(builtin_scenario_path("demo_scan")))
    write_recording(out / "scan.csv", scan_run.recording_columns(), scan_run.metadata())
    _say(f"\n[1/6] calibration scan: {scan_run.n_samples} samples at "
         f"{', '.join(f'{b / 1000:g}' for b in sorted(set(np.round(scan_run.b_nT, -2))))} uT -> scan.csv")

    # 2. calibrate (as `fieldvane calibrate` does), cache the lookup table, map the bound
    cal, _, _ = calibrate_file(out / "scan.csv", out / "cal.json")
    _say("\n[2/6] calibration (cal.json):")
    _say("  " + summary_text(cal, "scan.csv", scan_run.n_samples, 0).replace("\n", "\n  "))
    table, info = load_or_build_table(cal, out / "tables")
    _say(f"  lookup table: {table.size} directions, built in {info.build_seconds:.2f} s, "
         f"{info.size_bytes / 1024:.0f} KiB")
    plt = None if args.no_plots else _pyplot()
    from fieldvane.io.crlb_map import make_map, summary_lines
    maps, map_files, b_map = make_map(cal, out / "map", plt=plt)
    _say(f"  Cramer-Rao bound at {b_map:.0f} nT, per probe set:")
    for line in summary_lines(maps):
        _say("    " + line)

    # 3. simulated sensor on a pty
    track = simulate(load_scenario(builtin_scenario_path("demo_track"), duration_s=duration))
    write_recording(out / "track_truth.csv", track.recording_columns(), track.metadata())
    sink = PtySink()
    emitter = Emitter(track, sink, fmt="binary", realtime=True)
    _say(f"\n[3/6] simulated sensor streaming wire frames on virtual serial port {sink.path} "
         f"({track.n_samples} samples, {duration:g} s at {track.sample_rate_hz:g} Hz)")

    # 4. live tracking
    solver = SnapshotSolver.from_calibration(cal, table)
    tracker = Tracker(cal, None, solver.initiate)
    last = {"err": float("nan"), "est": None}

    def estimate(sample):
        est = tracker.step(sample)
        last["est"] = est
        return est.row()

    live_csv = out / "estimates.csv"
    outputs = [str(live_csv), str(out / "estimates.nmea")]
    done = threading.Event()

    def drive(loop):
        def body():
            # Start the sensor once the port is open, so the first frame is not cut in half.
            give_up = time.monotonic() + 10.0
            while not loop.link.counters().get("connected") and time.monotonic() < give_up:
                time.sleep(0.01)
            emitter.start()
            while not emitter.sent_all.wait(0.25):
                _status(loop, last, emitter)
                if emitter.finished.is_set():
                    break
            loop.wait_for(lambda lp: lp.samples >= emitter.stats.records_sent, 5.0)
            _status(loop, last, emitter)
            if sys.stderr.isatty():
                sys.stderr.write("\n")
            loop.stop()
            done.set()
        threading.Thread(target=body, name="demo-driver", daemon=True).start()

    _say("\n[4/6] tracking live (capture -> decode -> track -> logger files):")
    summary = run_live(sink.path, "binary", estimate, outputs, str(out / "capture"), log=None,
                       on_ready=drive)
    emitter.stop()
    if summary.interrupted:
        _say("interrupted")
        return 130
    if emitter.error is not None:
        raise JobError(f"the simulated sensor failed: {emitter.error}")

    # 5. replay the capture
    replay_tracker = Tracker(cal, None, SnapshotSolver.from_calibration(cal, table).initiate)
    replay_sink = open_sink(str(out / "replay.csv"))
    replay_capture(out / "capture", lambda s: replay_tracker.step(s).row(), [replay_sink])
    close_sinks([replay_sink])
    same = (out / "replay.csv").read_bytes() == live_csv.read_bytes()
    _say(f"\n[5/6] replay of the capture reproduces the live estimates exactly: {'yes' if same else 'NO'}")

    # 6. summary against truth
    from fieldvane.io.estimates_csv import read_estimates
    est = read_estimates(live_csv)
    c = summary.counters
    _say("\n[6/6] summary")
    _say(f"  link: {c['decoder']['frames_ok']} frames ok, {c['decoder']['crc_errors']} CRC errors, "
         f"{c['decoder']['seq_gaps']} missing by sequence, {c['decoder']['bytes_discarded']} bytes discarded; "
         f"sent {emitter.stats.records_sent}")
    numbers = _truth_summary(est, track, cal, crlb_deg, angle_between)
    for line in numbers:
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


def _status(loop, last, emitter) -> None:
    """Rewrite one status line on stderr: time, direction, sigma, flags, link counters."""
    from fieldvane.estimator.flags import describe

    est = last["est"]
    dec = loop.decoder.counters()
    if est is None:
        text = f"  waiting for frames... sent {emitter.stats.records_sent}"
    else:
        u = est.u
        text = (f"  t {est.t:6.1f} s  u ({u[0]:+.3f} {u[1]:+.3f} {u[2]:+.3f})  |B| {est.b_nT:7.0f} nT  "
                f"sigma {est.sigma_deg:6.3f} deg  {describe(est.flags)[:28]:28s}  "
                f"frames {dec['frames_ok']} crc {dec['crc_errors']}")
    if sys.stderr.isatty():
        sys.stderr.write("\r" + text[:150])
        sys.stderr.flush()
    elif est is not None and int(est.t * 4) % 20 == 0:   # a plain line every ~5 s in logs
        print(text.strip(), file=sys.stderr, flush=True)


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
              f"single-sample Cramer-Rao bound along the track: median {np.median(bound):.4f} deg "
              f"(RMS error / RMS bound = {rms / np.sqrt(np.mean(bound ** 2)):.2f})",
              f"honesty: {np.mean(err < sigma):.1%} within sigma_deg (expect ~63%), "
              f"{np.mean(err < 2 * sigma):.1%} within 2 sigma (expect ~98%)"]
    return lines
