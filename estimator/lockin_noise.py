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


def second_difference_variance(rho1: float = 0.0, rho2: float = 0.0) -> float:
    """Return var(e_k - 2 e_(k-1) + e_(k-2)) / var(e) for noise correlated rho1 one sample apart, rho2 two apart.

    (1 + 4 + 1) - 2 * 2 * 2 rho1 + 2 rho2 = 6 - 8 rho1 + 2 rho2: 6 for white noise, small for noise that a
    lock-in filter has smoothed (little of it changes from one sample to the next).
    """
    return 6.0 - 8.0 * rho1 + 2.0 * rho2
