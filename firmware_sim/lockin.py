"""Digital lock-in of the simulated electronics, and the full time-domain sensor simulation.

The lock-in mixes each probe signal with exp(-i 2 pi f_j t) for both pump frequencies, low-passes
with a cascade of identical first-order IIR stages, decimates to an output rate, and returns
2 x (filtered mix), i.e. the complex amplitude A of a signal Re[A exp(i 2 pi f_j t)].
`channel_outputs` then applies the channel conventions shared by both sensor models: divide by the
ideal drive normalization, apply the handedness (a channel with handedness +1 reports the complex
conjugate: its quadrature sign is reversed), and multiply by the gain g exp(i phi0).
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from .bloch import initial_state, integrate, make_problem, step_for
from .sensor import SensorConfig


def channel_outputs(config: SensorConfig, phasors: np.ndarray) -> np.ndarray:
    """Return lock-in outputs X+iY (N, C) in V from probe phasors (N, P, 2): normalize, handedness, gain."""
    probe_idx, pump_idx = config.channel_probe_index(), config.channel_pump_index()
    raw = phasors[:, probe_idx, pump_idx] / config.drive_normalization()[pump_idx][None, :]
    flip = np.array(config.handedness) > 0
    raw = np.where(flip[None, :], np.conj(raw), raw)
    return raw * config.channel_complex_gain()[None, :]


class DigitalLockIn:
    """Streaming two-frequency lock-in for many rows: mix, cascaded IIR low-pass, decimate."""

    def __init__(self, f_ref_hz: np.ndarray, n_probes: int, dt: float, tau_s: float,
                 order: int = 4, output_rate_hz: float | None = None):
        self.w_ref = 2.0 * np.pi * np.asarray(f_ref_hz, dtype=float)     # (N, J)
        self.dt = float(dt)
        self.tau_s = float(tau_s)
        self.order = int(order)
        alpha = -np.expm1(-self.dt / self.tau_s)
        self._b = np.array([alpha])
        self._a = np.array([1.0, alpha - 1.0])
        n, j = self.w_ref.shape
        self._zi = [np.zeros((n, n_probes, j, 1), complex) for _ in range(self.order)]
        rate = 1.0 / self.dt if output_rate_hz is None else float(output_rate_hz)
        self.decimation = max(1, int(round(1.0 / (rate * self.dt))))
        self._count = 0

    def settle_time_s(self) -> float:
        """Return the time (s) for the filter's step response to settle to about 1e-6."""
        return (self.order + 14.0) * self.tau_s

    def process(self, t: np.ndarray, signal: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Return (t_out (K,), A (N, P, J, K)) from probe signals (N, P, M) sampled at times t (M,)."""
        ref = np.exp(-1j * self.w_ref[:, None, :, None] * t[None, None, None, :])   # (N, 1, J, M)
        y = 2.0 * signal[:, :, None, :] * ref
        for s in range(self.order):
            y, self._zi[s] = lfilter(self._b, self._a, y, axis=-1, zi=self._zi[s])
        first = (-self._count) % self.decimation
        self._count += t.shape[0]
        return t[first::self.decimation], y[..., first::self.decimation]


def _nearest_line_gap_hz(f_mod: np.ndarray) -> float:
    """Return the smallest distance (Hz) from a reference to another line in the mixed spectrum."""
    return float(np.min(np.minimum(np.abs(f_mod[:, 0] - f_mod[:, 1]), np.min(f_mod, axis=1))))


def simulate_time_domain(config: SensorConfig, u, b_nT, settle_s: float, average_s: float, *,
                         f_mod_hz=None, steps_per_period: float = 10.0, tau_s: float | None = None,
                         chunk: int = 2048) -> np.ndarray:
    """Return steady-state lock-in outputs X+iY (N, C) in V from the time-domain Bloch model.

    u: (N, 3) field directions (sensor frame); b_nT: (N,) or scalar |B| in nT. Integrates for
    settle_s, then averages the lock-in output over average_s (Blackman-weighted). The modulation
    frequencies track the Larmor frequencies unless f_mod_hz (N, 2) is given. The lock-in time
    constant defaults to 3 / (2 pi * gap), gap = the closest other spectral line; settle_s must
    cover the lock-in's settling and about 10 / (total damping) for the spins.
    """
    problem = make_problem(config, u, b_nT, f_mod_hz)
    f_mod = problem.w_mod / (2.0 * np.pi)
    if tau_s is None:
        tau_s = 3.0 / (2.0 * np.pi * _nearest_line_gap_hz(f_mod))
    dt = step_for(problem, steps_per_period)
    lockin = DigitalLockIn(f_mod, problem.probes.shape[0], dt, tau_s)
    if settle_s < lockin.settle_time_s():
        raise ValueError(f"settle_s: {settle_s} s is shorter than the lock-in settling time "
                         f"{lockin.settle_time_s():.4g} s (tau {tau_s:.3g} s)")
    if average_s <= 0.0:
        raise ValueError(f"average_s: must be > 0, got {average_s}")
    n_settle = int(np.ceil(settle_s / dt))
    n_avg = max(4, int(np.ceil(average_s / dt)))
    n_total = n_settle + n_avg
    # Blackman weights over the averaging window: what is left of the other lines after the IIR
    # (a beat at a non-integer number of cycles) is suppressed by the window's low sidelobes.
    weights = np.blackman(n_avg + 2)[1:-1]
    weights /= weights.sum()
    p = initial_state(problem)
    mean = 0.0
    done = 0
    while done < n_total:
        m = min(chunk, n_total - done)
        p, times, sig = integrate(problem, p, done * dt, dt, m)
        _, filtered = lockin.process(times, sig)
        start = max(done, n_settle)
        if start < done + m:
            w = weights[start - n_settle:done + m - n_settle]
            mean = mean + filtered[..., start - done:] @ w
        done += m
    return channel_outputs(config, mean)
