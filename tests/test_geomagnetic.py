"""Frames, attitude, geomagnetic elements and their uncertainties (estimator/geomagnetic.py)."""

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fieldvane.estimator import geomagnetic as gm
from fieldvane.estimator.sphere import exp_map, rotation_matrix, tangent_basis

# NOAA/NCEI "WMM2015 test values" (WMM2015testvalues.pdf, the World Magnetic Model's published check
# table), as transcribed in public WMM test suites: X, Y, Z (north, east, down, nT) with the H, F (nT),
# I, D (deg) NOAA printed for them. Rows: 2015.0 and 2017.5, heights 0 and 100 km, (80N, 0E), (0N,
# 120E), (80S, 240E).
WMM2015_TEST_VALUES = [
    # X        Y         Z         H        F        I       D
    (6627.1, -445.9, 54432.3, 6642.1, 54836.0, 83.04, -3.85),
    (39518.2, 392.9, -11252.4, 39520.2, 41090.9, -15.89, 0.57),
    (5797.3, 15761.1, -52919.1, 16793.5, 55519.8, -72.39, 69.81),
    (6314.3, -471.6, 52269.8, 6331.9, 52652.0, 83.09, -4.27),
    (37535.6, 364.4, -10773.4, 37537.3, 39052.7, -16.01, 0.56),
    (5613.1, 14791.5, -50378.6, 15820.7, 52804.4, -72.57, 69.22),
    (6599.4, -317.1, 54459.2, 6607.0, 54858.5, 83.08, -2.75),
    (39571.4, 222.5, -11030.1, 39572.0, 41080.5, -15.57, 0.32),
    (5873.8, 15781.4, -52687.9, 16839.1, 55313.4, -72.28, 69.58),
    (6290.5, -348.5, 52292.7, 6300.1, 52670.9, 83.13, -3.17),
    (37585.5, 209.5, -10564.2, 37586.1, 39042.5, -15.70, 0.32),
    (5683.5, 14808.8, -50163.0, 15862.0, 52611.1, -72.45, 69.00),
]


def test_elements_match_the_wmm2015_test_values():
    # Source: NOAA/NCEI WMM2015 test values (table above). X, Y, Z, H, F are printed to 0.1 nT and I, D
    # to 0.01 deg: H and F can differ by half a printed digit plus the inputs' rounding (at most
    # 0.05 + 0.05 (|X| + |Y| + |Z|) / F < 0.12 nT), the angles by half a digit plus a little.
    t = np.array(WMM2015_TEST_VALUES)
    el = gm.elements(t[:, :3])
    np.testing.assert_allclose(el.h_nT, t[:, 3], atol=0.12)
    np.testing.assert_allclose(el.f_nT, t[:, 4], atol=0.12)
    np.testing.assert_allclose(el.i_deg, t[:, 5], atol=0.0075)
    np.testing.assert_allclose(el.d_deg, t[:, 6], atol=0.0075)
    np.testing.assert_allclose(el.x_nT, t[:, 0])


def test_declination_range_and_signs():
    el = gm.elements([[-1000.0, -1e-9, 0.0], [-1000.0, 1e-9, 0.0], [0.0, 500.0, -500.0]])
    assert el.d_deg[0] == pytest.approx(-180.0) and el.d_deg[1] == pytest.approx(180.0)
    assert el.d_deg[2] == pytest.approx(90.0) and el.i_deg[2] == pytest.approx(-45.0)   # field pointing up


def test_attitude_matrix_matches_scipy_intrinsic_zyx():
    # Reference library: scipy's intrinsic 'ZYX' Euler angles are the aerospace yaw-pitch-roll
    # sequence, R = Rz(yaw) Ry(pitch) Rx(roll).
    rng = np.random.default_rng(3)
    h = rng.uniform(-180, 360, 50)
    p = rng.uniform(-89, 89, 50)
    r = rng.uniform(-180, 180, 50)
    ours = gm.attitude_matrix(h, p, r)
    ref = Rotation.from_euler("ZYX", np.column_stack([h, p, r]), degrees=True).as_matrix()
    np.testing.assert_allclose(ours, ref, atol=1e-12)
    back = gm.attitude_angles_deg(ours)
    np.testing.assert_allclose(back[0], h % 360.0, atol=1e-9)
    np.testing.assert_allclose(back[1], p, atol=1e-9)
    np.testing.assert_allclose(back[2], r, atol=1e-9)


