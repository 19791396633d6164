"""Wire format v1: payload layout against the spec table, stream decoder rules and counters."""

from __future__ import annotations

import math
import random
import struct

import numpy as np
import pytest
from cobs import cobs
from crc import Calculator, Configuration

from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES
from fieldvane.io.wire import (Frame, FrameCrcError, FrameDecoder, FrameError, decode_payload,
                               encode_frame, encode_payload)

# CRC-16/CCITT-FALSE from the `crc` package (reference library), parameters from the catalogue.
CRC = Calculator(Configuration(16, 0x1021, 0xFFFF, 0, False, False))


def spec_payload(seq, t_ns, status, n_values, f_a, f_b, values, magic=b"FV", version=1, kind=1,
                 reserved=0, crc_delta=0):
    """Build a payload by hand from the offsets in docs/wire_format.md (independent of wire.py)."""
    body = bytearray(36 + 4 * len(values))
    body[0:2] = magic
    body[2] = version
    body[3] = kind
    body[4:8] = seq.to_bytes(4, "little")
    body[8:16] = t_ns.to_bytes(8, "little")
    body[16:18] = status.to_bytes(2, "little")
    body[18] = n_values
    body[19] = reserved
    body[20:28] = struct.pack("<d", f_a)
    body[28:36] = struct.pack("<d", f_b)
    for i, v in enumerate(values):
        body[36 + 4 * i:40 + 4 * i] = struct.pack("<f", v)
    crc = (CRC.checksum(bytes(body)) + crc_delta) & 0xFFFF
    return bytes(body) + crc.to_bytes(2, "little")


def frame(seq, n=4, t_ns=None, status=0):
    vals = tuple(float(np.float32(0.25 * (i + 1) * (-1) ** i)) for i in range(n))
    return Frame(seq, 1_000_000 * seq if t_ns is None else t_ns, status, 350000.5, 233500.25, vals)


def test_payload_matches_spec_table():
    vals = (0.5, -1.25, 3.0, 1e-3, 2.0, -2.0, 0.125, 7.5)
    for n in (4, 8):
        f = Frame(0xDEADBEEF, 123456789012345, 0b1011, 349876.5, 233412.75,
                  tuple(float(np.float32(v)) for v in vals[:n]))
        hand = spec_payload(0xDEADBEEF, 123456789012345, 0b1011, n, 349876.5, 233412.75, f.values)
        assert encode_payload(f) == hand
        assert len(hand) == {4: 54, 8: 70}[n]        # payload sizes stated in the spec
        assert decode_payload(hand) == f
        wire = encode_frame(f)
        assert wire[-1] == 0 and len(wire) - 1 <= 72  # "at most 72 encoded bytes"
        assert cobs.decode(wire[:-1]) == hand         # reference COBS decoder agrees


def test_to_sample_maps_channels_and_time():
    s4 = frame(3, 4, t_ns=1_500_000_123).to_sample()
    assert s4.channels == CHANNELS_ONE_PROBE
    assert s4.t == 1.500000123
    assert s4.z.dtype == np.complex128
    assert s4.z[0] == complex(0.25, -0.5) and s4.z[1] == complex(0.75, -1.0)
    s8 = frame(4, 8).to_sample()
    assert s8.channels == CHANNELS_TWO_PROBES and s8.z.shape == (4,)
    assert s8.z[3] == complex(1.75, -2.0)
    assert frame(5, status=0xFFF3).to_sample().status == 0xFFF3   # reserved bits passed on


@pytest.mark.parametrize("kwargs, error", [
    (dict(crc_delta=1), FrameCrcError),
    (dict(magic=b"FW"), FrameError),
    (dict(version=2), FrameError),
    (dict(kind=2), FrameError),
])
def test_decode_payload_rejects(kwargs, error):
    p = spec_payload(1, 2, 0, 4, 1.0, 2.0, (0.0,) * 4, **kwargs)
    with pytest.raises(error):
        decode_payload(p)


def test_length_mismatch_is_bad_frame_with_valid_crc():
    p = spec_payload(1, 2, 0, 8, 1.0, 2.0, (0.0,) * 4)     # says 8 values, carries 4
    d = FrameDecoder()
    assert d.feed(b"\x00" + cobs.encode(p) + b"\x00") == []
    assert (d.bad_frames, d.crc_errors) == (1, 0)
    assert d.bytes_discarded == len(cobs.encode(p))


def test_nonzero_reserved_byte_is_ignored():
    p = spec_payload(9, 2, 0, 4, 1.0, 2.0, (0.0,) * 4, reserved=7)
    assert FrameDecoder().feed(cobs.encode(p) + b"\x00")[0].seq == 9


