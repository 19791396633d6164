"""The magnitude model's evaluation per sample, compiled: corrected |B| per isotope, fused |B| and their sigmas.

`estimate_rows` computes, row by row, what `MagnitudeModel.estimate` (estimator/magnitude_model.py,
whose docstring has the equations) returns: each isotope's equation f_i / gamma_i = |B| + delta_i(u, |B|)
solved by Newton steps from |B| = f_i / gamma_i, the frequency noise (interpolated in ln|B|) with the
fitted delta's own prediction variance, the direction's uncertainty through the tangent gradient of
delta, the sphere-mean correction and its spread where the direction is unknown, inverse-variance
fusion and the isotopes' difference's sigma. The live loop estimates a few samples per call, where
numpy's per-call overhead of many tiny array operations was most of the cost; here one call walks
the rows once. Compiled by numba like estimator/filter_core.py (fieldvane/kernels.py: ahead of time at
install, or by the JIT).

Harmonics: Y_k(u) = sum_j mono_j(u) T[j, k] with the monomials of estimator/monomials.py and T from
estimator/harmonics.monomial_coefficients; the ambient gradient dY_k/du from the monomials' gradients.
"""

from __future__ import annotations

import math

import numpy as np
from fieldvane.estimator.filter_core import J_FLAGS, O_SIGMA, O_UX, O_UY, O_UZ
from fieldvane.kernels import entry, helper

# Envelope codes (magnitude_model.ENVELOPES, in order) and the kinds of direction uncertainty.
INVERSE, CONSTANT, SQUARE = 0, 1, 2
U_EXACT, U_SIGMA, U_COVARIANCE = 0, 1, 2

# Output columns of estimate_rows.
OUT_B, OUT_B_ISO, OUT_SIGMA_B, OUT_SIGMA_ISO, OUT_SIGMA_DIFF, OUT_W = 0, 1, 3, 4, 6, 7

Y00 = 1.0 / math.sqrt(4 * math.pi)
FOUR_PI = 4 * math.pi


_NO_SIGMA = np.empty(0)              # estimate_rows' unused direction-uncertainty arguments (never read)
_NO_COVARIANCE = np.empty((0, 3, 3))


def direction_uncertainty(u_cov, n: int) -> tuple[int, np.ndarray, np.ndarray]:
    """Return (U_* kind, sigmas (N,) rad, covariances (N, 3, 3) rad^2; the unused one empty) from u_cov for N rows.

    u_cov: None, a total angular sigma (rad), (N,) sigmas or (N, 3, 3) covariances; a non-finite
    entry means the direction's uncertainty is unknown on that row.
    """
    if u_cov is None:
        return U_EXACT, _NO_SIGMA, _NO_COVARIANCE
    c = np.asarray(u_cov, float)
    if c.ndim == 0 or c.shape == (n,):
        sigma = np.full(n, float(c)) if c.ndim == 0 else np.require(c, np.float64, "CW")
        if (sigma < 0).any():
            raise ValueError("u_cov: angular sigma must be >= 0 rad")
        return U_SIGMA, sigma, _NO_COVARIANCE
    if c.shape == (n, 3, 3):
        return U_COVARIANCE, _NO_SIGMA, np.require(c, np.float64, "CW")
    raise ValueError(f"u_cov: expected None, a sigma (rad), ({n},) sigmas or ({n}, 3, 3) covariances, "
                     f"got shape {c.shape}")


# error_model="numpy": divisions and roots of non-finite or zero values give inf/nan as the numpy code did
# (the Python error model would raise ZeroDivisionError instead). The rows are walked in one function called once
# (correct_rows calls it too), with no helper per row: a helper taking arrays costs reference-count updates per
# call, which were most of the time per row.
@entry("f8[:, ::1](f8[:, ::1], f8[:, ::1], i8, f8[::1], f8[:, :, ::1], f8[::1], i8[::1], f8, i8[::1], "
       "f8[:, :, ::1], f8[:, :, ::1], i8[:, ::1], f8[:, :, ::1], f8[::1], f8[:, ::1], i8)",
       cache=True, nogil=True, error_model="numpy")
