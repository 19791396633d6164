"""Raw capture: every received byte, with host receive times, in size-rotated files (format v2).

The format is specified in docs/capture_format.md. A capture folder holds one or more runs;
each run is a sequence of files `<run_id>-<index:06d>.fvcap`, and each file holds a header and
then records of (host receive time, bytes), plus marker records (link opened, bytes lost).
Reading a folder yields every run in order. The writer counts exactly what reached the file and
what was lost; the reader reports damaged or cut files as warnings (file and byte offset).
"""

from __future__ import annotations

import errno
import json
import math
import os
import struct
import time
import zlib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

from fieldvane.io.errors import InputError

MAGIC = b"FVCAP\r\n\x1a"          # catches text-mode and line-ending mangling of the file
VERSION = 2                        # written; version 1 files are still read
READ_VERSIONS = (1, 2)
SUFFIX = ".fvcap"
DEFAULT_MAX_FILE_BYTES = 64 * 1024 * 1024
MIN_MAX_FILE_BYTES = 1024
MAX_META_BYTES = 65536
MAX_RECORD_BYTES = 16 * 1024 * 1024

_FILE_HEADER = struct.Struct("<8sHHIQI")   # magic, version, flags, file_index, created_ns, meta_len
_RECORD_V1 = struct.Struct("<QII")         # host_time_ns, length, crc32(data)
_RECORD = struct.Struct("<QIHHI")          # host_time_ns, length, kind, reserved, crc32(head+data)
_HEAD = struct.Struct("<QIHH")             # the part of a v2 record header the CRC covers
_LOST = struct.Struct("<Q")                # payload of a bytes-lost marker

# Record kinds (v2) and Chunk events. Frozen numbers.
EVENT_DATA = 0        # bytes as read from the link
EVENT_LINK_OPEN = 1   # the link was (re)opened here: a fresh byte stream starts
EVENT_LOST = 2        # bytes are missing here (count in Chunk.lost)
_KINDS = (EVENT_DATA, EVENT_LINK_OPEN, EVENT_LOST)

# Metadata keys a reader knows, with their types; keys starting with "x_" are free extensions.
META_KEYS = {"run_id": str, "input_format": str, "source": str, "columns": list,
             "fieldvane": str, "wire_format_version": int}
INPUT_FORMATS = ("binary", "csv")
WIRE_VERSIONS = (1,)              # docs/wire_format.md versions this reader decodes


class Chunk(NamedTuple):
    """Bytes received together: host receive time (ns since the Unix epoch), the bytes, and an event.

    event is EVENT_DATA for bytes; EVENT_LINK_OPEN (no bytes) marks a link (re)open, EVENT_LOST
    (no bytes) marks `lost` bytes missing at this point of the stream.
    """

    host_time_ns: int
    data: bytes
    event: int = EVENT_DATA
    lost: int = 0


def _os_write(fd: int, data) -> int:
    """os.write: the one call that writes capture bytes (tests wrap it to play a slow or full disk)."""
    return os.write(fd, data)


def _os_open(path, flags: int, mode: int) -> int:
    """os.open: the one call that creates capture files (tests wrap it to play a read-only disk)."""
    return os.open(path, flags, mode)


def _run_id(created_ns: int) -> str:
    secs, ns = divmod(created_ns, 1_000_000_000)
    stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime(secs))
    return f"{stamp}.{ns // 1000:06d}Z"


