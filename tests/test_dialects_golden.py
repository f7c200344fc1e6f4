"""Generated-only targets (BigQuery, Snowflake, Trino, Redshift, Databricks, T-SQL): the SQL
for a representative set of charts equals the reviewed golden files under
tests/golden/<dialect>/ (regenerate with ``python tests/regen_golden.py`` and review the
diff), and every file parses back with sqlglot in that dialect (outside reference: sqlglot's
own parser for the target). A case the dialect cannot express is a ``.refused`` file with
the 422 message the capability table promises."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest
import sqlglot

from planner.dialects import get_dialect

_spec = importlib.util.spec_from_file_location("sluice_regen_golden",
                                               Path(__file__).with_name("regen_golden.py"))
regen = importlib.util.module_from_spec(_spec)
sys.modules["sluice_regen_golden"] = regen
_spec.loader.exec_module(regen)

PAIRS = [(d, c) for d in regen.GENERATED_ONLY for c in regen.CASES]


@pytest.mark.parametrize("dialect,case", PAIRS)
def test_golden_sql(dialect: str, case: str):
    suffix, text = regen.render(dialect, case)
    path = regen.GOLDEN / dialect / f"{case}.{suffix}"
    assert path.exists(), f"missing {path}: run python tests/regen_golden.py and review"
    assert text == path.read_text(encoding="utf-8"), \
        f"{path} is out of date: run python tests/regen_golden.py and review the diff"
    if suffix == "refused":
        assert text.startswith(f"not supported on {dialect}: ")
        return
    tree = sqlglot.parse_one(text.rstrip().rstrip(";"), read=get_dialect(dialect).sqlglot)
    assert isinstance(tree, sqlglot.exp.Select)


def test_no_stray_golden_files():
    expected = {f"{d}/{c}.{regen.render(d, c)[0]}" for d, c in PAIRS}
    found = {f"{p.parent.name}/{p.name}" for p in regen.GOLDEN.rglob("*") if p.is_file()}
    assert found == expected
