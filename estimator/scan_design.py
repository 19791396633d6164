"""Calibration scan planning: field vectors that reach a target beam-axis accuracy with few rows.

The accuracy of the fitted axes follows from the Fisher information of the calibration's
parameters (estimator/physics_fit.py: beam angles, pump efficiencies, the detuning law, the 1/|B|
leak term; the per-level linear terms a, b, l, o of every channel eliminated by the Schur complement),
evaluated at the nominal sensor: ideal channels g (c - i s) with lock-in noise g / snr on X and Y.
For a stepped scan the rows of one level only share the global parameters with other levels, so
each level's linear terms are projected out level by level.

Planning is greedy optimal design (A-optimality on the axis angles, each beam weighted by how far
its variance is above the target; Fedorov, 'Theory of Optimal Experiments', 1972; Pukelsheim,
'Optimal Design of Experiments', 1993): from a small near-uniform base set per level, the
candidate rows (a fine direction grid at every level) whose addition lowers the weighted trace of
the axis covariance most are added in batches (each gain from the Woodbury identity with the
current design's projections), until every beam reaches the target. Rows are then ordered level by
level (ascending |B|) along a nearest-neighbour tour improved by 2-opt, so the coils step little.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.physics import DETUNING_REFERENCE_NT, LEAK_POWERS, LEAK_REFERENCE_NT, channel_indices
from fieldvane.estimator.sphere import fibonacci_sphere, rotation_matrix, tangent_basis

BASE_ROWS_PER_LEVEL = 100    # near-uniform rows every level starts with (degree-4 corrections need 75)
CANDIDATES_PER_LEVEL = 1000  # direction grid each level chooses from
MAX_ROWS = 50000             # a plan never grows beyond this many rows
BATCH_FRACTION = 0.03        # rows added per greedy round, as a fraction of the rows so far


class PlanError(ValueError):
    """The planning request cannot be met (bad input or an unreachable target)."""


@dataclass
class SensorGuess:
    """What the planner assumes: nominal axes (sensor frame), channel gains (V), noise std (V), handedness."""

    pump_axes: np.ndarray      # (2, 3)
    probe_axes: np.ndarray     # (P, 3)
    gains: np.ndarray          # (C,)
    noise_std: np.ndarray      # (C,)
    handedness: np.ndarray     # (C,)
    channels: tuple[str, ...]


def sensor_guess(pump_axes, probe_axes, snr: float, gains=None, noise_std=None, handedness=None) -> SensorGuess:
    """Return a SensorGuess from nominal axes, a signal-to-noise ratio (gain over noise std) or explicit values."""
    pumps = np.asarray(pump_axes, float)
    probes = np.asarray(probe_axes, float)
    pumps = pumps / np.linalg.norm(pumps, axis=1, keepdims=True)
    probes = probes / np.linalg.norm(probes, axis=1, keepdims=True)
    channels = ("1a", "1b") if probes.shape[0] == 1 else ("1a", "1b", "2a", "2b")
    c = len(channels)
    g = np.ones(c) if gains is None else np.broadcast_to(np.asarray(gains, float), (c,)).copy()
    if noise_std is None:
        if not (np.isfinite(snr) and snr > 0):
            raise PlanError(f"the signal-to-noise ratio must be a positive number, got {snr}")
        noise = g / snr
    else:
        noise = np.broadcast_to(np.asarray(noise_std, float), (c,)).copy()
    hand = np.ones(c) if handedness is None else np.asarray(handedness, float)
    return SensorGuess(pumps, probes, g, noise, hand, channels)


class _Geometry:
    """Per-direction terms of the nominal model: linear columns (C, M, 4) and derivatives (C, M, n_global)."""

    def __init__(self, guess: SensorGuess, u: np.ndarray, n_levels: int, level_b: np.ndarray,
                 leak_terms: int):
        self.guess = guess
        pj, qi = channel_indices(guess.channels)
        P, Q = guess.pump_axes, guess.probe_axes
        pu, qu = u @ P.T, u @ Q.T
        c_n, m = len(guess.channels), u.shape[0]
        n_beams = 2 + Q.shape[0]
        self.n_beams = n_beams
        self.n_levels = n_levels
        # Global parameters: beams (2 each), efficiencies (8: complex 2 x 2), detuning law (8), the s'
        # leak law (2 real per channel and term). The detuning's shape factors have no information
        # at the nominal sensor (no detuning yet) and are left out.
        self.leak_terms = int(leak_terms)
        self.n_global = 2 * n_beams + 8 + 8 + 2 * c_n * self.leak_terms
        self.detune_col = 2 * n_beams + 8
        self.linear = np.empty((c_n, m, 4), complex)
        self.glob = np.zeros((c_n, m, self.n_global), complex)
        self.detune = np.zeros((c_n, m, 4), complex)     # d/dt[j, m] per unit of the law's factor (j: channel's pump)
        self.s_leak = np.zeros((c_n, m), complex)
        frames = [tangent_basis(b) for b in list(P) + list(Q)]
        for ch in range(c_n):
            j, i = pj[ch], qi[ch]
            p, px, q = P[j], P[1 - j], Q[i]
            c = p @ q - pu[:, j] * qu[:, i]
            s = u @ np.cross(p, q)
            cx = px @ q - pu[:, 1 - j] * qu[:, i]
            g, h = guess.gains[ch], guess.handedness[ch]
            own = g * (c - 1j * h * s)
            self.linear[ch] = np.column_stack([c, s, cx, np.ones(m)])
            col = 0
            for beam, (e1, e2) in enumerate(frames):
                for e in (e1, e2):
                    ue = u @ e
                    if beam == j:
                        dc, ds = e @ q - ue * qu[:, i], u @ np.cross(e, q)
                        self.glob[ch, :, col] = g * (dc - 1j * h * ds)
                    elif beam == 2 + i:
                        dc, ds = p @ e - pu[:, j] * ue, u @ np.cross(p, e)
                        self.glob[ch, :, col] = g * (dc - 1j * h * ds)
                    col += 1
            for mm in range(2):
                self.glob[ch, :, col + 4 * j + 2 * mm] = pu[:, mm] ** 2 * own
                self.glob[ch, :, col + 4 * j + 2 * mm + 1] = 1j * pu[:, mm] ** 2 * own
            col += 8 + 8
            self.s_leak[ch] = u @ np.cross(px, q)
            self.glob_leak_col = col
            for mm in range(2):
                self.detune[ch, :, 2 * j + mm] = -1j * h * pu[:, mm] * own
        self.level_b = np.asarray(level_b, float)

    def rows(self, idx: np.ndarray, level: int) -> tuple[np.ndarray, np.ndarray]:
        """Return (linear columns (C, n, 4), derivative columns (C, n, n_theta)) of directions idx at a level."""
        c_n = self.linear.shape[0]
        d = np.zeros((c_n, idx.size, self.n_global), complex)
        d[:, :, :self.n_global] = self.glob[:, idx]
        factor = (self.level_b[level] / DETUNING_REFERENCE_NT) ** 2
        for jm in range(4):
            d[:, :, self.detune_col + 2 * jm] = self.detune[:, idx, jm]
            d[:, :, self.detune_col + 2 * jm + 1] = factor * self.detune[:, idx, jm]
        for t in range(self.leak_terms):
            scale = (LEAK_REFERENCE_NT / self.level_b[level]) ** LEAK_POWERS[t]
            for ch in range(c_n):
                col = self.glob_leak_col + 2 * (t * c_n + ch)
                d[ch, :, col] = scale * self.s_leak[ch, idx]
                d[ch, :, col + 1] = 1j * scale * self.s_leak[ch, idx]
        return self.linear[:, idx], d


def _level_information(geo: _Geometry, idx: np.ndarray, level: int):
    """Return (information (n_theta, n_theta), projector pieces per channel) of rows idx at one level."""
    a, d = geo.rows(idx, level)
    w = 1.0 / geo.guess.noise_std ** 2
    info = np.zeros((d.shape[2], d.shape[2]))
    pieces = []
    for ch in range(a.shape[0]):
        q, r = np.linalg.qr(a[ch])
        h = np.linalg.solve(r, q.conj().T @ d[ch])            # (4, n_theta): d's least-squares fit on a
        proj = d[ch] - a[ch] @ h
        info += w[ch] * np.real(proj.conj().T @ proj)
        pieces.append(h)
    return info, pieces


def design_information(geo: _Geometry, design: list[np.ndarray]) -> tuple[np.ndarray, list]:
    """Return (total information of the global and detuning parameters, per-level projector pieces)."""
    total = np.zeros((geo.n_global, geo.n_global))
    pieces = []
    for level, idx in enumerate(design):
        info, pc = _level_information(geo, idx, level)
        total += info
        pieces.append(pc)
    return total, pieces


def axis_std_deg(cov: np.ndarray, n_beams: int) -> np.ndarray:
    """Return each beam's sqrt(trace) of its 2x2 angle covariance (degrees) from a covariance (rad^2)."""
    return np.degrees(np.sqrt(np.maximum([cov[2 * b, 2 * b] + cov[2 * b + 1, 2 * b + 1] for b in range(n_beams)], 0)))


