"""The ``adaptive-engine`` command line: thin click commands over the library.

Each command parses its options, calls one library function, prints the result, and turns
the library's :class:`~adaptive_engine.errors.AdaptiveEngineError` into a message on
stderr (one ``LOCATION: problem`` line per problem) and exit code 2.

Commands live in one module per concern and register themselves on :data:`main`, which
imports a module only when one of its commands runs (a short-lived call stays quick).
"""

from __future__ import annotations

# Each command module registers its commands on ``main`` when it is imported; ``main``
# imports a command's module when that command runs (``_common.COMMAND_MODULES``).
from ._common import COMMAND_MODULES, main  # noqa: F401
