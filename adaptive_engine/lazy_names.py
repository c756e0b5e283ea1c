"""Package namespaces whose public names are loaded from their modules on first use.

A subpackage's ``__init__`` lists its public names and the module of each; importing one
module of the package then does not import the others, so a short command-line call
(``session answer``) pays only for what it uses.  Like :mod:`.errors`, this module imports
no subpackage, so every layer may use it.
"""

from __future__ import annotations

import importlib
from typing import Callable


def lazy_namespace(package: str, modules: dict[str, str], namespace: dict) -> tuple[Callable, Callable]:
    """The module-level ``__getattr__`` and ``__dir__`` of ``package`` (PEP 562).

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    modules : dict
        Public name -> the package's module that defines it.
    namespace : dict
        The package's ``globals()``: a name is kept there once loaded.
    """
    def __getattr__(name: str):
        if name in modules:
            value = getattr(importlib.import_module(f"{package}.{modules[name]}"), name)
            namespace[name] = value
            return value
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    def __dir__() -> list[str]:
        return sorted(set(namespace) | set(modules))

    return __getattr__, __dir__
