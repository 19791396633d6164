"""Lock-in noise from the stream itself: each channel's noise level and the output filter's correlation.

Statistic. For a lag of k samples, the second difference of one real lock-in component,
D_k(t) = z(t + k) - 2 z(t) + z(t - k), cancels whatever is constant or linear over the 2k samples
(the field's smooth motion, a slow gain or phase drift, the calibration's model error at a slowly
changing direction). For noise of variance s^2 and normalized autocorrelation rho,

    E D_k^2 = s^2 (6 - 8 rho(k dt) + 2 rho(2 k dt))

(lockin_noise.second_difference_variance at lags k dt and 2 k dt): 6 s^2 for independent samples,
much less at small k for samples an n-stage RC low-pass has smoothed, rising to 6 s^2 once k dt is
past the filter's memory. What motion is left adds terms that grow with k: k (a random walk of the
direction), k^3 (a random walk of its rate), k^4 (a steadily curving track).

Fit. The variance of D_k at 20-40 lags spread geometrically over up to MAX_LAG_S is measured
robustly (the median of D_X^2 + D_Y^2 over the stream, divided by the chi-square median with 2
degrees of freedom, so a noise burst or spikes in a minority of samples barely move it), then
fitted per channel with s_c^2 (6 - 8 rho(k) + 2 rho(2k)) + a_c k + b_c k^3 + c_c k^4 (all >= 0, by
non-negative least squares on relative misfits) sharing one filter (order n, time constant tau):
for each order 1..8, tau by bounded scalar minimization, the order with the smallest misfit kept.
The lag-1 term is the statistic the tracker's on-line noise learner uses (estimator/filter_core.py),
so the level found here and the level the tracker learns agree when tau and n are right.

A slow drift cannot inflate s_c: it is linear over 2k samples to high accuracy and cancels.
Samples whose neighbours are not k steps away (gaps, restarts, missing values) are left out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar, nnls

from fieldvane.estimator.lockin_noise import autocorrelation, correlation_factor

MAX_LAG_S = 0.5          # longest lag fitted (s): covers 4 stages of up to ~25 ms
N_LAGS = 40              # lags spread geometrically from 1 sample to the longest
MIN_PAIRS = 50           # fewest second differences behind one lag's median
MAX_ROWS = 20_000        # second differences per lag used for the median (evenly spread); bounds the work
ORDERS = tuple(range(1, 9))
INDEPENDENT_KAPPA = 1.1  # below this bandwidth factor the samples count as independent (std within 5%)
BURST_WINDOW_S = 0.5     # windows compared to find noise bursts (s)
BURST_THRESHOLD = 2.5    # a window whose second-difference level exceeds the usual by this is a burst (the
                         # tracker's adaptive_noise_threshold default: common practice)
_CHI2_MEDIAN_2 = 2.0 * math.log(2.0)   # median of chi-square with 2 degrees of freedom (exponential)


@dataclass(frozen=True)
class NoiseFit:
    """Per-channel lock-in noise and the output filter's correlation, found from the stream (or given).

    std_V (C,): noise std of each real component (X and Y alike), V. tau_s, order: the RC filter
    (tau_s 0: independent samples). kappa: its equivalent-bandwidth factor at sample_rate_hz.
    lags (L,) samples; variogram and fitted (L, C): measured and fitted variance of D_k, V^2.
    by_order: (order, tau_s, misfit) of the best fit of every order tried (empty when given).
    source: 'data' (fitted), 'given' (tau and order supplied; levels fitted). independent: no correlation
    worth modelling was found (kappa below INDEPENDENT_KAPPA; tau_s is then 0).
    """

    channels: tuple[str, ...]
    std_V: np.ndarray
    tau_s: float
    order: int
    kappa: float
    sample_rate_hz: float
    lags: np.ndarray
    variogram: np.ndarray
    fitted: np.ndarray
    misfit: float
    by_order: tuple[tuple[int, float, float], ...]
    source: str
    independent: bool
    burst_fraction: float = 0.0     # share of sample-channels left out as noise bursts

    def ratio(self, calibrated_std_V: np.ndarray) -> np.ndarray:
        """Return std_V over the calibration's noise std per channel (dimensionless)."""
        return self.std_V / np.asarray(calibrated_std_V, float)


