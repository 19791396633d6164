"""Raw capture files: layout per docs/capture_format.md, rotation, ordering, exact accounting
when the disk fails, damage reported as warnings, strict metadata."""

from __future__ import annotations

import errno
import json
import os
import random
import struct
import time
import zlib

import pytest

from fieldvane.io import capture as capture_module
from fieldvane.io.capture import (EVENT_LINK_OPEN, EVENT_LOST, MAGIC, CaptureReader, CaptureWriter,
                                  Chunk, capture_files, capture_runs, read_capture)
from fieldvane.io.capture_thread import CaptureThread
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


def data_of(path, run_id=None):
    return b"".join(c.data for c in read_capture(path, run_id))


def test_round_trip_with_rotation(tmp_path):
    chunks = random_chunks(1)
    w = CaptureWriter(tmp_path, {"input_format": "binary"}, max_file_bytes=4096, clock=FakeClock())
    for t, data in chunks:
        w.write(t, data)
    w.close()
    assert len(w.files) > 10
    got = list(read_capture(tmp_path))
    assert [(c.host_time_ns, c.data) for c in got] == chunks
    assert (w.bytes_written, w.records_written, w.bytes_lost) == (sum(len(d) for _, d in chunks),
                                                                  len(chunks), 0)
    # Each file respects the size limit (a record never spans files).
    for p in w.files:
        assert p.stat().st_size <= 4096 + 500 + 20
    # A single file reads on its own.
    first = list(read_capture(w.files[0]))
    assert first == got[:len(first)]


def test_layout_matches_spec(tmp_path):
    w = CaptureWriter(tmp_path, {"input_format": "csv", "source": "loop://"}, clock=FakeClock())
    w.mark_link_open(123456000)
    w.write(123456789, b"\x00abc\xff")
    w.close()
    raw = w.files[0].read_bytes()
    # Offsets from the tables in docs/capture_format.md, decoded by hand.
    assert raw[:8] == b"FVCAP\r\n\x1a" == MAGIC
    version, flags, index, created, meta_len = struct.unpack_from("<HHIQI", raw, 8)
    assert (version, flags, index) == (2, 0, 0)
    meta = json.loads(raw[28:28 + meta_len])
    assert meta["input_format"] == "csv" and meta["run_id"] == w.run_id
    rec = raw[28 + meta_len:]
    # Record 1: a link-open marker (kind 1, no bytes).
    t, length, kind, reserved, crc = struct.unpack_from("<QIHHI", rec, 0)
    assert (t, length, kind, reserved) == (123456000, 0, 1, 0)
    assert crc == zlib.crc32(rec[0:16])      # CRC-32 (IEEE) via zlib, reference library
    # Record 2: the bytes (kind 0); the CRC covers the first 16 header bytes and the data.
    t, length, kind, reserved, crc = struct.unpack_from("<QIHHI", rec, 20)
    assert (t, length, kind, reserved) == (123456789, 5, 0, 0)
    assert rec[40:] == b"\x00abc\xff"
    assert crc == zlib.crc32(rec[20:36] + rec[40:])


def test_version_1_files_still_read(tmp_path):
    # A version 1 file written by hand from the first edition of the spec: 16-byte records,
    # CRC-32 of the data only.
    meta = json.dumps({"input_format": "binary", "run_id": "old"}).encode()
    raw = MAGIC + struct.pack("<HHIQI", 1, 0, 0, 5, len(meta)) + meta
    for t, d in ((1, b"first"), (2, b"second")):
        raw += struct.pack("<QII", t, len(d), zlib.crc32(d)) + d
    (tmp_path / "old-000000.fvcap").write_bytes(raw)
    assert [(c.host_time_ns, c.data) for c in read_capture(tmp_path)] == [(1, b"first"), (2, b"second")]


def test_two_runs_in_one_folder_read_in_order(tmp_path):
    clock = FakeClock()
    w1 = CaptureWriter(tmp_path, max_file_bytes=1024, clock=clock)
    for t, d in random_chunks(2, 20, 200):
        w1.write(t, d)
    w1.close()
    clock.now += 10**9
    w2 = CaptureWriter(tmp_path, max_file_bytes=1024, clock=clock)
    w2.write(5, b"second run")
    w2.close()
    assert capture_runs(tmp_path) == [w1.run_id, w2.run_id]
    data = [c.data for c in read_capture(tmp_path)]
    assert data[-1] == b"second run" and len(data) == 21
    assert [c.data for c in read_capture(tmp_path, w2.run_id)] == [b"second run"]
    assert [i.index for i in capture_files(tmp_path)][:len(w1.files)] == list(range(len(w1.files)))


