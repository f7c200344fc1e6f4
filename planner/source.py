"""The rows a plan reads: one function every stage takes its FROM from.

Every statement sluice writes for a source — extents, the grouped chart, the top-N ranking,
M4, column profiles, row counts — reads ``relation(schema, dialect)``: the source table as
``"s"``. The source model (computed columns, dimension joins, a key's row condition; see
DESIGN.md "Source model") extends this one function, so no statement can read the table
around it. Pure (no I/O).

When a request uses computed or dimension columns (``SourceSchema.joined``, set by bind),
the relation is a derived table that gives them as plain columns::

    (SELECT "s".*, <expr> AS "fee_per_km", "_sluice_d0"."city" AS "depots.city"
     FROM <fact> AS "s" LEFT JOIN <depots> AS "_sluice_d0" ON "s"."depot" = "_sluice_d0"."depot"
    ) AS "s"

Only the dimensions the request uses are joined; facts without a match keep their row with
the dimension's columns NULL. Computed columns read the fact table's own columns; a request's
exprs sit one level up and may read computed and dimension columns too. Which columns a
request uses is bind's business (``using``: it also refuses a dimension whose key is not
unique, so a fact is never counted once per match).

A key's row condition (``SourceSchema.rows``, from ``[[keys]] rows``) makes the table itself
a derived table, ``(SELECT * FROM <table> AS "s" WHERE <condition>) AS "s"``, beneath the
model's columns and joins: the request's own ``where`` and ``filter_sql`` apply outside it,
so nothing a request writes (an ``OR``, a parenthesis, a comment) can reach around the
condition. The condition passes the ``filter_sql`` allow-list (``planner.filter_sql``) over
the table's own columns, rebuilt for the target dialect, with offset-less instants read in
UTC (never in the request's zone).
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable, Mapping

from sqlglot import exp

from planner import names
from planner.dialects.base import Dialect
from planner.errors import PlanError
from planner.expr_sql import compile_expr
from planner.filter_sql import compile_filter_sql, parse_text
from planner.schema import ColumnInfo, Dimension, SourceSchema

#: the alias every statement gives the source rows (columns are referenced as ``"s"."col"``)
ALIAS = "s"


def row_condition(schema: SourceSchema, d: Dialect) -> exp.Expression | None:
    """The key's row condition for ``d``; a condition that does not fit the source (a column
    gone since start-up) is a 503 naming no request field: the operator's config is wrong."""
    if schema.rows is None:
        return None
    try:
        return compile_filter_sql(schema.rows, schema.physical(), d, tz="UTC")
    except PlanError as e:
        raise PlanError("", f"this API key's row condition on source {schema.name!r} cannot "
                        f"be applied ({e.detail}); the operator must fix its [[keys]] rows",
                        slug="row-condition-invalid", title="Row condition invalid",
                        status=503) from None


def relation(schema: SourceSchema, d: Dialect) -> exp.Expression:
    """The source rows aliased ``"s"``: the table (only the key's rows, when it has a
    condition), or that with the computed and dimension columns of ``schema.joined`` (and,
    one level up, the request's exprs). Columns whose engine type does not behave as their
    kind are read through a cast: ``Dialect.stored`` beneath everything (PostgreSQL money,
    DuckDB TIMESTAMP_NS, ClickHouse (U)Int128/256: what row conditions and computed columns
    read too), ``Dialect.readable`` above everything (a UUID as text: joins and operator SQL
    still compare UUIDs)."""
    rel = _relation(schema, d)
    model = schema.model_columns()
    names = [c.name for c in schema.columns.values()
             if c.name not in model or c.name in schema.joined]
    return _cast_columns(rel, names, schema, d.readable, d)


def _cast_columns(rel: exp.Expression, names: list[str], schema: SourceSchema,
                  hook: Callable[[exp.Expression, str, str], exp.Expression | None],
                  d: Dialect) -> exp.Expression:
    """``rel`` as it is, or ``(SELECT <names, each through hook's cast where it has one>
    FROM rel) AS "s"``."""
    names = list(dict.fromkeys(names))
    info = {c.name: c for c in schema.columns.values()}
    refs = {n: d.column(n, ALIAS) for n in names}
    read = {n: _through(hook, ref, info.get(n)) for n, ref in refs.items()}
    if all(read[n] is refs[n] for n in names):
        return rel
    return _sub(exp.select(*(read[n] if read[n] is refs[n] else
                             exp.alias_(read[n], n, quoted=True) for n in names)).from_(rel), d)


def _through(hook: Callable[[exp.Expression, str, str], exp.Expression | None],
             ref: exp.Column, info: ColumnInfo | None) -> exp.Expression:
    """``ref`` through the dialect ``hook``'s cast for its type, or as it is (no cast, or
    no type known)."""
    cast = hook(ref, info.sql_type, info.kind) if info is not None else None
    return ref if cast is None else cast


