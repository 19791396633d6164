"""Raw capture: every received byte, with host receive times, in size-rotated files (format v1).

The format is specified in docs/capture_format.md. A capture directory holds one or more runs;
each run is a sequence of files `<run_id>-<index:06d>.fvcap`, and each file holds a header and
then records of (host receive time, bytes). Reading a directory yields every run in order.
"""

from __future__ import annotations

import json
import os
import struct
import time
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

from fieldvane.io.errors import InputError

MAGIC = b"FVCAP\r\n\x1a"          # catches text-mode and line-ending mangling of the file
VERSION = 1
SUFFIX = ".fvcap"
DEFAULT_MAX_FILE_BYTES = 64 * 1024 * 1024
MAX_META_BYTES = 65536
MAX_RECORD_BYTES = 16 * 1024 * 1024

_FILE_HEADER = struct.Struct("<8sHHIQI")   # magic, version, flags, file_index, created_ns, meta_len
_RECORD = struct.Struct("<QII")            # host_time_ns, length, crc32(data)


class Chunk(NamedTuple):
    """Bytes received together: host receive time (ns since the Unix epoch) and the bytes."""

    host_time_ns: int
    data: bytes


def _run_id(created_ns: int) -> str:
    secs, ns = divmod(created_ns, 1_000_000_000)
    stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime(secs))
    return f"{stamp}.{ns // 1000:06d}Z"


class CaptureWriter:
    """Appends received chunks to size-rotated capture files in a directory; never overwrites."""

    def __init__(self, directory: str | os.PathLike, metadata: dict | None = None,
                 max_file_bytes: int = DEFAULT_MAX_FILE_BYTES, flush_interval_s: float = 1.0,
                 fsync: bool = False, clock=time.time_ns):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.max_file_bytes = int(max_file_bytes)
        self.flush_interval_ns = int(flush_interval_s * 1e9)
        self.fsync = fsync
        self._clock = clock
        created = int(clock())
        self.run_id = _run_id(created)
        while list(self.directory.glob(f"{self.run_id}-*{SUFFIX}")):
            created += 1000                      # another run started in the same microsecond
            self.run_id = _run_id(created)
        self.metadata = dict(metadata or {})
        self.metadata.setdefault("run_id", self.run_id)
        self._meta = json.dumps(self.metadata, sort_keys=True).encode("utf-8")
        if len(self._meta) > MAX_META_BYTES:
            raise ValueError("capture metadata is too large")
        self.files: list[Path] = []
        self._fh = None
        self._file_bytes = 0
        self._file_records = 0
        self._last_flush_ns = -(1 << 62)
        self.bytes_written = 0         # payload bytes (what the link delivered)
        self.records_written = 0
        self.closed = False

    def _open_next(self) -> None:
        self._close_file()
        index = len(self.files)
        path = self.directory / f"{self.run_id}-{index:06d}{SUFFIX}"
        fh = open(path, "xb")
        header = _FILE_HEADER.pack(MAGIC, VERSION, 0, index, int(self._clock()), len(self._meta))
        fh.write(header + self._meta)
        self._fh = fh
        self.files.append(path)
        self._file_bytes = len(header) + len(self._meta)
        self._file_records = 0

    def write(self, host_time_ns: int, data: bytes) -> None:
        """Append one chunk (host receive time in ns since the epoch, raw bytes); rotate by size."""
        if self.closed:
            raise ValueError("capture is closed")
        if not data:
            return
        for start in range(0, len(data), MAX_RECORD_BYTES):
            self._write_record(host_time_ns, data[start:start + MAX_RECORD_BYTES])

    def _write_record(self, host_time_ns: int, data: bytes) -> None:
        size = _RECORD.size + len(data)
        if self._fh is None or (self._file_records and self._file_bytes + size > self.max_file_bytes):
            self._open_next()
        self._fh.write(_RECORD.pack(host_time_ns, len(data), zlib.crc32(data)))
        self._fh.write(data)
        self._file_bytes += size
        self._file_records += 1
        self.records_written += 1
        self.bytes_written += len(data)
        now = time.monotonic_ns()            # immune to host clock steps
        if now - self._last_flush_ns >= self.flush_interval_ns:
            self.flush()
            self._last_flush_ns = now

    def flush(self) -> None:
        """Hand buffered bytes to the operating system (and to the disk when fsync is on)."""
        if self._fh is not None:
            self._fh.flush()
            if self.fsync:
                os.fsync(self._fh.fileno())

    def _close_file(self) -> None:
        if self._fh is not None:
            self.flush()
            self._fh.close()
            self._fh = None

    def close(self) -> None:
        """Flush and close the current file; further writes raise."""
        if not self.closed:
            self._close_file()
            self.closed = True

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


