"""Byte framing primitives: COBS encode/decode and the CRC-16/CCITT-FALSE checksum."""

from __future__ import annotations

import binascii

DELIMITER = 0x00


class CobsError(ValueError):
    """The bytes are not a valid COBS encoding."""


def crc16_ccitt_false(data: bytes, crc: int = 0xFFFF) -> int:
    """Return the CRC-16/CCITT-FALSE of data (poly 0x1021, init 0xFFFF, no reflection, no xor)."""
    # binascii.crc_hqx is exactly this CRC when started from 0xFFFF, and runs in C.
    return binascii.crc_hqx(data, crc)


def cobs_encode(data: bytes) -> bytes:
    """Return the COBS encoding of data (no 0x00 inside, delimiter not appended)."""
    out = bytearray()
    pieces = bytes(data).split(b"\x00")
    last = len(pieces) - 1
    for i, piece in enumerate(pieces):
        n = len(piece)
        start = 0
        # Full 254-byte blocks carry no implied zero (code 0xFF).
        while n - start >= 254:
            out.append(0xFF)
            out += piece[start:start + 254]
            start += 254
        rest = n - start
        if i < last or rest > 0 or n == 0:
            # A block shorter than 254 bytes implies a zero after it; the final one is dropped
            # by the decoder, so the last piece needs a block only if it left bytes over (or
            # was empty from the start, e.g. an empty input or one ending in 0x00).
            out.append(rest + 1)
            out += piece[start:]
    return bytes(out)


def cobs_decode(encoded: bytes) -> bytes:
    """Return the data that a COBS block sequence (without its 0x00 delimiter) encodes."""
    n = len(encoded)
    if 0 in encoded:
        raise CobsError(f"zero byte inside COBS data at offset {encoded.index(0)}")
    # Fast path: overwrite each code byte after the first with the zero it stands for, then drop
    # the first code byte. Valid while no block is a full 254-byte one (code 0xFF), which has no
    # implied zero: such input takes the general path below.
    out = bytearray(encoded)
    i = 0
    while i < n:
        code = out[i]
        if code == 0xFF:
            return _cobs_decode_general(encoded)
        if i:
            out[i] = 0
        i += code
    if i != n:
        raise CobsError(f"last COBS block runs past the end by {i - n} bytes")
    del out[0:1]
    return bytes(out)


def _cobs_decode_general(encoded: bytes) -> bytes:
    out = bytearray()
    n = len(encoded)
    i = 0
    while i < n:
        code = encoded[i]
        end = i + code
        if end > n:
            raise CobsError(f"COBS block at offset {i} runs past the end ({code - 1} bytes "
                            f"announced, {n - i - 1} present)")
        out += encoded[i + 1:end]
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)