def _relation(schema: SourceSchema, d: Dialect) -> exp.Expression:
    table = exp.alias_(d.table(schema.table), ALIAS, quoted=True)
    table = _cast_columns(table, [c.name for c in schema.physical().columns.values()],
                          schema, d.stored, d)
    cond = row_condition(schema, d)
    if cond is not None:
        table = exp.select(exp.Star()).from_(table).where(cond).subquery(ALIAS, copy=False)
    if not schema.joined:
        return table
    exprs = {n: _compiled(schema, t, d) for n, t in schema.exprs.items() if n in schema.joined}
    inner = set(schema.joined) - set(exprs)
    for node in exprs.values():  # what the request's exprs read from the model's columns
        inner |= {c.name for c in node.find_all(exp.Column)} & schema.model_columns()
    q = exp.select(_all(d)).from_(table)
    physical = schema.physical()
    for name, text in schema.computed.items():
        if name in inner:
            q = q.select(exp.alias_(_compiled(physical, text, d), name, quoted=True))
    for i, dim in enumerate(schema.dimensions):
        used = [c for c in dim.columns if dim.column_name(c) in inner]
        if used:
            q = _join(q, dim, used, names.dim_alias(i), d, schema)
    if exprs:  # one level up: an expr may read computed and dimension columns
        q = _sub(q, d) if inner else table
        q = exp.select(_all(d), *(exp.alias_(node, n, quoted=True) for n, node in exprs.items())
                       ).from_(q)
    return _sub(q, d)


def using(schema: SourceSchema, used: Mapping[str, str]) -> SourceSchema:
    """``schema`` whose relation provides the model columns in ``used`` (name -> JSON pointer
    of its first use); a dimension whose key is not unique is refused there (fan-out)."""
    joined = frozenset(used) & schema.model_columns()
    for name in sorted(joined, key=lambda n: used[n]):
        dim = schema.dimension_of(name)
        for read in _reads(schema.exprs[name]) if dim is None and name in schema.exprs else ():
            dim = dim or schema.dimension_of(read)
        if dim is not None and dim.duplicate is not None:
            raise PlanError(used[name], f"dimension {dim.name!r} cannot be joined: its key "
                            f"{dim.key!r} is not unique in {'.'.join(dim.table)} (the value "
                            f"{dim.duplicate!r} occurs more than once), so a fact would count "
                            "once per match", slug="dimension-fan-out",
                            title="Dimension key is not unique")
    if joined == schema.joined:
        return schema
    return dataclasses.replace(schema, joined=joined)


def _reads(text: str) -> set[str]:
    """The column names an expr's text reads (``depots.city`` for a dimension column)."""
    out = set()
    for c in parse_text(text).find_all(exp.Column):
        out.add(f"{c.table}.{c.name}" if c.table else c.name)
    return out


def _compiled(schema: SourceSchema, text: str, d: Dialect) -> exp.Expression:
    """A computed column's / expr's rebuilt tree for ``d`` (cached: the text is checked once
    per schema and dialect)."""
    cols = tuple(c for c in schema.columns.values() if c.name not in schema.exprs)
    return _compile(text, schema.name, schema.table, cols, d).copy()


@functools.lru_cache(maxsize=512)
def _compile(text: str, source: str, table: tuple[str, ...], cols: tuple[ColumnInfo, ...],
             d: Dialect) -> exp.Expression:
    return compile_expr(text, SourceSchema(source, table, {c.name: c for c in cols}), d, "")


def _all(d: Dialect) -> exp.Expression:
    return exp.Column(this=exp.Star(), table=d.ident(ALIAS))


def _sub(q: exp.Select, d: Dialect) -> exp.Expression:
    return exp.Subquery(this=q, alias=exp.TableAlias(this=d.ident(ALIAS)))


def _join(q: exp.Select, dim: Dimension, used: list[str], alias: str, d: Dialect,
          schema: SourceSchema) -> exp.Select:
    """``q LEFT JOIN dim``, selecting its used columns as ``"<dim>.<column>"``, each through
    ``Dialect.stored`` like the table's own (ClickHouse reads unmatched rows as NULL through
    the ``join_use_nulls`` every statement there sets). The key is compared as it is read:
    the fact column through ``Dialect.stored`` beneath, the dimension's key through
    ``Dialect.join_key`` (PostgreSQL has no ``numeric = money``; a floored TIMESTAMP_NS
    equals no raw one)."""
    right = exp.alias_(d.table(dim.table), alias, table=True, quoted=True)
    on = exp.EQ(this=d.column(dim.fact_column, ALIAS),
                expression=_through(d.join_key, d.column(dim.key, alias), dim.key_column))
    q = q.join(right, on=on, join_type="left")
    for c in used:
        read = _through(d.stored, d.column(c, alias), schema.columns.get(dim.column_name(c)))
        q = q.select(exp.alias_(read, dim.column_name(c), quoted=True))
    return q
