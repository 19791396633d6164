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
    bound_rows: float = float("nan")        # rows a continuous optimal design with the same base rows needs
    bound_rows_lower: float = float("nan")  # certified: no design over the candidates needs fewer

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


# ----- rows with weights: the information of a (continuous or counted) design -----------------------------

class _Pool:
    """Whitened model terms of every row a plan may use, per level: the fixed base rows first, then the candidates.

    a[k] (2C, M, 4): the level's linear columns (c, s, c', 1), real, once for the real and once for
    the imaginary part of every channel; d[k] (2C, M, n): the real parts, then the imaginary parts,
    of the derivatives by the global parameters. All divided by the channel's noise std.
    """

    def __init__(self, guess: SensorGuess, levels: np.ndarray, base: list[np.ndarray], cand: np.ndarray):
        u_all = np.vstack([cand] + base)
        geo = _Geometry(guess, u_all, levels.size, levels, _leak_term(levels))
        self.n_beams, self.n = geo.n_beams, geo.n_global
        self.u = [np.vstack([b, cand]) for b in base]
        self.n_fixed = np.array([b.shape[0] for b in base])
        self.n_cand = cand.shape[0]
        w = 1.0 / guess.noise_std
        self.a, self.d = [], []
        start = cand.shape[0]
        for k, b in enumerate(base):
            idx = np.concatenate([start + np.arange(b.shape[0]), np.arange(cand.shape[0])])
            start += b.shape[0]
            a, d = geo.rows(idx, k)
            a = a.real * w[:, None, None]
            d = d * w[:, None, None]
            self.a.append(np.ascontiguousarray(np.concatenate([a, a])))
            self.d.append(np.ascontiguousarray(np.concatenate([d.real, d.imag])))

    def fixed_weights(self) -> list[np.ndarray]:
        """Return per level the weights of the base rows alone (1 each, 0 on the candidates)."""
        return [np.concatenate([np.ones(f), np.zeros(self.n_cand)]) for f in self.n_fixed]

    def information(self, weights: list[np.ndarray]):
        """Return (information (n, n) of the global parameters, per level (projection H (2C, 4, n), inverse gram) or None)."""
        info = np.zeros((self.n, self.n))
        proj = []
        for k, wk in enumerate(weights):
            use = wk > 0
            if not np.any(use):
                proj.append(None)
                continue
            a, d = self.a[k], self.d[k]
            if not np.all(use):
                a, d, wk = a[:, use], d[:, use], wk[use]
            aw = a * wk[None, :, None]
            gram_a = np.swapaxes(aw, 1, 2) @ a                                # (2C, 4, 4)
            gram_a += np.eye(4) * (1e-12 * np.trace(gram_a, axis1=1, axis2=2))[:, None, None]
            b = np.swapaxes(aw, 1, 2) @ d                                     # (2C, 4, n)
            h = np.linalg.solve(gram_a, b)
            info += np.tensordot(d * wk[None, :, None], d, axes=([0, 1], [0, 1]))
            info -= np.tensordot(b, h, axes=([0, 1], [0, 1]))
            proj.append((h, np.linalg.inv(gram_a)))
        return 0.5 * (info + info.T), proj

    def projected(self, k: int, proj, rows=None, cols=None) -> np.ndarray:
        """Return the rows' derivatives with the level's linear terms projected out, (M, 2C, n) real (times cols)."""
        h = proj[0]
        sl = slice(None) if rows is None else rows
        d = self.d[k][:, sl]
        if cols is not None:
            d, h = d @ cols, h @ cols
        return np.swapaxes(d - self.a[k][:, sl] @ h, 0, 1)

    def leverage(self, k: int, proj, rows=None) -> np.ndarray:
        """Return each row's leverage on its level's linear terms per channel and part, (M, 2C): a^T (sum w a a^T)^-1 a."""
        sl = slice(None) if rows is None else rows
        a = self.a[k][:, sl]
        return np.einsum("cmi,cij,cmj->mc", a, proj[1], a)


