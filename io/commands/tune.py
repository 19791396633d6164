"""`fieldvane tune`: choose the tracking filter's states and noise settings from a recording or a capture."""

from __future__ import annotations

import math
import sys
import time

DESCRIPTION = """Choose the tracking filter's states and noise settings from a recorded stretch of data.

INPUT is a recording CSV or a capture folder / capture file (as for `replay`). The command
  1. measures each channel's lock-in noise from second differences of the lock-in values, which
     cancel anything constant or linear over a few samples, so a slow gain or phase drift is never
     taken for noise (written as channel_noise_scale); and the lock-in's output filter (time
     constant, order): from --filter or the recording's metadata when they state it, otherwise
     fitted from how those differences grow with the lag (0 when the samples are independent);
  2. compares three sets of filter states: none (direction and turning rate), gain (plus a gain
     drift per probe) and gain+phase (plus a phase drift per channel). Each set's process noise
     is searched for the largest innovation likelihood (a coarse grid, then a compass search, on
     every k-th sample: the settings are per sqrt(s), so they hold at any rate, and k leaves
     neighbouring samples nearly independent of the lock-in). The sets are compared by BIC
     (-2 logL + p ln T), and a richer set must also gain more than absorbing the calibration's
     own model error could explain;
  3. keeps the angle random walk at or above the calibration accuracy floor: an error of the
     calibration is a bias that no innovation reveals;
  4. replays the whole input with the settings before (defaults or --filter, with the recording's
     lock-in) and after, and ends with a verdict on sigma: against truth for simulator recordings
     (true_ux.. columns: the share of errors within 1 and 2 sigma), otherwise NIS consistency and
     whiteness of the innovations; a warning when it is off;
  5. writes FILTER.toml (the filter settings file, version 1) with comments saying where every
     value came from.

A progress bar is shown on a terminal when tqdm is installed. The tuned filter states its own
uncertainty; it is not a safety or navigation instrument by itself.

examples:
  fieldvane tune rec.csv -c cal.json -o filter.toml
  fieldvane tune capture/ -c cal.json -o filter.toml --states none,gain
  fieldvane replay rec.csv -c cal.json -o est.csv --filter filter.toml
"""

MIN_SAMPLES = 200          # fewer cannot support a noise estimate and a likelihood search
REPLAY_CHUNK = 16384       # samples per tracker call in the replays
BEFORE_MAX_REACQUISITIONS = 50   # the replay of the settings before stops once it has lost the track more often
KAPPA_MISMATCH = 0.25      # stated and measured lock-in bandwidth factors differing by more: a note


