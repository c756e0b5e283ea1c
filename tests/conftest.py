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


def pytest_addoption(parser, pluginmanager):
    # pyproject.toml's addopts run the suite on two workers (pytest-xdist, the test extra).
    # Without the plugin (not installed, or ``-p no:xdist``) its two options would be
    # unknown and pytest would refuse to start: take them and run in this one process.
    if not pluginmanager.has_plugin("xdist"):
        for option in ("--numprocesses", "--dist"):
            parser.addoption(option, help="(pytest-xdist is not in use: ignored, the tests run in this process)")


def pytest_collection_modifyitems(config, items):
    # On the workers of pytest-xdist, the tests marked long_running come first: the
    # scheduler hands tests out in collection order, so a test of several seconds started
    # last would keep one core busy while the other waits at the end.  A run in one
    # process keeps the files' order.
    if os.environ.get("PYTEST_XDIST_WORKER"):
        items.sort(key=lambda item: item.get_closest_marker("long_running") is None)  # stable
