"""Noise of a lock-in output: an n-stage RC low-pass (time constant tau) seen at a sampling rate.

Demodulated white noise passed through n identical first-order stages has the impulse response
h(t) = t^(n-1) exp(-t/tau) / ((n-1)! tau^n), DC gain 1. What the tracker needs from it:

* the equivalent noise bandwidth ENBW = integral_0^inf |H(f)|^2 df = Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau)
  (one-sided; the output variance is N0 * ENBW for white input of one-sided density N0);
* the normalized autocorrelation rho(s) = R(s) / R(0) with R(s) = integral h(t) h(t + s) dt, in closed form
  (expand (t + s)^(n-1) binomially: R(s) is exp(-s/tau) times a polynomial of degree n-1 in s);
* the equivalent-bandwidth factor kappa = 1 + 2 sum_k rho(k / fs): the variance of a long average of
  correlated samples is kappa times that of as many independent ones, so a filter that treats the
  samples as independent stays honest with its measurement variance multiplied by kappa
  (kappa -> fs / (2 ENBW) when fs >> ENBW; 1 for independent samples);
* the group delay at low frequency, n * tau: the output of a slowly moving input lags it by that.
"""

from __future__ import annotations

import math

import numpy as np


def enbw_hz(tau_s: float, order: int) -> float:
    """Return the one-sided equivalent noise bandwidth (Hz) of `order` RC stages of time constant tau_s (s)."""
    return math.exp(math.lgamma(order - 0.5) - math.lgamma(order)) / (4.0 * math.sqrt(math.pi) * tau_s)


def autocorrelation(lag_s, tau_s: float, order: int) -> np.ndarray:
    """Return the normalized autocorrelation rho (dimensionless) of the filtered noise at lags lag_s (s)."""
    s = np.abs(np.asarray(lag_s, float)) / tau_s
    n = order
    # R(s) ~ exp(-s) sum_j C(n-1, j) s^(n-1-j) (n-1+j)! / 2^(n+j) (tau = 1), normalized by its value at s = 0.
    terms = [math.comb(n - 1, j) * math.exp(math.lgamma(n + j) - (n + j) * math.log(2.0)) for j in range(n)]
    r0 = terms[n - 1]
    poly = sum(c * s ** (n - 1 - j) for j, c in enumerate(terms))
    return np.exp(-s) * poly / r0


def correlation_factor(sample_rate_hz: float, tau_s: float, order: int) -> float:
    """Return kappa = 1 + 2 sum_k rho(k / fs) (>= 1): how much a long average's variance exceeds the white case."""
    if not (tau_s > 0 and sample_rate_hz > 0):
        return 1.0
    dt = 1.0 / sample_rate_hz
    # rho falls like exp(-s/tau) s^(n-1): 60 tau plus the polynomial's reach leaves < 1e-12.
    k = np.arange(1, int(math.ceil((60.0 + 4.0 * order) * tau_s / dt)) + 1)
    return float(max(1.0, 1.0 + 2.0 * np.sum(autocorrelation(k * dt, tau_s, order))))


def group_delay_s(tau_s: float, order: int) -> float:
    """Return the low-frequency group delay (s) of `order` RC stages: order * tau_s."""
    return order * tau_s if tau_s > 0 else 0.0


# The white-noise medians (rho1 = rho2 = 0) for m = 2, 4, 6, 8, from the one-dimensional integral over
# noncentral chi-square laws (given a, |a - b|^2 and |a - c|^2 are independent noncentral chi-square with m
# dof and noncentrality |a|^2); tests/test_adaptive_noise.py recomputes them with scipy.stats.ncx2.
WHITE_DIFFERENCE_MEDIAN = {2: 1.46512091470729, 4: 4.504218908682829, 6: 7.832712930780432,
                           8: 11.28540191163671}


def difference_median(m: int, rho1: float = 0.0, rho2: float = 0.0, draws: int = 100_000) -> float:
    """Return the median of min(|a - b|^2, |a - c|^2) (dimensionless) for m-dim unit-variance noise a, b, c.

    a, b, c are the noise at samples k, k-1, k-2: each component correlated rho1 between neighbours
    and rho2 two apart. White noise: the tabulated integral; correlated: seeded Monte Carlo (relative
    error of the median about 0.5 %, which only scales the learned noise level slightly).
    """
    if rho1 == 0.0 and rho2 == 0.0 and m in WHITE_DIFFERENCE_MEDIAN:
        return WHITE_DIFFERENCE_MEDIAN[m]
    cov = np.array([[1.0, rho1, rho2], [rho1, 1.0, rho1], [rho2, rho1, 1.0]])
    w, v = np.linalg.eigh(cov)
    root = v * np.sqrt(np.clip(w, 0.0, None))
    rng = np.random.default_rng(20261202 + m)
    chunk = 50_000
    values = []
    for start in range(0, draws, chunk):
        e = rng.standard_normal((min(chunk, draws - start), m, 3)) @ root.T
        d1 = np.sum((e[..., 0] - e[..., 1]) ** 2, axis=1)
        d2 = np.sum((e[..., 0] - e[..., 2]) ** 2, axis=1)
        values.append(np.minimum(d1, d2))
    return float(np.median(np.concatenate(values)))