def add_arguments(parser) -> None:
    """Register tune's options."""
    parser.add_argument("input", help="recording CSV, capture folder or capture file")
    parser.add_argument("-c", "--calibration", required=True, metavar="CAL.json",
                        help="calibration JSON written by `fieldvane calibrate` (its .npz beside it)")
    parser.add_argument("-o", "--output", required=True, metavar="FILTER.toml",
                        help="file to write: the filter settings TOML")
    parser.add_argument("--filter", metavar="FILTER.toml", help="filter settings TOML to start from (defaults otherwise); "
                                         "everything not tuned is kept from it")
    parser.add_argument("--states", default="none,gain,gain+phase",
                        help="comma list of the state sets to compare: none, gain, gain+phase (default all three)")
    parser.add_argument("--max-samples", type=int, default=2000,
                        help="samples the search uses at most; longer inputs are decimated (default 2000)")
    parser.add_argument("--calibration-floor-deg", default="auto",
                        help="calibration accuracy floor, deg (1-sigma): 'auto' (from the calibration's "
                             "scan size, the default), a number, or 0 for none")
    parser.add_argument("--input-format", choices=("binary", "csv"),
                        help="binary wire frames or recording-CSV lines: a capture's format when it does not record it")
    parser.add_argument("--force", action="store_true", help="replace existing output files (never an input)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def run(args) -> int:
    """Tune, report the comparison and before/after, write the filter TOML, end with the verdict; returns 0."""
    from pathlib import Path

    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tuning import MemoInitiator, tune
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.errors import InputError
    from fieldvane.io.estimation import sample_rate_from, settings_for_stream
    from fieldvane.io.filterfile import read_filter_settings, write_filter_settings
    from fieldvane.io.outputs import check_output
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    states = _parse_states(args.states)
    floor = _parse_floor(args.calibration_floor_deg)
    if args.max_samples < MIN_SAMPLES:
        raise InputError(f"must be at least {MIN_SAMPLES} (got {args.max_samples})", column="--max-samples",
                         kind="option")
    if not Path(args.input).exists():
        raise InputError("no such file or folder", args.input)
    out = check_output(args.output, inputs=[args.input, args.calibration, args.filter], force=args.force,
                       option="--output")
    cal = load_calibration(args.calibration)
    given = read_filter_settings(args.filter) if args.filter else None
    block = _read_input(args.input, args.input_format)
    _check_block(block, cal, args.input)
    before = settings_for_stream(given, block.metadata, args.input)
    if given is not None and given.lockin_time_constant_s > 0:
        lockin_source = f"from {args.filter}"
    elif before.lockin_time_constant_s > 0:
        lockin_source = "from the recording's metadata"
    else:
        lockin_source = "fitted from the data"
    rate = sample_rate_from(block.metadata, args.input)

    table, info = load_or_build_table(cal, cache_dir_for(args.calibration))
    if info.built:
        print(f"lookup table: {table.size} directions, built in {info.build_seconds:.2f} s", file=sys.stderr)
    solver = SnapshotSolver.from_calibration(cal, table)
    initiator = MemoInitiator(solver.initiate)

    bar = _Bar(enabled=not args.no_progress)
    start = time.perf_counter()
    try:
        result = tune(cal, block, initiator, before, states, args.max_samples, floor, progress=bar)
    except ValueError as exc:
        bar.close()
        raise InputError(str(exc), args.input) from None
    seconds = time.perf_counter() - start
    notes = _lockin_check(cal, block, before, result) if lockin_source != "fitted from the data" else []
    after = result.settings
    bar(0, 2, "replays")
    summaries = _replays(cal, block, {"after": after, "before": before}, solver.initiate, rate)
    bar(2, 2, "replays")
    bar.close()
    if summaries["before"] is None:
        notes.append(f"the settings before lost the track more than {BEFORE_MAX_REACQUISITIONS} times: their replay "
                     f"was stopped there")
        summaries["before"] = {}
    verdict = _verdict(summaries["after"])

    print(_report(args, block, result, seconds, summaries, lockin_source, notes))
    try:
        write_filter_settings(out, after, _comments(args, block, result, summaries, lockin_source, verdict,
                                                   before))
    except OSError as exc:
        raise InputError(f"cannot write the filter settings: {exc.strerror}", str(out)) from None
    print(f"wrote {out}")
    print(f"verdict: {verdict.text}")
    if verdict.state not in ("honest", "unknown"):
        print(f"warning: {verdict.text.split(':')[0]}: see the verdict above; check the calibration, the lock-in "
              f"settings and --states before trusting sigma", file=sys.stderr)
    return 0


# ----------------------------------------------------------------------------------------- options

def _parse_states(text: str) -> tuple[str, ...]:
    from fieldvane.estimator.tuning import SET_ORDER
    from fieldvane.io.errors import InputError

    names = tuple(dict.fromkeys(p.strip() for p in str(text).split(",") if p.strip()))
    unknown = [n for n in names if n not in SET_ORDER]
    if unknown or not names:
        what = f"unknown state set {unknown[0]!r}" if unknown else "no state set given"
        raise InputError(f"{what} (known: {', '.join(SET_ORDER)})", column="--states", kind="option")
    return names


def _parse_floor(text: str) -> float | None:
    from fieldvane.io.errors import InputError

    if str(text).strip().lower() == "auto":
        return None
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (0.0 <= value < math.inf):
        raise InputError(f"must be 'auto' or a number >= 0 (got {text!r})", column="--calibration-floor-deg",
                         kind="option")
    return value


# ----------------------------------------------------------------------------------------- input

def _read_input(path: str, input_format: str | None):
    """Return the whole input as one SampleBlock (recording CSV or capture); warnings go to stderr."""
    from fieldvane.io.commands.replay import _is_capture

    if _is_capture(path):
        return _read_capture(path, input_format)
    from fieldvane.io.recording import read_recording

    block, warnings = read_recording(path)
    for w in warnings:
        print(f"warning: {w}", file=sys.stderr)
    return block


def _read_capture(path: str, input_format: str | None):
    import numpy as np

    from fieldvane.estimator.samples import SampleBlock
    from fieldvane.io.errors import InputError
    from fieldvane.io.live import frames_from_capture

    t, f, z = [], [], []
    channels = None
    counters: dict = {}
    for sample in frames_from_capture(path, input_format, counters=counters):
        if channels is None:
            channels = tuple(sample.channels)
        elif tuple(sample.channels) != channels:
            raise InputError(f"the capture changes channels at sample {len(t) + 1} "
                             f"({' '.join(channels)} -> {' '.join(sample.channels)}); tune one part at a time",
                             str(path))
        t.append(sample.t)
        f.append((sample.f_a, sample.f_b))
        z.append(np.asarray(sample.z, complex))
    from fieldvane.io.estimation import counters_table
    print(counters_table(counters, "capture decoder:"), file=sys.stderr)
    if not t:
        raise InputError("the capture holds no samples", str(path))
    return SampleBlock(np.array(t, float), np.array(f, float), np.array(z), channels)


def _check_block(block, cal, path: str) -> None:
    import numpy as np

    from fieldvane.io.errors import InputError

    missing = [c for c in cal.model.channels if c not in block.channels]
    if missing:
        line = getattr(block, "header_line", None)
        raise InputError(f"the input lacks calibrated channel {missing[0]} (input has "
                         f"{' '.join(block.channels) or 'no lock-in columns'}; calibration has "
                         f"{' '.join(cal.model.channels)})", path, line, column=f"x_{missing[0]}")
    usable = int(np.sum(np.isfinite(block.t) & np.all(np.isfinite(block.f), axis=1)
                        & np.all(np.isfinite(block.z), axis=1)))
    if usable < MIN_SAMPLES:
        raise InputError(f"too few usable samples to tune: {usable} (need at least {MIN_SAMPLES})", path)


def _lockin_check(cal, block, stated, result) -> list[str]:
    """Return a note when the lock-in the data show differs from the stated one (bandwidth factor off > 25 %)."""
    from fieldvane.estimator.tuning import stream_noise

    try:
        seen = stream_noise(cal, block, stated.replace(lockin_time_constant_s=0.0))
    except ValueError:
        return []
    kappa = result.noise.kappa
    if abs(seen.kappa / kappa - 1.0) <= KAPPA_MISMATCH:
        return []
    looks = "independent samples" if seen.tau_s == 0 else f"{seen.order} x {1e3 * seen.tau_s:.3g} ms"
    return [f"the data look like a lock-in of {looks} (correlation factor {seen.kappa:.2f}), not the stated "
            f"{result.noise.order} x {1e3 * result.noise.tau_s:.3g} ms ({kappa:.2f}): check the lock-in settings"]


# ----------------------------------------------------------------------------------------- replays

def _replays(cal, block, settings: dict, initiator, rate_hz) -> dict:
    """Return {name: summary} of the tracker run over the whole block with each of settings (name -> settings);
    the runs go in parallel threads (the compiled filter releases the interpreter lock). 'before' gives up
    (None) once it has lost the track more than BEFORE_MAX_REACQUISITIONS times: each restart costs a solve."""
    from concurrent.futures import ThreadPoolExecutor

    from fieldvane.estimator.tracker import Tracker, TrackerModel

    model = TrackerModel(cal.model, 1.0)
    names = list(settings)
    Tracker(cal, settings[names[0]], initiator, model=model)   # fills the model's shared caches before threads

    def one(name):
        limit = BEFORE_MAX_REACQUISITIONS if name == "before" else None
        return _replay_summary(cal, block, settings[name], initiator, rate_hz, model, limit)

    with ThreadPoolExecutor(max_workers=len(names)) as pool:
        done = list(pool.map(one, names))
    return dict(zip(names, done))


def _replay_summary(cal, block, settings, initiator, rate_hz, model=None, give_up_after: int | None = None):
    """Return io.report.summarize numbers (plus NIS statistics and the bound) of the tracker over the whole block;
    None when give_up_after is set and the track was lost more often than that."""
    import numpy as np

    from fieldvane.estimator.flags import EstimateFlag
    from fieldvane.estimator.honesty import nis_statistics
    from fieldvane.estimator.samples import SampleBlock
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.report import summarize, truth_of

    tracker = Tracker(cal, settings, initiator, sample_rate_hz=rate_hz, model=model)
    keys = ("t", "u", "b_nT", "sigma_deg", "flags", "nis", "nis_dof", "b_a_nT", "b_b_nT", "bound_deg")
    parts: dict = {k: [] for k in keys}
    for s in range(0, len(block), REPLAY_CHUNK):
        sl = slice(s, s + REPLAY_CHUNK)
        # The tracker keeps its state between calls: consecutive chunks are one run.
        rec = tracker.run_arrays(SampleBlock(block.t[sl], block.f[sl], block.z[sl], block.channels))
        for k in keys:
            parts[k].append(getattr(rec, k))
        if give_up_after is not None and tracker.counters.acquisitions - 1 > give_up_after:
            return None
    est = {k: np.concatenate(v) for k, v in parts.items()}
    u = est.pop("u")
    est.update(ux=u[:, 0], uy=u[:, 1], uz=u[:, 2])
    summary = summarize(est, truth_of(block))
    flags = est["flags"]
    summary["gated_fraction"] = float(np.mean((flags & int(EstimateFlag.GATED)) != 0))
    summary["reacquisitions"] = max(tracker.counters.acquisitions - 1, 0)
    bound = est["bound_deg"][np.isfinite(est["bound_deg"])]
    summary["bound_deg_median"] = float(np.median(bound)) if bound.size else math.nan
    if math.isfinite(summary.get("error_rms_deg", math.nan)) and summary["bound_deg_median"] > 0:
        summary["error_over_bound"] = summary["error_rms_deg"] / summary["bound_deg_median"]
    s = tracker.settings
    summary["nis_statistics"] = nis_statistics(est["nis"], est["nis_dof"],
                                               (flags & int(EstimateFlag.TRACKING)) != 0, tracker.sample_rate_hz,
                                               s.lockin_time_constant_s, s.lockin_filter_order)
    return summary


def _verdict(summary: dict):
    from fieldvane.estimator.honesty import nis_verdict, truth_verdict

    if "within_1sigma" in summary:
        return truth_verdict(summary["within_1sigma"], summary["within_2sigma"])
    return nis_verdict(summary["nis_statistics"])


# ----------------------------------------------------------------------------------------- text

def _fmt(value, digits: int = 4) -> str:
    if isinstance(value, int):
        return str(value)
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:.{digits}g}"


