"""Frames and geomagnetic elements: sensor -> platform -> local North-East-Down, X Y Z H F D I and their sigmas.

Frames (all right-handed):
- sensor: the frame the calibration and the tracker work in.
- platform: the body the sensor is bolted to (pier, mast, drone, vehicle). The mounting rotation M
  takes sensor-frame vectors to platform-frame vectors: v_platform = M v_sensor.
- NED: local geographic North-East-Down at the site. The attitude A takes platform-frame vectors
  to NED: v_ned = A v_platform. From heading/pitch/roll (aerospace z-y-x order, platform x forward,
  y right, z down): A = Rz(heading) Ry(pitch) Rx(roll).

Geomagnetic elements from a NED field vector (X north, Y east, Z down, nT): H = sqrt(X^2 + Y^2),
F = |B|, D = atan2(Y, X) (east of north positive), I = atan2(Z, H) (down positive).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

ROTATION_TOLERANCE = 1e-4   # max |R R^T - I| accepted for a typed-in rotation matrix (4-5 printed digits)


def rotation_x(angle_rad) -> np.ndarray:
    """Return the rotation matrix (..., 3, 3) about x by angle_rad (right-hand rule)."""
    a = np.asarray(angle_rad, float)
    c, s = np.cos(a), np.sin(a)
    o, z = np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([o, z, z], -1), np.stack([z, c, -s], -1), np.stack([z, s, c], -1)], -2)


def rotation_y(angle_rad) -> np.ndarray:
    """Return the rotation matrix (..., 3, 3) about y by angle_rad (right-hand rule)."""
    a = np.asarray(angle_rad, float)
    c, s = np.cos(a), np.sin(a)
    o, z = np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([c, z, s], -1), np.stack([z, o, z], -1), np.stack([-s, z, c], -1)], -2)


def rotation_z(angle_rad) -> np.ndarray:
    """Return the rotation matrix (..., 3, 3) about z by angle_rad (right-hand rule)."""
    a = np.asarray(angle_rad, float)
    c, s = np.cos(a), np.sin(a)
    o, z = np.ones_like(a), np.zeros_like(a)
    return np.stack([np.stack([c, -s, z], -1), np.stack([s, c, z], -1), np.stack([z, z, o], -1)], -2)


def mounting_from_rotation_deg(rotation_deg) -> np.ndarray:
    """Return the sensor -> platform matrix (3, 3) of the sensor file's rotation_deg [rx, ry, rz]: Rz Ry Rx.

    "Rotate about x, then y, then z" (fixed platform axes), the convention of docs/config_files.md.
    """
    rx, ry, rz = np.radians(np.asarray(rotation_deg, float).reshape(3))
    return rotation_z(rz) @ rotation_y(ry) @ rotation_x(rx)


def attitude_matrix(heading_deg, pitch_deg, roll_deg) -> np.ndarray:
    """Return the platform -> NED matrix (..., 3, 3): Rz(heading) Ry(pitch) Rx(roll), angles in degrees.

    Heading: clockwise from geographic north seen from above; pitch: nose up positive; roll: right
    side down positive (aerospace z-y-x convention, platform x forward, y right, z down).
    """
    h, p, r = (np.radians(np.asarray(a, float)) for a in (heading_deg, pitch_deg, roll_deg))
    return rotation_z(h) @ rotation_y(p) @ rotation_x(r)


def attitude_angles_deg(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (heading, pitch, roll) in degrees of platform -> NED matrices (..., 3, 3); heading in [0, 360)."""
    m = np.asarray(matrix, float)
    pitch = np.degrees(np.arcsin(np.clip(-m[..., 2, 0], -1.0, 1.0)))
    heading = np.degrees(np.arctan2(m[..., 1, 0], m[..., 0, 0])) % 360.0
    roll = np.degrees(np.arctan2(m[..., 2, 1], m[..., 2, 2]))
    return heading, pitch, roll


