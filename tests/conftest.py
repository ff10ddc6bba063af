"""Test-wide settings: one BLAS/OpenMP thread per process, as the CLI uses.

Small matrices run ~10x slower with two competing threads; this must be set
before NumPy is first imported, hence here.
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