SHORT = {"angle_random_walk_deg_rt_s": ("angle rw", "deg/rt(s)"),
         "rate_random_walk_deg_s_rt_s": ("rate rw", "(deg/s)/rt(s)"),
         "gain_drift_per_rt_s": ("gain rw", "1/rt(s)"),
         "phase_drift_deg_rt_s": ("phase rw", "deg/rt(s)")}


def comparison_table(result) -> list[str]:
    """Return the state-set comparison as text lines (one row per set, the chosen one marked '*')."""
    from fieldvane.estimator.tuning import KNOBS

    knobs = list(KNOBS)
    n_dof = 2 * len(result.noise.channels)
    head = f"    {'state set':<11}" + "".join(f"{SHORT[k][0]:>14}" for k in knobs) + \
        f"{'logL':>14}{'penalty':>9}{'BIC':>15}{'NIS/dof':>9}{'gated':>8}"
    units = f"    {'':<11}" + "".join(f"{SHORT[k][1]:>14}" for k in knobs)
    lines = [head, units]
    for name, r in result.sets.items():
        vals = r.values()
        mark = "*" if name == result.chosen else " "
        cells = "".join(f"{_fmt(vals[k], 3):>14}" if k in vals else f"{'-':>14}" for k in knobs)
        i = r.best_index
        lines.append(f"  {mark} {name:<11}{cells}{r.loglik:>14.1f}{r.penalty:>9.1f}{r.score:>15.1f}"
                     f"{r.table.mean_nis[i] / n_dof:>9.3f}{100 * r.table.fraction_gated[i]:>7.2f}%")
    return lines


