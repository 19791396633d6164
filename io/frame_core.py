"""Compiled stream decoder of the binary wire format (docs/wire_format.md, version 1): bytes in, frame arrays out.

One pass over the received bytes splits them at each 0x00, undoes COBS, checks the CRC-16/CCITT-FALSE and
the header, tracks the sequence number and writes each valid frame as one row of two arrays. It is the
whole of FrameDecoder's state machine (io/wire.py keeps the state in a small int64 array and the bytes of
an unfinished frame in a buffer between calls), so the counters, the frames and every edge case are the
ones docs/wire_format.md states. The tests compare it with an oracle built on the `cobs` package, binascii and
struct (tests/test_fuzz_decoder.py, tests/test_live_arrays.py).
"""

from __future__ import annotations

import numpy as np

from fieldvane.kernels import entry, helper

# state (int64): the decoder's position in the stream and its counters
ST_PENDING = 0          # bytes of the unfinished frame held in `pending`
ST_DISCARDING = 1       # inside an oversize run: drop everything to the next 0x00
ST_FRESH = 2            # no 0x00 seen since the start or the last resync
ST_DISCARD_RESYNC = 3   # the run being discarded is a resync, not a bad frame
ST_HAS_SEQ = 4          # a sequence number was seen (ST_LAST_SEQ holds it)
ST_LAST_SEQ = 5
ST_FRAMES_OK = 6
ST_CRC_ERRORS = 7
ST_BAD_FRAMES = 8
ST_SEQ_GAPS = 9
ST_SEQ_RESETS = 10
ST_DUPLICATES = 11
ST_BYTES_DISCARDED = 12
ST_RESYNC_BYTES = 13
ST_BYTES_FED = 14
ST_MAX_ENCODED_LEN = 15
ST_KINDS = 16           # value counts among the frames of the last call: bit 0 four values, bit 1 eight
N_STATE = 17

# columns of the integer output rows
O_SEQ, O_T_NS, O_STATUS, O_N_VALUES, O_RESTARTED = 0, 1, 2, 3, 4
N_OUT_INT = 5

# The format's constants (io/wire.py takes them from here: one definition)
MAGIC = (0x46, 0x56)        # b"FV"
VERSION = 1
KIND_SAMPLE = 1
HEADER_SIZE = 36            # bytes 0..35: magic .. f_b
SEQ_MODULUS = 1 << 32
SEQ_HALF = 1 << 31          # a step of more than this is a step backwards (sensor restart)
_MAGIC0, _MAGIC1 = MAGIC

# outcome of one candidate
_OK, _CRC, _BAD = 0, 1, 2


def _crc_table() -> np.ndarray:
    """Return the CRC-16/CCITT-FALSE byte table: entry b is the CRC register after shifting b << 8 through 8 bits."""
    table = np.zeros(256, np.int64)
    for b in range(256):
        crc = b << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) & 0xFFFF if crc & 0x8000 else (crc << 1) & 0xFFFF
        table[b] = crc
    return table


_CRC_TABLE = _crc_table()


@helper(cache=True)
def _crc16_ccitt_false(buf, n):
    """CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, no xor) of buf[:n], a byte at a time."""
    crc = 0xFFFF
    for i in range(n):
        crc = ((crc << 8) & 0xFFFF) ^ _CRC_TABLE[((crc >> 8) ^ np.int64(buf[i])) & 0xFF]
    return crc


@helper(cache=True, inline="always")
def _u(buf, offset, size):
    """Little-endian unsigned integer of `size` bytes at buf[offset:] (size <= 7: exact in int64)."""
    v = 0
    for k in range(size - 1, -1, -1):
        v = (v << 8) | np.int64(buf[offset + k])
    return v


@helper(cache=True)
def _candidate(enc, n_enc, payload, word, out_i, out_t, out_f, out_v, row):
    """Decode one candidate enc[:n_enc] (no 0x00 inside) into row `row` of the outputs; return _OK, _CRC or _BAD."""
    # COBS: a code byte k announces k - 1 data bytes and, unless k is 0xFF or the block is the last, a zero.
    n = 0
    i = 0
    while i < n_enc:
        code = np.int64(enc[i])
        end = i + code
        if end > n_enc:
            return _BAD
        for k in range(i + 1, end):
            payload[n] = enc[k]
            n += 1
        i = end
        if code != 0xFF and i < n_enc:
            payload[n] = 0
            n += 1
    if n < 3:
        return _BAD
    if _crc16_ccitt_false(payload, n - 2) != _u(payload, n - 2, 2):
        return _CRC
    if n < HEADER_SIZE + 2:
        return _BAD
    if payload[0] != _MAGIC0 or payload[1] != _MAGIC1 or payload[2] != VERSION or payload[3] != KIND_SAMPLE:
        return _BAD
    n_values = np.int64(payload[18])
    if n_values != 4 and n_values != 8:
        return _BAD
    if n != HEADER_SIZE + 4 * n_values + 2:
        return _BAD
    b8 = word.view(np.uint8)
    f8 = word.view(np.float64)
    f4 = word.view(np.float32)
    i8 = word.view(np.int64)
    u8 = word.view(np.uint64)
    for k in range(8):
        b8[k] = payload[8 + k]
    out_i[row, O_T_NS] = i8[0]            # the u64's bits: >= 2**63 ns reads back negative (Python undoes it)
    out_t[row] = np.float64(u8[0]) / 1e9    # the double nearest t_ns, then divided, as Python's t_ns / 1e9
    out_i[row, O_SEQ] = _u(payload, 4, 4)
    out_i[row, O_STATUS] = _u(payload, 16, 2)
    out_i[row, O_N_VALUES] = n_values
    out_i[row, O_RESTARTED] = 0
    for j in range(2):
        for k in range(8):
            b8[k] = payload[20 + 8 * j + k]
        out_f[row, j] = f8[0]
    for j in range(8):
        if j < n_values:
            for k in range(4):
                b8[k] = payload[HEADER_SIZE + 4 * j + k]
            out_v[row, j] = np.float64(f4[0])
        else:
            out_v[row, j] = np.nan
    return _OK


