"""The live loggers' rows made in compiled code (Tracker.step_rows, io.estimates_csv.live_block) equal, bit for bit,
the rows made from the tracker's TrackRecord (step_record, then record_block), on streams with the bench's
nuisances: optical power drift, a probe going dark, a lock-in filter, noise bursts, dropouts; with and without
a calibrated magnitude model; in the live loop's usual batches of one to three samples and in catch-up batches
long enough for the magnitude model's knots.

Reference: the TrackRecord path (estimator/tracker.py's numpy code: numpy.degrees, numpy.sqrt, the
magnitude knots) that replay uses; the replay's own bytes are compared with the live loop's in test_live.py.
"""

from __future__ import annotations

import dataclasses
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from fieldvane.estimator.calibration import fit_calibration
from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.estimator.samples import SampleBlock
from fieldvane.estimator.snapshot import SnapshotSolver
from fieldvane.estimator.tracker import ROW_EXTRAS, ROW_FLOAT_COLUMNS, ROW_INT_COLUMNS, Tracker
from fieldvane.firmware_sim.scenario import load_scenario, simulate
from fieldvane.io.calfile import load_calibration
from fieldvane.io.estimates_csv import live_block, record_block

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
GOLDEN = Path(__file__).parent / "golden"
BATCHES = (1, 2, 1, 3, 1, 70, 2, 1, 130, 1)        # live batches, and catch-up ones past the per-sample limit (64)


@pytest.fixture(scope="module", params=["without magnitude model", "with magnitude model"])
def calibrated(request):
    """(calibration, initiator): the golden calibration (no magnitude model), or one fitted to the realistic scan
    (light shifts, exchange pull, heading error: a magnitude model)."""
    if request.param == "without magnitude model":
        cal = load_calibration(GOLDEN / "golden_cal.json")
        assert cal.magnitude_model is None
    else:
        run = simulate(load_scenario(EXAMPLES / "realistic_scan.toml"))
        b = np.linalg.norm(run.applied_b_nT, axis=1)
        cal = fit_calibration(run.applied_b_nT / b[:, None], b, run.z, run.f, run.channels)
        assert cal.magnitude_model is not None
    return cal, SnapshotSolver.from_calibration(cal).initiate


def _stream(name: str, seconds: float) -> tuple[SampleBlock, FilterSettings]:
    run = simulate(dataclasses.replace(load_scenario(EXAMPLES / f"{name}.toml"), duration_s=seconds))
    settings = FilterSettings()
    if run.lockin is not None:
        settings = settings.replace(lockin_time_constant_s=run.lockin.time_constant_s,
                                    lockin_filter_order=run.lockin.order)
    return SampleBlock(run.t, run.f, run.z, run.channels), settings


def _batches(n: int):
    lo, k = 0, 0
    while lo < n:
        yield lo, min(n, lo + BATCHES[k % len(BATCHES)])
        lo, k = lo + BATCHES[k % len(BATCHES)], k + 1


def _assert_same_block(got, want, where: str) -> None:
    assert got.keys() == want.keys(), where
    for name in want.keys():
        a, b = got.column(name), want.column(name)
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=True), f"{where}: column {name}"


@pytest.mark.parametrize("name, seconds", [("bench_power_drift", 6), ("probe2_dropout", 14), ("probe2_fade", 10),
                                           ("lockin_filtered_turn", 4), ("noise_burst", 6), ("dropouts", 6),
                                           ("realistic_turn_1000nT", 4)])
def test_live_rows_equal_the_records_rows(calibrated, name, seconds):
    cal, initiate = calibrated
    block, settings = _stream(name, seconds)
    rows_tracker, record_tracker = Tracker(cal, settings, initiate), Tracker(cal, settings, initiate)
    flags_seen = 0
    for lo, hi in _batches(len(block)):
        got, want = live_block(rows_tracker, block[lo:hi]), record_block(record_tracker.step_record(block[lo:hi]))
        _assert_same_block(got, want, f"{name} samples {lo}..{hi}")
        flags_seen |= int(np.bitwise_or.reduce(want.column("flags")))
    assert rows_tracker.counters.as_dict() == record_tracker.counters.as_dict()
    assert len(rows_tracker.resets) == len(record_tracker.resets) >= 1
    assert flags_seen != 0


