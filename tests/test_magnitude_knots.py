"""Estimates handed out piece by piece (Tracker.run_pieces, what replay writes while the filter goes on) equal the
whole block's (run_arrays) bit for bit, also where the magnitude model's knots are not finite; the compiled rule
that corrects the rows equals its numpy statement."""

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.flags import EstimateFlag
from fieldvane.estimator.magnitude import DISAGREE_SIGMAS, disagreement
from fieldvane.estimator.magnitude_knots import MAGNITUDE_STRIDE, MagnitudeKnots
from fieldvane.estimator.magnitude_model import fit_magnitude_model
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.tracker import Tracker, TrackRecord
from fieldvane.io.calfile import load_calibration
from fieldvane.io.recording import read_recording

GOLDEN = Path(__file__).parent / "golden"


@pytest.fixture(scope="module")
def stream():
    cal = load_calibration(GOLDEN / "golden_cal.json")
    # An invented magnitude model (a direction-dependent shift of each isotope) on the golden calibration.
    rng = np.random.default_rng(5)
    gammas = cal.gammas_hz_per_nt
    u = rng.normal(size=(600, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    b = np.repeat([5000.0, 20000.0, 40000.0, 80000.0], 150)
    shift = np.column_stack([0.2 * u[:, 2] ** 2, -0.1 * u[:, 0]]) * (b[:, None] / 20000.0)
    f = (b[:, None] + shift + rng.normal(0, 0.01, (600, 2))) * gammas
    cal = dataclasses.replace(cal, magnitude_model=fit_magnitude_model(u, b, f, gammas))
    block, _ = read_recording(GOLDEN / "golden_stream.csv")
    # Nuisances that make knots non-finite: a missing frequency of one isotope for a while, one probe dark,
    # then both probes dark (no direction to correct at).
    f, z = block.f.copy(), block.z.copy()
    f[700:760, 1] = np.nan
    z[1200:1500, 2:] = complex(np.nan, np.nan)
    z[2000:2300, :] = complex(np.nan, np.nan)
    return cal, dataclasses.replace(block, f=f, z=z)


def _whole(cal, block):
    return Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).run_arrays(block, 1 << 20)


def _assert_same(a: TrackRecord, b: TrackRecord):
    for f in dataclasses.fields(TrackRecord):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, dict):
            assert x.keys() == y.keys()
            for k in x:
                np.testing.assert_array_equal(x[k], y[k])
        else:
            np.testing.assert_array_equal(x, y, err_msg=f.name)        # NaN in the same places


@pytest.mark.parametrize("piece", [1, 7, 64, 500, 2999])
def test_pieces_equal_the_whole_block(stream, piece):
    cal, block = stream
    whole = _whole(cal, block)
    # The model corrects |B| (sigma_b finite), and isotope b's knots have no value while its frequency is missing.
    assert np.isfinite(whole.sigma_b_nT).all() and np.isnan(whole.b_b_nT[700:760]).all()
    tracker = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate, report_channels=True)
    pieces = list(tracker.run_pieces(block, piece))
    assert sum(len(p) for p in pieces) == len(block)
    if piece <= 500:
        assert len(pieces) > 1                  # handed out before the block's end
    joined = TrackRecord.concatenate(pieces)
    reference = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate,
                        report_channels=True).run_arrays(block, 1 << 20)
    _assert_same(joined, reference)


def test_short_blocks_are_evaluated_sample_by_sample(stream):
    cal, block = stream
    short = dataclasses.replace(block, t=block.t[:4 * MAGNITUDE_STRIDE], f=block.f[:4 * MAGNITUDE_STRIDE],
                                z=block.z[:4 * MAGNITUDE_STRIDE])
    tracker = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate)
    pieces = list(tracker.run_pieces(short, 10))
    assert [len(p) for p in pieces] == [10] * 6 + [4]        # every sample final at once
    _assert_same(TrackRecord.concatenate(pieces), _whole(cal, short))


def test_knots_are_every_stride_and_the_last_sample():
    k = MagnitudeKnots(None, np.ones(2), 100)
    assert k.rows.tolist() == list(range(0, 100, MAGNITUDE_STRIDE)) + [99]
    assert MagnitudeKnots(None, np.ones(2), 97).rows[-1] == 96


