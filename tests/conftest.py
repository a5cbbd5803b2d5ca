"""Test-session settings shared by every test module."""

import os

# The plasma fit and the calibrator do many small matrix steps; multithreaded
# BLAS on a 2-core machine only adds contention there (measured 5-100x slower
# under load). Parallelism in this project comes from processes (batch.py).
# Must be set before numpy is first imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")