def test_channel_readouts_take_the_records_path(calibrated):
    cal, initiate = calibrated
    block, settings = _stream("probe2_dropout", 3)
    a = Tracker(cal, settings, initiate, report_channels=True)
    b = Tracker(cal, settings, initiate, report_channels=True)
    for lo, hi in _batches(len(block)):
        got = live_block(a, block[lo:hi])
        assert any(k.startswith("phase_") for k in got.keys())
        _assert_same_block(got, record_block(b.step_record(block[lo:hi])), f"samples {lo}..{hi}")


def test_the_row_columns_are_the_records_columns(calibrated):
    """The names step_rows' matrices carry are the TrackRecord's columns, extras in their written order."""
    cal, initiate = calibrated
    block, settings = _stream("static", 1)
    rec = Tracker(cal, settings, initiate).step_record(block[:5])
    assert tuple(rec.extra_columns()) == ROW_EXTRAS
    assert set(ROW_FLOAT_COLUMNS) | set(ROW_INT_COLUMNS) == set(record_block(rec).keys())
    floats, ints = Tracker(cal, settings, initiate).step_rows(block[:5])
    assert floats.shape == (5, len(ROW_FLOAT_COLUMNS)) and ints.shape == (5, len(ROW_INT_COLUMNS))
    assert floats.dtype == np.float64 and ints.dtype == np.int64
    empty = Tracker(cal, settings, initiate).step_rows(block[:0])
    assert empty[0].shape == (0, len(ROW_FLOAT_COLUMNS)) and empty[1].shape == (0, len(ROW_INT_COLUMNS))


@pytest.mark.parametrize("readouts", [False, True])
def test_a_live_blocks_utc_column_is_the_added_ones(calibrated, readouts):
    """`run`'s utc written into the block's spare column (GeoOutput.live_block) gives the columns and the CSV
    logger's bytes that adding it afterwards gives (GeoOutput.add_to_block). Reference: the per-record
    CsvFormatter.format of each row."""
    from fieldvane.io.geo_output import setup
    from fieldvane.io.sinks import CsvFormatter

    cal, initiate = calibrated
    block, settings = _stream("dropouts", 3)
    geo = setup(None, None, str(GOLDEN / "golden_cal.json"), host_clock=True)
    a = Tracker(cal, settings, initiate, report_channels=readouts)
    b = Tracker(cal, settings, initiate, report_channels=readouts)
    got, want = [], []
    for lo, hi in _batches(len(block)):
        utc = 1.8e9 + np.arange(lo, hi) * 1e-3 + 1e-7
        got.append(geo.live_block(a, block[lo:hi], utc))
        want.append(geo.add_to_block(record_block(b.step_record(block[lo:hi])), utc))
        _assert_same_block(got[-1], want[-1], f"samples {lo}..{hi}")
    assert got[0].keys()[-1] == "utc"
    assert got[0]._where["utc"][0] == ("o" if readouts else "f")          # the spare float column, without readouts
    formatter = CsvFormatter()
    formatter.bind(want[0].keys())
    lines = formatter.format_items(got)
    assert lines == [formatter.format(row) for w in want for row in w.rows()]
    # the utc text, ISO 8601 (reference: Python's datetime)
    assert "," + datetime.fromtimestamp(1.8e9, timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.") in lines[0]


def test_run_with_a_site_adds_the_columns_the_record_gives(calibrated):
    """`run --site`: the geographic columns added to a live block (read from its own columns) equal those of its
    TrackRecord (GeoOutput.for_record, replay's path), value for value."""
    from fieldvane.io.geo_output import setup

    cal, initiate = calibrated
    block, settings = _stream("probe2_dropout", 2)
    geo = setup(str(EXAMPLES / "pier" / "pier_site_angles.toml"), host_clock=True)
    a, b = Tracker(cal, settings, initiate), Tracker(cal, settings, initiate)
    for lo, hi in _batches(len(block)):
        utc = 1.8e9 + np.arange(lo, hi) * 1e-3
        got = geo.live_block(a, block[lo:hi], utc)
        rec = b.step_record(block[lo:hi])
        want = record_block(rec).with_columns(geo.for_record(rec, utc))
        _assert_same_block(got, want, f"samples {lo}..{hi}")
    assert {"D_deg", "X_nT", "sigma_F_nT", "utc"} <= set(got.keys())