def test_whole_block_magnitude_equals_the_previous_algorithm(stream):
    # The previous whole-block rule, written out here as the reference: the model at every 16th sample and the
    # last, each isotope's correction and the fusion inputs interpolated over their finite knots, fused.
    cal, block = stream
    tracker = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate)
    rec = tracker.run_arrays(block, 1 << 20)
    n, f = len(block), block.f
    rows = np.unique(np.r_[np.arange(0, n, MAGNITUDE_STRIDE), n - 1])
    est = cal.magnitude_model.estimate(f[rows], rec.u[rows], np.radians(rec.sigma_deg[rows]))
    with np.errstate(invalid="ignore"):
        m = f / cal.gammas_hz_per_nt[None, :]
    idx = np.arange(n)

    def interp(values):
        ok = np.isfinite(values)
        return np.interp(idx, rows[ok], values[ok]) if ok.any() else np.full(n, np.nan)

    delta = m[rows] - est.b_per_isotope
    per = np.column_stack([m[:, k] - interp(delta[:, k]) for k in range(2)])
    w = np.column_stack([interp(est.weights[:, k]) for k in range(2)])
    both = np.isfinite(per).all(axis=1)
    fused = np.where(both, (w * np.where(np.isfinite(per), per, 0.0)).sum(axis=1),
                     np.where(np.isfinite(per[:, 0]), per[:, 0], per[:, 1]))
    good = np.isfinite(fused)
    assert good.mean() > 0.9
    np.testing.assert_array_equal(rec.b_nT[good], fused[good])
    np.testing.assert_array_equal(rec.sigma_b_nT[good], interp(est.sigma_b_nT)[good])


def test_an_empty_block_gives_an_empty_record(stream):
    cal, block = stream
    empty = dataclasses.replace(block, t=block.t[:0], f=block.f[:0], z=block.z[:0])
    rec = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).run_arrays(empty)
    assert len(rec) == 0 and rec.u.shape == (0, 3) and rec.b_nT.shape == (0,)


_DISAGREE = int(EstimateFlag.MAGNITUDE_DISAGREE)


def _numpy_rule(per_c, fused, sigma_b, sigma_diff, b, per, flags, tolerance):
    """The tracker's rows from the model's corrected values, as numpy statements (the rule before it was compiled):
    the model's |B| where it gives one, each isotope's where finite, MAGNITUDE_DISAGREE by estimator/magnitude.py."""
    good = np.isfinite(fused)
    disagree = disagreement(per_c, sigma_diff, tolerance)
    return (np.where(good, fused, b), np.where(np.isfinite(per_c), per_c, per), np.where(good, sigma_b, np.nan),
            np.where(good, (flags & ~_DISAGREE) | np.where(disagree, _DISAGREE, 0), flags))


@pytest.mark.parametrize("tolerance", [1e-3, 1e-6, 0.0])
def test_compiled_row_rule_equals_the_numpy_rule(tolerance):
    from fieldvane.estimator import magnitude_core

    rng = np.random.default_rng(11)
    n = 4000
    per_c = 20000.0 + rng.normal(0, 1.0, (n, 2)) * rng.choice([1e-3, 1.0, 100.0], (n, 2))
    fused = per_c.mean(axis=1) + rng.normal(0, 0.1, n)
    sigma_b = rng.uniform(0, 1, n)
    sigma_diff = rng.choice([0.0, 1e-3, 0.05, 1.0, 30.0], n)
    # Missing values everywhere they can be missing, and the extremes: a zero, an overflowing sum.
    for a, share in ((per_c, 0.1), (fused, 0.1), (sigma_b, 0.05), (sigma_diff, 0.2)):
        a[rng.random(a.shape) < share] = np.nan
    per_c[:5] = [[1.7e308, 1.7e308], [-0.0, 0.0], [np.inf, 1.0], [0.0, 5.0], [-1.0, 1.0]]
    sigma_diff[:5] = [1.0, np.nan, 1.0, np.inf, 0.0]
    b = rng.normal(20000.0, 1.0, n)
    per = rng.normal(20000.0, 1.0, (n, 2))
    flags = rng.integers(0, 64, n)
    got_b, got_per, got_flags, got_sigma = b.copy(), per.copy(), flags.copy(), np.empty(n)
    with np.errstate(all="ignore"):               # the overflowing and 0 * inf rows are meant
        want = _numpy_rule(per_c, fused, sigma_b, sigma_diff, b, per, flags, tolerance)
        magnitude_core.apply_corrections(per_c, fused, sigma_b, sigma_diff, tolerance, DISAGREE_SIGMAS, _DISAGREE,
                                         got_b, got_per, got_flags, got_sigma)
    for x, y in zip((got_b, got_per, got_sigma, got_flags), want):
        np.testing.assert_array_equal(x, y)
    assert 0 < np.count_nonzero(got_flags & _DISAGREE) < n      # both outcomes occur