def _lockin_line(result, source: str) -> str:
    from fieldvane.estimator.lockin_noise import enbw_hz, group_delay_s

    nf = result.noise
    if nf.tau_s <= 0:
        return f"lock-in: samples independent ({source}; correlation factor 1)"
    fit = ""
    if nf.by_order:
        best = min(m for _, _, m in nf.by_order)
        close = [o for o, _, m in nf.by_order if m <= 1.2 * best]
        fit = f"; orders {min(close)}-{max(close)} fit within 20 %" if len(close) > 1 else ""
    return (f"lock-in: {nf.order} x {1e3 * nf.tau_s:.4g} ms {source} (noise bandwidth "
            f"{enbw_hz(nf.tau_s, nf.order):.3g} Hz, correlation factor {nf.kappa:.2f}, delay "
            f"{1e3 * group_delay_s(nf.tau_s, nf.order):.3g} ms removed{fit})")


def _report(args, block, result, seconds: float, summaries: dict, lockin_source: str, notes: list[str]) -> str:
    """Return the printed report: noise, lock-in, floor, the state-set comparison, before/after replays."""
    import numpy as np

    from fieldvane.io.report import WITHIN_1_EXPECTED, WITHIN_2_EXPECTED

    nf = result.noise
    lines = []
    duration = float(block.t[-1] - block.t[0]) if len(block) > 1 else 0.0
    step = "every sample" if result.decimation == 1 else f"every {result.decimation}th sample"
    lines.append(f"input: {args.input}: {len(block)} samples over {duration:.4g} s at {nf.sample_rate_hz:.4g} Hz; "
                 f"search on {step} ({result.samples_used} samples)")
    lines.append(_lockin_line(result, lockin_source))
    lines.append("measurement noise (second differences of the lock-in values, in which a slow drift cancels):")
    lines.append("  channel  calibrated_V  stream_V     ratio")
    ratio = nf.ratio(np.asarray(result.calibrated_std_V))
    for ch, c_v, e_v, r in zip(nf.channels, result.calibrated_std_V, nf.std_V, ratio):
        lines.append(f"  {ch:<7}  {c_v:<12.4g}  {e_v:<11.4g}  {r:.3f}")
    lines.append("  channel_noise_scale: these ratios over their RMS; the filter learns the common level from the stream")
    if nf.burst_fraction > 0:
        lines.append(f"  ({100 * nf.burst_fraction:.1f} % of the samples left out as noise bursts)")
    if result.floor_deg > 0:
        lines.append(f"calibration accuracy floor: {result.floor_deg:.3g} deg (model error {result.error_ratio:.3g} x "
                     f"single-sample bound {result.bound_calibrated_deg:.3g} deg at the calibrated noise) "
                     f"-> angle_random_walk_deg_rt_s >= {result.floor_arw_deg_rt_s:.3g}")
    else:
        lines.append("calibration accuracy floor: none")
    lines.append(f"state sets: innovation log-likelihood on {result.samples_used} samples, BIC = -2 logL + p ln T "
                 f"(smaller is better); a richer set must beat a simpler one by more than "
                 f"{2 * result.allowance:.4g}, what absorbing the calibration's model error could gain")
    lines += comparison_table(result)
    lines.append(f"  chosen: {result.chosen}; {result.candidates} candidates scored in {seconds:.1f} s")
    ref = result.reference
    if ref is not None and np.isfinite(ref.loglik[0]):
        best = result.sets[result.chosen].loglik
        lines.append(f"  log-likelihood {best:.6g} ({best - float(ref.loglik[0]):+.4g} over the settings before)")
    track = track_check_line(result.track_check)
    if track:
        lines.append(track)
    b, a = summaries["before"], summaries["after"]
    rows = [("NIS/dof mean", "nis_per_dof_mean", "1"),
            ("NIS inside 95% band", "nis_inside_95_band", "0.95"),
            ("gated fraction", "gated_fraction", ""),
            ("reacquisitions", "reacquisitions", ""),
            ("sigma_deg median", "sigma_deg_median", ""),
            ("single-sample bound median", "bound_deg_median", "")]
    if "error_rms_deg" in a:
        rows += [("error RMS, deg", "error_rms_deg", ""),
                 ("error RMS / bound", "error_over_bound", ""),
                 ("within 1 sigma", "within_1sigma", f"{WITHIN_1_EXPECTED:.3f}"),
                 ("within 2 sigma", "within_2sigma", f"{WITHIN_2_EXPECTED:.3f}")]
    lines.append("replay of the whole input     before     after      expected")
    for label, key, expect in rows:
        lines.append(f"  {label:<27} {_fmt(b.get(key, math.nan)):<10} {_fmt(a.get(key, math.nan)):<10} {expect}")
    if "error_rms_deg" not in a:
        lines.append("  (no truth columns: errors against truth need a simulator recording)")
    for note in notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def track_check_line(check) -> str:
    """Return the line saying how the whole input's track keeping shaped the motion noise ('' if not checked)."""
    if check is None:
        return ""
    if not check.raised and check.lost_likelihood <= check.lost_before:
        return (f"track check (whole input): the likelihood's choice lost the track {check.lost_likelihood} time(s), "
                f"the settings before {check.lost_before}: kept")
    moved = ", ".join(f"{k} {old:.3g} -> {new:.3g}" for k, (old, new) in check.raised.items())
    held = "now as often as before" if check.lost_after <= check.lost_before else "still more often"
    return (f"track check (whole input): the likelihood's choice lost the track {check.lost_likelihood} time(s) where "
            f"the settings before lost it {check.lost_before}: motion noise moved {check.fraction:.2g} of the way "
            f"(log) toward theirs ({moved}); it loses it {check.lost_after} time(s), {held}")


