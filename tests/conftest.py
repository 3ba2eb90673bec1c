"""Test configuration: single-threaded BLAS.

The package's hot paths are many small matrix operations (15 x 15 to 64 x 64); multithreaded
BLAS only adds synchronization cost there, and on a loaded machine it can be hundreds of times
slower.  Set before numpy is first imported.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
