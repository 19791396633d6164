"""Property-based fuzzing of FrameDecoder against an independent oracle built on the `cobs`
package and binascii (reference libraries) and the receiver rules of docs/wire_format.md."""

from __future__ import annotations

import binascii
import os
import struct
import time

import pytest
from cobs import cobs
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldvane.io.wire import Frame, FrameDecoder, encode_frame

LIMIT = 256


def _payload_ok(cand: bytes):
    """Return the frame tuple of a candidate if it passes every check of steps 1-4, else None."""
    if len(cand) > LIMIT:
        return None
    try:
        p = cobs.decode(cand)
    except cobs.DecodeError:
        return None
    if len(p) < 3 or binascii.crc_hqx(p[:-2], 0xFFFF) != struct.unpack("<H", p[-2:])[0]:
        return None
    n = p[18] if len(p) > 18 else 0
    if len(p) < 38 or p[:2] != b"FV" or p[2] != 1 or p[3] != 1 or n not in (4, 8) \
            or len(p) != 38 + 4 * n:
        return None
    seq, t_ns, status = struct.unpack_from("<IQH", p, 4)
    f_a, f_b = struct.unpack_from("<dd", p, 20)
    return (seq, t_ns, status, f_a, f_b, struct.unpack_from(f"<{n}f", p, 36))


def oracle(stream: bytes):
    """Return (frames as (seq, t_ns, status, f_a, f_b, values) tuples, counters) for stream."""
    c = dict(frames_ok=0, crc_errors=0, bad_frames=0, seq_gaps=0, seq_resets=0, duplicates=0,
             bytes_discarded=0, resync_bytes=0, resyncs=0)
    frames, last = [], None
    c["accepted_bytes"] = 0          # bytes of candidates kept as frames or duplicates
    *complete, pending = stream.split(b"\x00")
    for i, cand in enumerate(complete):
        if not cand:
            continue
        if i == 0 and _payload_ok(cand) is None:
            # Receiver rules: bytes before the first 0x00 of a fresh stream that do not form a
            # valid frame are resynchronisation, not a damaged frame.
            c["resync_bytes"] += len(cand)
            continue
        if len(cand) > LIMIT:
            c["bad_frames"] += 1
            c["bytes_discarded"] += len(cand)
            continue
        try:
            p = cobs.decode(cand)
        except cobs.DecodeError:
            c["bad_frames"] += 1
            c["bytes_discarded"] += len(cand)
            continue
        if len(p) < 3:
            c["bad_frames"] += 1
            c["bytes_discarded"] += len(cand)
            continue
        if binascii.crc_hqx(p[:-2], 0xFFFF) != struct.unpack("<H", p[-2:])[0]:
            c["crc_errors"] += 1
            c["bytes_discarded"] += len(cand)
            continue
        frame = _payload_ok(cand)
        if frame is None:
            c["bad_frames"] += 1
            c["bytes_discarded"] += len(cand)
            continue
        seq = frame[0]
        if last is not None:
            step = (seq - last) % (1 << 32)
            if step == 0:
                c["duplicates"] += 1
                c["accepted_bytes"] += len(cand)
                continue
            if step > (1 << 31):
                c["seq_resets"] += 1
            elif step > 1:
                c["seq_gaps"] += step - 1
        last = seq
        c["frames_ok"] += 1
        c["accepted_bytes"] += len(cand)
        frames.append(frame)
    if len(pending) > LIMIT:
        if complete:
            c["bad_frames"] += 1
            c["bytes_discarded"] += len(pending)
        else:                        # still no 0x00 since the start: resynchronisation
            c["resync_bytes"] += len(pending)
        pending = b""
    c["pending"] = len(pending)
    return frames, c


def run_decoder(stream: bytes, cuts: list[int]):
    d = FrameDecoder()
    out = []
    pos = 0
    for cut in sorted(set(cuts)):
        out += d.feed(stream[pos:cut])
        pos = cut
    out += d.feed(stream[pos:])
    c = d.counters()
    assert c.pop("bytes_fed") == len(stream)
    key = [(f.seq, f.t_ns, f.status, f.f_a, f.f_b, f.values) for f in out]
    return key, c


