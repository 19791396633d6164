"""Recording CSV reader: both channel forms, comments, chunking and clear errors."""

import numpy as np
import pytest

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
