"""Estimates CSV (DESIGN.md section 4): a lossless synchronous writer and a validating reader."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS, Estimate
from fieldvane.io.errors import InputError


def _fmt(v) -> str:
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    f = float(v)
    return "nan" if f != f else f"{f:.9g}"


class EstimatesWriter:
    """Writes estimates rows to a CSV file: the fixed columns first, extras after in first-seen order."""

    def __init__(self, path: str | Path, extras: list[str] | None = None, metadata: dict | None = None):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._fh = open(self.path, "w", encoding="utf-8", newline="")
        self._extras = list(extras) if extras is not None else None
        self._metadata = metadata or {}
        self.rows = 0

    def write(self, est: Estimate) -> None:
        """Append one estimate as a row (the header is written with the first row)."""
        row = est.row()
        if self._extras is None:
            self._extras = [k for k in row if k not in ESTIMATE_COLUMNS]
        if self.rows == 0:
            for k, v in self._metadata.items():
                self._fh.write(f"# {k}: {v}\n")
            self._fh.write(",".join(list(ESTIMATE_COLUMNS) + self._extras) + "\n")
        values = [row[c] for c in ESTIMATE_COLUMNS] + [row.get(c, float("nan")) for c in self._extras]
        self._fh.write(",".join(_fmt(v) for v in values) + "\n")
        self.rows += 1

    def close(self) -> None:
        """Flush and close the file."""
        if self.rows == 0:
            self._fh.write(",".join(ESTIMATE_COLUMNS) + "\n")
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
                bad = next(i for i, p in enumerate(parts) if not _is_float(p))
                raise InputError(f"not a number ({parts[bad][:30]!r})", path, lineno, header[bad]) from None
    if header is None:
        raise InputError("no header row", path)
    data = np.array(rows, float).reshape(-1, len(header))
    out = {name: data[:, i] for i, name in enumerate(header)}
    out["flags"] = out["flags"].astype(np.int64)
    return out


def _is_float(s: str) -> bool:
    try:
        float(s)
        return True
    except ValueError:
        return False