def _comments(args, block, result, summaries: dict, lockin_source: str, verdict, before) -> list[str]:
    """Return the leading comment lines of the written filter TOML: where the settings came from."""
    from datetime import datetime, timezone

    from fieldvane import __version__
    from fieldvane.estimator.tuning import state_set_of

    nf = result.noise
    when = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    ratios = ", ".join(f"{c} {r:.3f}" for c, r in zip(nf.channels, nf.ratio(result.calibrated_std_V)))
    chosen = result.sets[result.chosen]
    lockin = "independent samples" if nf.tau_s <= 0 else f"{nf.order} x {1e3 * nf.tau_s:.4g} ms"
    lines = [f"written by fieldvane {__version__} tune on {when}",
             f"input: {args.input} ({len(block)} samples; search on {result.samples_used}, every "
             f"{result.decimation})",
             f"calibration: {args.calibration}",
             f"started from: {args.filter or 'defaults'} (state set {state_set_of(before)})",
             f"lock-in filter: {lockin}, {lockin_source} (correlation factor {nf.kappa:.3g})",
             f"noise std of the stream over the calibrated, from second differences: {ratios}; channel_noise_scale "
             f"holds them relative to their RMS (the filter learns the common level from the stream)",
             f"state set: {result.chosen}, chosen by BIC among "
             + ", ".join(f"{n} {r.score:.1f}" for n, r in result.sets.items())
             + f" (a richer set had to win by more than {2 * result.allowance:.4g})",
             "process noise by innovation likelihood: "
             + ", ".join(f"{k} {v:.3g}" for k, v in chosen.values().items()),
             f"calibration accuracy floor {result.floor_deg:.3g} deg -> angle_random_walk_deg_rt_s >= "
             f"{result.floor_arw_deg_rt_s:.3g}"]
    track = track_check_line(result.track_check)
    if track:
        lines.append(track)
    a = summaries["after"]
    lines.append(f"replay: NIS/dof mean {_fmt(a.get('nis_per_dof_mean'))}, inside 95% band "
                 f"{_fmt(a.get('nis_inside_95_band'))}")
    if "within_1sigma" in a:
        lines.append(f"against truth: error RMS {_fmt(a['error_rms_deg'])} deg, within 1/2 sigma "
                     f"{_fmt(a['within_1sigma'], 3)}/{_fmt(a['within_2sigma'], 3)}")
    lines.append(f"verdict: {verdict.text}")
    return lines


class _Bar:
    """Progress callback for the tuner: one tqdm bar per stage on stderr, only on a terminal with tqdm."""

    def __init__(self, enabled: bool):
        self._tqdm = None
        if enabled and sys.stderr.isatty():
            try:
                from tqdm import tqdm
            except ImportError:
                tqdm = None
            self._tqdm = tqdm
        self._bar = None
        self._stage = None

    def __call__(self, done: int, total: int, stage: str) -> None:
        if self._tqdm is None:
            return
        kind = stage.split(":")[0]
        if kind != self._stage:
            self.close()
            unit = "sample" if stage.startswith("replay") else "candidate" if stage.startswith("search") else "step"
            self._bar = self._tqdm(total=total, desc=kind, unit=unit, file=sys.stderr, leave=False)
            self._stage = kind
        self._bar.total = max(total, 1)
        self._bar.n = done
        self._bar.refresh()

    def close(self) -> None:
        """Close the current bar, if any."""
        if self._bar is not None:
            self._bar.close()
        self._bar = None
        self._stage = None
