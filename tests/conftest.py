"""Shared test settings: one BLAS thread (the matrices here are small; threads only fight over the cores)."""

import os

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")
# Every kernel call's arrays checked, the ones the live path trusts too (fieldvane/kernels.py bind)
os.environ.setdefault("FIELDVANE_CHECK_KERNELS", "1")
