"""`fieldvane report` (io/report.py, io/plots.py, io/commands/report.py): files, numbers, errors.

Every number of the summary is recomputed here straight from the arrays the files were made from,
with numpy, scipy and the standard library, never with fieldvane's own helpers.
"""

import builtins
import math
import re
import statistics

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from fieldvane.estimator.estimate import Estimate
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.io.cli import main
from fieldvane.io.estimates_csv import EstimatesWriter
from fieldvane.io.recording import write_recording
from fieldvane.io.report import make_report, summarize, write_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # PNG specification (W3C / ISO 15948), file signature
# Bit values of the flags table in README.md ("The flags bitfield"), typed in from the document.
def _readme_flags() -> dict[str, int]:
    """The flags table of README.md (| bit | value | NAME | meaning |): the documented contract."""
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    out = {}
    for line in readme.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0].isdigit() and cells[1].isdigit():
            out[cells[2]] = int(cells[1])
    return out


README_FLAGS = _readme_flags()
FIGURES = ("track.png", "components.png", "sigma.png", "nis.png", "flags.png", "magnitude.png")
N, DT = 600, 0.01
NO_EST = 5                     # first rows: nothing to report yet
TRUTH_END = N - 30             # truth stops early: the last estimates have no truth
GAP = range(200, 210)          # truth rows missing here
# Estimate times off the truth grid, in periods: within half a period they match, beyond it they do
# not (rows 200 and 209 lie 0.6 period from the truth samples either side of the gap).
JITTER = {50: 0.3, 51: 0.3, 120: 0.45, 300: -0.3, 200: -0.4, 209: 0.4}


def r9(x):
    """Round to 9 significant digits: exact in the file whether the writer keeps 9 digits or all of them."""
    return np.array([float(f"{v:.9g}") for v in np.ravel(x)]).reshape(np.shape(x))


def r10(x):
    """Round to the 10 significant digits write_recording keeps."""
    return np.array([float(f"{v:.10g}") for v in np.ravel(x)]).reshape(np.shape(x))


