"""Closed-form covariance algebra of the tracker's plain error state, in Python floats.

The plain state (no drift states) is the direction error d (2, tangent basis e1, e2, rad) and the
angular velocity w (3, sensor frame, rad/s). Its symmetric 5x5 covariance is carried as 15 floats,
block by block:

    P = [[Pdd, Pdw], [Pwd, Pww]],   pp = (d00, d01, d11,  c0x, c0y, c0z,  c1x, c1y, c1z,
                                          wxx, wxy, wxz, wyy, wyz, wzz)

with c0, c1 the rows of Pdw. Every step of the filter is written out for these blocks: the same
equations as the matrix path of estimator/tracker.py (prediction F P F^T + Q, information-form
gain, Joseph update, chart change, positive-definiteness check), at a few hundred float
operations per sample instead of a dozen small-matrix library calls. tests/test_tracker.py checks
each function against the matrix form.
"""

from __future__ import annotations

import math

import numpy as np

_INF = math.inf
_PLAIN_INDEX = ((0, 0), (0, 1), (1, 1), (0, 2), (0, 3), (0, 4), (1, 2), (1, 3), (1, 4),
                (2, 2), (2, 3), (2, 4), (3, 3), (3, 4), (4, 4))


def to_matrix(pp) -> np.ndarray:
    """Return the symmetric 5x5 covariance (rad, rad/s) from its 15 plain entries."""
    p = np.empty((5, 5))
    for value, (i, j) in zip(pp, _PLAIN_INDEX):
        p[i, j] = p[j, i] = value
    return p


def from_matrix(p: np.ndarray) -> tuple:
    """Return the 15 plain entries (upper triangle, block order) of a 5x5 covariance."""
    return tuple(float(p[i, j]) for i, j in _PLAIN_INDEX)


def initial(cov, rate_var: float) -> tuple:
    """Return the plain covariance at acquisition: direction block cov (2x2 rad^2), rates rate_var (rad/s)^2 each."""
    return (float(cov[0][0]), float(cov[0][1]), float(cov[1][1]), 0.0, 0.0, 0.0, 0.0, 0.0, 0.0,
            rate_var, 0.0, 0.0, rate_var, 0.0, rate_var)


def predict(pp, e1, e2, dt: float, qd: float, qc: float, qw: float) -> tuple:
    """Return F P F^T + Q over dt (s) with F = I + dt [[0, B], [0, 0]], B = [e2; -e1] (rate_coupling).

    Q = [[qd I, qc B], [qc B^T, qw I]] (process_noise_static and its cross factor).
    """
    (ax, ay, az), (bx, by, bz) = e1, e2
    p00, p01, p11, c0x, c0y, c0z, c1x, c1y, c1z, wxx, wxy, wxz, wyy, wyz, wzz = pp
    # Rows of B: beta0 = e2, beta1 = -e1; g_i = beta_i Pww, s_ij = beta_i . c_j.
    g0x, g0y, g0z = bx * wxx + by * wxy + bz * wxz, bx * wxy + by * wyy + bz * wyz, bx * wxz + by * wyz + bz * wzz
    g1x = -(ax * wxx + ay * wxy + az * wxz)
    g1y = -(ax * wxy + ay * wyy + az * wyz)
    g1z = -(ax * wxz + ay * wyz + az * wzz)
    s00 = bx * c0x + by * c0y + bz * c0z
    s01 = bx * c1x + by * c1y + bz * c1z
    s10 = -(ax * c0x + ay * c0y + az * c0z)
    s11 = -(ax * c1x + ay * c1y + az * c1z)
    dt2 = dt * dt
    return (p00 + 2.0 * dt * s00 + dt2 * (g0x * bx + g0y * by + g0z * bz) + qd,
            p01 + dt * (s01 + s10) - dt2 * (g0x * ax + g0y * ay + g0z * az),
            p11 + 2.0 * dt * s11 - dt2 * (g1x * ax + g1y * ay + g1z * az) + qd,
            c0x + dt * g0x + qc * bx, c0y + dt * g0y + qc * by, c0z + dt * g0z + qc * bz,
            c1x + dt * g1x - qc * ax, c1y + dt * g1y - qc * ay, c1z + dt * g1z - qc * az,
            wxx + qw, wxy, wxz, wyy + qw, wyz, wzz + qw)


