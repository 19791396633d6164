"""Estimates CSV: compiled float text equal to Python's repr, block writer byte-identical to the CSV
sink, exact round trip through the reader, clear errors, nothing left behind on failure."""

import datetime
import math
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS, Estimate
from fieldvane.io.errors import InputError, JobError
from fieldvane.estimator.tracker import TrackRecord
from fieldvane.io.estimates_csv import (EstimatesWriter, block_text, estimate_columns, read_estimates,
                                        record_block, records_text)
from fieldvane.io.float_text import float_texts, format_rows
from fieldvane.io.row_block import RowBlock
from fieldvane.io.sinks import make_formatter

# ---------------------------------------------------------------- float text against repr()
# Reference: CPython's repr(float), the shortest string that reads back to the same double
# (David Gay's dtoa, mode 0), with CPython's switch to exponent form below 1e-4 and from 1e16.


def _assert_same_as_repr(values):
    values = np.asarray(values, np.float64)
    got = float_texts(values)
    want = [repr(v) for v in values.tolist()]
    bad = [(g, w) for g, w in zip(got, want) if g != w]
    assert not bad, bad[:10]
    assert len(got) == len(want)


def test_random_doubles_match_repr():
    rng = np.random.default_rng(20240501)
    bits = rng.integers(0, 2 ** 64, size=300_000, dtype=np.uint64, endpoint=False)
    _assert_same_as_repr(bits.view(np.float64))                  # every exponent, subnormals, NaN payloads
    _assert_same_as_repr(rng.normal(size=100_000) * 10.0 ** rng.integers(-8, 9, 100_000))
    _assert_same_as_repr(np.round(rng.uniform(-1e4, 1e4, 50_000), 3))   # short decimals


def test_edge_doubles_match_repr():
    specials = [0.0, -0.0, math.nan, -math.nan, math.inf, -math.inf, 5e-324, -5e-324,
                2.2250738585072014e-308, 2.225073858507201e-308, 1.7976931348623157e308,
                1e16, 9999999999999998.0, 1e15, 123456789012345.6, 1e-4, 9.999999999999999e-05, 1e-5,
                0.1, 0.2, 0.3, 1 / 3, 2 / 3, 0.5, 1.0, 100.0, 1e22, 1e23, 2.0 ** 53, 2.0 ** 53 + 2,
                1.25e17, 5e-310, 4.35, 0.005, 14.995]
    _assert_same_as_repr(specials)
    _assert_same_as_repr(np.ldexp(1.0, np.arange(-1074, 1024)))          # exact powers of two
    _assert_same_as_repr([float(f"1e{k}") for k in range(-323, 309)])    # powers of ten
    _assert_same_as_repr(np.nextafter(np.ldexp(1.0, np.arange(-1000, 1000, 7)), 0))
    _assert_same_as_repr(np.arange(-5000, 5000) * 0.005)                 # sample times at 200 Hz


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), min_size=1, max_size=50))
def test_any_double_matches_repr(values):
    _assert_same_as_repr(values)


def test_ints_and_empty_fields():
    ints = np.array([0, 1, -1, 9, 10, 99, 100, -100, 2 ** 62, np.iinfo(np.int64).max, np.iinfo(np.int64).min])
    text = format_rows([ints, None, np.full(ints.size, 0.25)]).decode()
    assert text == "".join(f"{i},,0.25\n" for i in ints.tolist())        # reference: Python str(int)


# ---------------------------------------------------------------- writer: bytes equal the CSV sink

def _random_columns(n, seed, extras=("nis", "nis_dof", "b_a_nT", "phase_1a", "noise_scale")):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    u[rng.random(n) < 0.05] = np.nan                      # rows without a direction
    b = rng.uniform(1e3, 7e4, n)
    b[rng.random(n) < 0.02] = np.nan
    ex = {"nis": rng.chisquare(4, n), "nis_dof": rng.integers(0, 9, n), "b_a_nT": b * (1 + 1e-6 * rng.normal(size=n)),
          "phase_1a": rng.uniform(-180, 180, n), "noise_scale": np.where(rng.random(n) < 0.1, np.inf, 1.0)}
    ex["nis"][::17] = -0.0
    ex["nis"][::29] = 5e-324
    return estimate_columns(np.arange(n) * 0.005 + 1234.5, u, b, rng.uniform(0.001, 5, n),
                            rng.integers(0, 2 ** 16, n), {k: ex[k] for k in extras})


