"""Calibration quality figures: where on the sphere and at which |B| the calibrated model is weak.

`fieldvane calibrate --plots DIR` writes:
- residual_sphere.png: each scan row's residual |Z - model| over the channel's noise, per channel, on
  the two equal-area hemisphere views the bound map uses (rejected rows marked x);
- residual_magnitude.png: the same against |B| (log axis), with each level's RMS;
- model_error_magnitude.png: the expected model error between and beyond the scanned levels
  (Calibration.model_error_ratio, as a std over the noise), levels marked.
matplotlib is optional: without it nothing is written and the caller is told.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np

MAX_POINTS = 20000      # rows drawn per panel; beyond this they are thinned evenly (the picture is the same)


def row_residuals(cal, block) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return (u (N,3), |B| (N,) nT, residual over noise (N, C), rejected mask (N,)) of a scan's rows."""
    b_vec = np.asarray(block.applied_b_nT, float)
    with np.errstate(invalid="ignore", over="ignore"):
        b = np.linalg.norm(b_vec, axis=1)
        u = b_vec / np.where(b > 0, b, np.nan)[:, None]
    names = tuple(block.channels)
    z = np.asarray(block.z, complex)[:, [names.index(c) for c in cal.model.channels]]
    ok = np.all(np.isfinite(u), axis=1) & np.isfinite(b) & (b > 0) & np.all(np.isfinite(z), axis=1)
    ratio = np.full(z.shape, np.nan)
    if ok.any():
        ratio[ok] = np.abs(z[ok] - cal.model.h(u[ok], b[ok])) / (np.sqrt(2.0) * cal.model.noise_std)
    rejected = np.zeros(len(b), bool)
    for r in cal.rejected_rows:
        if 0 <= r.index < len(b):
            rejected[r.index] = True
    return u, b, ratio, rejected


def _thin(n: int) -> np.ndarray:
    return np.arange(n) if n <= MAX_POINTS else np.linspace(0, n - 1, MAX_POINTS).astype(int)


def write_calibration_plots(cal, block, out_dir) -> list[Path]:
    """Write the calibration figures into out_dir (atomically, as one folder); return their paths ([] without matplotlib)."""
    from fieldvane.io.outputs import atomic_folder
    from fieldvane.io.plots import PlotsUnavailable, require_matplotlib

    try:
        require_matplotlib()
    except PlotsUnavailable as exc:
        print(f"note: no calibration figures: {exc}; install fieldvane[plots] for them", file=sys.stderr)
        return []
    u, b, ratio, rejected = row_residuals(cal, block)
    names = ("residual_sphere.png", "residual_magnitude.png", "model_error_magnitude.png")
    with atomic_folder(out_dir) as tmp:
        plot_residual_sphere(tmp / names[0], cal, u, ratio, rejected)
        plot_residual_magnitude(tmp / names[1], cal, b, ratio, rejected)
        plot_model_error(tmp / names[2], cal)
    return [Path(out_dir) / n for n in names]


def plot_residual_sphere(path, cal, u, ratio, rejected) -> Path:
    """Draw each channel's residual over noise on the two equal-area hemisphere views; return the path."""
    from matplotlib.colors import Normalize

    from fieldvane.io.crlb_map import HEMISPHERES
    from fieldvane.io.plots import disk_xy, new_figure, save

    channels = cal.model.channels
    fig = new_figure(7.2, 2.9 * len(channels) + 0.6)
    axes = np.atleast_2d(fig.subplots(len(channels), 2))
    norm = Normalize(vmin=0.0, vmax=4.0)
    keep = np.all(np.isfinite(u), axis=1)
    image = None
    for c, ch in enumerate(channels):
        for h, (_, frame) in enumerate(HEMISPHERES):
            ax = axes[c, h]
            upper = u[:, 2] >= 0 if h == 0 else u[:, 2] < 0
            sel = np.flatnonzero(keep & upper & ~rejected)
            sel = sel[_thin(sel.size)]
            xy = disk_xy(u[sel], frame)
            image = ax.scatter(xy[:, 0], xy[:, 1], c=np.clip(ratio[sel, c], 0, 4), s=6, cmap="magma_r",
                               norm=norm, linewidths=0, rasterized=True)
            bad = np.flatnonzero(keep & upper & rejected)
            if bad.size:
                xb = disk_xy(u[bad], frame)
                ax.scatter(xb[:, 0], xb[:, 1], marker="x", s=18, color="tab:blue", linewidths=0.8)
            rim = np.linspace(0, 2 * np.pi, 361)
            ax.plot(np.cos(rim), np.sin(rim), color="black", linewidth=0.8)
            for name, v in (("+x", [1.0, 0, 0]), ("+y", [0, 1.0, 0])):
                x, y = 1.12 * disk_xy(np.array(v), frame)
                ax.text(x, y, name, ha="center", va="center", fontsize=8)
            ax.set_title(f"channel {ch}, {'upper (uz >= 0), from +z' if h == 0 else 'lower (uz < 0), from -z'}",
                         fontsize=8)
            ax.set_xlim(-1.25, 1.25)
            ax.set_ylim(-1.25, 1.25)
            ax.set_aspect("equal")
            ax.set_axis_off()
    if image is not None:
        bar = fig.colorbar(image, ax=axes, shrink=0.6, extend="max")
        bar.set_label("|residual| / noise (1 = noise level; x = rejected row)")
    fig.suptitle(f"Calibration residual over the sphere (equal-area views); {int((~rejected).sum())} rows used",
                 fontsize=10)
    return save(fig, path)


