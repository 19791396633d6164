"""The compiled recording parser (io/csv_numbers.py); the byte-level line reader (io/byte_lines.py) is tested in
test_recording.py beside the text one.

References: Python's float() (correctly rounded decimal-to-double conversion) for every value the
parser takes, numpy.loadtxt for whole files, and Python's own text layer (universal newlines, UTF-8
with the BOM removed, bad bytes replaced) for where lines begin and end.
"""

import math
import struct

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from fieldvane.io.csv_numbers import parse_rows
from fieldvane.io.recording import RecordingReader


def parse_text(text: str | bytes, ncol: int, max_rows: int = 1000):
    """Return (rows, values, ok, starts) of the kernel over text that ends with a line end."""
    raw = text.encode() if isinstance(text, str) else text
    buf = np.frombuffer(raw, np.uint8)
    values = np.full((max_rows, ncol), -7.0)
    ok = np.zeros(max_rows, np.uint8)
    starts = np.zeros(max_rows + 1, np.int64)
    rows = parse_rows(buf, 0, max_rows, ncol, values, ok, starts)
    return rows, values[:rows], ok[:rows].astype(bool), starts[:rows + 1]


def _normal(x: float) -> bool:
    """A non-zero double that neither overflows nor is subnormal (the kernel decides these; zero only from '0')."""
    return 2.2250738585072014e-308 <= abs(x) < math.inf


def same_double(a: float, b: float) -> bool:
    return struct.pack("<d", a) == struct.pack("<d", b) or (math.isnan(a) and math.isnan(b))


# Decimal texts of the shapes recordings hold: fixed point and exponent forms, up to 15 significant digits
# (always within the exact fast path), signs, leading and trailing zeros, points at either end.
_digits = st.text("0123456789", min_size=1, max_size=15)
_short_number = st.builds(
    lambda sign, whole, frac, form, exp: sign + (whole if form != "frac_only" else "") +
    ("." + frac if form in ("point", "frac_only") else ("." if form == "trailing_point" else "")) +
    (f"e{exp}" if exp is not None else ""),
    st.sampled_from(["", "-", "+"]), st.text("0123456789", min_size=1, max_size=8),
    st.text("0123456789", min_size=1, max_size=7), st.sampled_from(["int", "point", "frac_only", "trailing_point"]),
    st.one_of(st.none(), st.integers(-9, 9)))


@settings(max_examples=400, deadline=None)
@given(texts=st.lists(_short_number, min_size=1, max_size=6))
def test_short_numbers_are_taken_and_equal_pythons_float(texts):
    rows, values, ok, _ = parse_text(",".join(texts) + "\n", len(texts))
    assert rows == 1 and ok[0], texts
    for text, value in zip(texts, values[0]):
        assert same_double(value, float(text)), (text, value, float(text))    # reference: Python's float()


@settings(max_examples=300, deadline=None)
@given(x=st.floats(allow_nan=False, allow_infinity=False), fmt=st.sampled_from(["r", ".10g", ".15g", ".6e", ".3f"]))
def test_any_double_is_exact_or_left_to_the_other_readers(x, fmt):
    text = repr(x) if fmt == "r" else format(x, fmt)
    rows, values, ok, _ = parse_text(f"{text},1\n", 2)
    assert rows == 1
    if ok[0]:
        assert same_double(values[0, 0], float(text)), text               # reference: Python's float()
    else:   # only subnormal or overflowing results and texts of more than 19 digits go elsewhere
        mantissa = text.lower().split("e")[0].replace("-", "").replace(".", "").lstrip("0")
        assert not _normal(float(text)) or len(mantissa) > 19, text


def _parse_many(texts):
    raw = ("\n".join(texts) + "\n").encode()
    rows, values, ok, _ = parse_text(raw, 1, len(texts))
    assert rows == len(texts)
    return values[:, 0], ok


def test_every_normal_double_written_by_repr_reads_back_exactly():
    # repr() writes the shortest text that reads back to the same double (up to 17 digits): the Eisel-Lemire
    # path must give back that double, bit for bit, across the whole exponent range.
    rng = np.random.default_rng(11)
    bits = rng.integers(0, 2 ** 64 - 1, 60_000, dtype=np.uint64, endpoint=True)
    doubles = bits.view(np.float64)
    doubles = doubles[np.isfinite(doubles) & (np.abs(doubles) >= 2.2250738585072014e-308)]
    values, ok = _parse_many([repr(float(v)) for v in doubles])
    assert ok.all()
    np.testing.assert_array_equal(values.view(np.uint64), doubles.view(np.uint64))


def test_decimals_of_up_to_19_digits_equal_pythons_float():
    rng = np.random.default_rng(12)
    texts = [f"{int(rng.integers(0, 10 ** int(d), dtype=np.uint64))}e{int(e)}"
             for d, e in zip(rng.integers(1, 20, 40_000), rng.integers(-330, 300, 40_000))]
    values, ok = _parse_many(texts)
    ref = np.array([float(t) for t in texts])                        # reference: Python's float()
    assert ok.mean() > 0.9                                            # the rest: subnormal or overflowing
    np.testing.assert_array_equal(values[ok], ref[ok])
    assert not any(_normal(v) for v in ref[~ok])


