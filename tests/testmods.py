"""Load a helper module of tests/ by file path under one name per process.

Test modules share fixture modules (engine_fixtures, refdata, ...) through this loader so
each exists once per process whatever imports it first (chdb, for one, allows a single data
folder per process). ``sys.modules`` key: ``sluice_test_<name>``, as tests/conftest.py uses.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path
from types import ModuleType


def load(name: str) -> ModuleType:
    key = f"sluice_test_{name}"
    if key in sys.modules:
        return sys.modules[key]
    spec = importlib.util.spec_from_file_location(key, Path(__file__).with_name(f"{name}.py"))
    mod = importlib.util.module_from_spec(spec)
    sys.modules[key] = mod
    spec.loader.exec_module(mod)
    return mod