def test_truncated_tail_is_a_warning_with_offset(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"complete")
    w.write(2, b"cut short here")
    w.close()
    path = w.files[0]
    size = path.stat().st_size
    path.write_bytes(path.read_bytes()[:-4])          # power lost mid-record
    r = CaptureReader(tmp_path)
    assert [c.data for c in r] == [b"complete"]
    assert r.truncated_files == [str(path)]
    start = size - (20 + len(b"cut short here"))
    assert r.warnings == [f"{path}: file ends inside the record at byte {start} (the writer was stopped); "
                          f"its {20 + len(b'cut short here') - 4} bytes are skipped"]
    assert r.counters()["truncated_files"] == 1


def test_damaged_record_is_skipped_and_reported(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"before")
    w.write(2, b"payload bytes")
    w.write(3, b"after")
    w.close()
    raw = bytearray(w.files[0].read_bytes())
    where = raw.index(b"payload bytes")
    raw[where + 3] ^= 0x10                               # one bit of the data flips on disk
    w.files[0].write_bytes(bytes(raw))
    r = CaptureReader(tmp_path)
    chunks = list(r)
    assert [c.data for c in chunks if c.data] == [b"before", b"after"]
    lost = [c for c in chunks if c.event == EVENT_LOST]
    assert [c.lost for c in lost] == [len(b"payload bytes")]
    assert r.damaged_records == 1
    assert len(r.warnings) == 1 and f"record at byte {where - 20} fails its CRC-32 check" in r.warnings[0]
    assert str(w.files[0]) in r.warnings[0]


def test_damaged_length_skips_the_rest_of_the_file(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    for i in range(5):
        w.write(i, b"x" * 30)
    w.close()
    raw = bytearray(w.files[0].read_bytes())
    first = len(raw) - 5 * 50
    raw[first + 50 + 8] ^= 0x01                          # the second record's length is off by one
    w.files[0].write_bytes(bytes(raw))
    r = CaptureReader(tmp_path)
    assert [c.data for c in r if c.data] == [b"x" * 30]
    assert r.damaged_records >= 1 and r.bytes_unreadable == 4 * 50
    assert "the rest of the file" in r.warnings[-1]


def test_file_cut_inside_its_header_is_skipped_with_a_warning(tmp_path):
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"kept")
    w.close()
    (tmp_path / "zzzz-000000.fvcap").write_bytes(MAGIC[:5])
    warnings = []
    infos = capture_files(tmp_path, warnings)
    assert len(infos) == 1 and len(warnings) == 1 and "inside its header" in warnings[0]
    assert data_of(tmp_path) == b"kept"


@pytest.mark.parametrize("content, message", [
    (b"not a capture at all", "bad magic"),
    (MAGIC + struct.pack("<HHIQI", 3, 0, 0, 0, 0), "version 3"),
    (MAGIC + struct.pack("<HHIQI", 2, 0, 0, 0, 4) + b"[1]x", "not JSON"),
    (MAGIC + struct.pack("<HHIQI", 2, 0, 0, 0, 3) + b"[1]", "not a JSON object"),
])
def test_bad_files_are_clear_errors(tmp_path, content, message):
    p = tmp_path / "x.fvcap"
    p.write_bytes(content)
    with pytest.raises(InputError, match=message) as err:
        list(read_capture(p))
    assert "x.fvcap" in str(err.value)


@pytest.mark.parametrize("meta, words", [
    ({"input_format": 5}, "key 'input_format': must be text"),
    ({"input_format": "morse"}, "key 'input_format': must be one of binary, csv"),
    ({"columns": "t,f_a"}, "key 'columns': must be list"),
    ({"columns": [1, 2]}, "key 'columns': must be a list of column names"),
    ({"wire_format_version": True}, "key 'wire_format_version': must be int"),
    ({"wire_format_version": 2}, "key 'wire_format_version': wire format version 2 is not supported"),
    ({"speed": 3}, "key 'speed': unknown capture metadata key"),
])
def test_metadata_of_the_wrong_type_is_refused_by_key(tmp_path, meta, words):
    raw = json.dumps(meta).encode()
    p = tmp_path / "r-000000.fvcap"
    p.write_bytes(MAGIC + struct.pack("<HHIQI", 2, 0, 0, 0, len(raw)) + raw)
    with pytest.raises(InputError, match=words):
        capture_files(tmp_path)
    with pytest.raises(ValueError):
        CaptureWriter(tmp_path / "w", meta)
    # Extensions are free.
    CaptureWriter(tmp_path / "x", {"x_operator": "bench 2"}).close()


def test_a_folder_named_like_a_capture_file_is_refused(tmp_path):
    CaptureWriter(tmp_path, clock=FakeClock()).close()
    (tmp_path / "oops.fvcap").mkdir()
    with pytest.raises(InputError, match="oops.fvcap: is a folder, not a capture file"):
        capture_files(tmp_path)


