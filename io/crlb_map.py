"""The Cramer-Rao bound map of a calibration: the single-sample direction bound over the sphere as CSV,
PNG and a printed summary, with the blind region by the one rule of estimator/blind.py."""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fieldvane.estimator.blind import (BLIND_FACTOR, blind_limit, blind_mask, check_factor, median_bound_deg,
                                       sphere_median)
from fieldvane.estimator.fisher import crlb_deg
from fieldvane.estimator.samples import channel_probe
from fieldvane.estimator.sphere import fibonacci_sphere, lambert_azimuthal, normalize, unit_to_spherical

CSV_COLUMNS = ("polar_deg", "azimuth_deg", "ux", "uy", "uz", "bound_deg", "blind")
DEFAULT_POINTS = 4000


@dataclass
class ProbeSetMap:
    """The bound for one probe set on a near-uniform grid.

    name ('1', '2', 'both'), probes used, u (N,3) sensor-frame directions, bound_deg (N,) the
    single-sample Cramer-Rao bound (deg), gain_free (the bound treats probe gains as unknown),
    blind_factor, the sphere medians of the bound (deg, from estimator.blind.median_bound_deg, the
    grid every BLIND decision uses) and gain_free_bound_deg (N,) when the map itself is not gain-free.
    """

    name: str
    probes: tuple[int, ...]
    u: np.ndarray
    bound_deg: np.ndarray
    gain_free: bool = False
    blind_factor: float = BLIND_FACTOR
    gain_free_bound_deg: np.ndarray | None = None
    sphere_median_deg: float | None = None
    gain_free_median_deg: float | None = None

    @property
    def median_deg(self) -> float:
        """Return the sphere median of the bound, deg (of this grid when no shared median was given)."""
        return sphere_median(self.bound_deg) if self.sphere_median_deg is None else self.sphere_median_deg

    @property
    def limit_deg(self) -> float:
        """Return the blind limit: blind_factor x the sphere median, deg."""
        return blind_limit(self.median_deg, self.blind_factor)

    @property
    def blind(self) -> np.ndarray:
        """Return the blind mask (N,) of the grid directions."""
        return blind_mask(self.bound_deg, self.median_deg, self.blind_factor)

    def summary(self) -> dict[str, float]:
        """Return median, 95th percentile and blind limit of the bound (deg) and the blind share of the sphere."""
        s = summarize(self.bound_deg, self.blind_factor, self.median_deg)
        if self.gain_free_bound_deg is not None:
            s["blind_fraction_gain_free"] = summarize(self.gain_free_bound_deg, self.blind_factor,
                                                      self.gain_free_median_deg)["blind_fraction"]
        return s


def summarize(bound_deg: np.ndarray, factor: float = BLIND_FACTOR, median_deg: float | None = None) -> dict[str, float]:
    """Return {'median_deg', 'p95_deg', 'blind_limit_deg', 'blind_fraction'} of bounds on a near-uniform grid.

    median_deg is the sphere median the blind rule uses (default: the median of these bounds).
    """
    b = np.asarray(bound_deg, float)
    med = sphere_median(b) if median_deg is None else float(median_deg)
    return {"median_deg": med, "p95_deg": float(np.percentile(b, 95)),
            "blind_limit_deg": blind_limit(med, factor), "blind_fraction": float(np.mean(blind_mask(b, med, factor)))}


def probe_numbers(calibration) -> tuple[int, ...]:
    """Return the probe numbers the calibration's channels read (e.g. (1, 2))."""
    return tuple(sorted({channel_probe(ch) for ch in calibration.model.channels}))


def probe_sets(calibration, choice: str | None = None) -> list[tuple[str, tuple[int, ...]]]:
    """Return [(name, probes)] to map: the choice ('1', '2', 'both'), or every set when None."""
    have = probe_numbers(calibration)
    every = [(str(p), (p,)) for p in have] + ([("both", have)] if len(have) > 1 else [])
    if choice is None:
        return every
    for name, probes in every:
        if name == choice:
            return [(name, probes)]
    if choice == "both" and len(have) == 1:
        return [(str(have[0]), have)]
    raise ValueError(f"probe set {choice!r} is not available: the calibration has probe(s) "
                     f"{', '.join(map(str, have))}")


def default_magnitude_nT(calibration) -> float:
    """Return the default map magnitude: geometric middle of the calibrated range, nT."""
    lo, hi = calibration.magnitude_range_nT
    return float(np.sqrt(lo * hi))


