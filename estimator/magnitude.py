"""Field magnitude from the two pumps' Larmor frequencies, fused, and the rule for their disagreement.

These use f = gamma |B| as it stands; estimator/magnitude_model.py corrects the frequencies for the
cell's shifts first and gives the uncertainty `disagreement` compares the difference with.
"""

from __future__ import annotations

import numpy as np


def magnitudes_from_frequencies(f_hz: np.ndarray, gammas_hz_per_nt: np.ndarray) -> np.ndarray:
    """Return |B| in nT seen by each isotope, (N, 2), from modulation frequencies f (N, 2) in Hz."""
    return np.atleast_2d(np.asarray(f_hz, float)) / np.asarray(gammas_hz_per_nt, float)


def fuse_magnitudes(f_hz: np.ndarray, gammas_hz_per_nt: np.ndarray, tolerance: float = 1e-3):
    """Return (|B| nT (N,), relative disagreement (N,), disagree mask (N,)) from both isotopes' frequencies.

    The fused value is the plain mean: both isotopes see the same field, and their frequency noise is
    comparable. The relative disagreement |B_a - B_b| / |B| is the health signal; above `tolerance`
    the estimate is flagged.
    """
    b = magnitudes_from_frequencies(f_hz, gammas_hz_per_nt)
    fused = b.mean(axis=1)
    rel = np.abs(b[:, 0] - b[:, 1]) / np.maximum(fused, 1e-30)
    return fused, rel, disagreement(b, None, tolerance)


DISAGREE_SIGMAS = 5.0   # a healthy sensor exceeds 5 sigma of the difference about once in 1.7 million samples


def disagreement(b_per_isotope: np.ndarray, sigma_difference_nT=None, tolerance: float = 1e-3,
                 n_sigma: float = DISAGREE_SIGMAS) -> np.ndarray:
    """Return True (N,) where the isotopes' |B| (N, 2) nT differ by more than max(n_sigma * sigma, tolerance * |B|).

    sigma_difference_nT (N,) is the 1-sigma of b_a - b_b (MagnitudeEstimate.sigma_difference_nT);
    None or nan leaves only the fixed relative tolerance, which is always the floor. Rows
    missing either isotope never disagree.
    """
    b = np.atleast_2d(np.asarray(b_per_isotope, float))
    diff = np.abs(b[:, 0] - b[:, 1])
    floor = tolerance * np.abs(b.mean(axis=1))
    if sigma_difference_nT is None:
        limit = floor
    else:
        sigma = np.broadcast_to(np.asarray(sigma_difference_nT, float), diff.shape)
        limit = np.where(np.isfinite(sigma), np.maximum(n_sigma * sigma, floor), floor)
    with np.errstate(invalid="ignore"):
        return np.isfinite(diff) & (diff > limit)