def test_attitude_conventions_mean_what_they_say():
    # Aerospace convention (platform x forward, y right, z down): heading clockwise from north seen from
    # above, pitch nose up, roll right side down.
    np.testing.assert_allclose(gm.attitude_matrix(90, 0, 0) @ [1, 0, 0], [0, 1, 0], atol=1e-12)     # faces east
    c, s = math.cos(math.radians(30)), math.sin(math.radians(30))
    np.testing.assert_allclose(gm.attitude_matrix(0, 30, 0) @ [1, 0, 0], [c, 0, -s], atol=1e-12)    # nose up
    np.testing.assert_allclose(gm.attitude_matrix(0, 0, 30) @ [0, 1, 0], [0, c, s], atol=1e-12)     # right down


def test_mounting_rotation_deg_matches_scipy_and_the_sensor_file_convention():
    # Reference library: extrinsic 'xyz' (rotate about fixed x, then y, then z) gives Rz Ry Rx.
    rng = np.random.default_rng(4)
    for angles in rng.uniform(-180, 180, (10, 3)):
        ours = gm.mounting_from_rotation_deg(angles)
        np.testing.assert_allclose(ours, Rotation.from_euler("xyz", angles, degrees=True).as_matrix(), atol=1e-12)
        rx, ry, rz = np.radians(angles)        # the composition io/sensorfile.py uses today
        today = (rotation_matrix(np.array([0, 0, 1.0]), rz) @ rotation_matrix(np.array([0, 1.0, 0]), ry)
                 @ rotation_matrix(np.array([1.0, 0, 0]), rx))
        np.testing.assert_allclose(ours, today, atol=1e-12)


def test_checked_rotation_cleans_rounding_and_refuses_non_rotations():
    typed = [[0.7071, -0.7071, 0], [0.7071, 0.7071, 0], [0, 0, 1]]
    r = gm.checked_rotation(typed)
    np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-14)
    assert np.linalg.det(r) == pytest.approx(1.0)
    np.testing.assert_allclose(r, gm.attitude_matrix(45, 0, 0), atol=1e-4)
    with pytest.raises(ValueError, match="reflection"):
        gm.checked_rotation(np.diag([1.0, 1.0, -1.0]))
    with pytest.raises(ValueError, match="not orthonormal"):
        gm.checked_rotation([[1, 0.01, 0], [0, 1, 0], [0, 0, 1]])
    with pytest.raises(ValueError, match="shape"):
        gm.checked_rotation([[1, 0, 0], [0, 1, 0]])
    with pytest.raises(ValueError, match="non-finite"):
        gm.checked_rotation([[1, 0, 0], [0, math.nan, 0], [0, 0, 1]])


def _shoemake_slerp(r0, r1, frac):
    """Quaternion slerp written from Shoemake (SIGGRAPH 1985): sin((1-f)w)/sin w q0 + sin(f w)/sin w q1."""
    q0, q1 = Rotation.from_matrix(r0).as_quat(), Rotation.from_matrix(r1).as_quat()
    if np.dot(q0, q1) < 0:
        q1 = -q1
    w = math.acos(min(1.0, float(np.dot(q0, q1))))
    q = (math.sin((1 - frac) * w) * q0 + math.sin(frac * w) * q1) / math.sin(w)
    return Rotation.from_quat(q).as_matrix()


