"""The magnitude model: frequency errors of the locked loops fitted from a scan, corrected |B| and its sigma.

Outside references: numpy.linalg.lstsq on an independent design (monomials, another reference
magnitude) for the fit; the exact |B u + b p| computed with numpy for the light shift's first-order
law; the simulated sensor (firmware_sim, an independent implementation with its own Breit-Rabi
heading coefficients, exchange-coupled modes and light-shift fields) for the heading error, the
pulling and the acceptance numbers; scipy.stats.norm for the Gaussian coverage of sigma.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy.stats import norm

from fieldvane.estimator.magnitude import disagreement, fuse_magnitudes
from fieldvane.estimator.magnitude_model import MagnitudeModel, fit_magnitude_model
from fieldvane.estimator.sphere import exp_map, fibonacci_sphere, normalize, tangent_basis
from fieldvane.firmware_sim.cell import cell_rates
from fieldvane.firmware_sim.loop import locked_hz
from fieldvane.firmware_sim.scenario import loads_scenario, simulate
from fieldvane.firmware_sim.sensor import default_config

# The realistic [sensor] block of docs/scenarios.md ("Cell realism"): our own invented numbers.
REALISTIC_TOML = """
[sensor]
spin_exchange_per_s = 2250
density_fraction = { 87Rb = 0.2783, 85Rb = 0.7217 }
frequency_loop = "locked"
heading_model = "breit_rabi"
pump_detuning_GHz = [0.8, -0.6]
optical_width_GHz = 3.0
lower_level_weight = { 87Rb = -0.08, 85Rb = -0.12 }
pump_angle_efficiency = [0.1, 0.1]
"""
REALISTIC = dict(spin_exchange_per_s=2250.0, density_fraction=(0.2783, 0.7217), frequency_loop="locked",
                 heading_model="breit_rabi", pump_detuning_GHz=(0.8, -0.6), optical_width_GHz=3.0,
                 lower_level_weight=(-0.08, -0.12), pump_angle_efficiency=(0.1, 0.1))
GAMMAS = default_config(2).gamma_hz_per_nt()
LEVELS = (1000, 2000, 5000, 10000, 20000, 50000)


def _sphere(n, seed):
    rng = np.random.default_rng(seed)
    return normalize(rng.normal(size=(n, 3)))


def _scan_toml(levels, points=150, seed=4):
    return f"""
version = 1
name = "magnitude_scan"
kind = "scan"
[run]
sample_rate_hz = 200
seed = {seed}
[scan]
magnitudes_nT = {list(levels)}
points = {points}
dwell_samples = 1
""" + REALISTIC_TOML


def _stream_toml(b_nT, seed=7):
    # Two full turns about tilted axes: the field visits most of the sphere in 8 s.
    return f"""
