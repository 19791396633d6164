"""Estimates CSV (docs/estimates_columns.md): a lossless synchronous writer and a fast validating reader.

Bytes: every row is exactly what the CSV logger sink writes for the same record (io/sinks.py
CsvFormatter): floats as Python's repr (shortest text that reads back to the same double), integers
as str, an absent value as an empty field, the fixed columns first and the extras after them in
sorted order unless given. `write` formats one record through the sink's own formatter (live use);
`write_columns` and `write_estimates` format whole blocks in one compiled pass (io/float_text.py).
The two must agree byte for byte: tests/test_estimates_csv.py checks it on random records.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from contextlib import ExitStack
from pathlib import Path

import numpy as np

from fieldvane.estimator.estimate import ESTIMATE_COLUMNS, Estimate
from fieldvane.io.errors import InputError, JobError
from fieldvane.io.byte_lines import ByteLines
from fieldvane.io.recording import fast_parse_lines
from fieldvane.io.row_block import RowBlock, matrix_layout

WRITE_BLOCK_ROWS = 8192        # rows formatted per compiled call (bounds the text buffer: ~3.5 MB)
READ_CHUNK_ROWS = 65536        # lines parsed per compiled call when reading
_INT64_MAX = np.iinfo(np.int64).max


def estimate_columns(t, u, b_nT, sigma_deg, flags, extras: Mapping[str, np.ndarray] | None = None
                     ) -> dict[str, np.ndarray]:
    """Return the estimates CSV columns (name -> array) of N estimates: t s, u (N, 3) sensor frame, nT, deg, flags.

    bx_nT..bz_nT are b_nT * u, computed as Estimate.row() computes them (same bytes).
    """
    u = np.asarray(u, float).reshape(-1, 3)
    b = np.asarray(b_nT)
    cols = {"t": np.asarray(t), "ux": u[:, 0], "uy": u[:, 1], "uz": u[:, 2], "b_nT": b,
            "bx_nT": b * u[:, 0], "by_nT": b * u[:, 1], "bz_nT": b * u[:, 2],
            "sigma_deg": np.asarray(sigma_deg), "flags": np.asarray(flags, np.int64)}
    cols.update(extras or {})
    return cols


_FLOAT_BASE = ESTIMATE_COLUMNS[:-1]      # the float matrix's first columns: t .. sigma_deg (flags are ints)


_BLOCK_PLANS: dict[tuple, tuple | None] = {}     # the extras' (name, dtype, rank) -> (floats, ints, layout)


def _block_plan(extras: Mapping[str, np.ndarray]) -> tuple | None:
    """Return (float extras, int extras, layout) of records with these extra columns; None when one is of another
    type (the general RowBlock then)."""
    key = tuple((k, v.dtype.char, v.ndim) for k, v in extras.items())
    if key in _BLOCK_PLANS:
        return _BLOCK_PLANS[key]
    fx = [k for k, v in extras.items() if v.dtype == np.float64 and v.ndim == 1]
    ix = [k for k, v in extras.items() if v.dtype == np.int64 and v.ndim == 1]
    plan = None
    if len(fx) + len(ix) == len(extras):
        plan = fx, ix, matrix_layout(ESTIMATE_COLUMNS + tuple(extras), _FLOAT_BASE + tuple(fx), ("flags", *ix))
    if len(_BLOCK_PLANS) < 256:
        _BLOCK_PLANS[key] = plan
    return plan


def record_block(record) -> RowBlock:
    """Return a TrackRecord's estimates CSV columns as a RowBlock (the live path: one per batch to each logger);
    its values are estimate_columns' (bx_nT..bz_nT = b_nT * u)."""
    extras = record.extra_columns()
    plan = _block_plan(extras)
    if plan is None:
        return RowBlock(estimate_columns(record.t, record.u, record.b_nT, record.sigma_deg, record.flags, extras))
    fx, ix, layout = plan
    n = len(record.t)
    floats = np.empty((n, 9 + len(fx)))
    floats[:, 0] = record.t
    floats[:, 1:4] = record.u
    floats[:, 4] = record.b_nT
    np.multiply(record.u, record.b_nT[:, None], out=floats[:, 5:8])
    floats[:, 8] = record.sigma_deg
    for j, k in enumerate(fx):
        floats[:, 9 + j] = extras[k]
    ints = np.empty((n, 1 + len(ix)), np.int64)
    ints[:, 0] = record.flags
    for j, k in enumerate(ix):
        ints[:, 1 + j] = extras[k]
    return RowBlock.of_layout(layout, floats, ints)


