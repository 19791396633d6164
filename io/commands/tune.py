"""`fieldvane tune`: fit the tracking filter's noise settings to a recording or a capture."""

from __future__ import annotations

import math
import sys
import time

DESCRIPTION = """Fit the tracking filter's noise settings to a recorded stretch of data.

INPUT is a recording CSV or a capture folder / capture file (as for `replay`). The command
  1. estimates each channel's lock-in noise from the best-fit residuals of the single-sample
     inverse (windowed medians, outliers dropped, so bursts and spikes do not pull it) and sets
     measurement_noise_scale: the filter has one factor on the calibrated noise of every channel,
     so the per-channel ratios are shown and their root mean square is used;
  2. searches angle random walk and rate random walk (and the drift rates named by --drifts) on
     log grids, a few rounds from coarse to fine, for the largest innovation likelihood; all
     candidate filters of a round run together over the data;
  3. keeps the angle random walk at or above the calibration accuracy floor: an error of the
     calibration is a bias that no innovation reveals, so without a floor a still or smoothly
     turning field would be trusted far beyond what the calibration supports;
  4. replays the whole input with the settings before (defaults, or --filter) and after, and
     prints NIS consistency and, for simulator recordings (true_ux.. columns), errors against
     truth; then writes FILTER.toml (the filter settings file, version 1) with comments saying
     where it came from.

Long inputs are decimated to at most --max-samples samples (every k-th) for steps 1-2; the
settings are continuous-time (per sqrt(s)), so they hold at the full rate. A progress bar is
shown on a terminal when tqdm is installed.

examples:
  fieldvane tune rec.csv -c cal.json -o filter.toml
  fieldvane tune capture/ -c cal.json -o filter.toml --drifts gain --max-samples 50000
  fieldvane replay rec.csv -c cal.json -o est.csv --filter filter.toml
"""

MIN_SAMPLES = 200          # fewer cannot support a noise estimate and a likelihood search
REPLAY_CHUNK = 8192        # samples per tracker call in the before/after replays (progress steps)
BAR_MIN_WORK = 200_000     # candidate-samples below which no progress bar is worth showing


def add_arguments(parser) -> None:
    """Register tune's options."""
    parser.add_argument("input", help="recording CSV, capture folder or capture file")
    parser.add_argument("-c", "--calibration", required=True, help="calibration JSON from `fieldvane calibrate`")
    parser.add_argument("-o", "--output", required=True, help="filter settings TOML to write")
    parser.add_argument("--filter", help="filter settings TOML to start from (defaults otherwise); "
                                         "everything not tuned is kept from it")
    parser.add_argument("--drifts", default="",
                        help="comma list of sensor drifts to switch on and tune: gain, phase (default none)")
    parser.add_argument("--max-samples", type=int, default=20_000,
                        help="samples used for the noise estimate and the search; longer inputs are "
                             "decimated (default 20000)")
    parser.add_argument("--candidates", type=int, default=None,
                        help="candidate settings per search round, run together (default 36 for the two "
                             "motion settings, 64 with one drift, 81 with both)")
    parser.add_argument("--rounds", type=int, default=4, help="coarse-to-fine search rounds (default 4)")
    parser.add_argument("--calibration-floor-deg", default="auto",
                        help="calibration accuracy floor, deg (1-sigma): 'auto' (from the calibration's "
                             "scan size, the default), a number, or 0 for none")
    parser.add_argument("--input-format", choices=("binary", "csv"),
                        help="format of a capture that does not record it")
    parser.add_argument("--force", action="store_true", help="overwrite the output file if it exists")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def run(args) -> int:
    """Tune, report before/after and write the filter TOML; returns the exit code."""
    from pathlib import Path

    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tuning import tune
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.errors import InputError
    from fieldvane.io.filterfile import read_filter_settings
    from fieldvane.io.table_cache import cache_dir_for, load_or_build_table

    drifts = _parse_drifts(args.drifts)
    floor = _parse_floor(args.calibration_floor_deg)
    for option, value, least in (("--max-samples", args.max_samples, MIN_SAMPLES), ("--candidates", args.candidates, 4),
                                 ("--rounds", args.rounds, 1)):
        if value is not None and value < least:
            raise InputError(f"option {option} must be at least {least} (got {value})")
    out = Path(args.output)
    if out.exists() and not args.force:
        raise InputError("output exists (use --force to overwrite)", str(out))
    if out.is_dir():
        raise InputError("output is a folder; give a file name", str(out))
    if not Path(args.input).exists():
        raise InputError("no such file or folder", args.input)
    cal = load_calibration(args.calibration)
    before = read_filter_settings(args.filter) if args.filter else FilterSettings()
    block = _read_input(args.input, args.input_format)
    _check_block(block, cal, args.input)

    table, info = load_or_build_table(cal, cache_dir_for(args.calibration))
    if info.built:
        print(f"lookup table: {table.size} directions, built in {info.build_seconds:.2f} s", file=sys.stderr)
    solver = SnapshotSolver.from_calibration(cal, table)
    noise_solver = SnapshotSolver.from_calibration(cal, table, gain_free=True) if "gain" in drifts else None

    used = min(len(block), args.max_samples)
    bar = _Bar(enabled=not args.no_progress and used * (args.candidates or 36) * args.rounds >= BAR_MIN_WORK)
    start = time.perf_counter()
    try:
        result = tune(cal, block, solver, before, drifts, args.candidates, args.rounds, args.max_samples,
                      floor, noise_solver, progress=bar)
    except ValueError as exc:
        bar.close()
        raise InputError(str(exc), args.input) from None
    seconds = time.perf_counter() - start
    after = result.settings
    summaries = {name: _replay_summary(cal, block, s, solver, bar, name) for name, s in
                 (("before", before), ("after", after))}
    bar.close()

    print(_report(args, block, result, seconds, summaries))
    from fieldvane.io.filterfile import write_filter_settings

    try:
        write_filter_settings(out, after, _comments(args, block, result, summaries))
    except OSError as exc:
        raise InputError(f"cannot write the filter settings: {exc.strerror}", str(out)) from None
    print(f"wrote {out}")
    return 0


