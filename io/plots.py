"""Figures of an estimates CSV (PNG via matplotlib's Agg canvas; matplotlib is imported lazily).

Every plot_* function takes the estimates columns (name -> array, as read_estimates returns them),
optional truth columns (t, true_ux, true_uy, true_uz, true_b_nT), draws one figure, saves it as a
PNG and returns its path. Times are shown relative to the first estimate.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from fieldvane.estimator.flags import EstimateFlag
# The same two hemisphere views (label, frame rows e1, e2, center) and projection as the Cramer-Rao bound map.
from fieldvane.io.crlb_map import HEMISPHERES, lambert_forward

DPI = 110
MAX_TRACK_POINTS = 20000     # the track scatter is thinned evenly beyond this (the figure looks the same)


class PlotsUnavailable(ImportError):
    """matplotlib cannot be imported (the optional 'plots' extra is not installed)."""


def require_matplotlib() -> None:
    """Return None when matplotlib can be imported; raise PlotsUnavailable otherwise."""
    try:
        import matplotlib  # noqa: F401
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    except ImportError as exc:
        raise PlotsUnavailable(f"matplotlib is not available ({exc})") from None


def new_figure(width_in: float, height_in: float):
    """Return a matplotlib Figure on an Agg canvas (no pyplot state, no display needed)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def save(fig, path) -> Path:
    """Return the path after writing the figure to it as a PNG."""
    path = Path(path)
    fig.savefig(path, dpi=DPI, format="png")
    return path


def plain_number(value: float, digits: int = 6) -> str:
    """Return value as plain positional text with up to `digits` significant digits (no exponent, no offset)."""
    if not math.isfinite(value):
        return ""
    if value == 0:
        return "0"
    return np.format_float_positional(float(value), precision=digits, unique=False, fractional=False, trim="-")


def plain_ticks(axis, log: bool = False) -> None:
    """Label a matplotlib axis (ax.xaxis, ax.yaxis or a colorbar's) with plain numbers: no exponent, no offset.

    Linear axes get as many decimals as the tick spacing needs; logarithmic ones up to 6 significant digits.
    """
    from matplotlib.ticker import Formatter, NullFormatter

    class Plain(Formatter):
        decimals = 6

        def set_locs(self, locs):
            super().set_locs(locs)
            steps = np.diff(np.sort(np.asarray(locs, float)))
            steps = steps[steps > 0]
            self.decimals = int(np.clip(-math.floor(math.log10(steps.min())) + 1, 0, 15)) if steps.size else 6
            # One decimal less when every tick stays exact with it (0.25 steps keep 2, 0.2 steps get 1).
            if self.decimals > 0 and all(abs(round(v, self.decimals - 1) - v) < 1e-9 * max(1.0, abs(v))
                                         for v in locs):
                self.decimals -= 1

        def __call__(self, x, pos=None):
            if log:
                return plain_number(x)
            text = f"{x:.{self.decimals}f}"
            return "0" if float(text) == 0 else text

    axis.set_major_formatter(Plain())
    axis.set_minor_formatter(NullFormatter())


def nice_log_ticks(lo: float, hi: float) -> list[float]:
    """Return 1-2-5 tick values covering [lo, hi] (both > 0) for a logarithmic scale, at least two."""
    ticks = []
    for decade in range(math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1):
        for m in (1.0, 2.0, 5.0):
            v = m * 10.0 ** decade
            if lo * (1 - 1e-9) <= v <= hi * (1 + 1e-9):
                ticks.append(float(f"{v:.12g}"))
    if len(ticks) < 2:
        ticks = sorted({float(f"{lo:.2g}"), float(f"{hi:.2g}")})
    return ticks


def time_axis(est: dict) -> tuple[float, str]:
    """Return (t0 s, x-axis label): plots show time since the first estimate."""
    t = np.asarray(est["t"], float)
    t0 = float(np.nanmin(t)) if t.size else 0.0
    return t0, "time (s)" if t0 == 0 else f"time since t = {t0:.6g} s (s)"


