"""A small synthetic sensor for estimator tests, built directly from the channel formula of docs/physics.md.

Z = g exp(i phi0(|B|)) (c - i sigma s) (1 + distortion(u)), with misaligned axes, arbitrary gains,
phase offsets and handedness, and a phase that moves with |B| (stronger at low field). Numbers are
invented for tests.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.constants import gamma_hz_per_nt
from fieldvane.estimator.sphere import fibonacci_sphere, normalize, rotation_matrix

CHANNELS = {1: ("1a", "1b"), 2: ("1a", "1b", "2a", "2b")}


@dataclass
class SyntheticSensor:
    pump_axes: np.ndarray
    probe_axes: np.ndarray
    gains: np.ndarray        # (C,) V
    phase0_deg: np.ndarray   # (C,)
    handedness: np.ndarray   # (C,)
    low_field_shift_deg: np.ndarray  # (C,) phase shift at 1 uT, falling as 1/|B|
    distortion: float = 0.0  # relative size of a smooth direction-dependent distortion
    channels: tuple = CHANNELS[2]

    def response(self, u, b_nT):
        u = np.atleast_2d(u)
        b = np.broadcast_to(np.asarray(b_nT, float), (u.shape[0],))
        out = np.empty((u.shape[0], len(self.channels)), complex)
        for k, ch in enumerate(self.channels):
            p = self.pump_axes["ab".index(ch[1])]
            q = self.probe_axes[int(ch[0]) - 1]
            c = p @ q - (u @ p) * (u @ q)
            s = u @ np.cross(p, q)
            phase = np.radians(self.phase0_deg[k] + self.low_field_shift_deg[k] * 1000.0 / b)
            dist = 1 + self.distortion * (u[:, 0] * u[:, 2] + 0.5 * u[:, 1] ** 3 - 0.3 * u[:, 2] ** 4)
            out[:, k] = self.gains[k] * np.exp(1j * phase) * (c - 1j * self.handedness[k] * s) * dist
        return out

    def frequencies(self, b_nT):
        return np.column_stack([b_nT * gamma_hz_per_nt("87Rb"), b_nT * gamma_hz_per_nt("85Rb")])


def make_sensor(seed=1, n_probes=2, misalign_deg=3.0, distortion=0.0):
    rng = np.random.default_rng(seed)
    nominal_pumps = np.array([[1.0, 0, 0], [0, 1.0, 0]])
    nominal_probes = normalize(np.array([[0, 0, 1.0], [1.0, 1.0, 0.6]]))[:n_probes]

    def tilt(v):
        axis = normalize(rng.normal(size=3))
        return rotation_matrix(axis, np.radians(misalign_deg)) @ v

    c = len(CHANNELS[n_probes])
    sensor = SyntheticSensor(
        pump_axes=np.array([tilt(v) for v in nominal_pumps]),
        probe_axes=np.array([tilt(v) for v in nominal_probes]),
        gains=rng.uniform(0.5, 2.0, c),
        phase0_deg=rng.uniform(-180, 180, c),
        handedness=rng.choice([-1.0, 1.0], c),
        low_field_shift_deg=rng.uniform(2, 8, c),
        distortion=distortion,
        channels=CHANNELS[n_probes],
    )
    return sensor, nominal_pumps, nominal_probes[:n_probes]


def scan(sensor, magnitudes_nT, points_per_magnitude, snr=1000.0, seed=2, jitter_deg=0.0):
    """Field stepped over the sphere at each magnitude; noise std = max channel amplitude / snr."""
    rng = np.random.default_rng(seed)
    us, bs = [], []
    for i, b in enumerate(magnitudes_nT):
        grid = fibonacci_sphere(points_per_magnitude)
        rot = rotation_matrix(normalize(rng.normal(size=3)), rng.uniform(0, np.pi))
        us.append(grid @ rot.T)
        bs.append(np.full(points_per_magnitude, float(b)))
    u, b = np.vstack(us), np.concatenate(bs)
    z0 = sensor.response(u, b)
    sigma = np.abs(sensor.gains) / snr
    z = z0 + sigma * (rng.normal(size=z0.shape) + 1j * rng.normal(size=z0.shape))
    return u, b, z, sensor.frequencies(b), sigma