# ----------------------------------------------------------------------------------------- options

def _parse_drifts(text: str) -> tuple[str, ...]:
    from fieldvane.estimator.tuning import DRIFTS
    from fieldvane.io.errors import InputError

    names = tuple(dict.fromkeys(p.strip() for p in text.split(",") if p.strip()))
    unknown = [n for n in names if n not in DRIFTS]
    if unknown:
        raise InputError(f"option --drifts: unknown drift {unknown[0]!r} (known: {', '.join(DRIFTS)})")
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
        raise InputError(f"option --calibration-floor-deg must be 'auto' or a number >= 0 (got {text!r})")
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
    print("capture decoder: " + ", ".join(f"{k} {v}" for k, v in counters.items()), file=sys.stderr)
    if not t:
        raise InputError("the capture holds no samples", str(path))
    return SampleBlock(np.array(t, float), np.array(f, float), np.array(z), channels)


def _check_block(block, cal, path: str) -> None:
    import numpy as np

    from fieldvane.io.errors import InputError

    missing = [c for c in cal.model.channels if c not in block.channels]
    if missing:
        raise InputError(f"the input lacks calibrated channel {missing[0]} (input has {' '.join(block.channels)}; "
                         f"calibration has {' '.join(cal.model.channels)})", path, column=f"x_{missing[0]}")
    usable = int(np.sum(np.isfinite(block.t) & np.all(np.isfinite(block.f), axis=1)
                        & np.all(np.isfinite(block.z), axis=1)))
    if usable < MIN_SAMPLES:
        raise InputError(f"too few usable samples to tune: {usable} (need at least {MIN_SAMPLES})", path)


# ----------------------------------------------------------------------------------------- replays

