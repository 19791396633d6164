"""Raw capture files: layout per docs/capture_format.md, rotation, ordering, damage handling."""

from __future__ import annotations

import json
import random
import struct
import zlib

import pytest

from fieldvane.io.capture import (MAGIC, CaptureReader, CaptureWriter, capture_files,
                                  capture_runs, read_capture)
from fieldvane.io.errors import InputError


class FakeClock:
    """Deterministic host clock (ns)."""

    def __init__(self, start=1_700_000_000_000_000_000):
        self.now = start

    def __call__(self):
        self.now += 1_000_000
        return self.now


def random_chunks(seed, n=300, max_len=500):
    rng = random.Random(seed)
    return [(1_700_000_000_000_000_000 + 1000 * i,
             bytes(rng.randrange(256) for _ in range(rng.randrange(1, max_len)))) for i in range(n)]


def test_round_trip_with_rotation(tmp_path):
    chunks = random_chunks(1)
    w = CaptureWriter(tmp_path, {"input_format": "binary"}, max_file_bytes=4096, clock=FakeClock())
    for t, data in chunks:
        w.write(t, data)
    w.close()
    assert len(w.files) > 10
    got = list(read_capture(tmp_path))
    assert [(c.host_time_ns, c.data) for c in got] == chunks
    # Each file respects the size limit (a record never spans files).
    for p in w.files:
        assert p.stat().st_size <= 4096 + 500 + 16
    # A single file reads on its own.
    first = list(read_capture(w.files[0]))
    assert first == got[:len(first)]


def test_layout_matches_spec(tmp_path):
    w = CaptureWriter(tmp_path, {"input_format": "csv", "source": "loop://"}, clock=FakeClock())
    w.write(123456789, b"\x00abc\xff")
    w.close()
    raw = w.files[0].read_bytes()
    # Offsets from the table in docs/capture_format.md, decoded by hand.
    assert raw[:8] == b"FVCAP\r\n\x1a" == MAGIC
    version, flags, index, created, meta_len = struct.unpack_from("<HHIQI", raw, 8)
    assert (version, flags, index) == (1, 0, 0)
    meta = json.loads(raw[28:28 + meta_len])
    assert meta["input_format"] == "csv" and meta["run_id"] == w.run_id
    rec = raw[28 + meta_len:]
    t, length, crc = struct.unpack_from("<QII", rec, 0)
    assert (t, length) == (123456789, 5)
    assert rec[16:] == b"\x00abc\xff"
    assert crc == zlib.crc32(b"\x00abc\xff")      # CRC-32 (IEEE) via zlib, reference library


def test_two_runs_in_one_directory_read_in_order(tmp_path):
    clock = FakeClock()
    w1 = CaptureWriter(tmp_path, max_file_bytes=1000, clock=clock)
    for t, d in random_chunks(2, 20, 200):
        w1.write(t, d)
    w1.close()
    clock.now += 10**9
    w2 = CaptureWriter(tmp_path, max_file_bytes=1000, clock=clock)
    w2.write(5, b"second run")
    w2.close()
    assert capture_runs(tmp_path) == [w1.run_id, w2.run_id]
    data = [c.data for c in read_capture(tmp_path)]
    assert data[-1] == b"second run" and len(data) == 21
    assert [c.data for c in read_capture(tmp_path, w2.run_id)] == [b"second run"]
    assert [i.index for i in capture_files(tmp_path)][:len(w1.files)] == list(range(len(w1.files)))


def test_truncated_tail_is_tolerated(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"complete")
    w.write(2, b"cut short here")
    w.close()
    path = w.files[0]
    path.write_bytes(path.read_bytes()[:-4])          # power lost mid-record
    r = CaptureReader(tmp_path)
    assert [c.data for c in r] == [b"complete"]
    assert r.truncated_files == [str(path)]


def test_damaged_record_names_file_and_offset(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"payload bytes")
    w.close()
    raw = bytearray(w.files[0].read_bytes())
    raw[-3] ^= 0x10
    w.files[0].write_bytes(bytes(raw))
    with pytest.raises(InputError, match=r"fvcap: record at byte \d+ fails its CRC-32"):
        list(read_capture(tmp_path))


@pytest.mark.parametrize("content, message", [
    (b"not a capture at all", "bad magic"),
    (MAGIC + struct.pack("<HHIQI", 2, 0, 0, 0, 0), "version 2"),
    (MAGIC + struct.pack("<HHIQI", 1, 0, 0, 0, 4) + b"[1]x", "not JSON|not a JSON object"),
])
def test_bad_files_are_clear_errors(tmp_path, content, message):
    p = tmp_path / "x.fvcap"
    p.write_bytes(content)
    with pytest.raises(InputError, match=message) as err:
        list(read_capture(p))
    assert "x.fvcap" in str(err.value)


def test_missing_and_empty(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        capture_files(tmp_path / "nope")
    with pytest.raises(InputError, match="no .fvcap"):
        capture_files(tmp_path)


def test_never_overwrites(tmp_path):
    w1 = CaptureWriter(tmp_path, clock=lambda: 10**18)
    w1.write(1, b"a")
    w1.close()
    w2 = CaptureWriter(tmp_path, clock=lambda: 10**18)   # same start time: a new run id
    w2.write(1, b"b")
    w2.close()
    assert w1.run_id != w2.run_id
    assert sorted(c.data for c in read_capture(tmp_path)) == [b"a", b"b"]
    with pytest.raises(ValueError):
        w2.write(1, b"after close")
