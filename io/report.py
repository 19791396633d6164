"""Report of an estimates CSV: the summary numbers (pure computation), summary.md, and the figures."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.sphere import angle_between
from fieldvane.io.errors import InputError
from fieldvane.io.recording import TRUTH_COLUMNS as TRUTH_KEYS

CAUTION = ("The output is a measurement with stated uncertainty, not a safety or navigation instrument "
           "by itself. Check the `flags` column and `sigma_deg` before acting on a direction.")
PLOTS_HINT = "install fieldvane[plots] for the figures (pip install 'fieldvane[plots]')"
NIS_BAND = (0.025, 0.975)            # central 95% interval of the chi-square distribution
DEFAULT_CHANNELS = 4                 # two probes x two pumps, when nothing in the file says otherwise
KNOWN_BITS = sum(int(f) for f in EstimateFlag)

# 2-D error with covariance P and sigma^2 = trace(P): for isotropic P, |e|^2 / sigma^2 ~ Exp(1), so
# P(|e| < k sigma) = 1 - exp(-k^2) (Rayleigh distribution).
WITHIN_1_EXPECTED = 1.0 - math.exp(-1.0)
WITHIN_2_EXPECTED = 1.0 - math.exp(-4.0)
# 1-D Gaussian: P(|e| <= sigma) = erf(1 / sqrt 2).
B_WITHIN_1_EXPECTED = math.erf(1.0 / math.sqrt(2.0))
STILL_WINDOW_S = 1.0          # windows compared by the still-stretch detector; also the settling time dropped
STILL_MIN_S = 5.0             # shortest still stretch worth an Allan deviation
STILL_MIN_SAMPLES = 64

# key -> (unit, meaning). Order is the order of the summary table; flag rates are inserted after
# `samples_with_direction`. Keys only appear in a summary when their input columns exist.
FIELDS: dict[str, tuple[str, str]] = {
    "samples": ("", "rows in the estimates file"),
    "duration_s": ("s", "last time minus first time"),
    "sample_period_s": ("s", "median time step"),
    "samples_with_direction": ("", "rows with a finite direction"),
    "flag_rate_undocumented": ("fraction", "rows with a flag bit outside the documented table"),
    "sigma_deg_median": ("deg", "median 1-sigma angular uncertainty"),
    "sigma_deg_p95": ("deg", "95th percentile of sigma_deg"),
    "nis_samples": ("", "rows with a finite NIS and dof > 0"),
    "nis_mean": ("", "mean normalized innovation squared"),
    "nis_dof_mean": ("", "mean degrees of freedom of the NIS (its expected mean)"),
    "nis_per_dof_mean": ("", "mean of NIS/dof (1 for a consistent filter)"),
    "nis_inside_95_band": ("fraction", "NIS inside the central 95% chi-square interval of its dof (0.95 expected)"),
    "b_mean_nT": ("nT", "mean fused magnitude"),
    "b_std_nT": ("nT", "standard deviation of the fused magnitude"),
    "b_a_mean_nT": ("nT", "mean magnitude seen by isotope a"),
    "b_a_std_nT": ("nT", "standard deviation of isotope a's magnitude"),
    "b_b_mean_nT": ("nT", "mean magnitude seen by isotope b"),
    "b_b_std_nT": ("nT", "standard deviation of isotope b's magnitude"),
    "b_ratio_mean": ("", "mean of b_a_nT / b_b_nT"),
    "b_ratio_std": ("", "standard deviation of b_a_nT / b_b_nT"),
    "truth_matched": ("", "rows with a truth sample within half a truth sample period"),
    "truth_unmatched": ("", "rows without a truth sample within half a truth sample period"),
    "truth_matched_no_direction": ("", "matched rows without a finite direction (not in the errors)"),
    "error_rms_deg": ("deg", "RMS angle between estimate and truth"),
    "error_p95_deg": ("deg", "95th percentile of the angle to truth"),
    "within_1sigma": ("fraction", f"error <= sigma_deg ({WITHIN_1_EXPECTED:.3f} expected, 2-D Rayleigh)"),
    "within_2sigma": ("fraction", f"error <= 2 sigma_deg ({WITHIN_2_EXPECTED:.3f} expected, 2-D Rayleigh)"),
    "within_1sigma_expected": ("fraction", "1 - exp(-1)"),
    "within_2sigma_expected": ("fraction", "1 - exp(-4)"),
    "b_error_mean_nT": ("nT", "mean of b_nT - true_b_nT"),
    "b_error_std_nT": ("nT", "standard deviation of b_nT - true_b_nT"),
    "b_error_rms_nT": ("nT", "RMS of b_nT - true_b_nT"),
    "sigma_b_nT_median": ("nT", "median 1-sigma magnitude uncertainty (sigma_b_nT column)"),
    "sigma_b_nT_p95": ("nT", "95th percentile of sigma_b_nT"),
    "b_within_1sigma": ("fraction", f"|b_nT - true_b_nT| <= sigma_b_nT ({B_WITHIN_1_EXPECTED:.3f} expected, 1-D Gaussian)"),
    "b_within_1sigma_expected": ("fraction", "erf(1 / sqrt 2)"),
    "static_start_s": ("s", "start of the static stretch analysed for noise (time column of the file)"),
    "static_end_s": ("s", "end of the static stretch"),
    "static_samples": ("", "samples in the static stretch"),
    "static_rate_hz": ("Hz", "sample rate in the static stretch (1 / median step)"),
    "static_dir_rms_deg": ("deg", "RMS angle of the direction about its mean in the stretch (both axes)"),
    "static_dir_white_deg_per_rtHz": ("deg/sqrt(Hz)", "white-noise level of the direction (Welch, both axes)"),
    "static_bound_density_deg_per_rtHz": ("deg/sqrt(Hz)", "median single-sample Cramer-Rao bound x sqrt(2 / rate): "
                                                          "the white level of independent samples at the bound"),
    "static_dir_adev_tau0_deg": ("deg", "overlapping Allan deviation of the direction at one sample period"),
    "static_dir_adev_1s_deg": ("deg", "overlapping Allan deviation of the direction at 1 s"),
    "static_dir_adev_min_deg": ("deg", "smallest Allan deviation of the direction"),
    "static_dir_adev_min_tau_s": ("s", "averaging time of the smallest direction Allan deviation"),
    "static_b_rms_nT": ("nT", "RMS of b_nT about its mean in the stretch"),
    "static_b_white_nT_per_rtHz": ("nT/sqrt(Hz)", "white-noise level of b_nT (Welch)"),
    "static_b_adev_tau0_nT": ("nT", "overlapping Allan deviation of b_nT at one sample period"),
    "static_b_adev_1s_nT": ("nT", "overlapping Allan deviation of b_nT at 1 s"),
    "static_b_adev_min_nT": ("nT", "smallest Allan deviation of b_nT"),
    "static_b_adev_min_tau_s": ("s", "averaging time of the smallest b_nT Allan deviation"),
}


def flag_key(flag: EstimateFlag) -> str:
    """Return the summary key of a flag's rate (e.g. 'flag_rate_TRACKING')."""
    return f"flag_rate_{flag.name}"