def _sink_text(cols, extras=None):
    """What the CSV logger sink writes for the same records (header and one line per record)."""
    fmt = make_formatter("csv", extras)
    names = list(cols)
    records = [{k: cols[k][i] for k in names} for i in range(len(cols["t"]))]
    fmt.bind(records[0])
    return fmt.header() + "".join(fmt.format(r) for r in records)


@pytest.mark.parametrize("optional", [True, False])
@pytest.mark.parametrize("n", [0, 1, 40])
def test_record_block_rows_equal_the_rows_of_its_estimates(n, optional):
    """record_block (the live loop's path) gives the rows Estimate.row() gives, value for value and type for type."""
    rng = np.random.default_rng(n)
    u = rng.normal(size=(n, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    values = rng.normal(size=(8, n))
    values[:, ::7] = np.nan                                   # missing estimates and magnitudes
    ints = rng.integers(0, 64, (3, n))
    extra = ({"noise_scale": values[5], "probes_used": ints[2], "loglik": values[6], "sigma_b_nT": values[7]}
             if optional else {})
    readouts = {"phase_1a_deg": values[4], "amp_1a_1b": -values[4]} if optional else {}
    rec = TrackRecord(np.arange(n) * 0.005, u, 20000 + values[0], np.abs(values[1]), ints[0], values[2] ** 2,
                      ints[1], 20000 + values[3], 20000 - values[3], np.abs(values[2]), readouts, **extra)
    rows, reference = record_block(rec).rows(), [e.row() for e in rec.estimates()]
    assert len(rows) == len(reference) == n
    block = record_block(rec)
    assert len(block) == n and repr(list(block)) == repr(rows)              # (repr: nan equals nan)
    if n:
        assert list(block.keys()) == list(rows[0])
        assert repr(block[-1]) == repr(rows[-1]) and repr(list(block[1:])) == repr(rows[1:])
    for row, ref in zip(rows, reference):
        assert list(row) == list(ref)
        for key, value in ref.items():
            assert type(row[key]) is (int if isinstance(value, (int, np.integer)) else float), key
            assert row[key] == value or (math.isnan(row[key]) and math.isnan(value)), key


def test_block_writer_bytes_equal_the_csv_sink(tmp_path):
    cols = _random_columns(20_000, seed=3)
    p = tmp_path / "block.csv"
    with EstimatesWriter(p) as w:
        w.write_columns({k: v[:7] for k, v in cols.items()})
        w.write_columns({k: v[7:] for k, v in cols.items()})          # crosses the 8192-row blocks
    assert p.read_text() == _sink_text(cols)
    assert w.rows == 20_000


def test_block_writer_equals_row_writer_for_estimates(tmp_path):
    rng = np.random.default_rng(5)
    ests = []
    for i in range(500):
        u = rng.normal(size=3)
        ests.append(Estimate(i * 0.01, u / np.linalg.norm(u), float(rng.uniform(1e3, 6e4)),
                             float(rng.uniform(0, 2)), int(rng.integers(0, 1 << 14)),
                             {"nis": float(rng.chisquare(3)), "nis_dof": int(rng.integers(0, 9)),
                              "bound_deg": float("nan") if i % 50 == 0 else float(rng.uniform(0, 1))}))
    a, b = tmp_path / "rows.csv", tmp_path / "block.csv"
    with EstimatesWriter(a, metadata={"source": "test"}) as w:
        for e in ests:
            w.write(e)
    with EstimatesWriter(b, metadata={"source": "test"}) as w:
        w.write_estimates(ests[:100])
        w.write_estimates(ests[100:])
    assert a.read_bytes() == b.read_bytes()
    assert a.read_text().startswith("# source: test\n" + ",".join(ESTIMATE_COLUMNS) + ",bound_deg,nis,nis_dof\n")


def test_unusual_values_take_the_record_path_and_still_match(tmp_path):
    n = 40
    cols = _random_columns(n, seed=9, extras=("nis",))
    cols["label"] = ["a,b" if i % 3 else "plain" for i in range(n)]        # text: quoted by the sink
    cols["mixed"] = [1 if i % 2 else 0.5 for i in range(n)]                # int and float in one column
    cols["small"] = np.arange(n, dtype=np.float32) / 3                      # float32 widened as the sink does
    cols["ok"] = np.arange(n) % 2 == 0                                      # bool written 1/0
    p = tmp_path / "odd.csv"
    with EstimatesWriter(p) as w:
        w.write_columns(cols)
    assert p.read_text() == _sink_text(cols)


def test_csv_logger_batches_are_the_bytes_of_its_single_records():
    # The CSV logger formats each gathered batch in one compiled pass (format_many); the reference is its own
    # per-record format, i.e. repr() of each float (io/sinks.py _csv_field).
    cols = _random_columns(300, seed=13)
    cols["utc"] = 1.7e9 + np.arange(300) * 1e-3                           # ISO 8601 text in the CSV
    cols["ok"] = np.arange(300) % 2 == 0
    records = [{k: (v[i].item() if isinstance(v, np.ndarray) else v[i]) for k, v in cols.items()} for i in range(300)]
    fmt = make_formatter("csv", None)
    fmt.bind(records[0])
    for lo, hi in ((0, 1), (1, 40), (40, 300)):
        assert fmt.format_many(records[lo:hi]) == [fmt.format(r) for r in records[lo:hi]]
    odd = [dict(r) for r in records[:40]]
    odd[3]["nis"] = None                                                    # a gap: the per-record path
    odd[5]["b_a_nT"] = 7                                                    # an int among floats
    del odd[8]["phase_1a"]                                                  # another set of keys
    odd[9]["label"] = "a,b"
    assert fmt.format_many(odd) == [fmt.format(r) for r in odd]
    names = ESTIMATE_COLUMNS + fmt.extras
    assert records_text(names, records) is not None and records_text(names, odd) is None   # which path ran
    whole = [dict(r, utc=1_700_000_000 + i) for i, r in enumerate(records[:40])]            # `utc` in whole seconds
    assert fmt.format_many(whole) == [fmt.format(r) for r in whole]
    assert fmt.format(whole[0]).endswith(",2023-11-14T22:13:20.000000Z\n")    # 1.7e9 s after 1970, as date(1) says
    assert ",1,-48.4" in fmt.format(records[0]) and fmt.format(records[0]).endswith("Z\n")     # bool 1, utc text


def _utc_reference(x: float) -> str:
    # Reference: Python's datetime (proleptic Gregorian, years 1-9999), microseconds rounded half to even as
    # round() does; empty outside datetime's range or when not finite (the sinks' rule, io/sinks.py utc_iso).
    if not math.isfinite(x):
        return ""
    try:
        d = datetime.datetime(1970, 1, 1) + datetime.timedelta(microseconds=round(x * 1e6))
    except OverflowError:
        return ""
    return f"{d.year:04d}-{d.month:02d}-{d.day:02d}T{d.hour:02d}:{d.minute:02d}:{d.second:02d}.{d.microsecond:06d}Z"


def test_compiled_utc_text_matches_pythons_datetime():
    rng = np.random.default_rng(21)
    first, last = -62135596800.0, 253402300799.999999                # 0001-01-01 and the end of 9999
    x = np.concatenate([
        rng.uniform(first - 1e9, last + 1e9, 30_000),                 # every era, and beyond both ends
        1.7e9 + rng.uniform(0, 3e8, 20_000),                           # this century, sub-microsecond parts
        np.round(rng.uniform(-1e10, 1e10, 5_000) * 1e6) / 1e6 + 0.5e-6,  # near the half-microsecond ties
        [0.0, -0.0, 0.5e-6, 1.5e-6, 2.5e-6, -0.5e-6, -1e-7, first, first - 1e-6, first - 0.4e-6, last,
         last + 1e-6, 951782400.0, 951868800.0, 4107542400.0, -2203891200.0,   # 2000-02-29, 2000-03-01, 2100, 1900
         math.nan, math.inf, -math.inf, 1e300, -1e300, 9.3e12]])
    got = format_rows([x], utc=0).decode("ascii").split("\n")[:-1]
    want = [_utc_reference(v) for v in x.tolist()]
    bad = [(v, g, w) for v, g, w in zip(x.tolist(), got, want) if g != w]
    assert not bad, bad[:5]
    # 2000 is a leap year, 1900 and 2100 are not (the Gregorian rule)
    assert got[-10:-6] == ["2000-02-29T00:00:00.000000Z", "2000-03-01T00:00:00.000000Z",
                           "2100-03-01T00:00:00.000000Z", "1900-03-01T00:00:00.000000Z"]
    # Between other columns, in the width the buffer allows for it.
    cols = [np.array([1.5, -2.0]), np.array([1.8e9, math.nan]), np.array([3, -4], np.int64)]
    assert format_rows(cols, utc=1) == b"1.5,2027-01-15T08:00:00.000000Z,3\n-2.0,,-4\n"
    with pytest.raises(TypeError):
        format_rows([np.array([3], np.int64)], utc=0)                 # utc must be POSIX seconds (float64)


def test_csv_logger_row_blocks_are_the_bytes_of_its_single_records():
    # The live loop hands the CSV logger one RowBlock per batch; its columns are formatted in one compiled pass.
    # The reference is the logger's own per-record format (repr of each float, utc_iso for utc).
    cols = _random_columns(120, seed=17)
    cols["utc"] = 1.8e9 + np.arange(120) * 1e-4
    cols["flags"] = np.arange(120, dtype=np.int64) * 3
    blocks = [RowBlock({k: v[lo:hi] for k, v in cols.items()}) for lo, hi in ((0, 1), (1, 3), (3, 120))]
    fmt = make_formatter("csv", None)
    fmt.bind(blocks[0].columns)
    records = [r for b in blocks for r in b]
    want = [fmt.format(r) for r in records]
    assert fmt.format_items(blocks) == want
    assert fmt.format_items([blocks[0], records[1], blocks[2]]) == [want[0], want[1]] + want[3:]   # mixed items
    assert block_text(ESTIMATE_COLUMNS + fmt.extras, blocks[2]) is not None            # the compiled path
    other = RowBlock({k: v[:2] for k, v in cols.items() if k != "nis"})                            # other columns
    assert fmt.format_items([blocks[0], other]) == [want[0]] + [fmt.format(r) for r in other]
    assert fmt.format_items([]) == []


def test_explicit_extras_absent_columns_are_empty(tmp_path):
    cols = _random_columns(30, seed=11, extras=("nis",))
    p = tmp_path / "x.csv"
    with EstimatesWriter(p, extras=["nis", "not_there"]) as w:
        w.write_columns(cols)
    assert p.read_text() == _sink_text(cols, extras=["nis", "not_there"])
    back = read_estimates(p)
    assert np.isnan(back["not_there"]).all()                # an empty field reads as NaN


def test_round_trip_is_exact(tmp_path):
    cols = _random_columns(70_000, seed=1)                 # more than one read chunk
    p = tmp_path / "e.csv"
    with EstimatesWriter(p) as w:
        w.write_columns(cols)
    back = read_estimates(p)
    assert list(back) == list(ESTIMATE_COLUMNS) + sorted(k for k in cols if k not in ESTIMATE_COLUMNS)
    assert back["flags"].dtype == np.int64
    for k, v in cols.items():
        v = np.asarray(v)
        if v.dtype.kind == "f":         # bit for bit: -0.0, 5e-324, inf and NaN positions included
            np.testing.assert_array_equal(back[k].view(np.uint64), v.view(np.uint64), err_msg=k)
        else:
            np.testing.assert_array_equal(back[k], v, err_msg=k)


def test_empty_file_has_a_header_and_reads_as_no_rows(tmp_path):
    p = tmp_path / "none.csv"
    with EstimatesWriter(p):
        pass
    assert p.read_text() == ",".join(ESTIMATE_COLUMNS) + "\n"
    assert len(read_estimates(p)["t"]) == 0


# ---------------------------------------------------------------- writer: atomic output, errors

def test_failure_inside_the_block_leaves_nothing(tmp_path):
    p = tmp_path / "out.csv"
    with pytest.raises(RuntimeError):
        with EstimatesWriter(p) as w:
            w.write_columns(_random_columns(10, seed=2))
            raise RuntimeError("estimator failed")
    assert os.listdir(tmp_path) == []


def test_existing_file_replaced_only_on_success(tmp_path):
    p = tmp_path / "out.csv"
    p.write_text("old\n")
    w = EstimatesWriter(p)
    w.write_columns(_random_columns(5, seed=2))
    assert p.read_text() == "old\n"                          # still the old file while writing
    w.close()
    assert p.read_text().startswith("t,ux")
    assert sorted(os.listdir(tmp_path)) == ["out.csv"]


def test_write_error_is_a_job_error(tmp_path):
    if not os.path.exists("/dev/full"):
        pytest.skip("needs /dev/full")
    w = EstimatesWriter("/dev/full", atomic=False)
    with pytest.raises(JobError, match="/dev/full: cannot write estimates"):
        w.write_columns(_random_columns(20_000, seed=2))
        w.close()


# ---------------------------------------------------------------- reader: clear errors

HEAD = ",".join(ESTIMATE_COLUMNS) + ",nis\n"
ROW = "0.5,0.0,0.0,1.0,20000.0,0.0,0.0,20000.0,0.1,3,1.5\n"


def _write(tmp_path, text, name="e.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_comments_blank_lines_and_bom(tmp_path):
    p = tmp_path / "bom.csv"
    p.write_bytes(("\ufeff# source: x\n" + HEAD + ROW + "\n# note\n" + ROW.replace("0.5", "0.6")).encode())
    e = read_estimates(p)
    np.testing.assert_array_equal(e["t"], [0.5, 0.6])
    assert e["flags"].tolist() == [3, 3]


@pytest.mark.parametrize("bad,message", [
    (ROW.replace("1.5", "x1"), ":3: column 'nis': not a number ('x1')"),
    (ROW.replace(",1.5", ""), ":3: expected 11 fields, found 10"),
    (ROW.replace(",3,", ",2.5,"), ":3: column 'flags': not a non-negative integer (2.5)"),
    (ROW.replace(",3,", ",-1,"), ":3: column 'flags': not a non-negative integer (-1.0)"),
])
def test_bad_rows_name_file_line_and_column(tmp_path, bad, message):
    p = _write(tmp_path, HEAD + ROW + bad + ROW)
    with pytest.raises(InputError) as e:
        read_estimates(p)
    assert str(e.value) == f"{p}{message}"


def test_bad_row_deep_in_a_big_file_is_named(tmp_path):
    cols = _random_columns(3000, seed=4, extras=("nis",))
    p = tmp_path / "big.csv"
    with EstimatesWriter(p) as w:
        w.write_columns(cols)
    lines = p.read_text().splitlines(True)
    lines[2500] = lines[2500].replace(",", ",,", 1)
    p.write_text("".join(lines))
    with pytest.raises(InputError, match=f"{p}:2501: expected 11 fields, found 12"):
        read_estimates(p)


def test_header_checks(tmp_path):
    with pytest.raises(InputError, match="the first columns must be t, ux"):
        read_estimates(_write(tmp_path, "t,uy,ux\n", "a.csv"))
    with pytest.raises(InputError, match="column 'nis': column appears twice"):
        read_estimates(_write(tmp_path, HEAD.strip() + ",nis\n", "b.csv"))
    with pytest.raises(InputError, match="no header row"):
        read_estimates(_write(tmp_path, "# nothing\n", "c.csv"))
    with pytest.raises(InputError, match="cannot open estimates"):
        read_estimates(tmp_path / "missing.csv")


def test_batches_with_gaps_or_odd_types_match_the_row_writer(tmp_path):
    u = np.array([0.0, 0.6, 0.8])
    ests = [Estimate(0.5 * i, u, 20000.0, 0.1, i, {"nis": 1.5, "bound_deg": 0.2}) for i in range(6)]
    ests[3].extras.pop("bound_deg")                  # absent in one record: an empty field there
    ests[4] = Estimate(2, u, 20000, 0.1, 4, {"nis": 2, "bound_deg": 0.2})   # ints where floats usually are
    a, b = tmp_path / "rows.csv", tmp_path / "batch.csv"
    with EstimatesWriter(a) as w:
        for e in ests:
            w.write(e)
    with EstimatesWriter(b) as w:
        w.write_estimates(ests)
    assert a.read_bytes() == b.read_bytes()
    text = b.read_text()
    assert "\n1.5,0.0,0.6,0.8,20000.0,0.0,12000.0,16000.0,0.1,3,,1.5\n" in text
    assert "\n2,0.0,0.6,0.8,20000,0.0,12000.0,16000.0,0.1,4,0.2,2\n" in text
