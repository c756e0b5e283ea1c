"""Optional extras of the package, seen from the tests: one way to skip for each.

Tests that need the ``plots`` extra carry ``@requires_matplotlib``; without matplotlib they
are skipped with the same reason everywhere (and the behaviour without it is tested
separately, by hiding the module).
"""

from __future__ import annotations

import importlib.util

import pytest

HAVE_MATPLOTLIB = importlib.util.find_spec("matplotlib") is not None

requires_matplotlib = pytest.mark.skipif(
    not HAVE_MATPLOTLIB, reason="needs the 'plots' extra (matplotlib), which is not installed")