def field_info(key: str) -> tuple[str, str]:
    """Return (unit, meaning) of a summary key."""
    if key in FIELDS:
        return FIELDS[key]
    name = key.removeprefix("flag_rate_")
    return "fraction", f"rows with the {name} flag"


# ---------------------------------------------------------------------------------------- numbers

def _mean(x: np.ndarray) -> float:
    return float(np.mean(x)) if x.size else math.nan


def _std(x: np.ndarray, scale: float = 0.0) -> float:
    """Sample std; a spread within the float resolution of the values (or of `scale`) is reported as 0."""
    from fieldvane.estimator.noise_stats import below_resolution

    if x.size < 2:
        return math.nan
    return 0.0 if below_resolution(x, scale) else float(np.std(x, ddof=1))


def _pct(x: np.ndarray, q: float) -> float:
    return float(np.percentile(x, q)) if x.size else math.nan


def _finite(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, float)
    return x[np.isfinite(x)]


def median_period(t: np.ndarray) -> float:
    """Return the median positive time step of t (s), nan with fewer than two distinct times."""
    d = np.diff(np.unique(_finite(t)))
    return float(np.median(d)) if d.size else math.nan


def channel_count(estimates: dict) -> int | None:
    """Return the number of lock-in channels named by phase_<ch> columns, or None when there are none."""
    n = sum(1 for k in estimates if re.fullmatch(r"phase_[0-9]+[ab](_deg)?", k))
    return n or None


