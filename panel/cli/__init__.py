"""The ``riskprem`` command line: one module per command group; all printing lives here."""

import os

# riskprem's matrices are small: multi-threaded BLAS only adds overhead (measured up to 30x slower
# on a 2-core machine).  Set before numpy loads; an explicit setting in the environment wins.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