def test_non_finite_values_pass():
    f = Frame(1, 1, 0, math.nan, math.inf, (math.nan, 1.0, -math.inf, 0.0))
    (g,) = FrameDecoder().feed(encode_frame(f))
    assert math.isnan(g.f_a) and g.f_b == math.inf and math.isnan(g.values[0])


def test_sequence_rules():
    d = FrameDecoder()
    seqs = [0xFFFFFFFE, 0xFFFFFFFF, 0, 0, 1, 5, 6, 6, 6, 2, 3]
    got = d.feed(b"".join(encode_frame(frame(s)) for s in seqs))
    # wrap 0xFFFFFFFF -> 0 is +1; 0,0 duplicate; 1 -> 5 misses 3; 6,6,6 two duplicates;
    # 6 -> 2 steps backwards: a reset (kept); 2 -> 3 normal.
    assert [f.seq for f in got] == [0xFFFFFFFE, 0xFFFFFFFF, 0, 1, 5, 6, 2, 3]
    assert (d.frames_ok, d.duplicates, d.seq_gaps, d.seq_resets) == (8, 3, 3, 1)


def test_oversize_run_discarded_then_resync():
    rng = random.Random(3)
    garbage = bytes(rng.randrange(1, 256) for _ in range(1000))
    d = FrameDecoder()
    out = []
    stream = encode_frame(frame(1)) + garbage + b"\x00" + encode_frame(frame(2))
    for i in range(0, len(stream), 37):       # oversize detection must survive chunking
        out += d.feed(stream[i:i + 37])
    assert [f.seq for f in out] == [1, 2]
    assert (d.bad_frames, d.crc_errors, d.bytes_discarded) == (1, 0, 1000)
    assert d.pending == 0


def test_exactly_max_length_is_not_oversize():
    d = FrameDecoder()
    cand = b"\xff" + bytes(range(1, 255)) + b"\x01"     # 256 bytes: valid COBS, fails CRC
    assert len(cand) == 256
    d.feed(b"\x00" + cand + b"\x00")
    assert (d.bad_frames, d.crc_errors) == (0, 1)
    d.feed(b"\x01" + cand + b"\x00")                      # 257 bytes: oversize
    assert (d.bad_frames, d.crc_errors) == (1, 1)


def test_faults_counted_exactly_and_intact_frames_recovered():
    rng = random.Random(11)
    stream = bytearray(b"\x00")
    expect = dict(frames_ok=0, crc_errors=0, bad_frames=0, duplicates=0, seq_gaps=0)
    kept = []
    seq = 0
    for i in range(400):
        seq += 1
        f = frame(seq, rng.choice((4, 8)))
        kind = i % 8
        if kind == 1:                                 # one bit flipped inside the payload
            p = bytearray(encode_payload(f))
            p[rng.randrange(len(p))] ^= 1 << rng.randrange(8)
            stream += cobs.encode(bytes(p)) + b"\x00"
            # CRC-16 detects every single-bit error (a CRC with more than one term: common
            # practice); the sequence is unaffected, so the next frame shows a gap of 1.
            expect["crc_errors"] += 1
            expect["seq_gaps"] += 1
            continue
        if kind == 3:                                 # truncated frame, delimiter kept
            enc = cobs.encode(encode_payload(f))
            cut = enc[:rng.randrange(1, len(enc))]
            stream += cut + b"\x00"
            # A cut COBS string either fails to decode or decodes to a shorter payload whose
            # last two bytes are not its CRC (classified with the reference decoder).
            try:
                cobs.decode(cut)
                expect["crc_errors"] += 1
            except cobs.DecodeError:
                expect["bad_frames"] += 1
            expect["seq_gaps"] += 1
            continue
        if kind == 5:                                 # garbage without zeros, then a delimiter
            stream += bytes([0xFF]) + bytes(rng.randrange(1, 256) for _ in range(20)) + b"\x00"
            expect["bad_frames"] += 1                  # 0xFF announces 254 bytes: invalid COBS
        if kind == 7:                                 # the same frame twice
            stream += encode_frame(f)
            expect["duplicates"] += 1
        stream += encode_frame(f)
        kept.append(seq)
        expect["frames_ok"] += 1
    d = FrameDecoder()
    got = []
    pos = 0
    while pos < len(stream):
        step = rng.randrange(1, 100)
        got += d.feed(bytes(stream[pos:pos + step]))
        pos += step
    assert [f.seq for f in got] == kept
    assert {k: d.counters()[k] for k in expect} == expect


# ------------------------------------------------------------------- text input mode (CSV lines)

from fieldvane.io.csv_lines import CsvLayout, CsvLineDecoder  # noqa: E402
from fieldvane.io.errors import InputError  # noqa: E402