def test_a_live_batch_is_corrected_as_the_model_and_the_numpy_rule_give(stream):
    # A live batch (every sample evaluated, one compiled call) against the model's own estimate and the numpy rule.
    cal, block = stream
    rec = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).run_arrays(block, 1 << 20)
    model = cal.magnitude_model
    gammas = cal.gammas_hz_per_nt
    for lo in (0, 690, 1190, 2010, 2700):
        sl = slice(lo, lo + 64)
        f, u, sigma = block.f[sl], rec.u[sl], rec.sigma_deg[sl]
        with np.errstate(invalid="ignore"):
            per = f / gammas
        b = per.mean(axis=1)
        flags = rec.flags[sl] | np.where(np.arange(64) % 3 == 0, _DISAGREE, 0)
        knots = MagnitudeKnots(model, gammas, 64)
        assert knots.dense
        knots.advance(64, f, u, sigma)
        got = knots.apply(0, f, u, sigma, b, per, flags, 1e-3)
        est = model.estimate(f, u, np.radians(sigma))
        want = _numpy_rule(est.b_per_isotope, est.b_nT, est.sigma_b_nT, est.sigma_difference_nT, b, per, flags,
                           1e-3)
        for x, y in zip(got, want):
            np.testing.assert_array_equal(x, y)


def test_a_zero_frequency_counts_as_missing_between_knots_as_in_a_live_batch(stream):
    # An unlocked pump loop may report 0 Hz: no |B| from it. Between knots (a replayed block) it must give what a
    # missing value gives, as it does sample by sample (magnitude_core.estimate_rows takes only f / gamma > 0).
    cal, block = stream
    zero = block.f.copy()
    zero[700:760, 1] = 0.0                         # the fixture has nan there
    whole_nan = _whole(cal, block)
    whole_zero = _whole(cal, dataclasses.replace(block, f=zero))
    for name in ("b_nT", "sigma_b_nT", "flags", "u"):
        np.testing.assert_array_equal(getattr(whole_zero, name), getattr(whole_nan, name), err_msg=name)
    np.testing.assert_array_equal(whole_zero.b_nT[700:760], whole_zero.b_a_nT[700:760])   # isotope a's alone


def test_samples_next_to_a_gap_in_both_frequencies_keep_their_magnitude(stream):
    # Both loops silent for 0.5 s: the knots there have no |B|. The samples up to a stride on either side are
    # corrected between the knots that do, and agree with the same samples evaluated one by one (a live batch's
    # way, magnitude_core.estimate_rows) to far below the frequency noise.
    cal, block = stream
    f = block.f.copy()
    f[1000:1100] = np.nan
    gapped = dataclasses.replace(block, f=f)
    whole = _whole(cal, gapped)
    tracker = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate)
    one_by_one = TrackRecord.concatenate([tracker.step_record([gapped.sample(i) for i in range(k, min(k + 50, 1300))])
                                          for k in range(0, 1300, 50)])
    near = np.r_[968:1000, 1100:1132]
    assert np.isfinite(whole.b_nT[near]).all()
    noise_nT = float(np.min(cal.magnitude_model.noise_nT))          # the fitted frequency noise, nT
    assert np.max(np.abs(whole.b_nT[near] - one_by_one.b_nT[near])) < 0.1 * noise_nT
