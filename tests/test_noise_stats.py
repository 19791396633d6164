"""Noise statistics (estimator/noise_stats.py): Allan deviation, Welch spectra, still stretches."""

import math

import numpy as np
import pytest
from scipy import signal

from fieldvane.estimator import noise_stats as ns
from fieldvane.estimator.sphere import exp_map, normalize, tangent_basis

FS = 100.0


def white(n, sigma, seed):
    return np.random.default_rng(seed).normal(0.0, sigma, n)


def adev_by_definition(y, m):
    """Overlapping ADEV from frequency data, the double sum as printed in NIST SP 1065 (2008), eq. (10):
    sigma^2(m tau0) = 1 / (2 m^2 (M - 2m + 1)) sum_{j=1}^{M-2m+1} [ sum_{i=j}^{j+m-1} (y_{i+m} - y_i) ]^2."""
    M = len(y)
    total = 0.0
    for j in range(M - 2 * m + 1):
        inner = sum(y[i + m] - y[i] for i in range(j, j + m))
        total += inner * inner
    return math.sqrt(total / (2 * m * m * (M - 2 * m + 1)))


def test_adev_equals_the_published_double_sum():
    y = white(300, 1.7, seed=1) + np.linspace(0, 3, 300) ** 2     # noise plus curvature: any data
    a = ns.overlapping_adev(y, FS, [1, 2, 3, 7, 20, 60])
    for m, value in zip([1, 2, 3, 7, 20, 60], a.adev):
        assert value == pytest.approx(adev_by_definition(y, m), rel=1e-10)
    np.testing.assert_allclose(a.tau_s, np.array([1, 2, 3, 7, 20, 60]) / FS)
    assert list(a.terms) == [300 - 2 * m + 1 for m in (1, 2, 3, 7, 20, 60)]


def test_adev_of_white_noise_is_sigma_over_root_m():
    # White frequency noise: ADEV(tau0) = sigma and ADEV falls as tau^-1/2 (NIST SP 1065, section 5.2
    # and Table 6: slope mu = -1 of sigma^2, i.e. -1/2 of sigma).
    sigma = 0.3
    y = white(1 << 16, sigma, seed=2)
    a = ns.overlapping_adev(y, FS)
    assert a.tau_s[0] == pytest.approx(1 / FS)
    assert a.adev[0] == pytest.approx(sigma, rel=0.01)
    m = a.tau_s * FS
    keep = m <= 256
    np.testing.assert_allclose(a.adev[keep], sigma / np.sqrt(m[keep]), rtol=0.08)
    slope = np.polyfit(np.log(a.tau_s[keep]), np.log(a.adev[keep]), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.03)
    # The longest tau is a quarter of the record (MAX_TAU_FRACTION), octave spaced.
    assert m[-1] <= 0.25 * y.size < 2 * m[-1] and np.all(np.diff(np.log2(m)) == 1)


def test_adev_of_linear_drift_is_drift_times_tau_over_root_two():
    # Linear frequency drift D: consecutive tau-averages differ by D tau, so ADEV = D tau / sqrt(2)
    # (NIST SP 1065, section 5.2.2, "frequency drift"; exact, no noise).
    drift = 0.05                                    # units per second
    t = np.arange(4000) / FS
    a = ns.overlapping_adev(drift * t, FS)
    np.testing.assert_allclose(a.adev, drift * a.tau_s / math.sqrt(2), rtol=1e-9)


def test_welch_level_of_white_noise_is_two_sigma_squared_over_fs():
    # One-sided PSD of white noise of std sigma sampled at fs: 2 sigma^2 / fs (Parseval over 0..fs/2).
    sigma = 0.02
    x = white(1 << 16, sigma, seed=3)
    spec = ns.welch_psd(x, FS)
    inner = spec.psd[1:-1]                          # DC and Nyquist bins hold half the power
    assert np.mean(inner) == pytest.approx(2 * sigma ** 2 / FS, rel=0.02)
    assert ns.white_level(spec) == pytest.approx(sigma * math.sqrt(2 / FS), rel=0.05)
    assert ns.white_sigma_from_level(ns.white_level(spec), FS) == pytest.approx(sigma, rel=0.05)
    # Same numbers as scipy's own Welch call with the documented settings (reference library).
    f, p = signal.welch(x, fs=FS, window="hann", nperseg=spec.freq_hz.size * 2 - 2, noverlap=None)
    np.testing.assert_allclose(spec.psd, p, rtol=1e-12)
    assert spec.segments >= 8