def nis_dof(estimates: dict, channels: int | None = None) -> tuple[np.ndarray, str]:
    """Return the NIS degrees of freedom per row and where they came from (column, option or assumption)."""
    n = len(estimates["t"])
    if "nis_dof" in estimates:
        return np.asarray(estimates["nis_dof"], float), "the nis_dof column"
    if channels is not None:
        return np.full(n, 2.0 * channels), f"2 x {channels} channels (given)"
    found = channel_count(estimates)
    if found is not None:
        return np.full(n, 2.0 * found), f"2 x {found} channels (from the phase_* columns)"
    return (np.full(n, 2.0 * DEFAULT_CHANNELS),
            f"2 x {DEFAULT_CHANNELS} channels (assumed: no nis_dof or phase_* column; see --channels)")


def nis_band(dof: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the (lower, upper) limits of the central 95% chi-square interval for each dof."""
    from scipy.stats import chi2

    dof = np.asarray(dof, float)
    ok = dof > 0
    lo, hi = np.full(dof.shape, np.nan), np.full(dof.shape, np.nan)
    lo[ok], hi[ok] = chi2.ppf(NIS_BAND[0], dof[ok]), chi2.ppf(NIS_BAND[1], dof[ok])
    return lo, hi


def match_truth(t_est: np.ndarray, t_truth: np.ndarray) -> np.ndarray:
    """Return, per estimate row, the index of the nearest truth sample within half its period, else -1."""
    t_est, t_truth = np.asarray(t_est, float), np.asarray(t_truth, float)
    out = np.full(t_est.shape, -1, dtype=np.int64)
    if t_truth.size == 0:
        return out
    order = np.argsort(t_truth, kind="stable")
    ts = t_truth[order]
    period = median_period(ts)
    if not math.isfinite(period):
        period = median_period(t_est)
    tol = 0.5 * period if math.isfinite(period) else 0.0
    tol += 1e-9 * max(abs(float(ts[0])), abs(float(ts[-1])), 1.0)   # rounding of written times
    right = np.clip(np.searchsorted(ts, t_est), 0, ts.size - 1)
    left = np.clip(right - 1, 0, ts.size - 1)
    pick = np.where(np.abs(ts[left] - t_est) <= np.abs(ts[right] - t_est), left, right)
    ok = np.abs(ts[pick] - t_est) <= tol
    out[ok] = order[pick[ok]]
    return out


def truth_errors(estimates: dict, truth: dict) -> dict[str, np.ndarray]:
    """Return per-row truth comparison: index (-1 unmatched), angle error (deg), |B| error (nT); nan when unknown."""
    idx = match_truth(estimates["t"], truth["t"])
    ok = idx >= 0
    n = idx.shape[0]
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])
    err = np.full(n, np.nan)
    b_err = np.full(n, np.nan)
    if ok.any():
        j = idx[ok]
        tu = np.column_stack([truth["true_ux"][j], truth["true_uy"][j], truth["true_uz"][j]])
        err[ok] = np.degrees(angle_between(u[ok], tu))
        b_err[ok] = np.asarray(estimates["b_nT"], float)[ok] - truth["true_b_nT"][j]
    return {"index": idx, "error_deg": err, "b_error_nT": b_err}


def summarize(estimates: dict, truth: dict | None = None, channels: int | None = None) -> dict:
    """Return the report's numbers (name -> int or float; units in FIELDS) for estimates and optional truth."""
    t = np.asarray(estimates["t"], float)
    flags = np.asarray(estimates["flags"], np.int64)
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])
    has_u = np.all(np.isfinite(u), axis=1)
    n = int(t.shape[0])
    s: dict = {"samples": n,
               "duration_s": float(np.nanmax(t) - np.nanmin(t)) if n else math.nan,
               "sample_period_s": median_period(t),
               "samples_with_direction": int(has_u.sum())}
    for f in EstimateFlag:
        s[flag_key(f)] = float(np.mean((flags & int(f)) != 0)) if n else math.nan
    s["flag_rate_undocumented"] = float(np.mean((flags & ~KNOWN_BITS) != 0)) if n else math.nan

    sigma = _finite(estimates["sigma_deg"])
    s["sigma_deg_median"] = float(np.median(sigma)) if sigma.size else math.nan
    s["sigma_deg_p95"] = _pct(sigma, 95)

    if "nis" in estimates:
        dof, _ = nis_dof(estimates, channels)
        nis = np.asarray(estimates["nis"], float)
        use = np.isfinite(nis) & np.isfinite(dof) & (dof > 0)
        lo, hi = nis_band(dof[use])
        s["nis_samples"] = int(use.sum())
        s["nis_mean"] = _mean(nis[use])
        s["nis_dof_mean"] = _mean(dof[use])
        s["nis_per_dof_mean"] = _mean(nis[use] / dof[use])
        s["nis_inside_95_band"] = _mean(((nis[use] >= lo) & (nis[use] <= hi)).astype(float))

    b = _finite(estimates["b_nT"])
    s["b_mean_nT"], s["b_std_nT"] = _mean(b), _std(b)
    for iso in ("a", "b"):
        col = f"b_{iso}_nT"
        if col in estimates:
            x = _finite(estimates[col])
            s[f"b_{iso}_mean_nT"], s[f"b_{iso}_std_nT"] = _mean(x), _std(x)
    if "b_a_nT" in estimates and "b_b_nT" in estimates:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = _finite(np.asarray(estimates["b_a_nT"], float) / np.asarray(estimates["b_b_nT"], float))
        s["b_ratio_mean"], s["b_ratio_std"] = _mean(ratio), _std(ratio, 1.0)
    if "sigma_b_nT" in estimates:
        sb = _finite(estimates["sigma_b_nT"])
        s["sigma_b_nT_median"] = float(np.median(sb)) if sb.size else math.nan
        s["sigma_b_nT_p95"] = _pct(sb, 95)

    if truth is not None:
        te = truth_errors(estimates, truth)
        matched = te["index"] >= 0
        sig = np.asarray(estimates["sigma_deg"], float)
        use = matched & has_u & np.isfinite(te["error_deg"])
        err = te["error_deg"][use]
        s["truth_matched"] = int(matched.sum())
        s["truth_unmatched"] = int(n - matched.sum())
        s["truth_matched_no_direction"] = int((matched & ~has_u).sum())
        s["error_rms_deg"] = float(np.sqrt(np.mean(err ** 2))) if err.size else math.nan
        s["error_p95_deg"] = _pct(err, 95)
        both = use & np.isfinite(sig)
        e2, sg = te["error_deg"][both], sig[both]
        s["within_1sigma"] = _mean((e2 <= sg).astype(float))
        s["within_2sigma"] = _mean((e2 <= 2.0 * sg).astype(float))
        s["within_1sigma_expected"] = WITHIN_1_EXPECTED
        s["within_2sigma_expected"] = WITHIN_2_EXPECTED
        be = _finite(te["b_error_nT"])
        s["b_error_mean_nT"] = _mean(be)
        s["b_error_std_nT"] = _std(be, float(np.nanmax(np.abs(np.asarray(estimates["b_nT"], float)))))
        s["b_error_rms_nT"] = float(np.sqrt(np.mean(be ** 2))) if be.size else math.nan
        if "sigma_b_nT" in estimates:
            sb = np.asarray(estimates["sigma_b_nT"], float)
            ok = np.isfinite(te["b_error_nT"]) & np.isfinite(sb)
            s["b_within_1sigma"] = _mean((np.abs(te["b_error_nT"][ok]) <= sb[ok]).astype(float))
            s["b_within_1sigma_expected"] = B_WITHIN_1_EXPECTED
    return s


