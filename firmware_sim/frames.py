"""Encoder of the sensor's output: binary wire frames (docs/wire_format.md, version 1) and CSV lines.

Written from the wire-format text alone, on purpose independent of fieldvane.io's decoder: the
simulator stands in for the sensor electronics, so a shared mistake must not pass unnoticed.
"""

from __future__ import annotations

import math
import struct
from typing import Iterable, Sequence

MAGIC = b"FV"
WIRE_VERSION = 1
KIND_LOCKIN_SAMPLE = 1
DELIMITER = b"\x00"
SEQ_MODULUS = 1 << 32
MAX_T_NS = (1 << 64) - 1

# Status bits (u16) of wire_format.md; bits 4-15 are reserved and sent as 0.
STATUS_BITS = {
    "LOCKIN_OVERLOAD": 1 << 0,
    "PUMP_A_UNLOCKED": 1 << 1,
    "PUMP_B_UNLOCKED": 1 << 2,
    "CELL_NOT_READY": 1 << 3,
}

# magic, version, kind, seq u32, t_ns u64, status u16, n_values u8, reserved u8, f_a f64, f_b f64
_HEADER = struct.Struct("<2sBBIQHBBdd")
_VALUES = {4: struct.Struct("<4f"), 8: struct.Struct("<8f")}
_CRC = struct.Struct("<H")


def _crc_table() -> tuple[int, ...]:
    table = []
    for byte in range(256):
        reg = byte << 8
        for _ in range(8):
            reg = ((reg << 1) ^ 0x1021) if reg & 0x8000 else (reg << 1)
            reg &= 0xFFFF
        table.append(reg)
    return tuple(table)


_CRC_TABLE = _crc_table()


def crc16_ccitt_false(data: bytes) -> int:
    """Return the CRC-16/CCITT-FALSE of data (poly 0x1021, init 0xFFFF, no reflection, no xor)."""
    reg = 0xFFFF
    for byte in data:
        reg = ((reg << 8) & 0xFFFF) ^ _CRC_TABLE[(reg >> 8) ^ byte]
    return reg


def cobs_encode(data: bytes) -> bytes:
    """Return the COBS encoding of data: no 0x00 inside; the delimiter is not appended."""
    data = bytes(data)
    out = bytearray([0])          # placeholder for the first block's code byte
    code_at, code = 0, 1
    last = len(data) - 1
    for i, byte in enumerate(data):
        if byte == 0:
            out[code_at] = code
            code_at, code = len(out), 1
            out.append(0)
            continue
        out.append(byte)
        code += 1
        if code == 0xFF:          # a full block of 254 data bytes carries no implied zero
            out[code_at] = code
            if i == last:         # nothing follows: no empty block after it
                return bytes(out)
            code_at, code = len(out), 1
            out.append(0)
    out[code_at] = code
    return bytes(out)


def encode_payload(seq: int, t_ns: int, status: int, f_a: float, f_b: float,
                   values: Sequence[float]) -> bytes:
    """Return the version-1 payload bytes (header, f32 values, little-endian CRC) of one sample."""
    n = len(values)
    if n not in _VALUES:
        raise ValueError(f"values: a frame carries 4 or 8 lock-in values, not {n}")
    t_ns = int(t_ns)
    if not 0 <= t_ns <= MAX_T_NS:
        raise ValueError(f"t_ns: must fit an unsigned 64-bit integer, got {t_ns}")
    if not 0 <= int(status) <= 0xFFFF:
        raise ValueError(f"status: must fit 16 bits, got {status}")
    body = (_HEADER.pack(MAGIC, WIRE_VERSION, KIND_LOCKIN_SAMPLE, int(seq) % SEQ_MODULUS, t_ns,
                         int(status), n, 0, float(f_a), float(f_b))
            + _VALUES[n].pack(*(_f32_safe(v) for v in values)))
    return body + _CRC.pack(crc16_ccitt_false(body))


def _f32_safe(v: float) -> float:
    """Return v, clipped to +-inf when it is too large for float32 (struct would raise)."""
    v = float(v)
    if math.isfinite(v) and abs(v) > 3.4028234663852886e38:
        return math.copysign(math.inf, v)
    return v


def encode_frame(seq: int, t_ns: int, status: int, f_a: float, f_b: float,
                 values: Sequence[float]) -> bytes:
    """Return the bytes sent on the wire for one sample: COBS(payload + CRC) followed by 0x00."""
    return cobs_encode(encode_payload(seq, t_ns, status, f_a, f_b, values)) + DELIMITER


def interleave_xy(z: Iterable[complex]) -> list[float]:
    """Return [x_1a, y_1a, x_1b, y_1b, ...] (V) from complex lock-in outputs in channel order."""
    out: list[float] = []
    for v in z:
        c = complex(v)
        out.append(c.real)
        out.append(c.imag)
    return out


def time_to_ns(t_s: float) -> int:
    """Return the sensor timestamp in integer nanoseconds for a time in seconds (rounded)."""
    return int(round(float(t_s) * 1e9))


# ----- text input mode: recording-CSV lines -------------------------------------------------

TRUTH_COLUMNS = ("true_ux", "true_uy", "true_uz", "true_b_nT")   # simulator ground truth, in this order


def csv_columns(channels: Sequence[str], extra: Sequence[str] = ()) -> list[str]:
    """Return the recording-CSV column names for these channels: t, f_a, f_b, x/y pairs, extras."""
    cols = ["t", "f_a", "f_b"]
    for ch in channels:
        cols += [f"x_{ch}", f"y_{ch}"]
    return cols + list(extra)


def csv_header_line(channels: Sequence[str], extra: Sequence[str] = ()) -> bytes:
    """Return the header line (UTF-8, '\\n' terminated) of the text input mode."""
    return (",".join(csv_columns(channels, extra)) + "\n").encode("ascii")


def _num(x: float) -> str:
    # repr is the shortest text that reads back to the same double ('nan', 'inf' included).
    return repr(float(x))


def csv_line(t_s: float, f_a: float, f_b: float, z: Iterable[complex],
             extra: Sequence[float] = (), missing: Sequence[bool] | None = None) -> bytes:
    """Return one sample as a CSV line (t s, f Hz, x/y V per channel, extras), '\\n' terminated.

    missing: per channel, True where the probe's values are absent: both its fields are left empty.
    """
    values = [_num(v) for v in interleave_xy(z)]
    if missing is not None:
        for k, gone in enumerate(missing):
            if gone:
                values[2 * k] = values[2 * k + 1] = ""
    fields = [_num(t_s), _num(f_a), _num(f_b)] + values + [_num(v) for v in extra]
    return (",".join(fields) + "\n").encode("ascii")


def metadata_lines(metadata: dict[str, str]) -> bytes:
    """Return '# key: value' comment lines (UTF-8) that carry metadata in the text input mode."""
    return "".join(f"# {k}: {v}\n" for k, v in metadata.items()).encode("utf-8")
