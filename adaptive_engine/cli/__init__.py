"""The ``adaptive-engine`` command line: thin click commands over the library.

Each command parses its options, calls one library function, prints the result, and turns
the library's :class:`~adaptive_engine.errors.AdaptiveEngineError` into a message on
stderr (one ``LOCATION: problem`` line per problem) and exit code 2.

Commands live in one module per concern and register themselves on :data:`main`.
"""

from __future__ import annotations

# Each import registers that module's commands on ``main``.
from . import (
    bank_commands,  # noqa: F401,E402
    calibrate_commands,  # noqa: F401,E402
    design_commands,  # noqa: F401,E402
    release_commands,  # noqa: F401,E402
    score_commands,  # noqa: F401,E402
    service_commands,  # noqa: F401,E402
    session_commands,  # noqa: F401,E402
    simulate_commands,  # noqa: F401,E402
)
from ._common import main  # noqa: F401  (the group every command module registers on)