def _beam_variances(cov: np.ndarray, n_beams: int) -> np.ndarray:
    """Return each beam's trace of its 2x2 angle covariance (rad^2)."""
    d = np.diag(cov)[:2 * n_beams]
    return d[0::2] + d[1::2]


# ----- the continuous optimal design --------------------------------------------------------------------

DESIGN_ITERATIONS = 600     # most multiplicative steps of the continuous design
DESIGN_TOLERANCE = 0.01     # stop when the certified bound is within this fraction of the achieved design
POWER = 1.0
PRICE_STEP = 0.3            # step of the beams' price (mirror ascent on the dual's beam weights)


@dataclass
class ContinuousDesign:
    """Weights of a continuous design over the candidates (rows per level and direction) and what it reaches.

    The criterion is the worst beam's axis variance (rad^2, sum of its two angle variances). With a
    target it is met with the fewest free rows: n_free is what the design uses (its worst variance is
    the target within the tolerance), n_free_lower what any design over the candidates needs at least.
    Without a target the free rows are one (a design measure) and worst_lower bounds the criterion.
    """

    weights: list            # per level (M_k,), the rows of every pool row (fixed ones included)
    n_free: float
    n_free_lower: float      # nan without a target
    axis_var: np.ndarray     # (n_beams,) rad^2
    worst_lower: float       # certified lower bound of the worst variance at this n_free
    beam_price: np.ndarray   # (n_beams,) the dual weights: which beams bind
    iterations: int


def continuous_design(pool: _Pool, n_free: float = 1.0, target_var: float | None = None,
                      iterations: int = DESIGN_ITERATIONS, tolerance: float = DESIGN_TOLERANCE) -> ContinuousDesign:
    """Return the ContinuousDesign minimizing the worst beam's axis variance (rad^2) over the pool's candidates.

    Multiplicative weight updates for the weighted A-criterion sum_b w_b v_b (Silvey, Titterington and
    Torsney, Commun. Stat. A 7, 1978; power 1/2 as in Yu, Ann. Stat. 38, 2010) with the beam weights
    w_b moved by mirror ascent toward the binding beams (min-max = max-min over the weights). Each
    step certifies a bound: for a design of information M, N = M^-1 W M^-1 and any other design A of
    the same candidates, tr(W A^-1) >= tr(W M^-1)^2 / tr(N A) (Cauchy-Schwarz on W^1/2 A^-1/2 and
    A^1/2 M^-1 W^1/2), and tr(N A) is at most the fixed rows' part plus the free rows times the
    largest sensitivity f^T N f over the candidates; the worst beam's variance is at least tr(W A^-1).
    With a target the free rows are rescaled every step so the worst variance meets it.
    """
    nb = pool.n_beams
    fixed = pool.fixed_weights()
    n_fixed = float(pool.n_fixed.sum())
    m_total = pool.n_cand * len(fixed)
    free = [np.full(pool.n_cand, n_free / m_total) for _ in fixed]
    price = np.full(nb, 1.0 / nb)
    best_lower, best_n_lower = 0.0, 0.0
    v = np.full(nb, np.inf)
    it = 0
    for it in range(1, iterations + 1):
        weights = [np.concatenate([f[:nf], x]) for f, x, nf in zip(fixed, free, pool.n_fixed)]
        info, proj = pool.information(weights)
        cov = _covariance(info)
        v = _beam_variances(cov, nb)
        price = price * np.exp(PRICE_STEP * (v / v.max() - 1.0))
        price /= price.sum()
        cols = cov[:, :2 * nb] * np.sqrt(np.repeat(price, 2))[None, :]
        fixed_part, mean_part, sens = 0.0, 0.0, []
        for k in range(len(fixed)):
            s = np.sum(pool.projected(k, proj[k], cols=cols) ** 2, axis=(1, 2))
            fixed_part += float(np.sum(s[:pool.n_fixed[k]]))
            sens.append(s[pool.n_fixed[k]:])
            mean_part += float(np.sum(weights[k][pool.n_fixed[k]:] * s[pool.n_fixed[k]:]))
        phi = float(price @ v)
        d_max = max(float(s.max()) for s in sens)
        best_lower = max(best_lower, phi ** 2 / (fixed_part + n_free * d_max))
        if target_var is not None:
            best_n_lower = max(best_n_lower, (phi ** 2 / target_var - fixed_part) / d_max)
            gap = n_free / max(best_n_lower, 1e-300) - 1.0
            converged = gap <= tolerance and abs(v.max() / target_var - 1.0) <= tolerance / 4
        else:
            converged = v.max() / best_lower - 1.0 <= tolerance
        if converged:
            break
        mean = mean_part / n_free
        free = [x * (s / mean) ** POWER for x, s in zip(free, sens)]
        total = sum(float(x.sum()) for x in free)
        if target_var is not None:
            # The worst variance falls about as 1 / rows: rescale the free rows toward the target.
            n_free = max((n_free + n_fixed) * float(v.max()) / target_var - n_fixed, 1e-3 * (n_fixed + 1.0))
        free = [x * (n_free / total) for x in free]
    weights = [np.concatenate([f[:nf], x]) for f, x, nf in zip(fixed, free, pool.n_fixed)]
    return ContinuousDesign(weights, float(n_free), float(best_n_lower) if target_var is not None else float("nan"),
                            v, float(best_lower), price, it)