def gain(pp, j00: float, j01: float, j11: float):
    """Return (m0, m1): the rows of M^T = (I + Pdd J)^-1 P[d, :] (5 floats each), or None if I + Pdd J is singular.

    J = [[j00, j01], [j01, j11]] is the whitened information H^T R^-1 H of the direction; the
    Kalman gain is K = M H^T R^-1 and the correction dx = b0 m0 + b1 m1 with b = H^T R^-1 y.
    """
    p00, p01, p11, c0x, c0y, c0z, c1x, c1y, c1z = pp[:9]
    a00, a01 = 1.0 + p00 * j00 + p01 * j01, p00 * j01 + p01 * j11
    a10, a11 = p01 * j00 + p11 * j01, 1.0 + p01 * j01 + p11 * j11
    det = a00 * a11 - a01 * a10
    if not 0.0 < det < _INF:          # det(I + P J) >= 1 for P, J positive semi-definite
        return None
    i00, i01, i10, i11 = a11 / det, -a01 / det, -a10 / det, a00 / det
    return ((i00 * p00 + i01 * p01, i00 * p01 + i01 * p11, i00 * c0x + i01 * c1x, i00 * c0y + i01 * c1y,
             i00 * c0z + i01 * c1z),
            (i10 * p00 + i11 * p01, i10 * p01 + i11 * p11, i10 * c0x + i11 * c1x, i10 * c0y + i11 * c1y,
             i10 * c0z + i11 * c1z))


def drop_weak_direction(m0, m1, j00: float, j01: float, j11: float, e1, e2) -> tuple:
    """Return (m0, m1) times the weak-direction filter T (see tracker.weak_direction_filter)."""
    theta = 0.5 * math.atan2(j01, 0.5 * (j00 - j11))      # angle of the strong eigenvector
    vx, vy = -math.sin(theta), math.cos(theta)               # weak direction, tangent coordinates
    (ax, ay, az), (bx, by, bz) = e1, e2
    wx, wy, wz = vx * bx - vy * ax, vx * by - vy * ay, vx * bz - vy * az   # B^T v
    out = []
    for r in (m0, m1):
        rd = r[0] * vx + r[1] * vy
        rw = r[2] * wx + r[3] * wy + r[4] * wz
        out.append((r[0] - rd * vx, r[1] - rd * vy, r[2] - rw * wx, r[3] - rw * wy, r[4] - rw * wz))
    return out[0], out[1]


def joseph(pp, m0, m1, j00: float, j01: float, j11: float) -> tuple:
    """Return the Joseph-form update (I - KH) P (I - KH)^T + K R K^T for the gain rows m0, m1 (any gain).

    With M = (m0, m1)^T (5x2), KH = A S where A = M J and S selects the direction, and K R K^T = A M^T;
    written per block with N = I - A_d:
    Pdd+ = N Pdd N^T + A_d M_d^T, Pdw+ = N (Pdw - Pdd A_w^T) + A_d M_w^T,
    Pww+ = Pww - A_w Pdw - (A_w Pdw)^T + A_w Pdd A_w^T + A_w M_w^T. The upper triangle is kept.
    """
    p00, p01, p11, c0x, c0y, c0z, c1x, c1y, c1z, wxx, wxy, wxz, wyy, wyz, wzz = pp
    m00, m01, m0x, m0y, m0z = m0
    m10, m11, m1x, m1y, m1z = m1
    # A = M J, one row (2 floats) per state.
    d00, d01 = m00 * j00 + m10 * j01, m00 * j01 + m10 * j11
    d10, d11 = m01 * j00 + m11 * j01, m01 * j01 + m11 * j11
    x0, x1 = m0x * j00 + m1x * j01, m0x * j01 + m1x * j11
    y0, y1 = m0y * j00 + m1y * j01, m0y * j01 + m1y * j11
    z0, z1 = m0z * j00 + m1z * j01, m0z * j01 + m1z * j11
    n00, n01, n10, n11 = 1.0 - d00, -d01, -d10, 1.0 - d11
    q00, q01 = n00 * p00 + n01 * p01, n00 * p01 + n01 * p11
    q10, q11 = n10 * p00 + n11 * p01, n10 * p01 + n11 * p11
    # Pdw - Pdd A_w^T, per rate component.
    u0x, u1x = c0x - (p00 * x0 + p01 * x1), c1x - (p01 * x0 + p11 * x1)
    u0y, u1y = c0y - (p00 * y0 + p01 * y1), c1y - (p01 * y0 + p11 * y1)
    u0z, u1z = c0z - (p00 * z0 + p01 * z1), c1z - (p01 * z0 + p11 * z1)
    # A_w Pdd, per rate component.
    vx0, vx1 = x0 * p00 + x1 * p01, x0 * p01 + x1 * p11
    vy0, vy1 = y0 * p00 + y1 * p01, y0 * p01 + y1 * p11
    vz0, vz1 = z0 * p00 + z1 * p01, z0 * p01 + z1 * p11
    # A_w Pdw (3x3, all entries: row = A's rate component, column = Pdw's).
    hxx, hxy, hxz = x0 * c0x + x1 * c1x, x0 * c0y + x1 * c1y, x0 * c0z + x1 * c1z
    hyx, hyy, hyz = y0 * c0x + y1 * c1x, y0 * c0y + y1 * c1y, y0 * c0z + y1 * c1z
    hzx, hzy, hzz = z0 * c0x + z1 * c1x, z0 * c0y + z1 * c1y, z0 * c0z + z1 * c1z
    return (q00 * n00 + q01 * n01 + d00 * m00 + d01 * m10,
            q00 * n10 + q01 * n11 + d00 * m01 + d01 * m11,
            q10 * n10 + q11 * n11 + d10 * m01 + d11 * m11,
            n00 * u0x + n01 * u1x + d00 * m0x + d01 * m1x,
            n00 * u0y + n01 * u1y + d00 * m0y + d01 * m1y,
            n00 * u0z + n01 * u1z + d00 * m0z + d01 * m1z,
            n10 * u0x + n11 * u1x + d10 * m0x + d11 * m1x,
            n10 * u0y + n11 * u1y + d10 * m0y + d11 * m1y,
            n10 * u0z + n11 * u1z + d10 * m0z + d11 * m1z,
            wxx - 2.0 * hxx + vx0 * x0 + vx1 * x1 + x0 * m0x + x1 * m1x,
            wxy - hxy - hyx + vx0 * y0 + vx1 * y1 + x0 * m0y + x1 * m1y,
            wxz - hxz - hzx + vx0 * z0 + vx1 * z1 + x0 * m0z + x1 * m1z,
            wyy - 2.0 * hyy + vy0 * y0 + vy1 * y1 + y0 * m0y + y1 * m1y,
            wyz - hyz - hzy + vy0 * z0 + vy1 * z1 + y0 * m0z + y1 * m1z,
            wzz - 2.0 * hzz + vz0 * z0 + vz1 * z1 + z0 * m0z + z1 * m1z)


