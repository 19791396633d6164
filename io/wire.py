"""The binary wire format (docs/wire_format.md, version 1): payload codec and a stream decoder."""

from __future__ import annotations

import struct
from dataclasses import dataclass, field

import numpy as np

from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES, Sample, SampleBlock
from fieldvane.io import frame_core as fc
from fieldvane.io.frame_core import HEADER_SIZE, KIND_SAMPLE, SEQ_HALF, SEQ_MODULUS, VERSION
from fieldvane.io.framing import CobsError, cobs_decode, cobs_encode, crc16_ccitt_false
from fieldvane.kernels import bind

MAGIC = bytes(fc.MAGIC)
MAX_ENCODED_LEN = 256       # an encoded frame longer than this (before its 0x00) is garbage

_HEADER = struct.Struct("<2sBBIQHBBdd")
_CRC = struct.Struct("<H")
_VALUES = {4: struct.Struct("<4f"), 8: struct.Struct("<8f")}
PAYLOAD_SIZES = {4: HEADER_SIZE + 16 + 2, 8: HEADER_SIZE + 32 + 2}   # 54 and 70 bytes
MIN_FRAME_BYTES = PAYLOAD_SIZES[4] + 2      # the shortest valid frame on the wire: COBS adds a byte, then its 0x00

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
_COUNTER_STATE = {"frames_ok": fc.ST_FRAMES_OK, "crc_errors": fc.ST_CRC_ERRORS, "bad_frames": fc.ST_BAD_FRAMES,
                  "seq_gaps": fc.ST_SEQ_GAPS, "seq_resets": fc.ST_SEQ_RESETS, "duplicates": fc.ST_DUPLICATES,
                  "bytes_discarded": fc.ST_BYTES_DISCARDED, "resync_bytes": fc.ST_RESYNC_BYTES,
                  "bytes_fed": fc.ST_BYTES_FED}


class FrameArrays:
    """Decoded frames as rows: ints (N, 5) seq, t_ns, status, n_values, restarted; t (N,) s; f (N, 2) f_a, f_b Hz;
    values (N, 8) lock-in V (NaN past n_values); kinds: bit 0 set if a frame has 4 values, bit 1 if one has 8."""

    __slots__ = ("ints", "t", "f", "values", "kinds")

    def __init__(self, ints: np.ndarray, t: np.ndarray, f: np.ndarray, values: np.ndarray, kinds: int):
        self.ints, self.t, self.f, self.values, self.kinds = ints, t, f, values, kinds

    def __len__(self) -> int:
        return int(self.ints.shape[0])

    def samples(self) -> SampleBlock | list[Sample]:
        """Return the rows as one SampleBlock (t s, f Hz, z V, status, restarted), or as Samples when one- and
        two-probe frames are mixed (an empty list when there are none)."""
        ints = self.ints
        if not len(ints):
            return []
        if self.kinds == 3:
            return self._mixed_samples()
        values = self.values if self.kinds == 2 else np.ascontiguousarray(self.values[:, :4])
        return SampleBlock(self.t, self.f, values.view(np.complex128),
                           CHANNELS_TWO_PROBES if self.kinds == 2 else CHANNELS_ONE_PROBE,
                           status=ints[:, fc.O_STATUS], restarted=ints[:, fc.O_RESTARTED] != 0)

    def _mixed_samples(self) -> list[Sample]:
        """Return one- and two-probe rows as Samples, each with its own channels (a probe count changed)."""
        z = {8: self.values.view(np.complex128), 4: np.ascontiguousarray(self.values[:, :4]).view(np.complex128)}
        channels = {8: CHANNELS_TWO_PROBES, 4: CHANNELS_ONE_PROBE}
        return [Sample(t, f_a, f_b, z[n][i], channels[n], status, bool(restarted))
                for i, ((_seq, _t_ns, status, n, restarted), t, (f_a, f_b))
                in enumerate(zip(self.ints.tolist(), self.t.tolist(), self.f.tolist()))]

    def frames(self) -> list[Frame]:
        """Return the rows as Frame objects (values as float32-exact floats, t_ns as the unsigned wire value)."""
        out = []
        for (seq, t_ns, status, n_values, restarted), (f_a, f_b), values in zip(
                self.ints.tolist(), self.f.tolist(), self.values.tolist()):
            out.append(Frame(seq, t_ns & 0xFFFFFFFFFFFFFFFF, status, f_a, f_b, tuple(values[:n_values]),
                             restarted=bool(restarted)))
        return out