def _same(a, b):
    # NaN-tolerant equality of frame tuples (compare bit patterns of the floats).
    def bits(x):
        return tuple(struct.pack("<d", v) if isinstance(v, float) else
                     (bits(v) if isinstance(v, tuple) else v) for v in x)
    return [bits(x) for x in a] == [bits(x) for x in b]


finite32 = st.floats(width=32, allow_nan=True, allow_infinity=True)
frames_st = st.builds(
    lambda seq, t, status, fa, fb, n, vals: Frame(seq, t, status, fa, fb, tuple(vals[:n])),
    st.integers(0, 2**32 - 1), st.integers(0, 2**64 - 1), st.integers(0, 2**16 - 1),
    st.floats(), st.floats(), st.sampled_from([4, 8]), st.lists(finite32, min_size=8, max_size=8))


@st.composite
def streams(draw):
    """A stream mixing valid frames, bit flips, truncations, duplicates and random garbage."""
    parts = []
    base = draw(st.integers(0, 2**32 - 1))
    for i in range(draw(st.integers(0, 12))):
        kind = draw(st.sampled_from(["frame", "frame", "flip", "cut", "garbage", "dup", "zero"]))
        f = draw(frames_st)
        f = Frame((base + i) % 2**32, f.t_ns, f.status, f.f_a, f.f_b, f.values)
        enc = encode_frame(f)
        if kind == "frame":
            parts.append(enc)
        elif kind == "dup":
            parts += [enc, enc]
        elif kind == "flip":
            b = bytearray(enc)
            pos = draw(st.integers(0, len(b) - 1))
            b[pos] ^= 1 << draw(st.integers(0, 7))
            parts.append(bytes(b))
        elif kind == "cut":
            parts.append(enc[:draw(st.integers(0, len(enc) - 1))])
        elif kind == "garbage":
            parts.append(draw(st.binary(max_size=300)))
        else:
            parts.append(b"\x00")
    return b"".join(parts)


def check(stream: bytes, cuts: list[int]):
    got_frames, got = run_decoder(stream, cuts)
    want_frames, want = oracle(stream)
    want.pop("accepted_bytes")
    assert got == want
    assert _same(got_frames, want_frames)


DEFAULT = settings(max_examples=150, deadline=None, database=None,
                   suppress_health_check=[HealthCheck.too_slow])


@DEFAULT
@given(st.binary(max_size=700), st.lists(st.integers(0, 700), max_size=8))
def test_random_bytes_match_oracle(stream, cuts):
    check(stream, cuts)


@DEFAULT
@given(streams(), st.lists(st.integers(0, 1200), max_size=8))
def test_mixed_streams_match_oracle(stream, cuts):
    check(stream, cuts)


@DEFAULT
@given(streams())
def test_chunking_invariance_and_accounting(stream):
    whole_frames, whole = run_decoder(stream, [])
    bytewise = FrameDecoder()
    frames = []
    for i in range(len(stream)):
        frames += bytewise.feed(stream[i:i + 1])
    assert _same([(f.seq, f.t_ns, f.status, f.f_a, f.f_b, f.values) for f in frames], whole_frames)
    c = bytewise.counters()
    assert {k: v for k, v in c.items() if k != "bytes_fed"} == whole
    # Every byte is accounted for (docs/wire_format.md, receiver rules): bytes of kept or
    # duplicate frames + delimiters + discarded + resynchronisation + pending == bytes fed.
    accepted = oracle(stream)[1]["accepted_bytes"]
    assert accepted + stream.count(0) + c["bytes_discarded"] + c["resync_bytes"] + c["pending"] \
        == c["bytes_fed"]


class _Count:
    n = 0


@pytest.mark.slow
@pytest.mark.skipif(os.environ.get("FIELDVANE_LONG_FUZZ") != "1",
                    reason="long fuzz run: set FIELDVANE_LONG_FUZZ=1")
def test_long_fuzz_100k():
    counter = _Count()
    start = time.perf_counter()

    @settings(max_examples=100_000, deadline=None, database=None,
              suppress_health_check=list(HealthCheck))
    @given(st.one_of(streams(), st.binary(max_size=700)), st.lists(st.integers(0, 1200), max_size=6))
    def body(stream, cuts):
        counter.n += 1
        check(stream, cuts)

    body()
    elapsed = time.perf_counter() - start
    print(f"\nlong fuzz: {counter.n} inputs in {elapsed:.1f} s")
    assert counter.n >= 100_000
