"""The binary wire format (docs/wire_format.md, version 1): payload codec and a stream decoder."""

from __future__ import annotations

import struct
from dataclasses import dataclass, field

import numpy as np

from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES, Sample
from fieldvane.io.framing import CobsError, cobs_decode, cobs_encode, crc16_ccitt_false

MAGIC = b"FV"
VERSION = 1
KIND_SAMPLE = 1
HEADER_SIZE = 36            # bytes 0..35: magic .. f_b
MAX_ENCODED_LEN = 256       # an encoded frame longer than this (before its 0x00) is garbage
SEQ_MODULUS = 1 << 32
SEQ_HALF = 1 << 31          # a step of more than this is a step backwards (sensor restart)

_HEADER = struct.Struct("<2sBBIQHBBdd")
_CRC = struct.Struct("<H")
_VALUES = {4: struct.Struct("<4f"), 8: struct.Struct("<8f")}
PAYLOAD_SIZES = {4: HEADER_SIZE + 16 + 2, 8: HEADER_SIZE + 32 + 2}   # 54 and 70 bytes

# Status bits (u16), frozen numbers; bits 4-15 are reserved and passed on unchanged.
STATUS_LOCKIN_OVERLOAD = 1 << 0
STATUS_PUMP_A_UNLOCKED = 1 << 1
STATUS_PUMP_B_UNLOCKED = 1 << 2
STATUS_CELL_NOT_READY = 1 << 3


class FrameError(ValueError):
    """A payload that is not a valid version-1 frame (counted in bad_frames)."""


class FrameCrcError(FrameError):
    """A payload whose CRC does not match (counted in crc_errors)."""


@dataclass(frozen=True, slots=True)
class Frame:
    """One decoded lock-in frame: seq, sensor time t_ns (ns), status bits, f_a/f_b (Hz), values (V)."""

    seq: int
    t_ns: int
    status: int
    f_a: float
    f_b: float
    values: tuple[float, ...]   # x_1a, y_1a, x_1b, y_1b[, x_2a, y_2a, x_2b, y_2b], lock-in volts
    restarted: bool = field(default=False, compare=False)   # first frame after a sequence reset

    def to_sample(self) -> Sample:
        """Return this frame as a Sample: t in s, f in Hz, z = x + i y per channel (volts); restarted kept."""
        v = self.values
        channels = CHANNELS_ONE_PROBE if len(v) == 4 else CHANNELS_TWO_PROBES
        # values are x, y pairs: as float64 they are exactly the complex128 memory layout.
        z = np.array(v, dtype=np.float64).view(np.complex128)
        # t_ns / 1e9 is the double nearest the exact time (t_ns * 1e-9 can be one ulp off).
        return Sample(self.t_ns / 1e9, self.f_a, self.f_b, z, channels, self.status,
                      self.restarted)


def encode_payload(frame: Frame) -> bytes:
    """Return the payload bytes of frame (header, f32 values, little-endian CRC appended)."""
    n = len(frame.values)
    if n not in _VALUES:
        raise ValueError(f"a frame carries 4 or 8 values, not {n}")
    body = _HEADER.pack(MAGIC, VERSION, KIND_SAMPLE, frame.seq % SEQ_MODULUS, frame.t_ns,
                        frame.status, n, 0, frame.f_a, frame.f_b) + _VALUES[n].pack(*frame.values)
    return body + _CRC.pack(crc16_ccitt_false(body))


def encode_frame(frame: Frame, leading_delimiter: bool = False) -> bytes:
    """Return the bytes to send for frame: COBS(payload) + 0x00 (optionally 0x00 first too)."""
    encoded = cobs_encode(encode_payload(frame)) + b"\x00"
    return b"\x00" + encoded if leading_delimiter else encoded


def decode_payload(payload: bytes) -> Frame:
    """Return the Frame in a payload (CRC included); raise FrameCrcError or FrameError."""
    n = len(payload)
    if n < 3:
        raise FrameError(f"payload of {n} bytes is too short to hold a CRC")
    (crc,) = _CRC.unpack_from(payload, n - 2)
    if crc16_ccitt_false(payload[:n - 2]) != crc:
        raise FrameCrcError("CRC mismatch")
    if n < HEADER_SIZE + 2:
        raise FrameError(f"payload of {n} bytes is shorter than the {HEADER_SIZE}-byte header")
    magic, version, kind, seq, t_ns, status, n_values, _reserved, f_a, f_b = \
        _HEADER.unpack_from(payload, 0)
    if magic != MAGIC:
        raise FrameError(f"wrong magic {magic!r}")
    if version != VERSION:
        raise FrameError(f"unknown version {version}")
    if kind != KIND_SAMPLE:
        raise FrameError(f"unknown kind {kind}")
    if n_values not in _VALUES:
        raise FrameError(f"n_values {n_values} is not 4 or 8")
    if n != PAYLOAD_SIZES[n_values]:
        raise FrameError(f"payload of {n} bytes does not match n_values {n_values}")
    values = _VALUES[n_values].unpack_from(payload, HEADER_SIZE)
    return Frame(seq, t_ns, status, f_a, f_b, values)


