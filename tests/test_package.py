"""The package's shape: the public names at the top, lazily loaded; few top-level modules."""

from __future__ import annotations

import importlib
import os
import pkgutil
import subprocess
import sys
from pathlib import Path

import adaptive_engine
from adaptive_engine import api, errors

ROOT = Path(__file__).resolve().parents[1]


def test_the_public_api_is_exported_at_the_top():
    from adaptive_engine.bank import load_bank, read_responses
    from adaptive_engine.calibration import calibrate_responses
    from adaptive_engine.design import read_design
    from adaptive_engine.live import open_store, start_session, submit_answer
    from adaptive_engine.simulation.engine import simulate

    expected = dict(load_bank=load_bank, read_responses=read_responses, read_design=read_design,
                    open_store=open_store, start_session=start_session, submit_answer=submit_answer,
                    simulate=simulate, calibrate=calibrate_responses)
    for name, value in expected.items():
        assert getattr(adaptive_engine, name) is value, name
        assert name in adaptive_engine.__all__ and name in dir(adaptive_engine)
    for name in ("AdaptiveEngineError", "BankError", "DesignError", "SessionError", "CalibrationError",
                 "ResponseDataError", "OutputError"):
        assert getattr(adaptive_engine, name) is getattr(errors, name)
    # the embedding API keeps working and hands out the same objects
    assert api.read_design is read_design and api.start_session is start_session and api.open_store is open_store
    assert not hasattr(adaptive_engine, "no_such_name")


def test_importing_the_package_loads_no_numerical_library():
    # the command line's start-up and `import adaptive_engine` stay cheap: numpy/scipy come
    # with the first entry point used, not with the package
    code = ("import sys, adaptive_engine; "
            "print(sorted(m for m in ('numpy', 'scipy', 'attrs') if m in sys.modules))")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_read_design_lives_in_one_module():
    # defined in design.toml_file; re-exported only by the design package, the top level and api
    holders = set()
    for info in pkgutil.walk_packages(adaptive_engine.__path__, "adaptive_engine."):
        module = importlib.import_module(info.name)
        if "read_design" in dir(module):  # dir: also a name the package loads on first use
            holders.add(info.name)
    assert holders == {"adaptive_engine.design", "adaptive_engine.design.toml_file", "adaptive_engine.api"}
    assert adaptive_engine.design.toml_file.read_design.__module__ == "adaptive_engine.design.toml_file"


def test_few_modules_at_the_top_level():
    top = sorted(p.name for p in (ROOT / "adaptive_engine").glob("*.py"))
    assert len(top) <= 8, top


def test_no_module_reaches_into_another_modules_private_names():
    # a name with a leading underscore is its module's own; a shared helper is made public
    import ast

    offences = []
    for path in sorted((ROOT / "adaptive_engine").rglob("*.py")):
        tree = ast.parse(path.read_text())
        imported = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.level or (node.module or "").startswith("adaptive_engine")):
                for alias in node.names:
                    imported.add(alias.asname or alias.name)
                    if alias.name.startswith("_") and not alias.name.startswith("__"):
                        offences.append(f"{path.relative_to(ROOT)}:{node.lineno} imports {alias.name}")
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and node.attr.startswith("_") and not node.attr.startswith("__")
                    and isinstance(node.value, ast.Name) and node.value.id not in ("self", "cls")):
                offences.append(f"{path.relative_to(ROOT)}:{node.lineno} uses {node.value.id}.{node.attr}")
    assert offences == []