# ---------------------------------------------------------------------------------------- static noise

@dataclass
class StaticNoise:
    """Noise statistics of one static stretch (rows start..end-1): Allan deviations, spectra, white levels.

    Direction numbers are total angles (both tangent axes) in deg; |B| numbers in nT. b_adev, b_spec
    are None (and b_note says why) when b_nT is constant within float resolution.
    """

    start: int
    end: int
    start_s: float
    end_s: float
    rate_hz: float
    source: str
    dir_rms_deg: float
    dir_adev: object
    dir_spec: object
    dir_white: float
    band_hz: tuple[float, float]
    b_rms_nT: float = math.nan
    b_adev: object = None
    b_spec: object = None
    b_white: float = math.nan
    b_note: str | None = None
    bound_median_deg: float = math.nan

    @property
    def samples(self) -> int:
        """Return the number of samples in the stretch."""
        return self.end - self.start

    @property
    def bound_density_deg(self) -> float:
        """Return the median single-sample bound as a white density, bound x sqrt(2 / rate), deg/sqrt(Hz)."""
        return self.bound_median_deg * math.sqrt(2.0 / self.rate_hz)

    def numbers(self) -> dict:
        """Return the summary entries (static_* keys; units in FIELDS)."""
        from fieldvane.estimator.noise_stats import value_at_tau

        out = {"static_start_s": self.start_s, "static_end_s": self.end_s, "static_samples": self.samples,
               "static_rate_hz": self.rate_hz, "static_dir_rms_deg": self.dir_rms_deg,
               "static_dir_white_deg_per_rtHz": self.dir_white}
        if math.isfinite(self.bound_median_deg):
            out["static_bound_density_deg_per_rtHz"] = self.bound_density_deg
        for key, adev, unit in (("dir", self.dir_adev, "deg"), ("b", self.b_adev, "nT")):
            if adev is None:
                continue
            if key == "b":
                out["static_b_rms_nT"] = self.b_rms_nT
                out["static_b_white_nT_per_rtHz"] = self.b_white
            k = int(np.argmin(adev.adev))
            out[f"static_{key}_adev_tau0_{unit}"] = float(adev.adev[0])
            out[f"static_{key}_adev_1s_{unit}"] = value_at_tau(adev, 1.0)
            out[f"static_{key}_adev_min_{unit}"] = float(adev.adev[k])
            out[f"static_{key}_adev_min_tau_s"] = float(adev.tau_s[k])
        return out