def checked_rotation(matrix, tol: float = ROTATION_TOLERANCE) -> np.ndarray:
    """Return the proper rotation (3, 3) nearest to `matrix`; raise ValueError unless it is one within tol.

    Checks: 3x3 finite numbers, max |M M^T - I| <= tol (orthonormal rows), det > 0 (a rotation, not a
    reflection). The result is the orthogonal polar factor (SVD), so rounding in typed numbers is
    removed before use.
    """
    try:
        m = np.asarray(matrix, float)
    except (TypeError, ValueError):
        raise ValueError("expected a 3x3 matrix of numbers") from None
    if m.shape != (3, 3):
        raise ValueError(f"expected 3 rows of 3 numbers, got shape {m.shape}")
    if not np.all(np.isfinite(m)):
        raise ValueError("matrix has a non-finite entry")
    err = float(np.max(np.abs(m @ m.T - np.eye(3))))
    if err > tol:
        raise ValueError(f"not orthonormal: max |R R^T - I| = {err:.2g} (tolerance {tol:g})")
    if np.linalg.det(m) < 0:
        raise ValueError("determinant is -1: a reflection (left-handed), not a rotation")
    u, _, vt = np.linalg.svd(m)
    return u @ vt


def slerp_attitude(t_att, matrices, t) -> np.ndarray:
    """Return platform -> NED matrices (N, 3, 3) at times t (s), slerped between samples at t_att (s).

    Interpolation on the rotation group (scipy's Slerp: constant angular rate between samples).
    Times outside [t_att[0], t_att[-1]] get NaN matrices: the attitude there is unknown.
    """
    from scipy.spatial.transform import Rotation, Slerp

    t_att = np.asarray(t_att, float)
    t = np.atleast_1d(np.asarray(t, float))
    if t_att.ndim != 1 or t_att.size < 2:
        raise ValueError("need at least two attitude samples to interpolate")
    if not np.all(np.diff(t_att) > 0):
        raise ValueError("attitude times must be strictly increasing")
    rots = Rotation.from_matrix(np.asarray(matrices, float))
    out = np.full((t.size, 3, 3), np.nan)
    inside = np.isfinite(t) & (t >= t_att[0]) & (t <= t_att[-1])
    if np.any(inside):
        out[inside] = Slerp(t_att, rots)(t[inside]).as_matrix()
    return out


def sensor_to_ned(vectors, mounting, attitude) -> np.ndarray:
    """Return vectors (N, 3) in NED from sensor-frame vectors (N, 3): attitude @ mounting @ v.

    mounting: (3, 3) sensor -> platform; attitude: (3, 3) or (N, 3, 3) platform -> NED.
    """
    v = np.atleast_2d(np.asarray(vectors, float))
    total = np.asarray(attitude, float) @ np.asarray(mounting, float)
    if total.ndim == 2:
        return v @ total.T
    return np.einsum("nij,nj->ni", total, v)


@dataclass(frozen=True)
class Elements:
    """Geomagnetic elements per sample: X, Y, Z, H, F in nT (NED), D and I in degrees."""

    x_nT: np.ndarray
    y_nT: np.ndarray
    z_nT: np.ndarray
    h_nT: np.ndarray
    f_nT: np.ndarray
    d_deg: np.ndarray
    i_deg: np.ndarray


def elements(b_ned) -> Elements:
    """Return the geomagnetic elements of NED field vectors (N, 3) in nT; D in (-180, 180], I in [-90, 90]."""
    b = np.atleast_2d(np.asarray(b_ned, float))
    x, y, z = b[:, 0], b[:, 1], b[:, 2]
    h = np.hypot(x, y)
    f = np.sqrt(h * h + z * z)
    return Elements(x, y, z, h, f, np.degrees(np.arctan2(y, x)), np.degrees(np.arctan2(z, h)))


