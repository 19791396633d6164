"""What replay, run, tune and demo share: calibration, filter settings and the stream's lock-in metadata in,
a tracker out; readable summaries of what the tracker did."""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping

import numpy as np

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.io.errors import InputError

# Recording metadata keys that describe the stream's lock-in (docs/scenarios.md, the recording CSV).
LOCKIN_TAU_KEY = "lockin_time_constant_s"
LOCKIN_ORDER_KEY = "lockin_filter_order"
RATE_KEY = "sample_rate_hz"


def settings_for_stream(settings: FilterSettings | None, metadata: Mapping[str, str] | None,
                        source: str = "<recording>", calibration=None) -> FilterSettings:
    """Return filter settings completed by the stream's lock-in filter: a recording's `# key: value` metadata,
    else the filter file's, else the calibration scan's (`calibrate` keeps it).

    The recording's own metadata describe how it was taken, so they win over a filter file's lock-in settings
    (a file tuned on another recording); the file's settings serve streams without them (live runs, captures);
    without either, the stream is taken to come through the lock-in the calibration scan came through (the same
    electronics), not as independent samples: that assumption made a live lock-in stream's error 10x its replay's.
    """
    s = settings if settings is not None else FilterSettings()
    meta = metadata or {}
    stated = scan_lockin(meta, source)
    if stated is None and s.lockin_time_constant_s == 0:
        stated = getattr(calibration, "scan_lockin", None)
    if stated is not None:
        tau, order = stated
        try:
            s = s.replace(lockin_time_constant_s=tau, lockin_filter_order=order)
        except ValueError as exc:
            raise InputError(f"lock-in metadata out of range: {exc}", source, column=LOCKIN_TAU_KEY) from None
    return s


def scan_lockin(metadata: Mapping[str, str] | None, source: str = "<recording>") -> tuple[float, int] | None:
    """Return (RC time constant s, stages; 0 s: none) of the lock-in filter a recording's metadata state, or None."""
    meta = metadata or {}
    if LOCKIN_TAU_KEY not in meta:
        return None
    tau = _number(meta, LOCKIN_TAU_KEY, source)
    order = int(_number(meta, LOCKIN_ORDER_KEY, source)) if LOCKIN_ORDER_KEY in meta else \
        FilterSettings().lockin_filter_order
    return tau, order


def lockin_line(settings: FilterSettings, calibration, prefix: str) -> str:
    """Return the start-up line saying which lock-in filter a live stream is taken to come through, and from where."""
    tau, order = settings.lockin_time_constant_s, settings.lockin_filter_order
    if tau <= 0:
        return f"{prefix}: lock-in filter not known: samples taken as independent (a filter file's " \
               "lockin_time_constant_s states it)"
    scan = getattr(calibration, "scan_lockin", None)
    where = "the calibration scan's" if scan is not None and tuple(scan) == (tau, order) else "the filter file's"
    return f"{prefix}: lock-in filter {order} x {1e3 * tau:g} ms ({where}; a filter file's lockin_time_constant_s " \
           "states another)"


def sample_rate_from(metadata: Mapping[str, str] | None, source: str = "<recording>") -> float | None:
    """Return the `# sample_rate_hz:` metadata (Hz) when present, else None."""
    if metadata and RATE_KEY in metadata:
        rate = _number(metadata, RATE_KEY, source)
        return rate if rate > 0 else None
    return None


def _number(meta: Mapping[str, str], key: str, source: str) -> float:
    try:
        value = float(meta[key])
    except ValueError:
        raise InputError(f"metadata '{key}' is not a number: {meta[key]!r}", source, column=key) from None
    if not math.isfinite(value):
        raise InputError(f"metadata '{key}' must be finite", source, column=key)
    return value


def counters_table(counters: Mapping[str, object], title: str = "", indent: str = "  ") -> str:
    """Return counters as an aligned two-column table (zeros left out, nested dicts flattened as a.b)."""
    rows: list[tuple[str, object]] = []

    def walk(prefix: str, items: Mapping[str, object]) -> None:
        for k, v in items.items():
            name = f"{prefix}{k}"
            if isinstance(v, Mapping):
                walk(name + ".", v)
            elif v:
                rows.append((name.replace("_", " "), v))

    walk("", counters)
    if not rows:
        return (title + "\n" if title else "") + indent + "(all zero)"
    width = max(len(k) for k, _ in rows)
    lines = [title] if title else []
    lines += [f"{indent}{k:<{width}}  {v:>10,}" if isinstance(v, int) else f"{indent}{k:<{width}}  {v}"
              for k, v in rows]
    return "\n".join(lines)


PROBE_SETS = {0: "none", 1: "probe 1 only", 2: "probe 2 only", 3: "both probes"}


def probe_use_line(probes_used: Counter) -> str:
    """Return 'probes used: both probes 97.1 %, probe 1 only 2.9 %' from a Counter of probes_used bitmasks."""
    total = sum(probes_used.values())
    if not total:
        return "probes used: (no samples)"
    parts = [f"{PROBE_SETS.get(k, str(k))} {100.0 * n / total:.1f} %"
             for k, n in sorted(probes_used.items(), key=lambda kv: -kv[1])]
    return "probes used: " + ", ".join(parts)


def noise_line(tracker) -> str:
    """Return the stream's learned noise level per probe (std over the calibrated one)."""
    levels = ", ".join(f"probe {p} {v:.2f}" for p, v in zip(tracker.probes, tracker.noise_baseline))
    how = "given in the filter settings" if tracker.settings.noise_baseline_ratio > 0 else "learned from the stream"
    kappa = f"; lock-in correlation factor {tracker.kappa:.2f}, delay {1e3 * tracker.delay_s:.1f} ms removed" \
        if tracker.settings.lockin_time_constant_s > 0 else ""
    return f"noise level of this stream, std over the calibration's ({how}): {levels}{kappa}"


def health_warnings(counters, n_samples: int) -> list[str]:
    """Return warnings a user should see about a tracked stream (mostly rejected samples, many restarts)."""
    out = []
    if n_samples and counters.gated > 0.2 * n_samples:
        out.append(f"{100.0 * counters.gated / n_samples:.0f} % of samples failed the chi-square gate: is this "
                   "the sensor (and the magnitude range) the calibration was made for?")
    lost = counters.lost_gated + counters.lost_nis
    if lost > 10 and n_samples and lost > n_samples / 2000:
        out.append(f"the track was lost and restarted {lost} times: the estimates cannot be trusted as a track")
    return out


def resets_lines(resets, limit: int = 8) -> list[str]:
    """Return one line per (re)acquisition (time, reason, jump), the first `limit` of them."""
    out = []
    for r in list(resets)[:limit]:
        jump = "" if not np.isfinite(r.jump_deg) else f", jump {r.jump_deg:.2f} deg"
        out.append(f"  {r.t:12.3f} s  {r.reason}{jump}")
    if len(resets) > limit:
        out.append(f"  ... {len(resets) - limit} more")
    return out