def _robust_step_std(x: np.ndarray) -> float:
    """Return a white-noise std estimate from successive differences (MAD, robust to steps), unit of x."""
    d = np.diff(x[np.isfinite(x)])
    if d.size < 2:
        return 0.0
    return 1.4826 * float(np.median(np.abs(d - np.median(d)))) / math.sqrt(2.0)


def find_static(estimates: dict, truth: dict | None = None,
                window: tuple[float, float] | None = None) -> tuple[int, int, str] | None:
    """Return (start row, end row exclusive, how it was found) of the static stretch to analyse, or None.

    window (start s, end s, in the file's time column) is taken as given. Otherwise the longest
    stretch where the truth (when given) or the estimate is still: 1 s windows whose mean direction
    and |B| do not move (truth: not at all; estimates: under 3 median sigma_deg and 5 standard
    errors of |B|), at least STILL_MIN_S long; its first STILL_WINDOW_S is dropped as settling.
    """
    from fieldvane.estimator.noise_stats import still_runs

    t = np.asarray(estimates["t"], float)
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])
    if window is not None:
        rows = np.flatnonzero((t >= window[0]) & (t <= window[1]))
        if rows.size == 0:
            return None
        return int(rows[0]), int(rows[-1]) + 1, f"--static {window[0]:g}:{window[1]:g}"
    if truth is not None:
        idx = match_truth(t, truth["t"])
        ok = idx >= 0
        tu = np.full(u.shape, np.nan)
        tb = np.full(t.shape, np.nan)
        tu[ok] = np.column_stack([truth["true_ux"], truth["true_uy"], truth["true_uz"]])[idx[ok]]
        tb[ok] = np.asarray(truth["true_b_nT"], float)[idx[ok]]
        tu[~np.all(np.isfinite(u), axis=1)] = np.nan          # no estimate, nothing to measure
        runs = still_runs(t, tu, tb, window_s=STILL_WINDOW_S, step_deg=1e-6, step_nT=1e-6,
                          min_duration_s=STILL_MIN_S)
        source = "still in the truth"
    else:
        sigma = _finite(estimates["sigma_deg"])
        if sigma.size == 0:
            return None
        b = np.asarray(estimates["b_nT"], float)
        period = median_period(t)
        per_window = max(2.0, STILL_WINDOW_S / period) if math.isfinite(period) else 2.0
        finite_b = b[np.isfinite(b)]
        floor = 16 * float(np.spacing(np.max(np.abs(finite_b)))) if finite_b.size else 0.0
        step_nT = 5.0 * _robust_step_std(b) * math.sqrt(2.0 / per_window) + floor
        runs = still_runs(t, u, b, window_s=STILL_WINDOW_S, step_deg=3.0 * float(np.median(sigma)),
                          step_nT=step_nT, min_duration_s=STILL_MIN_S)
        source = "still in the estimates"
    if not runs:
        return None
    start, end = runs[0]
    period = median_period(t[start:end])
    skip = int(round(STILL_WINDOW_S / period)) if math.isfinite(period) else 0
    if end - start - skip < STILL_MIN_SAMPLES:
        return None
    return start + skip, end, source


