"""Shared test set-up: one BLAS thread per process (the suite itself runs serially on 2 cores)."""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
