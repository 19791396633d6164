"""The tracker's compiled core: one implementation of the filter step for live, replay and tuning.

`run_filter` advances one filter over a block of prepared samples (whitened lock-in values, magnitude
segment, input flags) and writes one output row per sample. It stops early, returning the sample
index, when the track must be (re)started: the Python side (estimator/tracker.py) asks the
initiator (the lookup-table inverse) and calls `finish_acquisition`, then resumes. Everything else
(prediction, measurement model, drift states, information-form update, chi-square gating per probe,
adaptive noise with a learned baseline, health flags, reset rules) happens here, compiled by numba:
ahead of time at install, or by its JIT where that module is missing (fieldvane/kernels.py).

Equations (the error-state EKF on the sphere of estimator/tracker.py's docstring). Error state:
direction error (2, tangent basis e1, e2), optional per-probe log-gain and per-channel phase drifts,
angular velocity of the field direction (3, sensor frame). Measurements are whitened by the
calibrated noise std of each real component. With J = H^T R^-1 H, b = H^T R^-1 y the gain is
M = P_o (I + J P_oo)^-1 (never inverting P), dx = M b, P+ = (I - M J S) P (I - M J S)^T + M J M^T
(Joseph form; S selects the observed states), symmetrized; the NIS comes from the same pieces.

Noise. R of probe p is the calibrated noise times lambda_p * kappa + e: lambda_p the noise variance
ratio of the moment (this stream's learned baseline, raised during a burst), kappa >= 1 the
equivalent-bandwidth factor of lock-in-correlated noise (white: 1), e the calibration's model-error
ratio at this |B|. Gating and NOISY use the marginal variance (lambda_p + e): a correlated stream
is not gated for being correlated.

All arrays are float64/int64; index constants below name the slots of the config and state arrays.
"""

from __future__ import annotations

import math

import numpy as np
from fieldvane.kernels import entry, helper

# ---- reasons for a (re)start, stored in the int state and returned to Python
R_NONE, R_START, R_GATED, R_NIS, R_GAP, R_FAULT, R_RESTART, R_BACKWARDS, R_BAD_TIME = range(9)
REASON_NAMES = ("", "start", "gated", "nis", "gap", "fault", "sensor_restart", "time_backwards", "bad_time")

# ---- flag bits (estimator/flags.py; repeated as plain ints for the compiled code)
TRACKING, COASTING, REACQUIRED, GATED, BLIND = 1, 2, 4, 8, 16
DISAGREE, LOW_SIGNAL, AMBIGUOUS, SNAPSHOT, OUTSIDE = 32, 64, 128, 256, 512
BAD_INPUT, COV_FAULT, NO_ESTIMATE, NOISY, INTERPOLATED = 1024, 2048, 4096, 8192, 16384

# ---- float config slots
C_ARW, C_RRW, C_QGAIN, C_QPHASE, C_INIT_RATE, C_INIT_GAIN, C_INIT_PHASE = range(7)
C_NIS_ALPHA, C_NIS_LIMIT, C_MAX_GAP, C_BLIND_REL2, C_BLIND_ABS2 = range(7, 12)
C_NOISE_THR, C_NOISE_MAX, C_KAPPA, C_LEARN_S, C_STRIDE_S, C_BASELINE0 = range(12, 18)
C_LOW_FRAC2, C_LOW_MIN_POWER, C_LOW_ALPHA, C_MODEL_FLAG, C_T_DUP = range(18, 23)
N_CFG = 23

# ---- int config slots
I_NPROBES, I_NCH, I_NGAIN, I_NPHASE, I_WINDOW, I_LONG, I_LOST_AFTER, I_PROBE_RESET = range(8)
I_DEGREE, I_NPOW, I_NMONO, I_ADAPTIVE, I_PROBE_REJECTION = range(8, 13)
N_ICFG = 13

# ---- float state slots
S_U, S_E1, S_E2 = 0, 3, 6
S_TLAST, S_NISAVG, S_SEGT_CACHED, S_TSTART, S_NEXT_PUSH, S_ACQ_RATIO, S_SEGT_LAST = range(9, 16)
N_FSTATE = 16

# ---- int state slots
K_ACQUIRED, K_LOST, K_GATED_RUN, K_SEG_CACHED, K_SEG_LAST, K_HAVE_T, K_PREV_GATED, K_ACQ_INDEX = range(8)
N_ISTATE = 8

# ---- counters (named in tracker.TrackerCounters, same order)
COUNTER_NAMES = ("samples", "fused", "gated", "bad_input", "coasted", "acquisitions", "initiator_failures",
                 "lost_gated", "lost_nis", "gaps", "covariance_faults", "restarts", "time_backwards",
                 "bad_times", "duplicate_times", "probe_rejections", "probe_resets", "probe_missing",
                 "probe_low")
(N_SAMPLES, N_FUSED, N_GATED, N_BAD, N_COASTED, N_ACQ, N_INIT_FAIL, N_LOST_GATED, N_LOST_NIS, N_GAPS,
 N_FAULTS, N_RESTARTS, N_BACKWARDS, N_BAD_TIMES, N_DUPLICATES, N_PROBE_REJ, N_PROBE_RESETS, N_PROBE_MISSING,
 N_PROBE_LOW) = range(len(COUNTER_NAMES))

# ---- output columns of the float output array
O_UX, O_UY, O_UZ, O_SIGMA, O_NIS, O_BOUND2, O_NOISE, O_LOGLIK, O_T = range(9)
N_FOUT = 9
# int outputs: flags, nis dof, probes used (bitmask: 1 = probe 1, 2 = probe 2)
J_FLAGS, J_DOF, J_PROBES = range(3)
N_IOUT = 3

MIN_CHART_STEP_RAD = 2.5e-3  # below this (0.14 deg) 1 - sin(a)/a < 1.1e-6: the chart-change Jacobian is I
LOG_2PI = math.log(2.0 * math.pi)