def static_noise(estimates: dict, start: int, end: int, source: str, path=None) -> StaticNoise:
    """Return the noise statistics of rows start..end-1 (uniformly sampled, finite direction and |B|)."""
    from fieldvane.estimator import noise_stats as ns

    t = np.asarray(estimates["t"], float)[start:end]
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])[start:end]
    b = np.asarray(estimates["b_nT"], float)[start:end]
    good = np.all(np.isfinite(u), axis=1) & np.isfinite(b) & np.isfinite(t)
    where = f"static stretch {t[0]:g}..{t[-1]:g} s" if t.size else "static stretch"
    if t.size < STILL_MIN_SAMPLES:
        raise InputError(f"the {where} holds {t.size} samples; the noise analysis needs at least "
                         f"{STILL_MIN_SAMPLES}", None if path is None else str(path), column="--static")
    if not good.all():
        raise InputError(f"the {where} has {int((~good).sum())} rows without a direction or |B|; choose a "
                         "stretch without them", None if path is None else str(path), column="--static")
    period = median_period(t)
    steps = np.diff(t)
    if np.any(steps > 1.5 * period) or np.any(steps <= 0):
        raise InputError(f"the {where} is not evenly sampled (gaps or repeated times); the Allan deviation "
                         "and spectrum need even sampling", None if path is None else str(path), column="--static")
    rate = 1.0 / period
    off = ns.tangent_offsets_deg(u)
    dir_spec = ns.direction_psd(u, rate)
    band = ns.default_band(dir_spec)
    out = StaticNoise(start, end, float(t[0]), float(t[-1]), rate, source,
                      dir_rms_deg=float(np.sqrt(np.mean(np.sum(off ** 2, axis=1)))),
                      dir_adev=ns.direction_adev(u, rate), dir_spec=dir_spec,
                      dir_white=ns.white_level(dir_spec, band), band_hz=band)
    if "bound_deg" in estimates:
        bound = _finite(np.asarray(estimates["bound_deg"], float)[start:end])
        if bound.size:
            out.bound_median_deg = float(np.median(bound))
    if ns.below_resolution(b):
        out.b_note = (f"b_nT is constant within float resolution in the stretch ({float(np.median(b)):.12g} nT): "
                      "no Allan deviation or spectrum of |B|")
    else:
        out.b_rms_nT = float(np.std(b))
        out.b_adev = ns.overlapping_adev(b, rate)
        out.b_spec = ns.welch_psd(b, rate)
        out.b_white = ns.white_level(out.b_spec, band)
    return out


# ---------------------------------------------------------------------------------------- inputs

def data_line_numbers(path: str | Path) -> list[int]:
    """Return the file line number (1-based) of every data row of a CSV with '#' comments and a header."""
    lines, header_seen = [], False
    with open(path, encoding="utf-8", errors="replace") as fh:
        for lineno, raw in enumerate(fh, 1):
            s = raw.strip()
            if not s or s.startswith("#"):
                continue
            if header_seen:
                lines.append(lineno)
            header_seen = True
    return lines