_TRACK_LAYOUTS: dict[bool, tuple] = {}     # with a utc column or not -> the layout of Tracker.step_rows' matrices


def live_block(tracker, samples, utc: np.ndarray | None = None) -> RowBlock:
    """Return the estimates of a few live samples as a RowBlock (one per batch to each logger): the tracker's
    step_rows matrices as they are, or record_block(step_record(...)) when it reports channel readouts; utc (N,)
    POSIX s: a `utc` column after the others (in the float matrix's spare column, no copy of the block)."""
    if tracker.report_channels:
        block = record_block(tracker.step_record(samples))
        return block if utc is None else block.with_columns({"utc": np.asarray(utc, np.float64)})
    with_utc = utc is not None
    layout = _TRACK_LAYOUTS.get(with_utc)
    if layout is None:
        from fieldvane.estimator.tracker import ROW_EXTRAS, ROW_FLOAT_COLUMNS, ROW_INT_COLUMNS

        added = ("utc",) if with_utc else ()
        layout = _TRACK_LAYOUTS[with_utc] = matrix_layout(ESTIMATE_COLUMNS + ROW_EXTRAS + added,
                                                          ROW_FLOAT_COLUMNS + added, ROW_INT_COLUMNS)
    floats, ints = tracker.step_rows(samples, spare_columns=int(with_utc))
    if with_utc:
        floats[:, -1] = utc
    return RowBlock.of_layout(layout, floats, ints)


def _as_column(values) -> np.ndarray | None:
    """Return values as a float64 or int64 array when that writes the same text as the sink, else None."""
    if isinstance(values, np.ndarray):
        kind = values.dtype.kind
        if kind == "f":
            return values.astype(np.float64, copy=False)
        if kind in "ib":
            return values.astype(np.int64, copy=False)
        if kind == "u" and (values.size == 0 or int(values.max()) <= _INT64_MAX):
            return values.astype(np.int64, copy=False)
        return None
    values = list(values)
    types = set(map(type, values))
    if all(issubclass(tp, (float, np.floating)) for tp in types):
        return np.array(values, np.float64)
    if all(issubclass(tp, (int, np.integer, np.bool_)) for tp in types):
        try:
            return np.array(values, np.int64)
        except OverflowError:
            return None
    return None                    # mixed ints and floats, None, text: the per-record path


def _block_columns(names: Sequence[str], columns: Mapping[str, Sequence]):
    """Return (arrays in `names` order, None where absent; the position of `utc` or None) for the compiled block
    formatter, or None when a column holds values only the per-record path writes (mixed, None, text)."""
    arrays = [None if name not in columns else _as_column(columns[name]) for name in names]
    if any(a is None and name in columns for a, name in zip(arrays, names)):
        return None
    try:
        from fieldvane.io import float_text  # noqa: F401
    except ImportError:                 # no compiler: the per-record path
        return None
    utc_at = names.index("utc") if "utc" in names and "utc" in columns else None
    if utc_at is not None and arrays[utc_at].dtype.kind != "f":
        return None                     # `utc` as ints or flags: the sink's own rendering
    return arrays, utc_at


def _block_text(block, lo: int, hi: int, out: np.ndarray | None = None) -> bytes | memoryview:
    """Return rows lo..hi-1 of a _block_columns block as CSV lines, formatted in one compiled pass."""
    from fieldvane.io.float_text import format_rows
    arrays, utc_at = block
    return format_rows([None if a is None else a[lo:hi] for a in arrays], out=out, utc=utc_at)


