"""Innovation log-likelihood of a recording under candidate filter settings (the tuner's objective).

Each candidate runs the tracker itself: the same compiled core (estimator/filter_core.py) that live
and replay use, so the score is exactly that of the filter the settings would give. Candidates share
the measurement model and, when their measurement noise is the same, the prepared samples; they run
on all cores (the core releases the interpreter lock).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import NamedTuple, Sequence

import numpy as np

from fieldvane.estimator import filter_core as core
from fieldvane.estimator.calibration import Calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.tracker import Initiator, Tracker, TrackerModel

_TRACKING, _GATED = int(EstimateFlag.TRACKING), int(EstimateFlag.GATED)


class InnovationScores(NamedTuple):
    """Per-candidate scores: total log-likelihood, mean NIS of fused samples (2C if consistent), fraction of the
    scored samples (those with an innovation) that were gated, re-acquisitions."""

    loglik: np.ndarray
    mean_nis: np.ndarray
    fraction_gated: np.ndarray
    reacquisitions: np.ndarray


def innovation_loglik(calibration: Calibration, block: SampleBlock, settings_list: Sequence[FilterSettings],
                      initiator: Initiator, workers: int | None = None,
                      model: TrackerModel | None = None) -> InnovationScores:
    """Return per-candidate innovation scores of `block` under each of `settings_list`.

    loglik sums, over samples after acquisition, -0.5 (min(NIS, gate) + log det(2 pi S)) with S in
    volts^2 (R inflated by the noise level of the moment): a gated sample costs its gate, so a
    candidate cannot gain by rejecting data. workers: threads (default: the machine's cores, at most 8).
    model: a TrackerModel of this calibration to reuse across calls (its sphere medians are cached on it).
    """
    settings_list = list(settings_list)
    if not settings_list:
        raise ValueError("settings_list is empty")
    model = model if model is not None else TrackerModel(calibration.model, 1.0)
    prepared: dict[tuple, object] = {}

    def score(s: FilterSettings) -> tuple[float, float, float, int]:
        tracker = Tracker(calibration, s, initiator, model=model)
        key = (s.measurement_noise_scale, s.channel_noise_scale, s.magnitude_tolerance, s.calibration_margin,
               s.low_signal_fraction)
        if key not in prepared:
            prepared[key] = tracker.prepare(block.t, block.f, block.z, block.channels,
                                            getattr(block, "restarted", None))
        fout, iout = tracker.run_prepared(prepared[key], block.sample)
        flags = iout[:, core.J_FLAGS]
        fused = (flags & _TRACKING) != 0
        scored = np.isfinite(fout[:, core.O_NIS])
        c = tracker.counters
        mean_nis = float(np.mean(fout[fused, core.O_NIS])) if fused.any() else np.nan
        gated = np.count_nonzero(flags[scored] & _GATED)
        return (float(np.sum(fout[:, core.O_LOGLIK])), mean_nis, gated / max(int(scored.sum()), 1),
                max(c.acquisitions - 1, 0))

    workers = workers or min(os.cpu_count() or 1, 8)
    if workers > 1 and len(settings_list) > 1:
        first = score(settings_list[0])      # prepares the shared inputs before the threads start
        with ThreadPoolExecutor(max_workers=workers) as pool:
            results = [first] + list(pool.map(score, settings_list[1:]))
    else:
        results = [score(s) for s in settings_list]
    arr = np.array(results, float)
    return InnovationScores(arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3].astype(int))
