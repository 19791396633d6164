"""Noise statistics of still stretches: overlapping Allan deviation, Welch spectra, white-noise level.

Sources: the overlapping Allan deviation is the estimator of W. J. Riley, "Handbook of Frequency
Stability Analysis", NIST Special Publication 1065 (2008), section 5.2.4, written here with
phase-like cumulative sums; it is the one IEEE Std 1139 recommends. We apply it to any uniformly
sampled quantity y (a direction offset in degrees, a magnitude in nT) as if y were fractional
frequency data: white noise of std sigma then gives ADEV(m tau0) = sigma / sqrt(m). Spectra are
scipy.signal.welch one-sided densities: white noise of std sigma sampled at fs has the flat level
2 sigma^2 / fs, i.e. an amplitude density sigma * sqrt(2 / fs).

Directions are reduced to two tangent-plane offsets (degrees) about the stretch's mean
direction; "total" direction statistics add the two axes' variances, the same convention as
sigma_deg = sqrt(trace P).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.sphere import log_map, normalize, tangent_basis

MAX_TAU_FRACTION = 0.25      # longest averaging time: a quarter of the stretch (common practice)


@dataclass(frozen=True)
class AllanDeviation:
    """Overlapping Allan deviation: tau_s (s), adev (unit of the data), terms (squared differences averaged)."""

    tau_s: np.ndarray
    adev: np.ndarray
    terms: np.ndarray


@dataclass(frozen=True)
class NoiseSpectrum:
    """One-sided power spectral density: freq_hz (Hz), psd (unit^2/Hz), segments averaged."""

    freq_hz: np.ndarray
    psd: np.ndarray
    segments: int

    @property
    def asd(self) -> np.ndarray:
        """Return the amplitude spectral density sqrt(psd), unit/sqrt(Hz)."""
        return np.sqrt(self.psd)


def octave_factors(n_samples: int, max_fraction: float = MAX_TAU_FRACTION) -> np.ndarray:
    """Return averaging factors m = 1, 2, 4, ... up to max_fraction x n_samples (at least [1] when n >= 3)."""
    if n_samples < 3:
        return np.array([], dtype=int)
    top = max(1, int(max_fraction * n_samples))
    m = 2 ** np.arange(int(math.floor(math.log2(top))) + 1)
    return m.astype(int)


def overlapping_adev(y, rate_hz: float, factors=None) -> AllanDeviation:
    """Return the overlapping Allan deviation of uniformly sampled y at tau = m / rate_hz (unit of y).

    sigma^2(m tau0) = sum_k (x[k+2m] - 2 x[k+m] + x[k])^2 / (2 m^2 (N - 2m)), with x the cumulative sum
    of y (x[0] = 0, N = len(y) + 1 points): NIST SP 1065 eq. (12) with tau0 folded out.
    """
    y = np.asarray(y, float).ravel()
    if not np.all(np.isfinite(y)):
        raise ValueError("the data hold non-finite values")
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise ValueError(f"the sample rate must be positive, got {rate_hz!r}")
    m = octave_factors(y.size) if factors is None else np.asarray(factors, int).ravel()
    # Removing the mean changes nothing in exact arithmetic and keeps the cumulative sum small.
    x = np.concatenate([[0.0], np.cumsum(y - y.mean())])
    n = x.size
    adev, terms = [], []
    for k in m:
        if k < 1 or n - 2 * k < 1:
            raise ValueError(f"averaging factor {k} does not fit {y.size} samples")
        d = x[2 * k:] - 2.0 * x[k:n - k] + x[:n - 2 * k]
        adev.append(math.sqrt(float(np.mean(d * d)) / (2.0 * k * k)))
        terms.append(d.size)
    return AllanDeviation(m / float(rate_hz), np.array(adev), np.array(terms, dtype=int))


def default_segment(n_samples: int) -> int:
    """Return a Welch segment length: the largest power of two giving at least 8 half-overlapping segments (min 16)."""
    if n_samples < 16:
        return int(n_samples)
    target = max(16, n_samples // 4.5)
    return int(min(n_samples, 2 ** int(math.floor(math.log2(target)))))


def welch_psd(x, rate_hz: float, nperseg: int | None = None) -> NoiseSpectrum:
    """Return the one-sided Welch PSD of x (unit^2/Hz) with Hann windows, half overlap and mean removal."""
    from scipy.signal import welch

    x = np.asarray(x, float).ravel()
    if not np.all(np.isfinite(x)):
        raise ValueError("the data hold non-finite values")
    if x.size < 8:
        raise ValueError(f"{x.size} samples are too few for a spectrum")
    seg = default_segment(x.size) if nperseg is None else int(nperseg)
    f, p = welch(x, fs=float(rate_hz), window="hann", nperseg=seg, noverlap=seg // 2,
                 detrend="constant", scaling="density", return_onesided=True)
    step = seg - seg // 2
    return NoiseSpectrum(f, p, 1 + (x.size - seg) // step)


def default_band(spec: NoiseSpectrum) -> tuple[float, float]:
    """Return the band (Hz) where the white level is read: the decade above the second bin, within half Nyquist.

    A tracking filter passes the measurement noise unchanged below its bandwidth and attenuates it
    above, so the lowest resolved decade is where a tracked output shows its white level.
    """
    f = spec.freq_hz
    lo = float(f[min(2, f.size - 1)])
    return lo, max(lo, min(10.0 * lo, float(f[-1]) / 2.0))


def below_resolution(x, scale: float = 0.0, ulps: float = 16.0) -> bool:
    """Return True when the finite values of x spread over at most `ulps` float spacings of max(|x|, scale).

    Give `scale` for a derived quantity (a difference or a ratio minus one) whose operands were larger.
    """
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return True
    size = max(float(np.max(np.abs(x))), abs(float(scale)))
    return float(np.ptp(x)) <= ulps * float(np.spacing(size))


def white_level(spec: NoiseSpectrum, band_hz: tuple[float, float] | None = None) -> float:
    """Return the white-noise amplitude density sqrt(mean PSD over band_hz), unit/sqrt(Hz)."""
    lo, hi = default_band(spec) if band_hz is None else band_hz
    use = (spec.freq_hz >= lo) & (spec.freq_hz <= hi)
    if not use.any():
        raise ValueError(f"no spectral bin between {lo:g} and {hi:g} Hz")
    return math.sqrt(float(np.mean(spec.psd[use])))


def white_sigma_from_level(level: float, rate_hz: float) -> float:
    """Return the per-sample std of white noise with amplitude density `level` at rate_hz: level * sqrt(fs / 2)."""
    return float(level) * math.sqrt(float(rate_hz) / 2.0)


def mean_direction(u) -> np.ndarray:
    """Return the normalized mean of unit vectors u (N,3), sensor frame."""
    u = np.asarray(u, float)
    m = u.sum(axis=0)
    if not np.linalg.norm(m) > 0:
        raise ValueError("the directions have no mean (they cancel)")
    return normalize(m)


def tangent_offsets_deg(u, center=None) -> np.ndarray:
    """Return (N,2) offsets of unit vectors u from center (default their mean) on its tangent basis, degrees."""
    u = np.asarray(u, float)
    c = mean_direction(u) if center is None else normalize(np.asarray(center, float))
    e1, e2 = tangent_basis(c)
    d = log_map(np.broadcast_to(c, u.shape), u)
    return np.degrees(np.column_stack([d @ e1, d @ e2]))


def direction_adev(u, rate_hz: float, factors=None) -> AllanDeviation:
    """Return the total overlapping Allan deviation of directions u (N,3), degrees (both tangent axes added in quadrature)."""
    off = tangent_offsets_deg(u)
    m = octave_factors(off.shape[0]) if factors is None else factors
    a1 = overlapping_adev(off[:, 0], rate_hz, m)
    a2 = overlapping_adev(off[:, 1], rate_hz, m)
    return AllanDeviation(a1.tau_s, np.hypot(a1.adev, a2.adev), a1.terms)


def direction_psd(u, rate_hz: float, nperseg: int | None = None) -> NoiseSpectrum:
    """Return the total angular PSD of directions u (N,3), deg^2/Hz (sum of both tangent axes)."""
    off = tangent_offsets_deg(u)
    s1 = welch_psd(off[:, 0], rate_hz, nperseg)
    s2 = welch_psd(off[:, 1], rate_hz, nperseg)
    return NoiseSpectrum(s1.freq_hz, s1.psd + s2.psd, s1.segments)


def value_at_tau(adev: AllanDeviation, tau_s: float) -> float:
    """Return the ADEV at the computed tau closest to tau_s in log scale (nan when none), unit of the data."""
    if adev.tau_s.size == 0:
        return math.nan
    k = int(np.argmin(np.abs(np.log(adev.tau_s / tau_s))))
    return float(adev.adev[k]) if abs(math.log(adev.tau_s[k] / tau_s)) < math.log(1.5) else math.nan


def still_runs(t, u, b_nT, *, window_s: float, step_deg: float, step_nT: float,
               min_duration_s: float, max_gap_periods: float = 1.5) -> list[tuple[int, int]]:
    """Return [(start, stop)] sample index ranges (stop exclusive) where the field is still, longest first.

    The samples are cut into windows of window_s; a window is still when its mean direction lies
    within step_deg of the previous window's and its mean |B| within step_nT. Runs of still windows
    (a run starts at the window before its first still step) are split at non-finite values and
    at time gaps longer than max_gap_periods median periods; runs shorter than min_duration_s
    are dropped.
    """
    t = np.asarray(t, float)
    u = np.asarray(u, float)
    b = np.asarray(b_nT, float)
    n = t.size
    ok = np.isfinite(t) & np.all(np.isfinite(u), axis=1) & np.isfinite(b)
    if n < 4:
        return []
    dt = np.diff(t)
    period = float(np.median(dt[dt > 0])) if np.any(dt > 0) else math.nan
    if not math.isfinite(period):
        return []
    per_window = max(2, int(round(window_s / period)))
    # Pieces of consecutive good, evenly spaced samples.
    breaks = np.flatnonzero(~ok[:-1] | ~ok[1:] | (dt > max_gap_periods * period) | (dt <= 0)) + 1
    out = []
    for lo, hi in zip(np.concatenate([[0], breaks]), np.concatenate([breaks, [n]])):
        if not ok[lo] or hi - lo < 2 * per_window:
            continue
        edges = np.arange(lo, hi - per_window + 1, per_window)
        means_u = np.array([mean_direction(u[a:a + per_window]) for a in edges])
        means_b = np.array([b[a:a + per_window].mean() for a in edges])
        ang = np.degrees(np.arccos(np.clip(np.sum(means_u[1:] * means_u[:-1], axis=1), -1.0, 1.0)))
        still = (ang <= step_deg) & (np.abs(np.diff(means_b)) <= step_nT)
        k = 0
        while k < still.size:
            if not still[k]:
                k += 1
                continue
            j = k
            while j < still.size and still[j]:
                j += 1
            start, stop = int(edges[k]), int(min(edges[j] + per_window, hi))
            if (stop - start) * period >= min_duration_s:
                out.append((start, stop))
            k = j
    out.sort(key=lambda r: r[1] - r[0], reverse=True)
    return out
