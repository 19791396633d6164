"""`fieldvane map` (io/commands/map.py, io/crlb_map.py): the Cramer-Rao bound over the sphere as CSV, PNG
and summary, with the blind region by the one rule of estimator/blind.py."""

import csv
import sys

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.fisher import crlb_deg
from fieldvane.estimator.sphere import fibonacci_sphere, lambert_azimuthal, normalize, spherical_to_unit
from fieldvane.io.cli import main
from fieldvane.io.crlb_map import (CSV_COLUMNS, HEMISPHERES, lambert_forward, lambert_inverse, make_map,
                                   summarize)
from synthetic_sensor import make_sensor, scan

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # PNG specification (W3C / ISO 15948), file signature


def _calibrate(n_probes):
    sensor, pumps, probes = make_sensor(seed=6, n_probes=n_probes)
    u, b, z, f, _ = scan(sensor, [8000, 30000], 500, snr=2000, seed=2)
    return fit_calibration(u, b, z, f, sensor.channels, pumps, probes)


@pytest.fixture(scope="module")
def cal2():
    return _calibrate(2)


@pytest.fixture(scope="module")
def cal1():
    return _calibrate(1)


@pytest.fixture(scope="module")
def plt():
    matplotlib = pytest.importorskip("matplotlib")
    matplotlib.use("Agg")
    import matplotlib.pyplot as pyplot
    return pyplot


def read_csv(path):
    """Return (header, data rows as floats, {metadata key: value}) of a map CSV."""
    meta, rows = {}, []
    with open(path, newline="") as fh:
        for line in fh:
            if line.startswith("#"):
                key, _, value = line[1:].partition(":")
                meta[key.strip()] = value.strip()
            else:
                rows.append(line)
    rows = list(csv.reader(rows))
    return rows[0], np.array(rows[1:], float), meta


def test_inner_map_writes_csv_and_png_per_probe_set(cal2, plt, tmp_path):
    maps, files, b = make_map(cal2, tmp_path, n_points=600, plt=plt, rate_hz=200.0)
    assert [m.name for m in maps] == ["1", "2", "both"]
    assert b == pytest.approx(np.sqrt(8000 * 30000), rel=1e-3)
    names = sorted(p.name for p in files)
    assert names == sorted(f"bound_{s}.{ext}" for s in ("probe1", "probe2", "both") for ext in ("csv", "png"))
    for m in maps:
        stem = "bound_both" if m.name == "both" else f"bound_probe{m.name}"
        png = (tmp_path / f"{stem}.png").read_bytes()
        assert png.startswith(PNG_SIGNATURE)
        header, data, meta = read_csv(tmp_path / f"{stem}.csv")
        assert tuple(header) == CSV_COLUMNS and data.shape == (600, 7)
        # Columns agree with each other and with the bound recomputed at the written directions.
        u = normalize(data[:, 2:5])
        np.testing.assert_allclose(spherical_to_unit(np.radians(data[:, 0]), np.radians(data[:, 1])), u, atol=2e-6)
        np.testing.assert_allclose(data[:, 5], crlb_deg(cal2.model, u, b, m.probes), rtol=1e-3)
        # The blind column is the rule restated with numpy: bound above 5 x its median over the sphere
        # (the shared 2000-direction grid of estimator/blind.py, whatever --points the map uses).
        med = np.median(crlb_deg(cal2.model, fibonacci_sphere(2000), b, m.probes))
        assert np.median(data[:, 5]) == pytest.approx(med, rel=0.02)
        np.testing.assert_array_equal(data[:, 6], (data[:, 5] > 5 * med).astype(float))
        assert float(meta["median_bound_deg"]) == pytest.approx(med, rel=1e-5)
        assert float(meta["blind_limit_deg"]) == pytest.approx(5 * med, rel=1e-5)
        assert meta["sample_rate_hz"] == "200" and meta["probe_gains"] == "known"
        assert float(meta["b_nT"]) == pytest.approx(b, rel=1e-5)
        # The printed summary: plain statistics of the CSV column with that median.
        s = m.summary()
        assert s["median_deg"] == pytest.approx(med, rel=1e-9)
        assert s["p95_deg"] == pytest.approx(np.percentile(data[:, 5], 95), rel=1e-4)
        assert s["blind_fraction"] == pytest.approx(np.mean(data[:, 5] > 5 * med))
        assert s["blind_limit_deg"] == pytest.approx(5 * med, rel=1e-9)
        assert summarize(data[:, 5], median_deg=med)["blind_fraction"] == s["blind_fraction"]


def test_blind_region_is_relative_and_shows_where_gains_are_unknown(cal1, tmp_path):
    # Relative rule: four times the lock-in noise scales every bound by four (the Fisher information
    # falls as 1/noise^2) and marks exactly the same directions blind.
    quiet, _, _ = make_map(cal1, tmp_path / "q", noise_std=0.001, n_points=800, gain_free=True)
    loud, _, _ = make_map(cal1, tmp_path / "l", noise_std=0.004, n_points=800, gain_free=True)
    np.testing.assert_allclose(loud[0].bound_deg, 4 * quiet[0].bound_deg, rtol=1e-9)
    np.testing.assert_array_equal(loud[0].blind, quiet[0].blind)
    # One probe without gain knowledge loses the direction around the probe axis, where every
    # channel's amplitude vanishes (DESIGN section 2: |Z| = g |p x u| |q x u|).
    m = quiet[0]
    assert 0.01 < np.mean(m.blind) < 0.3
    probe = normalize(cal1.physics.probe_axes[0])
    near_axis = np.abs(m.u @ probe) > np.cos(np.radians(5))
    assert np.all(m.blind[near_axis])
    # With the gains known the same sensor is nowhere blind, and the summary says what unknown gains cost.
    known, _, _ = make_map(cal1, tmp_path / "k", n_points=800)
    s = known[0].summary()
    assert s["blind_fraction"] == 0.0 and s["blind_fraction_gain_free"] == pytest.approx(np.mean(m.blind))


