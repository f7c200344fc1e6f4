"""The rows a plan reads: one function every stage takes its FROM from.

Every statement sluice writes for a source — extents, the grouped chart, the top-N ranking,
M4, column profiles, row counts — reads ``relation(schema, dialect)``: the source table as
``"s"``. The source model (computed columns, dimension joins, a key's row condition; see
DESIGN.md "Source model") extends this one function, so no statement can read the table
around it. Pure (no I/O).

A key's row condition (``SourceSchema.rows``, from ``[[keys]] rows``) makes the relation a
derived table, ``(SELECT * FROM <table> AS "s" WHERE <condition>) AS "s"``: the request's
own ``where`` and ``filter_sql`` apply outside it, so nothing a request writes (an ``OR``,
a parenthesis, a comment) can reach around the condition. The condition passes the
``filter_sql`` allow-list (``planner.filter_sql``), rebuilt for the target dialect, with
offset-less instants read in UTC (never in the request's zone).
"""

from __future__ import annotations

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.errors import PlanError
from planner.filter_sql import compile_filter_sql
from planner.schema import SourceSchema

#: the alias every statement gives the source rows (columns are referenced as ``"s"."col"``)
ALIAS = "s"


def row_condition(schema: SourceSchema, d: Dialect) -> exp.Expression | None:
    """The key's row condition for ``d``; a condition that does not fit the source (a column
    gone since start-up) is a 503 naming no request field: the operator's config is wrong."""
    if schema.rows is None:
        return None
    try:
        return compile_filter_sql(schema.rows, schema, d, tz="UTC")
    except PlanError as e:
        raise PlanError("", f"this API key's row condition on source {schema.name!r} cannot "
                        f"be applied ({e.detail}); the operator must fix its [[keys]] rows",
                        slug="row-condition-invalid", title="Row condition invalid",
                        status=503) from None


def relation(schema: SourceSchema, d: Dialect) -> exp.Expression:
    """The source rows aliased ``"s"`` (only the key's rows, when it has a condition)."""
    table = exp.alias_(d.table(schema.table), ALIAS, quoted=True)
    cond = row_condition(schema, d)
    if cond is None:
        return table
    return exp.select(exp.Star()).from_(table).where(cond).subquery(ALIAS, copy=False)