@helper(cache=True)
def _take(enc, n_enc, fresh, state, payload, word, out_i, out_t, out_f, out_v, row):
    """Judge one candidate; count it; return the next free output row."""
    outcome = _candidate(enc, n_enc, payload, word, out_i, out_t, out_f, out_v, row)
    if outcome != _OK:
        if fresh:
            state[ST_RESYNC_BYTES] += n_enc
        else:
            state[ST_CRC_ERRORS if outcome == _CRC else ST_BAD_FRAMES] += 1
            state[ST_BYTES_DISCARDED] += n_enc
        return row
    seq = out_i[row, O_SEQ]
    if state[ST_HAS_SEQ]:
        step = (seq - state[ST_LAST_SEQ]) % SEQ_MODULUS
        if step == 0:
            state[ST_DUPLICATES] += 1
            return row
        if step > SEQ_HALF:
            state[ST_SEQ_RESETS] += 1
            out_i[row, O_RESTARTED] = 1
        elif step > 1:
            state[ST_SEQ_GAPS] += step - 1
    state[ST_HAS_SEQ] = 1
    state[ST_LAST_SEQ] = seq
    state[ST_FRAMES_OK] += 1
    state[ST_KINDS] |= 1 if out_i[row, O_N_VALUES] == 4 else 2
    return row + 1


@helper(cache=True, inline="always")
def _drop(state, n, resync):
    if resync:
        state[ST_RESYNC_BYTES] += n
    else:
        state[ST_BYTES_DISCARDED] += n


@entry("i8(u1[::1], i8[::1], u1[::1], i8[:, ::1], f8[::1], f8[:, ::1], f8[:, ::1])", cache=True)
def decode_stream(pending, state, data, out_i, out_t, out_f, out_v):
    """Feed data (bytes as uint8) to the decoder whose unfinished-frame buffer and state are given; write each
    complete valid frame as a row of out_i (seq, t_ns, status, n_values, restarted), out_t (t s), out_f (f_a, f_b
    Hz) and out_v (8 values V, NaN past n_values); return how many. The outputs need a row per frame this call can
    complete: at most one per 0x00 in data, and at most (pending bytes + len(data)) // MIN_FRAME_BYTES + 1
    (io/wire.py: each frame takes at least that many bytes, its 0x00 included). Malformed input is counted, never
    raised."""
    limit = state[ST_MAX_ENCODED_LEN]
    n = data.shape[0]
    state[ST_BYTES_FED] += n
    state[ST_KINDS] = 0
    payload = np.empty(max(limit, 1), np.uint8)
    word = np.empty(1, np.uint64)
    rows = 0
    start = 0
    while start < n:
        end = start
        while end < n and data[end] != 0:
            end += 1
        held = state[ST_PENDING]
        if end == n:                                   # no delimiter: hold the bytes (or discard an oversize run)
            chunk_len = n - start
            if state[ST_DISCARDING]:
                _drop(state, chunk_len, state[ST_DISCARD_RESYNC])
            elif held + chunk_len > limit:
                if not state[ST_FRESH]:
                    state[ST_BAD_FRAMES] += 1
                _drop(state, held + chunk_len, state[ST_FRESH])
                state[ST_PENDING] = 0
                state[ST_DISCARDING] = 1
                state[ST_DISCARD_RESYNC] = state[ST_FRESH]
            else:
                for k in range(chunk_len):
                    pending[held + k] = data[start + k]
                state[ST_PENDING] = held + chunk_len
            break
        seg_len = end - start
        fresh = state[ST_FRESH]
        state[ST_FRESH] = 0
        if state[ST_DISCARDING]:
            _drop(state, seg_len, state[ST_DISCARD_RESYNC])
            state[ST_DISCARDING] = 0
        elif held + seg_len > limit:
            if not fresh:
                state[ST_BAD_FRAMES] += 1
            _drop(state, held + seg_len, fresh)
            state[ST_PENDING] = 0
        elif held:
            for k in range(seg_len):
                pending[held + k] = data[start + k]
            rows = _take(pending, held + seg_len, fresh, state, payload, word, out_i, out_t, out_f, out_v, rows)
            state[ST_PENDING] = 0
        elif seg_len:
            rows = _take(data[start:end], seg_len, fresh, state, payload, word, out_i, out_t, out_f, out_v, rows)
        # else: an empty candidate (two 0x00 in a row, or a leading 0x00) means nothing
        start = end + 1
    return rows