@dataclass
class DesignBound:
    """Rows a continuous optimal design needs for a uniform scan's worst axis, as a fraction of the uniform rows."""

    uniform_rows: int
    uniform_worst_deg: float
    ratio: float             # rows of the continuous design reaching the same worst axis / uniform_rows
    ratio_lower: float       # certified: no design over the candidates (with the same base rows) needs fewer
    rows_per_level: np.ndarray   # the continuous design's rows per level


def design_bound(guess: SensorGuess, levels_nT, uniform_rows_per_level: int, candidates: int = CANDIDATES_PER_LEVEL,
                 base_rows: int = 0, iterations: int = DESIGN_ITERATIONS,
                 tolerance: float = DESIGN_TOLERANCE) -> DesignBound:
    """Return the DesignBound: rows a continuous design needs for the worst axis of a uniform scan (fraction of its rows).

    The uniform scan has uniform_rows_per_level near-uniform directions at every level; the design
    chooses among `candidates` directions at every level, on top of base_rows near-uniform rows per level.
    """
    levels = np.sort(np.asarray(levels_nT, float))
    uniform = [uniform_directions(uniform_rows_per_level, k) for k in range(levels.size)]
    worst = float(np.max(expected_axis_std(guess, uniform, levels)))
    base = [uniform_directions(base_rows, k) for k in range(levels.size)]
    pool = _Pool(guess, levels, base, fibonacci_sphere(candidates))
    n_uniform = uniform_rows_per_level * levels.size
    if base_rows == 0:
        res = continuous_design(pool, 1.0, None, iterations, tolerance)
        target = np.radians(worst) ** 2
        ratio = float(res.axis_var.max()) / target / n_uniform
        lower = res.worst_lower / target / n_uniform
        per_level = np.array([w.sum() for w in res.weights]) * ratio * n_uniform
    else:
        res = continuous_design(pool, 0.5 * n_uniform, np.radians(worst) ** 2, iterations, tolerance)
        total = res.n_free + base_rows * levels.size
        ratio = total * float(res.axis_var.max()) / np.radians(worst) ** 2 / n_uniform
        lower = (res.n_free_lower + base_rows * levels.size) / n_uniform
        per_level = np.array([w.sum() for w in res.weights])
    return DesignBound(n_uniform, worst, float(ratio), float(lower), per_level)


# ----- counted designs: rounding, completion, trimming -----------------------------------------------------

def _round_counts(pool: _Pool, design: ContinuousDesign) -> list[np.ndarray]:
    """Return integer rows per pool row: base rows once, candidates by largest remainder of their weights."""
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