class FilterArrays:
    """The numbers one compiled filter needs and keeps: configuration, model tables, state, scratch."""

    def __init__(self, cfg, icfg, w_table, exps, comp_probe, chan_probe, normalizers, gates, sigma_cal):
        self.cfg = np.ascontiguousarray(cfg, np.float64)
        self.icfg = np.ascontiguousarray(icfg, np.int64)
        self.w_table = np.ascontiguousarray(w_table, np.float64)
        self.exps = np.ascontiguousarray(exps, np.int64)
        self.comp_probe = np.ascontiguousarray(comp_probe, np.int64)
        self.chan_probe = np.ascontiguousarray(chan_probe, np.int64)
        self.normalizers = np.ascontiguousarray(normalizers, np.float64)
        self.gates = np.ascontiguousarray(gates, np.float64)
        self.log_sigma_sum = float(np.sum(np.log(sigma_cal)))
        self.sigma_cal = np.ascontiguousarray(sigma_cal, np.float64)
        n_probes, n_ch = int(icfg[I_NPROBES]), int(icfg[I_NCH])
        n = 2 + int(icfg[I_NGAIN]) + int(icfg[I_NPHASE]) + 3
        m = 2 * n_ch
        self.n = n
        self.m = m
        self.fstate = np.zeros(N_FSTATE)
        self.istate = np.zeros(N_ISTATE, np.int64)
        self.counters = np.zeros(len(COUNTER_NAMES), np.int64)
        self.x = np.zeros(n)
        self.p = np.zeros((n, n))
        self.ratio = np.ones(n_probes)            # noise variance factor per probe (lambda, no kappa)
        self.baseline = np.ones(n_probes)         # learned normal level per probe
        self.short_ring = np.full((n_probes, int(icfg[I_WINDOW])), np.nan)
        self.short_sorted = np.full((n_probes, int(icfg[I_WINDOW])), np.nan)
        self.long_ring = np.full((n_probes, int(icfg[I_LONG])), np.nan)
        self.long_sorted = np.full((n_probes, int(icfg[I_LONG])), np.nan)
        self.ring_pos = np.zeros((n_probes, 4), np.int64)   # short pos, short count, long pos, long count
        self.zhist = np.zeros((2, m))                       # whitened lock-in values one and two samples back
        self.zback = np.zeros(n_probes, np.int64)           # how many of them are valid per probe (0..2)
        self.probe_state = np.zeros((n_probes, 4), np.int64)  # rejected run, low, previously gated, present before
        self.probe_ema = np.ones(n_probes)                    # smoothed signal power / calibrated prediction
        self.weff = np.zeros((int(icfg[I_NMONO]), 4 * m))
        self.reset()

    def reset(self) -> None:
        """Return to the state before the first sample (nothing acquired, noise at the configured baseline)."""
        self.fstate[:] = 0.0
        self.fstate[S_U:S_U + 9] = np.nan
        self.fstate[S_TSTART] = np.nan
        self.fstate[S_SEGT_CACHED] = np.nan
        self.fstate[S_ACQ_RATIO] = 1.0
        self.istate[:] = 0
        self.istate[K_SEG_CACHED] = -1
        self.istate[K_SEG_LAST] = -1
        self.istate[K_LOST] = R_START
        self.counters[:] = 0
        self.x[:] = 0.0
        self.p[:] = 0.0
        b0 = self.cfg[C_BASELINE0]
        self.baseline[:] = b0 if b0 > 0 else 1.0
        self.ratio[:] = self.baseline
        for a in (self.short_ring, self.short_sorted, self.long_ring, self.long_sorted):
            a[:] = np.nan
        self.ring_pos[:] = 0
        self.zhist[:] = 0.0
        self.zback[:] = 0
        self.probe_state[:] = 0
        self.probe_ema[:] = 1.0

    def kernel_args(self) -> tuple:
        """Return the constant and state arrays in run_filter's argument order."""
        return (self.cfg, self.icfg, self.w_table, self.exps, self.comp_probe, self.chan_probe, self.normalizers,
                self.gates, self.fstate, self.istate, self.counters, self.x, self.p, self.ratio, self.baseline,
                self.short_ring, self.short_sorted, self.long_ring, self.long_sorted, self.ring_pos, self.zhist,
                self.zback, self.probe_state, self.probe_ema, self.weff)


# Helpers called per sample are inlined into run_filter (numba's inline="always"): a call that passes arrays updates
# the reference count of each, which was about a fifth of the step (2.77 -> 2.25 us per sample ahead of time, the
# same results bit for bit). _model_rows stays a call: inlined, it would lose the fastmath its sums vectorize with.
# ============================================================================== small dense algebra
@helper(cache=True, nogil=True, inline="always")
def _solve(a, b, n, k):
    """Solve a[:n,:n] X = b[:n,:k] in place (b becomes X) by elimination with partial pivoting.

    Returns (ok, log|det a|). a is destroyed.
    """
    logdet = 0.0
    for col in range(n):
        piv = col
        best = abs(a[col, col])
        for r in range(col + 1, n):
            v = abs(a[r, col])
            if v > best:
                best = v
                piv = r
        if not best > 0.0 or best == math.inf:
            return False, 0.0
        if piv != col:
            for c in range(n):
                tmp = a[col, c]
                a[col, c] = a[piv, c]
                a[piv, c] = tmp
            for c in range(k):
                tmp = b[col, c]
                b[col, c] = b[piv, c]
                b[piv, c] = tmp
        d = a[col, col]
        logdet += math.log(abs(d))
        for r in range(col + 1, n):
            f = a[r, col] / d
            if f != 0.0:
                for c in range(col + 1, n):
                    a[r, c] -= f * a[col, c]
                for c in range(k):
                    b[r, c] -= f * b[col, c]
    for col in range(n - 1, -1, -1):
        d = a[col, col]
        for c in range(k):
            s = b[col, c]
            for j in range(col + 1, n):
                s -= a[col, j] * b[j, c]
            b[col, c] = s / d
    return True, logdet


@helper(cache=True, nogil=True, inline="always")
def _positive_definite(p, n, l):
    """Return True when the symmetric p[:n,:n] is finite and positive definite (Cholesky pivots > 0); l: scratch."""
    for j in range(n):
        s = p[j, j]
        for k in range(j):
            s -= l[j, k] * l[j, k]
        if not (s > 0.0 and s < math.inf):
            return False
        d = math.sqrt(s)
        l[j, j] = d
        for i in range(j + 1, n):
            s = p[i, j]
            for k in range(j):
                s -= l[i, k] * l[j, k]
            l[i, j] = s / d
    return True


# ============================================================================== geometry
@helper(cache=True, nogil=True, inline="always")
def _set_frame(fs, ux, uy, uz, ax, ay, az):
    """Store u and e1 renormalized against rounding (u unit, e1 unit and orthogonal), e2 = u x e1."""
    nu = math.sqrt(ux * ux + uy * uy + uz * uz)
    ux, uy, uz = ux / nu, uy / nu, uz / nu
    dot = ax * ux + ay * uy + az * uz
    ax, ay, az = ax - dot * ux, ay - dot * uy, az - dot * uz
    na = math.sqrt(ax * ax + ay * ay + az * az)
    ax, ay, az = ax / na, ay / na, az / na
    fs[S_U], fs[S_U + 1], fs[S_U + 2] = ux, uy, uz
    fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2] = ax, ay, az
    fs[S_E2], fs[S_E2 + 1], fs[S_E2 + 2] = uy * az - uz * ay, uz * ax - ux * az, ux * ay - uy * ax


@helper(cache=True, nogil=True, inline="always")
def _turn(fs, wx, wy, wz):
    """Rotate u and its basis by the rotation vector (wx, wy, wz) (rad, sensor frame; Rodrigues)."""
    th = math.sqrt(wx * wx + wy * wy + wz * wz)
    if th == 0.0:
        return
    kx, ky, kz = wx / th, wy / th, wz / th
    c, s = math.cos(th), math.sin(th)
    vx, vy, vz = fs[S_U], fs[S_U + 1], fs[S_U + 2]
    kv = (kx * vx + ky * vy + kz * vz) * (1 - c)
    ux = vx * c + (ky * vz - kz * vy) * s + kx * kv
    uy = vy * c + (kz * vx - kx * vz) * s + ky * kv
    uz = vz * c + (kx * vy - ky * vx) * s + kz * kv
    vx, vy, vz = fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2]
    kv = (kx * vx + ky * vy + kz * vz) * (1 - c)
    ax = vx * c + (ky * vz - kz * vy) * s + kx * kv
    ay = vy * c + (kz * vx - kx * vz) * s + ky * kv
    az = vz * c + (kx * vy - ky * vx) * s + kz * kv
    _set_frame(fs, ux, uy, uz, ax, ay, az)


@helper(cache=True, nogil=True, inline="always")
def _move(fs, a1, a2):
    """Move u along the great circle a1*e1 + a2*e2 (rad), parallel-transport (e1, e2); return the angle."""
    th = math.hypot(a1, a2)
    if th == 0.0:
        return 0.0
    ux, uy, uz = fs[S_U], fs[S_U + 1], fs[S_U + 2]
    ax, ay, az = fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2]
    bx, by, bz = fs[S_E2], fs[S_E2 + 1], fs[S_E2 + 2]
    dx, dy, dz = (a1 * ax + a2 * bx) / th, (a1 * ay + a2 * by) / th, (a1 * az + a2 * bz) / th
    c, s = math.cos(th), math.sin(th)
    k1 = a1 / th
    # Parallel transport of a tangent vector e along the step: e - (e.d)((1 - c) d + s u).
    vx, vy, vz = (1 - c) * dx + s * ux, (1 - c) * dy + s * uy, (1 - c) * dz + s * uz
    _set_frame(fs, c * ux + s * dx, c * uy + s * dy, c * uz + s * dz, ax - k1 * vx, ay - k1 * vy, az - k1 * vz)
    return th


