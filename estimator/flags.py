"""Health and status flags of every estimate: an IntFlag with frozen, documented bit numbers."""

from __future__ import annotations

import enum


class EstimateFlag(enum.IntFlag):
    """Bitfield written in the `flags` column. Bit numbers are frozen: never renumber."""

    TRACKING = 1 << 0            # tracker has a fused, gated-in measurement this sample
    COASTING = 1 << 1            # no usable measurement: prediction only, uncertainty growing
    REACQUIRED = 1 << 2          # tracker was (re)started from the lookup-table inverse here
    GATED = 1 << 3               # the sample failed the chi-square innovation gate and was rejected
    BLIND = 1 << 4               # the direction is poorly observable here (bound above threshold)
    MAGNITUDE_DISAGREE = 1 << 5  # |B| from the two isotopes disagree beyond tolerance
    LOW_SIGNAL = 1 << 6          # lock-in amplitudes too small to trust
    AMBIGUOUS = 1 << 7           # snapshot inverse: a second candidate is statistically acceptable
    SNAPSHOT = 1 << 8            # estimate from the single-sample inverse, not the tracker
    OUTSIDE_CALIBRATION = 1 << 9 # |B| outside the calibrated magnitude range
    BAD_INPUT = 1 << 10          # non-finite or missing values in the sample; not used
    COVARIANCE_FAULT = 1 << 11   # covariance lost symmetry or positive definiteness; filter reset
    NO_ESTIMATE = 1 << 12        # nothing to report yet (before acquisition)
    NOISY = 1 << 13              # lock-in noise above this stream's normal level: measurement noise inflated
    INTERPOLATED = 1 << 14       # |B| where the calibration's model is interpolated beyond its verified accuracy


def describe(value: int) -> str:
    """Return the names of the set bits, joined by '|' (e.g. 'TRACKING|BLIND')."""
    names = [f.name for f in EstimateFlag if value & f]
    return "|".join(names) if names else "0"
