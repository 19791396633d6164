"""Compiled CSV text of numeric columns, floats written exactly as Python's repr() writes them.

The float digits come from the Ryu algorithm (U. Adams, "Ryu: fast float-to-string conversion",
PLDI 2018): the shortest decimal that reads back to the same double, the nearest one when several
are shortest. The layout then follows CPython's repr of a float: positional between 1e-4 and 1e16
(with '.0' on integers), otherwise 'd.ddde+XX' with at least two exponent digits; 'nan', 'inf',
'-inf', '-0.0'. Tests compare every byte with repr() on millions of doubles.

`format_rows` turns columns (float64, int64, POSIX seconds as ISO 8601 UTC text, or absent) into CSV
lines in one compiled pass; it is what EstimatesWriter.write_columns and the CSV logger use, and it
must stay byte-identical to the CSV sink's per-record formatter (io/sinks.py CsvFormatter: repr for
floats, str for ints, utc_iso for `utc`, '' when absent).

The UTC dates come from H. Hinnant's civil_from_days ("chrono-Compatible Low-Level Date Algorithms").
"""

from __future__ import annotations

import numpy as np
from fieldvane.kernels import entry, helper

MAX_FIELD_CHARS = 24                 # '-2.2250738585072014e-308' is the longest float text
UTC_FIELD_CHARS = 27                 # '2026-12-03T07:30:00.123456Z'
KIND_FLOAT, KIND_INT, KIND_EMPTY, KIND_UTC = 0, 1, 2, 3
# datetime's range (years 1 to 9999) in microseconds from 1970: outside it the sinks write an empty field
_FIRST_US, _LAST_US = -62135596800_000000, 253402300799_999999
_US_PER_DAY = 86400_000000

_POW5_INV_BITCOUNT = 125
_POW5_BITCOUNT = 125
_M64 = (1 << 64) - 1


def _pow5bits(e: int) -> int:
    return ((e * 1217359) >> 19) + 1


def _tables() -> tuple[np.ndarray, np.ndarray]:
    """Return Ryu's 128-bit tables as (lo, hi) uint64 pairs: 2^k/5^q rounded up, and 5^i's top bits."""
    inv = np.zeros((342, 2), np.uint64)
    pos = np.zeros((326, 2), np.uint64)
    for q in range(inv.shape[0]):
        p = 5 ** q
        assert p.bit_length() == _pow5bits(q)
        v = (1 << (p.bit_length() - 1 + _POW5_INV_BITCOUNT)) // p + 1
        inv[q] = (v & _M64, v >> 64)
    for i in range(pos.shape[0]):
        p = 5 ** i
        n = p.bit_length()
        v = p >> (n - _POW5_BITCOUNT) if n >= _POW5_BITCOUNT else p << (_POW5_BITCOUNT - n)
        pos[i] = (v & _M64, v >> 64)
    return inv, pos


_INV, _POS = _tables()

_U0, _U1, _U2, _U4, _U5, _U10 = (np.uint64(v) for v in (0, 1, 2, 4, 5, 10))
_U32, _U52, _U63, _U100 = np.uint64(32), np.uint64(52), np.uint64(63), np.uint64(100)
_MASK32 = np.uint64(0xFFFFFFFF)
_MANT_MASK = np.uint64((1 << 52) - 1)
_HIDDEN = np.uint64(1 << 52)
_EXP_MASK = np.uint64(0x7FF)
_ZERO_CH, _DOT, _MINUS, _PLUS, _E, _COMMA, _NL = 48, 46, 45, 43, 101, 44, 10
_POW10 = np.array([10 ** k for k in range(20)], np.uint64)
_DIGIT_PAIRS = np.frombuffer("".join(f"{k:02d}" for k in range(100)).encode("ascii"), np.uint8).copy()


@helper(cache=True, inline="always")
def _umul128(a, b):
    """Return (low, high) 64-bit words of the 128-bit product a*b (uint64 inputs)."""
    a_lo = a & _MASK32
    a_hi = a >> _U32
    b_lo = b & _MASK32
    b_hi = b >> _U32
    b00 = a_lo * b_lo
    b01 = a_lo * b_hi
    b10 = a_hi * b_lo
    b11 = a_hi * b_hi
    mid1 = b10 + (b00 >> _U32)
    mid2 = b01 + (mid1 & _MASK32)
    hi = b11 + (mid1 >> _U32) + (mid2 >> _U32)
    lo = ((mid2 & _MASK32) << _U32) | (b00 & _MASK32)
    return lo, hi