def _covariance(info: np.ndarray) -> np.ndarray:
    scale = np.sqrt(np.maximum(np.diag(info), 1e-300))
    return np.linalg.pinv(info / np.outer(scale, scale), rcond=1e-12, hermitian=True) / np.outer(scale, scale)


@dataclass
class ScanPlan:
    """A planned scan: field vectors in order (N, 3) nT, level index per row, expected axis std per beam (deg)."""

    field_nT: np.ndarray
    level: np.ndarray
    levels_nT: np.ndarray
    expected_std_deg: np.ndarray      # (2 + P,) pumps a, b, probes
    uniform_std_deg: np.ndarray       # the same for a near-uniform scan with as many rows per level
    target_deg: float
    reached: bool
    path_nT: float                    # sum of the coil steps |B_i+1 - B_i|
    max_step_nT: float

    @property
    def n_rows(self) -> int:
        """Return the number of planned rows."""
        return int(self.field_nT.shape[0])


def expected_axis_std(guess: SensorGuess, u_per_level: list[np.ndarray], levels_nT) -> np.ndarray:
    """Return the expected 1-sigma axis angle per beam (deg) of a scan: directions (n_k, 3) at each level (nT)."""
    levels = np.asarray(levels_nT, float)
    u_all = np.vstack(u_per_level)
    geo = _Geometry(guess, u_all, len(levels), levels, _leak_term(levels))
    design, start = [], 0
    for u in u_per_level:
        design.append(np.arange(start, start + u.shape[0]))
        start += u.shape[0]
    info, _ = design_information(geo, design)
    return axis_std_deg(_covariance(info), geo.n_beams)


