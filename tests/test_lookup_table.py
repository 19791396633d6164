"""Lookup table (estimator/lookup_table.py) and its on-disk cache (io/table_cache.py)."""

import copy

import numpy as np
import pytest
from scipy.spatial import cKDTree

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.lookup_table import (LookupTable, build_calibration_table, build_table,
                                              calibration_key, grid_neighbors)
from fieldvane.estimator.response import ResponseModel
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.sphere import fibonacci_sphere
from fieldvane.io.table_cache import load_or_build_table, load_table, save_table, table_path
from synthetic_sensor import make_sensor, scan


@pytest.fixture(scope="module")
def cal():
    sensor, pumps, probes = make_sensor(seed=2, n_probes=2, distortion=0.02)
    u, b, z, f, _ = scan(sensor, [4000, 15000, 45000], 600, snr=2000, seed=3)
    return fit_calibration(u, b, z, f, sensor.channels, pumps, probes)


def test_layers_reproduce_the_model_at_any_magnitude(cal):
    table = build_calibration_table(cal, n_grid=500)
    b = np.array([4000.0, 7000.0, 15000.0, 31000.0, 45000.0, 90000.0])
    for bi in b:
        z = table.response(cal.model.basis([bi]))[0]
        ref = cal.model.h(table.grid, bi)
        np.testing.assert_allclose(z, ref, rtol=0, atol=1e-12 * np.abs(ref).max())


def test_neighbors_are_the_nearest_grid_points():
    # Reference: scipy.spatial.cKDTree (chord distance orders like angle on the unit sphere).
    grid = fibonacci_sphere(700)
    nb = grid_neighbors(grid, 6, chunk=128)
    _, ref = cKDTree(grid).query(grid, k=7)
    assert np.array_equal(np.sort(nb, axis=1), np.sort(ref[:, 1:], axis=1))


def test_key_is_stable_and_changes_with_every_model_ingredient(cal):
    key = calibration_key(cal)
    assert key == calibration_key(copy.deepcopy(cal))
    m = cal.model

    def with_model(**kw):
        args = dict(channels=m.channels, degree=m.degree, knots_nT=m.basis.knots_nT, coef=m.coef,
                    noise_std=m.noise_std)
        args.update(kw)
        other = copy.copy(cal)
        other.model = ResponseModel(**args)
        return other

    coef = m.coef.copy()
    coef[0, 0, 0] *= 1 + 1e-12
    changed = [with_model(coef=coef), with_model(noise_std=m.noise_std * 1.01),
               with_model(knots_nT=m.basis.knots_nT * 1.001),
               with_model(channels=("1b", "1a", "2a", "2b"))]
    swapped = copy.copy(cal)
    swapped.pump_isotopes = cal.pump_isotopes[::-1]
    keys = {calibration_key(c) for c in changed + [swapped]} | {calibration_key(cal, n_grid=1000)}
    assert key not in keys and len(keys) == 6


def test_arrays_round_trip_through_npz_without_pickle(cal, tmp_path):
    table = build_calibration_table(cal, n_grid=400)
    path = tmp_path / "t.npz"
    np.savez(path, **table.arrays())
    with np.load(path, allow_pickle=False) as data:
        back = LookupTable.from_arrays({k: data[k] for k in data.files})
    assert back.key == table.key and back.channels == table.channels
    for name in ("grid", "knots_nT", "values", "neighbors"):
        assert np.array_equal(getattr(back, name), getattr(table, name))


def test_cache_builds_once_then_loads(cal, tmp_path):
    table, info = load_or_build_table(cal, tmp_path, n_grid=800)
    assert info.built and info.size_bytes > 0 and info.build_seconds >= 0 and info.path.exists()
    again, info2 = load_or_build_table(cal, tmp_path, n_grid=800)
    assert not info2.built and info2.path == info.path and info2.size_bytes == info.size_bytes
    assert np.array_equal(again.values, table.values) and again.key == table.key
    # A solver accepts the cached table for its own calibration ...
    SnapshotSolver.from_calibration(cal, again)


def test_changed_calibration_gets_its_own_table_and_stale_table_is_refused(cal, tmp_path):
    table, info = load_or_build_table(cal, tmp_path, n_grid=800)
    other = copy.copy(cal)
    other.model = ResponseModel(cal.model.channels, cal.model.degree, cal.model.basis.knots_nT,
                                cal.model.coef * 1.001, cal.model.noise_std)
    table2, info2 = load_or_build_table(other, tmp_path, n_grid=800)
    assert info2.built and info2.key != info.key and info2.path != info.path
    # ... and refuses a table built for another calibration.
    with pytest.raises(ValueError, match="different calibration"):
        SnapshotSolver.from_calibration(other, table)
    with pytest.raises(ValueError, match="does not match"):
        SnapshotSolver(other.model, other.gammas_hz_per_nt, table)


def test_corrupt_or_foreign_cache_file_is_rebuilt(cal, tmp_path):
    key = calibration_key(cal, n_grid=800)
    path = table_path(tmp_path, key)
    path.write_bytes(b"not a zip file")
    with pytest.raises(Exception, match="not a usable lookup table"):
        load_table(path)
    table, info = load_or_build_table(cal, tmp_path, n_grid=800)
    assert info.built and "unreadable" in info.note and load_table(path).key == key
    # A file at the right name holding another model's table is rebuilt as well.
    foreign = build_table(ResponseModel(cal.model.channels, cal.model.degree, cal.model.basis.knots_nT,
                                        cal.model.coef * 2, cal.model.noise_std), n_grid=800)
    save_table(foreign, path)
    _, info = load_or_build_table(cal, tmp_path, n_grid=800)
    assert info.built and "another calibration" in info.note and load_table(path).key == key