# ============================================================================== model
@helper(cache=True, nogil=True, fastmath=True)      # finite inputs only; lets the sums vectorize
def _model_rows(fs, istate, icfg, w_table, exps, weff, seg, segt, rows, pw):
    """Write rows (4, 2C): whitened h(u, |B|) and its ambient gradient d/d(x, y, z) at the current u."""
    nmono = icfg[I_NMONO]
    npow = icfg[I_NPOW]
    ncol = rows.shape[0] * rows.shape[1]
    if seg != istate[K_SEG_CACHED] or not abs(segt - fs[S_SEGT_CACHED]) <= 1e-9:
        tp = 1.0
        for q in range(npow):
            base = q * nmono
            for mm in range(nmono):
                for c in range(ncol):
                    if q == 0:
                        weff[mm, c] = w_table[seg, base + mm, c]
                    else:
                        weff[mm, c] += tp * w_table[seg, base + mm, c]
            tp *= segt
            if q == 0:
                tp = segt
        istate[K_SEG_CACHED] = seg
        fs[S_SEGT_CACHED] = segt
    deg = icfg[I_DEGREE]
    pw[0, 0] = pw[1, 0] = pw[2, 0] = 1.0
    for e in range(1, deg + 1):
        for a in range(3):
            pw[a, e] = pw[a, e - 1] * fs[S_U + a]
    flat = rows.ravel()
    for c in range(ncol):
        flat[c] = 0.0
    for mm in range(nmono):
        v = pw[0, exps[mm, 0]] * pw[1, exps[mm, 1]] * pw[2, exps[mm, 2]]
        wrow = weff[mm]
        for c in range(ncol):
            flat[c] += v * wrow[c]


@helper(cache=True, nogil=True, inline="always")
def _measurement(fs, x, icfg, comp_probe, chan_probe, rows, h, ht):
    """Apply the drift states to the model rows; write h (2C) and H_o^T (no, 2C) (whitened)."""
    n_gain, n_phase = icfg[I_NGAIN], icfg[I_NPHASE]
    n_ch = icfg[I_NCH]
    ax, ay, az = fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2]
    bx, by, bz = fs[S_E2], fs[S_E2 + 1], fs[S_E2 + 2]
    no = 2 + n_gain + n_phase
    for r in range(no):
        for k in range(2 * n_ch):
            ht[r, k] = 0.0
    last_probe = -1
    scale = 1.0
    for c in range(n_ch):
        if n_gain and chan_probe[c] != last_probe:
            last_probe = chan_probe[c]
            scale = math.exp(x[2 + last_probe])
        if n_phase:
            phi = x[2 + n_gain + c]
            ca, sa = scale * math.cos(phi), scale * math.sin(phi)
        else:
            ca, sa = scale, 0.0
        kx, ky = 2 * c, 2 * c + 1
        # value row and gradient rows, rotated and scaled by the drift
        r0x, r0y = rows[0, kx], rows[0, ky]
        hx = ca * r0x - sa * r0y
        hy = sa * r0x + ca * r0y
        h[kx], h[ky] = hx, hy
        # tangent projections of the gradient rows (d/dx, d/dy, d/dz), then the same rotation
        p1x = ax * rows[1, kx] + ay * rows[2, kx] + az * rows[3, kx]
        p1y = ax * rows[1, ky] + ay * rows[2, ky] + az * rows[3, ky]
        p2x = bx * rows[1, kx] + by * rows[2, kx] + bz * rows[3, kx]
        p2y = bx * rows[1, ky] + by * rows[2, ky] + bz * rows[3, ky]
        d1x, d1y = ca * p1x - sa * p1y, sa * p1x + ca * p1y
        d2x, d2y = ca * p2x - sa * p2y, sa * p2x + ca * p2y
        ht[0, kx], ht[0, ky], ht[1, kx], ht[1, ky] = d1x, d1y, d2x, d2y
        if n_gain:
            r = 2 + chan_probe[c]
            ht[r, kx], ht[r, ky] = hx, hy
        if n_phase:
            r = 2 + n_gain + c
            ht[r, kx], ht[r, ky] = -hy, hx


# ============================================================================== noise level
@helper(cache=True, nogil=True, inline="always")
def _ring_push(ring, ordered, pos, cnt, value):
    """Put value into a ring buffer (replacing its oldest entry when full) and its sorted twin; return (pos, cnt)."""
    size = ring.shape[0]
    n_sorted = cnt
    if cnt == size:
        old = ring[pos]
        j = np.searchsorted(ordered[:cnt], old)
        for k in range(j, cnt - 1):
            ordered[k] = ordered[k + 1]
        n_sorted = cnt - 1
    ring[pos] = value
    j = np.searchsorted(ordered[:n_sorted], value)
    for k in range(n_sorted, j, -1):
        ordered[k] = ordered[k - 1]
    ordered[j] = value
    return (pos + 1) % size, min(cnt + 1, size)


