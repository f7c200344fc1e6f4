"""schemathesis fuzzing of the routes other than POST /v1/chart (machinery, fixture and the
no-5xx property live in tests/test_fuzz.py; a separate file so xdist runs both at once)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

pytest.importorskip("schemathesis")


def _fuzz_module():
    name = "sluice_test_fuzz"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name("test_fuzz.py"))
        mod = importlib.util.module_from_spec(spec)
        sys.modules[name] = mod
        spec.loader.exec_module(mod)
    return sys.modules[name]


fz = _fuzz_module()
schema = fz.schema  # the module-scoped fixture: a fixture DuckDB behind create_app
CASES = fz.ROUTE_CASES


@pytest.mark.parametrize("path,method,mode", list(CASES), ids=[f"{m} {p} {g.value}" for p, m, g in CASES])
def test_no_5xx(schema, path, method, mode):
    fz.check_operation(schema, path, method, mode, CASES[(path, method, mode)])
