"""Calibration scan planning: field vectors that reach a target beam-axis accuracy with few rows.

Model. The accuracy of the fitted axes follows from the Fisher information of the calibration's
parameters (estimator/physics_fit.py: beam angles, pump efficiencies, the detuning law, the s'
leak law; the per-level linear terms a, b, l, o of every channel eliminated level by level by the
Schur complement), evaluated at the nominal sensor: ideal channels g (c - i s) with lock-in noise
g / snr on X and Y. Two kinds of terms the fit does not estimate are carried as unknowns too, so
that a plan does not lean on directions where they would pull the axes: the next terms of the
pump efficiency ((p_a.u)^4, (p_b.u)^4, (p_a.u)^2 (p_b.u)^2 times the channel, per pump) and the
other pump's leak shaped by its efficiency (c' (p_a.u)^2, c' (p_b.u)^2 per channel and level). On
the simulated cell (pump efficiency +-5 %, lock-in noise 1/10000 of the gain) a plan without them
had axis errors 2.3 times the fit's std at the directions it concentrates on; with them, within it.

Criterion. Every beam's axis variance (the sum of its two angle variances, rad^2) must reach the
target: the planner minimizes the worst beam's variance (a min-max, not the sum of the beams'
variances), with the groups of parameters it bounds kept general (DesignPool.groups).

Algorithm. (1) The continuous optimal design over a candidate grid (the same directions at every
level) on top of fixed near-uniform base rows per level (which the calibration's smooth
corrections and its sphere coverage need): multiplicative weight updates with the groups' prices
moved by mirror ascent, each step certifying a lower bound (continuous_design); the free rows are
rescaled until the worst beam meets the target. (2) Its weights rounded to whole rows (largest
remainder). (3) Candidates added greedily where rounding fell short (weighted by the continuous
design's prices of the beams), (4) rows removed while every beam still meets the target; both by
the exact rank-2C update of the covariance (Woodbury on the full parameters, the level's linear
terms included). (5) Rows ordered level by level, ascending |B|,
along a nearest-neighbour tour of the distinct directions improved by 2-opt; repeated directions
are consecutive (the coils dwell).

design_bound gives, for a uniform scan, the rows a continuous optimal design needs for the same
worst axis and a certified lower bound for any design over the candidates.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.physics import DETUNING_REFERENCE_NT, LEAK_POWERS, LEAK_REFERENCE_NT, channel_indices
from fieldvane.estimator.sphere import fibonacci_sphere, rotation_matrix, tangent_basis

BASE_ROWS_PER_LEVEL = 100    # near-uniform rows every level starts with (degree-4 corrections need 75)
CANDIDATES_PER_LEVEL = 600   # direction grid each level chooses from (about 8 deg apart)
MAX_ROWS = 50000             # a plan never grows beyond this many rows
N_LINEAR = 6                 # per channel and level: c, s, c', 1 and the leak's efficiency shape c' (p_m.u)^2
N_SHAPE = 12                 # the efficiency's next terms: 3 shapes x 2 pumps x (real, imaginary)
DESIGN_ITERATIONS = 600      # most multiplicative steps of the continuous design
DESIGN_TOLERANCE = 0.005     # the continuous design stops within this fraction of its certified bound
WEIGHT_POWER = 1.0           # exponent of the multiplicative update (1/2 is the proven-monotone one; 1 is faster here)
ACTIVE_FRACTION = 1e-7       # candidate weights below this fraction of the free rows are left out
PRICE_STEP = 0.3             # mirror-ascent step of the groups' prices (the dual weights of the min-max)


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
    """Per-direction terms of the nominal model: linear columns (C, M, N_LINEAR) and derivatives (C, M, n_global)."""

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
        # leak law (2 real per channel and term), the efficiency's next terms (N_SHAPE). The detuning's
        # shape factors have no information at the nominal sensor (no detuning yet) and are left out.
        self.leak_terms = int(leak_terms)
        self.detune_col = 2 * n_beams + 8
        self.glob_leak_col = self.detune_col + 8
        self.shape_col = self.glob_leak_col + 2 * c_n * self.leak_terms
        self.n_global = self.shape_col + N_SHAPE
        self.linear = np.empty((c_n, m, N_LINEAR))
        self.glob = np.zeros((c_n, m, self.n_global), complex)
        self.detune = np.zeros((c_n, m, 4), complex)     # d/dt[j, m] per unit of the law's factor (j: channel's pump)
        self.s_leak = np.zeros((c_n, m))
        frames = [tangent_basis(b) for b in list(P) + list(Q)]
        shapes = (pu[:, 0] ** 4, pu[:, 1] ** 4, pu[:, 0] ** 2 * pu[:, 1] ** 2)
        for ch in range(c_n):
            j, i = pj[ch], qi[ch]
            p, px, q = P[j], P[1 - j], Q[i]
            c = p @ q - pu[:, j] * qu[:, i]
            s = u @ np.cross(p, q)
            cx = px @ q - pu[:, 1 - j] * qu[:, i]
            g, h = guess.gains[ch], guess.handedness[ch]
            own = g * (c - 1j * h * s)
            self.linear[ch] = np.column_stack([c, s, cx, np.ones(m), cx * pu[:, 0] ** 2, cx * pu[:, 1] ** 2])
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
            for t, shape in enumerate(shapes):
                self.glob[ch, :, self.shape_col + 6 * j + 2 * t] = shape * own
                self.glob[ch, :, self.shape_col + 6 * j + 2 * t + 1] = 1j * shape * own
            self.s_leak[ch] = u @ np.cross(px, q)
            for mm in range(2):
                self.detune[ch, :, 2 * j + mm] = -1j * h * pu[:, mm] * own
        self.level_b = np.asarray(level_b, float)

    def rows(self, idx: np.ndarray, level: int) -> tuple[np.ndarray, np.ndarray]:
        """Return (linear columns (C, n, N_LINEAR), derivatives (C, n, n_global)) of directions idx at a level."""
        c_n = self.linear.shape[0]
        d = self.glob[:, idx].copy()
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


def _covariance(info: np.ndarray) -> np.ndarray:
    scale = np.sqrt(np.maximum(np.diag(info), 1e-300))
    return np.linalg.pinv(info / np.outer(scale, scale), rcond=1e-12, hermitian=True) / np.outer(scale, scale)


def _leak_term(levels: np.ndarray) -> int:
    """Return how many terms of the s' leak law the fit may use for these levels (as fit_physics decides)."""
    k = levels.size
    return sum(1 for t in range(1, len(LEAK_POWERS) + 1) if k >= t + 1 and levels.max() >= 2.0 ** t * levels.min())