def disk_xy(u: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """Return equal-area plane coordinates (..., 2) of unit vectors u on a hemisphere scaled to the unit disk."""
    return lambert_forward(u, frame) / math.sqrt(2.0)


def legend_above(ax, ncol: int = 4) -> None:
    """Put the legend of ax in a row just above the axes, off the data (constrained layout makes room)."""
    ax.legend(loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=ncol, fontsize=8, frameon=False)


def _hemisphere_axes(ax, label: str, frame: np.ndarray) -> None:
    rim = np.linspace(0, 2 * np.pi, 361)
    ax.plot(np.cos(rim), np.sin(rim), color="black", linewidth=0.9)
    for polar_deg in (30, 60):
        r = 2 * math.sin(math.radians(polar_deg) / 2) / math.sqrt(2.0)
        ax.plot(r * np.cos(rim), r * np.sin(rim), color="0.8", linewidth=0.6, zorder=0)
        ax.text(r * math.cos(math.radians(235)), r * math.sin(math.radians(235)), f"{polar_deg}°",
                fontsize=7, color="0.4", ha="center", va="center",
                bbox=dict(boxstyle="round,pad=0.1", fc="white", alpha=0.7, lw=0))
    for name, v in (("+x", [1.0, 0, 0]), ("+y", [0, 1.0, 0])):
        x, y = 1.1 * disk_xy(np.array(v), frame)
        ax.text(x, y, name, ha="center", va="center", fontsize=9)
    ax.set_title(label, fontsize=9)
    ax.set_xlim(-1.2, 1.2)
    ax.set_ylim(-1.2, 1.2)
    ax.set_aspect("equal")
    ax.set_axis_off()


def plot_track(path, est: dict, truth: dict | None = None) -> Path:
    """Return the PNG path of the direction track on two equal-area hemispheres, colored by time."""
    t0, tlabel = time_axis(est)
    u = np.column_stack([est["ux"], est["uy"], est["uz"]])
    t = np.asarray(est["t"], float) - t0
    ok = np.all(np.isfinite(u), axis=1)
    u, t = u[ok], t[ok]
    step = max(1, math.ceil(len(t) / MAX_TRACK_POINTS))
    u, t = u[::step], t[::step]
    fig = new_figure(10.5, 5.2)
    axes = fig.subplots(1, 2)
    tmax = float(t.max()) if t.size else 1.0
    image = None
    for ax, (label, frame) in zip(axes, HEMISPHERES):
        _hemisphere_axes(ax, label, frame)
        if truth is not None:
            tu = np.column_stack([truth["true_ux"], truth["true_uy"], truth["true_uz"]])
            xy = disk_xy(tu, frame)
            xy[tu @ frame[2] < 0] = np.nan              # other hemisphere: break the line there
            ax.plot(xy[:, 0], xy[:, 1], color="tab:red", linewidth=1.0, label="truth")
        mine = (u @ frame[2] >= 0) if frame[2, 2] > 0 else (u @ frame[2] > 0)
        xy = disk_xy(u[mine], frame)
        image = ax.scatter(xy[:, 0], xy[:, 1], c=t[mine], s=4, cmap="viridis", vmin=0, vmax=tmax,
                           label="estimate", rasterized=True)
        if t.size:
            for idx, marker, name in ((0, "^", "start"), (-1, "s", "end")):
                if mine[idx]:
                    x, y = disk_xy(u[idx], frame)
                    ax.plot(x, y, marker, color="black", markerfacecolor="white", markersize=8, label=name)
        ax.legend(loc="lower left", fontsize=7, framealpha=0.8)
    bar = fig.colorbar(image, ax=list(axes), shrink=0.8)
    bar.set_label(tlabel)
    fig.suptitle("Field direction u (sensor frame), Lambert azimuthal equal-area; rings: 30° and 60° "
                 "from the pole", fontsize=10)
    return save(fig, path)


def plot_components(path, est: dict, truth: dict | None = None) -> Path:
    """Return the PNG path of ux, uy, uz (sensor frame, dimensionless) against time, truth dashed."""
    t0, tlabel = time_axis(est)
    t = np.asarray(est["t"], float) - t0
    fig = new_figure(9, 6.5)
    axes = fig.subplots(3, 1, sharex=True)
    for ax, c in zip(axes, ("x", "y", "z")):
        ax.plot(t, est[f"u{c}"], color="tab:blue", linewidth=1.0, label="estimate")
        if truth is not None:
            ax.plot(np.asarray(truth["t"]) - t0, truth[f"true_u{c}"], "--", color="tab:red", linewidth=1.0,
                    label="truth")
        ax.set_ylabel(f"u{c}")
        ax.set_ylim(-1.08, 1.08)
        ax.grid(alpha=0.3)
    fig.suptitle("Field direction components (unit vector, sensor frame)", fontsize=10)
    axes[-1].set_xlabel(tlabel)
    legend_above(axes[0])
    return save(fig, path)


def plot_sigma(path, est: dict, error_deg: np.ndarray | None = None) -> Path:
    """Return the PNG path of sigma_deg (log scale, deg) against time, with the error against truth if given."""
    t0, tlabel = time_axis(est)
    t = np.asarray(est["t"], float) - t0
    fig = new_figure(9, 4.5)
    ax = fig.subplots()
    if error_deg is not None:
        err = np.asarray(error_deg, float)
        ax.plot(t, np.where(err > 0, err, np.nan), ".", color="tab:red", markersize=2.5, alpha=0.6,
                label="angle to truth (deg)")
    ax.plot(t, est["sigma_deg"], color="tab:blue", linewidth=1.2, label="sigma_deg (1-sigma)")
    ax.plot(t, 2 * np.asarray(est["sigma_deg"], float), ":", color="tab:blue", linewidth=1.0,
            label="2 x sigma_deg")
    has_bound = "bound_deg" in est and np.any(np.isfinite(np.asarray(est["bound_deg"], float)))
    if has_bound:
        ax.plot(t, est["bound_deg"], "--", color="0.4", linewidth=0.9, label="Cramer-Rao bound, one sample")
    ax.set_yscale("log")
    plain_ticks(ax.yaxis, log=True)
    ax.set_xlabel(tlabel)
    ax.set_ylabel("angle (deg)")
    ax.grid(alpha=0.3, which="both")
    legend_above(ax)
    title = "Direction uncertainty" + (" and error against truth" if error_deg is not None else "")
    if has_bound:
        # Why the tracker can beat the dashed line: the bound is for one sample on its own.
        title += ("\nThe tracker averages many samples, so its sigma and its error can lie below the "
                  "single-sample Cramer-Rao bound (dashed)")
    fig.suptitle(title, fontsize=10)
    return save(fig, path)


def plot_nis(path, est: dict, dof: np.ndarray) -> Path:
    """Return the PNG path of the NIS (dimensionless, log scale) against time with its 95% chi-square band."""
    from fieldvane.io.report import nis_band

    t0, tlabel = time_axis(est)
    t = np.asarray(est["t"], float) - t0
    nis = np.asarray(est["nis"], float)
    dof = np.asarray(dof, float)
    ok = dof > 0
    lo, hi = nis_band(dof)
    use = np.isfinite(nis) & ok
    inside = use & (nis >= lo) & (nis <= hi)
    fig = new_figure(9, 4.5)
    ax = fig.subplots()
    ax.fill_between(t, lo, hi, step="mid", color="tab:green", alpha=0.2, linewidth=0,
                    label="central 95% chi-square band")
    ax.plot(t, np.where(ok, dof, np.nan), color="darkgreen", linewidth=1.2, drawstyle="steps-mid",
            label="dof (expected mean)", zorder=3)
    ax.plot(t[inside], nis[inside], ".", color="tab:blue", markersize=2.5, label="NIS inside the band")
    out = use & ~inside & (nis > 0)
    ax.plot(t[out], nis[out], ".", color="tab:red", markersize=3, label="NIS outside the band")
    ax.set_yscale("log")
    plain_ticks(ax.yaxis, log=True)
    ax.set_xlabel(tlabel)
    ax.set_ylabel("NIS (dimensionless)")
    ax.grid(alpha=0.3, which="both")
    legend_above(ax)
    frac = inside.sum() / use.sum() if use.any() else math.nan
    fig.suptitle(f"Normalized innovation squared: {frac:.1%} inside the 95% band (95% expected)", fontsize=10)
    return save(fig, path)


def flag_runs(t: np.ndarray, mask: np.ndarray, period: float, min_width: float = 0.0) -> list[tuple[float, float]]:
    """Return (start s, width s) of each run of consecutive rows where mask is set; a row lasts one period."""
    m = np.concatenate([[False], np.asarray(mask, bool), [False]])
    edges = np.flatnonzero(np.diff(m.astype(np.int8)))
    starts, ends = edges[::2], edges[1::2] - 1
    return [(float(t[a]), max(float(t[b] - t[a] + period), min_width)) for a, b in zip(starts, ends)]


def _share(mask: np.ndarray) -> str:
    n = int(mask.sum())
    pct = 100.0 * n / mask.size
    if pct < 1:
        return f"{n} ({pct:.2g}%)"
    text = f"{pct:.1f}"
    return f"{n} ({f'{pct:.3f}' if text == '100.0' and n < mask.size else text}%)"


def plot_flags(path, est: dict) -> Path:
    """Return the PNG path of the flags timeline: one row per flag bit that occurs, bars where it is set."""
    from fieldvane.io.report import median_period

    t0, tlabel = time_axis(est)
    t = np.asarray(est["t"], float) - t0
    flags = np.asarray(est["flags"], np.int64)
    period = median_period(t)
    if not math.isfinite(period):
        period = 1.0
    present = [f for f in EstimateFlag if np.any(flags & int(f))]
    extra = int(np.bitwise_or.reduce(flags)) & ~sum(int(f) for f in EstimateFlag) if flags.size else 0
    rows = [(f"{f.name} (bit {int(f).bit_length() - 1})", (flags & int(f)) != 0) for f in present]
    if extra:
        rows.append(("undocumented bits", (flags & extra) != 0))
    span = float(t.max() - t.min()) + period if t.size else 1.0
    fig = new_figure(9, 1.3 + 0.42 * max(len(rows), 1))
    ax = fig.subplots()
    for k, (label, mask) in enumerate(rows):
        # Runs are drawn at least 0.4% of the span wide so that a single flagged sample stays visible.
        ax.broken_barh(flag_runs(t, mask, period, 0.004 * span), (k - 0.38, 0.76), facecolors=f"C{k % 10}")
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([f"{label}  {_share(mask)}" for label, mask in rows], fontsize=8)
    ax.set_ylim(len(rows) - 0.5, -0.5)
    if t.size:
        ax.set_xlim(float(t.min()) - 0.01 * span, float(t.min()) + 1.01 * span)
    ax.set_xlabel(tlabel)
    ax.grid(alpha=0.3, axis="x")
    ax.set_title("Flags per sample (samples set and share beside each name)" if rows else
                 "Flags: no flag set in any sample", fontsize=10)
    return save(fig, path)


def _constant_note(name: str, x: np.ndarray, unit: str, scale: float = 0.0, digits: int = 12) -> str | None:
    """Return 'name constant at value unit' when x spreads less than its float resolution, else None."""
    from fieldvane.estimator.noise_stats import below_resolution

    x = np.asarray(x, float)
    finite = x[np.isfinite(x)]
    if finite.size == 0 or not below_resolution(finite, scale):
        return None
    return f"{name} is constant within float resolution: {float(np.median(finite)):.{digits}g} {unit}"


def plot_magnitudes(path, est: dict, truth: dict | None = None) -> Path:
    """Return the PNG path of |B| per isotope and fused (nT), their error to truth and ratio; constants as text.

    A series whose spread is below its float resolution (e.g. a simulator's exact frequencies) is
    not drawn: float noise is not data. It is listed as a constant under the panels instead.
    """
    t0, tlabel = time_axis(est)
    t = np.asarray(est["t"], float) - t0
    series = [(c, label, color) for c, label, color in (("b_a_nT", "isotope a (pump a)", "tab:blue"),
                                                        ("b_b_nT", "isotope b (pump b)", "tab:orange"),
                                                        ("b_nT", "fused (b_nT)", "black")) if c in est]
    notes: list[str] = []
    panels = []                                  # (ylabel, [(x, y, style dict)], band or None)
    lines = []
    for col, label, color in series:
        y = np.asarray(est[col], float)
        note = _constant_note(col, y, "nT")
        if note:
            notes.append(note)
        else:
            lines.append((t, y, dict(color=color, linewidth=1.0, label=label)))
    band = None
    if "sigma_b_nT" in est:
        sb = np.asarray(est["sigma_b_nT"], float)
        if np.any(np.isfinite(sb)):
            band = (t, np.asarray(est["b_nT"], float), sb)
    if truth is not None:
        tt = np.asarray(truth["t"], float)
        tb = np.asarray(truth["true_b_nT"], float)
        note = _constant_note("true |B|", tb, "nT")
        if note:
            notes.append(note)
        else:
            lines.append((tt - t0, tb, dict(color="tab:red", linestyle="--", linewidth=1.0, label="truth")))
    if lines or band is not None:
        panels.append(("|B| (nT)", lines, band))
    if truth is not None:
        order = np.argsort(tt)
        ref = np.interp(t, tt[order], tb[order], left=np.nan, right=np.nan)
        diffs = []
        for col, label, color in series:
            d = np.asarray(est[col], float) - ref
            note = _constant_note(f"{col} minus truth", d, "nT", scale=float(np.nanmax(np.abs(ref))), digits=6)
            if note:
                notes.append(note)
            else:
                diffs.append((t, d, dict(color=color, linewidth=0.9, label=label)))
        if diffs:
            panels.append(("minus truth (nT)", diffs, None))
    if "b_a_nT" in est and "b_b_nT" in est:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.asarray(est["b_a_nT"], float) / np.asarray(est["b_b_nT"], float)
        note = _constant_note("b_a_nT / b_b_nT", ratio, "", scale=1.0)
        if note:
            notes.append(note)
        else:
            panels.append(("b_a / b_b - 1 (ppm)", [(t, (ratio - 1.0) * 1e6, dict(color="tab:purple", linewidth=0.9))],
                           None))
    fig = new_figure(9, (1.4 + 2.3 * len(panels) if panels else 0.8) + 0.22 * len(notes))
    title = "Field magnitude from each isotope's Larmor frequency"
    if not panels:
        ax = fig.subplots()
        ax.set_axis_off()
        ax.text(0.02, 0.5, "\n".join(notes) or "no magnitude data", ha="left", va="center", fontsize=9,
                transform=ax.transAxes)
        fig.suptitle(title, fontsize=10)
        return save(fig, path)
    axes = list(fig.subplots(len(panels), 1, sharex=True, squeeze=False)[:, 0])
    for k, (ax, (ylabel, drawn, band_)) in enumerate(zip(axes, panels)):
        if band_ is not None:
            bt, bb, bs = band_
            ax.fill_between(bt, bb - bs, bb + bs, color="0.6", alpha=0.35, linewidth=0, label="b_nT +- sigma_b_nT")
        for x, y, style in drawn:
            ax.plot(x, y, **style)
        if ylabel.startswith("minus") or ylabel.startswith("b_a"):
            ax.axhline(0.0, color="0.5", linewidth=0.8)
        ax.set_ylabel(ylabel)
        plain_ticks(ax.yaxis)
        ax.grid(alpha=0.3)
        if k == 0 or ylabel.startswith("minus"):
            handles, _ = ax.get_legend_handles_labels()
            if handles:
                legend_above(ax, ncol=4)
    axes[-1].set_xlabel(tlabel)
    if notes:
        fig.supxlabel("\n".join(notes), fontsize=8, x=0.02, ha="left")
    fig.suptitle(title, fontsize=10)
    return save(fig, path)


def _panel_column(n: int):
    """Return (figure, list of n axes stacked in one column) for the still-stretch noise figures."""
    fig = new_figure(8.5, 1.6 + 3.0 * n)
    return fig, list(fig.subplots(n, 1, squeeze=False)[:, 0])


def _finish_log_axes(ax, xlabel: str, ylabel: str, ncol: int) -> None:
    """Label log-log axes with plain numbers, grid them and put the legend above."""
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    plain_ticks(ax.xaxis, log=True)
    plain_ticks(ax.yaxis, log=True)
    ax.grid(alpha=0.3, which="both")
    legend_above(ax, ncol=ncol)


def plot_allan(path, still) -> Path:
    """Return the PNG path of the overlapping Allan deviation of direction (deg) and |B| (nT) over a still stretch.

    `still` is a report.StaticNoise: white-noise references fall as tau^-1/2 from ADEV(tau0).
    """
    panels = [("direction", still.dir_adev, "deg")]
    if still.b_adev is not None:
        panels.append(("|B|", still.b_adev, "nT"))
    fig, axes = _panel_column(len(panels))
    for ax, (name, adev, unit) in zip(axes, panels):
        ax.loglog(adev.tau_s, adev.adev, "o-", color="tab:blue", markersize=4, linewidth=1.2,
                  label=f"overlapping Allan deviation of {name}")
        ref = adev.adev[0] * np.sqrt(adev.tau_s[0] / adev.tau_s)
        ax.loglog(adev.tau_s, ref, ":", color="0.35", linewidth=1.0, label="white noise: ADEV(tau0) x (tau/tau0)^-1/2")
        if name == "direction" and math.isfinite(still.bound_density_deg):
            # White samples with the single-sample bound as std: ADEV = bound / sqrt(tau fs).
            ax.loglog(adev.tau_s, still.bound_median_deg / np.sqrt(adev.tau_s * still.rate_hz), "--",
                      color="tab:red", linewidth=1.0, label="single-sample Cramer-Rao bound, averaged as white")
        _finish_log_axes(ax, "averaging time tau (s)", f"Allan deviation ({unit})", ncol=2)
    fig.suptitle(f"Allan deviation of the static stretch {still.start_s:.6g} to {still.end_s:.6g} s ({still.samples} samples at "
                 f"{still.rate_hz:.6g} Hz, {still.source})" +
                 (f"\n{still.b_note}" if still.b_note else ""), fontsize=10)
    return save(fig, path)


def plot_spectrum(path, still) -> Path:
    """Return the PNG path of the Welch amplitude spectral density of direction (deg/sqrt(Hz)) and |B| (nT/sqrt(Hz))."""
    panels = [("direction", still.dir_spec, still.dir_white, "deg")]
    if still.b_spec is not None:
        panels.append(("|B|", still.b_spec, still.b_white, "nT"))
    fig, axes = _panel_column(len(panels))
    lo, hi = still.band_hz
    for ax, (name, spec, level, unit) in zip(axes, panels):
        f, asd = spec.freq_hz[1:], spec.asd[1:]               # the DC bin has no place on a log axis
        ax.loglog(f, asd, color="tab:blue", linewidth=1.0, label=f"{name}, Welch ({spec.segments} segments)")
        ax.axvspan(lo, hi, color="tab:green", alpha=0.12, linewidth=0)
        ax.axhline(level, color="tab:green", linewidth=1.2,
                   label=f"white level {level:.3g} {unit}/sqrt(Hz) (mean over the shaded band)")
        if name == "direction" and math.isfinite(still.bound_density_deg):
            ax.axhline(still.bound_density_deg, color="tab:red", linestyle="--", linewidth=1.0,
                       label=f"single-sample Cramer-Rao bound x sqrt(2/fs) = {still.bound_density_deg:.3g}")
        _finish_log_axes(ax, "frequency (Hz)", f"{unit}/sqrt(Hz)", ncol=1)
    fig.suptitle(f"Noise spectrum of the static stretch {still.start_s:.6g} to {still.end_s:.6g} s "
                 f"(one-sided amplitude density)" + (f"\n{still.b_note}" if still.b_note else ""), fontsize=10)
    return save(fig, path)


FIGURES = (("track", "Direction track on the sphere"), ("components", "Direction components"),
           ("sigma", "Uncertainty and error"), ("nis", "Normalized innovation squared"),
           ("flags", "Flags timeline"), ("magnitude", "Magnitude per isotope"),
           ("allan", "Allan deviation of a still stretch"), ("spectrum", "Noise spectrum of a still stretch"))


def write_figures(out_dir, est: dict, truth: dict | None = None, error_deg: np.ndarray | None = None,
                  nis_dof: np.ndarray | None = None, still=None) -> list[tuple[str, Path]]:
    """Return (title, path) of every figure written to out_dir; NIS needs est['nis'] and nis_dof, noise needs still."""
    out = Path(out_dir)
    titles = dict(FIGURES)
    written = [(titles["track"], plot_track(out / "track.png", est, truth)),
               (titles["components"], plot_components(out / "components.png", est, truth)),
               (titles["sigma"], plot_sigma(out / "sigma.png", est, error_deg))]
    if "nis" in est and nis_dof is not None:
        written.append((titles["nis"], plot_nis(out / "nis.png", est, nis_dof)))
    written.append((titles["flags"], plot_flags(out / "flags.png", est)))
    written.append((titles["magnitude"], plot_magnitudes(out / "magnitude.png", est, truth)))
    if still is not None:
        written.append((titles["allan"], plot_allan(out / "allan.png", still)))
        written.append((titles["spectrum"], plot_spectrum(out / "spectrum.png", still)))
    return written