def make_arrays(seed=11):
    """Return (estimates columns, truth columns) of a seeded invented run crossing both hemispheres."""
    rng = np.random.default_rng(seed)
    i = np.arange(N)
    t = i * DT
    for row, shift in JITTER.items():
        t[row] += shift * DT
    tt = np.arange(TRUTH_END) * DT
    keep = np.ones(TRUTH_END, bool)
    keep[list(GAP)] = False
    tt = tt[keep]

    def direction(time):
        polar = np.radians(60 + 50 * np.sin(2 * np.pi * time / 4.0))
        az = 2 * np.pi * time / 3.0
        return np.stack([np.sin(polar) * np.cos(az), np.sin(polar) * np.sin(az), np.cos(polar)], -1)

    def magnitude(time):
        return 5000.0 + 40.0 * np.sin(2 * np.pi * time / 5.0)

    u_true = direction(t)
    sigma = 0.3 + 2.0 * (1 + np.sin(2 * np.pi * t / 2.5)) / 2           # deg
    helper = np.where(np.abs(u_true[:, 2:3]) < 0.9, [[0, 0, 1.0]], [[1.0, 0, 0]])
    e1 = np.cross(u_true, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(u_true, e1)
    s_axis = np.radians(sigma) / math.sqrt(2)                          # isotropic, trace = sigma^2
    a, b = rng.normal(size=(2, N)) * s_axis
    u = u_true + a[:, None] * e1 + b[:, None] * e2
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    b_true = magnitude(t)
    b_a = b_true + rng.normal(0, 0.02, N)
    b_b = b_true + rng.normal(0, 0.03, N)
    dof = np.full(N, 8.0)
    dof[450:500] = 4.0                                                 # probe 2 lost for a while
    nis = rng.chisquare(dof) * np.where(rng.random(N) < 0.05, 6.0, 1.0)  # a few too large
    flags = np.full(N, README_FLAGS["TRACKING"])
    coast = rng.random(N) < 0.06
    flags[coast] = README_FLAGS["COASTING"]
    gated = rng.random(N) < 0.04
    flags[gated] = README_FLAGS["COASTING"] | README_FLAGS["GATED"]
    flags[380:420] |= README_FLAGS["BLIND"]
    flags[100] |= README_FLAGS["REACQUIRED"]
    flags[:NO_EST] = README_FLAGS["NO_ESTIMATE"]
    nis[coast & ~gated] = np.nan
    dof[coast & ~gated] = 0
    u[:NO_EST] = np.nan
    sigma[:NO_EST] = np.nan
    nis[:NO_EST] = np.nan
    dof[:NO_EST] = 0
    est = {"t": r9(t), "u": r9(u), "b_nT": r9((b_a + b_b) / 2), "sigma_deg": r9(sigma), "flags": flags,
           "nis": r9(nis), "nis_dof": dof, "b_a_nT": r9(b_a), "b_b_nT": r9(b_b)}
    for ch in ("1a", "1b", "2a", "2b"):
        est[f"phase_{ch}"] = r9(rng.uniform(-180, 180, N))
    ut = direction(tt)
    truth = {"t": r10(tt), "true_ux": r10(ut[:, 0]), "true_uy": r10(ut[:, 1]), "true_uz": r10(ut[:, 2]),
             "true_b_nT": r10(magnitude(tt))}
    return est, truth


def write_estimates(path, est, extras=("nis", "nis_dof", "b_a_nT", "b_b_nT", "phase_1a", "phase_1b",
                                       "phase_2a", "phase_2b")):
    with EstimatesWriter(path, metadata={"source": "test_report"}) as w:
        for k in range(len(est["t"])):
            w.write(Estimate(float(est["t"][k]), est["u"][k], float(est["b_nT"][k]), float(est["sigma_deg"][k]),
                             int(est["flags"][k]), {x: float(est[x][k]) for x in extras}))
    return path


def write_truth(path, truth, seed=3):
    rng = np.random.default_rng(seed)
    n = len(truth["t"])
    cols = {"t": truth["t"], "f_a": np.full(n, 35000.0), "f_b": np.full(n, 23300.0)}
    for ch in ("1a", "1b", "2a", "2b"):
        cols[f"x_{ch}"], cols[f"y_{ch}"] = rng.normal(size=(2, n))
    cols.update({k: truth[k] for k in ("true_ux", "true_uy", "true_uz", "true_b_nT")})
    write_recording(path, cols, metadata={"scenario": "invented for test_report"})
    return path


def expected_summary(est, truth):
    """Recompute every summary number independently from the arrays."""
    t, u, sig, flags = est["t"], est["u"], est["sigma_deg"], est["flags"]
    has_u = np.isfinite(u).all(axis=1)
    exp = {"samples": N, "duration_s": t.max() - t.min(), "sample_period_s": float(np.median(np.diff(np.sort(t)))),
           "samples_with_direction": int(has_u.sum())}
    assert README_FLAGS == {f.name: int(f) for f in EstimateFlag}   # README documents every bit
    for name, bit in README_FLAGS.items():
        exp[f"flag_rate_{name}"] = sum(1 for f in flags if int(f) & bit) / N
    exp["flag_rate_undocumented"] = 0.0
    s = sig[np.isfinite(sig)]
    exp["sigma_deg_median"] = statistics.median(s.tolist())
    exp["sigma_deg_p95"] = stats.scoreatpercentile(s, 95)
    # Reference library: scipy.stats.chi2.interval gives the central 95% interval of each dof.
    use = np.isfinite(est["nis"]) & (est["nis_dof"] > 0)
    nis, dof = est["nis"][use], est["nis_dof"][use]
    lo, hi = stats.chi2.interval(0.95, dof)
    exp.update({"nis_samples": int(use.sum()), "nis_mean": statistics.fmean(nis.tolist()),
                "nis_dof_mean": statistics.fmean(dof.tolist()),
                "nis_per_dof_mean": statistics.fmean((nis / dof).tolist()),
                "nis_inside_95_band": float(np.mean((nis >= lo) & (nis <= hi)))})
    for key, x in (("b", est["b_nT"]), ("b_a", est["b_a_nT"]), ("b_b", est["b_b_nT"])):
        exp[f"{key}_mean_nT"], exp[f"{key}_std_nT"] = statistics.fmean(x.tolist()), statistics.stdev(x.tolist())
    ratio = (est["b_a_nT"] / est["b_b_nT"]).tolist()
    exp["b_ratio_mean"], exp["b_ratio_std"] = statistics.fmean(ratio), statistics.stdev(ratio)
    # Truth: brute-force nearest time, kept within half the truth sample period.
    tt = truth["t"]
    dist = np.abs(t[:, None] - tt[None, :])
    j = dist.argmin(axis=1)
    matched = dist[np.arange(N), j] <= 0.5 * np.median(np.diff(tt))
    tu = np.column_stack([truth["true_ux"], truth["true_uy"], truth["true_uz"]])[j]
    cosang = np.sum(u * tu, axis=1) / np.linalg.norm(u, axis=1) / np.linalg.norm(tu, axis=1)
    err = np.degrees(np.arccos(np.clip(cosang, -1, 1)))
    ok = matched & has_u
    exp.update({"truth_matched": int(matched.sum()), "truth_unmatched": int((~matched).sum()),
                "truth_matched_no_direction": int((matched & ~has_u).sum()),
                "error_rms_deg": math.sqrt(statistics.fmean((err[ok] ** 2).tolist())),
                "error_p95_deg": stats.scoreatpercentile(err[ok], 95),
                "within_1sigma": float(np.mean(err[ok] <= sig[ok])),
                "within_2sigma": float(np.mean(err[ok] <= 2 * sig[ok])),
                # scipy.stats.rayleigh: |e| of an isotropic 2-D Gaussian with per-axis std s is Rayleigh(s),
                # and sigma = sqrt(2) s, so P(|e| <= k sigma) = rayleigh.cdf(k sqrt(2)).
                "within_1sigma_expected": stats.rayleigh.cdf(math.sqrt(2)),
                "within_2sigma_expected": stats.rayleigh.cdf(2 * math.sqrt(2))})
    be = (est["b_nT"] - truth["true_b_nT"][j])[matched]
    exp.update({"b_error_mean_nT": statistics.fmean(be.tolist()), "b_error_std_nT": statistics.stdev(be.tolist()),
                "b_error_rms_nT": math.sqrt(statistics.fmean((be ** 2).tolist()))})
    return exp


def split(est):
    """Return estimates as read_estimates gives them (u split into ux, uy, uz)."""
    out = {k: v for k, v in est.items() if k != "u"}
    out.update(ux=est["u"][:, 0], uy=est["u"][:, 1], uz=est["u"][:, 2])
    return out


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    est, truth = make_arrays()
    return d, est, truth, write_estimates(d / "est.csv", est), write_truth(d / "rec.csv", truth)


@pytest.fixture(scope="module")
def report(files):
    d, est, truth, est_path, rec_path = files
    return write_report(est_path, rec_path, d / "out"), d / "out"


def parse_table(md):
    """Return {key: text value} from the summary.md table rows '| `key` | value | unit | meaning |'."""
    return {m.group(1): m.group(2).strip() for m in re.finditer(r"^\| `([^`]+)` \| ([^|]+)\|", md, re.M)}


def test_summary_numbers_equal_independent_recomputation(files):
    d, est, truth, est_path, rec_path = files
    from fieldvane.io.estimates_csv import read_estimates

    got = summarize(read_estimates(est_path), truth)
    exp = expected_summary(est, truth)
    assert set(got) == set(exp)
    for key, value in exp.items():
        assert got[key] == pytest.approx(value, rel=1e-9, abs=1e-12), key
    # The scenario's counts, known by construction.
    assert got["truth_unmatched"] == 30 + len(GAP) and got["truth_matched_no_direction"] == NO_EST
    # The invented errors are isotropic with trace sigma^2, so the Rayleigh shares apply
    # (binomial spread over ~550 samples is about 0.02; the bound here is 3 of those).
    assert abs(got["within_1sigma"] - got["within_1sigma_expected"]) < 0.06
    assert abs(got["within_2sigma"] - got["within_2sigma_expected"]) < 0.03


def test_report_files_exist_open_and_match_the_numbers(files, report):
    from matplotlib.image import imread

    d, est, truth, est_path, rec_path = files
    written, out = report
    assert [p.name for p in written] == ["summary.md", *FIGURES]
    for name in FIGURES:
        path = out / name
        assert path.read_bytes()[:8] == PNG_SIGNATURE
        img = imread(path)
        assert img.ndim == 3 and img.shape[2] in (3, 4) and img.shape[0] > 250 and img.shape[1] > 500
        assert img[..., :3].std() > 0.05            # not a blank canvas
    md = (out / "summary.md").read_text()
    assert "not a safety or navigation instrument" in md
    table = parse_table(md)
    exp = expected_summary(est, truth)
    assert set(table) == set(exp)
    for key, value in exp.items():
        assert float(table[key]) == pytest.approx(value, rel=1e-5, abs=1e-12), key
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert sorted(links) == sorted(FIGURES)
    assert all((out / link).is_file() for link in links)


def test_command_prints_numbers_and_files(files, tmp_path, capsys):
    d, est, truth, est_path, rec_path = files
    rc = main(["report", str(est_path), "--truth", str(rec_path), "-o", str(tmp_path / "r")])
    out = capsys.readouterr().out
    assert rc == 0
    assert re.search(r"^error_rms_deg\s+[0-9.]+ deg$", out, re.M)
    assert re.search(r"^nis_inside_95_band\s+0\.[0-9]+$", out, re.M)
    for name in ("summary.md", *FIGURES):
        assert str(tmp_path / "r" / name) in out


def test_minimal_file_without_extras_or_truth(tmp_path):
    est, _ = make_arrays(seed=5)
    path = write_estimates(tmp_path / "plain.csv", est, extras=())
    written = write_report(path, None, tmp_path / "out")
    assert [p.name for p in written] == ["summary.md", "track.png", "components.png", "sigma.png",
                                         "flags.png", "magnitude.png"]
    table = parse_table((tmp_path / "out" / "summary.md").read_text())
    assert "nis_mean" not in table and "error_rms_deg" not in table and "b_ratio_mean" not in table
    assert float(table["sigma_deg_median"]) == pytest.approx(np.nanmedian(est["sigma_deg"]), rel=1e-5)


def test_nis_dof_defaults_to_twice_the_channels():
    est, _ = make_arrays(seed=6)
    cols = split(est)
    del cols["nis_dof"]
    use = np.isfinite(cols["nis"])
    lo, hi = stats.chi2.interval(0.95, 8)     # reference library: scipy; 4 phase_* columns -> 8 dof
    expected = np.mean((cols["nis"][use] >= lo) & (cols["nis"][use] <= hi))
    assert summarize(cols)["nis_inside_95_band"] == pytest.approx(expected, rel=1e-12)
    lo, hi = stats.chi2.interval(0.95, 4)     # given 2 channels -> 4 dof
    expected = np.mean((cols["nis"][use] >= lo) & (cols["nis"][use] <= hi))
    assert summarize(cols, channels=2)["nis_inside_95_band"] == pytest.approx(expected, rel=1e-12)


def test_without_matplotlib_summary_is_still_written(files, tmp_path, monkeypatch, capsys):
    d, est, truth, est_path, rec_path = files
    real_import = builtins.__import__

    def no_matplotlib(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError(f"No module named {name!r} (blocked by the test)")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_matplotlib)
    rc = main(["report", str(est_path), "--truth", str(rec_path), "-o", str(tmp_path / "r")])
    captured = capsys.readouterr()
    assert rc == 0
    assert "install fieldvane[plots] for the figures" in captured.err
    assert "error_rms_deg" in captured.out
    assert sorted(p.name for p in (tmp_path / "r").iterdir()) == ["summary.md"]
    md = (tmp_path / "r" / "summary.md").read_text()
    assert "install fieldvane[plots] for the figures" in md
    assert float(parse_table(md)["samples"]) == N


def _bad_copy(src, dst, data_row, column, value):
    """Copy an estimates CSV replacing one field; return the file line number of that data row."""
    lines = src.read_text().splitlines()
    header_at = next(k for k, s in enumerate(lines) if not s.startswith("#"))
    col = lines[header_at].split(",").index(column)
    at = header_at + 1 + data_row
    parts = lines[at].split(",")
    parts[col] = value
    lines[at] = ",".join(parts)
    dst.write_text("\n".join(lines) + "\n")
    return at + 1


@pytest.mark.parametrize("column, value, message", [
    ("sigma_deg", "abc", "not a number"),
    ("ux", "0.2", "not a unit vector"),
    ("flags", "-3", "non-negative integer"),
])
def test_malformed_estimates_exit_2_naming_file_line_column(files, tmp_path, capsys, column, value, message):
    d, est, truth, est_path, rec_path = files
    bad = tmp_path / "bad.csv"
    line = _bad_copy(est_path, bad, 40, column, value)
    rc = main(["report", str(bad), "-o", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert rc == 2
    assert f"{bad}:{line}: column '{column}'" in err and message in err
    assert "Traceback" not in err


def test_truth_file_without_truth_columns_exits_2(files, tmp_path, capsys):
    d, est, truth, est_path, rec_path = files
    rec = tmp_path / "plain_rec.csv"
    write_recording(rec, {"t": truth["t"], "f_a": truth["t"] * 0 + 35000.0, "f_b": truth["t"] * 0 + 23300.0,
                          "x_1a": truth["t"], "y_1a": truth["t"], "x_1b": truth["t"], "y_1b": truth["t"]})
    rc = main(["report", str(est_path), "--truth", str(rec), "-o", str(tmp_path / "r")])
    assert rc == 2
    assert f"{rec}: column 'true_ux'" in capsys.readouterr().err


# ------------------------------------------------------------------- static stretch: noise statistics

FS_STATIC = 100.0
S_AXIS = 0.02                 # deg of white direction noise per tangent axis (total sqrt(2) x this)
S_B = 0.005                   # nT of white magnitude noise


def make_static_run(seed=21, moving_s=10.0, still_s=50.0):
    """Return (estimates columns, truth columns): a field turning for moving_s, then still for still_s,
    estimated with white noise of known size (invented numbers)."""
    rng = np.random.default_rng(seed)
    t = np.arange(int((moving_s + still_s) * FS_STATIC)) / FS_STATIC
    az = np.radians(20.0 * np.minimum(t, moving_s))                  # 20 deg/s, then still
    polar = np.radians(50.0)
    u_true = np.column_stack([np.sin(polar) * np.cos(az), np.sin(polar) * np.sin(az), np.full(t.size, np.cos(polar))])
    helper = np.where(np.abs(u_true[:, 2:3]) < 0.9, [[0, 0, 1.0]], [[1.0, 0, 0]])
    e1 = np.cross(u_true, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(u_true, e1)
    a, b = np.radians(rng.normal(0, S_AXIS, (2, t.size)))
    u = u_true + a[:, None] * e1 + b[:, None] * e2
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    b_true = np.full(t.size, 30000.0)
    est = {"t": r9(t), "u": r9(u), "b_nT": r9(b_true + rng.normal(0, S_B, t.size)),
           "sigma_deg": np.full(t.size, math.sqrt(2) * S_AXIS), "flags": np.full(t.size, README_FLAGS["TRACKING"]),
           "sigma_b_nT": np.full(t.size, S_B), "bound_deg": np.full(t.size, math.sqrt(2) * S_AXIS)}
    truth = {"t": r10(t), "true_ux": r10(u_true[:, 0]), "true_uy": r10(u_true[:, 1]), "true_uz": r10(u_true[:, 2]),
             "true_b_nT": b_true}
    return est, truth


@pytest.fixture(scope="module")
def static_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("static")
    est, truth = make_static_run()
    return (d, est, truth, write_estimates(d / "est.csv", est, extras=("sigma_b_nT", "bound_deg")),
            write_truth(d / "rec.csv", truth))


def adev_by_averages(y, m):
    """ADEV as half the mean squared difference of adjacent overlapping m-sample averages (the textbook
    definition, NIST SP 1065 eq. (5) with overlapping averages), computed without cumulative sums."""
    kernel = np.ones(m) / m
    means = np.convolve(y, kernel, mode="valid")
    return math.sqrt(0.5 * np.mean((means[m:] - means[:-m]) ** 2))


def test_static_stretch_noise_matches_white_noise_closed_forms(static_files, tmp_path):
    from scipy.signal import welch

    from fieldvane.io.estimates_csv import read_estimates

    d, est, truth, est_path, rec_path = static_files
    out = tmp_path / "r"
    written = write_report(est_path, rec_path, out)
    assert [p.name for p in written][-2:] == ["allan.png", "spectrum.png"]
    table = {k: float(v) for k, v in parse_table((out / "summary.md").read_text()).items()}
    # The truth stops turning at 10 s; the first second of the still part is dropped as settling.
    assert table["static_start_s"] == pytest.approx(11.0, abs=1.0 / FS_STATIC + 1e-9)
    assert table["static_end_s"] == pytest.approx(59.99)
    assert table["static_rate_hz"] == pytest.approx(FS_STATIC)
    # White noise closed forms: ADEV(tau0) = sigma (NIST SP 1065), one-sided density sigma sqrt(2 / fs).
    total = math.sqrt(2) * S_AXIS
    assert table["static_dir_adev_tau0_deg"] == pytest.approx(total, rel=0.03)
    assert table["static_dir_adev_1s_deg"] == pytest.approx(total / math.sqrt(FS_STATIC), rel=0.15)
    assert table["static_dir_white_deg_per_rtHz"] == pytest.approx(total * math.sqrt(2 / FS_STATIC), rel=0.12)
    assert table["static_bound_density_deg_per_rtHz"] == pytest.approx(total * math.sqrt(2 / FS_STATIC), rel=1e-5)
    assert table["static_b_adev_tau0_nT"] == pytest.approx(S_B, rel=0.03)
    assert table["static_b_white_nT_per_rtHz"] == pytest.approx(S_B * math.sqrt(2 / FS_STATIC), rel=0.12)
    assert table["static_dir_rms_deg"] == pytest.approx(total, rel=0.03)
    # The same numbers recomputed independently from the file's rows: adjacent-average ADEV and
    # scipy's Welch over the band the notes name.
    cols = read_estimates(est_path)
    rows = (cols["t"] >= table["static_start_s"] - 1e-9) & (cols["t"] <= table["static_end_s"] + 1e-9)
    b = cols["b_nT"][rows]
    assert table["static_samples"] == rows.sum()
    assert table["static_b_adev_tau0_nT"] == pytest.approx(adev_by_averages(b, 1), rel=1e-5)
    assert table["static_b_adev_1s_nT"] == pytest.approx(adev_by_averages(b, 128), rel=1e-5)
    notes = (out / "summary.md").read_text()
    lo, hi = map(float, re.search(r"between ([0-9.]+) and ([0-9.]+) Hz", notes).groups())
    f, p = welch(b, fs=FS_STATIC, nperseg=1024)
    # The documented band: the decade above the second frequency bin.
    band = (f >= f[2]) & (f <= 10 * f[2])
    assert (lo, hi) == (pytest.approx(f[2], rel=3e-3), pytest.approx(10 * f[2], rel=3e-3))
    assert table["static_b_white_nT_per_rtHz"] == pytest.approx(math.sqrt(np.mean(p[band])), rel=1e-3)
    # Magnitude uncertainty: sigma_b_nT shown, and the share of |error| <= sigma_b_nT against the
    # 1-D Gaussian 68.3% (scipy.stats.norm, reference library; binomial spread ~0.006 over 6000 rows).
    assert table["sigma_b_nT_median"] == pytest.approx(S_B)
    assert table["b_within_1sigma_expected"] == pytest.approx(stats.norm.cdf(1) - stats.norm.cdf(-1), rel=1e-6)
    err = np.abs(est["b_nT"] - truth["true_b_nT"])
    assert table["b_within_1sigma"] == pytest.approx(np.mean(err <= S_B), abs=1e-6)
    assert abs(table["b_within_1sigma"] - 0.6827) < 0.03
    assert "says nothing about its honesty" not in notes


def test_static_stretch_found_without_truth_and_chosen_by_option(static_files, tmp_path, capsys, monkeypatch):
    from fieldvane.io import plots

    def no_plots():
        raise plots.PlotsUnavailable("figures skipped by the test (speed)")

    monkeypatch.setattr(plots, "require_matplotlib", no_plots)
    d, est, truth, est_path, rec_path = static_files
    rc = main(["report", str(est_path), "-o", str(tmp_path / "a")])
    text = capsys.readouterr().out
    assert rc == 0
    start = float(re.search(r"^static_start_s\s+([0-9.]+) s$", text, re.M).group(1))
    assert 10.0 <= start <= 12.5                   # estimates alone: still from about 10 s, settling dropped
    assert re.search(r"^static_dir_white_deg_per_rtHz\s+[0-9.]+ deg/sqrt\(Hz\)$", text, re.M)
    rc = main(["report", str(est_path), "--static", "20:40", "-o", str(tmp_path / "b")])
    text = capsys.readouterr().out
    assert rc == 0
    assert re.search(r"^static_start_s\s+20 s$", text, re.M) and re.search(r"^static_end_s\s+40 s$", text, re.M)
    assert re.search(r"^static_samples\s+2001$", text, re.M)
    for bad, message in (("5", "--static expects START:END"), ("40:20", "START < END"),
                         ("100:200", "no estimate between 100 and 200 s")):
        assert main(["report", str(est_path), "--static", bad, "-o", str(tmp_path / "c")]) == 2
        err = capsys.readouterr().err
        assert message in err and "Traceback" not in err


def test_moving_run_has_no_static_stretch(files, tmp_path):
    d, est, truth, est_path, rec_path = files
    out = make_report(est_path, rec_path, tmp_path / "r", figures=False)
    assert not any(k.startswith("static_") for k in out.summary)
    assert any("no static stretch" in n for n in out.notes)


def test_float_noise_is_stated_not_plotted(tmp_path, monkeypatch):
    # A simulator with exact Larmor frequencies gives magnitudes that differ only in the last bits:
    # the magnitude figure must state them as constants instead of drawing float noise.
    from fieldvane.io import plots

    est, truth = make_static_run(seed=22, moving_s=0.0, still_s=8.0)
    est["b_nT"] = np.full(est["t"].size, 20000.000002507797)
    est["b_a_nT"] = est["b_nT"] + np.spacing(20000.0) * (np.arange(est["t"].size) % 2)
    est["b_b_nT"] = np.full(est["t"].size, 19999.99999947145)
    truth["true_b_nT"] = np.full(truth["t"].size, 20000.0)
    path = write_estimates(tmp_path / "exact.csv", est, extras=("b_a_nT", "b_b_nT"))
    figures = {}
    real_save = plots.save

    def keep(fig, p):
        figures[Path(p).name] = fig
        return real_save(fig, p)

    monkeypatch.setattr(plots, "save", keep)
    out = make_report(path, write_truth(tmp_path / "rec.csv", truth), tmp_path / "r")
    fig = figures["magnitude.png"]
    drawn = [line for ax in fig.axes for line in ax.get_lines() if len(line.get_xdata()) > 2]
    assert drawn == []
    text = " ".join(t.get_text() for ax in fig.axes for t in ax.texts)
    for name in ("b_nT", "b_a_nT", "b_b_nT", "b_nT minus truth", "b_a_nT / b_b_nT"):
        assert f"{name} is constant within float resolution" in text
    assert out.summary["b_a_std_nT"] == 0.0 and out.summary["b_ratio_std"] == 0.0
    assert any("b_nT is constant within float resolution" in n for n in out.notes)
    assert "allan.png" in figures and "spectrum.png" in figures


def test_a_constant_magnitude_offset_is_not_judged_against_sigma(tmp_path):
    # Noise-free simulated frequencies leave |B| off the truth by one constant (the calibration's
    # rounding); the share within sigma_b_nT of that offset is 0 or 1 and says nothing about honesty.
    est, truth = make_static_run(seed=23, moving_s=0.0, still_s=8.0)
    est["b_nT"] = np.full(est["t"].size, 20000.0000026)
    est["sigma_b_nT"] = np.full(est["t"].size, 1.9e-6)
    truth["true_b_nT"] = np.full(truth["t"].size, 20000.0)
    path = write_estimates(tmp_path / "exact.csv", est, extras=("sigma_b_nT",))
    out = make_report(path, write_truth(tmp_path / "rec.csv", truth), tmp_path / "r", figures=False)
    assert out.summary["b_error_std_nT"] == 0.0 and out.summary["b_within_1sigma"] == 0.0
    assert any("one constant offset" in n and "says nothing about its honesty" in n for n in out.notes)


def test_sigma_figure_explains_error_below_the_bound(static_files, tmp_path):
    from fieldvane.io import plots
    from fieldvane.io.estimates_csv import read_estimates
    from fieldvane.io.report import find_static, static_noise

    d, est, truth, est_path, rec_path = static_files
    cols = read_estimates(est_path)
    still = static_noise(cols, *find_static(cols))
    figures = {}
    real_save = plots.save
    try:
        plots.save = lambda fig, p: figures.setdefault(Path(p).name, fig) and real_save(fig, p)
        plots.plot_sigma(tmp_path / "sigma.png", cols)
        plots.plot_allan(tmp_path / "allan.png", still)
        plots.plot_spectrum(tmp_path / "spectrum.png", still)
        plots.plot_magnitudes(tmp_path / "magnitude.png", cols)
    finally:
        plots.save = real_save
    title = figures["sigma.png"]._suptitle.get_text()
    assert "averages many samples" in title and "single-sample Cramer-Rao bound" in title
    # Plain tick labels everywhere: no scientific notation, no offset text.
    for name, fig in figures.items():
        fig.canvas.draw()
        for ax in fig.axes:
            labels = [t.get_text() for t in ax.get_yticklabels() + ax.get_xticklabels()]
            assert labels and not any("e-" in x or "e+" in x or "\u00d710" in x or "$" in x for x in labels), \
                (name, labels)
            assert ax.yaxis.get_offset_text().get_text() == "", name