def sample_step_s(t: np.ndarray) -> float:
    """Return the median positive time step of t (s); nan when there is none."""
    d = np.diff(np.asarray(t, float))
    d = d[np.isfinite(d) & (d > 0)]
    return float(np.median(d)) if d.size else math.nan


def default_lags(n_samples: int, rate_hz: float, max_lag_s: float = MAX_LAG_S, n_lags: int = N_LAGS) -> np.ndarray:
    """Return lags (samples, increasing, unique) from 1 to max_lag_s or n_samples / 20, spread geometrically."""
    top = int(max(1, min(round(max_lag_s * rate_hz), n_samples // 20)))
    return np.unique(np.round(np.geomspace(1, top, n_lags)).astype(int)) if top > 1 else np.array([1])


def second_difference_variogram(t: np.ndarray, z: np.ndarray, lags: np.ndarray, dt: float,
                                 quiet: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Return (variance of D_k per real component (L, C) V^2, pairs used (L, C)) of complex values z (N, C).

    Robust: the median of D_X^2 + D_Y^2 over usable samples divided by the chi-square median with 2
    degrees of freedom (X and Y of a channel share one noise level). A sample counts for lag k when
    its neighbours k steps before and after are finite and k dt away in time (half a step of slack),
    and, when quiet (N, C) is given, all three are quiet.
    """
    t = np.asarray(t, float)
    z = np.asarray(z, complex)
    n, c = z.shape
    out = np.full((len(lags), c), np.nan)
    used = np.zeros((len(lags), c), int)
    for i, k in enumerate(np.asarray(lags, int)):
        if 2 * k >= n:
            continue
        step = max(1, (n - 2 * k) // MAX_ROWS)
        a, m, b = slice(2 * k, None, step), slice(k, n - k, step), slice(0, n - 2 * k, step)
        on_time = np.abs(t[a] - t[b] - 2 * k * dt) <= 0.5 * dt
        d = z[a] - 2.0 * z[m] + z[b]
        q = d.real ** 2 + d.imag ** 2
        ok = on_time[:, None] & np.isfinite(q)
        if quiet is not None:
            ok &= quiet[a] & quiet[m] & quiet[b]
        for ch in range(c):
            vals = q[ok[:, ch], ch]
            if vals.size >= MIN_PAIRS:
                out[i, ch] = float(np.median(vals)) / _CHI2_MEDIAN_2
                used[i, ch] = vals.size
    return out, used


def quiet_samples(t: np.ndarray, z: np.ndarray, dt: float, window_s: float = BURST_WINDOW_S,
                  threshold: float = BURST_THRESHOLD) -> np.ndarray:
    """Return a mask (N, C): False in windows where a channel's lag-1 second differences are much noisier than usual.

    Each window's median of D_1^2 against the median of all windows' medians: above `threshold` the
    window is a noise burst and is left out (with one window either side), so a burst in a minority of
    the stream does not raise the stream's normal level.
    """
    z = np.asarray(z, complex)
    n, c = z.shape
    quiet = np.ones((n, c), bool)
    w = max(32, int(round(window_s / dt)))
    if n < 4 * w:
        return quiet
    d = z[2:] - 2.0 * z[1:-1] + z[:-2]
    q = d.real ** 2 + d.imag ** 2
    n_win = q.shape[0] // w
    with np.errstate(invalid="ignore"):
        med = np.nanmedian(q[:n_win * w].reshape(n_win, w, c), axis=1)          # (W, C)
    typical = np.nanmedian(med, axis=0)
    loud = med > threshold * typical[None, :]
    loud = loud | np.roll(loud, 1, axis=0) & (np.arange(n_win) > 0)[:, None] \
        | np.roll(loud, -1, axis=0) & (np.arange(n_win) < n_win - 1)[:, None]
    rows = np.repeat(loud, w, axis=0)
    quiet[1:1 + rows.shape[0]] = ~rows
    return quiet


def noise_shape(lags: np.ndarray, dt: float, tau_s: float, order: int) -> np.ndarray:
    """Return (6 - 8 rho(k dt) + 2 rho(2 k dt)) at lags k (samples): E D_k^2 / s^2 (6 for independent samples)."""
    k = np.asarray(lags, float)
    if not tau_s > 0:
        return np.full(k.shape, 6.0)
    return 6.0 - 8.0 * autocorrelation(k * dt, tau_s, order) + 2.0 * autocorrelation(2.0 * k * dt, tau_s, order)


def _fit_levels(v: np.ndarray, lags: np.ndarray, shape: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Return (relative misfit summed over channels, noise variances (C,), fitted (L, C)) for a given shape."""
    k = np.asarray(lags, float)
    basis = np.column_stack([shape, k, k ** 3, k ** 4])
    scale = np.max(np.abs(basis), axis=0)
    basis = basis / scale
    total = 0.0
    levels = np.full(v.shape[1], np.nan)
    fitted = np.full(v.shape, np.nan)
    for ch in range(v.shape[1]):
        ok = np.isfinite(v[:, ch]) & (v[:, ch] > 0)
        if ok.sum() < 2:
            continue
        # Relative misfits: every lag's median has about the same relative error.
        coef, rnorm = nnls(basis[ok] / v[ok, ch, None], np.ones(int(ok.sum())))
        total += rnorm ** 2
        levels[ch] = coef[0] / scale[0]
        fitted[:, ch] = basis @ coef
    return total, levels, fitted


def fit_noise(t: np.ndarray, z: np.ndarray, channels, tau_s: float | None = None, order: int | None = None,
              rate_hz: float | None = None) -> NoiseFit:
    """Return the per-channel noise and the lock-in's filter of a stream of complex values z (N, C) V at times t (s).

    tau_s and order given (tau_s >= 0): the filter is taken as known and only the levels are fitted;
    otherwise both are fitted from the data (orders 1..8). rate_hz: the sample rate (default: from t).
    """
    t = np.asarray(t, float)
    z = np.asarray(z, complex)
    if z.ndim != 2 or z.shape[0] != t.shape[0]:
        raise ValueError(f"lock-in values must be (N, C) with N = len(t) (got {z.shape} for {t.shape[0]} times)")
    dt = 1.0 / rate_hz if rate_hz else sample_step_s(t)
    if not (dt > 0 and math.isfinite(dt)):
        raise ValueError("the samples' times do not increase: no sample rate")
    lags = default_lags(int(t.shape[0]), 1.0 / dt)
    quiet = quiet_samples(t, z, dt)
    v, used = second_difference_variogram(t, z, lags, dt, quiet)
    if not np.any(np.isfinite(v[0])):
        raise ValueError(f"too few usable samples for a noise estimate: {int(used[0].max())} second differences "
                         f"(need {MIN_PAIRS})")
    keep = np.any(np.isfinite(v), axis=1)
    lags, v = lags[keep], v[keep]
    by_order: list[tuple[int, float, float]] = []
    if tau_s is not None and order is not None:
        tau, n = float(tau_s), int(order)
        source = "given"
    elif len(lags) < 4:
        # Too short to see a filter: count the samples as independent.
        tau, n = 0.0, 1
        source = "data"
    else:
        lo, hi = math.log(dt / 20.0), math.log(max(lags[-1] * dt, 2 * dt))
        for n_try in ORDERS:
            res = minimize_scalar(lambda lt: _fit_levels(v, lags, noise_shape(lags, dt, math.exp(lt), n_try))[0],
                                  bounds=(lo, hi - math.log(n_try) if hi - math.log(n_try) > lo else hi),
                                  method="bounded", options={"xatol": 1e-3})
            by_order.append((n_try, float(math.exp(res.x)), float(res.fun)))
        n, tau, _ = min(by_order, key=lambda r: r[2])
        source = "data"
    kappa = correlation_factor(1.0 / dt, tau, n) if tau > 0 else 1.0
    independent = kappa < INDEPENDENT_KAPPA if source == "data" else not tau > 0
    if independent and source == "data":
        tau, kappa = 0.0, 1.0
    misfit, levels, fitted = _fit_levels(v, lags, noise_shape(lags, dt, tau, n))
    return NoiseFit(tuple(channels), np.sqrt(levels), float(tau), int(n), float(kappa), 1.0 / dt, lags, v, fitted,
                    float(math.sqrt(misfit / max(v.size, 1))), tuple(by_order), source, bool(independent),
                    float(1.0 - np.mean(quiet)))
