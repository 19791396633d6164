"""One live batch of estimate records as columns: what the live loop hands each logger once per batch.

The float64 columns sit in one (N, F) matrix and the int64 ones in one (N, I) matrix, so that a logger
joins the dozens of small batches it gathers with two array calls instead of one per column (at 10 kHz
the per-column joins cost the CSV logger more than its formatting). A logger that writes text in compiled
blocks (the CSV logger) formats the columns directly; any other takes the rows, the same dicts that
`Estimate.row()` gives (name -> float or int, in column order).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

_F8, _I8 = np.dtype(np.float64), np.dtype(np.int64)
_LAYOUTS: dict[tuple, dict] = {}        # one layout object per set of columns: blocks alike are told by identity
_ADDED: dict[tuple, tuple] = {}         # (layout id, added names) -> (that layout, names, the layout with them)


class RowBlock(Sequence):
    """N estimate records as columns (estimates CSV names, in order); rows are dicts, made on demand.

    The arrays are shared, not copied: whoever makes a block leaves its arrays unchanged afterwards.
    """

    __slots__ = ("names", "floats", "ints", "others", "_where", "_n", "_rows")

    def __init__(self, columns: Mapping[str, np.ndarray]):
        arrays = {k: v if isinstance(v, np.ndarray) else np.asarray(v) for k, v in columns.items()}
        lengths = {v.shape[0] for v in arrays.values()}
        if len(lengths) > 1:
            raise ValueError(f"columns of different lengths: {sorted(lengths)}")
        n = lengths.pop() if lengths else 0
        fnames = [k for k, v in arrays.items() if v.dtype == _F8 and v.ndim == 1]
        inames = [k for k, v in arrays.items() if v.dtype == _I8 and v.ndim == 1]
        floats = np.empty((n, len(fnames)))
        for j, k in enumerate(fnames):
            floats[:, j] = arrays[k]
        ints = np.empty((n, len(inames)), np.int64)
        for j, k in enumerate(inames):
            ints[:, j] = arrays[k]
        others = {k: v for k, v in arrays.items() if k not in set(fnames) | set(inames)}
        names = tuple(arrays)
        self._fill(names, _layout(names, fnames, inames, others), floats, ints, others)

    @classmethod
    def _made(cls, names, where, floats, ints, others) -> RowBlock:
        block = cls.__new__(cls)
        block._fill(names, where, floats, ints, others)
        return block

    def _fill(self, names, where, floats, ints, others) -> None:
        self.names, self._where, self.floats, self.ints, self.others = names, where, floats, ints, others
        self._n, self._rows = floats.shape[0], None

    @classmethod
    def of_layout(cls, layout: tuple[tuple[str, ...], dict], floats: np.ndarray, ints: np.ndarray) -> RowBlock:
        """Return a block of float64 (N, F) and int64 (N, I) matrices laid out as matrix_layout() said (the live
        path: the layout made once, the block per batch)."""
        return cls._made(layout[0], layout[1], floats, ints, {})

    def __len__(self) -> int:
        return self._n

    def __getitem__(self, index):
        """Row i as a dict, or a slice of rows as a RowBlock."""
        if isinstance(index, slice):
            return RowBlock._made(self.names, self._where, self.floats[index], self.ints[index],
                                  {k: v[index] for k, v in self.others.items()})
        return self.rows()[index]

    def __iter__(self):
        return iter(self.rows())

    def keys(self):
        """Return the column names in order (every row's keys)."""
        return self.names

    def column(self, name: str) -> np.ndarray:
        """Return one column, (N,)."""
        group, j = self._where[name]
        return self.floats[:, j] if group == "f" else self.ints[:, j] if group == "i" else self.others[j]

    @property
    def columns(self) -> dict[str, np.ndarray]:
        """Return name -> (N,) column, in order."""
        return {k: self.column(k) for k in self.names}

    def rows(self) -> list[dict]:
        """Return the records as dicts of Python floats and ints, keys in column order (made once)."""
        if self._rows is None:
            lists = [self.column(k).tolist() for k in self.names]
            self._rows = [dict(zip(self.names, values)) for values in zip(*lists)]
        return self._rows

    def with_columns(self, more: Mapping[str, np.ndarray]) -> RowBlock:
        """Return a block with these columns added after the others (the matrices shared, not copied)."""
        more = {k: np.asarray(v) for k, v in more.items()}
        if any(v.shape != (self._n,) for v in more.values()):
            raise ValueError(f"added columns must have {self._n} rows")
        others = dict(self.others)
        others.update(more)
        key = (id(self._where), tuple(more))
        known = _ADDED.get(key)
        if known is None or known[0] is not self._where:
            names = self.names + tuple(k for k in more if k not in self._where)      # a replaced column keeps its place
            if any(self._where.get(k, ("o",))[0] != "o" for k in more):      # a matrix column replaced: rebuild
                return RowBlock({k: others[k] if k in others else self.column(k) for k in names})
            where = dict(self._where)
            where.update({k: ("o", k) for k in more})
            known = (self._where, names, where)
            if len(_ADDED) < 1024:
                _ADDED[key] = known
        return RowBlock._made(known[1], known[2], self.floats, self.ints, others)

    @staticmethod
    def join(blocks: Sequence[RowBlock]) -> RowBlock | None:
        """Return blocks with the same columns as one (None when their columns differ or there are none)."""
        if not blocks:
            return None
        first = blocks[0]
        if len(blocks) == 1:
            return first
        if any(b._where is not first._where for b in blocks):
            return None
        return RowBlock._made(first.names, first._where, np.concatenate([b.floats for b in blocks]),
                              np.concatenate([b.ints for b in blocks]),
                              {k: np.concatenate([b.others[k] for b in blocks]) for k in first.others})


def _layout(names: tuple, float_names, int_names, others) -> dict:
    """Return where each column is, name -> ("f", matrix column) / ("i", matrix column) / ("o", name); one object
    per layout."""
    key = (names, tuple(float_names), tuple(int_names), tuple(others))
    where = _LAYOUTS.get(key)
    if where is None:
        where = {k: ("f", j) for j, k in enumerate(float_names)}
        where.update({k: ("i", j) for j, k in enumerate(int_names)})
        where.update({k: ("o", k) for k in others})
        if len(_LAYOUTS) < 1024:                # (a handful in practice: one per set of options)
            _LAYOUTS[key] = where
    return where


def matrix_layout(names: Sequence[str], float_names: Sequence[str], int_names: Sequence[str]
                  ) -> tuple[tuple[str, ...], dict]:
    """Return (names, layout) of blocks whose float and int matrix columns are these names, for RowBlock.of_layout."""
    return tuple(names), _layout(tuple(names), float_names, int_names, {})