def uniform_directions(n: int, level: int) -> np.ndarray:
    """Return n near-uniform directions (n, 3), turned by a level-dependent rotation so levels differ."""
    rot = rotation_matrix(np.array([1.0, 1.0, 1.0]), level * np.pi * (3.0 - np.sqrt(5.0)))
    return fibonacci_sphere(n) @ rot.T


# ----- rows with weights: the information of a continuous or counted design -------------------------------

class DesignPool:
    """Whitened model terms of every row a plan may use, per level: the fixed base rows first, then the candidates.

    a[k] (2C, M, N_LINEAR): the level's linear columns, real, once for the real and once for the
    imaginary part of every channel; d[k] (2C, M, n): the real parts, then the imaginary parts, of
    the derivatives by the global parameters. All divided by the channel's noise std. groups: the
    parameter indices whose summed variance a plan bounds (each beam's two angles, pumps a, b, then
    probes). Built from the nominal sensor, the levels (nT, ascending), the base directions per level
    (list of (n_k, 3)) and the candidate directions (M, 3), the same at every level.
    """

    def __init__(self, guess: SensorGuess, levels: np.ndarray, base: list[np.ndarray], cand: np.ndarray):
        u_all = np.vstack([cand] + list(base))
        geo = _Geometry(guess, u_all, levels.size, levels, _leak_term(levels))
        self.n_beams, self.n = geo.n_beams, geo.n_global
        self.groups = [np.array([2 * b, 2 * b + 1]) for b in range(geo.n_beams)]
        self.u = [np.vstack([b, cand]) for b in base]
        self.n_fixed = np.array([b.shape[0] for b in base])
        self.n_cand = cand.shape[0]
        w = 1.0 / guess.noise_std
        self.a, self.d = [], []
        start = cand.shape[0]
        for k, b in enumerate(base):
            idx = np.concatenate([start + np.arange(b.shape[0]), np.arange(cand.shape[0])]).astype(int)
            start += b.shape[0]
            a, d = geo.rows(idx, k)
            a = a * w[:, None, None]
            d = d * w[:, None, None]
            self.a.append(np.ascontiguousarray(np.concatenate([a, a])))
            self.d.append(np.ascontiguousarray(np.concatenate([d.real, d.imag])))

    def fixed_weights(self) -> list[np.ndarray]:
        """Return per level the weights of the base rows alone (1 each, 0 on the candidates)."""
        return [np.concatenate([np.ones(f), np.zeros(self.n_cand)]) for f in self.n_fixed]

    def information(self, weights: list[np.ndarray]):
        """Return (information (n, n) of the global parameters, per level (projection, inverse gram) or None)."""
        info = np.zeros((self.n, self.n))
        proj = []
        for k, wk in enumerate(weights):
            use = wk > 0
            if not np.any(use):
                proj.append(None)
                continue
            a, d = self.a[k], self.d[k]
            if use.sum() < 0.9 * use.size:
                a, d, wk = a[:, use], d[:, use], wk[use]
            aw = a * wk[None, :, None]
            gram_a = np.swapaxes(aw, 1, 2) @ a                                # (2C, L, L)
            gram_a += np.eye(a.shape[2]) * (1e-12 * np.trace(gram_a, axis1=1, axis2=2))[:, None, None]
            b = np.swapaxes(aw, 1, 2) @ d                                     # (2C, L, n)
            h = np.linalg.solve(gram_a, b)
            info += np.tensordot(d * wk[None, :, None], d, axes=([0, 1], [0, 1]))
            info -= np.tensordot(b, h, axes=([0, 1], [0, 1]))
            proj.append((h, np.linalg.inv(gram_a)))
        return 0.5 * (info + info.T), proj

    def projected(self, k: int, proj, rows=None, cols=None) -> np.ndarray:
        """Return the rows' derivatives with the level's linear terms projected out, (M, 2C, n) real (times cols).

        A level without rows (proj None) projects nothing.
        """
        sl = slice(None) if rows is None else rows
        d = self.d[k][:, sl]
        if cols is not None:
            d = d @ cols
        if proj is None:
            return np.swapaxes(d, 0, 1)
        h = proj[0] if cols is None else proj[0] @ cols
        return np.swapaxes(d - self.a[k][:, sl] @ h, 0, 1)

    def leverage(self, k: int, proj, rows=None) -> np.ndarray:
        """Return each row's leverage on its level's linear terms, (M, 2C): a^T (sum w a a^T)^-1 a."""
        sl = slice(None) if rows is None else rows
        a = self.a[k][:, sl]
        return np.einsum("cmi,cij,cmj->mc", a, proj[1], a)

    def group_variances(self, cov: np.ndarray) -> np.ndarray:
        """Return each group's summed variance from a covariance of the global parameters (rad^2 for beam angles)."""
        d = np.diag(cov)
        return np.array([d[g].sum() for g in self.groups])

    def variances(self, weights: list[np.ndarray]) -> np.ndarray:
        """Return the groups' variances of a design (weights per level, rows)."""
        return self.group_variances(_covariance(self.information(weights)[0]))


