"""Digital lock-in of the simulated electronics, and the full time-domain sensor simulation.

The lock-in mixes each probe signal with exp(-i 2 pi f_j t) for both pump frequencies, low-passes
with a cascade of identical first-order IIR stages, decimates to an output rate, and returns
2 x (filtered mix), i.e. the complex amplitude A of a signal Re[A exp(i 2 pi f_j t)].
`channel_outputs` then applies the channel conventions shared by both sensor models: divide by the
ideal drive normalization, apply the handedness (a channel with handedness +1 reports the complex
conjugate: its quadrature sign is reversed), and multiply by the gain g exp(i phi0).

`OutputFilter` is the output low-pass a scenario's `[lockin]` table puts after the fast
steady-state model (scenario.simulate): n RC stages run at an internal rate on the response and
on white noise, then decimated, so outputs lag a moving field by n tau and neighbouring samples
share noise as a real instrument's do.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter, lfilter_zi
from scipy.special import gammaincinv

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
    frequencies are the frequency loops' (loop.py) unless f_mod_hz (N, 2) is given. The lock-in time
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


# ----- output filter of a lock-in amplifier (a scenario's [lockin] table) ---------------------

def rc_noise_bandwidth_hz(time_constant_s: float, order: int) -> float:
    """Return the equivalent noise bandwidth (Hz, one-sided) of `order` cascaded RC low-pass stages.

    ENBW = integral over f >= 0 of |H(f)|^2 with H = 1 / (1 + i 2 pi f tau)^n, which is
    Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau): 1/(4 tau) for one stage, 5/(64 tau) for four.
    """
    n = int(order)
    return math.gamma(n - 0.5) / (4.0 * math.sqrt(math.pi) * math.gamma(n) * float(time_constant_s))


def default_oversample(time_constant_s: float, output_rate_hz: float) -> int:
    """Return the default internal-rate multiple: internal rate >= 10/tau and >= 4x the output rate."""
    return max(4, math.ceil(10.0 / (float(time_constant_s) * float(output_rate_hz)) - 1e-9))


@dataclass(frozen=True)
class OutputFilter:
    """A lock-in's output low-pass: `order` identical RC stages of time constant tau (s).

    It runs at `oversample` x the output rate and the output is every oversample-th value. The
    signal and the noise go through two discrete forms of the same RC stage, each exact for its
    kind of input: the signal's is exact for an input linear between internal samples (first-order
    hold), so a ramp lags by exactly order x tau; the noise's is exact for one stage fed with
    continuous white noise (impulse invariant: the sampled process is first-order autoregressive).
    The noise, white at the internal rate, is scaled so the output noise std is the sensor's
    noise_x_V / noise_y_V times sqrt(ENBW / noise_reference_bandwidth_hz) (the reference defaults
    to this filter's own ENBW, i.e. the configured std is the output std).
    """

    time_constant_s: float
    order: int = 4
    oversample: int = 10
    noise_reference_bandwidth_hz: float | None = None

    @property
    def noise_bandwidth_hz(self) -> float:
        """Return the filter's equivalent noise bandwidth (Hz, one-sided, continuous RC cascade)."""
        return rc_noise_bandwidth_hz(self.time_constant_s, self.order)

    @property
    def group_delay_s(self) -> float:
        """Return the low-frequency group delay (s): order x tau (the steady lag behind a ramp)."""
        return self.order * self.time_constant_s

    def noise_std_ratio(self) -> float:
        """Return output noise std / the sensor's configured noise std: sqrt(ENBW / reference ENBW)."""
        ref = self.noise_reference_bandwidth_hz
        return 1.0 if ref is None else math.sqrt(self.noise_bandwidth_hz / ref)

    def settle_time_s(self, tolerance: float = 1e-4) -> float:
        """Return the time (s) after which the step response is within `tolerance` of its final value.

        The step response of n equal RC stages is the Erlang (gamma) distribution function
        P(n, t / tau), so the answer is tau * gammaincinv(n, 1 - tolerance).
        """
        return float(gammaincinv(self.order, 1.0 - tolerance)) * self.time_constant_s

    def warmup_s(self) -> float:
        """Return how long (s) the filter runs before t = 0 so its noise is stationary there."""
        return (self.order + 20.0) * self.time_constant_s

    def stage_coefficients(self, dt: float, kind: str = "signal") -> tuple[np.ndarray, np.ndarray]:
        """Return (b, a) of one RC stage at internal step dt (s): kind 'signal' (first-order hold), 'noise'."""
        h = float(dt) / self.time_constant_s
        a = math.exp(-h)
        one_minus_a = -math.expm1(-h)
        if kind == "noise":
            return np.array([one_minus_a]), np.array([1.0, -a])
        if kind != "signal":
            raise ValueError(f"kind: 'signal' or 'noise', got {kind!r}")
        return np.array([1.0 - one_minus_a / h, one_minus_a / h - a]), np.array([1.0, -a])

    def impulse_response(self, dt: float, kind: str = "noise") -> np.ndarray:
        """Return the cascade's impulse response at internal step dt, long enough to sum its square."""
        b, a = self.stage_coefficients(dt, kind)
        m = int(math.ceil((self.order + 40.0) * self.time_constant_s / dt)) + 2
        x = np.zeros(m)
        x[0] = 1.0
        for _ in range(self.order):
            x = lfilter(b, a, x)
        return x

    def noise_gain(self, dt: float) -> float:
        """Return output std / input std of the noise cascade for white input at step dt: sqrt(sum h^2)."""
        h = self.impulse_response(dt, "noise")
        return float(np.sqrt(np.dot(h, h)))

    def initial_state(self, dt: float, first: np.ndarray, kind: str = "signal") -> list[np.ndarray]:
        """Return the stages' states (one (1, C) array each) at rest with a constant input `first` (C,)."""
        b, a = self.stage_coefficients(dt, kind)
        zi = lfilter_zi(b, a)
        x0 = np.asarray(first)[None, :]
        return [zi[:, None] * x0 for _ in range(self.order)]

    def run(self, x: np.ndarray, dt: float, state: list[np.ndarray],
            kind: str = "signal") -> tuple[np.ndarray, list[np.ndarray]]:
        """Return (filtered x (M, C), new state) for internal samples x (M, C) at step dt, state carried on."""
        b, a = self.stage_coefficients(dt, kind)
        new_state = []
        for zi in state:
            x, zf = lfilter(b, a, x, axis=0, zi=zi)
            new_state.append(zf)
        return x, new_state