def test_slerp_between_attitude_samples():
    t_att = np.array([0.0, 10.0, 20.0])
    mats = gm.attitude_matrix([10.0, 30.0, 30.0], [0.0, 0.0, 20.0], [0.0, 0.0, -40.0])
    out = gm.slerp_attitude(t_att, mats, [0.0, 5.0, 10.0, 14.0, 20.0, -1.0, 21.0])
    np.testing.assert_allclose(out[[0, 2, 4]], mats, atol=1e-12)
    np.testing.assert_allclose(out[1], gm.attitude_matrix(20.0, 0, 0), atol=1e-12)   # one axis: constant rate
    np.testing.assert_allclose(out[3], _shoemake_slerp(mats[1], mats[2], 0.4), atol=1e-12)
    assert np.all(np.isnan(out[5])) and np.all(np.isnan(out[6]))      # outside the record: unknown
    with pytest.raises(ValueError, match="increasing"):
        gm.slerp_attitude([0.0, 0.0], mats[:2], [0.0])


def test_sensor_to_ned_applies_mounting_then_attitude():
    rng = np.random.default_rng(5)
    v = rng.normal(size=(20, 3))
    mount = gm.mounting_from_rotation_deg([10, -20, 30])
    att = gm.attitude_matrix(rng.uniform(0, 360, 20), rng.uniform(-30, 30, 20), rng.uniform(-30, 30, 20))
    out = gm.sensor_to_ned(v, mount, att)
    np.testing.assert_allclose(out, [a @ mount @ x for a, x in zip(att, v)], atol=1e-12)
    np.testing.assert_allclose(gm.sensor_to_ned(v, mount, att[0]), (att[0] @ mount @ v.T).T, atol=1e-12)


def test_tangent_and_isotropic_covariances():
    u = np.array([[0.3, -0.5, 0.8]]) / np.linalg.norm([0.3, -0.5, 0.8])
    e1, e2 = tangent_basis(u)
    p = np.array([[[4e-6, 1e-6], [1e-6, 2e-6]]])
    c3 = gm.tangent_covariance_3d(e1, e2, p)
    np.testing.assert_allclose(c3[0], np.column_stack([e1[0], e2[0]]) @ p[0] @ np.column_stack([e1[0], e2[0]]).T)
    assert np.trace(c3[0]) == pytest.approx(np.trace(p[0]))
    np.testing.assert_allclose(c3[0] @ u[0], 0.0, atol=1e-18)
    iso = gm.isotropic_covariance_3d(u, [0.5])
    assert math.degrees(math.sqrt(np.trace(iso[0]))) == pytest.approx(0.5)     # the tracker's sigma_deg
    np.testing.assert_allclose(iso[0] @ u[0], 0.0, atol=1e-18)


def test_element_sigmas_closed_forms():
    # Isotropic direction error sigma (no attitude error): sigma_I = sigma/sqrt(2), sigma_D = sigma/(sqrt(2) cos I)
    # (derived: each tangent direction carries sigma^2/2). A heading error moves D by itself and leaves I;
    # a pitch error, for a level platform facing north and a field in the north-down plane, moves I only.
    inc = math.radians(64.0)
    b = 48000.0 * np.array([[math.cos(inc), 0.0, math.sin(inc)]])
    n = b / np.linalg.norm(b)
    s = gm.element_sigmas(b, gm.isotropic_covariance_3d(n, [0.2]), sigma_b_nT=2.0)
    assert s.i_deg[0] == pytest.approx(0.2 / math.sqrt(2), rel=1e-9)
    assert s.d_deg[0] == pytest.approx(0.2 / math.sqrt(2) / math.cos(inc), rel=1e-9)
    assert s.f_nT[0] == 2.0
    zero = np.zeros((1, 3, 3))
    level = gm.attitude_matrix(0, 0, 0)
    s = gm.element_sigmas(b, zero, attitude=level, attitude_sigma_deg=(0.3, 0, 0))
    assert s.d_deg[0] == pytest.approx(0.3, rel=1e-9) and s.i_deg[0] == pytest.approx(0.0, abs=1e-12)
    s = gm.element_sigmas(b, zero, attitude=level, attitude_sigma_deg=(0, 0.3, 0))
    assert s.i_deg[0] == pytest.approx(0.3, rel=1e-9) and s.d_deg[0] == pytest.approx(0.0, abs=1e-12)
    with pytest.raises(ValueError, match="attitude"):
        gm.element_sigmas(b, zero, attitude_sigma_deg=(0.3, 0, 0))