def compute_maps(calibration, sets, b_nT: float, noise_std=None, gain_free: bool = False,
                 n_points: int = DEFAULT_POINTS, blind_factor: float = BLIND_FACTOR) -> list[ProbeSetMap]:
    """Return one ProbeSetMap per (name, probes) in sets, on a Fibonacci grid of n_points directions."""
    factor = check_factor(blind_factor)
    u = fibonacci_sphere(int(n_points))
    maps = []
    model = calibration.model
    for name, probes in sets:
        bound = crlb_deg(model, u, b_nT, probes, gain_free, noise_std)
        median = median_bound_deg(model, b_nT, probes, gain_free, noise_std)
        free = free_median = None
        if not gain_free:
            free = crlb_deg(model, u, b_nT, probes, True, noise_std)
            free_median = median_bound_deg(model, b_nT, probes, True, noise_std)
        maps.append(ProbeSetMap(name, tuple(probes), u, bound, gain_free, factor, free, median, free_median))
    return maps


def engineering_volts(v: float) -> str:
    """Return a voltage as text in V, mV, uV or nV with 2 significant digits (e.g. '1.0 mV')."""
    for scale, unit in ((1.0, "V"), (1e-3, "mV"), (1e-6, "uV"), (1e-9, "nV")):
        if abs(v) >= scale or unit == "nV":
            x = v / scale
            text = f"{x:#.2g}" if abs(x) < 10 else f"{x:.0f}"
            return f"{text} {unit}"
    return f"{v:g} V"


def noise_text(calibration, noise_std=None) -> str:
    """Return the lock-in noise the map assumes, as text (per channel std of X and of Y)."""
    if noise_std is not None:
        return f"{engineering_volts(float(noise_std))} (given)"
    s = np.asarray(calibration.model.noise_std, float)
    lo, hi = float(s.min()), float(s.max())
    if hi <= 1.1 * lo:
        return f"{engineering_volts(float(np.median(s)))} (calibrated)"
    return f"{engineering_volts(lo)} to {engineering_volts(hi)} (calibrated)"


def rate_text(rate_hz: float | None) -> str:
    """Return the sample-rate phrase of the noise statement."""
    if rate_hz is None:
        return "per sample (sample rate not given)"
    return f"per sample at {rate_hz:g} Hz"


def write_csv(path, m: ProbeSetMap, metadata: dict[str, str] | None = None) -> Path:
    """Write '# key: value' lines, then polar_deg, azimuth_deg, ux, uy, uz, bound_deg, blind rows; return the path."""
    path = Path(path)
    polar, azimuth = unit_to_spherical(m.u)
    blind = m.blind
    with open(path, "w", newline="", encoding="utf-8") as fh:
        for key, value in (metadata or {}).items():
            fh.write(f"# {key}: {value}\n")
        w = csv.writer(fh)
        w.writerow(CSV_COLUMNS)
        for k in range(m.u.shape[0]):
            w.writerow([f"{math.degrees(polar[k]):.4f}", f"{math.degrees(azimuth[k]):.4f}", f"{m.u[k, 0]:.6f}",
                        f"{m.u[k, 1]:.6f}", f"{m.u[k, 2]:.6f}", f"{m.bound_deg[k]:.6g}", int(blind[k])])
    return path


# Plot charts (also those of io/plots.py): the upper hemisphere seen from +z (x right, y up), the
# lower one seen from -z (x right, y down), each a right-handed frame (e1, e2, center) so neither
# view is mirrored.
HEMISPHERES = (("upper hemisphere (uz >= 0), seen from +z", np.array([[1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0]])),
               ("lower hemisphere (uz < 0), seen from -z", np.array([[1.0, 0, 0], [0, -1.0, 0], [0, 0, -1.0]])))