def records_text(names: Sequence[str], records: Sequence[Mapping]) -> str | None:
    """Return the CSV lines of records (dicts with the same keys) in columns `names`, the bytes CsvFormatter.format
    writes for each, formatted in one compiled pass (the CSV logger's batches); None when they need that per-record
    path (different keys, values of mixed types, None, text)."""
    keys = records[0].keys()
    if any(r.keys() != keys for r in records):
        return None
    block = _block_columns(names, {k: [r[k] for r in records] for k in names if k in keys})
    if block is None:
        return None
    return bytes(_block_text(block, 0, len(records))).decode("ascii")


def block_text(names: Sequence[str], block: RowBlock) -> str | None:
    """Return the CSV lines of a RowBlock in columns `names` (an absent one empty), the bytes CsvFormatter.format
    writes for each row, in one compiled pass straight from its matrices (the CSV logger's live batches); None
    when a column needs the per-record path (a type other than float64 or int64)."""
    try:
        from fieldvane.io.float_text import KIND_EMPTY, KIND_FLOAT, KIND_INT, KIND_UTC, format_matrix
    except ImportError:                 # no compiler: the per-record path
        return None
    n_f, n_i = block.floats.shape[1], block.ints.shape[1]
    float_others, int_others, kinds, src = [], [], [], []
    for name in names:
        if name not in block._where:
            kinds.append(KIND_EMPTY)
            src.append(0)
            continue
        group, j = block._where[name]
        if group == "o":
            col = block.others[name]
            if col.dtype == np.float64:
                group, j = "f", n_f + len(float_others)
                float_others.append(col)
            elif col.dtype == np.int64 and name != "utc":
                group, j = "i", n_i + len(int_others)
                int_others.append(col)
            else:
                return None
        if group == "f":
            kinds.append(KIND_UTC if name == "utc" else KIND_FLOAT)
        elif name == "utc":
            return None                 # `utc` as ints: the sink's own rendering
        else:
            kinds.append(KIND_INT)
        src.append(j)
    return bytes(format_matrix(block.floats, float_others, block.ints, int_others, kinds, src)).decode("ascii")