def test_csv_lines_polar_columns_two_probes_and_chunking():
    cols = "t,f_a,f_b,r_1a,th_1a,r_1b,th_1b,x_2a,y_2a,x_2b,y_2b,true_ux"
    rows = ["0.5,350000,233500,2.0,30,1.0,-120,0.1,0.2,0.3,0.4,1",
            "0.6,350001,233501,0.5,180,3.0,90,-1,-2,-3,-4,1"]
    text = ("# unit: bench\n" + cols + "\r\n" + "\r\n".join(rows) + "\n").encode()
    d = CsvLineDecoder()
    whole = d.feed(text)
    assert d.metadata == {"unit": "bench"}
    bytewise = CsvLineDecoder()
    pieces = [s for i in range(len(text)) for s in bytewise.feed(text[i:i + 1])]
    assert [s.t for s in pieces] == [s.t for s in whole] == [0.5, 0.6]
    s = whole[0]
    assert s.channels == CHANNELS_TWO_PROBES and (s.f_a, s.f_b) == (350000.0, 233500.0)
    # amplitude/phase(deg) -> x + iy, checked against numpy's polar form (reference library)
    np.testing.assert_allclose(s.z[:2], [2.0 * np.exp(1j * np.deg2rad(30)),
                                         1.0 * np.exp(1j * np.deg2rad(-120))], rtol=1e-15)
    assert s.z[3] == complex(0.3, 0.4)
    assert d.counters()["lines_ok"] == 2 and d.counters()["header_lines"] == 1


def test_csv_lines_given_columns_bad_lines_and_new_header():
    d = CsvLineDecoder(columns=["t", "f_a", "f_b", "x_1a", "y_1a", "x_1b", "y_1b"], source="COM7")
    out = d.feed(b"1,2,3,4,5,6,7\n1,2,3,4,5,6\n1,2,3,x,5,6,7\n" + b"9" * 5000 + b"\n"
                 b"t,f_a,f_b,x_1a,y_1a,x_1b,y_1b,x_2a,y_2a,x_2b,y_2b\n"
                 b"2,2,3,1,1,1,1,1,1,1,1\n")
    assert [s.t for s in out] == [1.0, 2.0]
    assert out[0].channels == CHANNELS_ONE_PROBE and out[1].channels == CHANNELS_TWO_PROBES
    c = d.counters()
    assert (c["lines_ok"], c["bad_lines"], c["header_lines"], c["bytes_discarded"]) == (2, 3, 1, 5000)
    assert d.last_error == "COM7:4: line longer than 4096 bytes"
    d.feed(b"3,2,3,x,5,6,7,1,1,1,1\n")
    assert d.last_error == "COM7:7: column 'x_1a': not a number: 'x'"


def test_csv_lines_missing_probe_values_stream_as_nan():
    # A dark probe streams empty or NaN values: they arrive as NaN (as non-finite values in a
    # binary frame do) and the estimator decides what is usable; only text that is not a number
    # makes a bad line.
    d = CsvLineDecoder(source="tcp")
    out = d.feed(b"t,f_a,f_b,x_1a,y_1a,x_1b,y_1b,x_2a,y_2a,x_2b,y_2b\n"
                 b"1,2,3,1,1,1,1,,,,\n"
                 b"2,2,3,1,1,1,1,nan,nan,NaN,NaN\n"
                 b"3,2,3,,,1,1,1,1,1,1\n"
                 b"4,2,3,,1,1,1,1,,1,1\n"
                 b"5,2,3,1,1,1,1,1,1,1,dark\n")
    assert [s.t for s in out] == [1.0, 2.0, 3.0, 4.0]
    assert np.isnan(out[0].z[2:]).all() and np.isnan(out[1].z[2:]).all() and not np.isnan(out[0].z[:2]).any()
    assert np.isnan(out[2].z[0]) and out[2].z[1] == complex(1, 1) and not np.isnan(out[2].z[2:]).any()
    assert np.isnan(out[3].z[[0, 2]]).all() and not np.isnan(out[3].z[[1, 3]]).any()
    assert d.counters()["bad_lines"] == 1
    assert d.last_error == "tcp:6: column 'y_2b': not a number: 'dark'"


def test_csv_lines_data_before_header_and_bad_headers():
    d = CsvLineDecoder()
    assert d.feed(b"# no header yet\n1,2,3\n") == []
    assert "header line" in d.last_error
    with pytest.raises(InputError, match="column 'y_1b'"):
        CsvLayout(["t", "f_a", "f_b", "x_1a", "y_1a", "x_1b"])
    with pytest.raises(InputError, match="column 'f_b'"):
        CsvLayout(["t", "f_a", "x_1a", "y_1a", "x_1b", "y_1b"])
    with pytest.raises(InputError, match="probe 2 is incomplete"):
        CsvLayout("t,f_a,f_b,x_1a,y_1a,x_1b,y_1b,x_2a,y_2a".split(","))


# ------------------------------------------------------------------- fresh streams and restarts

