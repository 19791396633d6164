"""The report's geographic check: measured D, I, F at the site against the IGRF main field, lines and a panel.

A main-field model is a first sanity check of an installation, not a survey: the crustal field, the
day's external field and nearby iron put a real site tens to hundreds of nT and a few tenths of a
degree away from it (io/reference_field.py). What the check catches is a wrong heading, a wrong
mounting or a wrong site position, which move D, I or F far beyond that.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fieldvane.io.errors import InputError
from fieldvane.io.geo_output import CAUTION, estimates_time_and_site, unusable
from fieldvane.io.sitefile import Site, format_utc

FIGURE_NAME = "geographic.png"
NOTE = ("a first sanity check against a main-field model, not a survey: crustal and external fields and "
        "nearby iron put a real site tens to hundreds of nT and a few tenths of a degree from the model")
_UNITS = {"D_deg": "deg", "I_deg": "deg", "F_nT": "nT"}
_DIGITS = {"D_deg": 3, "I_deg": 3, "F_nT": 1}


@dataclass
class GeoCheck:
    """The check's result: text lines for the terminal, a markdown section, and the figure written (if any)."""

    lines: list[str]
    markdown: str
    figure: Path | None = None
    notes: list[str] = field(default_factory=list)


def _fmt(value: float, key: str) -> str:
    return "n/a" if not math.isfinite(value) else f"{value:.{_DIGITS[key]}f}"


def geographic_check(estimates_path, site: Site, out_dir, start_option: str | None = None,
                     mounting=None, mounting_source: str = "", figures: bool = True,
                     model: str = "IGRF14") -> GeoCheck:
    """Return the check of an estimates CSV at a site (lines, markdown, figure in out_dir when figures)."""
    from fieldvane.io.estimates_csv import read_estimates
    from fieldvane.io.reference_field import compare_with_model

    path = str(estimates_path)
    est = read_estimates(path)
    utc, cols, geo, how = estimates_time_and_site(est, path, site, start_option, mounting, mounting_source)
    if utc is None or not np.any(np.isfinite(utc)):
        raise InputError("the geographic check needs the date: the estimates have no utc column and no "
                         "'# start_utc:' line; give --start-utc", path, column="--start-utc")
    keep = ~unusable(est["flags"]) & np.isfinite(utc)
    values = {k: np.where(keep, cols[k], np.nan) for k in ("D_deg", "I_deg", "F_nT", "sigma_D_deg",
                                                          "sigma_I_deg", "sigma_F_nT")}
    if not np.any(np.isfinite(values["D_deg"])):
        raise InputError("no usable sample has geographic values (attitude outside its file's span, or every "
                         "sample flagged)", path)
    ref, checks = compare_with_model(values["D_deg"], values["I_deg"], values["F_nT"], values["sigma_D_deg"],
                                     values["sigma_I_deg"], values["sigma_F_nT"], site.latitude_deg,
                                     site.longitude_deg, site.elevation_m, utc[keep], model)
    where = (f"{site.name} ({site.iaga_code}, {site.latitude_deg:.3f} N, {site.longitude_deg:.3f} E, "
             f"{site.elevation_m:.0f} m)")
    lines = [f"geographic check against {ref.model} at {where}, {format_utc(ref.utc, 0)}:"]
    rows = []
    for c in checks:
        unit = _UNITS[c.name]
        verdict = "consistent" if c.consistent else "NOT consistent: check heading, mounting, site, iron"
        if not math.isfinite(c.measured):
            verdict = "no data"
        lines.append(f"  {c.name[0]}  measured {_fmt(c.measured, c.name)} +- {_fmt(c.measured_sigma, c.name)} {unit}"
                     f"   model {_fmt(c.model, c.name)} {unit}   difference {_fmt(c.difference, c.name)} {unit}"
                     f" (combined 1-sigma {_fmt(c.combined_sigma, c.name)}): {verdict}")
        rows.append(f"| {c.name[0]} | {_fmt(c.measured, c.name)} +- {_fmt(c.measured_sigma, c.name)} {unit} | "
                    f"{_fmt(c.model, c.name)} {unit} | {_fmt(c.difference, c.name)} {unit} | "
                    f"{_fmt(c.combined_sigma, c.name)} {unit} | {verdict} |")
    lines.append(f"  values: {how}; {int(keep.sum())} of {keep.size} samples")
    lines.append(f"note: {NOTE}")
    lines.append(f"note: {CAUTION}")
    figure = None
    notes: list[str] = []
    if figures:
        from fieldvane.io import plots
        try:
            plots.require_matplotlib()
        except plots.PlotsUnavailable as exc:
            notes.append(f"geographic panel not drawn: {exc}")
        else:
            figure = plot_geographic(Path(out_dir) / FIGURE_NAME, est["t"], values, ref, site)
    md = [f"## Geographic check ({ref.model})", "",
          f"Site {where}; model date {format_utc(ref.utc, 0)}; values {how}.", "",
          "| element | measured (mean, 1-sigma) | model | measured - model | combined 1-sigma | verdict |",
          "| --- | --- | --- | --- | --- | --- |", *rows, "",
          f"> {NOTE[0].upper() + NOTE[1:]}. The combined 1-sigma adds the model's typical misfit at a real site "
          f"to the measured uncertainty; 'consistent' means within 3 of them. {CAUTION[0].upper() + CAUTION[1:]}.",
          ""]
    if figure is not None:
        md += [f"![Geographic check]({figure.name})", ""]
    return GeoCheck(lines, "\n".join(md), figure, notes)


def plot_geographic(path, t, values: dict, ref, site: Site) -> Path:
    """Return the PNG path of D, I (deg) and F (nT) against time with the model's values as lines."""
    from fieldvane.io import plots

    t = np.asarray(t, float)
    t0 = float(np.nanmin(t)) if t.size else 0.0
    fig = plots.new_figure(9, 6.5)
    axes = fig.subplots(3, 1, sharex=True)
    for ax, key, model_value in zip(axes, ("D_deg", "I_deg", "F_nT"), (ref.d_deg, ref.i_deg, ref.f_nT)):
        ax.plot(t - t0, values[key], color="tab:blue", linewidth=0.8, label="measured")
        ax.axhline(model_value, color="tab:red", linestyle="--", linewidth=1.0, label=f"{ref.model} main field")
        ax.set_ylabel(f"{key[0]} ({_UNITS[key]})")
        ax.grid(alpha=0.3)
    axes[-1].set_xlabel("time (s)" if t0 == 0 else f"time since t = {t0:.6g} s (s)")
    fig.suptitle(f"Declination, inclination, total field at {site.name}, against {ref.model}", fontsize=10)
    plots.legend_above(axes[0], ncol=2)
    return plots.save(fig, path)