def _row_changes(pool: _Pool, counts: list[np.ndarray], cov: np.ndarray, proj, sign: float):
    """Return per level (rows, (M, n_beams) change of each beam's variance (rad^2) if one copy of the row were added
    (sign +1: every candidate) or removed (sign -1: the candidates in the design)), exactly by Woodbury on the full
    parameters (the level's linear terms included)."""
    nb = pool.n_beams
    out = []
    for k, c in enumerate(counts):
        if proj[k] is None:
            out.append((np.zeros(0, int), np.zeros((0, nb))))
            continue
        rows = np.arange(pool.n_fixed[k], c.size)
        if sign < 0:
            rows = rows[c[rows] > 0]
        g = pool.projected(k, proj[k], rows)                       # (M, 2C, n)
        lev = pool.leverage(k, proj[k], rows)                      # (M, 2C)
        gc = g @ cov                                               # (M, 2C, n)
        s = gc @ np.swapaxes(g, 1, 2)                              # (M, 2C, 2C)
        diag = lev
        s = sign * s + sign * diag[:, :, None] * np.eye(s.shape[1])[None]
        s += np.eye(s.shape[1])[None]
        y = gc[:, :, :2 * nb]                                      # (M, 2C, 2 nb)
        with np.errstate(all="ignore"):
            z = np.linalg.solve(s, y)
        change = -sign * np.einsum("mij,mij->mj", y, z)            # (M, 2 nb)
        change = change[:, 0::2] + change[:, 1::2]
        if sign < 0:
            # A row the level cannot lose (its removal leaves a linear term undetermined) never leaves.
            change[~np.all(np.isfinite(change), axis=1) | (np.max(diag, axis=1) >= 1.0 - 1e-9)] = np.inf
        out.append((rows, change))
    return out


def _complete(pool: _Pool, counts: list[np.ndarray], target_var: float, max_rows: int) -> list[np.ndarray]:
    """Return counts with candidate rows added (greedy, batches) until every beam reaches target_var or max_rows."""
    while True:
        info, proj = pool.information(counts)
        cov = _covariance(info)
        v = _beam_variances(cov, pool.n_beams)
        total = int(sum(c.sum() for c in counts))
        if np.all(v <= target_var) or total >= max_rows:
            return counts
        # Rows still needed if the worst variance fell as 1 / rows; add about half of them at a time.
        need = total * (float(v.max()) / target_var - 1.0)
        batch = int(min(max(1, np.ceil(0.5 * need)), max_rows - total))
        weight = np.where(v > target_var, (v / target_var) ** 8, 0.0)
        gains = []
        for k, (rows, change) in enumerate(_row_changes(pool, counts, cov, proj, +1.0)):
            gains.append((k, rows, -(change / target_var) @ weight))
        lev = np.concatenate([np.full(r.size, k) for k, r, _ in gains])
        row = np.concatenate([r for _, r, _ in gains])
        gain = np.concatenate([g for _, _, g in gains])
        for i in np.argsort(gain)[::-1][:batch]:
            counts[lev[i]][row[i]] += 1


