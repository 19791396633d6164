"""On-disk cache of snapshot lookup tables: one .npz per calibration content hash, built once."""

from __future__ import annotations

import os
import tempfile
import time
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fieldvane.estimator.lookup_table import (DEFAULT_GRID_POINTS, DEFAULT_NEIGHBORS, LookupTable,
                                              build_calibration_table, calibration_key)
from fieldvane.io.errors import InputError

CACHE_FOLDER_NAME = ".fieldvane-tables"


@dataclass(frozen=True)
class TableCacheInfo:
    """What the cache did: file path, table key, built now or loaded, build time (s), file size (bytes)."""

    path: Path | None
    key: str
    built: bool
    build_seconds: float
    size_bytes: int
    note: str


def cache_dir_for(calibration_path) -> Path:
    """Return the default cache folder: a hidden folder next to the calibration file."""
    return Path(calibration_path).resolve().parent / CACHE_FOLDER_NAME


def table_path(cache_dir, key: str) -> Path:
    """Return the cache file path of a table key inside cache_dir."""
    return Path(cache_dir) / f"table-{key[:24]}.npz"


def save_table(table: LookupTable, path) -> int:
    """Write the table to path as .npz (plain arrays, atomic replace); return the file size in bytes."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.stem + ".", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **table.arrays())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path.stat().st_size


def load_table(path) -> LookupTable:
    """Return the table stored at path (.npz read with allow_pickle=False); InputError if unreadable."""
    try:
        with np.load(Path(path), allow_pickle=False) as data:
            return LookupTable.from_arrays({name: data[name] for name in data.files})
    except (OSError, ValueError, KeyError, zipfile.BadZipFile, EOFError) as exc:
        raise InputError(f"not a usable lookup table: {exc}", path=str(path)) from None


def load_or_build_table(calibration, cache_dir, n_grid: int = DEFAULT_GRID_POINTS,
                        n_neighbors: int = DEFAULT_NEIGHBORS) -> tuple[LookupTable, TableCacheInfo]:
    """Return (table, info): the cached table of this calibration, or a new one built and saved.

    A cached file whose key differs or that cannot be read is rebuilt and replaced. If the cache
    folder cannot be written, the built table is still returned and info.path is None.
    """
    key = calibration_key(calibration, n_grid, n_neighbors)
    path = table_path(cache_dir, key)
    note = "no cached table"
    if path.exists():
        try:
            table = load_table(path)
            if table.key == key:
                return table, TableCacheInfo(path, key, False, 0.0, path.stat().st_size, "loaded from cache")
            note = "cached table belongs to another calibration"
        except InputError as exc:
            note = f"cached table unreadable ({exc})"
    start = time.perf_counter()
    table = build_calibration_table(calibration, n_grid, n_neighbors)
    seconds = time.perf_counter() - start
    try:
        size = save_table(table, path)
    except OSError as exc:
        return table, TableCacheInfo(None, key, True, seconds, 0, f"{note}; built, not cached ({exc})")
    return table, TableCacheInfo(path, key, True, seconds, size, f"{note}; built and cached")
