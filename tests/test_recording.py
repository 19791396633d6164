"""Recording CSV reader: both channel forms, comments, chunking and clear errors."""

import io as std_io

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldvane.io.errors import InputError
from fieldvane.io.recording import RecordingReader, read_recording, write_recording

HEADER_XY = "t,f_a,f_b,x_1a,y_1a,x_1b,y_1b"


def write(tmp_path, text, name="rec.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_xy_and_polar_forms_agree(tmp_path):
    rows = "0.0,7000,4667,0.5,-0.25,1.0,0.0\n0.1,7000,4667,0.0,1.0,-1.0,0.0\n"
    a, _ = read_recording(write(tmp_path, "# sensor: demo\n" + HEADER_XY + "\n" + rows, "a.csv"))
    z = a.z
    polar_rows = []
    for t, zz in zip(a.t, z):
        polar_rows.append(f"{t},7000,4667," + ",".join(f"{abs(v)},{np.degrees(np.angle(v))}" for v in zz))
    b, _ = read_recording(write(tmp_path, "t,f_a,f_b,r_1a,th_1a,r_1b,th_1b\n" + "\n".join(polar_rows) + "\n", "b.csv"))
    np.testing.assert_allclose(b.z, a.z, atol=1e-12)
    assert a.channels == ("1a", "1b")
    assert a.metadata == {"sensor": "demo"}


def test_two_probes_truth_and_field_columns(tmp_path):
    cols = {"t": [0, 1.0], "f_a": [7e3, 7e3], "f_b": [4.6e3, 4.6e3]}
    for ch in ("1a", "1b", "2a", "2b"):
        cols[f"x_{ch}"] = [1.0, 2.0]
        cols[f"y_{ch}"] = [0.5, -0.5]
    cols.update({"bx_nT": [1000, 0], "by_nT": [0, 1000], "bz_nT": [0, 0],
                 "true_ux": [1, 0], "true_uy": [0, 1], "true_uz": [0, 0], "true_b_nT": [1000, 1000]})
    p = tmp_path / "r.csv"
    write_recording(p, {k: np.array(v, float) for k, v in cols.items()}, {"kind": "test"})
    block, warnings = read_recording(p)
    assert block.channels == ("1a", "1b", "2a", "2b")
    assert block.applied_b_nT.shape == (2, 3)
    assert set(block.truth) == {"true_ux", "true_uy", "true_uz", "true_b_nT"}
    assert warnings == []


def test_missing_column_names_file_line_and_column(tmp_path):
    p = write(tmp_path, "# c\nt,f_a,x_1a,y_1a,x_1b,y_1b\n0,1,2,3,4,5\n")
    with pytest.raises(InputError) as e:
        read_recording(p)
    assert str(e.value) == f"{p}:2: column 'f_b': required column missing (header has: t, f_a, x_1a, y_1a, x_1b, y_1b)"
    with pytest.raises(InputError, match="column 'y_1b'"):
        read_recording(write(tmp_path, "t,f_a,f_b,x_1a,y_1a,x_1b\n0,1,2,3,4,5\n", "c.csv"))
    with pytest.raises(InputError, match="no header row"):
        read_recording(write(tmp_path, "# only comments\n", "d.csv"))


def test_bad_rows_are_skipped_counted_and_named(tmp_path):
    text = HEADER_XY + ",extra\n" + "\n".join([
        "0,7000,4667,1,0,1,0,9",
        "0.1,7000,4667,abc,0,1,0,9",     # not a number
        "0.2,7000,4667,1,0,1,0",         # short row
        "0.3,7000,4667,nan,0,1,0,9",     # NaN
        "-0.1,7000,4667,1,0,1,0,9",      # time goes backwards: kept, warned
    ]) + "\n"
    p = write(tmp_path, text)
    block, warnings = read_recording(p)
    assert len(block) == 2 and block.skipped_rows == 3
    joined = "\n".join(warnings)
    assert f"{p}:1: ignoring unknown columns: extra" in joined
    assert f"{p}:3: column 'x_1a': not a number ('abc'); row skipped" in joined
    assert f"{p}:4: expected 8 fields, found 7; row skipped" in joined
    assert f"{p}:5: column 'x_1a': non-finite value; row skipped" in joined
    assert f"{p}:6: column 't': time goes backwards" in joined
    assert "3 malformed row(s) skipped" in joined


def test_chunked_reading_is_bounded_and_complete(tmp_path):
    n = 2500
    cols = {"t": np.arange(n) * 0.005, "f_a": np.full(n, 7e3), "f_b": np.full(n, 4.6e3)}
    for ch in ("1a", "1b"):
        cols[f"x_{ch}"] = np.sin(np.arange(n))
        cols[f"y_{ch}"] = np.cos(np.arange(n))
    p = tmp_path / "big.csv"
    write_recording(p, cols)
    reader = RecordingReader(p, chunk_rows=1000)
    sizes = [len(b) for b in reader]
    assert sizes == [1000, 1000, 500]
    whole, _ = read_recording(p)
    np.testing.assert_allclose(whole.z[:, 0].real, np.sin(np.arange(n)), atol=1e-9)


def test_unreadable_file(tmp_path):
    with pytest.raises(InputError, match="cannot open recording"):
        read_recording(tmp_path / "nope.csv")


# ---------------------------------------------------------------- probe subsets

HEADER_2P = "t,f_a,f_b,x_1a,y_1a,x_1b,y_1b,x_2a,y_2a,x_2b,y_2b"


def _row(t, probe1="0.5,-0.25,0.125,1", probe2="-0.5,0.25,1,0.75"):
    return f"{t},7000,4667,{probe1},{probe2}"


def test_probe2_gap_rows_are_kept_with_nan_channels(tmp_path):
    n, gap = 12_000, range(4_000, 6_000)        # 60 s at 200 Hz, probe 2 silent for 10 s
    rows = [_row(i * 0.005, probe2=",,," if i in gap else "-0.5,0.25,1,0.75") for i in range(n)]
    p = write(tmp_path, HEADER_2P + "\n" + "\n".join(rows) + "\n")
    block, warnings = read_recording(p)
    assert len(block) == n and block.skipped_rows == 0
    assert block.channels == ("1a", "1b", "2a", "2b")
    g = np.zeros(n, bool)
    g[gap.start:gap.stop] = True
    assert np.isnan(block.z[g, 2:]).all() and np.isfinite(block.z[g, :2]).all()
    assert np.isfinite(block.z[~g]).all()
    np.testing.assert_array_equal(block.z[0], [0.5 - 0.25j, 0.125 + 1j, -0.5 + 0.25j, 1 + 0.75j])
    np.testing.assert_array_equal(block.lines, np.arange(2, n + 2))
    assert warnings == [f"{p}: 2000 row(s) kept without probe 2 (empty or NaN lock-in values read as missing)"]


def test_missing_values_rules_row_by_row(tmp_path):
    rows = [
        _row(0.0),                                         # line 2: complete
        _row(0.1, probe1="nan,nan,nan,nan"),               # 3: probe 1 missing, probe 2 there: kept
        _row(0.2, probe1="0.5,-0.25,0.125,"),              # 4: only channel 1b missing: kept
        _row(0.3, probe2="NaN,0.25,,"),                    # 5: probe 2 missing (NaN and empty): kept
        _row(0.4, probe1="nan,1,1,1", probe2="1,1,1,nan"),  # 6: no complete probe: skipped
        _row(0.5, probe1=",,,", probe2=",,,"),             # 7: no lock-in value at all: skipped
        _row(0.6, probe2="inf,1,1,1"),                     # 8: infinite is not 'missing': skipped
        "," + _row(0.7).split(",", 1)[1],                  # 9: empty t: skipped
        _row(0.8, probe2=" , ,1,1"),                       # 10: blank fields count as empty: kept
    ]
    p = write(tmp_path, HEADER_2P + "\n" + "\n".join(rows) + "\n")
    block, warnings = read_recording(p)
    np.testing.assert_array_equal(block.lines, [2, 3, 4, 5, 10])
    assert block.skipped_rows == 4
    nan = np.isnan(block.z)
    assert nan.tolist() == [[False] * 4, [True, True, False, False], [False, True, False, False],
                            [False, False, True, True], [False, False, True, False]]
    assert warnings[:4] == [f"{p}:6: column 'x_1a': non-finite value; row skipped",
                            f"{p}:7: column 'x_1a': not a number (''); row skipped",
                            f"{p}:8: column 'x_2a': non-finite value; row skipped",
                            f"{p}:9: column 't': not a number (''); row skipped"]
    assert f"{p}: 2 row(s) kept without probe 1 (empty or NaN lock-in values read as missing)" in warnings
    assert f"{p}: 2 row(s) kept without probe 2 (empty or NaN lock-in values read as missing)" in warnings
    strict, _ = read_recording(p, require_all_probes=True)
    np.testing.assert_array_equal(strict.lines, [2])
    assert strict.skipped_rows == 8


def test_one_probe_file_needs_probe_1(tmp_path):
    p = write(tmp_path, HEADER_XY + "\n0,7000,4667,1,0,1,0\n0.1,7000,4667,,,1,0\n0.2,7000,4667,1,0,1,nan\n")
    block, warnings = read_recording(p)
    assert block.channels == ("1a", "1b") and len(block) == 1 and block.skipped_rows == 2
    assert f"{p}:3: column 'x_1a': not a number (''); row skipped" in warnings
    assert f"{p}:4: column 'y_1b': non-finite value; row skipped" in warnings


def test_polar_channels_with_a_missing_probe(tmp_path):
    head = "t,f_a,f_b,r_1a,th_1a,r_1b,th_1b,r_2a,th_2a,r_2b,th_2b"
    p = write(tmp_path, head + "\n0,7000,4667,2,90,1,180,,,,\n")
    block, _ = read_recording(p)
    np.testing.assert_allclose(block.z[0, :2], [2j, -1], atol=1e-12)
    assert np.isnan(block.z[0, 2:]).all()


# ---------------------------------------------------------------- fast path and reference agree

def _concat(reader):
    from fieldvane.io.recording import concatenate_blocks
    blocks = list(reader)
    return concatenate_blocks(blocks) if blocks else None


_LINE_KINDS = st.sampled_from([
    "ok", "ok", "ok", "ok", "gap2", "gap1", "nan1", "partial", "none", "inf", "text", "short", "long",
    "comment", "blank", "spaces", "underscore", "back", "empty_t", "truth_nan", "upper_nan", "note"])


def _make_line(kind, i, rng):
    v = [f"{x:.6g}" for x in rng.normal(size=8)]
    t = f"{i * 0.005:.6g}" if kind != "back" else "-1"
    truth = "0,0,1,20000" if kind != "truth_nan" else "0,nan,1,20000"
    if kind == "gap2":
        v[4:] = [""] * 4
    elif kind == "gap1":
        v[:4] = ["nan"] * 4
    elif kind == "nan1":
        v[1] = "nan"
    elif kind == "partial":
        v[1], v[6] = "", "nan"
    elif kind == "none":
        v = [""] * 8
    elif kind == "inf":
        v[5] = "-inf"
    elif kind == "text":
        v[2] = "12abc"
    elif kind == "spaces":
        v[3] = "  "
    elif kind == "underscore":
        v[0] = "1_5"                     # Python's float() takes it, numpy's reader does not
    elif kind == "upper_nan":
        v[7] = "NaN"
    note = "see log" if kind == "note" else "3"          # an unknown column: ignored, text or not
    line = ",".join([t if kind != "empty_t" else "", "7000", "4667"] + v + [truth, note])
    if kind == "short":
        line = line.rsplit(",", 2)[0]
    elif kind == "long":
        line += ",9"
    elif kind == "comment":
        line = "# comment, with commas"
    elif kind == "blank":
        line = "   "
    return line


@settings(max_examples=40, deadline=None)
@given(kinds=st.lists(_LINE_KINDS, min_size=1, max_size=400), chunk=st.sampled_from([7, 100, 1000]),
       seed=st.integers(0, 1000))
def test_fast_reader_equals_line_by_line_reference(tmp_path_factory, kinds, chunk, seed):
    rng = np.random.default_rng(seed)
    head = HEADER_2P + ",true_ux,true_uy,true_uz,true_b_nT,remark"
    text = "# sensor: prop\n" + head + "\n" + "\n".join(_make_line(k, i, rng) for i, k in enumerate(kinds)) + "\n"
    p = tmp_path_factory.mktemp("prop") / "r.csv"
    p.write_text(text)
    fast, slow = RecordingReader(p, chunk_rows=chunk), RecordingReader(p, chunk_rows=chunk, fast=False)
    a, b = _concat(fast), _concat(slow)
    assert fast.warnings == slow.warnings
    assert fast.skipped_rows == slow.skipped_rows and fast.rows_read == slow.rows_read
    if a is None:
        assert b is None
        return
    np.testing.assert_array_equal(a.lines, b.lines)
    np.testing.assert_array_equal(a.t, b.t)
    np.testing.assert_array_equal(a.f, b.f)
    np.testing.assert_array_equal(a.z, b.z)                  # NaN in the same places
    for k in a.truth:
        np.testing.assert_array_equal(a.truth[k], b.truth[k])


# ---------------------------------------------------------------- errors, encodings, limits

def _clean_rows(n, seed=0):
    rng = np.random.default_rng(seed)
    cols = {"t": np.arange(n) * 0.005, "f_a": np.full(n, 7e3), "f_b": np.full(n, 4.6e3)}
    for ch in ("1a", "1b", "2a", "2b"):
        cols[f"x_{ch}"] = rng.normal(size=n)
        cols[f"y_{ch}"] = rng.normal(size=n)
    return cols


def test_bad_line_deep_in_a_chunk_is_named_and_only_it_is_lost(tmp_path):
    p = tmp_path / "big.csv"
    write_recording(p, _clean_rows(20_000), {"sensor": "x"})
    lines = p.read_text().splitlines(True)
    lines[15_001] = lines[15_001].replace(",", ",oops", 1)        # file line 15002
    p.write_text("".join(lines))
    block, warnings = read_recording(p)
    assert len(block) == 19_999 and block.skipped_rows == 1
    assert warnings[0].startswith(f"{p}:15002: column 'f_a': not a number ('oops")
    assert 15_002 not in block.lines and block.lines[-1] == 20_002


def test_many_problems_are_capped_but_all_counted(tmp_path):
    rows = [f"{i},7000,4667,1,0,1,{'x' if i % 2 else '0'}" for i in range(100)]
    p = write(tmp_path, HEADER_XY + "\n" + "\n".join(rows) + "\n")
    block, warnings = read_recording(p)
    assert len(block) == 50 and block.skipped_rows == 50
    assert len([w for w in warnings if "row skipped" in w]) == 20
    assert f"{p}: further problems not listed one by one" in warnings
    assert warnings[-1] == f"{p}: 50 malformed row(s) skipped, 50 read"


def test_unknown_text_column_is_ignored(tmp_path):
    p = write(tmp_path, HEADER_XY + ",operator\n0,7000,4667,1,0,1,0,alice\n0.1,7000,4667,1,0,1,0,bob\n")
    block, warnings = read_recording(p)
    assert len(block) == 2 and warnings == [f"{p}:1: ignoring unknown columns: operator"]


def test_utf8_bom_from_a_spreadsheet_is_accepted(tmp_path):
    p = tmp_path / "bom.csv"
    p.write_bytes(("\ufeff" + HEADER_XY + "\r\n0,7000,4667,1,0,1,0\r\n").encode("utf-8"))
    block, warnings = read_recording(p)
    assert len(block) == 1 and warnings == []


def test_streaming_memory_is_bounded_by_the_chunk(tmp_path):
    import tracemalloc

    def peak_bytes(n):
        p = tmp_path / f"long{n}.csv"
        write_recording(p, _clean_rows(n))
        tracemalloc.start()
        try:
            rows = sum(len(block) for block in RecordingReader(p, chunk_rows=1_000))
            return rows, tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()

    (rows_small, small), (rows_big, big) = peak_bytes(10_000), peak_bytes(40_000)
    assert (rows_small, rows_big) == (10_000, 40_000)
    assert big < 1.25 * small                  # four times the file, the same peak
    assert big < 40_000 * 11 * 8 / 2           # under half of the parsed values of the whole file


_PIECES = st.lists(st.sampled_from([b"a,1", b"bb", b"", "\u00e9,2".encode(), b"\n", b"\r", b"\r\n", b"\n\n",
                                    b"#x", b"\xff", b"\xc3", b"1,2", b"3.5,-4e2"]), max_size=60)


def _python_lines(raw: bytes) -> list[str]:
    """Lines as Python's own text layer reads them (universal newlines, UTF-8 with BOM removed, bad bytes replaced)."""
    lines = std_io.TextIOWrapper(std_io.BytesIO(raw), encoding="utf-8-sig", errors="replace",
                                 newline=None).read().split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return lines


@settings(max_examples=120, deadline=None)
@given(pieces=_PIECES, bom=st.booleans(), block=st.integers(1, 16), header_lines=st.integers(0, 3),
       chunk=st.integers(1, 7))
def test_byte_lines_split_like_python_universal_newlines(pieces, bom, block, header_lines, chunk):
    from fieldvane.io.byte_lines import ByteLines
    raw = (b"\xef\xbb\xbf" if bom else b"") + b"".join(pieces)
    want = _python_lines(raw)                  # reference: Python's text layer
    src = ByteLines(std_io.BytesIO(raw), block_bytes=block)
    got = []
    for _ in range(header_lines):
        line = src.readline()
        if line is not None:
            got.append(line)
    while (parsed := src.parse(chunk, 2)) is not None:
        assert 1 <= len(parsed) <= chunk
        got += parsed[:]
        for k in np.flatnonzero(parsed.ok):       # a parsed line is two numbers: float() of its two fields
            assert [float(v) for v in parsed[int(k)].split(",")] == parsed.values[k].tolist()
    assert got == want
