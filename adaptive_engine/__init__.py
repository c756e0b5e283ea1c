"""adaptive_engine: computerized adaptive testing with item response theory.

One decision kernel, two drivers.  The package is layered; a module imports only from its
own layer and the layers below (checked by import-linter, see DEVELOPERS.md):

* :mod:`.cli` -- the ``adaptive-engine`` command, a thin layer over the rest;
* :mod:`.live` (session store, sessions), :mod:`.simulation` (simulated examinees and the
  studies built on them), :mod:`.calibration` (bank maintenance) -- the drivers;
* :mod:`.kernel` -- everything that decides what happens in a test;
* :mod:`.design` -- test designs: types, the TOML file, the check against a bank;
* :mod:`.bank` -- item banks, their files and summaries, response data;
* :mod:`.irt` -- response models, posterior, scoring, person fit, curves.

The main entry points are importable from here (loaded on first use, so that
``import adaptive_engine`` stays cheap): :func:`load_bank`, :func:`read_design`,
:func:`open_store`, :func:`start_session`, :func:`submit_answer`, :func:`simulate`,
:func:`calibrate` (MML-EM calibration of a response table, with :func:`read_responses`
to read one) and the error types.  :mod:`adaptive_engine.api` is the embedding API for
delivery apps.
"""

from .errors import (
    AdaptiveEngineError,
    BankError,
    CalibrationError,
    DesignError,
    OutputError,
    ResponseDataError,
    SessionError,
    SimulationError,
)

__version__ = "0.1.0"

#: Public name -> (module, name in that module), imported on first use.
_LAZY = {
    "load_bank": ("adaptive_engine.bank.item_bank", "load_bank"),
    "read_responses": ("adaptive_engine.bank.responses", "read_responses"),
    "read_design": ("adaptive_engine.design.toml_file", "read_design"),
    "open_store": ("adaptive_engine.live.store", "open_store"),
    "start_session": ("adaptive_engine.live.session", "start_session"),
    "submit_answer": ("adaptive_engine.live.session", "submit_answer"),
    "simulate": ("adaptive_engine.simulation.engine", "simulate"),
    "calibrate": ("adaptive_engine.calibration.em", "calibrate_responses"),
}

__all__ = [
    "AdaptiveEngineError", "BankError", "CalibrationError", "DesignError", "OutputError",
    "ResponseDataError", "SessionError", "SimulationError", *_LAZY,
]


def __getattr__(name: str):
    # numpy and scipy cost a few hundred milliseconds: load an entry point only when used
    if name in _LAZY:
        import importlib

        module, attribute = _LAZY[name]
        value = getattr(importlib.import_module(module), attribute)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
