"""Geometry on the unit sphere: tangent-plane charts, angles, grids and rotations (sensor frame)."""

from __future__ import annotations

import numpy as np


def normalize(v: np.ndarray) -> np.ndarray:
    """Return v scaled to unit length along its last axis (dimensionless)."""
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def angle_between(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Return the angle between directions a and b along the last axis, radians (atan2 form, exact near 0)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    cross = np.linalg.norm(np.cross(a, b), axis=-1)
    dot = np.sum(a * b, axis=-1)
    return np.arctan2(cross, dot)


def axis_angle_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Return the angle between two axes ignoring sign (0..90), degrees."""
    ang = np.degrees(angle_between(a, b))
    return np.minimum(ang, 180.0 - ang)


def tangent_basis(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return two orthonormal vectors (e1, e2) spanning the tangent plane at unit u, e1 x e2 = u."""
    u = np.asarray(u, float)
    # Pick the reference axis least aligned with u so the chart never degenerates.
    ref = np.zeros_like(u)
    idx = np.argmin(np.abs(u), axis=-1)
    np.put_along_axis(ref, idx[..., None], 1.0, axis=-1)
    e1 = normalize(np.cross(ref, u))
    e2 = np.cross(u, e1)
    return e1, e2


def exp_map(u: np.ndarray, delta: np.ndarray) -> np.ndarray:
    """Return u moved along the tangent vector delta (3-vector, radians of arc) on the sphere."""
    theta = np.linalg.norm(delta, axis=-1, keepdims=True)
    small = theta < 1e-12
    safe = np.where(small, 1.0, theta)
    out = np.cos(theta) * u + np.where(small, 1.0, np.sin(theta) / safe) * delta
    return normalize(out)


def log_map(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Return the tangent vector at u (3-vector, radians) pointing to v along the great circle."""
    u, v = np.asarray(u, float), np.asarray(v, float)
    w = v - np.sum(u * v, axis=-1, keepdims=True) * u
    n = np.linalg.norm(w, axis=-1, keepdims=True)
    ang = angle_between(u, v)[..., None]
    return np.where(n < 1e-15, 0.0, w * ang / np.where(n < 1e-15, 1.0, n))


def fibonacci_sphere(n: int) -> np.ndarray:
    """Return n near-uniform unit vectors (golden-angle spiral), shape (n, 3)."""
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    r = np.sqrt(np.clip(1.0 - z * z, 0.0, 1.0))
    phi = np.pi * (3.0 - np.sqrt(5.0)) * i
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def rotation_matrix(axis: np.ndarray, angle_rad: float) -> np.ndarray:
    """Return the 3x3 matrix rotating vectors by angle_rad about axis (right-hand rule)."""
    k = normalize(axis)
    kx = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return np.eye(3) + np.sin(angle_rad) * kx + (1 - np.cos(angle_rad)) * (kx @ kx)


def spherical_to_unit(polar_rad, azimuth_rad) -> np.ndarray:
    """Return unit vectors from polar angle (from +z) and azimuth (from +x toward +y), radians."""
    polar_rad, azimuth_rad = np.asarray(polar_rad, float), np.asarray(azimuth_rad, float)
    s = np.sin(polar_rad)
    return np.stack([s * np.cos(azimuth_rad), s * np.sin(azimuth_rad), np.cos(polar_rad)], axis=-1)


def unit_to_spherical(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (polar, azimuth) in radians of unit vectors u (polar from +z, azimuth from +x)."""
    u = np.asarray(u, float)
    return np.arccos(np.clip(u[..., 2], -1, 1)), np.arctan2(u[..., 1], u[..., 0])


def lambert_azimuthal(u: np.ndarray) -> np.ndarray:
    """Return equal-area (Lambert azimuthal) plane coordinates (..., 2) of unit vectors u about +z."""
    u = np.asarray(u, float)
    k = np.sqrt(2.0 / np.maximum(1.0 + u[..., 2], 1e-12))
    return np.stack([k * u[..., 0], k * u[..., 1]], axis=-1)
