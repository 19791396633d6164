"""Products with tall matrices, done in row blocks so each BLAS call stays small.

A tall product such as J^T J (tens of thousands of rows, tens of columns) is one large BLAS call
that OpenBLAS spreads over threads; on a machine whose cores are busy (or a process pinned to one
core) those threads wait on each other and the call can take tens of times longer. Blocks of
ROWS rows keep every call below the library's threading threshold, at the cost of a Python loop
over the blocks (negligible beside the arithmetic).
"""

from __future__ import annotations

import numpy as np

ROWS = 128


def gram(a: np.ndarray, b: np.ndarray | None = None) -> np.ndarray:
    """Return a^H b (conjugate transpose of a times b) for tall a (N, p) and b (N, q) or (N,); b = a when None."""
    b = a if b is None else b
    conj = np.iscomplexobj(a)
    out = None
    for start in range(0, a.shape[0], ROWS):
        blk = a[start:start + ROWS]
        part = (blk.conj() if conj else blk).T @ b[start:start + ROWS]
        out = part if out is None else out + part
    if out is None:
        return np.zeros((a.shape[1],) + b.shape[1:], dtype=np.result_type(a, b))
    return out


def rows_times(a: np.ndarray, m: np.ndarray) -> np.ndarray:
    """Return a @ m for tall a (N, p) and small m (p, q) or (p,), row block by row block."""
    out = np.empty((a.shape[0],) + m.shape[1:], dtype=np.result_type(a, m))
    for start in range(0, a.shape[0], ROWS):
        out[start:start + ROWS] = a[start:start + ROWS] @ m
    return out
