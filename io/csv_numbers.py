"""Compiled parse of numeric CSV lines (a recording's data rows): decimal text to float64, as Python's float().

A field is read when it is `[+-]digits[.digits][(e|E)[+-]digits]` (a digit on at least one side of
the point), `nan` or empty (nan, as an empty lock-in field means missing). Its value is the correctly
rounded double, by one of two published exact methods:

- Clinger's fast path (W. D. Clinger, "How to read floating point numbers accurately", PLDI 1990): a
  significand below 2^53 and a power of ten of at most 22 either way are both exact doubles, so one
  IEEE multiplication or division rounds the value correctly;
- otherwise, up to 19 significant digits, the Eisel-Lemire algorithm (D. Lemire, "Number parsing at a
  gigabyte per second", Software: Practice and Experience 51, 2021): the significand times a 128-bit
  truncation of 5^q, which decides the rounding for every normal double (the 17-digit texts repr()
  writes included); where it cannot decide, the line is left.

Every other line (more than 19 digits, subnormal or overflowing values, spaces, inf, a wrong field
count, any other byte) is marked not parsed and left to numpy's reader and the reference line parser
(io/recording.py): the kernel never decides a line that those could decide differently.

Lines end at \\n, \\r\\n or a lone \\r, as Python's text files read them; the buffer must end with one
of these (the scans stop there without bounds checks).
"""

from __future__ import annotations

import math

import numpy as np
from fieldvane.io.float_text import _umul128
from fieldvane.kernels import entry, helper

_POW10 = np.array([10.0 ** k for k in range(23)])      # exact doubles: 5^22 < 2^53
_EXACT = np.uint64(1 << 53)
_U10 = np.uint64(10)
_NL, _CR, _COMMA, _DOT, _PLUS, _MINUS, _LOW_E, _UP_E = 10, 13, 44, 46, 43, 45, 101, 69
_LOW_N, _LOW_A, _UP_N, _UP_A = 110, 97, 78, 65
_MIN_Q, _MAX_Q = -342, 308                             # decimal exponents with a double that is not 0 or inf


def _powers_of_five() -> np.ndarray:
    """Return (651, 2) uint64 (high, low): the 128 leading bits of 5^q for q = -342..308, as the Eisel-Lemire
    algorithm uses them (for q < 0: 2^k // 5^-q + 1, truncated to 128 bits)."""
    rows = []
    for q in range(_MIN_Q, _MAX_Q + 1):
        if q < 0:
            p = 5 ** -q
            z = p.bit_length()                           # the smallest z with 2^z > 5^-q
            c = (1 << (z + 127)) // p + 1 if q >= -27 else (1 << (2 * z + 128)) // p + 1
        else:
            c = 5 ** q
        shift = c.bit_length() - 128                     # keep the leading 128 bits (truncated), or move them up
        c = c >> shift if shift > 0 else c << -shift
        rows.append((c >> 64, c & ((1 << 64) - 1)))
    return np.array(rows, np.uint64)


_POW5_128 = _powers_of_five()
_LOW9 = np.uint64(0x1FF)
_ALL_ONES = np.uint64(0xFFFFFFFFFFFFFFFF)
_U1, _U2, _U3, _U63 = np.uint64(1), np.uint64(2), np.uint64(3), np.uint64(63)
_HIDDEN = np.uint64(1 << 52)


@helper(cache=True, inline="always")
def _leading_zeros(w):
    """Return the number of leading zero bits of a non-zero uint64."""
    n = 0
    for shift in (32, 16, 8, 4, 2, 1):
        if w >> np.uint64(64 - shift) == 0:
            w <<= np.uint64(shift)
            n += shift
    return n