@dataclass
class CaptureFileInfo:
    """One capture file's header: path, run id, index in its run, creation time (ns), metadata."""

    path: Path
    run_id: str
    index: int
    created_ns: int
    metadata: dict = field(default_factory=dict)
    data_offset: int = 0


def read_file_header(path: str | os.PathLike) -> CaptureFileInfo:
    """Return the header of one capture file; raise InputError naming the file if it is not one."""
    path = Path(path)
    with open(path, "rb") as fh:
        head = fh.read(_FILE_HEADER.size)
        if len(head) < _FILE_HEADER.size or head[:8] != MAGIC:
            raise InputError("not a fieldvane capture file (bad magic)", str(path))
        magic, version, _flags, index, created, meta_len = _FILE_HEADER.unpack(head)
        if version != VERSION:
            raise InputError(f"capture format version {version} is not supported (only "
                             f"{VERSION})", str(path))
        if meta_len > MAX_META_BYTES:
            raise InputError(f"metadata length {meta_len} is too large", str(path))
        meta_raw = fh.read(meta_len)
    if len(meta_raw) != meta_len:
        raise InputError("file ends inside its header", str(path))
    try:
        meta = json.loads(meta_raw.decode("utf-8")) if meta_len else {}
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"metadata is not JSON: {exc}", str(path)) from None
    if not isinstance(meta, dict):
        raise InputError("metadata is not a JSON object", str(path))
    run_id = str(meta.get("run_id", path.stem.rsplit("-", 1)[0]))
    return CaptureFileInfo(path, run_id, index, created, meta, _FILE_HEADER.size + meta_len)


def capture_files(path: str | os.PathLike) -> list[CaptureFileInfo]:
    """Return the capture files at path (a file, or every *.fvcap in a directory) in time order."""
    path = Path(path)
    if path.is_dir():
        infos = [read_file_header(p) for p in sorted(path.glob(f"*{SUFFIX}"))]
        if not infos:
            raise InputError(f"no {SUFFIX} capture files in this directory", str(path))
    elif path.exists():
        infos = [read_file_header(path)]
    else:
        raise InputError("capture file or directory does not exist", str(path))
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
    """Iterates the Chunks of a capture file or directory (optionally one run) in order."""

    def __init__(self, path: str | os.PathLike, run_id: str | None = None):
        self.path = Path(path)
        self.files = [i for i in capture_files(path) if run_id is None or i.run_id == run_id]
        if not self.files:
            raise InputError(f"no capture files of run {run_id}", str(path))
        self.truncated_files: list[str] = []   # files whose last record was cut short (crash)
        self.current_run: str | None = None

    def __iter__(self) -> Iterator[Chunk]:
        for info in self.files:
            self.current_run = info.run_id
            yield from self._read_file(info)

    def _read_file(self, info: CaptureFileInfo) -> Iterator[Chunk]:
        with open(info.path, "rb") as fh:
            fh.seek(info.data_offset)
            offset = info.data_offset
            while True:
                head = fh.read(_RECORD.size)
                if not head:
                    return
                if len(head) < _RECORD.size:
                    self.truncated_files.append(str(info.path))
                    return
                t_ns, length, crc = _RECORD.unpack(head)
                if length > MAX_RECORD_BYTES:
                    raise InputError(f"record at byte {offset} claims {length} bytes",
                                     str(info.path))
                data = fh.read(length)
                if len(data) < length:
                    self.truncated_files.append(str(info.path))
                    return
                if zlib.crc32(data) != crc:
                    raise InputError(f"record at byte {offset} fails its CRC-32 check",
                                     str(info.path))
                offset += _RECORD.size + length
                yield Chunk(t_ns, data)


def read_capture(path: str | os.PathLike, run_id: str | None = None) -> Iterator[Chunk]:
    """Yield (host_time_ns, bytes) Chunks of a capture file or directory, in receive order."""
    return iter(CaptureReader(path, run_id))