def expected_axis_std(guess: SensorGuess, u_per_level: list[np.ndarray], levels_nT) -> np.ndarray:
    """Return the expected 1-sigma axis angle per beam (deg) of a scan: directions (n_k, 3) at each level (nT).

    The 1-sigma angle of a beam is the square root of the trace of its 2x2 angle covariance, as the
    calibration reports it (covariance_std_deg).
    """
    levels = np.asarray(levels_nT, float)
    pool = DesignPool(guess, levels, [np.asarray(u, float) for u in u_per_level], np.zeros((0, 3)))
    v = pool.variances(pool.fixed_weights())
    return np.degrees(np.sqrt(v[:pool.n_beams]))


# ----- the continuous optimal design --------------------------------------------------------------------

def _active(x: np.ndarray, cut: float) -> np.ndarray:
    """Return weights x with those below cut set to zero, unless that would leave the level nearly empty."""
    keep = x > cut
    return np.where(keep, x, 0.0) if keep.sum() >= 2 * N_LINEAR else x


@dataclass
class ContinuousDesign:
    """Weights of a continuous design (rows per level and pool row) and what it reaches.

    The criterion is the worst group's variance over its target. Meeting the targets, n_free is the
    free rows the design uses (its worst ratio is 1 within the tolerance) and n_free_lower what any
    design over the candidates with the same fixed rows needs at least. Without meeting them, the
    free rows stay as given and worst_lower bounds the worst ratio of any design of that many rows.
    """

    weights: list            # per level (M_k,): the rows of every pool row (fixed ones included)
    n_free: float
    n_free_lower: float      # nan unless the targets were met
    ratio: np.ndarray        # (groups,) variance / target
    worst_lower: float       # certified lower bound of the worst ratio at this n_free
    price: np.ndarray        # (groups,) the dual weights: which groups bind
    iterations: int