def _replay_summary(cal, block, settings, solver, bar, name: str) -> dict:
    """Return io.report.summarize numbers of the tracker run with `settings` over the whole block."""
    import numpy as np

    from fieldvane.estimator.flags import EstimateFlag
    from fieldvane.estimator.samples import SampleBlock
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.report import summarize, truth_of

    tracker = Tracker(cal, settings, solver.initiate)
    n = len(block)
    parts = []
    bar(0, n, f"replay {name}")
    for s in range(0, n, REPLAY_CHUNK):
        sl = slice(s, min(s + REPLAY_CHUNK, n))
        # The tracker keeps its state between calls: consecutive chunks are one run.
        parts.append(tracker.run_arrays(SampleBlock(block.t[sl], block.f[sl], block.z[sl], block.channels)))
        bar(sl.stop, n, f"replay {name}")
    u = np.concatenate([p.u for p in parts])
    est = {"t": np.concatenate([p.t for p in parts]), "ux": u[:, 0], "uy": u[:, 1], "uz": u[:, 2]}
    for key in ("b_nT", "sigma_deg", "flags", "nis", "nis_dof", "b_a_nT", "b_b_nT"):
        est[key] = np.concatenate([getattr(p, key) for p in parts])
    summary = summarize(est, truth_of(block))
    summary["gated_fraction"] = float(np.mean((est["flags"] & int(EstimateFlag.GATED)) != 0))
    summary["reacquisitions"] = int(np.sum((est["flags"] & int(EstimateFlag.REACQUIRED)) != 0))
    return summary


# ----------------------------------------------------------------------------------------- text

def _fmt(value, digits: int = 4) -> str:
    if isinstance(value, int):
        return str(value)
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:.{digits}g}"


def _report(args, block, result, seconds: float, summaries: dict) -> str:
    """Return the printed report: noise per channel, chosen settings, before/after consistency."""
    from fieldvane.estimator.tuning import KNOBS
    from fieldvane.io.report import WITHIN_1_EXPECTED, WITHIN_2_EXPECTED

    noise, search = result.noise, result.search
    lines = []
    duration = float(block.t[-1] - block.t[0]) if len(block) > 1 else 0.0
    step = "every sample" if result.decimation == 1 else f"every k-th sample, k = {result.decimation}"
    lines.append(f"input: {args.input}: {len(block)} samples over {duration:.4g} s; search on {step} "
                 f"({result.samples_used} samples)")
    lines.append(f"measurement noise (best-fit residuals: {noise.samples} samples in {noise.windows} windows of "
                 f"{noise.window}, {noise.outliers} outlier(s) dropped):")
    lines.append("  channel  calibrated_V  estimated_V  ratio")
    for ch, c_v, e_v, r in zip(noise.channels, noise.calibrated_std_V, noise.std_V, noise.ratio):
        lines.append(f"  {ch:<7}  {c_v:<12.4g}  {e_v:<11.4g}  {r:.3f}")
    lines.append(f"  measurement_noise_scale = {noise.scale:.4g} (one factor for every channel: the RMS of the ratios)")
    if not 1 / 3 <= noise.scale <= 3:
        lines.append("  note: the noise is far from the calibration's; if gains drift, residuals hold the drift: "
                     "try --drifts gain (gain-free fits), or recalibrate")
    if noise.ratio.max() > 1.2 * noise.ratio.min():
        lines.append(f"  note: the channels' ratios differ by more than 20% ({noise.ratio.min():.3g}..{noise.ratio.max():.3g});"
                     " one scale fits them only on average: recalibrate the noise, or ask for a per-channel scale")
    if result.floor_deg > 0:
        lines.append(f"calibration accuracy floor: {result.floor_deg:.3g} deg (scan-size ratio "
                     f"{calibration_error_ratio_text(result)} x single-sample bound {noise.single_sample_deg:.3g} deg) "
                     f"-> angle_random_walk_deg_rt_s >= {result.floor_arw_deg_rt_s:.3g}")
    else:
        lines.append("calibration accuracy floor: none")
    t = search.table
    lines.append(f"search: {search.rounds} round(s), {search.points_per_axis} points per axis, {len(t)} candidates "
                 f"scored, {seconds:.1f} s in all (the filters of a round run together)")
    for k, name in enumerate(t.names):
        tag = " (at the floor)" if name in search.at_limit() else ""
        hard = KNOBS[name].limits
        v = float(t.values[search.best_index, k])
        if not tag and (math.log10(v) <= hard[0] + 1e-9 or math.log10(v) >= hard[1] - 1e-9):
            tag = " (at the edge of the search range)"
        lines.append(f"  {name} = {v:.4g} {KNOBS[name].unit}{tag}")
    if search.reference_index is not None:
        gain = t.loglik[search.best_index] - t.loglik[search.reference_index]
        lines.append(f"  log-likelihood {t.loglik[search.best_index]:.6g} ({gain:+.4g} over the settings before)")
    b, a = summaries["before"], summaries["after"]
    rows = [("NIS/dof mean", "nis_per_dof_mean", "1"),
            ("NIS inside 95% band", "nis_inside_95_band", "0.95"),
            ("gated fraction", "gated_fraction", ""),
            ("reacquisitions", "reacquisitions", ""),
            ("sigma_deg median", "sigma_deg_median", "")]
    if "error_rms_deg" in a:
        rows += [("error RMS, deg", "error_rms_deg", ""),
                 ("within 1 sigma", "within_1sigma", f"{WITHIN_1_EXPECTED:.3f}"),
                 ("within 2 sigma", "within_2sigma", f"{WITHIN_2_EXPECTED:.3f}")]
    lines.append("replay of the whole input   before     after      expected")
    for label, key, expect in rows:
        lines.append(f"  {label:<24}  {_fmt(b.get(key, math.nan)):<9}  {_fmt(a.get(key, math.nan)):<9}  {expect}")
    if "error_rms_deg" not in a:
        lines.append("  (no truth columns: errors against truth need a simulator recording)")
    return "\n".join(lines)