def check_estimates(estimates: dict, path: str | Path) -> list[str]:
    """Raise InputError (file, line, column) on values no estimator writes; return warnings (file:line: ...)."""
    t = np.asarray(estimates["t"], float)
    if t.size == 0:
        raise InputError("no data rows", str(path))
    u = np.column_stack([estimates["ux"], estimates["uy"], estimates["uz"]])
    with np.errstate(invalid="ignore"):
        norm = np.linalg.norm(u, axis=1)
        sigma = np.asarray(estimates["sigma_deg"], float)
        problems = [
            ("t", ~np.isfinite(t), "time is not a finite number"),
            ("flags", np.asarray(estimates["flags"]) < 0, "flags must be a non-negative integer"),
            ("ux", np.isfinite(norm) & (np.abs(norm - 1.0) > 1e-3), "direction (ux, uy, uz) is not a unit vector"),
            ("sigma_deg", sigma < 0, "sigma_deg is negative"),
        ]
    for column, bad, message in problems:
        if bad.any():
            row = int(np.argmax(bad))
            raise InputError(message, str(path), data_line_numbers(path)[row], column)
    warnings = []
    back = np.nonzero(np.diff(t) < 0)[0]
    if back.size:
        line = data_line_numbers(path)[int(back[0]) + 1]
        warnings.append(f"{path}:{line}: column 't': time goes backwards ({back.size} time(s) in the file)")
    return warnings


def load_truth(path: str | Path) -> tuple[dict[str, np.ndarray], list[str]]:
    """Return the ground truth of a simulator recording (t s, true_u* sensor frame, true_b_nT nT) and warnings."""
    from fieldvane.io.recording import read_recording

    block, warnings = read_recording(path)
    truth = truth_of(block)
    if truth is None:
        raise InputError("no ground-truth columns (true_ux, true_uy, true_uz, true_b_nT); only simulator "
                         "recordings carry them", str(path), None, "true_ux")
    return truth, warnings


def truth_of(block) -> dict[str, np.ndarray] | None:
    """Return a SampleBlock's ground truth (t s, true_u* sensor frame, true_b_nT nT), or None without it."""
    if not all(k in block.truth for k in TRUTH_KEYS):
        return None
    return {"t": np.asarray(block.t, float), **{k: np.asarray(block.truth[k], float) for k in TRUTH_KEYS}}


# ---------------------------------------------------------------------------------------- text

# Values that sit close to a round number need more digits to say anything (a ratio near 1).
DIGITS = {"b_ratio_mean": 10}


def format_value(value, key: str = "") -> str:
    """Return a summary value as text: integers exactly, floats to 6 significant digits, 'n/a' for nan."""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    v = float(value)
    return "n/a" if not math.isfinite(v) else f"{v:.{DIGITS.get(key, 6)}g}"


def summary_text(summary: dict) -> str:
    """Return the summary as aligned plain-text lines (key, value, unit) for the terminal."""
    width = max(len(k) for k in summary)
    lines = []
    for k, v in summary.items():
        unit, _ = field_info(k)
        lines.append(f"{k:<{width}}  {format_value(v, k)}{' ' + unit if unit and unit != 'fraction' else ''}")
    return "\n".join(lines)


def summary_markdown(summary: dict, sources: dict[str, str], images: list[tuple[str, str]],
                     notes: list[str]) -> str:
    """Return summary.md: sources, caution, the table of numbers, notes and links to the images."""
    out = ["# fieldvane report", ""]
    out += [f"- {name}: `{value}`" for name, value in sources.items()]
    out += ["", f"> **Caution.** {CAUTION}", "", "## Numbers", "",
            "| key | value | unit | meaning |", "| --- | --- | --- | --- |"]
    for k, v in summary.items():
        unit, meaning = field_info(k)
        out.append(f"| `{k}` | {format_value(v, k)} | {unit} | {meaning} |")
    if notes:
        out += ["", "## Notes", ""] + [f"- {n}" for n in notes]
    out += ["", "## Figures", ""]
    if images:
        for title, name in images:
            out += [f"### {title}", "", f"![{title}]({name})", ""]
    else:
        out += [f"Figures not drawn: {PLOTS_HINT}.", ""]
    return "\n".join(out)