def continuous_design(pool: DesignPool, targets: np.ndarray, n_free: float = 1.0, meet: bool = False,
                      iterations: int = DESIGN_ITERATIONS, tolerance: float = DESIGN_TOLERANCE) -> ContinuousDesign:
    """Return the ContinuousDesign minimizing the worst ratio of a group's variance to its target over the candidates.

    Multiplicative weight updates for the weighted A-criterion sum_g w_g v_g / T_g (Silvey, Titterington
    and Torsney, Commun. Stat. A 7, 1978; Yu, Ann. Stat. 38, 2010; both from memory) with the prices w_g moved by mirror
    ascent toward the binding groups (min over designs of the max over groups equals the max over
    prices of the min over designs). Each step certifies a bound: for a design of information M,
    N = M^-1 W M^-1 and any design A of the same candidates, tr(W A^-1) >= tr(W M^-1)^2 / tr(N A)
    (Cauchy-Schwarz on W^1/2 A^-1/2 and A^1/2 M^-1 W^1/2), tr(N A) is at most the fixed rows' part
    plus the free rows times the largest sensitivity f^T N f over the candidates, and the worst
    ratio is at least tr(W A^-1). With meet=True the free rows are rescaled every step so the worst
    ratio meets 1, and the bound becomes one on the free rows needed. The sensitivities use the
    current design's projection of each level's linear terms: any projection gives an upper bound
    of a level's information (its Schur complement is the least residual Gram), so the bound holds.
    """
    targets = np.asarray(targets, float)
    n_g = len(pool.groups)
    index = np.concatenate(pool.groups)
    owner = np.concatenate([np.full(g.size, i) for i, g in enumerate(pool.groups)])
    fixed = pool.fixed_weights()
    n_fixed = float(pool.n_fixed.sum())
    m_total = pool.n_cand * len(fixed)
    free = [np.full(pool.n_cand, n_free / m_total) for _ in fixed]
    price = np.full(n_g, 1.0 / n_g)
    best_lower, best_n_lower = 0.0, 0.0
    r = np.full(n_g, np.inf)
    it = 0
    for it in range(1, iterations + 1):
        # Meeting targets, vanishing weights are left out (the design is then the one without them, and the
        # bound is its): a plan's free rows are many, and the information costs less.
        weights = [np.concatenate([f[:nf], _active(x, ACTIVE_FRACTION * n_free) if meet else x])
                   for f, x, nf in zip(fixed, free, pool.n_fixed)]
        evaluated = (weights, n_free)
        info, proj = pool.information(weights)
        cov = _covariance(info)
        r = pool.group_variances(cov) / targets
        price = price * np.exp(PRICE_STEP * (r / r.max() - 1.0))
        price /= price.sum()
        cols = cov[:, index] * np.sqrt(price[owner] / targets[owner])[None, :]
        fixed_part, free_part, sens = 0.0, 0.0, []
        for k, nf in enumerate(pool.n_fixed):
            s = np.sum(pool.projected(k, proj[k], cols=cols) ** 2, axis=(1, 2))
            fixed_part += float(np.sum(s[:nf]))
            free_part += float(weights[k][nf:] @ s[nf:])
            sens.append(s[nf:])
        phi = float(price @ r)
        d_max = max(float(s.max()) for s in sens)
        best_lower = max(best_lower, phi ** 2 / (fixed_part + n_free * d_max))
        if meet:
            best_n_lower = max(best_n_lower, (phi ** 2 - fixed_part) / d_max)
            if n_free <= (1.0 + tolerance) * best_n_lower and abs(r.max() - 1.0) <= tolerance / 4:
                break
        elif r.max() <= (1.0 + tolerance) * best_lower:
            break
        mean = free_part / n_free
        free = [x * (s / mean) ** WEIGHT_POWER for x, s in zip(free, sens)]
        total = sum(float(x.sum()) for x in free)
        if meet:
            # The worst ratio falls about as 1 / rows: rescale the free rows toward it meeting 1.
            n_free = max((n_free + n_fixed) * float(r.max()) - n_fixed, 1e-3 * (n_fixed + 1.0))
        free = [x * (n_free / total) for x in free]
    weights, n_free = evaluated
    return ContinuousDesign(weights, float(n_free), float(best_n_lower) if meet else float("nan"), r,
                            float(best_lower), price, it)


