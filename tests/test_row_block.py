"""RowBlock, a live batch's records as columns: rows, slices, added columns and joins give the records they hold."""

import math

import numpy as np
import pytest

from fieldvane.io.row_block import RowBlock, matrix_layout


def _columns(n, seed=1):
    rng = np.random.default_rng(seed)
    return {"t": np.arange(n) * 1e-4, "ux": rng.normal(size=n), "flags": rng.integers(0, 99, n),
            "ok": np.arange(n) % 2 == 0, "nis": rng.chisquare(2, n)}


def _same(a, b):
    """Rows equal value for value and type for type (nan equals nan)."""
    assert len(a) == len(b)
    for x, y in zip(a, b):
        assert list(x) == list(y)
        for k in x:
            assert type(x[k]) is type(y[k]), k
            assert x[k] == y[k] or (math.isnan(x[k]) and math.isnan(y[k])), k


def test_rows_are_the_columns_values_in_order_with_python_types():
    cols = _columns(5)
    cols["nis"][2] = math.nan
    block = RowBlock(cols)
    want = [{k: v[i].item() for k, v in cols.items()} for i in range(5)]
    _same(block.rows(), want)
    assert type(block[0]["ok"]) is bool and type(block[0]["flags"]) is int     # a bool column stays bool
    assert block.floats.shape == (5, 3) and block.ints.shape == (5, 1) and list(block.others) == ["ok"]
    assert list(block.keys()) == list(cols) and len(block) == 5 and block[-1] == block.rows()[-1]
    _same(list(block[1:4]), want[1:4])
    assert np.array_equal(block.column("flags"), cols["flags"])
    assert len(RowBlock({})) == 0 and list(RowBlock({})) == []
    with pytest.raises(ValueError, match="different lengths"):
        RowBlock({"t": np.zeros(2), "ux": np.zeros(3)})


def test_added_columns_go_last_and_a_replaced_one_keeps_its_place():
    block = RowBlock(_columns(4))
    more = block.with_columns({"utc": np.full(4, 1.8e9), "site": np.arange(4)})
    assert list(more.keys()) == ["t", "ux", "flags", "ok", "nis", "utc", "site"]
    assert more.floats is block.floats                      # the matrices shared, not copied
    assert more[3]["utc"] == 1.8e9 and more[3]["site"] == 3
    again = block.with_columns({"utc": np.full(4, 2.0e9), "site": np.arange(4)})
    assert again._where is more._where and again[0]["utc"] == 2.0e9             # the same layout, made once
    replaced = block.with_columns({"ux": np.arange(4) * 1.0})
    assert list(replaced.keys()) == list(block.keys()) and [r["ux"] for r in replaced] == [0.0, 1.0, 2.0, 3.0]
    with pytest.raises(ValueError, match="4 rows"):
        block.with_columns({"utc": np.zeros(3)})


def test_blocks_of_one_layout_join_into_their_records_in_order():
    names = ("t", "b_nT", "flags")
    layout = matrix_layout(names, ("t", "b_nT"), ("flags",))
    blocks = [RowBlock.of_layout(layout, np.array([[i, 100.0 + i]]), np.array([[i]])) for i in range(3)]
    blocks = [b.with_columns({"utc": np.array([1.8e9 + i])}) for i, b in enumerate(blocks)]
    joined = RowBlock.join(blocks)
    _same(joined.rows(), [r for b in blocks for r in b])
    assert RowBlock.join(blocks[:1]) is blocks[0] and RowBlock.join([]) is None
    other = RowBlock.of_layout(matrix_layout(names, ("b_nT", "t"), ("flags",)), np.zeros((1, 2)), np.zeros((1, 1), np.int64))
    assert RowBlock.join([blocks[0].with_columns({}), other]) is None                # another layout: not joined
    assert RowBlock.of_layout(matrix_layout(("t", "flags"), ("t",), ("flags",)), np.zeros((2, 1)), np.ones((2, 1), np.int64))[1] == {"t": 0.0, "flags": 1}