version = 1
name = "magnitude_stream"
[run]
sample_rate_hz = 50
seed = {seed}
[direction]
start = [0.3, 0.2, 0.93]
[[direction.segments]]
kind = "rotate"
axis = [1, 0.3, 0.2]
rate_deg_per_s = 90
duration_s = 4
[[direction.segments]]
kind = "rotate"
axis = [0.1, 1, 0.4]
rate_deg_per_s = -90
duration_s = 4
[magnitude]
start_nT = {b_nT}
""" + REALISTIC_TOML


@pytest.fixture(scope="module")
def realistic_model():
    run = simulate(loads_scenario(_scan_toml(LEVELS), "<scan>"))
    b = np.linalg.norm(run.applied_b_nT, axis=1)
    model = fit_magnitude_model(run.applied_b_nT / b[:, None], b, run.f, GAMMAS, ("87Rb", "85Rb"))
    return model


def _perturb(u, sigma_rad, rng):
    """Return u moved by an isotropic tangent error of total 1-sigma sigma_rad (per-axis sigma / sqrt 2)."""
    e1, e2 = tangent_basis(u)
    a = rng.normal(size=(u.shape[0], 2)) * sigma_rad / math.sqrt(2)
    return exp_map(u, a[:, :1] * e1 + a[:, 1:] * e2)


# ----------------------------------------------------------------------------------------- fitting
def _independent_design(u, b, ref_nT, degree):
    """Monomials x^a y^b z^c (total degree <= degree) times R/|B|, 1, (|B|/R)^2: the same span on the sphere."""
    cols = []
    for env in (ref_nT / b, np.ones_like(b), (b / ref_nT) ** 2):
        for total in range(degree + 1):
            for a in range(total + 1):
                for c in range(total - a + 1):
                    cols.append(env * u[:, 0] ** a * u[:, 1] ** c * u[:, 2] ** (total - a - c))
    return np.column_stack(cols)


def test_fit_is_the_least_squares_solution_of_numpy_lstsq():
    rng = np.random.default_rng(11)
    levels = np.array([1500.0, 6000.0, 30000.0])
    u = np.vstack([_sphere(300, k) for k in range(3)])
    b = np.repeat(levels, 300)
    truth_design = _independent_design(u, b, 4000.0, 2)
    coef = rng.normal(scale=0.3, size=(truth_design.shape[1], 2))
    delta = truth_design @ coef + rng.normal(scale=0.05, size=(u.shape[0], 2))
    f = (b[:, None] + delta) * GAMMAS
    model = fit_magnitude_model(u, b, f, GAMMAS, degree=2)
    assert model.degrees == (2, 2) and model.rejected_rows == (0, 0)
    # Reference: numpy.linalg.lstsq on a design of monomials with another reference magnitude
    # (rank-deficient on the sphere; the fitted values, a projection, are unique).
    ref_coef, *_ = np.linalg.lstsq(truth_design, delta, rcond=None)
    ut, bt = _sphere(500, 99), np.exp(rng.uniform(np.log(1500), np.log(30000), 500))
    expected = _independent_design(ut, bt, 4000.0, 2) @ ref_coef
    assert np.max(np.abs(model.delta(ut, bt) - expected)) < 1e-8 * np.max(np.abs(expected))
    # Held-out residual std ~ the added noise (0.05 nT), slightly above it (prediction error).
    assert np.all((model.noise_nT > 0.045) & (model.noise_nT < 0.06))


def test_outlier_rows_are_rejected_and_the_fit_equals_lstsq_without_them():
    rng = np.random.default_rng(12)
    levels = np.array([2000.0, 8000.0, 40000.0])
    u = np.vstack([_sphere(250, 10 + k) for k in range(3)])
    b = np.repeat(levels, 250)
    design = _independent_design(u, b, 9000.0, 1)
    delta = design @ rng.normal(scale=0.5, size=(design.shape[1], 2)) + rng.normal(scale=0.02, size=(u.shape[0], 2))
    bad = np.array([3, 100, 333, 512, 700])
    delta[bad, 1] += np.array([40.0, -25.0, 3.0, 60.0, -8.0])        # 85Rb's loop slipped on 5 rows
    f = (b[:, None] + delta) * GAMMAS
    model = fit_magnitude_model(u, b, f, GAMMAS, degree=1)
    assert model.rejected_rows == (0, 5)
    keep = np.setdiff1d(np.arange(u.shape[0]), bad)
    ref, *_ = np.linalg.lstsq(design[keep], delta[keep, 1], rcond=None)   # numpy reference
    ut = _sphere(200, 5)
    bt = np.full(200, 10000.0)
    assert np.max(np.abs(model.delta(ut, bt)[:, 1] - _independent_design(ut, bt, 9000.0, 1) @ ref)) < 1e-8


def test_light_shift_is_b_ls_times_p_dot_u_to_first_order():
    # A fictitious field b_ls along the pump adds b_ls (p.u) to |B| to first order; the exact
    # |B u + b_ls p| is computed with numpy and differs from it by at most b_ls^2 / (2 |B|).
    p = normalize(np.array([1.0, 0.2, -0.1]))
    b_ls = 0.6
    levels = np.array([1000.0, 5000.0, 20000.0])
    u = np.vstack([_sphere(200, 20 + k) for k in range(3)])
    b = np.repeat(levels, 200)
    exact = np.linalg.norm(b[:, None] * u + b_ls * p, axis=1)
    f = exact[:, None] * GAMMAS
    model = fit_magnitude_model(u, b, f, GAMMAS)
    ut = _sphere(400, 21)
    for level in (1000.0, 3000.0, 20000.0):
        bt = np.full(400, level)
        first_order = b_ls * (ut @ p)
        assert np.max(np.abs(model.delta(ut, bt) - first_order[:, None])) <= 1.01 * b_ls ** 2 / (2 * level) + 1e-3
        f_t = np.linalg.norm(bt[:, None] * ut + b_ls * p, axis=1)[:, None] * GAMMAS
        b_est, per, _ = model.correct(f_t, ut)
        assert np.max(np.abs(b_est - bt)) < 2e-3 and np.max(np.abs(per - bt[:, None])) < 2e-3
    # Sphere RMS of b_ls (p.u) is b_ls / sqrt(3) (the mean of (p.u)^2 over the sphere is 1/3).
    spread = model.effect_sizes()[0]["constant"][1]
    assert spread == pytest.approx(b_ls / math.sqrt(3), rel=0.01)


def test_heading_error_of_the_simulated_breit_rabi_resonance_is_corrected():
    # Only the nonlinear Zeeman (heading) shift: no exchange, no light shift. The simulator's
    # locked loops sit on its Breit-Rabi-based resonance, an independent implementation.
    cfg = dataclasses.replace(default_config(2), spin_exchange_per_s=0.0, frequency_loop="locked",
                              heading_model="breit_rabi")
    levels = np.array([10000.0, 20000.0, 50000.0])
    u = np.vstack([_sphere(200, 30 + k) for k in range(3)])
    b = np.repeat(levels, 200)
    f = locked_hz(cell_rates(cfg, u, b))
    model = fit_magnitude_model(u, b, f, GAMMAS)
    ut = _sphere(500, 31)
    for level in (35000.0, 50000.0, 70000.0):          # between levels, at one, beyond the range
        bt = np.full(500, level)
        f_t = locked_hz(cell_rates(cfg, ut, bt))
        raw = f_t / GAMMAS - bt[:, None]
        b_est, per, _ = model.correct(f_t, ut)
        assert np.ptp(raw[:, 1]) > 10.0 * (level / 50000.0) ** 2          # the 85Rb heading error is there
        assert np.sqrt(np.mean((per - bt[:, None]) ** 2)) < 0.01 * (level / 50000.0) ** 2 + 0.002
    # Heading error grows as |B|^2 (nonlinear Zeeman shift ~ f_L^2 / f_hfs, docs/references.md): the
    # fitted effect lives in the square envelope.
    sizes = model.effect_sizes()
    assert sizes[1]["square"][1] > 5.0 and abs(sizes[1]["inverse"][1]) < 0.05 * sizes[1]["square"][1]


# ------------------------------------------------------------------------------ realistic sensor
def test_realistic_scan_and_streams_meet_the_targets(realistic_model):
    model = realistic_model
    rng = np.random.default_rng(40)
    for b0, limit in ((50000.0, 0.5), (1000.0, 0.0005 * 1000.0)):        # 0.5 nT RMS; 0.05 % at 1 uT
        run = simulate(loads_scenario(_stream_toml(b0), "<stream>"))
        sigma_u = math.radians(0.5)              # a tracked direction's typical error (our choice)
        u_est = _perturb(run.u, sigma_u, rng)
        est = model.estimate(run.f, u_est, sigma_u)
        err = est.b_nT - run.b_nT
        raw = (run.f / GAMMAS).mean(axis=1) - run.b_nT
        assert np.sqrt(np.mean(err ** 2)) <= limit
        assert np.sqrt(np.mean(err ** 2)) < 0.2 * np.sqrt(np.mean(raw ** 2))
        flagged = disagreement(est.b_per_isotope, est.sigma_difference_nT, tolerance=1e-3)
        assert flagged.mean() < 0.01
        if b0 == 1000.0:
            # Uncorrected, the healthy sensor's isotopes disagree by ~0.4 % and trip the fixed rule.
            _, rel, raw_flag = fuse_magnitudes(run.f, GAMMAS, 1e-3)
            assert raw_flag.mean() > 0.9 and np.median(rel) > 3e-3
            # A real disagreement (85Rb's loop 0.3 % off) still fires.
            f_bad = run.f * np.array([1.0, 1.003])
            bad = model.estimate(f_bad, u_est, sigma_u)
            assert disagreement(bad.b_per_isotope, bad.sigma_difference_nT, tolerance=1e-3).mean() > 0.99


def test_scan_fit_chooses_all_three_envelopes_and_reports_effects(realistic_model):
    model = realistic_model
    assert model.envelopes == ("inverse", "constant", "square")
    assert model.rejected_rows == (0, 0)
    sizes = model.effect_sizes()
    # Pulling at 1 uT: the two isotopes are pulled toward each other (87Rb down, 85Rb up).
    assert sizes[0]["inverse"][0] < -1.0 and sizes[1]["inverse"][0] > 1.5
    # Heading at 50 uT larger on 85Rb (4.5 vs 2.1 line spacings, docs/scenarios.md).
    assert sizes[1]["square"][1] > 2.5 * sizes[0]["square"][1]
    assert np.all(model.residual_nT() < 0.01)


def test_sigma_is_honest_by_monte_carlo(realistic_model):
    # Gaussian frequency noise on scan and stream, a known direction error in the stream: the
    # truth lies within 1 sigma about 68.3 % of the time and within 2 sigma 95.4 % (1-D Gaussian,
    # scipy.stats.norm).
    cfg = dataclasses.replace(default_config(2), **REALISTIC)
    rng = np.random.default_rng(50)
    noise_nT = np.array([0.03, 0.05])
    u = np.vstack([_sphere(150, 60 + k) for k in range(len(LEVELS))])
    b = np.repeat(np.array(LEVELS, float), 150)
    f = locked_hz(cell_rates(cfg, u, b)) + rng.normal(size=(u.shape[0], 2)) * noise_nT * GAMMAS
    model = fit_magnitude_model(u, b, f, GAMMAS)
    p1, p2 = norm.cdf(1) - norm.cdf(-1), norm.cdf(2) - norm.cdf(-2)
    for level, sigma_deg in ((1000.0, 0.0), (50000.0, 2.0), (50000.0, 0.0), (20000.0, 1.0)):
        n = 4000
        ut = _sphere(n, int(level) + 1)
        bt = np.full(n, level)
        ft = locked_hz(cell_rates(cfg, ut, bt)) + rng.normal(size=(n, 2)) * noise_nT * GAMMAS
        sigma_u = math.radians(sigma_deg)
        u_est = _perturb(ut, sigma_u, rng) if sigma_deg else ut
        est = model.estimate(ft, u_est, sigma_u if sigma_deg else None)
        k = np.abs(est.b_nT - bt) / est.sigma_b_nT
        assert abs(np.mean(k <= 1) - p1) < 0.03, (level, sigma_deg, np.mean(k <= 1))
        assert np.mean(k <= 2) >= 0.93
        kd = np.abs(est.b_per_isotope[:, 0] - est.b_per_isotope[:, 1]) / est.sigma_difference_nT
        assert abs(np.mean(kd <= 1) - p1) < 0.03 and np.mean(kd <= 2) >= 0.93
        assert p2 > 0.95


def test_direction_gradient_matches_finite_differences(realistic_model):
    model = realistic_model
    u = _sphere(20, 70)
    b = np.full(20, 50000.0)
    f = model.frequencies(u, b)
    e1, _ = tangent_basis(u)
    h = 1e-6
    up, um = exp_map(u, h * e1), exp_map(u, -h * e1)
    numeric = (model.correct(f, up)[1] - model.correct(f, um)[1]) / (2 * h)     # d|B_i|/d angle along e1
    # With the direction's covariance along e1 only, each isotope's variance is its variance with
    # an exact direction plus (d|B_i|/d angle * angle sigma)^2, and the fused one w^T S w with that S.
    s = 0.01
    cov = s ** 2 * e1[:, :, None] * e1[:, None, :]
    est = model.estimate(f, u, cov)
    noise = model.estimate(f, u).sigma_per_isotope
    assert np.allclose(est.sigma_per_isotope ** 2, noise ** 2 + (numeric * s) ** 2, rtol=1e-5)
    big_s = np.einsum("ni,nj->nij", numeric * s, numeric * s) + np.einsum("ni,ij->nij", noise ** 2, np.eye(2))
    assert np.allclose(est.sigma_b_nT ** 2, np.einsum("ni,nij,nj->n", est.weights, big_s, est.weights), rtol=1e-5)
    assert np.allclose(est.sigma_difference_nT ** 2, big_s[:, 0, 0] + big_s[:, 1, 1] - 2 * big_s[:, 0, 1], rtol=1e-5)


def test_unknown_direction_uses_the_sphere_mean_and_spread(realistic_model):
    model = realistic_model
    grid = fibonacci_sphere(4000)
    for level in (1000.0, 50000.0):
        b = np.full(grid.shape[0], level)
        f = model.frequencies(grid, b)
        w = model.estimate(f[:1], np.full((1, 3), np.nan)).weights[0]
        fused_delta = model.delta(grid, b) @ w
        b_known = model.correct(f, grid)[0]
        assert np.allclose(b_known, level, atol=1e-6)
        raw = (f / GAMMAS) @ w
        expected = raw - fused_delta.mean()          # the sphere-mean correction applied to each row
        est_all = model.estimate(f, np.full(grid.shape, np.nan))
        assert np.max(np.abs(est_all.b_nT - expected)) < 0.02 * fused_delta.std() + 1e-6
        # Its error over the sphere is the fused correction's spread (numpy over a near-uniform grid).
        assert np.median(est_all.sigma_b_nT) == pytest.approx(fused_delta.std(), rel=0.05)
        # A direction whose uncertainty is unknown (nan sigma) is treated the same way.
        lost = model.estimate(f[:50], grid[:50], np.full(50, np.nan))
        assert np.array_equal(lost.b_nT, est_all.b_nT[:50]) and np.array_equal(lost.sigma_b_nT, est_all.sigma_b_nT[:50])


def test_missing_isotope_uses_the_other_one(realistic_model):
    model = realistic_model
    u = _sphere(10, 80)
    b = np.full(10, 20000.0)
    f = model.frequencies(u, b)
    f[:5, 0] = np.nan
    f[5:, 1] = -1.0
    est = model.estimate(f, u, 0.01)
    assert np.allclose(est.b_nT, b, atol=1e-6)
    assert np.all(np.isnan(est.b_per_isotope[:5, 0])) and np.all(np.isnan(est.sigma_difference_nT))
    assert not disagreement(est.b_per_isotope, est.sigma_difference_nT).any()
    none = model.estimate(np.full((2, 2), np.nan), u[:2])
    assert np.all(np.isnan(none.b_nT)) and np.all(np.isnan(none.sigma_b_nT))


def _reference_estimate(model, f, u, sigma):
    """Row by row, the module docstring's formulas with outside tools: scipy.optimize.brentq for the root of
    b + delta(u, b) = f / gamma, scipy.special's spherical harmonics (harmonics.real_sph_harm_reference), central
    differences along the sphere for the direction gradient, and a Gauss-Legendre x uniform-azimuth product rule
    (numpy.polynomial.legendre.leggauss; exact for these polynomial degrees) for the sphere's mean and covariances."""
    from numpy.polynomial.legendre import leggauss
    from scipy.optimize import brentq

    from fieldvane.estimator.harmonics import real_sph_harm_reference

    ref = model.reference_nT
    laws = {"inverse": (lambda x: 1 / x, lambda x: -1 / (x * x * ref)), "constant": (lambda x: 1.0, lambda x: 0.0),
            "square": (lambda x: x * x, lambda x: 2 * x / ref)}
    env = lambda b: np.array([laws[e][0](b / ref) for e in model.envelopes])
    denv = lambda b: np.array([laws[e][1](b / ref) for e in model.envelopes])
    nodes, wn = leggauss(8)
    phi = 2 * np.pi * np.arange(18) / 18
    z, az = np.meshgrid(nodes, phi, indexing="ij")
    rho = np.sqrt(1 - z ** 2)
    grid = np.column_stack([(rho * np.cos(az)).ravel(), (rho * np.sin(az)).ravel(), z.ravel()])
    wq = np.repeat(wn, 18) * (2 * np.pi / 18) / (4 * np.pi)            # sums to 1: the sphere mean
    harm = lambda i, v: real_sph_harm_reference(model.degrees[i], v)
    n = f.shape[0]
    out = {k: np.full((n, 2), np.nan) for k in ("b_per_isotope", "sigma_per_isotope", "weights")}
    out.update({k: np.full(n, np.nan) for k in ("b_nT", "sigma_b_nT", "sigma_difference_nT")})
    for r in range(n):
        known = np.all(np.isfinite(u[r])) and np.isfinite(sigma[r])
        m = f[r] / model.gammas_hz_per_nt
        ok = np.isfinite(m) & (m > 0)
        y = [harm(i, u[r][None])[0] if known else harm(i, grid).T @ wq for i in range(2)]   # Y(u), or its mean
        s = np.diag([np.inf, np.inf])
        grads = np.zeros((2, 2))
        dev = np.zeros((2, grid.shape[0]))
        slope = np.ones(2)
        for i in np.flatnonzero(ok):
            b = brentq(lambda bb: bb + env(bb) @ model.coef[i] @ y[i] - m[i], 0.5 * m[i], 2 * m[i],
                       xtol=1e-9, rtol=1e-15)
            slope[i] = 1 + denv(b) @ model.coef[i] @ y[i]
            x = np.kron(env(b), y[i])
            pred = x @ model.unit_covariance[i] @ x if known else 0.0
            noise = np.interp(np.log(b), np.log(model.noise_levels_nT), model.noise_nT[:, i])
            s[i, i] = noise ** 2 * (1 + pred) / slope[i] ** 2
            out["b_per_isotope"][r, i] = b
            if known:
                h = 1e-5
                for a, e in enumerate(tangent_basis(u[r][None])):
                    up, um = exp_map(u[r][None], h * e), exp_map(u[r][None], -h * e)
                    grads[i, a] = env(b) @ model.coef[i] @ (harm(i, up)[0] - harm(i, um)[0]) / (2 * h) / slope[i]
            else:
                vals = harm(i, grid) @ (env(b) @ model.coef[i])
                dev[i] = vals - wq @ vals
        if known:
            s += sigma[r] ** 2 / 2 * grads @ grads.T        # isotropic tangent covariance, total sigma
        elif ok.all():
            s += (dev * wq) @ dev.T                           # covariance of the two corrections over the sphere
        elif ok.any():
            i = int(np.flatnonzero(ok)[0])
            s[i, i] += wq @ dev[i] ** 2 / slope[i] ** 2
        inv = np.where(ok, 1 / np.diag(s), 0.0)
        w = inv / inv.sum() if inv.sum() > 0 else np.zeros(2)
        fin = np.where(np.isfinite(s), s, 0.0)
        out["weights"][r] = w
        out["sigma_per_isotope"][r] = np.where(ok, np.sqrt(np.diag(s)), np.nan)
        if ok.any():
            out["b_nT"][r] = w @ np.where(ok, out["b_per_isotope"][r], 0.0)
            out["sigma_b_nT"][r] = np.sqrt(w @ fin @ w)
        if ok.all():
            out["sigma_difference_nT"][r] = np.sqrt(fin[0, 0] + fin[1, 1] - 2 * fin[0, 1])
    return out