@dataclass
class DesignBound:
    """Rows a continuous optimal design needs to match a uniform scan, as a fraction of the uniform rows."""

    uniform_rows: int
    uniform_std_deg: np.ndarray  # (n_beams,) the uniform scan's expected axis std
    ratio: float                 # rows of the continuous design meeting the same targets / uniform_rows
    ratio_lower: float           # certified: no design over the candidates (same base rows) needs fewer
    rows_per_level: np.ndarray   # the continuous design's rows per level (base rows included)


def design_bound(guess: SensorGuess, levels_nT, uniform_rows_per_level: int, candidates: int = CANDIDATES_PER_LEVEL,
                 base_rows: int = 0, iterations: int = DESIGN_ITERATIONS,
                 tolerance: float = DESIGN_TOLERANCE) -> DesignBound:
    """Return the DesignBound: rows a continuous design needs for a uniform scan's worst axis (fraction of its rows).

    The uniform scan has uniform_rows_per_level near-uniform directions at every level; its worst
    beam's variance is every beam's target (the planner's criterion). The design chooses among
    `candidates` directions at every level, on top of base_rows near-uniform rows per level.
    """
    levels = np.sort(np.asarray(levels_nT, float))
    uniform = expected_axis_std(guess, [uniform_directions(uniform_rows_per_level, k) for k in range(levels.size)],
                                levels)
    pool = DesignPool(guess, levels, [uniform_directions(base_rows, k) for k in range(levels.size)],
                      fibonacci_sphere(candidates))
    targets = np.full(len(pool.groups), np.radians(uniform.max()) ** 2)
    n_uniform = uniform_rows_per_level * levels.size
    n_base = base_rows * levels.size
    if base_rows == 0:
        # Scale-free: a design measure of one row; its worst ratio is the rows it needs over the uniform's.
        res = continuous_design(pool, targets * n_uniform, 1.0, False, iterations, tolerance)
        ratio, lower = float(res.ratio.max()), res.worst_lower
        per_level = np.array([w.sum() for w in res.weights]) * ratio * n_uniform
    else:
        res = continuous_design(pool, targets, 0.5 * n_uniform, True, iterations, tolerance)
        ratio = (res.n_free * float(res.ratio.max()) + n_base) / n_uniform
        lower = (res.n_free_lower + n_base) / n_uniform
        per_level = np.array([w.sum() for w in res.weights])
    return DesignBound(n_uniform, uniform, float(ratio), float(lower), per_level)


# ----- counted designs: rounding, completion, trimming -----------------------------------------------------

def _round_counts(pool: DesignPool, design: ContinuousDesign) -> list[np.ndarray]:
    """Return whole rows per pool row: base rows once, candidates by largest remainder of their weights."""
    free = np.concatenate([w[nf:] for w, nf in zip(design.weights, pool.n_fixed)])
    total = int(round(free.sum()))
    counts = np.floor(free).astype(int)
    short = total - int(counts.sum())
    if short > 0:
        counts[np.argsort(free - counts)[::-1][:short]] += 1
    out, start = [], 0
    for nf in pool.n_fixed:
        out.append(np.concatenate([np.ones(nf, int), counts[start:start + pool.n_cand]]))
        start += pool.n_cand
    return out