def tangent_covariance_3d(e1, e2, cov2) -> np.ndarray:
    """Return the direction covariance (N, 3, 3), rad^2, in the frame of e1, e2: E P E^T with E = [e1 e2].

    e1, e2: (N, 3) orthonormal tangent vectors at the direction; cov2: (N, 2, 2) in that basis (rad^2).
    """
    e = np.stack([np.atleast_2d(e1), np.atleast_2d(e2)], axis=-1)          # (N, 3, 2)
    return e @ np.asarray(cov2, float).reshape(-1, 2, 2) @ np.swapaxes(e, -1, -2)


def isotropic_covariance_3d(u, sigma_deg) -> np.ndarray:
    """Return the direction covariance (N, 3, 3), rad^2, of an isotropic 1-sigma angle sigma_deg at unit u.

    The tracker's sigma_deg is sqrt(trace P) of the 2x2 tangent covariance; spread evenly over the two
    tangent directions that is (sigma^2 / 2) (I - u u^T).
    """
    u = np.atleast_2d(np.asarray(u, float))
    s2 = np.radians(np.asarray(sigma_deg, float)).reshape(-1) ** 2 / 2.0
    proj = np.eye(3) - u[:, :, None] * u[:, None, :]
    return s2[:, None, None] * proj


@dataclass(frozen=True)
class ElementSigmas:
    """1-sigma uncertainties per sample: D and I in degrees, F in nT."""

    d_deg: np.ndarray
    i_deg: np.ndarray
    f_nT: np.ndarray


def attitude_jacobian(attitude, n_ned) -> np.ndarray:
    """Return d(n_ned)/d(heading, pitch, roll) (N, 3, 3), per radian, for platform -> NED matrices (N, 3, 3).

    A = Rz(h) Ry(p) Rx(r) turns a fixed platform vector about the NED down axis for heading, about
    Rz(h) e_y for pitch and about the platform's forward axis A e_x for roll: dn = axis x n per radian.
    The pitch axis is the unit horizontal normal of the forward axis (undefined only at pitch +-90).
    """
    a = np.asarray(attitude, float)
    n = np.atleast_2d(np.asarray(n_ned, float))
    if a.ndim == 2:
        a = np.broadcast_to(a, (n.shape[0], 3, 3))
    down = np.broadcast_to(np.array([0.0, 0.0, 1.0]), n.shape)
    forward = a[:, :, 0]
    heading = np.arctan2(a[:, 1, 0], a[:, 0, 0])        # the forward axis' azimuth = heading
    pitch_axis = np.stack([-np.sin(heading), np.cos(heading), np.zeros_like(heading)], axis=-1)
    return np.stack([np.cross(down, n), np.cross(pitch_axis, n), np.cross(forward, n)], axis=-1)


def element_sigmas(b_ned, cov_dir_ned, sigma_b_nT=np.nan, attitude=None,
                   attitude_sigma_deg=(0.0, 0.0, 0.0)) -> ElementSigmas:
    """Return 1-sigma of D, I (deg) and F (nT) per sample, propagated to first order.

    b_ned: (N, 3) field in NED, nT. cov_dir_ned: (N, 3, 3) covariance of the unit direction in NED,
    rad^2 (rotate a sensor-frame one with `rotate_covariance`). sigma_b_nT: magnitude 1-sigma, scalar
    or (N,), NaN when unknown. attitude: platform -> NED (3, 3) or (N, 3, 3), needed when any of
    attitude_sigma_deg (heading, pitch, roll 1-sigma, degrees, independent, small-angle) is non-zero.
    D's sigma grows as 1/cos(I): it is undefined at the magnetic poles.
    """
    b = np.atleast_2d(np.asarray(b_ned, float))
    norm = np.linalg.norm(b, axis=1, keepdims=True)
    n = b / np.where(norm > 0, norm, np.nan)
    cov = np.array(np.broadcast_to(np.asarray(cov_dir_ned, float), (n.shape[0], 3, 3)))
    sig = np.radians(np.asarray(attitude_sigma_deg, float).reshape(3))
    if np.any(sig > 0):
        if attitude is None:
            raise ValueError("attitude sigmas need the attitude matrices")
        jac = attitude_jacobian(attitude, n) * sig[None, None, :]
        cov = cov + jac @ np.swapaxes(jac, -1, -2)
    dec = np.arctan2(n[:, 1], n[:, 0])
    inc = np.arcsin(np.clip(n[:, 2], -1.0, 1.0))
    e_d = np.stack([-np.sin(dec), np.cos(dec), np.zeros_like(dec)], axis=-1)             # dn/dD / cos I
    e_i = np.stack([-np.sin(inc) * np.cos(dec), -np.sin(inc) * np.sin(dec), np.cos(inc)], axis=-1)  # dn/dI
    var_d = np.einsum("ni,nij,nj->n", e_d, cov, e_d) / np.cos(inc) ** 2
    var_i = np.einsum("ni,nij,nj->n", e_i, cov, e_i)
    sigma_f = np.broadcast_to(np.asarray(sigma_b_nT, float), (n.shape[0],)).copy()
    return ElementSigmas(np.degrees(np.sqrt(np.maximum(var_d, 0.0))),
                         np.degrees(np.sqrt(np.maximum(var_i, 0.0))), sigma_f)