def noisy_directions(n, axis_std_deg, seed, center=(0.3, -0.5, 0.8)):
    c = normalize(np.array(center))
    e1, e2 = tangent_basis(c)
    rng = np.random.default_rng(seed)
    a, b = np.radians(rng.normal(0, axis_std_deg, (2, n)))
    return exp_map(np.broadcast_to(c, (n, 3)), a[:, None] * e1 + b[:, None] * e2), c


def test_direction_statistics_add_both_tangent_axes():
    s = 0.05                                         # deg per axis; total sigma = sqrt(2) s
    u, c = noisy_directions(1 << 15, s, seed=4)
    off = ns.tangent_offsets_deg(u)
    assert np.std(off, axis=0) == pytest.approx([s, s], rel=0.02)
    assert np.linalg.norm(ns.mean_direction(u) - c) < 1e-3 * math.radians(1)
    a = ns.direction_adev(u, FS)
    assert a.adev[0] == pytest.approx(math.sqrt(2) * s, rel=0.02)
    spec = ns.direction_psd(u, FS)
    assert ns.white_level(spec) == pytest.approx(math.sqrt(2) * s * math.sqrt(2 / FS), rel=0.06)


def test_value_at_tau_and_resolution():
    a = ns.overlapping_adev(white(5000, 1.0, seed=5), FS)
    assert ns.value_at_tau(a, 0.01) == a.adev[0]
    assert ns.value_at_tau(a, 1.28) == a.adev[7]
    assert math.isnan(ns.value_at_tau(a, 1000.0))
    b = np.full(100, 20000.000002507797)
    assert ns.below_resolution(b)
    assert ns.below_resolution(b + np.spacing(20000.0) * (np.arange(100) % 3))
    assert not ns.below_resolution(b + 1e-9 * np.arange(100))
    # A difference of large numbers: its own size is tiny, the operands' spacing decides.
    diff = (b + np.spacing(20000.0) * (np.arange(100) % 2)) - 20000.0
    assert not ns.below_resolution(diff) and ns.below_resolution(diff, scale=20000.0)


def test_still_runs_find_the_still_stretches():
    t = np.arange(int(45 * FS)) / FS
    rate = np.where((t >= 20) & (t < 30), 10.0, 0.0)             # deg/s about z, only in 20..30 s
    ang = np.radians(np.cumsum(rate) / FS)
    rng = np.random.default_rng(6)
    u = np.column_stack([np.cos(ang) * 0.8, np.sin(ang) * 0.8, np.full_like(ang, 0.6)])
    u = normalize(u + rng.normal(0, 2e-5, u.shape))
    b = 20000.0 + rng.normal(0, 0.001, t.size)
    runs = ns.still_runs(t, u, b, window_s=1.0, step_deg=0.01, step_nT=0.01, min_duration_s=5.0)
    assert len(runs) == 2
    (a0, a1), (b0, b1) = runs
    assert (t[a0], t[a1 - 1]) == pytest.approx((0.0, 20.0), abs=1.01)     # longest first
    assert (t[b0], t[b1 - 1]) == pytest.approx((30.0, 45.0), abs=1.01)
    # A magnitude step also ends stillness; a data gap splits a run.
    b2 = b + np.where(t >= 12, 5.0, 0.0)
    runs = ns.still_runs(t, u, b2, window_s=1.0, step_deg=0.01, step_nT=0.01, min_duration_s=5.0)
    assert [t[r[0]] for r in runs] == [pytest.approx(x, abs=1.01) for x in (30.0, 0.0, 12.0)]
    keep = (t < 37) | (t > 38)
    runs = ns.still_runs(t[keep], u[keep], b[keep], window_s=1.0, step_deg=0.01, step_nT=0.01,
                         min_duration_s=5.0)
    assert len(runs) == 3


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="non-finite"):
        ns.overlapping_adev([1.0, np.nan, 2.0, 3.0], FS)
    with pytest.raises(ValueError, match="sample rate"):
        ns.overlapping_adev(np.ones(10), 0.0)
    with pytest.raises(ValueError, match="does not fit"):
        ns.overlapping_adev(np.ones(10), FS, [6])
    with pytest.raises(ValueError, match="too few"):
        ns.welch_psd(np.ones(5), FS)