def _row_changes(pool: DesignPool, counts: list[np.ndarray], cov: np.ndarray, proj, sign: float) -> list:
    """Return per level (rows, (M, groups) change of each group's variance if one copy of the row were added
    (sign +1: every candidate) or removed (sign -1: the candidates in the design)).

    Exact rank-2C update of the full parameters' covariance (Woodbury), the level's linear terms
    included: the global block changes by -sign C G^T S^-1 G C with G the projected rows and
    S = I + sign (G C G^T + leverage on the linear terms).
    """
    index = np.concatenate(pool.groups)
    owner = np.concatenate([np.full(g.size, i) for i, g in enumerate(pool.groups)])
    out = []
    for k, c in enumerate(counts):
        rows = np.arange(pool.n_fixed[k], c.size)
        if sign < 0:
            rows = rows[c[rows] > 0]
        if proj[k] is None or rows.size == 0:
            out.append((rows, np.zeros((rows.size, len(pool.groups)))))
            continue
        g = pool.projected(k, proj[k], rows)                        # (M, 2C, n)
        lev = pool.leverage(k, proj[k], rows)                       # (M, 2C)
        gc = g @ cov                                                # (M, 2C, n)
        s = sign * (gc @ np.swapaxes(g, 1, 2) + lev[:, :, None] * np.eye(lev.shape[1])[None])
        s += np.eye(lev.shape[1])[None]
        y = gc[:, :, index]
        with np.errstate(all="ignore"):
            z = np.linalg.solve(s, y)
        per_param = -sign * np.einsum("mij,mij->mj", y, z)
        change = np.zeros((rows.size, len(pool.groups)))
        np.add.at(change.T, owner, per_param.T)
        if sign < 0:
            # A row its level cannot lose (a linear term would be left undetermined) never leaves.
            change[~np.all(np.isfinite(change), axis=1) | (np.max(lev, axis=1) >= 1.0 - 1e-9)] = np.inf
        out.append((rows, change))
    return out


def _add_rows(pool: DesignPool, counts: list[np.ndarray], targets: np.ndarray, batch: int,
              price: np.ndarray | None = None) -> list[np.ndarray]:
    """Return counts with the `batch` candidate rows added that lower the groups' variances most, weighted by
    price (the continuous design's dual weights) times how near each group is to its target."""
    info, proj = pool.information(counts)
    cov = _covariance(info)
    r = pool.group_variances(cov) / targets
    weight = (r / r.max()) ** 8 * (1.0 if price is None else price)
    levels, rows, gains = [], [], []
    for k, (rk, change) in enumerate(_row_changes(pool, counts, cov, proj, +1.0)):
        levels.append(np.full(rk.size, k))
        rows.append(rk)
        gains.append(-(change / targets) @ weight)
    levels, rows, gains = np.concatenate(levels), np.concatenate(rows), np.concatenate(gains)
    out = [c.copy() for c in counts]
    for i in np.argsort(gains)[::-1][:batch]:
        out[levels[i]][rows[i]] += 1
    return out


def _complete(pool: DesignPool, counts: list[np.ndarray], targets: np.ndarray, max_rows: int,
              price: np.ndarray | None = None) -> list[np.ndarray]:
    """Return counts with candidate rows added (greedily, in batches) until every group meets its target or max_rows."""
    while True:
        r = pool.variances(counts) / targets
        total = int(sum(c.sum() for c in counts))
        if np.all(r <= 1.0) or total >= max_rows:
            return counts
        # Rows still needed if the worst ratio fell as 1 / rows; add about half of them at a time.
        batch = int(min(max(1, np.ceil(0.5 * total * (float(r.max()) - 1.0))), max_rows - total))
        counts = _add_rows(pool, counts, targets, batch, price)