def check_metadata(meta, path: str | None = None) -> dict:
    """Return meta if it is a valid capture metadata object; raise InputError naming the key."""
    if not isinstance(meta, dict):
        raise InputError("capture metadata is not a JSON object", path)
    for key, value in meta.items():
        if not isinstance(key, str):
            raise InputError("capture metadata keys must be text", path)
        if key.startswith("x_"):
            continue
        if key not in META_KEYS:
            raise InputError(f"unknown capture metadata key (known: {', '.join(META_KEYS)}; "
                             "extensions start with x_)", path, column=key, kind="key")
        want = META_KEYS[key]
        ok = isinstance(value, want) and not isinstance(value, bool)
        if not ok:
            raise InputError(f"must be {'text' if want is str else want.__name__}, got "
                             f"{json.dumps(value)[:40]}", path, column=key, kind="key")
    if "input_format" in meta and meta["input_format"] not in INPUT_FORMATS:
        raise InputError(f"must be one of {', '.join(INPUT_FORMATS)}, got {meta['input_format']!r}",
                         path, column="input_format", kind="key")
    if "columns" in meta and not (meta["columns"] and all(isinstance(c, str) and c
                                                          for c in meta["columns"])):
        raise InputError("must be a list of column names", path, column="columns", kind="key")
    if "wire_format_version" in meta and meta["wire_format_version"] not in WIRE_VERSIONS:
        raise InputError(f"wire format version {meta['wire_format_version']} is not supported (only "
                         f"{', '.join(map(str, WIRE_VERSIONS))}): a newer fieldvane wrote this capture",
                         path, column="wire_format_version", kind="key")
    if "run_id" in meta and (not meta["run_id"] or "/" in meta["run_id"]):
        raise InputError("must be a non-empty name", path, column="run_id", kind="key")
    return meta


def prepare_capture_folder(directory: str | os.PathLike, option: str = "--capture") -> Path:
    """Return the capture folder, created if missing; raise InputError if it cannot be one."""
    path = Path(directory)
    if path.exists() and not path.is_dir():
        raise InputError("exists and is not a folder", str(path), column=option)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the capture folder: {exc.strerror or exc}", str(path),
                         column=option) from None
    return path