def estimate_rows(f, u_in, mode, sigma, cov_in, gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm,
                  log_levels, noise, newton_steps):
    """Return (N, 9) columns OUT_*: |B|, per isotope (2), sigma_b, per-isotope sigma (2), sigma of the difference (nT),
    fusion weights (2), from frequencies f (N, 2) Hz and directions u_in (N, 3), sensor frame.

    mode: U_EXACT, U_SIGMA (sigma (N,) total angular 1-sigma, rad) or U_COVARIANCE (cov_in (N, 3, 3), rad^2).
    Model arrays, zero-padded per isotope i: degrees[i] = L_i, K_i = (L_i+1)^2 harmonics; coef (2, n_env, K) nT;
    unit_cov (2, P, P) with P_i = n_env K_i (e-major); to_harm (2, M, K) monomials to harmonics
    (harmonics.monomial_coefficients); exps (M, 3) the monomial exponents by total degree (monomials.exponents of
    max L_i); noise (L, 2) nT at log_levels (L,) ln(nT); codes (n_env,) INVERSE, CONSTANT or SQUARE.
    """
    return _estimate_rows(f, u_in, mode, sigma, cov_in, gammas, codes, reference, degrees, coef, unit_cov, exps,
                          to_harm, log_levels, noise, newton_steps)


