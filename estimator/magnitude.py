"""Field magnitude from the two pumps' Larmor frequencies, fused, with their disagreement."""

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
    return fused, rel, rel > tolerance