def test_compiled_estimate_matches_a_row_by_row_reference(realistic_model):
    model = realistic_model
    assert min(model.degrees) > 0 and len(model.envelopes) == 3
    rng = np.random.default_rng(120)
    n = 40
    u = _sphere(n, 121)
    b = np.exp(rng.uniform(np.log(600.0), np.log(80000.0), n))     # across and beyond the scanned 1-50 uT
    f = model.frequencies(u, b) * (1 + 1e-4 * rng.normal(size=(n, 2)))
    sigma = rng.uniform(0.0, 0.01, n)
    u[30:36] = np.nan                   # unknown directions: both isotopes, then one missing
    f[34, 0] = f[35, 1] = np.nan
    sigma[36] = np.nan                  # unknown uncertainty: treated as an unknown direction
    f[37, 0], f[38, 1], f[39] = -1.0, np.nan, np.nan
    est = model.estimate(f, u, sigma)
    ref = _reference_estimate(model, f, u, sigma)
    assert np.allclose(est.b_per_isotope, ref["b_per_isotope"], rtol=1e-12, atol=0, equal_nan=True)
    assert np.allclose(est.b_nT, ref["b_nT"], rtol=1e-12, atol=0, equal_nan=True)
    assert np.allclose(est.weights, ref["weights"], rtol=1e-6, atol=1e-12, equal_nan=True)
    for key in ("sigma_per_isotope", "sigma_b_nT", "sigma_difference_nT"):
        # (the reference's direction gradient is a central difference: relative error about 1e-9)
        assert np.allclose(getattr(est, key), ref[key], rtol=1e-6, atol=0, equal_nan=True), key
    # The same uncertainty as (N, 3, 3) covariances, sigma^2 / 2 on the tangent plane, gives the same estimate.
    uk = np.where(np.isfinite(u), u, 0.0)
    cov = (sigma ** 2 / 2)[:, None, None] * (np.eye(3) - uk[:, :, None] * uk[:, None, :])
    again = model.estimate(f, u, cov)
    for a, c in zip(dataclasses.astuple(est), dataclasses.astuple(again)):
        assert np.allclose(a, c, rtol=1e-12, atol=0, equal_nan=True)


