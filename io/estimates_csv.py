"""Estimates CSV (DESIGN.md section 4): a lossless synchronous writer and a validating reader."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS, Estimate
from fieldvane.io.errors import InputError
from fieldvane.io.recording import is_float


class EstimatesWriter:
    """Writes estimates to a CSV file synchronously (never drops), with the same formatter as the CSV sink."""

    def __init__(self, path: str | Path, extras: list[str] | None = None, metadata: dict | None = None):
        from fieldvane.io.sinks import make_formatter

        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._fh = open(self.path, "w", encoding="utf-8", newline="")
        self._formatter = make_formatter("csv", extras)
        self._metadata = metadata or {}
        self.rows = 0

    def write(self, est: Estimate | dict) -> None:
        """Append one estimate (or a record dict) as a row; the header goes with the first row."""
        row = est.row() if isinstance(est, Estimate) else est
        if self.rows == 0:
            self._formatter.bind(row)
            for k, v in self._metadata.items():
                self._fh.write(f"# {k}: {v}\n")
            self._fh.write(self._formatter.header())
        self._fh.write(self._formatter.format(row))
        self.rows += 1

    def close(self) -> None:
        """Flush and close the file (a file with no rows still gets the header)."""
        if self.rows == 0:
            self._formatter.bind({})
            self._fh.write(self._formatter.header())
        self._fh.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def read_estimates(path: str | Path) -> dict[str, np.ndarray]:
    """Return the columns of an estimates CSV (name -> float array); checks the fixed columns' order."""
    path = str(path)
    header, rows, meta = None, [], {}
    try:
        fh = open(path, encoding="utf-8", errors="replace")
    except OSError as exc:
        raise InputError(f"cannot open estimates: {exc.strerror}", path) from None
    with fh:
        for lineno, line in enumerate(fh, 1):
            s = line.strip()
            if not s:
                continue
            if s.startswith("#"):
                if ":" in s:
                    k, v = s[1:].split(":", 1)
                    meta[k.strip()] = v.strip()
                continue
            parts = s.split(",")
            if header is None:
                header = parts
                if tuple(header[:len(ESTIMATE_COLUMNS)]) != ESTIMATE_COLUMNS:
                    raise InputError("the first columns must be " + ", ".join(ESTIMATE_COLUMNS), path, lineno)
                continue
            if len(parts) != len(header):
                raise InputError(f"expected {len(header)} fields, found {len(parts)}", path, lineno)
            try:
                rows.append([float(p) for p in parts])
            except ValueError:
                bad = next(i for i, p in enumerate(parts) if not is_float(p))
                raise InputError(f"not a number ({parts[bad][:30]!r})", path, lineno, header[bad]) from None
    if header is None:
        raise InputError("no header row", path)
    data = np.array(rows, float).reshape(-1, len(header))
    out = {name: data[:, i] for i, name in enumerate(header)}
    out["flags"] = out["flags"].astype(np.int64)
    return out