def calibration_error_ratio_text(result) -> str:
    """Return the floor's scan-size ratio as text (floor / single-sample bound)."""
    b = result.noise.single_sample_deg
    return f"{result.floor_deg / b:.3g}" if b > 0 else "n/a"


def _comments(args, block, result, summaries: dict) -> list[str]:
    """Return the leading comment lines of the written filter TOML: where the settings came from."""
    from datetime import datetime, timezone

    from fieldvane import __version__

    noise, search = result.noise, result.search
    when = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    ratios = ", ".join(f"{c} {r:.3f}" for c, r in zip(noise.channels, noise.ratio))
    b, a = summaries["before"], summaries["after"]
    lines = [f"written by fieldvane {__version__} tune on {when}",
             f"input: {args.input} ({len(block)} samples; noise and search on {result.samples_used}, "
             f"every {result.decimation})",
             f"calibration: {args.calibration}",
             f"started from: {args.filter or 'defaults'}",
             f"noise std ratio to calibrated, per channel: {ratios} -> measurement_noise_scale {noise.scale:.4g}",
             f"tuned by innovation likelihood: {', '.join(search.table.names)} "
             f"({search.rounds} rounds, {len(search.table)} candidates)",
             f"calibration accuracy floor {result.floor_deg:.3g} deg -> angle_random_walk_deg_rt_s >= "
             f"{result.floor_arw_deg_rt_s:.3g}",
             f"replay: NIS/dof mean {_fmt(a.get('nis_per_dof_mean'))}, inside 95% band "
             f"{_fmt(a.get('nis_inside_95_band'))} (before {_fmt(b.get('nis_per_dof_mean'))}, "
             f"{_fmt(b.get('nis_inside_95_band'))})"]
    if "within_1sigma" in a:
        lines.append(f"against truth: error RMS {_fmt(a['error_rms_deg'])} deg, within 1/2 sigma "
                     f"{_fmt(a['within_1sigma'], 3)}/{_fmt(a['within_2sigma'], 3)} (before "
                     f"{_fmt(b['error_rms_deg'])} deg, {_fmt(b['within_1sigma'], 3)}/{_fmt(b['within_2sigma'], 3)})")
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
        if stage != self._stage:
            self.close()
            unit = "sample" if stage.startswith("replay") else "candidate" if stage.startswith("round") else "step"
            self._bar = self._tqdm(total=total, desc=stage, unit=unit, file=sys.stderr, leave=False)
            self._stage = stage
        self._bar.n = done
        self._bar.refresh()

    def close(self) -> None:
        """Close the current bar, if any."""
        if self._bar is not None:
            self._bar.close()
        self._bar = None
        self._stage = None