def chart_change(pp, g00: float, g01: float, g11: float) -> tuple:
    """Return P with the direction rows and columns mapped by the symmetric 2x2 G: Pdd -> G Pdd G^T, Pdw -> G Pdw."""
    p00, p01, p11, c0x, c0y, c0z, c1x, c1y, c1z = pp[:9]
    t00, t01 = g00 * p00 + g01 * p01, g00 * p01 + g01 * p11
    t10, t11 = g01 * p00 + g11 * p01, g01 * p01 + g11 * p11
    return (t00 * g00 + t01 * g01, t00 * g01 + t01 * g11, t10 * g01 + t11 * g11,
            g00 * c0x + g01 * c1x, g00 * c0y + g01 * c1y, g00 * c0z + g01 * c1z,
            g01 * c0x + g11 * c1x, g01 * c0y + g11 * c1y, g01 * c0z + g11 * c1z) + tuple(pp[9:])


def positive_definite(pp) -> bool:
    """Return True when the plain covariance is finite and positive definite (Sylvester, via the Schur complement)."""
    p00, p01, p11, c0x, c0y, c0z, c1x, c1y, c1z, wxx, wxy, wxz, wyy, wyz, wzz = pp
    det = p00 * p11 - p01 * p01
    if not (0.0 < p00 < _INF and 0.0 < det < _INF):
        return False
    # S = Pww - Pwd Pdd^-1 Pdw must be positive definite; h = Pdd^-1 Pdw per rate component.
    h0x, h1x = (p11 * c0x - p01 * c1x) / det, (p00 * c1x - p01 * c0x) / det
    h0y, h1y = (p11 * c0y - p01 * c1y) / det, (p00 * c1y - p01 * c0y) / det
    h0z, h1z = (p11 * c0z - p01 * c1z) / det, (p00 * c1z - p01 * c0z) / det
    sxx, sxy, sxz = wxx - (c0x * h0x + c1x * h1x), wxy - (c0x * h0y + c1x * h1y), wxz - (c0x * h0z + c1x * h1z)
    syy, syz = wyy - (c0y * h0y + c1y * h1y), wyz - (c0y * h0z + c1y * h1z)
    szz = wzz - (c0z * h0z + c1z * h1z)
    minor2 = sxx * syy - sxy * sxy
    det3 = sxx * (syy * szz - syz * syz) - sxy * (sxy * szz - syz * sxz) + sxz * (sxy * syz - syy * sxz)
    return 0.0 < sxx < _INF and 0.0 < minor2 < _INF and 0.0 < det3 < _INF