def rotate_covariance(cov, rotation) -> np.ndarray:
    """Return R C R^T (N, 3, 3) for covariances C (N, 3, 3) and rotations R (3, 3) or (N, 3, 3)."""
    r = np.asarray(rotation, float)
    return r @ np.asarray(cov, float) @ np.swapaxes(r, -1, -2)


# The estimate columns a geographic output adds (docs/geographic.md), in order.
GEO_COLUMNS = ("X_nT", "Y_nT", "Z_nT", "H_nT", "F_nT", "D_deg", "I_deg", "sigma_D_deg", "sigma_I_deg")


def geographic_columns(u_sensor, b_nT, mounting, attitude, *, sigma_deg=None, cov_dir_sensor=None,
                       attitude_sigma_deg=(0.0, 0.0, 0.0), sigma_b_nT=None) -> dict[str, np.ndarray]:
    """Return the GEO_COLUMNS arrays (N,) from sensor-frame directions u (N, 3) and magnitudes b_nT (N,).

    mounting: (3, 3) sensor -> platform; attitude: (3, 3) or (N, 3, 3) platform -> NED (NaN where
    unknown). The direction uncertainty is either cov_dir_sensor (N, 3, 3), rad^2, sensor frame (the
    tracker's 2x2 tangent covariance P as E P E^T, see `tangent_covariance_3d`) or the isotropic
    sigma_deg (N,) (`isotropic_covariance_3d`). With sigma_b_nT (scalar or (N,), nT) the dict also
    holds 'sigma_F_nT' after GEO_COLUMNS. Missing inputs (NaN) give NaN outputs.
    """
    u = np.atleast_2d(np.asarray(u_sensor, float))
    b = np.asarray(b_nT, float).reshape(-1)
    total = np.asarray(attitude, float) @ np.asarray(mounting, float)
    n = sensor_to_ned(u, mounting, attitude)
    el = elements(n * b[:, None])
    if cov_dir_sensor is not None:
        cov_s = np.asarray(cov_dir_sensor, float)
    elif sigma_deg is not None:
        cov_s = isotropic_covariance_3d(u, sigma_deg)
    else:
        raise ValueError("give sigma_deg or cov_dir_sensor")
    sig = element_sigmas(n * b[:, None], rotate_covariance(cov_s, total),
                         np.nan if sigma_b_nT is None else sigma_b_nT, attitude=attitude,
                         attitude_sigma_deg=attitude_sigma_deg)
    out = {"X_nT": el.x_nT, "Y_nT": el.y_nT, "Z_nT": el.z_nT, "H_nT": el.h_nT, "F_nT": el.f_nT,
           "D_deg": el.d_deg, "I_deg": el.i_deg, "sigma_D_deg": sig.d_deg, "sigma_I_deg": sig.i_deg}
    if sigma_b_nT is not None:
        out["sigma_F_nT"] = sig.f_nT
    return out