@helper(cache=True, nogil=True, error_model="numpy")
def _estimate_rows(f, u_in, mode, sigma, cov_in, gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm,
                   log_levels, noise, newton_steps):
    """estimate_rows' body (correct_rows calls it too)."""
    n = f.shape[0]
    n_env = codes.shape[0]
    k_max = coef.shape[2]
    m_max = exps.shape[0]
    deg = 0
    for j in range(m_max):
        for a in range(3):
            deg = max(deg, exps[j, a])
    out = np.empty((n, 9))      # one array: boxing each returned array costs the caller about 0.3 us
    pw = np.empty((3, deg + 1))
    mono = np.empty(m_max)
    dmono = np.empty((3, m_max))
    y = np.zeros((2, k_max))
    gy = np.zeros((2, 3, k_max))
    c = np.zeros((2, k_max))
    a_env = np.empty(n_env)
    env = np.empty(n_env)
    denv = np.empty(n_env)
    x = np.empty(n_env * k_max)
    xu = np.empty(n_env * k_max)
    u = np.empty(3)
    g = np.empty(3)
    cov = np.zeros((3, 3))
    grads = np.empty((2, 3))
    s = np.empty((2, 2))
    var_f = np.empty(2)
    spread = np.empty(2)
    ok = np.empty(2, np.bool_)
    for r in range(n):
        # Direction and its uncertainty; a non-finite u or uncertainty means the direction is unknown.
        norm_u = math.sqrt(u_in[r, 0] * u_in[r, 0] + u_in[r, 1] * u_in[r, 1] + u_in[r, 2] * u_in[r, 2])
        known = math.isfinite(norm_u) and norm_u > 0
        for a in range(3):
            u[a] = u_in[r, a] / norm_u if known else 0.0
        if mode == U_SIGMA:
            unknown_cov = not math.isfinite(sigma[r])
            half = 0.0 if unknown_cov else sigma[r] ** 2 / 2
            for a in range(3):
                for e in range(3):
                    cov[a, e] = half * ((1.0 if a == e else 0.0) - u[a] * u[e])
            known = known and not unknown_cov
        elif mode == U_COVARIANCE:
            unknown_cov = False
            for a in range(3):
                for e in range(3):
                    if not math.isfinite(cov_in[r, a, e]):
                        unknown_cov = True
            for a in range(3):
                for e in range(3):
                    cov[a, e] = 0.0 if unknown_cov else cov_in[r, a, e]
            known = known and not unknown_cov
        have_harmonics = False
        computed = -1      # the degree of the harmonics isotope 0 evaluated on this row
        for i in range(2):
            m = f[r, i] / gammas[i]
            ok[i] = math.isfinite(m) and m > 0
            out[r, OUT_B_ISO + i] = np.nan
            var_f[i] = np.inf
            spread[i] = 0.0
            for a in range(3):
                grads[i, a] = 0.0
            if not ok[i]:
                continue
            kh = (degrees[i] + 1) ** 2
            if known:
                if not have_harmonics:
                    # Powers, monomials and their ambient gradients (estimator/monomials.py), once per row.
                    for a in range(3):
                        pw[a, 0] = 1.0
                        for e in range(1, deg + 1):
                            pw[a, e] = pw[a, e - 1] * u[a]
                    for j in range(m_max):
                        ex, ey, ez = exps[j, 0], exps[j, 1], exps[j, 2]
                        px, py, pz = pw[0, ex], pw[1, ey], pw[2, ez]
                        mono[j] = px * py * pz
                        dmono[0, j] = ex * pw[0, max(ex - 1, 0)] * py * pz
                        dmono[1, j] = px * (ey * pw[1, max(ey - 1, 0)]) * pz
                        dmono[2, j] = px * py * (ez * pw[2, max(ez - 1, 0)])
                    have_harmonics = True
                if i == 1 and computed == degrees[1]:
                    # The same degree as isotope 0: the same harmonics (one table T per degree).
                    for k in range(kh):
                        y[1, k] = y[0, k]
                        for a in range(3):
                            gy[1, a, k] = gy[0, a, k]
                else:
                    # Y = mono @ T, dY/du = dmono @ T, block by block: the degree-l harmonics are polynomials in
                    # the degree-l monomials only (harmonics.monomial_coefficients), T is zero elsewhere.
                    for k in range(kh):
                        y[i, k] = 0.0
                        for a in range(3):
                            gy[i, a, k] = 0.0
                    for l in range(degrees[i] + 1):
                        for j in range(l * (l + 1) * (l + 2) // 6, (l + 1) * (l + 2) * (l + 3) // 6):
                            mj, d0, d1, d2 = mono[j], dmono[0, j], dmono[1, j], dmono[2, j]
                            for k in range(l * l, (l + 1) * (l + 1)):
                                t = to_harm[i, j, k]
                                y[i, k] += mj * t
                                gy[i, 0, k] += d0 * t
                                gy[i, 1, k] += d1 * t
                                gy[i, 2, k] += d2 * t
                    if i == 0:
                        computed = degrees[0]
            # delta(u, b) = sum_e E_e(b) a_e with a_e = sum_k C[e, k] Y_k(u), or the sphere mean C[e, 0] Y_00 where u
            # is unknown: the Newton steps on b + delta(u, b) = m then cost n_env terms each.
            for e in range(n_env):
                if known:
                    ae = 0.0
                    for k in range(kh):
                        ae += coef[i, e, k] * y[i, k]
                    a_env[e] = ae
                else:
                    a_env[e] = coef[i, e, 0] * Y00
            b = m
            d = 0.0
            dd = 0.0
            for step in range(newton_steps + 1):
                xb = b / reference
                d = 0.0
                dd = 0.0
                for e in range(n_env):
                    if codes[e] == INVERSE:
                        env[e] = 1.0 / xb
                        denv[e] = -1.0 / (xb * xb * reference)
                    elif codes[e] == CONSTANT:
                        env[e] = 1.0
                        denv[e] = 0.0
                    else:
                        env[e] = xb * xb
                        denv[e] = 2.0 * xb / reference
                    d += env[e] * a_env[e]
                    dd += denv[e] * a_env[e]
                if step < newton_steps:
                    b = b - (b + d - m) / (1.0 + dd)
            # The harmonic coefficients sum_e E_e(b) C[e, k] at the solution.
            for k in range(kh):
                c[i, k] = 0.0
            for e in range(n_env):
                for k in range(kh):
                    c[i, k] += env[e] * coef[i, e, k]
            slope = 1.0 + dd
            out[r, OUT_B_ISO + i] = b
            pred = 0.0
            if known:
                # Tangent gradient of delta (nT/rad) and the ordinary least-squares prediction variance x^T U x.
                for a in range(3):
                    ga = 0.0
                    for k in range(kh):
                        ga += c[i, k] * gy[i, a, k]
                    g[a] = ga
                radial = g[0] * u[0] + g[1] * u[1] + g[2] * u[2]
                for a in range(3):
                    grads[i, a] = (g[a] - radial * u[a]) / slope
                p = n_env * kh
                for e in range(n_env):
                    for k in range(kh):
                        x[e * kh + k] = env[e] * y[i, k]
                # (x @ U) accumulated row by row of U (each entry summed in the same order; the q loop vectorizes,
                # a loop over the upper triangle only did not and was slower).
                for q in range(p):
                    xu[q] = 0.0
                for o in range(p):
                    xo = x[o]
                    for q in range(p):
                        xu[q] += xo * unit_cov[i, o, q]
                for q in range(p):
                    pred += xu[q] * x[q]
            else:
                # Unknown direction: the l >= 1 power over the sphere is the error.
                power = 0.0
                for k in range(1, kh):
                    power += c[i, k] ** 2
                spread[i] = power / FOUR_PI / slope ** 2
            lb = math.log(b) if (math.isfinite(b) and b > 0) else log_levels[0]
            # b_i = m_i - delta_i(u, b_i): an error e in m_i or in delta_i moves b_i by e / slope.
            # The frequency noise at b, interpolated in ln|B| (clamped at the ends) as MagnitudeModel.noise does.
            level_noise = np.interp(lb, log_levels, noise[:, i])
            var_f[i] = level_noise ** 2 * (1.0 + pred) / slope ** 2
        # S = diag(frequency noise) + G C G^T + the sphere covariance where the direction is unknown.
        s[0, 0] = var_f[0]
        s[1, 1] = var_f[1]
        s[0, 1] = 0.0
        s[1, 0] = 0.0
        if mode != U_EXACT:
            for a in range(2):
                for e in range(2):
                    acc = 0.0
                    for p1 in range(3):
                        for p2 in range(3):
                            acc += grads[a, p1] * cov[p1, p2] * grads[e, p2]
                    s[a, e] += acc
        if not known and ok[0] and ok[1]:
            k0 = (degrees[0] + 1) ** 2
            k1 = (degrees[1] + 1) ** 2
            s00 = 0.0
            s11 = 0.0
            s01 = 0.0
            for k in range(1, k0):
                s00 += c[0, k] ** 2
            for k in range(1, k1):
                s11 += c[1, k] ** 2
            for k in range(1, min(k0, k1)):
                s01 += c[0, k] * c[1, k]
            s[0, 0] += s00 / FOUR_PI
            s[1, 1] += s11 / FOUR_PI
            s[0, 1] += s01 / FOUR_PI
            s[1, 0] += s01 / FOUR_PI
        if not known and ok[0] and not ok[1]:
            s[0, 0] += spread[0]
        if not known and ok[1] and not ok[0]:
            s[1, 1] += spread[1]
        # Inverse-variance fusion; w^T S w and the difference's variance from the finite part of S.
        total = 0.0
        for i in range(2):
            v = s[i, i]
            if v < 1e-300:      # (a nan stays nan, as numpy.maximum)
                v = 1e-300
            out[r, OUT_W + i] = 1.0 / v if ok[i] else 0.0
            total += out[r, OUT_W + i]
        fused = 0.0
        for i in range(2):
            out[r, OUT_W + i] = out[r, OUT_W + i] / total if total > 0 else 0.0
            term = out[r, OUT_W + i] * (out[r, OUT_B_ISO + i] if ok[i] else 0.0)
            if not math.isnan(term):
                fused += term
            out[r, OUT_SIGMA_ISO + i] = math.sqrt(s[i, i]) if ok[i] else np.nan
        for a in range(2):
            for e in range(2):
                if not math.isfinite(s[a, e]):
                    s[a, e] = 0.0
        var_b = 0.0
        for a in range(2):
            for e in range(2):
                var_b += out[r, OUT_W + a] * s[a, e] * out[r, OUT_W + e]
        var_d = s[0, 0] + s[1, 1] - 2 * s[0, 1]
        any_ok = ok[0] or ok[1]
        out[r, OUT_B] = fused if any_ok else np.nan
        out[r, OUT_SIGMA_B] = math.sqrt(var_b) if any_ok else np.nan
        out[r, OUT_SIGMA_DIFF] = math.sqrt(var_d) if (ok[0] and ok[1]) else np.nan
    return out


# ============================================================================ the tracker's rows, corrected in place
# Signatures of the tracker's rows: b (N,) nT, per (N, 2) nT and flags (N,) in and out, sigma_b (N,) nT out.
_ROWS = "f8, f8, i8, f8[::1], f8[:, ::1], i8[::1], f8[::1]"


@helper(cache=True, nogil=True, inline="always", error_model="numpy")
def _apply_row(r, pa, pb, fused, sigma_b, sigma_diff, tolerance, n_sigma, bit, b, per, flags, sigma_b_out):
    """Row r of the tracker's outputs from the corrected isotopes pa, pb, fused |B|, sigma_b and the sigma of their
    difference (nT): estimator/magnitude.py's `disagreement` rule on them (tests/test_magnitude_knots.py compares this
    with the rule stated in numpy, bit for bit)."""
    good = math.isfinite(fused)
    if good:
        b[r] = fused
    if math.isfinite(pa):
        per[r, 0] = pa
    if math.isfinite(pb):
        per[r, 1] = pb
    diff = abs(pa - pb)
    floor = tolerance * abs((pa + pb) / 2)          # numpy's mean of two
    limit = floor
    if math.isfinite(sigma_diff):
        scaled = n_sigma * sigma_diff
        if scaled > floor:
            limit = scaled
        if floor != floor:                          # numpy.maximum keeps a nan
            limit = floor
    if good:
        disagree = math.isfinite(diff) and diff > limit
        flags[r] = (flags[r] & ~bit) | (bit if disagree else 0)
        sigma_b_out[r] = sigma_b
    else:
        sigma_b_out[r] = np.nan


@entry("i8(f8[:, ::1], f8[::1], f8[::1], f8[::1], " + _ROWS + ")", cache=True, nogil=True, error_model="numpy")
def apply_corrections(per_c, fused, sigma_b, sigma_diff, tolerance, n_sigma, bit, b, per, flags, sigma_b_out):
    """Correct the tracker's rows in place from the magnitude model's per isotope (N, 2), fused |B|, sigma_b and the
    sigma of the isotopes' difference (N,) nT (interpolated between knots); return N."""
    n = per_c.shape[0]
    for r in range(n):
        _apply_row(r, per_c[r, 0], per_c[r, 1], fused[r], sigma_b[r], sigma_diff[r], tolerance, n_sigma, bit, b, per,
                   flags, sigma_b_out)
    return n


@helper(cache=True, nogil=True, error_model="numpy")
def _correct_rows(gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm, log_levels, noise, newton_steps,
                  f, u, sigma_deg, tolerance, n_sigma, bit, b, per, flags, sigma_b_out):
    """correct_rows' body (its arguments)."""
    n = f.shape[0]
    sigma = np.empty(n)
    for r in range(n):
        sigma[r] = sigma_deg[r] * (math.pi / 180.0)          # numpy.radians
    out = _estimate_rows(f, u, U_SIGMA, sigma, np.empty((0, 3, 3)), gammas, codes, reference, degrees, coef,
                        unit_cov, exps, to_harm, log_levels, noise, newton_steps)
    for r in range(n):
        _apply_row(r, out[r, OUT_B_ISO], out[r, OUT_B_ISO + 1], out[r, OUT_B], out[r, OUT_SIGMA_B],
                   out[r, OUT_SIGMA_DIFF], tolerance, n_sigma, bit, b, per, flags, sigma_b_out)
    return n


_MODEL = "f8[::1], i8[::1], f8, i8[::1], f8[:, :, ::1], f8[:, :, ::1], i8[:, ::1], f8[:, :, ::1], f8[::1], f8[:, ::1], i8, "


@entry("i8(" + _MODEL + "f8[:, ::1], f8[:, ::1], f8[::1], " + _ROWS + ")", cache=True, nogil=True, error_model="numpy")
def correct_rows(gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm, log_levels, noise, newton_steps,
                 f, u, sigma_deg, tolerance, n_sigma, bit, b, per, flags, sigma_b_out):
    """Correct the tracker's rows in place by the magnitude model (its arrays first, as estimate_rows takes them) at
    frequencies f (N, 2) Hz, directions u (N, 3) sensor frame with total angular 1-sigma sigma_deg (N,) deg, each
    sample evaluated (a live batch); return N."""
    return _correct_rows(gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm, log_levels, noise,
                         newton_steps, f, u, sigma_deg, tolerance, n_sigma, bit, b, per, flags, sigma_b_out)


@entry("i8(" + _MODEL + "f8[:, ::1], f8[:, ::1], i8[:, ::1], f8, f8, i8, f8[::1], f8[:, ::1], f8[::1])", cache=True,
       nogil=True, error_model="numpy")
def correct_core_rows(gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm, log_levels, noise,
                      newton_steps, f, fout, iout, tolerance, n_sigma, bit, b, per, sigma_b_out):
    """correct_rows on the filter core's own outputs: u, sigma and flags read from fout (N, N_FOUT) and iout
    (N, N_IOUT) (estimator/filter_core.py's O_* and J_* columns), the flags corrected in iout; return N."""
    n = f.shape[0]
    u = np.empty((n, 3))
    sigma_deg = np.empty(n)
    flags = np.empty(n, np.int64)
    for r in range(n):
        u[r, 0], u[r, 1], u[r, 2] = fout[r, O_UX], fout[r, O_UY], fout[r, O_UZ]
        sigma_deg[r] = fout[r, O_SIGMA]
        flags[r] = iout[r, J_FLAGS]
    _correct_rows(gammas, codes, reference, degrees, coef, unit_cov, exps, to_harm, log_levels, noise, newton_steps,
                  f, u, sigma_deg, tolerance, n_sigma, bit, b, per, flags, sigma_b_out)
    for r in range(n):
        iout[r, J_FLAGS] = flags[r]
    return n
