"""Innovation log-likelihood of a recording under many filter settings at once (the tuner's objective).

All candidate filters run together: every array carries a leading candidate axis, so one pass over
the block costs about as much numpy dispatch as one filter. The equations are the tracker's
(fieldvane.estimator.tracker): same model, process noise, information-form gain, Joseph update,
retraction, adaptive noise level and lost-track rules. Differences, for speed: rows with any
non-finite value are skipped (the next prediction spans the gap, the noise level's chain of
successive differences restarts after it), and no per-sample output is kept.
"""

from __future__ import annotations

import math
from typing import NamedTuple, Sequence

import numpy as np

from fieldvane.estimator.calibration import Calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.noise_level import NoiseLevelBatch, difference_normalizers
from fieldvane.estimator.response import to_real
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.sphere import tangent_basis
from fieldvane.estimator.tracker import (Initiator, gate_thresholds, initial_covariance_diagonal,
                                         process_noise_static, sample_magnitudes, weak_direction_filter,
                                         MIN_CHART_STEP_RAD)
from fieldvane.estimator.tracker_model import DIRECTION as D
from fieldvane.estimator.tracker_model import StateLayout, TrackerModel, apply_drifts, drift_jacobian

_LOG_2PI = math.log(2.0 * math.pi)


class InnovationScores(NamedTuple):
    """Per-candidate scores: total log-likelihood, mean NIS of fused samples (2C if consistent), fractions."""

    loglik: np.ndarray
    mean_nis: np.ndarray
    fraction_gated: np.ndarray
    reacquisitions: np.ndarray


def move_on_sphere(u, e1, e2, a1, a2):
    """Return (u, e1, e2) moved along the great circle a1*e1 + a2*e2 (rad, (N,) each), basis parallel-transported."""
    th = np.hypot(a1, a2)
    safe = np.where(th > 0, th, 1.0)
    k1, k2 = (a1 / safe)[:, None], (a2 / safe)[:, None]
    d = k1 * e1 + k2 * e2
    c, s = np.cos(th)[:, None], np.sin(th)[:, None]
    # Parallel transport of a tangent vector e along the step: e - (e.d)((1 - c) d + s u).
    v = (1 - c) * d + s * u
    return _orthonormal_frame(c * u + s * d, e1 - k1 * v)


def turn_on_sphere(u, e1, e2, rotvec):
    """Return (u, e1, e2) rotated by rotation vectors rotvec (N, 3) (rad, sensor frame; Rodrigues)."""
    th = np.sqrt(np.einsum("nk,nk->n", rotvec, rotvec))
    k = rotvec / np.where(th > 0, th, 1.0)[:, None]
    c, s = np.cos(th)[:, None], np.sin(th)[:, None]

    def rotate(v):
        """Return v (N, 3) rotated about k by th."""
        kv = np.einsum("nk,nk->n", k, v)[:, None]
        kxv = np.stack((k[:, 1] * v[:, 2] - k[:, 2] * v[:, 1], k[:, 2] * v[:, 0] - k[:, 0] * v[:, 2],
                        k[:, 0] * v[:, 1] - k[:, 1] * v[:, 0]), axis=1)
        return v * c + kxv * s + k * kv * (1 - c)

    return _orthonormal_frame(rotate(u), rotate(e1))


def _orthonormal_frame(u, e1):
    """Return (u, e1, e2) with u and e1 renormalized against rounding and e2 = u x e1."""
    u = u / np.sqrt(np.einsum("nk,nk->n", u, u))[:, None]
    e1 = e1 - np.einsum("nk,nk->n", e1, u)[:, None] * u
    e1 = e1 / np.sqrt(np.einsum("nk,nk->n", e1, e1))[:, None]
    e2 = np.stack((u[:, 1] * e1[:, 2] - u[:, 2] * e1[:, 1], u[:, 2] * e1[:, 0] - u[:, 0] * e1[:, 2],
                   u[:, 0] * e1[:, 1] - u[:, 1] * e1[:, 0]), axis=1)
    return u, e1, e2