def _leak_term(levels: np.ndarray) -> int:
    """Return how many terms of the s' leak law the fit may use for these levels (as fit_physics decides)."""
    k = levels.size
    return sum(1 for t in range(1, len(LEAK_POWERS) + 1) if k >= t + 1 and levels.max() >= 2.0 ** t * levels.min())


def uniform_directions(n: int, level: int) -> np.ndarray:
    """Return n near-uniform directions (n, 3), turned by a level-dependent rotation so levels differ."""
    rot = rotation_matrix(np.array([1.0, 1.0, 1.0]), level * np.pi * (3.0 - np.sqrt(5.0)))
    return fibonacci_sphere(n) @ rot.T


def plan_scan(guess: SensorGuess, levels_nT, target_deg: float, base_rows: int = BASE_ROWS_PER_LEVEL,
              candidates: int = CANDIDATES_PER_LEVEL, max_rows: int = MAX_ROWS) -> ScanPlan:
    """Return a ScanPlan whose every beam axis reaches target_deg (1 sigma, deg) with as few rows as the greedy design finds."""
    levels = np.sort(np.asarray(levels_nT, float))
    if levels.size == 0 or np.any(~np.isfinite(levels)) or np.any(levels <= 0):
        raise PlanError("magnitudes must be positive numbers of nT")
    if levels.size > 1 and np.any(np.diff(np.log(levels)) < 0.05):
        raise PlanError("magnitudes must differ by at least 5 % (they are separate calibration levels)")
    if not (np.isfinite(target_deg) and target_deg > 0):
        raise PlanError(f"the target axis accuracy must be a positive number of degrees, got {target_deg}")
    k_n = levels.size
    cand = fibonacci_sphere(candidates)
    base = [uniform_directions(base_rows, k) for k in range(k_n)]
    u_all = np.vstack([cand] + base)
    geo = _Geometry(guess, u_all, k_n, levels, _leak_term(levels))
    cand_idx = np.arange(candidates)
    design = [candidates + k * base_rows + np.arange(base_rows) for k in range(k_n)]
    target_var = np.radians(target_deg) ** 2
    reached = False
    while True:
        info, pieces = design_information(geo, design)
        cov = _covariance(info)
        std = axis_std_deg(cov, geo.n_beams)
        if np.all(std <= target_deg):
            reached = True
            break
        total = sum(d.size for d in design)
        if total >= max_rows:
            break
        # Weight each beam's angles by how far its variance is above the target.
        weights = np.zeros(cov.shape[0])
        for b in range(geo.n_beams):
            var = cov[2 * b, 2 * b] + cov[2 * b + 1, 2 * b + 1]
            weights[2 * b:2 * b + 2] = max(var / target_var, 1e-3)
        gains = np.array([_candidate_gains(geo, cand_idx, k, pieces[k], cov, weights) for k in range(k_n)])
        batch = max(k_n, int(BATCH_FRACTION * total))
        batch = min(batch, max_rows - total)
        best = np.argsort(gains, axis=None)[::-1][:batch]
        lev, which = np.unravel_index(best, gains.shape)
        for k in range(k_n):
            add = cand_idx[which[lev == k]]
            if add.size:
                design[k] = np.concatenate([design[k], add])
    uniform = expected_axis_std(guess, [uniform_directions(d.size, k) for k, d in enumerate(design)], levels)
    order_u, order_level = [], []
    last = None
    for k, d in enumerate(design):
        pts = u_all[d]
        idx = tour(pts, None if last is None else last)
        order_u.append(pts[idx] * levels[k])
        order_level.append(np.full(idx.size, k))
        last = pts[idx[-1]]
    field = np.vstack(order_u)
    steps = np.linalg.norm(np.diff(field, axis=0), axis=1)
    return ScanPlan(field, np.concatenate(order_level), levels, std, uniform, float(target_deg), reached,
                    float(steps.sum()), float(steps.max() if steps.size else 0.0))