class FrameDecoder:
    """Pure stream decoder: feed(bytes) returns the complete, valid frames; counts the rest.

    A fresh decoder (and one after resync()) does not know where the stream starts: the bytes
    before its first 0x00 are kept as a frame only if they form a valid one, else they count as
    resynchronisation (`resync_bytes`), not as a damaged frame. The work is one compiled pass
    (io/frame_core.py); this class keeps its state between calls.
    """

    def __init__(self, max_encoded_len: int = MAX_ENCODED_LEN):
        self._state = np.zeros(fc.N_STATE, np.int64)
        self._state[fc.ST_FRESH] = 1
        self._pending = np.zeros(0, np.uint8)
        # (its per-call arrays are made here with the declared types: the call skips their checks)
        self._decode = bind(fc.decode_stream, trusted=True)
        self.max_encoded_len = max_encoded_len
        self.resyncs = 0              # resync() calls (link opened again, bytes lost upstream)

    @property
    def max_encoded_len(self) -> int:
        """An encoded frame longer than this many bytes (before its 0x00) is garbage."""
        return int(self._state[fc.ST_MAX_ENCODED_LEN])

    @max_encoded_len.setter
    def max_encoded_len(self, value: int) -> None:
        value = int(value)
        self._state[fc.ST_MAX_ENCODED_LEN] = value
        if value > len(self._pending):      # grown, never shrunk: the bytes held stay
            pending = np.zeros(value, np.uint8)
            pending[:len(self._pending)] = self._pending
            self._pending = pending

    def __getattr__(self, name: str):
        # frames_ok, crc_errors, bad_frames, seq_gaps (frames missing according to forward seq jumps), seq_resets
        # (seq stepped backwards: sensor restart), duplicates, bytes_discarded (bytes of rejected candidates, 0x00
        # excluded), resync_bytes (bytes before the first 0x00 of a fresh stream), bytes_fed
        k = _COUNTER_STATE.get(name)
        if k is None:
            raise AttributeError(name)
        return int(self.__dict__["_state"][k])

    @property
    def pending(self) -> int:
        """Return the number of bytes held waiting for their 0x00 delimiter."""
        return int(self._state[fc.ST_PENDING])

    def counters(self) -> dict[str, int]:
        """Return a snapshot of every counter (ints), including `pending` bytes."""
        c = {name: getattr(self, name) for name in COUNTER_NAMES}
        c["pending"] = self.pending
        return c

    def resync(self) -> None:
        """Start afresh at the next byte (link reopened, bytes lost): pending bytes count as resync."""
        st = self._state
        self.resyncs += 1
        st[fc.ST_RESYNC_BYTES] += st[fc.ST_PENDING]
        st[fc.ST_PENDING] = 0
        st[fc.ST_DISCARDING] = 0
        st[fc.ST_FRESH] = 1

    def reset_sequence(self) -> None:
        """Forget the last sequence number (the next frame starts seq tracking afresh)."""
        self._state[fc.ST_HAS_SEQ] = 0

    def feed_arrays(self, data) -> FrameArrays:
        """Return the frames completed by data as arrays, in order; malformed input is counted, never raised."""
        return self.feed_many([data])[0]

    def feed_many(self, pieces) -> tuple[FrameArrays, list[int]]:
        """Return the frames completed by several reads, in order, as one FrameArrays, and how many each read
        completed (the live loop's reads since its last batch: no join of their samples afterwards)."""
        pieces = [p if isinstance(p, (bytes, bytearray)) else bytes(p) for p in pieces]
        # A frame ends at a 0x00 and takes at least MIN_FRAME_BYTES with it: rows for at most that many.
        rows = min(sum(p.count(0) for p in pieces),
                   (self.pending + sum(map(len, pieces))) // MIN_FRAME_BYTES + len(pieces))
        ints, t = np.empty((rows, fc.N_OUT_INT), np.int64), np.empty(rows)
        f, values = np.empty((rows, 2)), np.empty((rows, 8))
        counts, n, kinds, decode = [], 0, 0, self._decode
        for p in pieces:
            if n:
                got = decode(self._pending, self._state, np.frombuffer(p, np.uint8), ints[n:], t[n:], f[n:],
                             values[n:])
            else:
                got = decode(self._pending, self._state, np.frombuffer(p, np.uint8), ints, t, f, values)
            kinds |= int(self._state[fc.ST_KINDS])
            counts.append(got)
            n += got
        if n < rows:
            ints, t, f, values = ints[:n], t[:n], f[:n], values[:n]
        return FrameArrays(ints, t, f, values, kinds), counts

    def feed(self, data: bytes) -> list[Frame]:
        """Return the frames completed by data, in order; malformed input is counted, never raised."""
        return self.feed_arrays(data).frames()