def _trim(pool: DesignPool, counts: list[np.ndarray], targets: np.ndarray, rounds: int = 60) -> list[np.ndarray]:
    """Return counts with candidate rows removed while every group stays within its target (base rows stay)."""
    cap = None
    for _ in range(rounds):
        info, proj = pool.information(counts)
        cov = _covariance(info)
        v = pool.group_variances(cov)
        slack = targets - v
        if np.any(slack < 0):
            return counts
        levels, rows, changes = [], [], []
        for k, (rk, change) in enumerate(_row_changes(pool, counts, cov, proj, -1.0)):
            levels.append(np.full(rk.size, k))
            rows.append(rk)
            changes.append(change)
        levels, rows, changes = np.concatenate(levels), np.concatenate(rows), np.concatenate(changes)
        score = np.max((v + changes) / targets, axis=1)
        used = np.zeros_like(v)
        chosen = []
        for i in np.argsort(score):
            if score[i] > 1.0 or (cap is not None and len(chosen) >= cap):
                break
            if np.all(used + changes[i] <= slack):
                used += changes[i]
                chosen.append(i)
        if not chosen:
            return counts
        trial = [c.copy() for c in counts]
        for i in chosen:
            trial[levels[i]][rows[i]] -= 1
        if np.all(pool.variances(trial) <= targets):
            counts, cap = trial, None
        elif len(chosen) == 1:
            return counts
        else:
            cap = max(1, len(chosen) // 2)      # removals add up to more than one at a time: fewer at once
    return counts


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
    bound_rows: float = float("nan")        # rows of the continuous optimal design with the same base rows
    bound_rows_lower: float = float("nan")  # certified: no design over the candidates needs fewer rows

    @property
    def n_rows(self) -> int:
        """Return the number of planned rows."""
        return int(self.field_nT.shape[0])


def plan_scan(guess: SensorGuess, levels_nT, target_deg: float, base_rows: int = BASE_ROWS_PER_LEVEL,
              candidates: int = CANDIDATES_PER_LEVEL, max_rows: int = MAX_ROWS) -> ScanPlan:
    """Return a ScanPlan whose every beam axis reaches target_deg (1 sigma, deg) with few rows.

    base_rows near-uniform directions per level stay in the plan; the continuous optimal design on
    top of them is found for the targets (continuous_design), rounded to whole rows, completed
    greedily where rounding fell short and trimmed of rows the targets do not need.
    """
    levels = np.sort(np.asarray(levels_nT, float))
    if levels.size == 0 or np.any(~np.isfinite(levels)) or np.any(levels <= 0):
        raise PlanError("magnitudes must be positive numbers of nT")
    if levels.size > 1 and np.any(np.diff(np.log(levels)) < 0.05):
        raise PlanError("magnitudes must differ by at least 5 % (they are separate calibration levels)")
    if not (np.isfinite(target_deg) and target_deg > 0):
        raise PlanError(f"the target axis accuracy must be a positive number of degrees, got {target_deg}")
    if base_rows < N_LINEAR:
        raise PlanError(f"every level needs at least {N_LINEAR} base rows, got {base_rows}")
    k_n = levels.size
    pool = DesignPool(guess, levels, [uniform_directions(base_rows, k) for k in range(k_n)],
                      fibonacci_sphere(candidates))
    targets = np.full(len(pool.groups), np.radians(target_deg) ** 2)
    n_base = base_rows * k_n
    r_base = pool.variances(pool.fixed_weights()) / targets
    bound_rows = bound_lower = float(n_base)
    counts = [w.astype(int) for w in pool.fixed_weights()]
    if np.any(r_base > 1.0):
        cont = continuous_design(pool, targets, max(n_base * (float(r_base.max()) - 1.0), 1.0), meet=True)
        bound_rows = n_base + cont.n_free * float(cont.ratio.max())
        bound_lower = n_base + cont.n_free_lower
        if cont.n_free + n_base > max_rows:
            cont.weights = [np.concatenate([w[:nf], w[nf:] * (max_rows - n_base) / cont.n_free])
                            for w, nf in zip(cont.weights, pool.n_fixed)]
        counts = _complete(pool, _round_counts(pool, cont), targets, max_rows, cont.price)
        counts = _trim(pool, counts, targets)
    v = pool.variances(counts)
    std = np.degrees(np.sqrt(v[:pool.n_beams]))
    reached = bool(np.all(v <= targets * (1.0 + 1e-9)))
    per_level = [int(c.sum()) for c in counts]
    uniform = expected_axis_std(guess, [uniform_directions(n, k) for k, n in enumerate(per_level)], levels)
    order_u, order_level = [], []
    last = None
    for k, c in enumerate(counts):
        rows = np.flatnonzero(c)
        pts = pool.u[k][rows]
        idx = tour(pts, last)
        order_u.append(np.repeat(pts[idx], c[rows][idx], axis=0) * levels[k])
        order_level.append(np.full(per_level[k], k))
        last = pts[idx[-1]]
    field = np.vstack(order_u)
    steps = np.linalg.norm(np.diff(field, axis=0), axis=1)
    return ScanPlan(field, np.concatenate(order_level), levels, std, uniform, float(target_deg), reached,
                    float(steps.sum()), float(steps.max() if steps.size else 0.0), float(bound_rows),
                    float(bound_lower))


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
