"""The simulated lock-in's output filter: noise bandwidth, noise level, correlation, delay, steps.

Outside references: scipy.integrate.quad (the noise bandwidth integral), scipy.signal (a
continuous-time RC cascade: its impulse response and frequency response), scipy.special.gammainc
(the Erlang distribution function, which is the step response of n equal RC stages).
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, signal, special

from fieldvane.estimator.lockin_noise import autocorrelation as estimator_autocorrelation
from fieldvane.firmware_sim.lockin import OutputFilter, default_oversample, rc_noise_bandwidth_hz
from fieldvane.firmware_sim.response import add_noise, response
from fieldvane.firmware_sim.scenario import load_scenario, loads_scenario, simulate

ROOT = Path(__file__).resolve().parents[1]
EX = ROOT / "examples"


def _track(lockin: str = "", events: str = "", duration: float = 60.0, seed: int = 5,
           rotate: float | None = None, sensor: str = "") -> str:
    motion = "" if rotate is None else (
        f"[[direction.segments]]\nkind = \"rotate\"\naxis = [0.3, 0.2, 0.93]\n"
        f"rate_deg_per_s = {rotate}\nduration_s = {duration}\n")
    return (f"version = 1\n{sensor}\n[run]\nduration_s = {duration}\nseed = {seed}\n{lockin}\n"
            f"[direction]\nstart = [0.5, 0.1, 0.86]\n{motion}[magnitude]\nstart_nT = 20000\n{events}")


LOCKIN_4x5 = "[lockin]\ntime_constant_s = 0.005\nfilter_order = 4\n"
QUIET = "[sensor]\nnoise_x_V = 0.0\nnoise_y_V = 0.0\n"


def _noise_of(scenario):
    """Return (run, its noise alone): z minus the response n tau earlier (the filtered signal).

    Exact for a still field; on a slow turn the filtered signal differs from the delayed response
    by the curvature term only (below 1e-6 V here, against 1 mV of noise; the delay test checks it).
    """
    run = simulate(scenario)
    u, b = scenario.true_field(run.t - scenario.lockin.group_delay_s)
    return run, run.z - response(scenario.sensor, u, b)[1]


def _quiet(scenario):
    """Return the scenario with a noise-free sensor."""
    return dataclasses.replace(scenario, sensor=scenario.sensor.replace(noise_x_V=0.0, noise_y_V=0.0))


def rho_closed_form(x: float, n: int) -> float:
    """Normalized autocorrelation at lag x = s/tau of white noise through n equal RC stages.

    Derived here: h(t) = t^(n-1) exp(-t/tau) / ((n-1)! tau^n); R(s) = int h(t) h(t+s) dt. Expanding
    (t+s)^(n-1) binomially and integrating t^(n-1+j) exp(-2t/tau) gives (n-1+j)! (tau/2)^(n+j), so
    R(s)/R(0) = exp(-x) sum_j C(n-1, j) (n-1+j)! / (2n-2)! (2x)^(n-1-j).
    """
    total = sum(math.comb(n - 1, j) * math.factorial(n - 1 + j) / math.factorial(2 * n - 2)
                * (2.0 * x) ** (n - 1 - j) for j in range(n))
    return math.exp(-x) * total


# ----- the filter's closed forms against scipy ----------------------------------------------

@pytest.mark.parametrize("n", range(1, 9))
def test_noise_bandwidth_formula_matches_the_integral(n):
    tau = 0.005
    # Outside reference: scipy.integrate.quad of |H(f)|^2 = 1 / (1 + (2 pi f tau)^2)^n over f >= 0.
    # (docs/references.md quotes Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau) 'from memory': checked here.)
    enbw, _ = integrate.quad(lambda f: (1.0 + (2 * math.pi * f * tau) ** 2) ** (-n), 0, math.inf,
                             epsabs=0, epsrel=1e-12, limit=500)
    assert rc_noise_bandwidth_hz(tau, n) == pytest.approx(enbw, rel=1e-9)
    quoted = {1: 1 / 4, 2: 1 / 8, 3: 3 / 32, 4: 5 / 64}     # docs/references.md 'The lock-in amplifier'
    if n in quoted:
        assert rc_noise_bandwidth_hz(tau, n) == pytest.approx(quoted[n] / tau, rel=1e-12)


def test_discrete_filter_has_the_continuous_noise_bandwidth():
    # The internal filter's own noise bandwidth, sum(h^2) x f_internal / 2, is within 0.2 % of the
    # continuous cascade's at the default oversampling (10/tau): the discretization is faithful.
    for tau, n in ((0.005, 4), (0.005, 1), (0.02, 2), (0.000833333, 4)):
        m = default_oversample(tau, 200.0)
        dt = 1.0 / (200.0 * m)
        filt = OutputFilter(tau, n, m)
        enbw_discrete = filt.noise_gain(dt) ** 2 / (2.0 * dt)
        assert enbw_discrete == pytest.approx(rc_noise_bandwidth_hz(tau, n), rel=2e-3)


def test_closed_form_autocorrelation_matches_scipy_impulse_response():
    tau, n = 0.005, 4
    # Outside reference: the impulse response of the continuous system 1 / (1 + s tau)^n from
    # scipy.signal.impulse, autocorrelated numerically.
    den = np.poly1d([tau, 1.0]) ** n
    t = np.linspace(0.0, 60 * tau, 240_001)
    _, h = signal.impulse(([1.0], den.coeffs), T=t)
    step = t[1] - t[0]
    r0 = integrate.trapezoid(h * h, dx=step)
    for lag_s in (0.005, 0.0025, 0.010, 0.001):
        k = int(round(lag_s / step))
        r = integrate.trapezoid(h[:-k] * h[k:], dx=step)
        assert rho_closed_form(lag_s / tau, n) == pytest.approx(r / r0, abs=2e-5)
        # the estimator's own copy (it must not import the simulator) against the same reference
        assert estimator_autocorrelation(np.array([lag_s]), tau, n)[0] == pytest.approx(r / r0, abs=2e-5)
    # The number quoted in docs/references.md: about 0.9 at 200 Hz with 4 stages of 5 ms.
    assert rho_closed_form(1.0, 4) == pytest.approx(0.9074, abs=1e-4)


def test_ramp_lags_by_n_tau_as_the_continuous_group_delay():
    tau, n, m = 0.005, 4, 10
    filt = OutputFilter(tau, n, m)
    # Outside reference: the group delay -dphi/domega of 1/(1 + i omega tau)^n at low frequency,
    # from scipy.signal.freqs (phase differentiated numerically).
    den = (np.poly1d([tau, 1.0]) ** n).coeffs
    w = np.array([1e-3, 2e-3])
    _, resp = signal.freqs([1.0], den, worN=w)
    delay = -np.diff(np.unwrap(np.angle(resp)))[0] / (w[1] - w[0])
    assert delay == pytest.approx(n * tau, rel=1e-6)
    assert filt.group_delay_s == pytest.approx(delay, rel=1e-6)
    # The internal filter on a ramp: after settling, the output is the input delayed by n tau.
    dt = 1.0 / (200.0 * m)
    t = np.arange(4000) * dt
    y, _ = filt.run(t[:, None].astype(complex), dt, filt.initial_state(dt, np.zeros(1, complex)))
    lag = (t - y[:, 0].real)[-1000:]
    np.testing.assert_allclose(lag, delay, rtol=1e-9)


def test_step_response_is_the_erlang_distribution_function():
    tau, n, m = 0.005, 4, 10
    filt = OutputFilter(tau, n, m)
    dt = 1.0 / (200.0 * m)
    x = np.zeros((400, 1), complex)
    x[100:] = 1.0
    y, _ = filt.run(x, dt, filt.initial_state(dt, x[0]))
    t = (np.arange(400) - 100) * dt
    # Outside reference: the regularized lower incomplete gamma P(n, t/tau) (scipy.special.gammainc)
    # is the step response of n equal RC stages (the Erlang CDF). The sampled edge lies within the
    # last internal step before the jump, so the output sits between the two shifted curves (to
    # 1e-5 of the step: each discrete stage is exact for inputs linear between samples, which the
    # first stage's output no longer is).
    after = t >= 0
    lo = special.gammainc(n, np.clip(t[after], 0, None) / tau)
    hi = special.gammainc(n, (t[after] + dt) / tau)
    assert np.all(y[after, 0].real >= lo - 1e-5) and np.all(y[after, 0].real <= hi + 1e-5)
    assert np.mean(y[after, 0].real - lo) > 0 and np.mean(hi - y[after, 0].real) > 0
    assert np.all(np.abs(y[~after, 0]) < 1e-15)
    assert filt.settle_time_s(1e-4) == pytest.approx(tau * special.gammaincinv(n, 1 - 1e-4))
    assert special.gammainc(n, filt.settle_time_s(1e-4) / tau) == pytest.approx(1 - 1e-4, abs=1e-12)


# ----- the simulated sensor through the filter ----------------------------------------------

def test_output_noise_std_and_lag1_correlation_at_200_hz_4_stages_5_ms():
    noisy, noise = _noise_of(loads_scenario(_track(LOCKIN_4x5)))
    assert noisy.lockin.oversample == 10                     # 2 kHz internal rate
    series = np.concatenate([noise.real, noise.imag], axis=1)   # 8 series of 12000 samples
    std = series.std(axis=0)
    # Configured: the sensor's noise_x_V = noise_y_V = 1 mV (no reference bandwidth given).
    np.testing.assert_allclose(std, 1e-3, rtol=0.04)
    assert std.mean() == pytest.approx(1e-3, rel=0.015)
    rho = np.array([np.corrcoef(s[:-1], s[1:])[0, 1] for s in series.T])
    # Against the closed form derived above (checked against scipy.signal.impulse): 0.9074.
    assert rho.mean() == pytest.approx(rho_closed_form(1.0, 4), abs=0.006)
    assert np.all(np.abs(rho - rho_closed_form(1.0, 4)) < 0.02)
    rho2 = np.mean([np.corrcoef(s[:-2], s[2:])[0, 1] for s in series.T])
    assert rho2 == pytest.approx(rho_closed_form(2.0, 4), abs=0.012)


def test_without_lockin_every_sample_is_independent_as_before():
    text = _track(duration=10.0, rotate=3.0)
    s = loads_scenario(text)
    run = simulate(s)
    assert run.lockin is None and "lockin_filter_order" not in run.metadata()
    # Today's definition, rebuilt by hand: the response at each sample plus add_noise drawn first
    # from default_rng(seed): the same numbers to the last bit.
    _, clean = response(s.sensor, s.true_field()[0], s.true_field()[1])
    expected = add_noise(clean, s.sensor, np.random.default_rng(s.seed))
    np.testing.assert_array_equal(run.z, expected)


def test_wider_bandwidth_than_the_reference_raises_the_noise_by_its_square_root():
    base = load_scenario(EX / "wide_bandwidth.toml", duration_s=15.0)
    noise = _noise_of(base)[1]
    lk = base.lockin
    assert lk.noise_bandwidth_hz / lk.noise_reference_bandwidth_hz == pytest.approx(6.0, rel=1e-6)
    series = np.concatenate([noise.real, noise.imag], axis=1)
    # White noise: std proportional to sqrt(noise bandwidth), so sqrt(6) x 1 mV = 2.449 mV.
    assert series.std(axis=0).mean() == pytest.approx(1e-3 * math.sqrt(6.0), rel=0.015)
    rho = np.mean([np.corrcoef(s[:-1], s[1:])[0, 1] for s in series.T])
    assert rho == pytest.approx(rho_closed_form(0.005 / 0.000833333, 4), abs=0.02)   # about 0.09


def test_moving_field_is_seen_n_tau_late():
    quiet = loads_scenario(_track(LOCKIN_4x5, duration=20.0, rotate=6.0, sensor=QUIET))
    run = simulate(quiet)
    skip = run.t > 1.0

    def misfit(lag):
        u, b = quiet.true_field(run.t[skip] - lag)
        return np.sum(np.abs(run.z[skip] - response(quiet.sensor, u, b)[1]) ** 2)

    lags = np.array([0.018, 0.020, 0.022])
    c = np.polyfit(lags, [misfit(x) for x in lags], 2)
    measured = -c[1] / (2 * c[0])
    # n tau = 20 ms: the group delay (scipy.signal.freqs above); a 6 deg/s turn is slow enough.
    assert measured == pytest.approx(0.020, abs=2e-5)
    u, b = quiet.true_field(run.t[skip] - 0.020)
    assert np.max(np.abs(run.z[skip] - response(quiet.sensor, u, b)[1])) < 1e-6


def test_noise_burst_is_filtered_with_the_noise():
    # 40 bursts of 10x (0.2 s every 0.5 s) through 4 x 5 ms: the output variance rises along the
    # filter's squared impulse response, averaged over bursts and the 8 series.
    bursts = "".join(f"[[events]]\nkind = \"noise_burst\"\nstart_s = {1 + 0.5 * k}\nduration_s = 0.2\n"
                     f"factor = 10\n" for k in range(40))
    _, noise = _noise_of(loads_scenario(_track(LOCKIN_4x5, bursts, duration=22.0)))
    series = np.concatenate([noise.real, noise.imag], axis=1)
    starts = np.round((1 + 0.5 * np.arange(40)) * 200).astype(int)
    profile = np.mean([series[s - 10:s + 30] ** 2 for s in starts], axis=(0, 2))   # lags -10..29
    filt = OutputFilter(0.005, 4, 10)
    h2 = filt.impulse_response(1.0 / 2000) ** 2
    energy = np.cumsum(h2) / h2.sum()               # fraction of the output made of burst input
    lag = np.arange(-10, 30)
    frac = np.where(lag >= 0, energy[np.clip(lag * 10, 0, None)], 0.0)
    expected = 1e-6 * (1 + 99 * frac)
    sure = (lag < -2) | (lag >= 8)
    np.testing.assert_allclose(profile[sure], expected[sure], rtol=0.2)
    edge = (lag >= 0) & (lag < 8)                     # the rise: partly filtered
    np.testing.assert_allclose(profile[edge], expected[edge], rtol=0.25)
    assert profile[10] < 0.5 * profile[25]            # the first burst sample is not yet full


def test_lockin_filtered_turn_example_and_its_recording_metadata():
    s = load_scenario(EX / "lockin_filtered_turn.toml", duration_s=2.0)
    run = simulate(s)
    meta = run.metadata()
    assert meta["lockin_time_constant_s"] == "0.005" and meta["lockin_filter_order"] == "4"
    assert meta["sample_rate_hz"] == "200"
    assert float(meta["lockin_noise_bandwidth_hz"]) == pytest.approx(5 / 64 / 0.005, rel=1e-9)


def test_scan_with_lockin_records_only_settled_samples():
    s = load_scenario(EX / "calibration_scan_lockin.toml")
    assert s.scan.settle_samples == 16 and s.scan.dwell_samples == 8
    run = simulate(s)
    assert len(run) == 3 * 150 * 8 and s.n_samples == 3 * 150 * 24
    quiet = _quiet(s)
    q = simulate(quiet)
    # Every recorded sample is within 1e-4 of the steady response at its point (settled).
    clean = response(s.sensor, q.u, q.b_nT)[1]
    scale = np.abs(clean).max()
    assert np.max(np.abs(q.z - clean)) < 1e-4 * 2 * scale
    gaps = np.diff(run.seq)
    assert set(np.unique(gaps)) == {1, 17}
    plan = dataclasses.replace(quiet.scan, settle_samples=0)
    kept = simulate(dataclasses.replace(quiet, scan=plan, duration_s=plan.n_samples / 200.0))
    # settle_s = 0 keeps the transients: the first sample after a step is far from settled.
    clean0 = response(s.sensor, kept.u, kept.b_nT)[1]
    assert np.max(np.abs(kept.z - clean0)) > 0.1 * scale
