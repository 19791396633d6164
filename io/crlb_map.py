"""The CRLB map of a calibration: direction bound over the sphere as CSV, PNG and a printed summary."""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fieldvane.estimator.fisher import crlb_deg
from fieldvane.estimator.samples import channel_probe
from fieldvane.estimator.sphere import fibonacci_sphere, lambert_azimuthal, normalize, unit_to_spherical

CSV_COLUMNS = ("polar", "azimuth", "ux", "uy", "uz", "crlb_deg")
BLIND_DEG = 5.0          # same default as the snapshot inverse's BLIND flag
FINE_DEG = 1.0           # the summary's "fraction of the sphere above" level
DEFAULT_POINTS = 4000


@dataclass
class ProbeSetMap:
    """The bound for one probe set: name ('1', '2', 'both'), probes used, directions (N,3), bound (N,) deg."""

    name: str
    probes: tuple[int, ...]
    u: np.ndarray
    crlb_deg: np.ndarray

    def summary(self, level_deg: float = FINE_DEG) -> dict[str, float]:
        """Return median and 95th percentile of the bound (deg) and the sphere fraction above level_deg."""
        return summarize(self.crlb_deg, level_deg)


def summarize(bound_deg: np.ndarray, level_deg: float = FINE_DEG) -> dict[str, float]:
    """Return {'median_deg', 'p95_deg', 'fraction_above'} of bounds on a near-uniform sphere grid."""
    b = np.asarray(bound_deg, float)
    return {"median_deg": float(np.median(b)), "p95_deg": float(np.percentile(b, 95)),
            "fraction_above": float(np.mean(~(b <= level_deg)))}


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
                 n_points: int = DEFAULT_POINTS) -> list[ProbeSetMap]:
    """Return one ProbeSetMap per (name, probes) in sets, on a Fibonacci grid of n_points directions."""
    u = fibonacci_sphere(int(n_points))
    return [ProbeSetMap(name, tuple(probes), u,
                        crlb_deg(calibration.model, u, b_nT, probes, gain_free, noise_std))
            for name, probes in sets]


def write_csv(path, m: ProbeSetMap) -> Path:
    """Write polar, azimuth (deg), ux, uy, uz, crlb_deg rows for one probe set; return the path."""
    path = Path(path)
    polar, azimuth = unit_to_spherical(m.u)
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(CSV_COLUMNS)
        for row in zip(np.degrees(polar), np.degrees(azimuth), m.u[:, 0], m.u[:, 1], m.u[:, 2], m.crlb_deg):
            w.writerow([f"{row[0]:.4f}", f"{row[1]:.4f}", f"{row[2]:.6f}", f"{row[3]:.6f}",
                        f"{row[4]:.6f}", f"{row[5]:.6g}"])
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