# ----------------------------------------------------------------------------------------- storage
def test_round_trip_through_json_is_exact(realistic_model):
    model = realistic_model
    again = MagnitudeModel.from_dict(json.loads(json.dumps(model.to_dict())))
    u = _sphere(50, 90)
    b = np.exp(np.random.default_rng(1).uniform(np.log(800), np.log(60000), 50))
    f = model.frequencies(u, b)
    for x, y in zip(model.correct(f, u, 0.01), again.correct(f, u, 0.01)):
        assert np.array_equal(x, y)
    assert again.to_dict() == model.to_dict()


@pytest.mark.parametrize("edit, key", [
    (lambda d: d.update(version=2), "version"),
    (lambda d: d.pop("degrees"), "degrees"),
    (lambda d: d.update(envelopes=["inverse", "cubic"]), "envelopes"),
    (lambda d: d["coefficients_nT"][1].pop(), "coefficients_nT[1]"),
    (lambda d: d.update(noise_nT=[[0.1, "x"]] * len(d["noise_levels_nT"])), "noise_nT"),
    (lambda d: d.update(noise_levels_nT=list(reversed(d["noise_levels_nT"]))), "noise_levels_nT"),
    (lambda d: d.update(gamma_hz_per_nT=[7.0]), "gamma_hz_per_nT"),
    (lambda d: d.update(reference_nT=float("nan")), "reference_nT"),
    (lambda d: d.update(degrees=[3, True]), "degrees"),
    (lambda d: d["unit_covariance_upper"][0].pop(), "unit_covariance_upper[0]"),
    (lambda d: d.pop("unit_covariance_upper"), "unit_covariance_upper"),
])
def test_malformed_model_is_refused_naming_the_key(realistic_model, edit, key):
    doc = json.loads(json.dumps(realistic_model.to_dict()))
    edit(doc)
    with pytest.raises(ValueError, match=rf"magnitude_model\.{key.replace('[', '.').replace(']', '.')}"):
        MagnitudeModel.from_dict(doc)