def test_fresh_stream_fragment_is_resynchronisation_not_a_crc_error():
    tail = encode_frame(frame(7))[25:]                # joined in the middle of a frame
    d = FrameDecoder()
    got = d.feed(tail + encode_frame(frame(8)) + encode_frame(frame(9)))
    assert [f.seq for f in got] == [8, 9]
    c = d.counters()
    assert (c["crc_errors"], c["bad_frames"], c["bytes_discarded"]) == (0, 0, 0)
    assert c["resync_bytes"] == len(tail) - 1         # its 0x00 is a delimiter
    # The same fragment later in the stream is damage, counted as such.
    d.feed(tail)
    assert d.counters()["crc_errors"] + d.counters()["bad_frames"] == 1


def test_fresh_stream_garbage_longer_than_a_frame_is_resynchronisation():
    rng = random.Random(4)
    garbage = bytes(rng.randrange(1, 256) for _ in range(700))
    d = FrameDecoder()
    out = []
    stream = garbage + b"\x00" + encode_frame(frame(1))
    for i in range(0, len(stream), 50):
        out += d.feed(stream[i:i + 50])
    assert [f.seq for f in out] == [1]
    assert (d.bad_frames, d.resync_bytes, d.bytes_discarded) == (0, 700, 0)


def test_a_fresh_stream_that_starts_on_a_frame_keeps_it():
    d = FrameDecoder()
    assert [f.seq for f in d.feed(encode_frame(frame(3)))] == [3]
    assert d.resync_bytes == 0


def test_resync_after_a_hole_discards_the_pending_fragment():
    whole = encode_frame(frame(1)) + encode_frame(frame(2))
    d = FrameDecoder()
    d.feed(whole[:len(whole) - 20])                   # frame 2 half here...
    d.resync()                                        # ...bytes lost...
    got = d.feed(whole[-10:] + encode_frame(frame(5)))   # ...then the end of another one
    assert [f.seq for f in got] == [5]
    c = d.counters()
    assert (c["crc_errors"], c["bad_frames"], c["resyncs"]) == (0, 0, 1)
    assert c["resync_bytes"] == (len(whole) - 20 - len(encode_frame(frame(1)))) + 9
    assert c["seq_gaps"] == 3                         # frame 2 (cut by the hole), 3 and 4


def test_sequence_reset_marks_the_first_frame_and_sample_restarted():
    d = FrameDecoder()
    got = d.feed(b"".join(encode_frame(frame(s)) for s in (100, 101, 1, 2)))
    assert [f.restarted for f in got] == [False, False, True, False]
    assert [f.to_sample().restarted for f in got] == [False, False, True, False]
    assert got[2] == frame(1)                          # `restarted` is not part of frame equality


def test_csv_lines_bom_fragment_restart_and_bounded_memory():
    import tracemalloc
    header = "t,f_a,f_b,x_1a,y_1a,x_1b,y_1b\n"
    row = "{t},350000,233500,1,2,3,4\n"
    # A spreadsheet's UTF-8 byte order mark before the header is ignored.
    d = CsvLineDecoder(source="COM3")
    out = d.feed(b"\xef\xbb\xbf" + header.encode() + row.format(t=1).encode())
    assert [s.t for s in out] == [1.0] and d.counters()["bad_lines"] == 0
    # Joined mid-line: the fragment is resynchronisation, not a bad line.
    d = CsvLineDecoder(columns=header.strip().split(","), source="COM3")
    out = d.feed(b"00,233500,1,2\n" + row.format(t=2).encode())
    assert [s.t for s in out] == [2.0]
    assert (d.counters()["bad_lines"], d.counters()["resync_bytes"]) == (0, 13)
    # After lost bytes the next line is dropped whole, whatever it looks like.
    d.resync(lost=True)
    out = d.feed(b"5,350000,233500,1,2,3,4\n" + row.format(t=6).encode())
    assert [s.t for s in out] == [6.0]
    # A sender that starts over sends its header again: the next sample is marked restarted.
    assert [s.restarted for s in d.feed(header.encode() + row.format(t=7).encode())] == [False]
    out = d.feed(header.encode() + row.format(t=0).encode() + row.format(t=1).encode())
    assert [s.restarted for s in out] == [True, False]
    # A 100 MB line costs no memory to speak of: dropped as it arrives, counted, reported.
    d = CsvLineDecoder(source="COM3")
    d.feed(header.encode())
    piece = b"1," * 32768
    tracemalloc.start()
    for _ in range(100_000_000 // len(piece)):
        d.feed(piece)
    d.feed(b"\n" + row.format(t=3).encode())
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 1_000_000
    c = d.counters()
    assert (c["long_lines"], c["bad_lines"], c["lines_ok"]) == (1, 1, 1)
    assert c["bytes_discarded"] == 100_000_000 // len(piece) * len(piece)
    assert d.last_error == "COM3:2: line longer than 4096 bytes"
