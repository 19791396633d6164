"""Lookup table of the calibrated response over a near-uniform sphere grid, one layer per magnitude knot.

The model is Z(u, |B|) = sum_k S_k(|B|) T_k(u), with S_k the magnitude basis (S_k(knot_j) = delta_kj)
and T_k the harmonic expansion at knot k. Tabulating T_k on the grid is therefore exact at every
magnitude: the table at |B| is the S(|B|)-weighted sum of its layers, no interpolation error in |B|.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

from fieldvane.estimator.harmonics import harmonics
from fieldvane.estimator.sphere import fibonacci_sphere

TABLE_FORMAT_VERSION = 1
# Grid directions ~5 deg apart: well inside the Gauss-Newton basin of the snapshot inverse on the
# sensors tried (1500 and 3000 points gave identical Monte Carlo errors; 1500 halves the scan).
DEFAULT_GRID_POINTS = 1500
DEFAULT_NEIGHBORS = 8
_ARRAY_NAMES = ("format_version", "key", "grid", "knots_nT", "values", "neighbors", "channels")


def model_key(model, pump_isotopes=(), n_grid: int = DEFAULT_GRID_POINTS,
              n_neighbors: int = DEFAULT_NEIGHBORS) -> str:
    """Return a SHA-256 hex digest of the model arrays (coefficients, knots, noise, channels, isotopes) and grid size."""
    h = hashlib.sha256()

    def put(name: str, arr) -> None:
        a = np.ascontiguousarray(arr)
        h.update(f"{name}:{a.dtype.str}:{a.shape};".encode())
        h.update(a.tobytes())

    h.update(f"fieldvane-table-v{TABLE_FORMAT_VERSION};degree={model.degree};".encode())
    put("coef", np.asarray(model.coef, np.complex128))
    put("knots", np.asarray(model.basis.knots_nT, np.float64))
    put("noise", np.asarray(model.noise_std, np.float64))
    h.update(("channels=" + ",".join(model.channels) + ";").encode())
    h.update(("isotopes=" + ",".join(pump_isotopes) + ";").encode())
    h.update(f"grid={int(n_grid)};neighbors={int(n_neighbors)};".encode())
    return h.hexdigest()


def calibration_key(calibration, n_grid: int = DEFAULT_GRID_POINTS,
                    n_neighbors: int = DEFAULT_NEIGHBORS) -> str:
    """Return the table key (SHA-256 hex) of a Calibration: its model arrays, isotopes and the grid size."""
    return model_key(calibration.model, calibration.pump_isotopes, n_grid, n_neighbors)


def grid_neighbors(grid: np.ndarray, k: int, chunk: int = 1024) -> np.ndarray:
    """Return the indices (M, k) of each grid point's k nearest other grid points (by angle)."""
    out = np.empty((grid.shape[0], k), dtype=np.int32)
    for start in range(0, grid.shape[0], chunk):
        dots = grid[start:start + chunk] @ grid.T
        rows = np.arange(dots.shape[0])
        dots[rows, start + rows] = -np.inf              # exclude the point itself
        part = np.argpartition(-dots, k, axis=1)[:, :k]
        order = np.argsort(-np.take_along_axis(dots, part, axis=1), axis=1)
        out[start:start + chunk] = np.take_along_axis(part, order, axis=1)
    return out


@dataclass(frozen=True, eq=False)
class LookupTable:
    """Tabulated response: grid (M,3) unit directions, knots (K,) nT, values (K,M,C) complex V, neighbors (M,k)."""

    key: str
    grid: np.ndarray
    knots_nT: np.ndarray
    values: np.ndarray
    neighbors: np.ndarray
    channels: tuple[str, ...]

    def __post_init__(self):
        k, m, c = self.values.shape
        if self.grid.shape != (m, 3) or self.knots_nT.shape != (k,) or len(self.channels) != c:
            raise ValueError(f"inconsistent table shapes: grid {self.grid.shape}, knots "
                             f"{self.knots_nT.shape}, values {self.values.shape}, {len(self.channels)} channels")
        if self.neighbors.ndim != 2 or self.neighbors.shape[0] != m or self.neighbors.size and (
                self.neighbors.min() < 0 or self.neighbors.max() >= m):
            raise ValueError("table neighbor indices are out of range")

    @property
    def size(self) -> int:
        """Return the number of grid directions M."""
        return int(self.grid.shape[0])

    def response(self, weights: np.ndarray) -> np.ndarray:
        """Return Z on the grid (N, M, C) complex V for magnitude-basis weights (N, K)."""
        return np.einsum("nk,kmc->nmc", np.atleast_2d(weights), self.values)

    def arrays(self) -> dict[str, np.ndarray]:
        """Return the table as plain numpy arrays (no objects) for saving to .npz."""
        return {"format_version": np.array(TABLE_FORMAT_VERSION), "key": np.array(self.key),
                "grid": self.grid, "knots_nT": self.knots_nT, "values": self.values,
                "neighbors": self.neighbors, "channels": np.array(self.channels, dtype="U8")}

    @classmethod
    def from_arrays(cls, arrays) -> "LookupTable":
        """Return a table rebuilt from `arrays()` output (e.g. an npz loaded with allow_pickle=False)."""
        missing = [n for n in _ARRAY_NAMES if n not in arrays]
        if missing:
            raise ValueError(f"table arrays lack {', '.join(missing)}")
        version = int(np.asarray(arrays["format_version"]))
        if version != TABLE_FORMAT_VERSION:
            raise ValueError(f"table format version {version}, expected {TABLE_FORMAT_VERSION}")
        return cls(str(np.asarray(arrays["key"])), np.asarray(arrays["grid"], float),
                   np.asarray(arrays["knots_nT"], float), np.asarray(arrays["values"], complex),
                   np.asarray(arrays["neighbors"], np.int32),
                   tuple(str(c) for c in np.asarray(arrays["channels"])))


def build_table(model, pump_isotopes=(), n_grid: int = DEFAULT_GRID_POINTS,
                n_neighbors: int = DEFAULT_NEIGHBORS) -> LookupTable:
    """Return the lookup table of a ResponseModel on a Fibonacci grid of n_grid directions (sensor frame)."""
    grid = fibonacci_sphere(int(n_grid))
    y = harmonics(model.degree, grid)                                  # (M, J)
    values = np.einsum("mj,ckj->kmc", y, model.coef)                    # (K, M, C)
    return LookupTable(model_key(model, pump_isotopes, n_grid, n_neighbors), grid,
                       np.array(model.basis.knots_nT, float), values,
                       grid_neighbors(grid, int(n_neighbors)), tuple(model.channels))


def build_calibration_table(calibration, n_grid: int = DEFAULT_GRID_POINTS,
                            n_neighbors: int = DEFAULT_NEIGHBORS) -> LookupTable:
    """Return the lookup table of a Calibration (its model, keyed with its isotopes)."""
    return build_table(calibration.model, calibration.pump_isotopes, n_grid, n_neighbors)