def innovation_loglik(calibration: Calibration, block: SampleBlock, settings_list: Sequence[FilterSettings],
                      initiator: Initiator) -> InnovationScores:
    """Return per-candidate innovation scores of `block` under each of `settings_list` (filters run together).

    loglik sums, over samples after acquisition, -0.5 (min(NIS, gate) + log det(2 pi S)) with S in
    volts^2 (R inflated by the adaptive noise level where it is on): a gated sample costs its gate,
    so a candidate cannot gain by rejecting data.
    """
    settings_list = list(settings_list)
    nc = len(settings_list)
    if nc == 0:
        raise ValueError("settings_list is empty")
    model = TrackerModel(calibration.model)
    lay = StateLayout(model.n_probes, model.n_channels, any(s.gain_drift for s in settings_list),
                      any(s.phase_drift for s in settings_list))
    n, no, n_meas = lay.size, lay.observed.stop, model.n_meas
    r, obs = lay.rate, lay.observed

    # ---- per-candidate constants; disabled drifts get zero variance and zero noise (inert states)
    scale = np.array([s.measurement_noise_scale for s in settings_list])
    init_var = np.empty((nc, n))
    inert = np.zeros((nc, n, n))   # 1 on the diagonal of disabled states, for the definiteness check
    off = np.zeros((nc, n), bool)
    for i, s in enumerate(settings_list):
        init_var[i] = initial_covariance_diagonal(s, lay)
        off[i, lay.gain] = not s.gain_drift
        off[i, lay.phase] = not s.phase_drift
        init_var[i, off[i]] = 0.0
        inert[i][off[i], off[i]] = 1.0
    q_cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def static_noise(dt: float) -> tuple[np.ndarray, np.ndarray]:
        """Return per-candidate (Q without the direction-rate block (Nc, n, n), its factor (Nc,)) over dt."""
        key = round(dt, 9)
        if key not in q_cache:
            parts = [process_noise_static(s, lay, dt) for s in settings_list]
            q = np.array([part[0] for part in parts])
            q[off[:, :, None] | off[:, None, :]] = 0.0
            q_cache[key] = (q, np.array([part[1] for part in parts]))
        return q_cache[key]

    gates = np.array([gate_thresholds(s, n_meas) for s in settings_list])          # (Nc, 2C+1)
    lost_after = np.array([s.lost_after_gated for s in settings_list])
    alpha = np.array([1.0 / s.nis_average_samples for s in settings_list])
    nis_limit = np.array([s.nis_average_limit for s in settings_list])
    max_gap = np.array([s.max_gap_s for s in settings_list])
    log_det_r = 2.0 * (np.sum(np.log(model.sigma)) + n_meas * np.log(scale))   # log det R per candidate
    lo, hi = calibration.magnitude_range_nT
    median_bound = model.sphere_medians(math.sqrt(lo * hi))[0]                  # at noise scale 1
    blind_rel2 = np.array([(s.blind_factor * s.measurement_noise_scale * median_bound) ** 2 for s in settings_list])
    blind_abs2 = np.array([math.radians(s.blind_threshold_deg) ** 2 for s in settings_list])

    # ---- adaptive noise level per candidate and probe (estimator/noise_level.py, as in the tracker)
    adaptive = np.array([s.adaptive_noise for s in settings_list])
    component_probe = np.repeat(model.channel_probe_index, 2)
    probe_onehot = (component_probe[:, None] == np.arange(model.n_probes)[None, :]).astype(float)   # (2C, P)
    probe_sizes = probe_onehot.sum(axis=0)
    difference_norm = np.array(difference_normalizers(probe_sizes.astype(int)))
    noise = NoiseLevelBatch(model.n_probes, [s.adaptive_noise_window_samples for s in settings_list],
                            [s.adaptive_noise_threshold for s in settings_list],
                            [s.adaptive_noise_max_scale ** 2 for s in settings_list])
    y_hist = np.zeros((nc, 2, n_meas))          # innovations one and two samples back
    y_back = np.zeros(nc, int)

    # ---- inputs, vectorized once
    s0 = settings_list[0]
    b, _, _ = sample_magnitudes(block.f, calibration.gammas_hz_per_nt, s0.magnitude_tolerance,
                                calibration.magnitude_range_nT, s0.calibration_margin)
    z = np.asarray(block.z, complex)
    if tuple(block.channels) != model.channels:
        z = z[:, [tuple(block.channels).index(c) for c in model.channels]]
    zw = to_real(z) / model.sigma
    t_all = np.asarray(block.t, float)
    usable = np.isfinite(zw).all(axis=1) & np.isfinite(b) & np.isfinite(t_all)
    segments = [model.segment_of(v) for v in b.tolist()]          # the tracker's scalar code path
    segment, seg_t = [g[0] for g in segments], [g[1] for g in segments]

    # ---- state of every candidate
    # Candidates not yet acquired hold a harmless placeholder state; every update is masked.
    u = np.tile([0.0, 0.0, 1.0], (nc, 1))
    e1, e2 = np.tile([1.0, 0.0, 0.0], (nc, 1)), np.tile([0.0, 1.0, 0.0], (nc, 1))
    x = np.zeros((nc, n))
    p = (init_var + np.diagonal(inert, axis1=1, axis2=2))[:, :, None] * np.eye(n)
    p[:, D, D] = np.eye(2)
    t_last = np.full(nc, np.nan)
    acquired = np.zeros(nc, bool)
    lost = np.zeros(nc, bool)
    gated_run = np.zeros(nc, int)
    nis_avg = np.ones(nc)
    loglik, nis_sum = np.zeros(nc), np.zeros(nc)
    n_fused, n_gated, n_scored = np.zeros(nc, int), np.zeros(nc, int), np.zeros(nc, int)
    reacq = np.zeros(nc, int)

    eye_o = np.eye(no)
    select = np.eye(no, n)
    drift = lay.drift
    initiated: dict[int, tuple | None] = {}

    def acquire(mask: np.ndarray, i: int) -> np.ndarray:
        """Restart the masked candidates from the initiator at row i; return the mask of those restarted."""
        if i not in initiated:
            result = initiator(block.sample(i), float(b[i]))
            if result is not None:
                ui, cov = (np.asarray(a, float) for a in result)
                ui = ui / np.linalg.norm(ui)
                result = (ui, *tangent_basis(ui), 0.5 * (cov + cov.T))
            initiated.clear()
            initiated[i] = result
        result = initiated[i]
        if result is None or not mask.any():
            return np.zeros(nc, bool)
        ui, f1, f2, cov = result
        keep = acquired[mask]
        reacq[mask] += keep
        p_new = init_var[mask][:, :, None] * np.eye(n)
        # The initiator's covariance assumes the calibrated noise: widen it by the noise of the moment.
        p_new[:, D, D] = cov * noise.ratios[mask].max(axis=1)[:, None, None]
        # Sensor drifts outlive a lost track: keep their estimates and variances.
        p_new[:, drift, drift] = np.where(keep[:, None, None], p[mask][:, drift, drift], p_new[:, drift, drift])
        x_new = np.where(keep[:, None], x[mask], 0.0)
        x_new[:, D] = 0.0
        x_new[:, r] = 0.0
        p[mask], x[mask] = p_new, x_new
        u[mask], e1[mask], e2[mask] = ui, f1, f2
        t_last[mask] = t_all[i]
        acquired[mask] = True
        lost[mask] = False
        gated_run[mask] = 0
        nis_avg[mask] = 1.0
        y_back[mask] = 0
        return mask

    eye_n = np.eye(n)
    scale_col = scale[:, None]
    log_det_r_2pi = log_det_r + n_meas * _LOG_2PI
    gate = gates[:, n_meas]
    previous_row = -2
    for i in np.flatnonzero(usable).tolist():
        if i != previous_row + 1:
            y_back[:] = 0                   # the tracker restarts its chain of differences at a skipped row
        previous_row = i
        t = t_all[i]
        need = ~acquired | lost | (t - t_last > max_gap)       # comparisons with nan are False, silently
        if need.any():
            acquire(need, i)
        active = acquired & ~need & ~lost & (t >= t_last)
        if not active.any():
            continue

        # ---- predict: F = I + dt [0 B; 0 0], Q[direction, rate] = c B, u and basis turn about w
        dt = np.where(active, t - t_last, 0.0)
        t_last = np.where(active, t, t_last)
        coupling = np.stack((e2, -e1), axis=1)                                    # (Nc, 2, 3)
        f = np.broadcast_to(eye_n, (nc, n, n)).copy()
        f[:, D, r] = dt[:, None, None] * coupling
        q = np.empty((nc, n, n))
        for value in np.unique(dt):
            same = dt == value
            q_static, cross = static_noise(float(value))
            q[same] = q_static[same]
            q[same, D, r] = cross[same, None, None] * coupling[same]
            q[same, r, D] = np.swapaxes(q[same, D, r], 1, 2)
        p = f @ p @ np.swapaxes(f, 1, 2) + q
        u, e1, e2 = turn_on_sphere(u, e1, e2, x[:, r] * dt[:, None])

        # ---- whitened measurement per candidate (noise scale divides whitened quantities)
        rows = model.evaluate_many_in_segment(u, segment[i], seg_t[i])     # (Nc, 4, 2C)
        if no > 2:
            g = x[:, lay.gain][:, model.channel_probe_index] if lay.n_gain else np.zeros((nc, lay.n_channels))
            ph = x[:, lay.phase] if lay.n_phase else np.zeros((nc, lay.n_channels))
            rows = apply_drifts(rows, g, ph)
        rows = rows / scale_col[:, :, None]
        h = rows[:, 0]
        ht = np.empty((nc, no, n_meas))
        ht[:, D] = np.stack((e1, e2), axis=1) @ rows[:, 1:]
        if no > 2:
            ht[:, lay.drift] = drift_jacobian(h, lay, model.channel_probe_index)
        y = zw[i] / scale_col - h

        # ---- noise values: per probe, the smaller squared difference to the innovations 1 and 2 back
        d1 = ((y - y_hist[:, 0]) ** 2) @ probe_onehot
        d2 = ((y - y_hist[:, 1]) ** 2) @ probe_onehot
        values = np.minimum(d1, d2) * difference_norm
        has_values = active & adaptive & (y_back == 2) & np.all(np.isfinite(values), axis=1)
        y_hist[:, 1] = np.where(active[:, None], y_hist[:, 0], y_hist[:, 1])
        y_hist[:, 0] = np.where(active[:, None], y, y_hist[:, 0])
        y_back = np.where(active, np.minimum(y_back + 1, 2), 0)

        # ---- noise inflated per probe: whitened rows and innovation divided by sqrt(factor)
        ratios = noise.ratios
        inflated = ratios[:, component_probe]                              # (Nc, 2C)
        if np.any(inflated != 1.0):
            root = np.sqrt(inflated)
            ht = ht / root[:, None, :]
            y = y / root
        log_det_inflation = np.log(inflated).sum(axis=1)
        info = ht @ np.swapaxes(ht, 1, 2)
        j00, j01, j11 = info[:, 0, 0], info[:, 0, 1], info[:, 1, 1]
        det_j = j00 * j11 - j01 * j01
        with np.errstate(divide="ignore", invalid="ignore"):
            bound2 = (j00 + j11) / det_j
            blind = ~((bound2 <= blind_abs2) & (bound2 <= blind_rel2 * ratios.min(axis=1))) | (det_j <= 0)
        bvec = (ht @ y[:, :, None])[:, :, 0]
        a_mat = eye_o + p[:, obs, obs] @ info
        if no == 2:
            a00, a01, a10, a11 = a_mat[:, 0, 0], a_mat[:, 0, 1], a_mat[:, 1, 0], a_mat[:, 1, 1]
            det = a00 * a11 - a01 * a10
            inv = np.stack((np.stack((a11, -a01), -1), np.stack((-a10, a00), -1)), 1) / det[:, None, None]
            mt = inv @ p[:, D, :]
            logdet_a = np.log(det)
        else:
            mt = np.linalg.solve(a_mat, p[:, obs, :])
            logdet_a = np.linalg.slogdet(a_mat)[1]
        dx = (bvec[:, None, :] @ mt)[:, 0]
        nis = np.einsum("am,am->a", y, y) - np.einsum("ao,ao->a", bvec, dx[:, obs])
        if blind.any():
            # As in the tracker: blind samples correct only the well-observed tangent direction.
            for k in np.flatnonzero(blind):
                mt[k] = mt[k] @ weak_direction_filter(j00[k], j01[k], j11[k], lay, e1[k], e2[k])
            dx = (bvec[:, None, :] @ mt)[:, 0]
        clipped = np.minimum(nis, gate)
        loglik += np.where(active, -0.5 * (clipped + log_det_r_2pi + log_det_inflation + logdet_a), 0.0)
        n_scored += active
        nis_avg = np.where(active, nis_avg + alpha * (clipped / n_meas - nis_avg), nis_avg)
        ok = active & (nis <= gate)
        # As in the tracker: a gated sample's noise value counts only after another gated sample.
        noise.push(values, has_values & (ok | (gated_run > 0)))

        # ---- Joseph update of the candidates whose innovation passed the gate
        mj = np.swapaxes(mt, 1, 2) @ info
        t_mat = eye_n - mj @ select
        pu = t_mat @ p @ np.swapaxes(t_mat, 1, 2) + mj @ mt
        pu = 0.5 * (pu + np.swapaxes(pu, 1, 2))
        try:
            np.linalg.cholesky(pu + inert)
            healthy = np.ones(nc, bool)
        except np.linalg.LinAlgError:
            with np.errstate(invalid="ignore"):
                healthy = np.all(np.linalg.eigvalsh(pu + inert) > 0, axis=1)
        fused = ok & healthy
        x = x + np.where(fused[:, None], dx, 0.0)
        d1, d2 = x[:, D].T.copy()
        x[:, D] = 0.0
        u, e1, e2 = move_on_sphere(u, e1, e2, d1, d2)
        th = np.hypot(d1, d2)
        big = th > MIN_CHART_STEP_RAD
        if big.any():
            # Chart change: the error component perpendicular to the step shrinks by sin(th)/th.
            th_safe = np.where(big, th, 1.0)
            k = np.where(big, 1.0 - np.sin(th) / th_safe, 0.0)
            nx, ny = -d2 / th_safe, d1 / th_safe
            gm = np.empty((nc, 2, 2))
            gm[:, 0, 0], gm[:, 0, 1] = 1 - k * nx * nx, -k * nx * ny
            gm[:, 1, 0], gm[:, 1, 1] = -k * nx * ny, 1 - k * ny * ny
            pu[:, D, :] = gm @ pu[:, D, :]
            pu[:, :, D] = pu[:, :, D] @ np.swapaxes(gm, 1, 2)
        p = np.where(fused[:, None, None], pu, p)
        nis_sum += np.where(fused, nis, 0.0)
        n_fused += fused
        gated = active & ~ok
        n_gated += gated
        gated_run = np.where(ok, 0, gated_run + gated)
        # As in the tracker: K gated samples in a row or a covariance fault restart at this sample,
        # a high NIS average at the next one.
        now = active & ((gated_run >= lost_after) | (ok & ~healthy))
        lost |= fused & (nis_avg > nis_limit)
        if now.any():
            lost |= now & ~acquire(now, i)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_nis = np.where(n_fused > 0, nis_sum / np.maximum(n_fused, 1), np.nan)
        frac = np.where(n_scored > 0, n_gated / np.maximum(n_scored, 1), np.nan)
    return InnovationScores(loglik, mean_nis, frac, reacq)
