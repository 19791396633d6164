"""Replay's pipeline threads (io/pipeline.py), the --force replacement of an output (io/outputs.py) and the
median without numpy.ma (estimator/median.py, against numpy.median)."""

import os
import threading
import time

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from fieldvane.estimator.median import median
from fieldvane.io.outputs import atomic_file
from fieldvane.io.pipeline import Background, ReadAhead, WriteBehind


def test_read_ahead_yields_in_order_and_raises_where_the_source_failed():
    def source():
        for k in range(5):
            yield k
        raise ValueError("line 6: bad")

    got = []
    with pytest.raises(ValueError, match="line 6"):
        for item in ReadAhead(source()):
            got.append(item)
    assert got == [0, 1, 2, 3, 4]


def test_read_ahead_runs_ahead_in_its_own_thread_and_stops_when_closed():
    produced = []
    three = threading.Event()

    def source():
        for k in range(1000):
            produced.append((k, threading.current_thread().name))
            if k == 2:
                three.set()
            yield k

    ahead = ReadAhead(source(), depth=2)
    assert three.wait(10)                                       # produced before anyone asked
    assert {name for _, name in produced} == {"fieldvane-read"}
    it = iter(ahead)
    assert next(it) == 0
    ahead.close()
    assert not ahead._thread.is_alive()
    assert len(produced) < 10                                   # it stopped, far from the end


def test_background_and_write_behind_hand_errors_to_the_waiting_thread():
    assert Background(sum, [1, 2, 3]).result() == 6
    with pytest.raises(ZeroDivisionError):
        Background(lambda: 1 / 0).result()
    order = []
    behind = WriteBehind()
    for k in range(5):
        behind.submit(lambda k=k: (time.sleep(0.002 * (k % 2)), order.append(k)))
    behind.finish()
    assert order == [0, 1, 2, 3, 4]
    behind.submit(lambda: 1 / 0)
    behind.finish(raise_error=False)                            # a failed replay ends quietly here


def test_force_replaces_an_output_and_keeps_the_old_one_if_the_rename_fails(tmp_path, monkeypatch):
    out = tmp_path / "est.csv"
    out.write_text("old\n")
    with atomic_file(out) as tmp:
        tmp.write_text("new\n")
    assert out.read_text() == "new\n" and sorted(p.name for p in tmp_path.iterdir()) == ["est.csv"]

    real_replace = os.replace

    def failing(src, dst):
        if str(src).endswith(f"partial-{os.getpid()}"):
            raise OSError(28, "No space left on device")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", failing)
    with pytest.raises(OSError, match="No space"):
        with atomic_file(out) as tmp:
            tmp.write_text("newer\n")
    assert out.read_text() == "new\n" and sorted(p.name for p in tmp_path.iterdir()) == ["est.csv"]


_values = st.lists(st.one_of(st.floats(allow_nan=False), st.sampled_from([0.0, -0.0, 1.0, -1.0, np.inf, -np.inf])),
                   max_size=40)


@settings(max_examples=300, deadline=None)
@given(values=_values, with_nan=st.booleans())
def test_median_equals_numpys(values, with_nan):
    a = np.array(values + ([np.nan] if with_nan else []), float)
    if a.size == 0:
        assert np.isnan(median(a))
        return
    with np.errstate(invalid="ignore", over="ignore"):
        ref = float(np.median(a))                              # reference: numpy.median
    got = median(a)
    same_bits = np.float64(got).view(np.uint64) == np.float64(ref).view(np.uint64)     # -0.0 is not 0.0 here
    assert same_bits or (np.isnan(got) and np.isnan(ref)), (values, got, ref)
