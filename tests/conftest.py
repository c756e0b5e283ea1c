"""Settings for the whole test suite.

One BLAS thread per process.  numpy's OpenBLAS starts a pool of threads at import and
spreads every matrix product over it; on a machine with two busy cores those threads wait
on each other and the small products of the tests run several times slower than on one
thread.  The pool's size is read once, when numpy is first imported, so it is set here,
before any test module is imported (no pytest plugin in use imports numpy earlier).
Subprocesses started by the tests inherit the setting.  A value already in the
environment wins.  Bytecode caching is left on (Python's default) even where the
environment turns it off, so the command-line processes the tests start reuse compiled
modules.
"""

import os
import sys
import warnings

if "numpy" in sys.modules:  # too late: a plugin imported numpy before this file
    warnings.warn("numpy was imported before tests/conftest.py: its BLAS keeps the threads it started with",
                  stacklevel=1)
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

# Python's default bytecode cache, also where the environment turns it off
# (PYTHONDONTWRITEBYTECODE): the suite starts about a hundred command-line processes, and
# without the cache each one compiles the package's modules from source again.
os.environ.pop("PYTHONDONTWRITEBYTECODE", None)
sys.dont_write_bytecode = False