@helper(cache=True)
def _eisel_lemire(w, q):
    """Return (decided, value) for the decimal w * 10^q (w a non-zero uint64, q an int): the correctly rounded
    double, or decided False where the algorithm cannot tell (then another reader decides)."""
    if q < _MIN_Q or q > _MAX_Q:
        return False, 0.0
    lz = _leading_zeros(w)
    w <<= np.uint64(lz)
    k = q - _MIN_Q
    lo, hi = _umul128(w, _POW5_128[k, 0])
    if hi & _LOW9 == _LOW9:                  # the truncated product may be short: add the next 64 bits of 5^q
        lo2, hi2 = _umul128(w, _POW5_128[k, 1])
        lo += hi2
        if hi2 > lo:
            hi += _U1
    if lo == _ALL_ONES and not -27 <= q <= 55:  # the product may still be short: let another reader decide
        return False, 0.0
    upper = int(hi >> _U63)
    mantissa = hi >> np.uint64(upper + 9)
    power2 = (((152170 + 65536) * q) >> 16) + 63 + upper - lz + 1023
    if power2 <= 0:                          # subnormal
        return False, 0.0
    if lo <= _U1 and -4 <= q <= 23 and mantissa & _U3 == _U1 and (mantissa << np.uint64(upper + 9)) == hi:
        mantissa &= ~_U1                     # exactly halfway: round to even, down
    mantissa += mantissa & _U1
    mantissa >>= _U1
    if mantissa >= _HIDDEN << _U1:
        mantissa = _HIDDEN
        power2 += 1
    if power2 >= 0x7FF:                      # overflows
        return False, 0.0
    return True, math.ldexp(float(mantissa), power2 - 1023 - 52)


@entry("i8(u1[::1], i8, i8, i8, f8[:, ::1], u1[::1], i8[::1])", cache=True, nogil=True)
def parse_rows(buf, pos, max_rows, ncol, values, ok, starts):
    """Parse up to max_rows lines of buf from byte pos into values (rows, ncol); ok[r] = 1 where line r parsed
    (ncol numbers), starts[r] = its first byte, starts[rows] = the byte after the last line; return rows."""
    n = buf.shape[0]
    row = 0
    while row < max_rows and pos < n:
        starts[row] = pos
        good = True
        col = 0
        while True:
            field_start = pos
            c = buf[pos]
            neg = c == _MINUS
            if neg or c == _PLUS:
                pos += 1
                c = buf[pos]
            w = np.uint64(0)
            significant = 0               # digits from the first non-zero one
            digits = 0
            q = 0                         # value = w * 10^q
            while 48 <= c <= 57:
                w = w * _U10 + np.uint64(c - 48)
                significant += (significant > 0) | (c != 48)
                digits += 1
                pos += 1
                c = buf[pos]
            if c == _DOT:
                pos += 1
                c = buf[pos]
                while 48 <= c <= 57:
                    w = w * _U10 + np.uint64(c - 48)
                    significant += (significant > 0) | (c != 48)
                    digits += 1
                    q -= 1
                    pos += 1
                    c = buf[pos]
            if digits > 0 and (c == _LOW_E or c == _UP_E):
                pos += 1
                c = buf[pos]
                negative_exponent = c == _MINUS
                if negative_exponent or c == _PLUS:
                    pos += 1
                    c = buf[pos]
                e = 0
                exponent_digits = 0
                while 48 <= c <= 57:
                    if exponent_digits < 6:
                        e = e * 10 + (c - 48)
                    exponent_digits += 1
                    pos += 1
                    c = buf[pos]
                if exponent_digits == 0 or exponent_digits > 5:
                    good = False
                q += -e if negative_exponent else e
            v = 0.0
            if digits == 0:
                if pos == field_start and ((c == _LOW_N and buf[pos + 1] == _LOW_A and buf[pos + 2] == _LOW_N)
                                           or (c == _UP_N and buf[pos + 1] == _LOW_A and buf[pos + 2] == _UP_N)):
                    pos += 3              # 'nan' or 'NaN' (the terminator ends the buffer, so pos + 2 exists)
                    c = buf[pos]
                elif pos != field_start:  # a sign or a point without digits
                    good = False
                v = np.nan
            elif significant > 19:
                good = False              # past 64 bits: numpy's reader decides
            elif w == 0:
                v = 0.0
            elif w < _EXACT and 0 <= q <= 22:
                v = float(w) * _POW10[q]
            elif w < _EXACT and -22 <= q < 0:
                v = float(w) / _POW10[-q]
            else:
                decided, v = _eisel_lemire(w, q)
                good = good and decided
            if neg:
                v = -v
            if col < ncol:
                values[row, col] = v
            col += 1
            if c == _COMMA:
                pos += 1
                continue
            if c != _NL and c != _CR:     # another byte: the line is left to the reference parser
                good = False
                while buf[pos] != _NL and buf[pos] != _CR:
                    pos += 1
            break
        if buf[pos] == _CR and pos + 1 < n and buf[pos + 1] == _NL:
            pos += 2
        else:
            pos += 1
        ok[row] = 1 if good and col == ncol else 0
        row += 1
    starts[row] = pos
    return row
