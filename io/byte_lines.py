"""A text file read in large binary blocks: lines decoded one at a time, or numeric lines parsed in bulk.

Lines are those Python's text files give (open(..., encoding='utf-8-sig', errors='replace')): a
leading BOM dropped, bad bytes as U+FFFD, and \\n, \\r\\n or a lone \\r each end a line. A recording's (or
an estimates file's) header and comment lines are read with `readline`; its data lines with `parse`, which runs the
compiled parser (io/csv_numbers.py) over the raw bytes and decodes a line to text only when asked
(to report or re-parse it), so a clean file is never split into Python strings.
"""

from __future__ import annotations

import bisect

import numpy as np

_TERMINATORS = (b"\n", b"\r")


class ParsedRows:
    """Up to n lines parsed by the kernel: `values` (rows, ncol) float64, `ok` (rows,) bool where a line parsed
    as ncol numbers; `self[k]` is line k as text (a slice gives a list), for the lines that did not."""

    def __init__(self, values: np.ndarray, ok: np.ndarray, pieces: list[tuple[bytearray, int, np.ndarray]]):
        self.values, self.ok = values, ok
        self._pieces = pieces                       # (block buffer, first row, line starts incl. the end)
        self._firsts = [first for _, first, _ in pieces]

    def __len__(self) -> int:
        return self.values.shape[0]

    def __getitem__(self, k):
        if isinstance(k, slice):
            return [self[j] for j in range(*k.indices(len(self)))]
        if isinstance(k, (list, np.ndarray)):
            return [self[int(j)] for j in k]
        if not 0 <= k < len(self):
            raise IndexError(k)
        buf, first, starts = self._pieces[bisect.bisect_right(self._firsts, k) - 1]
        line = buf[starts[k - first]:starts[k - first + 1]]
        if line.endswith(b"\r\n"):
            line = line[:-2]
        elif line.endswith(_TERMINATORS):
            line = line[:-1]
        return line.decode("utf-8", errors="replace")


class ByteLines:
    """Lines of a binary file handle read `block_bytes` at a time (see the module's note)."""

    def __init__(self, fh, block_bytes: int = 1 << 22):
        self._fh = fh
        self._block_bytes = block_bytes
        self._buf = bytearray()       # _buf[_off:_end]: whole lines, the last one ending with a terminator
        self._off = self._end = 0
        self._carry = b""             # an unfinished line after them
        self._eof = False
        self._first = True

    def _fill(self) -> bool:
        """Make _buf[_off:_end] hold the next whole lines; return False at the end of the file."""
        while self._off >= self._end:
            if self._eof:
                return False
            # One new buffer per block, read into in place: copies of blocks this size cost more than the read.
            carry = self._carry
            buf = bytearray(len(carry) + self._block_bytes)
            buf[:len(carry)] = carry
            with memoryview(buf) as view:
                got = self._fh.readinto(view[len(carry):]) or 0
            size = len(carry) + got
            if not got:
                self._eof = True
                end, self._carry = size, b""
            else:
                cut = buf.rfind(b"\n", 0, size)
                if cut < 0:
                    cut = buf.rfind(b"\r", 0, size - 1)      # a final \r may start a \r\n
                if cut < 0:
                    self._carry = bytes(buf[:size])           # a line longer than the block
                    continue
                end, self._carry = cut + 1, bytes(buf[cut + 1:size])
            start = 0
            if self._first and end:
                self._first = False
                if buf.startswith(b"\xef\xbb\xbf"):
                    start = 3
            if self._eof and end > start and buf[end - 1] not in b"\n\r":
                buf[end:end + 1] = b"\n"                  # the last line's end: same lines, a stop for the parser
                end += 1
            self._buf, self._off, self._end = buf, start, end
        return True

    def readline(self) -> str | None:
        """Return the next line as text (without its end), or None at the end of the file."""
        if not self._fill():
            return None
        buf, off = self._buf, self._off
        nl, cr = buf.find(b"\n", off, self._end), buf.find(b"\r", off, self._end)
        end = nl if cr < 0 or 0 <= nl < cr else cr
        self._off = end + (2 if buf[end:end + 2] == b"\r\n" else 1)
        return buf[off:end].decode("utf-8", errors="replace")

    def parse(self, n: int, ncol: int) -> ParsedRows | None:
        """Return the next up to n lines parsed as ncol numbers each (fewer only at the end), or None at the end."""
        from fieldvane.io.csv_numbers import parse_rows

        values = np.empty((n, ncol))
        ok = np.empty(n, np.uint8)
        pieces: list[tuple[bytearray, int, np.ndarray]] = []
        got = 0
        while got < n and self._fill():
            starts = np.empty(n - got + 1, np.int64)
            rows = parse_rows(np.frombuffer(self._buf, np.uint8, count=self._end), self._off, n - got, ncol,
                              values[got:], ok[got:], starts)
            pieces.append((self._buf, got, starts[:rows + 1]))
            self._off = int(starts[rows])
            got += rows
        if got == 0:
            return None
        return ParsedRows(values[:got], ok[:got].astype(bool), pieces)
