"""The ideal channel response of DESIGN.md section 2: geometry factor c - i*sigma*s and its gradient."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def channel_geometry(u: np.ndarray, pump: np.ndarray, probe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (c, s) at unit directions u (N,3): c = p.q - (p.u)(q.u), s = u.(p x q) (dimensionless)."""
    u = np.atleast_2d(u)
    c = pump @ probe - (u @ pump) * (u @ probe)
    s = u @ np.cross(pump, probe)
    return c, s


def channel_geometry_gradient(u: np.ndarray, pump: np.ndarray, probe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return ambient gradients dc/du (N,3) and ds/du (N,3) of the geometry factors."""
    u = np.atleast_2d(u)
    dc = -(u @ probe)[:, None] * pump[None, :] - (u @ pump)[:, None] * probe[None, :]
    ds = np.broadcast_to(np.cross(pump, probe), u.shape).copy()
    return dc, ds


@dataclass
class PhysicsParameters:
    """Fitted physics part: beam axes (sensor frame), complex gain per channel per magnitude knot, handedness."""

    pump_axes: np.ndarray      # (2, 3) unit vectors: pump a, pump b
    probe_axes: np.ndarray     # (P, 3) unit vectors: probe 1 [, probe 2]
    gains: np.ndarray          # (C, K) complex: g * exp(i phi0) per channel and knot, V
    handedness: np.ndarray     # (C,) +1 or -1
    channels: tuple[str, ...]

    def axes_of(self, channel: str) -> tuple[np.ndarray, np.ndarray]:
        """Return (pump axis, probe axis) of a channel like '2a' (unit vectors, sensor frame)."""
        return self.pump_axes["ab".index(channel[1])], self.probe_axes[int(channel[0]) - 1]

    def shapes(self, u: np.ndarray) -> np.ndarray:
        """Return the unit-gain channel shapes c - i*sigma*s at u, shape (N, C) complex."""
        out = np.empty((np.atleast_2d(u).shape[0], len(self.channels)), complex)
        for k, ch in enumerate(self.channels):
            c, s = channel_geometry(u, *self.axes_of(ch))
            out[:, k] = c - 1j * self.handedness[k] * s
        return out