COUNTER_NAMES = ("frames_ok", "crc_errors", "bad_frames", "seq_gaps", "seq_resets",
                 "duplicates", "bytes_discarded", "resync_bytes", "resyncs", "bytes_fed")


class FrameDecoder:
    """Pure stream decoder: feed(bytes) returns the complete, valid frames; counts the rest.

    A fresh decoder (and one after resync()) does not know where the stream starts: the bytes
    before its first 0x00 are kept as a frame only if they form a valid one, else they count as
    resynchronisation (`resync_bytes`), not as a damaged frame.
    """

    def __init__(self, max_encoded_len: int = MAX_ENCODED_LEN):
        self.max_encoded_len = max_encoded_len
        self._buf = bytearray()
        self._discarding = False      # inside an oversize run: drop everything to the next 0x00
        self._fresh = True            # no 0x00 seen since the start or the last resync()
        self._discard_resync = False  # the run being discarded is a resync, not a bad frame
        self._last_seq: int | None = None
        self.frames_ok = 0
        self.crc_errors = 0
        self.bad_frames = 0
        self.seq_gaps = 0             # frames missing according to forward seq jumps
        self.seq_resets = 0           # seq stepped backwards (sensor restart): tracking restarted
        self.duplicates = 0
        self.bytes_discarded = 0      # bytes (0x00 delimiters excluded) of rejected candidates
        self.resync_bytes = 0         # bytes before the first 0x00 of a fresh stream, not a frame
        self.resyncs = 0              # resync() calls (link opened again, bytes lost upstream)
        self.bytes_fed = 0

    @property
    def pending(self) -> int:
        """Return the number of bytes held waiting for their 0x00 delimiter."""
        return len(self._buf)

    def counters(self) -> dict[str, int]:
        """Return a snapshot of every counter (ints), including `pending` bytes."""
        c = {name: getattr(self, name) for name in COUNTER_NAMES}
        c["pending"] = len(self._buf)
        return c

    def resync(self) -> None:
        """Start afresh at the next byte (link reopened, bytes lost): pending bytes count as resync."""
        self.resyncs += 1
        self.resync_bytes += len(self._buf)
        self._buf.clear()
        self._discarding = False
        self._fresh = True

    def _drop(self, n: int, resync: bool) -> None:
        if resync:
            self.resync_bytes += n
        else:
            self.bytes_discarded += n

    def feed(self, data: bytes) -> list[Frame]:
        """Return the frames completed by data, in order; malformed input is counted, never raised."""
        if not isinstance(data, (bytes, bytearray)):
            data = bytes(data)
        self.bytes_fed += len(data)
        frames: list[Frame] = []
        start = 0
        n = len(data)
        limit = self.max_encoded_len
        buf = self._buf
        while start < n:
            end = data.find(0, start)
            if end < 0:
                chunk_len = n - start
                if self._discarding:
                    self._drop(chunk_len, self._discard_resync)
                elif len(buf) + chunk_len > limit:
                    if not self._fresh:
                        self.bad_frames += 1
                    self._drop(len(buf) + chunk_len, self._fresh)
                    buf.clear()
                    self._discarding = True
                    self._discard_resync = self._fresh
                else:
                    buf += data[start:]
                break
            seg_len = end - start
            fresh, self._fresh = self._fresh, False
            if self._discarding:
                self._drop(seg_len, self._discard_resync)
                self._discarding = False
            elif len(buf) + seg_len > limit:
                if not fresh:
                    self.bad_frames += 1
                self._drop(len(buf) + seg_len, fresh)
                buf.clear()
            elif buf:
                buf += data[start:end]
                self._candidate(bytes(buf), frames, fresh)
                buf.clear()
            elif seg_len:
                self._candidate(data[start:end], frames, fresh)
            # else: an empty candidate (two 0x00 in a row, or a leading 0x00) means nothing
            start = end + 1
        return frames

    def reset_sequence(self) -> None:
        """Forget the last sequence number (the next frame starts seq tracking afresh)."""
        self._last_seq = None

    def _candidate(self, encoded: bytes, frames: list[Frame], fresh: bool = False) -> None:
        try:
            frame = decode_payload(cobs_decode(encoded))
        except FrameCrcError:
            if fresh:
                self.resync_bytes += len(encoded)
                return
            self.crc_errors += 1
            self.bytes_discarded += len(encoded)
            return
        except (CobsError, FrameError):
            if fresh:
                self.resync_bytes += len(encoded)
                return
            self.bad_frames += 1
            self.bytes_discarded += len(encoded)
            return
        last = self._last_seq
        if last is not None:
            step = (frame.seq - last) % SEQ_MODULUS
            if step == 0:
                self.duplicates += 1
                return
            if step > SEQ_HALF:
                self.seq_resets += 1
                frame = Frame(frame.seq, frame.t_ns, frame.status, frame.f_a, frame.f_b,
                              frame.values, restarted=True)
            elif step > 1:
                self.seq_gaps += step - 1
        self._last_seq = frame.seq
        self.frames_ok += 1
        frames.append(frame)
