"""Settings for the whole test suite.

One BLAS thread per process.  numpy's OpenBLAS starts a pool of threads at import and
spreads every matrix product over it; on a machine with two busy cores those threads wait
on each other and the small products of the tests run several times slower than on one
thread.  The pool's size is read once, when numpy is first imported, so it is set here,
before any test module is imported (no pytest plugin in use imports numpy earlier).
Subprocesses started by the tests inherit the setting.  A value already in the
environment wins.
"""

import os

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")