def test_halfway_cases_round_to_even_like_float():
    # Integers exactly halfway between two doubles above 2^53 (and their neighbours), up to 19 digits.
    rng = np.random.default_rng(13)
    texts = []
    for k in rng.integers(2 ** 53, 2 ** 62, 5_000).tolist():
        d = int(float(k))
        m = d + 2 ** (d.bit_length() - 53) // 2
        texts += [str(m), str(m - 1), str(m + 1), f"{m // 10}.{m % 10}e1"]
    values, ok = _parse_many(texts)
    assert ok.all()
    np.testing.assert_array_equal(values, [float(t) for t in texts])    # reference: Python's float()


@pytest.mark.parametrize("field", ["", "nan", "NaN"])
def test_empty_and_nan_fields_are_nan(field):
    rows, values, ok, _ = parse_text(f"1,{field},3\n", 3)
    assert ok[0] and math.isnan(values[0, 1]) and values[0, 0] == 1 and values[0, 2] == 3


@pytest.mark.parametrize("field", [" 1", "1 ", "inf", "-inf", "-nan", "nana", "1_0", ".", "-", "+", "e5", "1e",
                                   "1e+", "--1", "1.2.3", "0x10", "1e123456", "12345678901234567890", "1d5",
                                   "5e-324", "1e-310", "1e309", "\u00e9", "1,2",
                                   # 20 significant digits whose first 20 digits are k * 2^64: 64-bit sums wrap to 0
                                   "18446744073709551616", "0.18446744073709551616", "1.8446744073709551616e-3",
                                   "-36893488147419103232.000", "92233720368547758080"])
def test_lines_the_kernel_does_not_decide_are_left(field):
    # Each of these either is not a plain number, or has more than 19 digits, or is subnormal or too large
    # for a double: the line goes to numpy's reader and the reference parser.
    rows, _, ok, _ = parse_text(f"1,{field},3\n", 3)
    assert rows == 1 and not ok[0]


def test_values_past_the_fast_path_equal_float_once_the_reader_takes_them(tmp_path):
    # 17-digit reprs and large exponents: the kernel leaves every line, numpy's reader takes them.
    rng = np.random.default_rng(5)
    n = 300
    cols = ["t", "f_a", "f_b", "x_1a", "y_1a", "x_1b", "y_1b"]
    data = np.column_stack([np.arange(n) * 0.005, 7000 + rng.random(n), 4667 + rng.random(n),
                            rng.normal(size=(n, 4)) * 1e-30])
    text = ",".join(cols) + "\n" + "\n".join(",".join(repr(float(v)) for v in row) for row in data) + "\n"
    p = tmp_path / "long_digits.csv"
    p.write_text(text)
    block = next(iter(RecordingReader(p)))
    ref = np.loadtxt(p, delimiter=",", skiprows=1)          # reference: numpy's reader
    np.testing.assert_array_equal(block.t, ref[:, 0])
    np.testing.assert_array_equal(block.z[:, 0].real, ref[:, 3])
    np.testing.assert_array_equal(block.z[:, 1].imag, ref[:, 6])


def test_line_ends_and_starts():
    rows, values, ok, starts = parse_text(b"1,2\r\n3,4\r5,6\n\n7,8\n", 2)
    assert rows == 5
    assert ok.tolist() == [True, True, True, False, True]        # the blank line is left to the reference parser
    assert values[[0, 1, 2, 4]].tolist() == [[1, 2], [3, 4], [5, 6], [7, 8]]
    assert starts.tolist() == [0, 5, 9, 13, 14, 18]


def test_wrong_field_counts_are_left():
    _, _, ok, _ = parse_text("1,2\n1,2,3,4\n1,2,3\n1,2,3,\n", 3)
    assert ok.tolist() == [False, False, True, False]


def test_max_rows_and_start_position():
    raw = b"x\n1,2\n3,4\n5,6\n"
    buf = np.frombuffer(raw, np.uint8)
    values, ok, starts = np.zeros((2, 2)), np.zeros(2, np.uint8), np.zeros(3, np.int64)
    assert parse_rows(buf, 2, 2, 2, values, ok, starts) == 2
    assert values.tolist() == [[1, 2], [3, 4]] and starts.tolist() == [2, 6, 10]


# ------------------------------------------------------------------------------- line ends

def test_crlf_and_lf_files_read_the_same(tmp_path):
    text = "t,f_a,f_b,x_1a,y_1a,x_1b,y_1b\n" + "".join(f"{k * 0.005},7000,4667,0.{k},-0.5,1,{k}e-3\n"
                                                       for k in range(50))
    (tmp_path / "lf.csv").write_bytes(text.encode())
    (tmp_path / "crlf.csv").write_bytes(text.replace("\n", "\r\n").encode())
    a, b = (next(iter(RecordingReader(tmp_path / name, chunk_rows=16))) for name in ("lf.csv", "crlf.csv"))
    np.testing.assert_array_equal(a.z, b.z)
    np.testing.assert_array_equal(a.lines, b.lines)