class EstimatesWriter:
    """Writes estimates to a CSV file synchronously (never drops); the same bytes as the CSV sink.

    With atomic=True (default) the rows go to a temporary name renamed over `path` by close(); an
    exception inside a `with` block leaves nothing behind (io/outputs.py atomic_file).
    """

    def __init__(self, path: str | Path, extras: Sequence[str] | None = None, metadata: dict | None = None,
                 *, atomic: bool = True):
        from fieldvane.io.outputs import atomic_file
        from fieldvane.io.sinks import make_formatter

        self.path = Path(path)
        self._stack = ExitStack()
        try:
            if atomic:
                target = self._stack.enter_context(atomic_file(self.path))
            else:
                self.path.parent.mkdir(parents=True, exist_ok=True)
                target = self.path
            self._fh = open(target, "wb")
        except OSError as exc:
            self._stack.close()
            raise InputError(f"cannot write estimates: {exc.strerror}", str(self.path)) from None
        self._formatter = make_formatter("csv", extras)
        self._metadata = metadata if metadata is not None else {}   # as it stands at the first row
        self._started = False
        self._closed = False
        self._buffer: np.ndarray | None = None
        self.rows = 0

    def _put(self, data: bytes | memoryview) -> None:
        try:
            self._fh.write(data)
        except OSError as exc:
            raise JobError(f"{self.path}: cannot write estimates: {exc.strerror}") from None

    def _start(self, names: Iterable[str]) -> None:
        """Fix the extra columns from the first record's names and write metadata and header."""
        self._formatter.bind({k: None for k in names})
        text = "".join(f"# {k}: {v}\n" for k, v in self._metadata.items()) + self._formatter.header()
        self._put(text.encode("utf-8"))
        self._started = True

    @property
    def columns(self) -> tuple[str, ...] | None:
        """Return the column names in file order once the header is fixed, else None."""
        extras = self._formatter.extras
        return None if extras is None or not self._started else ESTIMATE_COLUMNS + tuple(extras)

    def write(self, est: Estimate | dict) -> None:
        """Append one estimate (or a record dict) as a row; the header goes with the first row."""
        row = est.row() if isinstance(est, Estimate) else est
        if not self._started:
            self._start(row)
        self._put(self._formatter.format(row).encode("utf-8"))
        self.rows += 1

    def write_columns(self, columns: Mapping[str, Sequence]) -> None:
        """Append N rows given as columns (name -> N values; the estimates CSV names, e.g. from estimate_columns)."""
        if not self._started:
            self._start(columns)
        names = self.columns
        lengths = {len(v) for v in columns.values()}
        if len(lengths) > 1:
            raise ValueError(f"columns of different lengths: {sorted(lengths)}")
        n = lengths.pop() if lengths else 0
        if n == 0:
            return
        block = _block_columns(names, columns)
        if block is None:
            self._write_records(columns, n)
            return
        if self._buffer is None:
            from fieldvane.io.float_text import text_capacity
            self._buffer = np.empty(text_capacity(WRITE_BLOCK_ROWS, len(names), "utc" in names), np.uint8)
        for lo in range(0, n, WRITE_BLOCK_ROWS):
            self._put(_block_text(block, lo, min(lo + WRITE_BLOCK_ROWS, n), self._buffer))
        self.rows += n

    def _write_records(self, columns: Mapping[str, Sequence], n: int) -> None:
        """Append rows one record at a time through the sink's formatter (values of unusual types)."""
        names = list(columns)
        lists = [columns[k].tolist() if isinstance(columns[k], np.ndarray) else list(columns[k]) for k in names]
        fmt = self._formatter.format
        for values in zip(*lists):
            self._put(fmt(dict(zip(names, values))).encode("utf-8"))
        self.rows += n

    def write_estimates(self, estimates: Sequence[Estimate]) -> None:
        """Append a batch of Estimate objects (the same bytes as write() on each, formatted as one block)."""
        if not estimates:
            return
        if not self._started:
            self._start(estimates[0].row())
        cols: dict[str, object] = {"t": _as_column([e.t for e in estimates]),
                                   "b_nT": _as_column([e.b_nT for e in estimates]),
                                   "sigma_deg": _as_column([e.sigma_deg for e in estimates]),
                                   "flags": np.array([int(e.flags) for e in estimates], np.int64)}
        missing = object()
        extras = {}
        usual = all(cols[k] is not None and cols[k].dtype == np.float64 for k in ("t", "b_nT", "sigma_deg"))
        for name in self._formatter.extras:
            values = [e.extras.get(name, missing) for e in estimates]
            present = sum(v is not missing for v in values)
            if present == len(values):
                extras[name] = _as_column(values)
                usual = usual and extras[name] is not None
            elif present:
                usual = False                # absent in some rows only
        if not usual:
            for e in estimates:              # values of mixed types, or gaps: record by record
                self.write(e)
            return
        u = np.array([np.asarray(e.u, float) for e in estimates]).reshape(-1, 3)
        self.write_columns(estimate_columns(cols["t"], u, cols["b_nT"], cols["sigma_deg"], cols["flags"], extras))

    def close(self) -> None:
        """Flush and close the file (a file with no rows still gets the header); renames it into place."""
        if self._closed:
            return
        self._closed = True
        try:
            if not self._started:
                self._start({})
            try:
                self._fh.close()
            except OSError as exc:
                raise JobError(f"{self.path}: cannot write estimates: {exc.strerror}") from None
        except BaseException as exc:
            self._discard(exc)
            raise
        self._stack.close()

    def _discard(self, exc: BaseException) -> None:
        """Close quietly and remove the temporary file after a failure."""
        try:
            self._fh.close()
        except OSError:
            pass
        try:
            self._stack.__exit__(type(exc), exc, exc.__traceback__)
        except BaseException:           # atomic_file re-raises the failure it was handed
            pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        elif not self._closed:
            self._closed = True
            self._discard(exc)
        return False