@helper(cache=True, nogil=True, inline="always")
def _sorted_median(ordered, cnt):
    """Return the median of the first cnt entries of a sorted array."""
    if cnt % 2:
        return ordered[cnt // 2]
    return 0.5 * (ordered[cnt // 2 - 1] + ordered[cnt // 2])


@helper(cache=True, nogil=True, inline="always")
def _push_noise(p, value, learning, short_ring, short_sorted, long_ring, long_sorted, ring_pos, baseline, ratio, cfg,
                t, fs, probe_state):
    """Add one noise value (variance ratio) of probe p; refresh its short level, baseline and ratio.

    Short level: running median of the last W values (follows a burst within (W + 1) / 2 values). Baseline
    (the stream's normal level): while learning, the median of the latest raw values; afterwards the median
    of short levels taken every stride over the baseline window. R uses the baseline, or the short level
    while it exceeds the baseline by the threshold (a burst: NOISY).
    """
    w = short_ring.shape[1]
    pos, cnt = _ring_push(short_ring[p], short_sorted[p], ring_pos[p, 0], ring_pos[p, 1], value)
    ring_pos[p, 0], ring_pos[p, 1] = pos, cnt
    level = _sorted_median(short_sorted[p], cnt)
    if learning:
        lpos, lcnt = _ring_push(long_ring[p], long_sorted[p], ring_pos[p, 2], ring_pos[p, 3], value)
        ring_pos[p, 2], ring_pos[p, 3] = lpos, lcnt
        baseline[p] = _sorted_median(long_sorted[p], lcnt)
    elif cnt >= (w + 1) // 2 and t >= fs[S_NEXT_PUSH]:
        # A burst (level above the NOISY threshold) is kept out of the baseline; one lasting longer than half
        # the baseline window is a new normal: then its levels go in (clipped at the threshold, so the baseline
        # follows a lasting rise by up to that factor every half window).
        limit = cfg[C_NOISE_THR] * max(baseline[p], 1e-6)
        if level > limit:
            probe_state[p, 3] += 1
        else:
            probe_state[p, 3] = 0
        if level <= limit or 2 * probe_state[p, 3] > long_ring.shape[1]:
            lpos, lcnt = _ring_push(long_ring[p], long_sorted[p], ring_pos[p, 2], ring_pos[p, 3], min(level, limit))
            ring_pos[p, 2], ring_pos[p, 3] = lpos, lcnt
            baseline[p] = _sorted_median(long_sorted[p], lcnt)
    base = max(baseline[p], 1e-6)
    if cnt >= (w + 1) // 2 and level > cfg[C_NOISE_THR] * base:
        ratio[p] = min(level, cfg[C_NOISE_MAX] * base)
    else:
        ratio[p] = base


# ============================================================================== the filter
@helper(cache=True, nogil=True, inline="always")
def _predict(fs, x, p, cfg, n, ng, no, dt):
    """Propagate P and the nominal direction over dt (s): F = I + dt [[0, B], [0, 0]] on (direction, rate)."""
    arw, rrw = cfg[C_ARW], cfg[C_RRW]
    ax, ay, az = fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2]
    bx, by, bz = fs[S_E2], fs[S_E2 + 1], fs[S_E2 + 2]
    r0 = no
    # B rows: beta0 = e2, beta1 = -e1 (d/dt direction error = B w_error). A = F P: direction rows += dt B P[rate, :]
    for c in range(n):
        s0 = bx * p[r0, c] + by * p[r0 + 1, c] + bz * p[r0 + 2, c]
        s1 = -(ax * p[r0, c] + ay * p[r0 + 1, c] + az * p[r0 + 2, c])
        p[0, c] += dt * s0
        p[1, c] += dt * s1
    # A F^T: direction columns += dt A[:, rate] B^T
    for r in range(n):
        s0 = bx * p[r, r0] + by * p[r, r0 + 1] + bz * p[r, r0 + 2]
        s1 = -(ax * p[r, r0] + ay * p[r, r0 + 1] + az * p[r, r0 + 2])
        p[r, 0] += dt * s0
        p[r, 1] += dt * s1
    # Q: per tangent axis the continuous white-noise model of a rate driven by white noise
    # [[dt^3/3, dt^2/2], [dt^2/2, dt]] * rrw (filterpy's Q_continuous_white_noise; exact since B B^T = I),
    # plus angle random walk arw * dt on the direction; drifts are random walks.
    qdd = rrw * dt * dt * dt / 3.0 + arw * dt
    qdw = rrw * dt * dt / 2.0
    qww = rrw * dt
    p[0, 0] += qdd
    p[1, 1] += qdd
    for j in range(3):
        v0 = qdw * (bx if j == 0 else (by if j == 1 else bz))
        v1 = -qdw * (ax if j == 0 else (ay if j == 1 else az))
        p[0, r0 + j] += v0
        p[r0 + j, 0] += v0
        p[1, r0 + j] += v1
        p[r0 + j, 1] += v1
        p[r0 + j, r0 + j] += qww
    for k in range(2, 2 + ng):
        p[k, k] += cfg[C_QGAIN] * dt
    for k in range(2 + ng, no):
        p[k, k] += cfg[C_QPHASE] * dt
    for r in range(n):
        for c in range(r + 1, n):
            v = 0.5 * (p[r, c] + p[c, r])
            p[r, c] = v
            p[c, r] = v
    _turn(fs, x[r0] * dt, x[r0 + 1] * dt, x[r0 + 2] * dt)


@helper(cache=True, nogil=True, inline="always")
def _write_output(fout, iout, i, fs, p, flags, nis, dof, bound2, noise, probes, t, floor2, loglik):
    """Write sample i's output row: u (nan without estimate), sigma (deg), NIS, bound^2, noise factor, flags."""
    if flags & NO_ESTIMATE:
        fout[i, O_UX] = fout[i, O_UY] = fout[i, O_UZ] = math.nan
        fout[i, O_SIGMA] = math.nan
    else:
        fout[i, O_UX], fout[i, O_UY], fout[i, O_UZ] = fs[S_U], fs[S_U + 1], fs[S_U + 2]
        fout[i, O_SIGMA] = math.degrees(math.sqrt(p[0, 0] + p[1, 1] + floor2))
    fout[i, O_NIS] = nis
    fout[i, O_BOUND2] = bound2
    fout[i, O_NOISE] = noise
    fout[i, O_LOGLIK] = loglik
    fout[i, O_T] = t
    iout[i, J_FLAGS] = flags
    iout[i, J_DOF] = dof
    iout[i, J_PROBES] = probes


@helper(cache=True, nogil=True, inline="always")
def _subset_info(mask, jp, bp, yyp, n_probes, no, j, b):
    """Sum per-probe information j (no, no), b (no) and y^T R^-1 y over the probes in bitmask `mask`."""
    yy = 0.0
    for r in range(no):
        b[r] = 0.0
        for c in range(no):
            j[r, c] = 0.0
    for q in range(n_probes):
        if mask & (1 << q):
            yy += yyp[q]
            for r in range(no):
                b[r] += bp[q, r]
                for c in range(no):
                    j[r, c] += jp[q, r, c]
    return yy


@helper(cache=True, nogil=True, inline="always")
def _gain(p, no, n, j, b, yy, work_a, work_b, dx):
    """Write M^T = (I + P_oo J)^-1 P_o into work_b (no, n) and dx = M b; return (ok, log det(I + P_oo J), NIS)."""
    for r in range(no):
        for c in range(no):
            acc = 1.0 if r == c else 0.0
            for k in range(no):
                acc += p[r, k] * j[k, c]
            work_a[r, c] = acc
        for c in range(n):
            work_b[r, c] = p[r, c]
    ok, logdet = _solve(work_a, work_b, no, n)
    if not ok:
        return False, 0.0, math.inf
    for c in range(n):
        s = 0.0
        for r in range(no):
            s += b[r] * work_b[r, c]
        dx[c] = s
    nis = yy
    for r in range(no):
        nis -= b[r] * dx[r]
    return True, logdet, nis


@helper(cache=True, nogil=True, inline="always")
def _gain_weakly_separable(j, no, n_probes, use):
    """Return True when eliminating the used probe's log-gain leaves less than half the direction information
    (the determinant of the Schur complement of J over that of J's direction block)."""
    for q in range(n_probes):
        if use & (1 << q):
            g = 2 + q
    jgg = j[g, g]
    if not jgg > 0.0:
        return True
    d00, d01, d11 = j[0, 0], j[0, 1], j[1, 1]
    s00 = d00 - j[0, g] * j[0, g] / jgg
    s01 = d01 - j[0, g] * j[1, g] / jgg
    s11 = d11 - j[1, g] * j[1, g] / jgg
    det_d = d00 * d11 - d01 * d01
    return not (det_d > 0.0 and s00 * s11 - s01 * s01 > 0.5 * det_d)


@helper(cache=True, nogil=True, inline="always")
def _marginal_nis(p, no, j, b, yy, work_a, work_b):
    """Return y^T (H P H^T + R)^-1 y = yy - b^T (I + P_oo J)^-1 P_oo b (information identity), or inf."""
    for r in range(no):
        s = 0.0
        for c in range(no):
            s += p[r, c] * b[c]
            acc = 1.0 if r == c else 0.0
            for k in range(no):
                acc += p[r, k] * j[k, c]
            work_a[r, c] = acc
        work_b[r, 0] = s
    ok, _ = _solve(work_a, work_b, no, 1)
    if not ok:
        return math.inf
    nis = yy
    for r in range(no):
        nis -= b[r] * work_b[r, 0]
    return nis


@entry("i8(f8[::1], i8[::1], f8[:, :, ::1], i8[:, ::1], i8[::1], i8[::1], f8[::1], f8[::1], f8[::1], i8[::1], "
       "i8[::1], f8[::1], f8[:, ::1], f8[::1], f8[::1], f8[:, ::1], f8[:, ::1], f8[:, ::1], f8[:, ::1], "
       "i8[:, ::1], f8[:, ::1], i8[::1], i8[:, ::1], f8[::1], f8[:, ::1], f8[::1], f8[:, ::1], i8[::1], "
       "f8[::1], i8[::1], i8[::1], f8[::1], f8[::1], f8[:, ::1], i8[:, ::1], i8, i8, i8, b1, f8[::1], f8[::1], "
       "f8[:, ::1], f8[::1])",
       cache=True, nogil=True)
def run_filter(cfg, icfg, w_table, exps, comp_probe, chan_probe, normalizers, gates, fs, istate, counters, x, p,
               ratio, baseline, short_ring, short_sorted, long_ring, long_sorted, ring_pos, zhist, zback, probe_state,
               probe_ema, weff,
               t_in, zw, seg_in, segt_in, flags_in, restart_in, merr_in, sigma_log, fout, iout, start, stop,
               acq_pending, acq_ok, acq_u, acq_e1, acq_cov, init_var):
    """Advance the filter over samples start..stop-1; return the index where a (re)start is needed, or stop.

    When the core stopped at sample i for a (re)start, Python asks the initiator and calls again with start = i,
    acq_pending = 1 and its answer (acq_ok; acq_u (3,) unit direction and acq_e1 (3,) its first tangent axis, sensor
    frame; acq_cov (2, 2) rad^2 in (e1, u x e1); init_var (n,) prior variances of the other states): sample i is
    completed from it first (one compiled entry point: each one costs start-up time to load).

    t_in (N,) s; zw (N, 2C) lock-in values whitened by the calibrated noise (nan: missing); seg_in (N,) magnitude
    segment (-1: no |B|) and segt_in (N,) position in it; flags_in (N,) input flags; restart_in (N,) 1 where the
    source restarted; merr_in (N,) model-error variance ratio; sigma_log (2C,) log calibrated variances (V^2).
    Outputs: fout (N, N_FOUT) floats, iout (N, N_IOUT) ints (see the O_* and J_* names).
    """
    n_probes, n_ch = icfg[I_NPROBES], icfg[I_NCH]
    ng, nph = icfg[I_NGAIN], icfg[I_NPHASE]
    m = 2 * n_ch
    no = 2 + ng + nph
    n = no + 3
    kappa = cfg[C_KAPPA]
    rows = np.zeros((4, m))
    h = np.zeros(m)
    ht = np.zeros((no, m))
    y = np.zeros(m)
    jp = np.zeros((n_probes, no, no))
    bp = np.zeros((n_probes, no))
    yyp = np.zeros(n_probes)
    jpm = np.zeros((n_probes, no, no))
    bpm = np.zeros((n_probes, no))
    yypm = np.zeros(n_probes)
    jcal = np.zeros((n_probes, 3))
    logr = np.zeros(n_probes)
    jsum = np.zeros((no, no))
    bsum = np.zeros(no)
    jsum_m = np.zeros((no, no))
    bsum_m = np.zeros(no)
    work_a = np.zeros((no, no))
    work_b = np.zeros((no, n))
    work_c = np.zeros((no, 1))
    dx = np.zeros(n)
    mj = np.zeros((n, no))
    amat = np.zeros((n, n))
    pending = np.zeros(n_probes)
    pw = np.zeros((3, icfg[I_DEGREE] + 1))
    chol = np.zeros((n, n))
    comps = np.zeros(n_probes, np.int64)
    cnt = np.zeros(n_probes, np.int64)
    for k in range(m):
        comps[comp_probe[k]] += 1

    if acq_pending:
        finish_acquisition(cfg, icfg, fs, istate, counters, x, p, ratio, zback, probe_state, fout, iout, start,
                           acq_ok, acq_u, acq_e1, acq_cov, init_var)
        start += 1
    for i in range(start, stop):
        counters[N_SAMPLES] += 1
        flags = flags_in[i]
        t = t_in[i]
        seg, segt = seg_in[i], segt_in[i]
        if seg >= 0:
            istate[K_SEG_LAST] = seg
            fs[S_SEGT_LAST] = segt
        elif istate[K_SEG_LAST] >= 0:
            seg, segt = istate[K_SEG_LAST], fs[S_SEGT_LAST]          # no |B| now: keep the last one
        b_ok = seg_in[i] >= 0
        # present: probes with some finite value; full: probes with all of them. A probe wholly absent is
        # an expected state (probes_used says so); a probe with only some of its values is bad input.
        present = 0
        full = 0
        n_present = 0
        for q in range(n_probes):
            cnt[q] = 0
        for k in range(m):
            if abs(zw[i, k]) < math.inf:
                cnt[comp_probe[k]] += 1
        for q in range(n_probes):
            if cnt[q] > 0:
                present |= 1 << q
                n_present += 1
                if cnt[q] == comps[q]:
                    full |= 1 << q
        if n_present < n_probes:
            counters[N_PROBE_MISSING] += 1
        if n_present == 0 or full != present:
            flags |= BAD_INPUT
        if flags & BAD_INPUT:
            counters[N_BAD] += 1
        acquired = istate[K_ACQUIRED]
        noise_now = 0.0
        for q in range(n_probes):
            noise_now = max(noise_now, ratio[q])
        noise_std = math.sqrt(noise_now)

        # ---- time
        if not abs(t) < math.inf:
            counters[N_BAD_TIMES] += 1
            if not flags & BAD_INPUT:
                counters[N_BAD] += 1
            flags |= BAD_INPUT
            for q in range(n_probes):
                zback[q] = 0
            if acquired:
                if istate[K_LOST] == R_NONE:
                    istate[K_LOST] = R_BAD_TIME
                counters[N_COASTED] += 1
                _write_output(fout, iout, i, fs, p, flags | COASTING, math.nan, 0, math.nan, noise_std, 0, t, 0.0, 0.0)
            else:
                _write_output(fout, iout, i, fs, p, flags | NO_ESTIMATE, math.nan, 0, math.nan, noise_std, 0, t, 0.0,
                              0.0)
            continue
        if not fs[S_TSTART] == fs[S_TSTART]:
            fs[S_TSTART] = t
            fs[S_NEXT_PUSH] = t
        if restart_in[i] and acquired:
            counters[N_RESTARTS] += 1
            istate[K_LOST] = R_RESTART
        dt = t - fs[S_TLAST] if istate[K_HAVE_T] else 0.0
        if acquired and istate[K_LOST] == R_NONE:
            if dt < 0.0:
                counters[N_BACKWARDS] += 1
                istate[K_LOST] = R_BACKWARDS
            elif dt > cfg[C_MAX_GAP]:
                counters[N_GAPS] += 1
                istate[K_LOST] = R_GAP
            elif dt <= cfg[C_T_DUP]:
                # The same instant again: not new information about the field, never fused twice.
                counters[N_DUPLICATES] += 1
                counters[N_COASTED] += 1
                for q in range(n_probes):
                    zback[q] = 0
                _write_output(fout, iout, i, fs, p, flags | COASTING, math.nan, 0, math.nan, noise_std, 0, t, 0.0,
                              0.0)
                continue
        lost = istate[K_LOST]
        if not acquired or lost != R_NONE:
            if n_present > 0 and b_ok:
                _stage(fout, iout, i, flags, present, t, math.nan, 0, math.nan, 0.0)
                return i
            if acquired:
                if dt > 0.0 and lost != R_BACKWARDS and lost != R_RESTART and lost != R_BAD_TIME:
                    _predict(fs, x, p, cfg, n, ng, no, dt)
                fs[S_TLAST] = t
                istate[K_HAVE_T] = 1
                counters[N_COASTED] += 1
                _write_output(fout, iout, i, fs, p, flags | COASTING, math.nan, 0, math.nan, noise_std, 0, t, 0.0,
                              0.0)
            else:
                _write_output(fout, iout, i, fs, p, flags | NO_ESTIMATE, math.nan, 0, math.nan, noise_std, 0, t, 0.0,
                              0.0)
            continue

        # ---- prediction
        if dt > 0.0:
            _predict(fs, x, p, cfg, n, ng, no, dt)
        fs[S_TLAST] = t
        if n_present == 0 or seg < 0:
            counters[N_COASTED] += 1
            for q in range(n_probes):
                zback[q] = 0
            _write_output(fout, iout, i, fs, p, flags | COASTING, math.nan, 0, math.nan, noise_std, 0, t, 0.0, 0.0)
            continue

        # ---- measurement at the predicted state
        _model_rows(fs, istate, icfg, w_table, exps, weff, seg, segt, rows, pw)
        _measurement(fs, x, icfg, comp_probe, chan_probe, rows, h, ht)
        for k in range(m):
            y[k] = zw[i, k] - h[k] if abs(zw[i, k]) < math.inf else 0.0
        learning = t - fs[S_TSTART] < cfg[C_LEARN_S]
        low_any = False
        active = 0
        for q in range(n_probes):
            pending[q] = math.nan
            if not present & (1 << q):
                zback[q] = 0
                continue
            # noise value: squared second difference of the lock-in values themselves. It cancels whatever is
            # constant or changes linearly over three samples (the field's motion, a drift, a wrong track) and
            # keeps the noise six times (white); it depends on nothing the filter believes.
            if zback[q] == 2 and full & (1 << q):
                d2 = 0.0
                for k in range(m):
                    if comp_probe[k] == q:
                        a2 = zw[i, k] - 2.0 * zhist[0, k] + zhist[1, k]
                        d2 += a2 * a2
                v = d2 * normalizers[q]
                if v < math.inf:
                    pending[q] = v
            # low signal: smoothed observed signal power over the calibrated prediction at this direction
            pobs = 0.0
            ppred = 0.0
            for k in range(m):
                if comp_probe[k] == q and abs(zw[i, k]) < math.inf:
                    pobs += zw[i, k] * zw[i, k]
                    ppred += rows[0, k] * rows[0, k]
            if ppred >= cfg[C_LOW_MIN_POWER] * cnt[q] * ratio[q]:
                r = (pobs - cnt[q] * ratio[q]) / ppred
                probe_ema[q] += cfg[C_LOW_ALPHA] * (r - probe_ema[q])
            if probe_state[q, 1]:
                if probe_ema[q] > 4.0 * cfg[C_LOW_FRAC2]:
                    probe_state[q, 1] = 0
                    if ng:
                        # back from the dark: restart its gain state from the light seen now
                        gq = 2 + q
                        x[gq] = 0.5 * math.log(max(probe_ema[q], 1e-12))
                        for c in range(n):
                            p[gq, c] = 0.0
                            p[c, gq] = 0.0
                        p[gq, gq] = cfg[C_INIT_GAIN]
                        counters[N_PROBE_RESETS] += 1
            elif probe_ema[q] < cfg[C_LOW_FRAC2]:
                probe_state[q, 1] = 1
            if probe_state[q, 1]:
                low_any = True
                counters[N_PROBE_LOW] += 1
            else:
                active |= 1 << q
        if low_any:
            flags |= LOW_SIGNAL
        merr = merr_in[i]
        if merr > cfg[C_MODEL_FLAG]:
            flags |= INTERPOLATED
        if active == 0:
            counters[N_COASTED] += 1
            _shift_history(zw[i], zhist, zback, full, comp_probe, n_probes, m)
            _write_output(fout, iout, i, fs, p, flags | COASTING, math.nan, 0, math.nan, noise_std, 0, t, 0.0, 0.0)
            continue

        # ---- information per probe: effective (kappa, for the update) and marginal (gating, bound)
        for q in range(n_probes):
            weff_q = 1.0 / (ratio[q] * kappa + merr)
            wm_q = 1.0 / (ratio[q] + merr)
            logr[q] = 0.0
            yyp[q] = 0.0
            yypm[q] = 0.0
            jcal[q, 0] = jcal[q, 1] = jcal[q, 2] = 0.0
            for r in range(no):
                bp[q, r] = 0.0
                bpm[q, r] = 0.0
                for c in range(no):
                    jp[q, r, c] = 0.0
            logr[q] = cnt[q] * math.log(ratio[q] * kappa + merr)
            for k in range(m):
                if comp_probe[k] != q or not abs(zw[i, k]) < math.inf:
                    continue
                yk = y[k]
                yyp[q] += weff_q * yk * yk
                for r in range(no):
                    hr = ht[r, k]
                    bp[q, r] += weff_q * hr * yk
                    for c in range(r, no):
                        jp[q, r, c] += weff_q * hr * ht[c, k]
                jcal[q, 0] += ht[0, k] * ht[0, k]
                jcal[q, 1] += ht[0, k] * ht[1, k]
                jcal[q, 2] += ht[1, k] * ht[1, k]
            for r in range(no):
                for c in range(r + 1, no):
                    jp[q, c, r] = jp[q, r, c]
            scale = wm_q / weff_q
            yypm[q] = yyp[q] * scale
            for r in range(no):
                bpm[q, r] = bp[q, r] * scale
                for c in range(no):
                    jpm[q, r, c] = jp[q, r, c] * scale

        # ---- gain of all active probes (effective noise); chi-square gate on the marginal NIS, and per probe
        # when the whole sample fails
        use = active
        dof = 0
        for q in range(n_probes):
            if use & (1 << q):
                dof += cnt[q]
        yy = _subset_info(use, jp, bp, yyp, n_probes, no, jsum, bsum)
        ok, logdet, nis = _gain(p, no, n, jsum, bsum, yy, work_a, work_b, dx)
        same_weights = kappa == 1.0 and merr == 0.0
        if same_weights:
            nis_m = nis
        else:
            yym = _subset_info(use, jpm, bpm, yypm, n_probes, no, jsum_m, bsum_m)
            nis_m = _marginal_nis(p, no, jsum_m, bsum_m, yym, work_a, work_c)
        gate = gates[dof]
        rejected = 0
        if ok and not nis_m <= gate:
            best_nis = math.inf
            best_use = 0
            best_dof = 0
            n_active = 0
            for q in range(n_probes):
                if active & (1 << q):
                    n_active += 1
            if n_active >= 2 and icfg[I_PROBE_REJECTION]:
                for q in range(n_probes):
                    if not active & (1 << q):
                        continue
                    sub = active & ~(1 << q)
                    yys = _subset_info(sub, jpm, bpm, yypm, n_probes, no, jsum_m, bsum_m)
                    nis_s = _marginal_nis(p, no, jsum_m, bsum_m, yys, work_a, work_c)
                    dof_s = 0
                    for qq in range(n_probes):
                        if sub & (1 << qq):
                            dof_s += cnt[qq]
                    if nis_s <= gates[dof_s] and nis_s / dof_s < best_nis:
                        best_nis = nis_s / dof_s
                        best_use = sub
                        best_dof = dof_s
            if best_use:
                rejected = active & ~best_use
                use = best_use
                dof = best_dof
                gate = gates[dof]
                nis_m = best_nis * dof
                counters[N_PROBE_REJ] += 1
                yy = _subset_info(use, jp, bp, yyp, n_probes, no, jsum, bsum)
                ok, logdet, nis = _gain(p, no, n, jsum, bsum, yy, work_a, work_b, dx)
        gated = not nis_m <= gate
        istate[K_GATED_RUN] = istate[K_GATED_RUN] + 1 if gated else 0

        # ---- single-sample bound (marginal noise) and BLIND, at the noise level the sample was weighed with
        j00 = j01 = j11 = 0.0
        for q in range(n_probes):
            if use & (1 << q):
                j00 += jpm[q, 0, 0]
                j01 += jpm[q, 0, 1]
                j11 += jpm[q, 1, 1]
        if ng:
            n_use = 0
            for q in range(n_probes):
                if use & (1 << q):
                    n_use += 1
                    gq = 2 + q
            if n_use == 1:
                # One probe: its gain is not corrected (a consider state) and only its prior variance pins it, so
                # the direction's information is what is left with the gain eliminated against that prior
                # (J_dd - J_dg (J_gg + 1/P_gg)^-1 J_gd): a gain known from a stretch with both probes keeps the
                # direction observable; an unknown one leaves the probe blind near its own axis, as the map says.
                jgg = jpm[gq - 2, gq, gq] + 1.0 / max(p[gq, gq], 1e-300)
                j0g, j1g = jpm[gq - 2, 0, gq], jpm[gq - 2, 1, gq]
                j00 -= j0g * j0g / jgg
                j01 -= j0g * j1g / jgg
                j11 -= j1g * j1g / jgg
        det_j = j00 * j11 - j01 * j01
        bound2 = (j00 + j11) / det_j if det_j > 0 else math.inf
        min_ratio = math.inf
        for q in range(n_probes):
            if use & (1 << q):
                min_ratio = min(min_ratio, ratio[q])
        blind = bound2 > cfg[C_BLIND_ABS2] or bound2 > cfg[C_BLIND_REL2] * min_ratio
        if blind:
            flags |= BLIND
        floor2 = 0.0
        if merr > 0.0:
            c00 = c01 = c11 = 0.0
            for q in range(n_probes):
                if use & (1 << q):
                    c00 += jcal[q, 0]
                    c01 += jcal[q, 1]
                    c11 += jcal[q, 2]
            det_c = c00 * c11 - c01 * c01
            if det_c > 0:
                floor2 = merr * (c00 + c11) / det_c
        if not ok:
            counters[N_FAULTS] += 1
            istate[K_LOST] = R_FAULT
            _stage(fout, iout, i, flags | COV_FAULT | COASTING, present, t, math.nan, dof, bound2, 0.0)
            return i

        # ---- noise level: a value of a rejected probe counts only after its second rejection in a row
        for q in range(n_probes):
            if not present & (1 << q):
                probe_state[q, 2] = 0
                continue
            out = gated or (rejected & (1 << q)) or not (active & (1 << q))
            v = pending[q]
            if icfg[I_ADAPTIVE] and v == v and (learning or not out or probe_state[q, 2]):
                _push_noise(q, v, learning, short_ring, short_sorted, long_ring, long_sorted, ring_pos, baseline,
                            ratio, cfg, t, fs, probe_state)
            probe_state[q, 2] = 1 if out else 0
        if not learning and t >= fs[S_NEXT_PUSH]:
            fs[S_NEXT_PUSH] = t + cfg[C_STRIDE_S]
        _shift_history(zw[i], zhist, zback, full, comp_probe, n_probes, m)
        noisy = False
        noise_now = 0.0
        for q in range(n_probes):
            noise_now = max(noise_now, ratio[q])
            if ratio[q] > baseline[q] * (1.0 + 1e-12) and present & (1 << q):
                noisy = True
        if noisy:
            flags |= NOISY
        noise_std = math.sqrt(noise_now)
        if learning and istate[K_ACQUIRED]:
            # The acquisition covariance assumed the noise believed then: widen it as the level is learned.
            if noise_now > 1.5 * fs[S_ACQ_RATIO]:
                f = math.sqrt(noise_now / fs[S_ACQ_RATIO])
                for c in range(n):
                    p[0, c] *= f
                    p[1, c] *= f
                for r in range(n):
                    p[r, 0] *= f
                    p[r, 1] *= f
                fs[S_ACQ_RATIO] = noise_now

        log_r = 0.0
        for q in range(n_probes):
            if use & (1 << q):
                log_r += logr[q]
        ll = -0.5 * (min(nis, gates[dof]) + dof * LOG_2PI + sigma_log_of(sigma_log, use, comp_probe, zw[i], m)
                     + log_r + logdet)
        nis_avg = fs[S_NISAVG] + cfg[C_NIS_ALPHA] * (min(nis_m, gate) / dof - fs[S_NISAVG])
        fs[S_NISAVG] = nis_avg
        if gated:
            counters[N_GATED] += 1
            counters[N_COASTED] += 1
            flags |= GATED | COASTING
            if istate[K_GATED_RUN] >= icfg[I_LOST_AFTER]:
                counters[N_LOST_GATED] += 1
                istate[K_LOST] = R_GATED
                _stage(fout, iout, i, flags, present, t, nis_m, dof, bound2, ll)
                return i
            _write_output(fout, iout, i, fs, p, flags, nis_m, dof, bound2, noise_std, 0, t, floor2, ll)
            continue
        for q in range(n_probes):
            if rejected & (1 << q):
                probe_state[q, 0] += 1
            else:
                probe_state[q, 0] = 0
        n_used = 0
        for q in range(n_probes):
            if use & (1 << q):
                n_used += 1
        if ng and n_used == 1 and _gain_weakly_separable(jsum, no, n_probes, use):
            # One probe alone cannot tell its own gain from the field's direction well (near its axis a gain
            # change and a move toward the axis look alike, and the linearized filter would believe it can):
            # its gain is then a 'consider' state (Schmidt-Kalman): not corrected, its uncertainty carried into
            # the direction's by the Joseph form. With two probes, their agreement informs each gain.
            for r in range(2, 2 + ng):
                for c in range(no):
                    work_b[c, r] = 0.0
            for c in range(n):
                s_ = 0.0
                for r in range(no):
                    s_ += bsum[r] * work_b[r, c]
                dx[c] = s_
        if blind:
            # Near a blind fold the measurement is quadratic across it and its linearization can pull the
            # state onto the mirror branch: correct only along the well-observed tangent direction (and the
            # angular velocity that moves u along the weak one is not corrected either).
            theta = 0.5 * math.atan2(j01, 0.5 * (j00 - j11))
            vx, vy = -math.sin(theta), math.cos(theta)
            ax, ay, az = fs[S_E1], fs[S_E1 + 1], fs[S_E1 + 2]
            bx, by, bz = fs[S_E2], fs[S_E2 + 1], fs[S_E2 + 2]
            # w = B^T v with B rows (e2, -e1)
            wx, wy, wz = vx * bx - vy * ax, vx * by - vy * ay, vx * bz - vy * az
            for r in range(no):
                sd = work_b[r, 0] * vx + work_b[r, 1] * vy
                work_b[r, 0] -= sd * vx
                work_b[r, 1] -= sd * vy
                sw = work_b[r, no] * wx + work_b[r, no + 1] * wy + work_b[r, no + 2] * wz
                work_b[r, no] -= sw * wx
                work_b[r, no + 1] -= sw * wy
                work_b[r, no + 2] -= sw * wz
            for c in range(n):
                s = 0.0
                for r in range(no):
                    s += bsum[r] * work_b[r, c]
                dx[c] = s
        # ---- Joseph form: P+ = (I - MJ S) P (I - MJ S)^T + M J M^T, MJ = work_b^T J
        for r in range(n):
            for c in range(no):
                s = 0.0
                for k in range(no):
                    s += work_b[k, r] * jsum[k, c]
                mj[r, c] = s
        for r in range(n):
            for c in range(n):
                s = p[r, c]
                for k in range(no):
                    s -= mj[r, k] * p[k, c]
                amat[r, c] = s
        for r in range(n):
            for c in range(r, n):
                s = amat[r, c]
                for k in range(no):
                    s -= amat[r, k] * mj[c, k]
                    s += mj[r, k] * work_b[k, c]
                p[r, c] = s          # upper triangle; mirrored below (the symmetrization)
        for r in range(n):
            for c in range(r + 1, n):
                p[c, r] = p[r, c]
        if not _positive_definite(p, n, chol):
            counters[N_FAULTS] += 1
            istate[K_LOST] = R_FAULT
            _stage(fout, iout, i, flags | COV_FAULT | COASTING, present, t, math.nan, dof, bound2, 0.0)
            return i
        for k in range(n):
            x[k] += dx[k]
        d1, d2 = x[0], x[1]
        x[0] = 0.0
        x[1] = 0.0
        th = _move(fs, d1, d2)
        if th > MIN_CHART_STEP_RAD:
            # Chart change: the error component perpendicular to the step shrinks by sin(th)/th.
            nx, ny = -d2 / th, d1 / th
            kk = 1.0 - math.sin(th) / th
            g00, g01, g11 = 1 - kk * nx * nx, -kk * nx * ny, 1 - kk * ny * ny
            for c in range(n):
                a0, a1 = p[0, c], p[1, c]
                p[0, c] = g00 * a0 + g01 * a1
                p[1, c] = g01 * a0 + g11 * a1
            for r in range(n):
                a0, a1 = p[r, 0], p[r, 1]
                p[r, 0] = g00 * a0 + g01 * a1
                p[r, 1] = g01 * a0 + g11 * a1
        # ---- a probe rejected many times in a row while the others agree: restart its gain from the data
        if ng:
            for q in range(n_probes):
                if probe_state[q, 0] >= icfg[I_PROBE_RESET] and present & (1 << q):
                    num = 0.0
                    den = 0.0
                    for k in range(m):
                        if comp_probe[k] == q and abs(zw[i, k]) < math.inf:
                            num += h[k] * zw[i, k]
                            den += h[k] * h[k]
                    if num > 0.0 and den > 0.0:
                        gq = 2 + q
                        x[gq] += math.log(num / den)
                        for c in range(n):
                            p[gq, c] = 0.0
                            p[c, gq] = 0.0
                        p[gq, gq] = cfg[C_INIT_GAIN]
                        counters[N_PROBE_RESETS] += 1
                    probe_state[q, 0] = 0
        counters[N_FUSED] += 1
        flags |= TRACKING
        if nis_avg > cfg[C_NIS_LIMIT]:
            counters[N_LOST_NIS] += 1
            istate[K_LOST] = R_NIS
        _write_output(fout, iout, i, fs, p, flags, nis_m, dof, bound2, noise_std, use, t, floor2, ll)
    return stop


# ---- columns of a live batch's rows (estimator/tracker.py's ROW_FLOAT_COLUMNS and ROW_INT_COLUMNS name them)
N_ROW_FLOATS, N_ROW_INTS = 15, 3


@entry("i8(f8[:, ::1], i8[:, ::1], f8[::1], f8, f8[::1], f8[:, ::1], f8[::1], f8[:, ::1], i8[:, ::1])", cache=True,
       nogil=True, error_model="numpy")
def record_rows(fout, iout, t, delay, b, per, sigma_b, floats, ints):
    """Write a batch's estimate rows: floats (N, N_ROW_FLOATS) t - delay s, u (3, sensor frame), |B| nT, B (3) nT,
    sigma deg, NIS, |B| per isotope (2) nT, bound deg, sigma_b nT, noise scale; ints (N, N_ROW_INTS) flags, NIS
    dof, probes used; from the core's outputs, the sample times t (N,) s and the corrected |B| (N,), per isotope
    (N, 2) and sigma_b (N,) nT. The values the tracker's TrackRecord holds, bit for bit; return N."""
    n = fout.shape[0]
    for i in range(n):
        ux, uy, uz, bi = fout[i, O_UX], fout[i, O_UY], fout[i, O_UZ], b[i]
        floats[i, 0] = t[i] - delay
        floats[i, 1] = ux
        floats[i, 2] = uy
        floats[i, 3] = uz
        floats[i, 4] = bi
        floats[i, 5] = ux * bi
        floats[i, 6] = uy * bi
        floats[i, 7] = uz * bi
        floats[i, 8] = fout[i, O_SIGMA]
        floats[i, 9] = fout[i, O_NIS]
        floats[i, 10] = per[i, 0]
        floats[i, 11] = per[i, 1]
        bound2 = fout[i, O_BOUND2]
        floats[i, 12] = math.sqrt(bound2) * (180.0 / math.pi) if bound2 >= 0.0 else math.nan   # numpy.degrees
        floats[i, 13] = sigma_b[i]
        floats[i, 14] = fout[i, O_NOISE]
        ints[i, 0] = iout[i, J_FLAGS]
        ints[i, 1] = iout[i, J_DOF]
        ints[i, 2] = iout[i, J_PROBES]
    return n


@helper(cache=True, nogil=True, inline="always")
def _stage(fout, iout, i, flags, present, t, nis, dof, bound2, ll):
    """Keep sample i's partial output while Python asks the initiator (finish_acquisition completes it)."""
    iout[i, J_FLAGS] = flags
    iout[i, J_PROBES] = present
    iout[i, J_DOF] = dof
    fout[i, O_T] = t
    fout[i, O_NIS] = nis
    fout[i, O_BOUND2] = bound2
    fout[i, O_LOGLIK] = ll


@helper(cache=True, nogil=True, inline="always")
def sigma_log_of(sigma_log, use, comp_probe, zw_row, m):
    """Return the sum of log calibrated noise variances (V^2) over the finite components of the probes in `use`."""
    s = 0.0
    for k in range(m):
        if use & (1 << comp_probe[k]) and abs(zw_row[k]) < math.inf:
            s += sigma_log[k]
    return s


@helper(cache=True, nogil=True, inline="always")
def _shift_history(z_row, zhist, zback, present, comp_probe, n_probes, m):
    """Keep this sample's values as the previous ones (per probe in the bitmask `present`; others forget)."""
    for k in range(m):
        if present & (1 << comp_probe[k]):
            zhist[1, k] = zhist[0, k]
            zhist[0, k] = z_row[k]
    for q in range(n_probes):
        if present & (1 << q):
            zback[q] = min(zback[q] + 1, 2)
        else:
            zback[q] = 0


@helper(cache=True, nogil=True)
def finish_acquisition(cfg, icfg, fs, istate, counters, x, p, ratio, zback, probe_state, fout, iout, i, ok, u, e1,
                       cov, init_var):
    """Complete sample i after Python asked the initiator: start the track from (u, cov) if ok, else coast.

    u (3,) unit direction and e1 (3,) its first tangent axis (sensor frame); cov (2, 2) rad^2 in (e1, u x e1);
    init_var (n,) prior variances of the non-direction states.
    """
    n_probes = icfg[I_NPROBES]
    ng, nph = icfg[I_NGAIN], icfg[I_NPHASE]
    no = 2 + ng + nph
    n = no + 3
    flags = iout[i, J_FLAGS]
    t = fout[i, O_T]
    reason = istate[K_LOST]
    noise_now = 0.0
    for q in range(n_probes):
        noise_now = max(noise_now, ratio[q])
    if ok:
        # The initiator's covariance assumes the calibrated noise: widen it by the noise of the moment.
        keep_drifts = istate[K_ACQUIRED] == 1
        for r in range(n):
            for c in range(n):
                if keep_drifts and 2 <= r < no and 2 <= c < no:
                    continue
                p[r, c] = 0.0
            if not (keep_drifts and 2 <= r < no):
                x[r] = 0.0
        for r in range(n):
            if r >= 2 and not (keep_drifts and r < no):
                p[r, r] = init_var[r]
        p[0, 0] = cov[0, 0] * noise_now
        p[0, 1] = p[1, 0] = 0.5 * (cov[0, 1] + cov[1, 0]) * noise_now
        p[1, 1] = cov[1, 1] * noise_now
        _set_frame(fs, u[0], u[1], u[2], e1[0], e1[1], e1[2])
        fs[S_ACQ_RATIO] = noise_now
        fs[S_TLAST] = t
        fs[S_NISAVG] = 1.0
        istate[K_HAVE_T] = 1
        istate[K_ACQUIRED] = 1
        istate[K_LOST] = R_NONE
        istate[K_GATED_RUN] = 0
        istate[K_ACQ_INDEX] = i
        for q in range(n_probes):
            zback[q] = 0
            probe_state[q, 0] = 0
        counters[N_ACQ] += 1
        _write_output(fout, iout, i, fs, p, flags | REACQUIRED, fout[i, O_NIS], iout[i, J_DOF], fout[i, O_BOUND2],
                      math.sqrt(noise_now), iout[i, J_PROBES], t, 0.0, fout[i, O_LOGLIK])
        return
    counters[N_INIT_FAIL] += 1
    if istate[K_ACQUIRED]:
        dt = t - fs[S_TLAST]
        if dt > 0.0 and reason != R_BACKWARDS and reason != R_RESTART and reason != R_BAD_TIME:
            _predict(fs, x, p, cfg, n, ng, no, dt)
        fs[S_TLAST] = t
        istate[K_HAVE_T] = 1
        counters[N_COASTED] += 1
        _write_output(fout, iout, i, fs, p, flags | COASTING, fout[i, O_NIS], iout[i, J_DOF], fout[i, O_BOUND2],
                      math.sqrt(noise_now), 0, t, 0.0, fout[i, O_LOGLIK])
    else:
        _write_output(fout, iout, i, fs, p, flags | NO_ESTIMATE, math.nan, 0, math.nan, math.sqrt(noise_now), 0, t,
                      0.0, 0.0)