def test_element_sigmas_match_monte_carlo():
    # Independent check: draw direction and attitude errors (seeded), recompute D and I with atan2 and
    # compare the spread with the first-order propagation (small errors: agreement to a few percent).
    rng = np.random.default_rng(11)
    u = np.array([0.48, -0.31, 0.82])
    u /= np.linalg.norm(u)
    e1, e2 = tangent_basis(u[None])
    p = np.array([[3.0e-6, 1.2e-6], [1.2e-6, 1.5e-6]])          # rad^2, tangent basis of the sensor frame
    mount = gm.mounting_from_rotation_deg([5, -10, 120])
    hpr = np.array([37.0, 6.0, -4.0])
    att_sigma = np.array([0.08, 0.05, 0.12])
    att = gm.attitude_matrix(*hpr)
    cols = gm.geographic_columns(u[None], [50000.0], mount, att,
                                 cov_dir_sensor=gm.tangent_covariance_3d(e1, e2, p[None]),
                                 attitude_sigma_deg=att_sigma)
    n = 200_000
    d2 = rng.multivariate_normal([0, 0], p, n)
    uu = exp_map(np.broadcast_to(u, (n, 3)), d2[:, :1] * e1 + d2[:, 1:] * e2)
    angles = hpr + rng.normal(size=(n, 3)) * att_sigma
    ned = gm.sensor_to_ned(uu, mount, gm.attitude_matrix(angles[:, 0], angles[:, 1], angles[:, 2]))
    el = gm.elements(ned)
    assert np.std(el.d_deg) == pytest.approx(cols["sigma_D_deg"][0], rel=0.02)
    assert np.std(el.i_deg) == pytest.approx(cols["sigma_I_deg"][0], rel=0.02)
    assert np.mean(el.d_deg) == pytest.approx(cols["D_deg"][0], abs=0.01)


def test_geographic_columns_recover_a_known_field():
    # Put the first WMM2015 test field behind a mounting and an attitude; the columns must give it back.
    x, y, z, h, f, i, d = WMM2015_TEST_VALUES[0]
    b_ned = np.array([x, y, z])
    mount = gm.mounting_from_rotation_deg([0, 90, 45])
    att = gm.attitude_matrix(200.0, -3.0, 7.0)
    b_sensor = (att @ mount).T @ b_ned
    b = np.linalg.norm(b_sensor)
    cols = gm.geographic_columns((b_sensor / b)[None], [b], mount, att, sigma_deg=[0.1])
    assert list(cols) == list(gm.GEO_COLUMNS)
    for key, want in (("X_nT", x), ("Y_nT", y), ("Z_nT", z), ("H_nT", h), ("F_nT", f)):
        assert cols[key][0] == pytest.approx(want, abs=0.1)
    assert cols["I_deg"][0] == pytest.approx(i, abs=0.0075) and cols["D_deg"][0] == pytest.approx(d, abs=0.0075)
    with_f = gm.geographic_columns((b_sensor / b)[None], [b], mount, att, sigma_deg=[0.1], sigma_b_nT=1.5)
    assert list(with_f) == [*gm.GEO_COLUMNS, "sigma_F_nT"] and with_f["sigma_F_nT"][0] == 1.5
    nan_att = np.full((1, 3, 3), np.nan)
    cols = gm.geographic_columns((b_sensor / b)[None], [b], mount, nan_att, sigma_deg=[0.1])
    assert all(np.isnan(cols[k][0]) for k in gm.GEO_COLUMNS)