def test_plot_charts_are_equal_area_lambert_hemispheres():
    # Lambert azimuthal equal-area projection (J. P. Snyder, "Map Projections - A Working Manual",
    # USGS 1987, from memory): a cap of polar radius t maps to a disk of radius 2 sin(t/2), so equal
    # areas stay equal; about +z it is sphere.lambert_azimuthal.
    upper, lower = (frame for _, frame in HEMISPHERES)
    u = fibonacci_sphere(500)
    np.testing.assert_allclose(lambert_forward(u, upper), lambert_azimuthal(u), atol=1e-12)
    for frame in (upper, lower):
        hemi = u[u @ frame[2] > 0.01]
        np.testing.assert_allclose(lambert_inverse(lambert_forward(hemi, frame), frame), hemi, atol=1e-12)
        assert np.linalg.det(frame) == pytest.approx(1.0)          # right-handed: no mirrored view
    # Area check: pixels of the hemisphere disk (radius sqrt 2) with uz > cos(t) cover the cap's
    # share of the hemisphere, 1 - cos(t).
    g = np.linspace(-np.sqrt(2), np.sqrt(2), 801)
    xx, yy = np.meshgrid(g, g)
    inside = xx ** 2 + yy ** 2 <= 2
    uz = lambert_inverse(np.stack([xx, yy], -1), upper)[..., 2]
    for t in (0.3, 0.8, 1.2):
        assert np.sum(inside & (uz > np.cos(t))) / np.sum(inside) == pytest.approx(1 - np.cos(t), abs=0.005)


def test_cli_map_end_to_end(cal2, tmp_path, capsys):
    from fieldvane.io.calfile import save_calibration
    path = tmp_path / "cal.json"
    save_calibration(cal2, path)
    out = tmp_path / "out"
    code = main(["map", "-c", str(path), "--probes", "both", "--gain-free", "--b-nT", "20000",
                 "--noise", "0.001", "--points", "300", "--blind-factor", "3", "-o", str(out)])
    assert code == 0
    text = capsys.readouterr().out
    assert "|B| = 20000 nT" in text and "gain-free" in text
    line = next(s for s in text.splitlines() if s.strip().startswith("both"))
    header, data, meta = read_csv(out / "bound_both_gainfree.csv")
    expected = crlb_deg(cal2.model, normalize(data[:, 2:5]), 20000.0, (1, 2), True, 0.001)
    med = np.median(crlb_deg(cal2.model, fibonacci_sphere(2000), 20000.0, (1, 2), True, 0.001))
    assert line.split()[1:5] == [f"{med:.3g}", f"{np.percentile(expected, 95):.3g}", f"{3 * med:.3g}",
                                 f"{100 * np.mean(expected > 3 * med):.1f}%"]
    assert meta["probe_gains"] == "unknown (gain-free)" and meta["blind_factor"] == "3"
    assert (out / "bound_both_gainfree.png").read_bytes().startswith(PNG_SIGNATURE)


def test_cli_map_rejects_bad_options_clearly(cal1, tmp_path, capsys):
    from fieldvane.io.calfile import save_calibration
    path = tmp_path / "one.json"
    save_calibration(cal1, path)
    assert main(["map", "-c", str(path), "--probes", "2", "--no-png", "-o", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "one.json" in err and "probe set '2' is not available" in err
    assert main(["map", "-c", str(path), "--noise", "nan", "-o", str(tmp_path)]) == 2
    assert "--noise must be a positive voltage" in capsys.readouterr().err
    assert main(["map", "-c", str(tmp_path / "missing.json"), "--no-png", "-o", str(tmp_path)]) == 2
    # One-probe sensor, CSV only: a single probe set.
    assert main(["map", "-c", str(path), "--no-png", "--points", "100", "-o", str(tmp_path / "o")]) == 0
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == ["bound_probe1.csv"]
    for option, value, message in (("--blind-factor", "1", "--blind-factor must be a number above 1"),
                                   ("--blind-factor", "nan", "--blind-factor"),
                                   ("--rate-hz", "-200", "--rate-hz must be a positive")):
        assert main(["map", "-c", str(path), "--no-png", option, value, "-o", str(tmp_path / "p")]) == 2
        assert message in capsys.readouterr().err


def test_cli_map_without_matplotlib_says_what_to_do(cal1, tmp_path, capsys, monkeypatch):
    from fieldvane.io.calfile import save_calibration
    path = tmp_path / "one.json"
    save_calibration(cal1, path)
    monkeypatch.setitem(sys.modules, "matplotlib", None)       # import matplotlib -> ImportError
    assert main(["map", "-c", str(path), "-o", str(tmp_path)]) == 1
    err = capsys.readouterr().err
    assert "matplotlib" in err and "--no-plots" in err