def plot_residual_magnitude(path, cal, b, ratio, rejected) -> Path:
    """Draw each channel's residual over noise against |B| with each level's RMS; return the path."""
    from fieldvane.io.plots import new_figure, plain_ticks, save

    channels = cal.model.channels
    fig = new_figure(7.2, 1.9 * len(channels) + 0.8)
    axes = np.atleast_1d(fig.subplots(len(channels), 1, sharex=True))
    ok = np.isfinite(b) & (b > 0)
    levels = cal.magnitude_check.levels_nT if cal.magnitude_check is not None else cal.model.basis.knots_nT
    near = np.argmin(np.abs(np.log(np.where(ok, b, 1.0))[:, None] - np.log(levels)[None, :]), axis=1)
    rng = np.random.default_rng(0)          # horizontal jitter only, so rows at one level do not overlap
    jitter = np.exp(rng.uniform(-0.02, 0.02, b.size))
    for c, ch in enumerate(channels):
        ax = axes[c]
        sel = np.flatnonzero(ok & ~rejected & np.isfinite(ratio[:, c]))
        sel = sel[_thin(sel.size)]
        ax.scatter(b[sel] * jitter[sel], ratio[sel, c], s=3, color="0.45", linewidths=0, rasterized=True,
                   label="rows")
        rms = [math.sqrt(np.nanmean(ratio[ok & ~rejected & (near == k), c] ** 2))
               if np.any(ok & ~rejected & (near == k)) else np.nan for k in range(len(levels))]
        ax.plot(levels, rms, "o-", color="tab:red", markersize=4, label="RMS per level")
        ax.axhline(1.0, color="black", linewidth=0.7, linestyle="--")
        ax.set_xscale("log")
        ax.set_ylim(0, max(4.0, float(np.nanmax(rms)) * 1.2 if np.isfinite(np.nanmax(rms)) else 4.0))
        ax.set_ylabel(f"{ch}: |r| / noise", fontsize=8)
        plain_ticks(ax.xaxis, log=True)
        plain_ticks(ax.yaxis)
    axes[0].legend(loc="upper right", fontsize=7, frameon=False)
    axes[-1].set_xlabel("|B| (nT)")
    fig.suptitle("Calibration residual against field magnitude (dashed: the noise level)", fontsize=10)
    return save(fig, path)


def plot_model_error(path, cal) -> Path:
    """Draw the expected model error (std over noise) against |B|, scanned levels marked; return the path."""
    from fieldvane.io.plots import new_figure, plain_ticks, save

    mc = cal.magnitude_check
    levels = mc.levels_nT if mc is not None else cal.model.basis.knots_nT
    lo, hi = float(levels.min()), float(levels.max())
    grid = np.geomspace(lo / 2.0, hi * 2.0, 500)
    ratio = cal.model_error_ratio(grid)
    fig = new_figure(7.2, 3.6)
    ax = fig.subplots()
    for c, ch in enumerate(cal.model.channels):
        ax.plot(grid, np.sqrt(np.minimum(ratio[:, c], 1e6)), label=ch, linewidth=1.2)
    for lv in levels:
        ax.axvline(lv, color="0.6", linewidth=0.7)
    ax.axhline(1.0, color="black", linewidth=0.7, linestyle="--")
    ax.set_xscale("log")
    ax.set_yscale("symlog", linthresh=0.1)
    ax.set_ylim(0.0, None)
    ax.set_xlabel("|B| (nT); grey lines: scanned levels")
    ax.set_ylabel("expected model error / noise (std)")
    plain_ticks(ax.xaxis, log=True)
    ax.legend(loc="upper center", ncol=len(cal.model.channels), fontsize=8, frameon=False)
    ax.set_title("How far to trust the model between and beyond the scanned magnitudes\n"
                 "(leave-one-level-out check; above the dashed line the error exceeds the noise)", fontsize=9)
    return save(fig, path)