def _candidate_gains(geo: _Geometry, idx: np.ndarray, level: int, pieces: list, cov: np.ndarray,
                     weights: np.ndarray) -> np.ndarray:
    """Return, per candidate direction at a level, the fall of sum(weights * axis variances) if it were added."""
    a, d = geo.rows(idx, level)
    w = 1.0 / geo.guess.noise_std
    rows = []
    for ch in range(a.shape[0]):
        proj = (d[ch] - a[ch] @ pieces[ch]) * w[ch]              # (M, n_theta) complex
        rows.extend([proj.real, proj.imag])
    g = np.stack(rows, axis=1)                                    # (M, 2C, n_theta)
    x = g @ cov                                                   # (M, 2C, n_theta)
    s = np.eye(g.shape[1])[None] + x @ np.swapaxes(g, 1, 2)       # (M, 2C, 2C)
    y = x * weights[None, None, :]
    # Woodbury: the new covariance is cov - X^T S^-1 X; its weighted trace falls by tr(S^-1 X W X^T).
    return np.einsum("mij,mji->m", np.linalg.inv(s), y @ np.swapaxes(x, 1, 2))


def tour(points: np.ndarray, start: np.ndarray | None = None, passes: int = 3) -> np.ndarray:
    """Return an order of points (n, 3) unit vectors: nearest-neighbour tour from the point nearest `start`, then 2-opt."""
    n = points.shape[0]
    if n <= 2:
        return np.arange(n)
    dist = np.sqrt(np.maximum(2.0 - 2.0 * points @ points.T, 0.0))     # chord lengths
    first = 0 if start is None else int(np.argmax(points @ start))
    order = [first]
    free = np.ones(n, bool)
    free[first] = False
    for _ in range(n - 1):
        d = np.where(free, dist[order[-1]], np.inf)
        nxt = int(np.argmin(d))
        order.append(nxt)
        free[nxt] = False
    order = np.array(order)
    # 2-opt on the open path: reverse a segment when that shortens it (vectorized over the segment end).
    for _ in range(passes):
        improved = False
        for i in range(1, n - 1):
            a, b = order[i - 1], order[i]
            c, d_next = order[i + 1:], np.append(order[i + 2:], -1)
            old = dist[a, b] + np.where(d_next >= 0, dist[c, np.maximum(d_next, 0)], 0.0)
            new = dist[a, c] + np.where(d_next >= 0, dist[b, np.maximum(d_next, 0)], 0.0)
            gain = old - new
            j = int(np.argmax(gain))
            if gain[j] > 1e-12:
                order[i:i + 2 + j] = order[i:i + 2 + j][::-1]
                improved = True
        if not improved:
            break
    return order