@helper(cache=True, inline="always")
def _mul_shift(m, mul_lo, mul_hi, j):
    """Return (m * mul) >> j for a 55-bit m and a 128-bit mul, j in (64, 128)."""
    lo1, hi1 = _umul128(m, mul_hi)
    _lo0, hi0 = _umul128(m, mul_lo)
    s = hi0 + lo1
    if s < hi0:
        hi1 += _U1
    d = j - 64
    if d >= 64:
        return hi1 >> np.uint64(d - 64)
    return (hi1 << np.uint64(64 - d)) | (s >> np.uint64(d))


@helper(cache=True, inline="always")
def _pow5_factor(v):
    """Return how many times 5 divides v (v > 0)."""
    count = 0
    while v % _U5 == _U0:
        v = v // _U5
        count += 1
    return count


@helper(cache=True, inline="always")
def _drop_digit(vr, vp, vm, vr_tz, last):
    """Return (vr, vp, vm, vr_tz, last) with one decimal digit dropped (vr_tz: the digits before `last` were all 0)."""
    return vr // _U10, vp // _U10, vm // _U10, vr_tz and last == _U0, vr % _U10


@helper(cache=True)
def _shortest(ieee_m, ieee_e):
    """Return (digits, exponent) with digits * 10**exponent the shortest round-trip decimal of a finite nonzero double."""
    if ieee_e == 0:
        e2 = 1 - 1023 - 52 - 2
        m2 = ieee_m
    else:
        e2 = ieee_e - 1023 - 52 - 2
        m2 = ieee_m | _HIDDEN
    accept_bounds = (m2 & _U1) == _U0
    mv = m2 * _U4
    mm_shift = _U1 if (ieee_m != _U0 or ieee_e <= 1) else _U0
    vm_tz = False
    vr_tz = False
    if e2 >= 0:
        q = ((e2 * 78913) >> 18) - (1 if e2 > 3 else 0)
        e10 = q
        k = _POW5_INV_BITCOUNT + (((q * 1217359) >> 19) + 1) - 1
        i = -e2 + q + k
        lo, hi = _INV[q, 0], _INV[q, 1]
        vr = _mul_shift(mv, lo, hi, i)
        vp = _mul_shift(mv + _U2, lo, hi, i)
        vm = _mul_shift(mv - _U1 - mm_shift, lo, hi, i)
        if q <= 21:
            if mv % _U5 == _U0:
                vr_tz = _pow5_factor(mv) >= q
            elif accept_bounds:
                vm_tz = _pow5_factor(mv - _U1 - mm_shift) >= q
            elif _pow5_factor(mv + _U2) >= q:
                vp -= _U1
    else:
        q = ((-e2 * 732923) >> 20) - (1 if -e2 > 1 else 0)
        e10 = q + e2
        i = -e2 - q
        k = (((i * 1217359) >> 19) + 1) - _POW5_BITCOUNT
        j = q - k
        lo, hi = _POS[i, 0], _POS[i, 1]
        vr = _mul_shift(mv, lo, hi, j)
        vp = _mul_shift(mv + _U2, lo, hi, j)
        vm = _mul_shift(mv - _U1 - mm_shift, lo, hi, j)
        if q <= 1:
            vr_tz = True
            if accept_bounds:
                vm_tz = mm_shift == _U1
            else:
                vp -= _U1
        elif q < 63:
            vr_tz = (mv & ((_U1 << np.uint64(q)) - _U1)) == _U0
    removed = 0
    last = _U0
    if vm_tz or vr_tz:
        # Rare general case: exact trailing zeros decide the rounding.
        while vp // _U10 > vm // _U10:
            vm_tz = vm_tz and (vm % _U10 == _U0)
            vr, vp, vm, vr_tz, last = _drop_digit(vr, vp, vm, vr_tz, last)
            removed += 1
        if vm_tz:
            while vm % _U10 == _U0:
                vr, vp, vm, vr_tz, last = _drop_digit(vr, vp, vm, vr_tz, last)
                removed += 1
        if vr_tz and last == _U5 and vr % _U2 == _U0:
            last = np.uint64(4)          # exactly ...50..0: round half to even
        up = (vr == vm and (not accept_bounds or not vm_tz)) or last >= _U5
        out = vr + (_U1 if up else _U0)
    else:
        round_up = False
        if vp // _U100 > vm // _U100:
            round_up = vr % _U100 >= np.uint64(50)
            vr = vr // _U100
            vp = vp // _U100
            vm = vm // _U100
            removed += 2
        while vp // _U10 > vm // _U10:
            round_up = vr % _U10 >= _U5
            vr = vr // _U10
            vp = vp // _U10
            vm = vm // _U10
            removed += 1
        out = vr + (_U1 if (vr == vm or round_up) else _U0)
    return out, e10 + removed


