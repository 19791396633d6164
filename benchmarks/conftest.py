"""Benchmarks run with `pytest benchmarks --benchmark-enable`; they are outside the default test run."""

import os

import pytest


@pytest.fixture(scope="module", autouse=True)
def one_core():
    """Pin the process (and its BLAS threads) to a single CPU for a one-core figure."""
    if not hasattr(os, "sched_setaffinity"):
        yield
        return
    before = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {min(before)})
    yield
    os.sched_setaffinity(0, before)