def plot_map(path, calibration, m: ProbeSetMap, b_nT: float, plt, noise_std=None, gain_free: bool = False,
             blind_deg: float = BLIND_DEG, resolution: int = 241) -> Path:
    """Draw the bound on two equal-area (Lambert azimuthal) hemispheres with beams and blind zones; save PNG."""
    from matplotlib.colors import LogNorm

    path = Path(path)
    half = np.sqrt(2.0)                                  # a hemisphere is the disk of radius sqrt(2)
    g = np.linspace(-half, half, resolution)
    xx, yy = np.meshgrid(g, g)
    inside = xx ** 2 + yy ** 2 <= 2.0
    fig, axes = plt.subplots(1, 2, figsize=(11, 5.4), constrained_layout=True)
    finite = m.crlb_deg[np.isfinite(m.crlb_deg)]
    lo = max(float(finite.min()) if finite.size else 1e-3, 1e-4)
    hi = max(float(np.percentile(finite, 99.5)) if finite.size else 1.0, lo * 10)
    norm = LogNorm(vmin=lo, vmax=hi)
    phys = calibration.physics
    beams = [(f"pump {p}", a, "o", "tab:red") for p, a in zip("ab", phys.pump_axes)]
    beams += [(f"probe {i + 1}", a, "^", "tab:blue") for i, a in enumerate(phys.probe_axes)
              if (i + 1) in m.probes]
    image = None
    for ax, (label, frame) in zip(axes, HEMISPHERES):
        center = frame[2]
        u = lambert_inverse(np.stack([xx, yy], axis=-1), frame).reshape(-1, 3)
        val = crlb_deg(calibration.model, u, b_nT, m.probes, gain_free, noise_std).reshape(xx.shape)
        val = np.where(inside, np.clip(np.nan_to_num(val, posinf=hi), lo, hi), np.nan)
        image = ax.pcolormesh(xx, yy, val, norm=norm, cmap="viridis", shading="auto")
        ax.contour(xx, yy, val, levels=[FINE_DEG], colors="white", linewidths=0.8)
        if np.nanmax(val) > blind_deg:
            ax.contourf(xx, yy, np.where(val > blind_deg, 1.0, 0.0), levels=[0.5, 1.5], colors="none",
                        hatches=["///"])
            ax.contour(xx, yy, val, levels=[blind_deg], colors="black", linewidths=1.2)
        rim = np.linspace(0, 2 * np.pi, 361)
        ax.plot(half * np.cos(rim), half * np.sin(rim), color="black", linewidth=0.8)
        for name, axis_vec, marker, color in beams:
            for sign in (1.0, -1.0):
                v = sign * normalize(axis_vec)
                if v @ center >= -1e-9:
                    x, y = lambert_forward(v, frame)
                    ax.plot(x, y, marker, color=color, markersize=9, markeredgecolor="white")
                    ax.annotate(("" if sign > 0 else "-") + name, (x, y), xytext=(5, 5),
                                textcoords="offset points", color=color, fontsize=8, weight="bold",
                                bbox=dict(boxstyle="round,pad=0.15", fc="white", alpha=0.75, lw=0))
        for name, v in (("+x", [1, 0, 0]), ("+y", [0, 1, 0])):
            x, y = 1.08 * lambert_forward(np.array(v, float), frame)
            ax.text(x, y, name, ha="center", va="center", fontsize=9)
        ax.set_title(label, fontsize=9, pad=16)
        ax.set_aspect("equal")
        ax.set_axis_off()
    bar = fig.colorbar(image, ax=list(axes), shrink=0.85)
    bar.set_label("CRLB, 1-sigma direction error (deg)")
    probes_txt = "both probes" if len(m.probes) > 1 else f"probe {m.probes[0]}"
    fig.suptitle(f"Cramer-Rao bound, {probes_txt}, |B| = {b_nT:.0f} nT"
                 f"{', gain-free' if gain_free else ''}; hatched: above {blind_deg:g} deg (blind), "
                 f"white line: {FINE_DEG:g} deg", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def output_stem(m: ProbeSetMap, gain_free: bool) -> str:
    """Return the output file stem of a probe set, e.g. 'crlb_probe1' or 'crlb_both_gainfree'."""
    base = "crlb_both" if m.name == "both" else f"crlb_probe{m.name}"
    return base + ("_gainfree" if gain_free else "")


def make_map(calibration, out_dir, *, b_nT: float | None = None, noise_std=None, probes: str | None = None,
             gain_free: bool = False, n_points: int = DEFAULT_POINTS, plt=None,
             blind_deg: float = BLIND_DEG) -> tuple[list[ProbeSetMap], list[Path], float]:
    """Compute, write (CSV, and PNG when plt is given) and return (maps, files written, magnitude nT)."""
    b = default_magnitude_nT(calibration) if b_nT is None else float(b_nT)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    maps = compute_maps(calibration, probe_sets(calibration, probes), b, noise_std, gain_free, n_points)
    files = []
    for m in maps:
        stem = output_stem(m, gain_free)
        files.append(write_csv(out / f"{stem}.csv", m))
        if plt is not None:
            files.append(plot_map(out / f"{stem}.png", calibration, m, b, plt, noise_std, gain_free, blind_deg))
    return maps, files, b


def summary_lines(maps: list[ProbeSetMap], level_deg: float = FINE_DEG) -> list[str]:
    """Return printable summary lines: one per probe set with median, 95th percentile and fraction above level."""
    lines = [f"{'probes':<8}{'median (deg)':>14}{'95th pct (deg)':>16}{f'> {level_deg:g} deg':>12}"]
    for m in maps:
        s = m.summary(level_deg)
        lines.append(f"{m.name:<8}{s['median_deg']:>14.3g}{s['p95_deg']:>16.3g}{100 * s['fraction_above']:>11.1f}%")
    return lines