def read_estimates(path: str | Path) -> dict[str, np.ndarray]:
    """Return the columns of an estimates CSV (name -> float64 array, 'flags' int64); checks columns and values.

    Empty fields (an absent value) read as NaN; flags must be non-negative integers.
    """
    path = str(path)
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise InputError(f"cannot open estimates: {exc.strerror}", path) from None
    with fh:
        source = ByteLines(fh)
        header = None
        lineno = 0
        while (line := source.readline()) is not None:
            lineno += 1
            s = line.strip()
            if s and not s.startswith("#"):
                header = [h.strip() for h in s.split(",")]
                break
        if header is None:
            raise InputError("no header row", path)
        if tuple(header[:len(ESTIMATE_COLUMNS)]) != ESTIMATE_COLUMNS:
            raise InputError("the first columns must be " + ", ".join(ESTIMATE_COLUMNS), path, lineno)
        seen = set()
        for name in header:
            if name in seen:
                raise InputError("column appears twice", path, lineno, name)
            seen.add(name)
        parts = []
        utc_at = header.index("utc") if "utc" in header else None
        while (parsed := source.parse(READ_CHUNK_ROWS, len(header))) is not None:
            if utc_at is None and parsed.ok.all():      # every line numbers the compiled parser read exactly
                values = parsed.values
                line_numbers = np.arange(lineno + 1, lineno + 1 + len(parsed))
            else:
                lines = parsed[:]
                if utc_at is not None:      # ISO 8601 text (as written) -> POSIX seconds
                    from fieldvane.io.utc_text import utc_lines_to_numbers
                    lines = utc_lines_to_numbers(lines, utc_at, path, lineno + 1)
                values = fast_parse_lines(lines, len(header))
                if values is not None:
                    line_numbers = np.arange(lineno + 1, lineno + 1 + len(lines))
                else:
                    values, line_numbers = _parse_lines_one_by_one(lines, header, path, lineno + 1)
            _check_flags(values, line_numbers, header, path)
            parts.append(values)
            lineno += len(parsed)
    data = np.concatenate(parts) if parts else np.empty((0, len(header)))
    out = {name: data[:, i] for i, name in enumerate(header)}
    out["flags"] = out["flags"].astype(np.int64)
    return out


def _parse_lines_one_by_one(lines: list[str], header: list[str], path: str,
                            first_line: int) -> tuple[np.ndarray, np.ndarray]:
    """Return (values, line numbers) of data lines (blank and comment lines dropped); InputError at the first bad one."""
    rows, numbers, ncol = [], [], len(header)
    for k, line in enumerate(lines):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        fields = s.split(",")
        if len(fields) != ncol:
            raise InputError(f"expected {ncol} fields, found {len(fields)}", path, first_line + k)
        row = []
        for name, text in zip(header, fields):
            text = text.strip()
            try:
                row.append(float(text) if text else np.nan)
            except ValueError:
                raise InputError(f"not a number ({text[:30]!r})", path, first_line + k, name) from None
        rows.append(row)
        numbers.append(first_line + k)
    return np.array(rows, float).reshape(-1, ncol), np.array(numbers, np.int64)


def _check_flags(values: np.ndarray, line_numbers: np.ndarray, header: list[str], path: str) -> None:
    """Raise InputError naming the line when a flags value is not a non-negative integer."""
    flags = values[:, header.index("flags")]
    bad = ~(np.isfinite(flags) & (flags >= 0) & (flags == np.floor(flags)) & (flags < 2.0 ** 53))
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"not a non-negative integer ({float(flags[k])!r})", path, int(line_numbers[k]), "flags")