def test_few_levels_keep_what_the_scan_can_separate():
    cfg = dataclasses.replace(default_config(2), **REALISTIC)
    for levels, expected in (((50000.0,), ("constant",)), ((20000.0, 50000.0), ("constant", "square")),
                             ((1000.0, 2000.0), ("inverse", "constant"))):
        u = np.vstack([_sphere(200, 100 + k) for k in range(len(levels))])
        b = np.repeat(np.array(levels), 200)
        model = fit_magnitude_model(u, b, locked_hz(cell_rates(cfg, u, b)), GAMMAS)
        assert model.envelopes == expected
        ut = _sphere(300, 7)
        bt = np.full(300, levels[-1])
        assert np.sqrt(np.mean((model.correct(locked_hz(cell_rates(cfg, ut, bt)), ut)[0] - bt) ** 2)) < 0.01


def test_continuous_sweep_is_cut_into_levels():
    cfg = dataclasses.replace(default_config(2), **REALISTIC)
    b = np.exp(np.random.default_rng(3).uniform(np.log(1000.0), np.log(50000.0), 1200))
    u = _sphere(1200, 110)
    model = fit_magnitude_model(u, b, locked_hz(cell_rates(cfg, u, b)), GAMMAS)
    assert model.envelopes == ("inverse", "constant", "square") and model.noise_levels_nT.size == 8
    ut = _sphere(300, 8)
    for level in (1000.0, 7000.0, 50000.0):
        bt = np.full(300, level)
        err = model.correct(locked_hz(cell_rates(cfg, ut, bt)), ut)[0] - bt
        assert np.sqrt(np.mean(err ** 2)) < 0.01


def test_bad_arguments_are_refused():
    u = _sphere(50, 1)
    b = np.full(50, 1000.0)
    f = b[:, None] * GAMMAS
    with pytest.raises(ValueError, match="expected u"):
        fit_magnitude_model(u, b[:10], f, GAMMAS)
    with pytest.raises(ValueError, match="gammas"):
        fit_magnitude_model(u, b, f, [7.0, -1.0])
    with pytest.raises(ValueError, match="too few"):
        fit_magnitude_model(u, b, f, GAMMAS, degree=6)
    model = fit_magnitude_model(u, b, f, GAMMAS)
    with pytest.raises(ValueError, match="u_cov"):
        model.estimate(f, u, np.ones((50, 2)))