def _trim(pool: _Pool, counts: list[np.ndarray], target_var: float, rounds: int = 60) -> list[np.ndarray]:
    """Return counts with candidate rows removed while every beam stays within target_var (base rows stay)."""
    batch_cap = None
    for _ in range(rounds):
        info, proj = pool.information(counts)
        cov = _covariance(info)
        v = _beam_variances(cov, pool.n_beams)
        slack = target_var - v
        if np.any(slack < 0):
            return counts
        entries = []
        for k, (rows, change) in enumerate(_row_changes(pool, counts, cov, proj, -1.0)):
            for r, ch in zip(rows, change):
                entries.append((float(np.max((v + ch) / target_var)), k, int(r), ch))
        entries = [e for e in entries if e[0] <= 1.0]
        if not entries:
            return counts
        entries.sort(key=lambda e: e[0])
        used = np.zeros_like(v)
        chosen = []
        for score, k, r, ch in entries:
            if np.all(used + ch <= slack):
                used += ch
                chosen.append((k, r))
                if batch_cap is not None and len(chosen) >= batch_cap:
                    break
        if not chosen:
            return counts
        trial = [c.copy() for c in counts]
        for k, r in chosen:
            trial[k][r] -= 1
        info_t, _ = pool.information(trial)
        if np.all(_beam_variances(_covariance(info_t), pool.n_beams) <= target_var):
            counts, batch_cap = trial, None
        elif len(chosen) == 1:
            return counts
        else:
            batch_cap = max(1, len(chosen) // 2)     # the changes add up to more than one at a time: fewer
    return counts


def plan_scan(guess: SensorGuess, levels_nT, target_deg: float, base_rows: int = BASE_ROWS_PER_LEVEL,
              candidates: int = CANDIDATES_PER_LEVEL, max_rows: int = MAX_ROWS) -> ScanPlan:
    """Return a ScanPlan whose every beam axis reaches target_deg (1 sigma, deg) with few rows.

    Base rows (base_rows near-uniform directions per level) stay; the continuous optimal design on
    top of them is found for the target (continuous_design), rounded to whole rows, completed
    greedily where rounding fell short and trimmed of rows the target does not need.
    """
    levels = np.sort(np.asarray(levels_nT, float))
    if levels.size == 0 or np.any(~np.isfinite(levels)) or np.any(levels <= 0):
        raise PlanError("magnitudes must be positive numbers of nT")
    if levels.size > 1 and np.any(np.diff(np.log(levels)) < 0.05):
        raise PlanError("magnitudes must differ by at least 5 % (they are separate calibration levels)")
    if not (np.isfinite(target_deg) and target_deg > 0):
        raise PlanError(f"the target axis accuracy must be a positive number of degrees, got {target_deg}")
    k_n = levels.size
    base = [uniform_directions(base_rows, k) for k in range(k_n)]
    pool = _Pool(guess, levels, base, fibonacci_sphere(candidates))
    target_var = np.radians(target_deg) ** 2
    n_base = base_rows * k_n
    v_base = _beam_variances(_covariance(pool.information(pool.fixed_weights())[0]), pool.n_beams)
    bound_rows = bound_lower = float(n_base)
    if np.all(v_base <= target_var):
        counts = [w.astype(int) for w in pool.fixed_weights()]
    else:
        cont = continuous_design(pool, max(n_base * (float(v_base.max()) / target_var - 1.0), 1.0), target_var)
        bound_rows = n_base + cont.n_free * float(cont.axis_var.max()) / target_var
        bound_lower = n_base + cont.n_free_lower
        if cont.n_free + n_base > max_rows:
            cont.weights = [np.concatenate([w[:nf], w[nf:] * (max_rows - n_base) / cont.n_free])
                            for w, nf in zip(cont.weights, pool.n_fixed)]
        counts = _round_counts(pool, cont)
        counts = _complete(pool, counts, target_var, max_rows)
        counts = _trim(pool, counts, target_var)
    info, _ = pool.information(counts)
    v = _beam_variances(_covariance(info), pool.n_beams)
    std = np.degrees(np.sqrt(v))
    reached = bool(np.all(std <= target_deg * (1 + 1e-9)))
    per_level = [c.sum() for c in counts]
    uniform = expected_axis_std(guess, [uniform_directions(int(n), k) for k, n in enumerate(per_level)], levels)
    order_u, order_level = [], []
    last = None
    for k, c in enumerate(counts):
        rows = np.flatnonzero(c)
        pts = pool.u[k][rows]
        idx = tour(pts, last)
        order_u.append(np.repeat(pts[idx], c[rows][idx], axis=0) * levels[k])
        order_level.append(np.full(int(c.sum()), k))
        last = pts[idx[-1]]
    field = np.vstack(order_u)
    steps = np.linalg.norm(np.diff(field, axis=0), axis=1)
    return ScanPlan(field, np.concatenate(order_level), levels, std, uniform, float(target_deg), reached,
                    float(steps.sum()), float(steps.max() if steps.size else 0.0), float(bound_rows), float(bound_lower))


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