@helper(cache=True, inline="always")
def _put_text(buf, p, a, b, c, d):
    """Write up to 4 ASCII codes (0 = none) at p; return the new position."""
    buf[p] = a
    p += 1
    if b:
        buf[p] = b
        p += 1
    if c:
        buf[p] = c
        p += 1
    if d:
        buf[p] = d
        p += 1
    return p


@helper(cache=True, inline="always")
def _decimal_length(v):
    """Return the number of decimal digits of a uint64."""
    n = 1
    while n < 20 and v >= _POW10[n]:
        n += 1
    return n


@helper(cache=True, inline="always")
def _put_digits(buf, end, v):
    """Write the decimal digits of a uint64 so that the last one lands at buf[end - 1]."""
    while v >= _U100:
        r = np.int64(v % _U100)
        v = v // _U100
        end -= 2
        buf[end] = _DIGIT_PAIRS[2 * r]
        buf[end + 1] = _DIGIT_PAIRS[2 * r + 1]
    if v >= _U10:
        r = np.int64(v)
        buf[end - 2] = _DIGIT_PAIRS[2 * r]
        buf[end - 1] = _DIGIT_PAIRS[2 * r + 1]
    else:
        buf[end - 1] = _ZERO_CH + np.int64(v)


@helper(cache=True)
def _put_float(buf, p, bits):
    """Write repr() of the double with these IEEE bits at buf[p:]; return the new position."""
    ieee_m = bits & _MANT_MASK
    ieee_e = np.int64((bits >> _U52) & _EXP_MASK)
    negative = (bits >> _U63) != _U0
    if ieee_e == 0x7FF:
        if ieee_m != _U0:
            return _put_text(buf, p, 110, 97, 110, 0)                   # nan (repr drops its sign)
        if negative:
            return _put_text(buf, p, _MINUS, 105, 110, 102)
        return _put_text(buf, p, 105, 110, 102, 0)
    if negative:
        buf[p] = _MINUS
        p += 1
    if ieee_e == 0 and ieee_m == _U0:
        return _put_text(buf, p, _ZERO_CH, _DOT, _ZERO_CH, 0)
    digits, e10 = _shortest(ieee_m, ieee_e)
    n = _decimal_length(digits)
    decpt = n + e10                       # value = 0.d1d2...dn * 10**decpt
    if decpt <= -4 or decpt > 16:         # CPython's repr switches to exponent form here
        _put_digits(buf, p + 1 + n, digits)
        buf[p] = buf[p + 1]
        if n > 1:
            buf[p + 1] = _DOT
            p += n + 1
        else:
            p += 1
        buf[p] = _E
        e = decpt - 1
        if e < 0:
            buf[p + 1] = _MINUS
            e = -e
        else:
            buf[p + 1] = _PLUS
        p += 2
        if e >= 100:
            buf[p] = _ZERO_CH + e // 100
            p += 1
        buf[p] = _ZERO_CH + (e // 10) % 10
        buf[p + 1] = _ZERO_CH + e % 10
        return p + 2
    if decpt <= 0:
        buf[p] = _ZERO_CH
        buf[p + 1] = _DOT
        p += 2
        for _ in range(-decpt):
            buf[p] = _ZERO_CH
            p += 1
        _put_digits(buf, p + n, digits)
        return p + n
    if decpt >= n:
        _put_digits(buf, p + n, digits)
        p += n
        for _ in range(decpt - n):
            buf[p] = _ZERO_CH
            p += 1
        buf[p] = _DOT
        buf[p + 1] = _ZERO_CH
        return p + 2
    _put_digits(buf, p + 1 + n, digits)
    for i in range(decpt):
        buf[p + i] = buf[p + 1 + i]
    buf[p + decpt] = _DOT
    return p + n + 1


@helper(cache=True)
def _put_int(buf, p, v):
    """Write the decimal text of an int64 at buf[p:]; return the new position."""
    if v < 0:
        buf[p] = _MINUS
        p += 1
        mag = np.uint64(-(v + 1)) + _U1
    else:
        mag = np.uint64(v)
    n = _decimal_length(mag)
    _put_digits(buf, p + n, mag)
    return p + n


@helper(cache=True)
def _put_fixed(buf, end, v, width):
    """Write v >= 0 as exactly `width` decimal digits ending before buf[end]."""
    for i in range(width):
        buf[end - 1 - i] = _ZERO_CH + v % 10
        v //= 10


@helper(cache=True)
def _put_utc(buf, p, bits):
    """Write POSIX seconds (the double with these bits) as 'YYYY-MM-DDThh:mm:ss.ffffffZ' at buf[p:], microseconds
    rounded half to even (as Python's round()); nothing outside years 1-9999 or when not finite. Return the new
    position."""
    x = np.uint64(bits).view(np.float64)
    m = np.rint(x * 1e6)
    if not (m >= -9.2e18 and m <= 9.2e18):            # not finite, or beyond int64: no date
        return p
    us = np.int64(m)
    if us < _FIRST_US or us > _LAST_US:
        return p
    days = us // _US_PER_DAY                           # floor division: days before 1970 too
    rest = us - days * _US_PER_DAY
    z = days + 719468                                  # civil_from_days: days from 0000-03-01
    era = z // 146097
    doe = z - era * 146097
    yoe = (doe - doe // 1460 + doe // 36524 - doe // 146096) // 365
    doy = doe - (365 * yoe + yoe // 4 - yoe // 100)
    mp = (5 * doy + 2) // 153
    day = doy - (153 * mp + 2) // 5 + 1
    month = mp + 3 if mp < 10 else mp - 9
    year = yoe + era * 400 + (1 if month <= 2 else 0)
    secs = rest // 1000000
    _put_fixed(buf, p + 4, year, 4)
    buf[p + 4] = 45
    _put_fixed(buf, p + 7, month, 2)
    buf[p + 7] = 45
    _put_fixed(buf, p + 10, day, 2)
    buf[p + 10] = 84                                   # T
    _put_fixed(buf, p + 13, secs // 3600, 2)
    buf[p + 13] = 58
    _put_fixed(buf, p + 16, secs // 60 % 60, 2)
    buf[p + 16] = 58
    _put_fixed(buf, p + 19, secs % 60, 2)
    buf[p + 19] = _DOT
    _put_fixed(buf, p + 26, rest % 1000000, 6)
    buf[p + 26] = 90                                   # Z
    return p + UTC_FIELD_CHARS


@entry("i8(i8, u8[:, ::1], i8[:, ::1], i8[::1], i8[::1], u1[::1])",
       cache=True, nogil=True)        # nogil: the logger and replay format while the estimation goes on
def _format_rows(n, fbits, ivals, kinds, src, buf):
    """Write n CSV lines into buf from float bits (F, n) and ints (I, n) per column kind; return the length."""
    p = 0
    ncol = kinds.shape[0]
    for r in range(n):
        for c in range(ncol):
            k = kinds[c]
            if k == 0:
                p = _put_float(buf, p, fbits[src[c], r])
            elif k == 1:
                p = _put_int(buf, p, ivals[src[c], r])
            elif k == 3:
                p = _put_utc(buf, p, fbits[src[c], r])
            buf[p] = _COMMA if c + 1 < ncol else _NL
            p += 1
    return p


def text_capacity(rows: int, columns: int, utc: bool = False) -> int:
    """Return the bytes `rows` CSV lines of `columns` fields can take at most (one of them `utc` text if utc)."""
    return rows * (columns * (MAX_FIELD_CHARS + 1) + (UTC_FIELD_CHARS - MAX_FIELD_CHARS if utc else 0))


def format_rows(columns: list[np.ndarray | None], out: np.ndarray | None = None, utc: int | None = None
                ) -> bytes | memoryview:
    """Return CSV lines (ASCII, '\\n' endings) of equal-length columns: float64 as repr, int64 as str, None empty;
    column number `utc` (float64 POSIX s) as ISO 8601 UTC text with microseconds (io/sinks.py utc_iso; empty when
    not finite or outside years 1-9999).

    With `out` (a uint8 buffer of at least text_capacity(rows, columns, utc is not None) bytes) the text is
    written there and a memoryview of it is returned, valid until the buffer is reused.
    """
    n = next((len(c) for c in columns if c is not None), 0)
    floats, ints, kinds, src = [], [], [], []
    for c, col in enumerate(columns):
        if col is None:
            kinds.append(KIND_EMPTY)
            src.append(0)
            continue
        col = np.asarray(col)
        if col.shape != (n,):
            raise ValueError(f"columns must be 1-D of one length {n}, got shape {col.shape}")
        if col.dtype == np.float64:
            kinds.append(KIND_UTC if c == utc else KIND_FLOAT)
            src.append(len(floats))
            floats.append(col.view(np.uint64))
        elif col.dtype == np.int64 and c != utc:
            kinds.append(KIND_INT)
            src.append(len(ints))
            ints.append(col)
        else:
            raise TypeError(f"columns must be float64 or int64 (utc: float64), got {col.dtype}")
    fbits = np.empty((len(floats), n), np.uint64)
    for k, col in enumerate(floats):
        fbits[k] = col
    ivals = np.empty((len(ints), n), np.int64)
    for k, col in enumerate(ints):
        ivals[k] = col
    need = text_capacity(n, len(columns), utc is not None)
    if out is None:
        buf = np.empty(need, np.uint8)
    elif out.dtype != np.uint8 or out.ndim != 1 or out.size < need:
        raise ValueError(f"out must be a 1-D uint8 buffer of at least {need} bytes")
    else:
        buf = out
    length = _format_rows(n, fbits, ivals, np.array(kinds, np.int64), np.array(src, np.int64), buf)
    return memoryview(buf)[:length] if out is not None else buf[:length].tobytes()


def format_matrix(floats: np.ndarray, more_floats: list[np.ndarray], ints: np.ndarray, more_ints: list[np.ndarray],
                  kinds: list[int], src: list[int]) -> bytes:
    """Return CSV lines of N rows whose fields come from float64 (N, F) and int64 (N, I) matrices and further (N,)
    columns: field c is kinds[c] (KIND_FLOAT, KIND_INT, KIND_UTC: POSIX s as ISO 8601 text, KIND_EMPTY) of
    column src[c] of the floats (F.. are more_floats) or ints (I.. are more_ints)."""
    n, n_f = floats.shape
    fbits = np.empty((n_f + len(more_floats), n), np.uint64)
    as_floats = fbits.view(np.float64)
    as_floats[:n_f] = floats.T
    for k, col in enumerate(more_floats):
        as_floats[n_f + k] = col
    n_i = ints.shape[1]
    ivals = np.empty((n_i + len(more_ints), n), np.int64)
    ivals[:n_i] = ints.T
    for k, col in enumerate(more_ints):
        ivals[n_i + k] = col
    kinds_a = np.array(kinds, np.int64)
    buf = np.empty(text_capacity(n, len(kinds), KIND_UTC in kinds), np.uint8)
    return buf[:_format_rows(n, fbits, ivals, kinds_a, np.array(src, np.int64), buf)].tobytes()


def float_texts(values: np.ndarray) -> list[str]:
    """Return repr()-identical text of each value of a float64 array (the compiled path, one field per value)."""
    values = np.ascontiguousarray(values, dtype=np.float64).ravel()
    return format_rows([values]).decode("ascii").splitlines()