# ---------------------------------------------------------------------------------------- files

@dataclass
class ReportOutput:
    """What a report wrote: files (summary.md first), the numbers, notes, and why figures were skipped."""

    files: list[Path]
    summary: dict
    notes: list[str] = field(default_factory=list)
    figures_skipped: str | None = None


def make_report(estimates_path, truth_path, out_dir, channels: int | None = None,
                figures: bool = True, static: tuple[float, float] | None = None) -> ReportOutput:
    """Return the report written to out_dir: summary.md and, when matplotlib is there, the PNG figures.

    static (start s, end s) names the static stretch for the noise analysis; by default the
    longest still stretch is found (from the truth when given, else from the estimates).
    """
    from fieldvane.io.estimates_csv import read_estimates

    est = read_estimates(estimates_path)
    notes = check_estimates(est, estimates_path)
    truth = None
    if truth_path is not None:
        truth, truth_warnings = load_truth(truth_path)
        notes += truth_warnings
    summary = summarize(est, truth, channels)
    dof, dof_source = nis_dof(est, channels)
    if "nis" in est:
        notes.append(f"NIS degrees of freedom: {dof_source}")
    still = None
    found = find_static(est, truth, static)
    if found is None:
        if static is not None:
            raise InputError(f"no estimate between {static[0]:g} and {static[1]:g} s", str(estimates_path),
                             column="--static")
        notes.append(f"no static stretch of {STILL_MIN_S:g} s or more found: no Allan deviation or noise "
                     "spectrum (give --static START:END to choose one)")
    else:
        still = static_noise(est, *found, path=estimates_path)
        summary.update(still.numbers())
        lo, hi = still.band_hz
        notes.append(f"static stretch {still.start_s:g} to {still.end_s:g} s ({still.source}"
                     f"{'' if static else f'; first {STILL_WINDOW_S:g} s dropped as settling'}); white levels "
                     f"are the mean Welch density between {lo:.3g} and {hi:.3g} Hz; Allan deviation: "
                     "overlapping estimator, NIST SP 1065 (2008)")
        if still.b_note:
            notes.append(still.b_note)
    if summary.get("b_error_std_nT") == 0.0 and "b_within_1sigma" in summary:
        notes.append(f"the |B| error is one constant offset ({summary['b_error_mean_nT']:.3g} nT, no spread within "
                     "float resolution): the stream's Larmor frequencies carry no noise (a noise-free simulation), "
                     "so b_within_1sigma compares that offset with sigma_b_nT and says nothing about its honesty")
    sources = {"estimates": str(estimates_path)}
    if truth_path is not None:
        sources["truth"] = str(truth_path)

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the report folder: {exc.strerror}", str(out)) from None
    md = out / "summary.md"
    # Numbers first, so a failure while drawing never loses them.
    _write_text(md, summary_markdown(summary, sources, [], notes + ["figures not drawn yet"]))
    skipped = None
    images: list[tuple[str, Path]] = []
    if figures:
        from fieldvane.io import plots
        try:
            plots.require_matplotlib()
        except plots.PlotsUnavailable as exc:
            skipped = f"{exc}; {PLOTS_HINT}"
        else:
            error = None
            if truth is not None:
                error = truth_errors(est, truth)["error_deg"]
            images = plots.write_figures(out, est, truth=truth, error_deg=error, nis_dof=dof, still=still)
    else:
        skipped = "figures not requested"
    _write_text(md, summary_markdown(summary, sources, [(t, p.name) for t, p in images],
                                     notes + ([f"figures not drawn: {skipped}"] if skipped else [])))
    return ReportOutput([md] + [p for _, p in images], summary, notes, skipped)


def write_report(estimates_path, truth_path, out_dir, channels: int | None = None,
                 static: tuple[float, float] | None = None) -> list[Path]:
    """Return the files of the report written to out_dir (summary.md, then the PNG figures if drawn)."""
    return make_report(estimates_path, truth_path, out_dir, channels, static=static).files


def _write_text(path: Path, text: str) -> None:
    try:
        path.write_text(text + "\n", encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write: {exc.strerror}", str(path)) from None