def test_missing_and_empty(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        capture_files(tmp_path / "nope")
    with pytest.raises(InputError, match="no .fvcap"):
        capture_files(tmp_path)


def test_capture_folder_that_is_a_file_or_cannot_be_made(tmp_path):
    (tmp_path / "afile").write_text("x")
    with pytest.raises(InputError, match="option '--capture': exists and is not a folder"):
        CaptureWriter(tmp_path / "afile")
    with pytest.raises(InputError, match="option '--capture': cannot create the capture folder"):
        CaptureWriter(tmp_path / "afile" / "sub")


def test_unwritable_folder_is_an_input_error_at_once(tmp_path, monkeypatch):
    # A read-only file system, simulated at the one call that creates capture files (root can
    # write into a mode-0555 folder, so permissions cannot show it here).
    def refuse(*a, **k):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))
    monkeypatch.setattr(capture_module, "_os_open", refuse)
    with pytest.raises(InputError, match="cannot write capture files here: Read-only file system"):
        CaptureWriter(tmp_path / "cap")


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


class FlakyDisk:
    """os.write stand-in: fails with ENOSPC (after a partial write) while `full` is set."""

    def __init__(self, monkeypatch):
        self.real = os.write
        self.full = False
        self.partial = 7
        monkeypatch.setattr(capture_module, "_os_write", self)

    def __call__(self, fd, data):
        if self.full:
            if self.partial:
                n, self.partial = min(self.partial, len(data)), 0
                return self.real(fd, bytes(data[:n]))
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return self.real(fd, data)


def test_disk_full_then_free_counts_exactly_and_marks_the_hole(tmp_path, monkeypatch):
    disk = FlakyDisk(monkeypatch)
    w = CaptureWriter(tmp_path, clock=FakeClock())
    w.write(1, b"A" * 100)
    disk.full = True
    for i in range(3):
        with pytest.raises(OSError):
            w.write(2 + i, b"B" * 50)
    disk.full = False
    w.write(9, b"C" * 100)
    w.close()
    assert (w.bytes_written, w.bytes_lost, w.write_errors) == (200, 150, 3)
    r = CaptureReader(tmp_path)
    chunks = list(r)
    # The file was cut back to its last whole record, so it reads cleanly; the hole is marked.
    assert [(c.event, c.lost, c.data[:1]) for c in chunks] == [(0, 0, b"A"), (EVENT_LOST, 150, b""),
                                                               (0, 0, b"C")]
    assert r.live_bytes_lost == 150 and r.damaged_records == 0 and not r.truncated_files
    assert "could not store 150 bytes" in r.warnings[0]


def test_capture_thread_accounts_every_byte(tmp_path, monkeypatch):
    disk = FlakyDisk(monkeypatch)
    disk.partial = 0
    w = CaptureWriter(tmp_path, clock=FakeClock())
    th = CaptureThread(w, max_buffered_bytes=1000)
    sent = 0
    th.mark_link_open(0)
    for i in range(20):                     # not started yet: the buffer fills, then overflows
        assert th.put(Chunk(i, b"%03d" % i * 25)) == (i < 13)
        sent += 75
    th.start()
    assert th.close(10.0)
    c = th.counters()
    assert c["bytes_in"] == sent == c["bytes"] + c["bytes_lost"]
    assert (c["lost_overflow"], c["lost_disk"], c["bytes"]) == (7 * 75, 0, 13 * 75)
    kinds = [(ch.event, ch.lost) for ch in read_capture(tmp_path) if ch.event]
    assert kinds == [(EVENT_LINK_OPEN, 0), (EVENT_LOST, 7 * 75)]
    assert [k for k, _ in th.events()] == ["overflow"]


class BatchNotingWriter:
    """A CaptureWriter stand-in that notes each batch it is handed."""

    def __init__(self):
        self.batches, self.bytes_lost = [], 0

    def write_chunks(self, chunks):
        self.batches.append(list(chunks))

    def close(self):
        pass


def test_capture_thread_hands_over_bounded_batches_and_takes_the_rest_without_waiting(monkeypatch):
    # The writer frames each chunk while holding the interpreter: batches are kept short, and what a short batch
    # left behind is taken at once, not after the next write interval.
    from fieldvane.io import capture_thread

    monkeypatch.setattr(capture_thread, "WRITE_INTERVAL_S", 60.0)
    w = BatchNotingWriter()
    th = CaptureThread(w, max_buffered_bytes=1000)        # wakes once 500 bytes wait
    n = 5 * capture_thread.MAX_BATCH_CHUNKS + 3
    assert th.put(Chunk(0, b"y" * 500))
    for i in range(1, n + 1):
        assert th.put(Chunk(i, b"x"))
    th.start()
    deadline = time.monotonic() + 10.0
    while sum(map(len, w.batches)) < n + 1 and time.monotonic() < deadline:
        time.sleep(0.01)
    assert sum(map(len, w.batches)) == n + 1                  # all of it, long before the 60 s interval
    assert max(map(len, w.batches)) <= capture_thread.MAX_BATCH_CHUNKS
    assert [c.host_time_ns for b in w.batches for c in b] == list(range(n + 1))
    assert th.close(10.0)