class CaptureWriter:
    """Appends chunks to size-rotated capture files in a folder; never overwrites; counts exactly.

    Files are written with os.write (no hidden buffer), so `bytes_written` is what the operating
    system accepted. A failed write (disk full, I/O error) rolls the file back to its last
    complete record, counts the bytes in `bytes_lost`, raises the OSError, and the next write
    starts with a bytes-lost marker. The first file is created at once: a folder that cannot be
    written is an InputError before anything else happens.
    """

    def __init__(self, directory: str | os.PathLike, metadata: dict | None = None,
                 max_file_bytes: int = DEFAULT_MAX_FILE_BYTES, flush_interval_s: float = 1.0,
                 fsync: bool = False, clock=time.time_ns, option: str = "--capture"):
        if not (isinstance(max_file_bytes, (int, float)) and math.isfinite(max_file_bytes)
                and max_file_bytes >= MIN_MAX_FILE_BYTES):
            raise ValueError(f"max_file_bytes must be at least {MIN_MAX_FILE_BYTES}")
        self.directory = prepare_capture_folder(directory, option)
        self.option = option
        self.max_file_bytes = int(max_file_bytes)
        self.fsync_interval_ns = int(flush_interval_s * 1e9)
        self.fsync = fsync
        self._clock = clock
        created = int(clock())
        self.run_id = _run_id(created)
        while list(self.directory.glob(f"{self.run_id}-*{SUFFIX}")):
            created += 1000                      # another run started in the same microsecond
            self.run_id = _run_id(created)
        self.metadata = dict(metadata or {})
        self.metadata.setdefault("run_id", self.run_id)
        try:
            check_metadata(self.metadata)
        except InputError as exc:
            raise ValueError(str(exc)) from None
        self._meta = json.dumps(self.metadata, sort_keys=True).encode("utf-8")
        if len(self._meta) > MAX_META_BYTES:
            raise ValueError("capture metadata is too large")
        self.files: list[Path] = []
        self._fd: int | None = None
        self._file_bytes = 0
        self._file_records = 0
        self._file_damaged = False
        self._last_fsync_ns = -(1 << 62)
        self._unmarked_lost = 0
        self.bytes_written = 0         # payload bytes of data records the OS accepted
        self.records_written = 0       # data records written
        self.bytes_lost = 0            # payload bytes of data records that could not be written
        self.write_errors = 0          # failed write attempts
        self.last_error: str | None = None
        self.closed = False
        try:
            self._open_next()
        except OSError as exc:
            raise InputError(f"cannot write capture files here: {exc.strerror or exc}",
                             str(self.directory), column=option) from None

    # -- files

    def _open_next(self) -> None:
        self._close_file()
        index = len(self.files)
        path = self.directory / f"{self.run_id}-{index:06d}{SUFFIX}"
        fd = _os_open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o644)
        header = _FILE_HEADER.pack(MAGIC, VERSION, 0, index, int(self._clock()), len(self._meta))
        try:
            _write_all(fd, header + self._meta)
        except OSError:
            os.close(fd)
            try:                                  # a file without its header is no use to anyone
                os.unlink(path)
            except OSError:
                pass
            raise
        self._fd = fd
        self.files.append(path)
        self._file_bytes = len(header) + len(self._meta)
        self._file_records = 0
        self._file_damaged = False

    def _close_file(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            try:
                if self.fsync:
                    os.fsync(fd)
            finally:
                os.close(fd)

    # -- records

    @staticmethod
    def _record(kind: int, host_time_ns: int, data: bytes) -> bytes:
        head = _HEAD.pack(host_time_ns & 0xFFFFFFFFFFFFFFFF, len(data), kind, 0)
        return head + struct.pack("<I", zlib.crc32(data, zlib.crc32(head))) + data

    def write(self, host_time_ns: int, data: bytes) -> None:
        """Append one chunk of received bytes (host time in ns since the epoch); rotate by size."""
        self.write_chunks([Chunk(host_time_ns, bytes(data))])

    def mark_link_open(self, host_time_ns: int) -> None:
        """Append a marker: the link was (re)opened here (a fresh byte stream starts)."""
        self.write_chunks([Chunk(host_time_ns, b"", EVENT_LINK_OPEN)])

    def write_chunks(self, chunks: Iterable[Chunk]) -> None:
        """Append chunks (data, link-open and lost events) in order; on an OSError count and re-raise.

        An EVENT_LOST chunk (bytes lost before they reached the writer) becomes a marker record;
        bytes this writer failed to write are marked before the next record that gets written.
        """
        if self.closed:
            raise ValueError("capture is closed")
        records: list[tuple[int, bytes, int]] = []   # (payload bytes, record, lost bytes marked)
        marked = 0
        for c in chunks:
            if c.event == EVENT_LOST:
                self._unmarked_lost += int(c.lost)
            if self._unmarked_lost > marked:
                count = self._unmarked_lost - marked
                records.append((0, self._record(EVENT_LOST, c.host_time_ns, _LOST.pack(count)), count))
                marked += count
            if c.event == EVENT_DATA:
                for start in range(0, len(c.data), MAX_RECORD_BYTES):
                    piece = c.data[start:start + MAX_RECORD_BYTES]
                    records.append((len(piece), self._record(EVENT_DATA, c.host_time_ns, piece), 0))
            elif c.event == EVENT_LINK_OPEN:
                records.append((0, self._record(EVENT_LINK_OPEN, c.host_time_ns, b""), 0))
        if records:
            self._write_records(records)

    def _write_records(self, records: list[tuple[int, bytes, int]]) -> None:
        i = 0
        try:
            while i < len(records):
                if self._fd is None or self._file_damaged or (
                        self._file_records and
                        self._file_bytes + len(records[i][1]) > self.max_file_bytes):
                    self._open_next()
                # The records that fit in this file go out in one write.
                j, size = i, 0
                while j < len(records) and (j == i or self._file_bytes + size + len(records[j][1])
                                            <= self.max_file_bytes):
                    size += len(records[j][1])
                    j += 1
                error = None
                try:
                    written = _write_all(self._fd, b"".join(r for _, r, _ in records[i:j]))
                except _ShortWrite as exc:
                    written, error = exc.written, exc.error
                i = self._settle(records, i, j, written)
                if error is not None:
                    raise error
        except OSError as exc:
            self.write_errors += 1
            self.last_error = f"{exc.strerror or exc}" + (f" ({exc.filename})" if exc.filename else "")
            lost = sum(n for n, _, _ in records[i:])
            self.bytes_lost += lost
            self._unmarked_lost += lost
            raise
        self._maybe_fsync()

    def _settle(self, records, i: int, j: int, written: int) -> int:
        """Account records i..j-1 of which `written` bytes reached the file; return the first not written.

        A record cut by a failed write is cut off the file again, so the file always ends at a
        record boundary (if even that fails, the next record goes to a new file).
        """
        done = 0
        k = i
        while k < j and done + len(records[k][1]) <= written:
            n, rec, marks = records[k]
            done += len(rec)
            if n:
                self.bytes_written += n
                self.records_written += 1
            self._unmarked_lost -= marks
            k += 1
        self._file_bytes += done
        self._file_records += k - i
        if done != written:
            try:
                os.ftruncate(self._fd, self._file_bytes)
                os.lseek(self._fd, self._file_bytes, os.SEEK_SET)
            except OSError:
                self._file_damaged = True
        return k

    def _maybe_fsync(self) -> None:
        if self.fsync and self._fd is not None:
            now = time.monotonic_ns()            # immune to host clock steps
            if now - self._last_fsync_ns >= self.fsync_interval_ns:
                os.fsync(self._fd)
                self._last_fsync_ns = now

    def flush(self) -> None:
        """Force written bytes to the disk when fsync is on (writes are never held back otherwise)."""
        if self.fsync and self._fd is not None:
            os.fsync(self._fd)

    def close(self) -> None:
        """Close the current file (a pending lost marker is written first if possible); writes then raise."""
        if self.closed:
            return
        try:
            if self._unmarked_lost:
                try:
                    self.write_chunks([Chunk(int(self._clock()), b"", EVENT_LOST, 0)])
                except OSError:
                    pass
        finally:
            self.closed = True
            self._close_file()

    def discard(self) -> None:
        """Close and delete this run's files if nothing was recorded in them (a run that never started)."""
        self.close()
        if self.records_written == 0 and self.bytes_lost == 0:
            for path in self.files:
                try:
                    path.unlink()
                except OSError:
                    pass

    def counters(self) -> dict:
        """Return bytes/records written, bytes lost, write errors and files (ints)."""
        return {"bytes": self.bytes_written, "records": self.records_written,
                "bytes_lost": self.bytes_lost, "write_errors": self.write_errors,
                "files": len(self.files)}

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class _ShortWrite(Exception):
    def __init__(self, written: int, error: OSError):
        self.written, self.error = written, error


def _write_all(fd: int, buf: bytes) -> int:
    """Write all of buf to fd; return its length, or raise _ShortWrite with how much went out."""
    view = memoryview(buf)
    done = 0
    while done < len(view):
        try:
            n = _os_write(fd, view[done:])
        except InterruptedError:
            continue
        except OSError as exc:
            raise _ShortWrite(done, exc) from None
        if n == 0:
            raise _ShortWrite(done, OSError(errno.ENOSPC, os.strerror(errno.ENOSPC)))
        done += n
    return done


# ---------------------------------------------------------------------------------- reading

@dataclass
class CaptureFileInfo:
    """One capture file's header: path, run id, index in its run, creation time (ns), metadata."""

    path: Path
    run_id: str
    index: int
    created_ns: int
    metadata: dict = field(default_factory=dict)
    data_offset: int = 0
    version: int = VERSION


class _CutHeader(InputError):
    """A capture file that ends inside its own header (the writer was stopped while creating it)."""


def read_file_header(path: str | os.PathLike) -> CaptureFileInfo:
    """Return the header of one capture file; raise InputError naming the file if it is not one."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"is a folder, not a capture file (remove or rename it: capture files "
                         f"are named RUN-INDEX{SUFFIX})", str(path))
    try:
        with open(path, "rb") as fh:
            head = fh.read(_FILE_HEADER.size)
            if not MAGIC.startswith(head[:8]):
                raise InputError("not a fieldvane capture file (bad magic)", str(path))
            if len(head) < _FILE_HEADER.size:
                raise _CutHeader("file ends inside its header (no records)", str(path))
            magic, version, _flags, index, created, meta_len = _FILE_HEADER.unpack(head)
            if version not in READ_VERSIONS:
                raise InputError(f"capture format version {version} is not supported (only "
                                 f"{', '.join(map(str, READ_VERSIONS))})", str(path))
            if meta_len > MAX_META_BYTES:
                raise InputError(f"metadata length {meta_len} is too large", str(path))
            meta_raw = fh.read(meta_len)
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror or exc}", str(path)) from None
    if len(meta_raw) != meta_len:
        raise _CutHeader("file ends inside its header (no records)", str(path))
    try:
        meta = json.loads(meta_raw.decode("utf-8")) if meta_len else {}
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"metadata is not JSON: {exc}", str(path)) from None
    check_metadata(meta, str(path))
    run_id = str(meta.get("run_id", path.stem.rsplit("-", 1)[0]))
    return CaptureFileInfo(path, run_id, index, created, meta, _FILE_HEADER.size + meta_len,
                           version)


def capture_files(path: str | os.PathLike, warnings: list[str] | None = None) -> list[CaptureFileInfo]:
    """Return the capture files at path (a file, or every *.fvcap in a folder) in time order.

    A file cut inside its header is skipped with a warning (appended to `warnings` if given);
    anything else that is not a capture file is an InputError naming it.
    """
    path = Path(path)
    if path.is_dir():
        candidates = sorted(path.glob(f"*{SUFFIX}"))
        if not candidates:
            raise InputError(f"no {SUFFIX} capture files in this folder", str(path))
    elif path.exists():
        candidates = [path]
    else:
        raise InputError("capture file or folder does not exist", str(path))
    infos = []
    for p in candidates:
        try:
            infos.append(read_file_header(p))
        except _CutHeader as exc:
            if warnings is not None:
                warnings.append(f"{exc}; skipped")
    if not infos:
        raise InputError("no readable capture files (every file is cut inside its header)", str(path))
    first_created: dict[str, int] = {}
    for info in infos:
        first_created[info.run_id] = min(first_created.get(info.run_id, info.created_ns),
                                         info.created_ns)
    infos.sort(key=lambda i: (first_created[i.run_id], i.run_id, i.index))
    return infos


def capture_runs(path: str | os.PathLike) -> list[str]:
    """Return the run ids found at path, oldest first."""
    runs: list[str] = []
    for info in capture_files(path):
        if info.run_id not in runs:
            runs.append(info.run_id)
    return runs


class CaptureReader:
    """Iterates the Chunks of a capture file or folder (optionally one run) in order.

    Damage never raises: a cut file ends its reading, a record failing its CRC is skipped (an
    EVENT_LOST chunk takes its place), an implausible record header skips the rest of the file.
    Each is a line in `warnings` naming the file and byte offset, and is counted.
    """

    def __init__(self, path: str | os.PathLike, run_id: str | None = None):
        self.path = Path(path)
        self.warnings: list[str] = []
        self.files = [i for i in capture_files(path, self.warnings)
                      if run_id is None or i.run_id == run_id]
        if not self.files:
            raise InputError(f"no capture files of run {run_id}", str(path))
        self.truncated_files: list[str] = []   # files whose last record was cut short (crash)
        self.damaged_records = 0               # records skipped for a failed CRC
        self.bytes_unreadable = 0              # file bytes of skipped records and skipped file tails
        self.live_bytes_lost = 0               # bytes the live capture reported lost (markers)
        self.link_opens = 0
        self.current_run: str | None = None

    def counters(self) -> dict[str, int]:
        """Return files, truncated files, damaged records, unreadable bytes, live-lost bytes, link opens."""
        return {"files": len(self.files), "truncated_files": len(self.truncated_files),
                "damaged_records": self.damaged_records, "bytes_unreadable": self.bytes_unreadable,
                "live_bytes_lost": self.live_bytes_lost, "link_opens": self.link_opens}

    def __iter__(self) -> Iterator[Chunk]:
        for info in self.files:
            self.current_run = info.run_id
            yield from self._read_file(info)

    def _warn(self, info: CaptureFileInfo, text: str) -> None:
        self.warnings.append(f"{info.path}: {text}")

    def _read_file(self, info: CaptureFileInfo) -> Iterator[Chunk]:
        v1 = info.version == 1
        rec = _RECORD_V1 if v1 else _RECORD
        try:
            size = os.path.getsize(info.path)
            fh = open(info.path, "rb")
        except OSError as exc:
            raise InputError(f"cannot read: {exc.strerror or exc}", str(info.path)) from None
        with fh:
            fh.seek(info.data_offset)
            offset = info.data_offset
            bad_in_a_row = 0
            while True:
                head = fh.read(rec.size)
                if not head:
                    return
                if len(head) < rec.size:
                    self._cut(info, offset, size)
                    return
                if v1:
                    t_ns, length, crc = rec.unpack(head)
                    kind, reserved = EVENT_DATA, 0
                else:
                    t_ns, length, kind, reserved, crc = rec.unpack(head)
                if length > MAX_RECORD_BYTES or kind not in _KINDS or reserved != 0 or (
                        kind == EVENT_LINK_OPEN and length != 0) or (
                        kind == EVENT_LOST and length != _LOST.size):
                    self._warn(info, f"record at byte {offset} has a damaged header; the rest of "
                                     f"the file ({size - offset} bytes) is skipped")
                    self.bytes_unreadable += size - offset
                    self.damaged_records += 1
                    yield Chunk(t_ns, b"", EVENT_LOST, size - offset)
                    return
                data = fh.read(length)
                if len(data) < length:
                    self._cut(info, offset, size)
                    return
                check = zlib.crc32(data) if v1 else zlib.crc32(data, zlib.crc32(head[:_HEAD.size]))
                if check != crc:
                    bad_in_a_row += 1
                    self.damaged_records += 1
                    if bad_in_a_row >= 2:            # lengths cannot be trusted any more
                        rest = size - offset
                        self._warn(info, f"records at byte {offset} and before fail their CRC-32 "
                                         f"check; the rest of the file ({rest} bytes) is skipped")
                        self.bytes_unreadable += rest
                        yield Chunk(t_ns, b"", EVENT_LOST, rest)
                        return
                    self._warn(info, f"record at byte {offset} fails its CRC-32 check; its "
                                     f"{length} bytes are skipped")
                    self.bytes_unreadable += rec.size + length
                    yield Chunk(t_ns, b"", EVENT_LOST, length)
                    offset += rec.size + length
                    continue
                bad_in_a_row = 0
                offset += rec.size + length
                if kind == EVENT_DATA:
                    if data:
                        yield Chunk(t_ns, data)
                elif kind == EVENT_LINK_OPEN:
                    self.link_opens += 1
                    yield Chunk(t_ns, b"", EVENT_LINK_OPEN)
                else:
                    (lost,) = _LOST.unpack(data)
                    self.live_bytes_lost += lost
                    self._warn(info, f"the live run could not store {lost} bytes before byte "
                                     f"{offset - rec.size - length} (disk full, too slow, or "
                                     "stopped by force)")
                    yield Chunk(t_ns, b"", EVENT_LOST, lost)

    def _cut(self, info: CaptureFileInfo, offset: int, size: int) -> None:
        self.truncated_files.append(str(info.path))
        self.bytes_unreadable += size - offset
        self._warn(info, f"file ends inside the record at byte {offset} (the writer was stopped); "
                         f"its {size - offset} bytes are skipped")


def read_capture(path: str | os.PathLike, run_id: str | None = None) -> Iterator[Chunk]:
    """Yield (host_time_ns, bytes) Chunks of a capture file or folder, in receive order."""
    return iter(CaptureReader(path, run_id))
