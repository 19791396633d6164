"""Is the filter's sigma honest? Judgments from errors against truth, or from the innovations alone.

With truth (simulator recordings): the share of samples whose direction error is within 1 and 2 sigma.
For a 2-D Gaussian error with sigma^2 = trace P the shares are 1 - exp(-k^2): 63.2 % and 98.2 %
(docs/references.md, "Estimation"). A filter is called honest when 50-80 % lie within 1 sigma and at least
93 % within 2 sigma (TRUTH_BAND: a practical band around the Gaussian values, common practice, since
real errors are not exactly Gaussian nor isotropic).

Without truth: the normalized innovation squared (NIS) of the fused samples.
  * Consistency: the mean of NIS/dof is 1 for a consistent filter. Its chi-square band for the number
    of effectively independent samples (the count over the NIS's integrated autocorrelation time) is
    shown, but judged against NIS_BAND, wider: a calibration's model error alone moves the mean by
    several per cent, so the statistical band fails every real stream (common practice: a variance
    mismatch of 25 % is a std mismatch of about 12 %).
  * Whiteness: beyond the lock-in filter's memory (the lag where its autocorrelation falls below
    LOCKIN_MEMORY) the innovations of a consistent filter are uncorrelated, so the NIS is too. The
    mean autocorrelation of NIS/dof over lags L..2L is compared with 3 standard errors of zero
    (Bartlett: var r_k ~ t_int / n for a series with integrated autocorrelation time t_int).
    Slow structure the filter does not model (a drift, motion it lags) shows here.
Innovations cannot see a direction bias (the calibration's, or too little process noise on a smooth
track), so without truth 'consistent' is a necessary condition, not a proof.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import chdtri

from fieldvane.estimator.lockin_noise import autocorrelation

TRUTH_BAND = (0.50, 0.80, 0.93)     # within 1 sigma: low, high; within 2 sigma: at least
NIS_BAND = (0.8, 1.25)              # accepted mean NIS/dof without truth (see the module docstring)
LOCKIN_MEMORY = 0.05                # lock-in autocorrelation below which samples count as independent
MAX_ACF_LAG = 400                   # longest lag of the NIS autocorrelation examined (samples)
EXPECTED_WITHIN = (1.0 - math.exp(-1.0), 1.0 - math.exp(-4.0))   # 2-D Gaussian: 63.2 %, 98.2 %


@dataclass(frozen=True)
class Verdict:
    """A judgment of sigma: state ('honest', 'too small', 'too large', 'mixed', 'unknown') and one line of text."""

    state: str
    text: str

    @property
    def honest(self) -> bool:
        """Return True when sigma was judged honest (or consistent, without truth)."""
        return self.state == "honest"


def truth_verdict(within_1: float, within_2: float) -> Verdict:
    """Return the verdict from the fractions of errors within 1 and 2 sigma (against truth)."""
    lo, hi, two = TRUTH_BAND
    if not (math.isfinite(within_1) and math.isfinite(within_2)):
        return Verdict("unknown", "no samples with both an estimate and truth: sigma not judged")
    shares = (f"{100 * within_1:.1f} % of errors within 1 sigma, {100 * within_2:.1f} % within 2 sigma "
              f"(a 2-D Gaussian gives {100 * EXPECTED_WITHIN[0]:.1f} % and {100 * EXPECTED_WITHIN[1]:.1f} %; "
              f"honest: {100 * lo:.0f}-{100 * hi:.0f} % and >= {100 * two:.0f} %)")
    small = within_1 < lo or within_2 < two
    large = within_1 > hi
    if small and large:
        return Verdict("mixed", f"sigma is off both ways: too large for most samples but too small for the worst "
                                f"ones: {shares}")
    if small:
        return Verdict("too small", f"sigma is too small (overconfident): {shares}")
    if large:
        return Verdict("too large", f"sigma is too large (over-cautious): {shares}")
    return Verdict("honest", f"sigma is honest against truth: {shares}")


@dataclass(frozen=True)
class NisStatistics:
    """NIS consistency and whiteness of the fused samples of a run."""

    samples: int                 # fused samples
    mean_per_dof: float          # mean of NIS/dof
    band: tuple[float, float]    # central 95 % chi-square band of that mean for the effective sample count
    effective_samples: float
    acf_lags: tuple[int, int]    # lags (samples) L..2L of the whiteness check
    acf_mean: float              # mean autocorrelation of NIS/dof over those lags
    acf_limit: float             # 3 standard errors of zero


def nis_statistics(nis: np.ndarray, dof: np.ndarray, fused: np.ndarray, rate_hz: float = math.nan,
                   tau_s: float = 0.0, order: int = 1) -> NisStatistics:
    """Return NIS consistency and whiteness from per-sample NIS (N,), dof (N,) and a fused mask (N,).

    rate_hz, tau_s, order: the sample rate and the lock-in filter (tau_s 0: independent samples), which set
    the first lag L of the whiteness check (where the lock-in's autocorrelation falls below LOCKIN_MEMORY).
    """
    nis, dof = np.asarray(nis, float), np.asarray(dof, float)
    use = np.asarray(fused, bool) & np.isfinite(nis) & (dof > 0)
    n = int(use.sum())
    if n < 10:
        return NisStatistics(n, math.nan, (math.nan, math.nan), math.nan, (0, 0), math.nan, math.nan)
    x = np.where(use, nis / np.where(dof > 0, dof, 1.0), np.nan)
    mean = float(np.nanmean(x))
    xc = np.where(use, x - mean, 0.0)
    var = float(np.sum(xc * xc)) / n
    lags = np.arange(1, min(MAX_ACF_LAG, len(x) // 4) + 1)
    # Autocorrelation over pairs of fused samples (unfused ones contribute zero to sums and counts).
    acf = np.array([np.sum(xc[:-k] * xc[k:]) / max(np.sum(use[:-k] & use[k:]), 1) / var for k in lags]) \
        if var > 0 and lags.size else np.zeros(0)
    first_negative = np.flatnonzero(acf <= 0)
    cut = int(first_negative[0]) if first_negative.size else acf.size
    t_int = max(1.0, 1.0 + 2.0 * float(np.sum(acf[:cut])))
    n_eff = n / t_int
    k = float(np.median(dof[use]))
    # chdtri(dof, q) inverts the upper tail: the (1 - q) quantile (lighter to import than scipy.stats).
    band = (float(chdtri(n_eff * k, 0.975) / (n_eff * k)), float(chdtri(n_eff * k, 0.025) / (n_eff * k)))
    first = 1
    if tau_s > 0 and rate_hz > 0:
        steps = np.arange(1, 10_000)
        below = np.flatnonzero(autocorrelation(steps / rate_hz, tau_s, order) <= LOCKIN_MEMORY)
        first = int(steps[below[0]]) if below.size else int(steps[-1])
    last = 2 * first
    if last > acf.size:
        return NisStatistics(n, mean, band, n_eff, (first, last), math.nan, math.nan)
    acf_mean = float(np.mean(acf[first - 1:last]))
    return NisStatistics(n, mean, band, n_eff, (first, last), acf_mean, 3.0 * math.sqrt(t_int / n))


def nis_verdict(stats: NisStatistics) -> Verdict:
    """Return the verdict from NIS consistency and whiteness (no truth)."""
    if stats.samples < 10 or not math.isfinite(stats.mean_per_dof):
        return Verdict("unknown", "too few fused samples to judge sigma")
    lo, hi = NIS_BAND
    nis = (f"mean NIS/dof {stats.mean_per_dof:.3f} (1 if consistent; chi-square 95 % band "
           f"{stats.band[0]:.3f}-{stats.band[1]:.3f} for {stats.effective_samples:.0f} effective samples; "
           f"accepted {lo:g}-{hi:g})")
    white_known = math.isfinite(stats.acf_mean)
    white = (f"NIS autocorrelation {stats.acf_mean:.3f} over lags {stats.acf_lags[0]}-{stats.acf_lags[1]} "
             f"(limit {stats.acf_limit:.3f})") if white_known else "whiteness not checked (too short)"
    slow = white_known and stats.acf_mean > stats.acf_limit
    if stats.mean_per_dof > hi or slow:
        why = "the innovations are larger than predicted" if stats.mean_per_dof > hi else \
            "the innovations hold slow structure the filter does not model (a drift, or motion it lags)"
        return Verdict("too small", f"sigma is likely too small (overconfident): {why}: {nis}; {white}")
    if stats.mean_per_dof < lo:
        return Verdict("too large", f"sigma is likely too large (over-cautious): the innovations are smaller than "
                                    f"predicted: {nis}; {white}")
    return Verdict("honest", f"sigma is consistent with the innovations: {nis}; {white}; without truth a bias "
                             f"common to all channels cannot be seen")
