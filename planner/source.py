"""The rows a plan reads: one function every stage takes its FROM from.

Every statement sluice writes for a source — extents, the grouped chart, the top-N ranking,
M4, column profiles, row counts — reads ``relation(schema, dialect)``: the source table as
``"s"``. The source model (computed columns, dimension joins, a key's row condition; see
DESIGN.md "Source model") extends this one function, so no statement can read the table
around it. Pure (no I/O).
"""

from __future__ import annotations

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.schema import SourceSchema

#: the alias every statement gives the source rows (columns are referenced as ``"s"."col"``)
ALIAS = "s"


def relation(schema: SourceSchema, d: Dialect) -> exp.Expression:
    """The source rows aliased ``"s"``."""
    return exp.alias_(d.table(schema.table), ALIAS, quoted=True)