def lambert_inverse(xy: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """Return unit vectors (..., 3) from Lambert azimuthal coordinates in frame rows (e1, e2, center)."""
    e1, e2, c = np.asarray(frame, float)
    x, y = xy[..., 0], xy[..., 1]
    rho2 = np.minimum(x * x + y * y, 4.0)
    s = np.sqrt(1.0 - rho2 / 4.0)
    w = 1.0 - rho2 / 2.0
    return (s * x)[..., None] * e1 + (s * y)[..., None] * e2 + w[..., None] * c


def lambert_forward(u: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """Return Lambert azimuthal coordinates (..., 2) of unit vectors u in frame rows (e1, e2, center)."""
    return lambert_azimuthal(np.asarray(u, float) @ np.asarray(frame, float).T)


def color_scale(values: np.ndarray, limit: float) -> tuple[float, float, bool, bool]:
    """Return (vmin, vmax, logarithmic, clipped): a colour range spanning the finite values up to the blind limit."""
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 1.0, False, False
    lo, hi = float(v.min()), float(v.max())
    clipped = hi > limit
    hi = min(hi, limit) if clipped else hi
    if not hi > lo:
        lo, hi = lo * 0.99, lo * 1.01 if lo > 0 else 1.0
    return lo, hi, hi / lo > 8.0 if lo > 0 else False, clipped


def _label_offset(x: float, y: float) -> tuple[tuple[float, float], str, str]:
    """Return (offset in points, ha, va) for a beam's label: inward from the rim, outward elsewhere."""
    r = math.hypot(x, y)
    if r > 1.0:
        dx, dy = -x / r, -y / r
    elif r > 0.05:
        dx, dy = x / r, y / r
    else:
        dx, dy = 0.7, 0.7
    ha = "right" if dx < -0.3 else "left" if dx > 0.3 else "center"
    va = "top" if dy < -0.3 else "bottom" if dy > 0.3 else "center"
    return (9 * dx, 9 * dy), ha, va


def plot_map(path, calibration, m: ProbeSetMap, b_nT: float, noise_std=None, rate_hz: float | None = None,
             resolution: int = 241) -> Path:
    """Draw the bound on two equal-area (Lambert azimuthal) hemispheres with beams and the blind region; save PNG."""
    from matplotlib.colors import LogNorm, Normalize
    from matplotlib.ticker import FixedLocator, MaxNLocator

    from fieldvane.io.plots import new_figure, nice_log_ticks, plain_ticks, save

    path = Path(path)
    half = math.sqrt(2.0)                               # a hemisphere is the disk of radius sqrt 2
    g = np.linspace(-half, half, resolution)
    xx, yy = np.meshgrid(g, g)
    inside = xx ** 2 + yy ** 2 <= 2.0
    median, limit = m.median_deg, m.limit_deg
    fields = []
    for _, frame in HEMISPHERES:
        u = lambert_inverse(np.stack([xx, yy], axis=-1), frame).reshape(-1, 3)
        val = crlb_deg(calibration.model, u, b_nT, m.probes, m.gain_free, noise_std).reshape(xx.shape)
        fields.append(np.where(inside, val, np.nan))
    lo, hi, logarithmic, clipped = color_scale(np.concatenate([f[inside] for f in fields]), limit)
    norm = LogNorm(vmin=lo, vmax=hi) if logarithmic else Normalize(vmin=lo, vmax=hi)

    fig = new_figure(11.5, 6.2)
    axes = fig.subplots(1, 2)
    phys = calibration.physics
    # Short tags keep labels off the data; the legend says what they mean.
    beams = [(p, a, "o", "tab:red") for p, a in zip("ab", phys.pump_axes)]
    beams += [(str(i + 1), a, "^", "tab:blue") for i, a in enumerate(phys.probe_axes) if (i + 1) in m.probes]
    image = None
    for ax, (label, frame), val in zip(axes, HEMISPHERES, fields):
        shown = np.where(np.isfinite(val), np.clip(val, lo, hi), np.where(inside, hi, np.nan))
        image = ax.pcolormesh(xx, yy, shown, norm=norm, cmap="viridis", shading="auto", rasterized=True)
        blind = inside & ~(val <= limit)
        if blind.any():
            ax.contourf(xx, yy, blind.astype(float), levels=[0.5, 1.5], colors="none", hatches=["///"])
            ax.contour(xx, yy, np.where(inside, np.nan_to_num(val, nan=hi, posinf=10 * limit), np.nan),
                       levels=[limit], colors="black", linewidths=1.2)
        rim = np.linspace(0, 2 * np.pi, 361)
        ax.plot(half * np.cos(rim), half * np.sin(rim), color="black", linewidth=0.8)
        for name, v in (("+x", [1.0, 0, 0]), ("+y", [0, 1.0, 0])):
            x, y = 1.1 * lambert_forward(np.array(v), frame)
            ax.text(x, y, name, ha="center", va="center", fontsize=9, color="0.25")
        for name, axis_vec, marker, color in beams:
            for sign in (1.0, -1.0):
                v = sign * normalize(axis_vec)
                if v @ frame[2] >= -1e-9:
                    x, y = lambert_forward(v, frame)
                    ax.plot(x, y, marker, color=color, markersize=9, markeredgecolor="white", zorder=4)
                    offset, ha, va = _label_offset(x, y)
                    ax.annotate(("" if sign > 0 else "-") + name, (x, y), xytext=offset, textcoords="offset points",
                                ha=ha, va=va, color=color, fontsize=8, weight="bold", zorder=5,
                                bbox=dict(boxstyle="round,pad=0.15", fc="white", alpha=0.8, lw=0))
        ax.set_title(label, fontsize=9)
        if ax is axes[0]:
            from matplotlib.lines import Line2D
            handles = [Line2D([], [], marker="o", color="tab:red", linestyle="", markeredgecolor="white",
                              markersize=8, label="pump axes a, b"),
                       Line2D([], [], marker="^", color="tab:blue", linestyle="", markeredgecolor="white",
                              markersize=8, label="probe axes 1, 2" if len(m.probes) > 1 else f"probe axis {m.probes[0]}")]
            ax.legend(handles=handles, loc="lower left", fontsize=8, frameon=False,
                      title="'-': opposite end", title_fontsize=7)
        ax.set_xlim(-1.22 * half, 1.22 * half)
        ax.set_ylim(-1.22 * half, 1.22 * half)
        ax.set_aspect("equal")
        ax.set_axis_off()
    bar = fig.colorbar(image, ax=list(axes), shrink=0.85, extend="max" if clipped else "neither")
    if logarithmic:
        bar.ax.yaxis.set_major_locator(FixedLocator(nice_log_ticks(lo, hi)))
    else:
        bar.ax.yaxis.set_major_locator(MaxNLocator(6))
    plain_ticks(bar.ax.yaxis, log=logarithmic)
    bar.set_label("Cramer-Rao bound, 1-sigma direction error of one sample (deg)")
    probes_txt = "both probes" if len(m.probes) > 1 else f"probe {m.probes[0]}"
    share = float(np.mean(m.blind))
    fig.suptitle(
        f"Cramer-Rao bound on the field direction, {probes_txt}"
        f"{', probe gains unknown (amplitude ratios and phases only)' if m.gain_free else ''}\n"
        f"|B| = {b_nT:.0f} nT; lock-in noise {noise_text(calibration, noise_std)} on X and on Y, "
        f"{rate_text(rate_hz)}; sphere median {median:.3g} deg\n"
        + (f"hatched, black line: blind, bound > {m.blind_factor:g} x median = {limit:.3g} deg "
           f"({100 * share:.1f}% of the sphere)" if share > 0 else
           f"no blind direction: the bound stays below {m.blind_factor:g} x median = {limit:.3g} deg"),
        fontsize=10)
    return save(fig, path)


def output_stem(m: ProbeSetMap) -> str:
    """Return the output file stem of a probe set, e.g. 'bound_probe1' or 'bound_both_gainfree'."""
    base = "bound_both" if m.name == "both" else f"bound_probe{m.name}"
    return base + ("_gainfree" if m.gain_free else "")


def make_map(calibration, out_dir, *, b_nT: float | None = None, noise_std=None, probes: str | None = None,
             gain_free: bool = False, n_points: int = DEFAULT_POINTS, plt=None,
             blind_factor: float = BLIND_FACTOR, rate_hz: float | None = None
             ) -> tuple[list[ProbeSetMap], list[Path], float]:
    """Compute, write (CSV, and PNG when plt is given) and return (maps, files written, magnitude nT).

    plt only says whether to draw (any matplotlib handle, or True); figures use their own Agg canvas.
    rate_hz is the sample rate the calibrated noise refers to (default: the calibration's, if it has one).
    """
    b = default_magnitude_nT(calibration) if b_nT is None else float(b_nT)
    if rate_hz is None:
        rate_hz = getattr(calibration, "sample_rate_hz", None)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    maps = compute_maps(calibration, probe_sets(calibration, probes), b, noise_std, gain_free, n_points, blind_factor)
    files = []
    for m in maps:
        stem = output_stem(m)
        meta = {"quantity": "single-sample Cramer-Rao bound on the field direction, 1-sigma, deg",
                "b_nT": f"{b:.6g}", "probes": ",".join(map(str, m.probes)),
                "probe_gains": "unknown (gain-free)" if m.gain_free else "known",
                "noise": noise_text(calibration, noise_std), "sample_rate_hz": "" if rate_hz is None else f"{rate_hz:g}",
                "median_bound_deg": f"{m.median_deg:.6g}", "blind_factor": f"{m.blind_factor:g}",
                "blind_limit_deg": f"{m.limit_deg:.6g}", "blind_rule": "blind = 1 where bound_deg > blind_limit_deg"}
        files.append(write_csv(out / f"{stem}.csv", m, meta))
        if plt is not None:
            files.append(plot_map(out / f"{stem}.png", calibration, m, b, noise_std, rate_hz))
    return maps, files, b


def summary_lines(maps: list[ProbeSetMap]) -> list[str]:
    """Return printable summary lines: per probe set the median, 95th percentile, blind limit and blind share."""
    with_free = any(m.gain_free_bound_deg is not None for m in maps)
    head = f"{'probes':<8}{'median (deg)':>14}{'95th pct (deg)':>16}{'blind above (deg)':>19}{'blind':>8}"
    lines = [head + (f"{'blind, gains unknown':>23}" if with_free else "")]
    for m in maps:
        s = m.summary()
        line = (f"{m.name:<8}{s['median_deg']:>14.3g}{s['p95_deg']:>16.3g}{s['blind_limit_deg']:>19.3g}"
                f"{100 * s['blind_fraction']:>7.1f}%")
        if with_free:
            free = s.get("blind_fraction_gain_free")
            line += f"{100 * free:>22.1f}%" if free is not None else f"{'':>23}"
        lines.append(line)
    return lines
