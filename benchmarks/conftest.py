"""Benchmarks run with `pytest benchmarks --benchmark-enable`; they are outside the default test run."""

import os

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):   # before numpy: one BLAS thread
    os.environ.setdefault(_name, "1")

import pytest  # noqa: E402


@pytest.fixture(scope="module", autouse=True)
def one_core(request):
    """Pin the process (and its BLAS threads) to a single CPU for a one-core figure (not where a module sets
    BOTH_CORES = True: a whole command measured as it runs, threads and all)."""
    if not hasattr(os, "sched_setaffinity") or getattr(request.module, "BOTH_CORES", False):
        yield
        return
    before = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {min(before)})
    yield
    os.sched_setaffinity(0, before)

