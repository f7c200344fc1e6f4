"""The source model at introspection: computed columns and dimension tables (DESIGN.md
"Source model"), and the kinds of a request's ``{"expr": ...}`` terms.

Per source and data version (``app.catalog.Catalog.entry``):

* every ``[sources.X.columns]`` expression is rebuilt by the allow-list
  (``planner.expr_sql``) against the table's own columns, and typed by the engine: ONE
  zero-row statement ``SELECT <expr> AS c0, ... FROM <table> AS "s" LIMIT 0`` whose answer's
  Arrow types are read back as SQL type names and classified like introspected columns
  (``planner.schema.classify``). Where the engine answers without a type (SQLite has no
  static types; PostgreSQL ``numeric`` is left to value inspection) the allow-list's own
  reading of the expression gives it; a boolean expression an engine answers as an integer
  (MariaDB has no boolean type) stays boolean; a number is what the allow-list reads it as
  (BIGINT or DOUBLE; a bare column its own type), since engines type arithmetic their own
  way and an answer's types are the same on every engine;
* every ``[[sources.X.dimensions]]`` table is described (its columns' kinds), its key and
  columns checked, and its key checked for uniqueness with one statement (a non-NULL key value
  with more than one row); a duplicated value is kept on the ``Dimension`` and a request that
  uses the dimension is refused with a 422 naming it (``planner.source.using``).

A mistake in the model (an unknown column, a dimension table that does not exist) makes the
source unavailable (503) with a message naming the config key; the other sources still serve.
"""

from __future__ import annotations

import dataclasses
import logging
from typing import Any

import pyarrow as pa
from sqlglot import exp

from app.engines import EngineUnavailable
from app.settings import SourceConfig
from planner.errors import PlanError, nearest, pointer
from planner.names import expr_column
from planner.expr_sql import compile_typed
from planner.schema import ColumnInfo, Dimension, SourceSchema, classify
from planner.source import relation, using

log = logging.getLogger("sluice.catalog")

#: request exprs typed per source and data version: entries kept before the cache starts over
MAX_EXPR_KINDS = 4096


def build(eng: Any, cfg: SourceConfig, schema: SourceSchema, d: Any) -> SourceSchema:
    """``schema`` (the table's own columns) with the computed and dimension columns."""
    if not cfg.columns and not cfg.dimensions:
        return schema
    columns = dict(schema.columns)
    nodes: dict[str, tuple[exp.Expression, tuple[str, str]]] = {}
    for name, text in cfg.columns.items():
        key = f"sources.{cfg.name}.columns.{name}"
        if name in schema.columns:
            raise EngineUnavailable(cfg.name, f"[{key}] {name!r} is also a column of table "
                                    f"{cfg.table!r}; give the computed column another name")
        try:
            nodes[name] = compile_typed(text, schema, d, "", what=f"[{key}]")
        except PlanError as e:
            raise EngineUnavailable(cfg.name, f"[{key}] {e.detail}") from None
    for name, info in _types(eng, d, relation(schema, d), nodes).items():
        columns[name] = info
    dims = []
    for dc in cfg.dimensions:
        dim, dim_cols = _dimension(eng, d, cfg, schema, dc)
        dims.append(dim)
        columns.update(dim_cols)
    return dataclasses.replace(schema, columns=columns, computed=dict(cfg.columns),
                               dimensions=tuple(dims))


def with_exprs(eng: Any, schema: SourceSchema, d: Any, texts: list[tuple[tuple, str]],
               cache: dict[tuple[str, str, str], ColumnInfo], version: str) -> SourceSchema:
    """``schema`` with a request's expr terms as columns (kinds from the engine, cached)."""
    new: dict[str, ColumnInfo] = {}
    for path, text in texts:
        key = (schema.name, version, text)
        info = cache.get(key)
        if info is None:
            ptr, name = pointer(*path, "expr"), expr_column(text)
            _, annotated = compile_typed(text, schema, d, ptr)  # 422 here, with a pointer
            probe = dataclasses.replace(
                schema, columns={**schema.columns, text: ColumnInfo(name, *annotated)},
                exprs={**schema.exprs, name: text})
            probe = using(probe, {name: ptr})  # a fan-out dimension: 422 at the expr
            info = _types(eng, d, relation(probe, d), {name: (d.column(name, "s"), annotated)})[name]
            if len(cache) >= MAX_EXPR_KINDS:
                cache.clear()
            cache[key] = info
        new[text] = info
    return dataclasses.replace(schema, columns={**schema.columns, **new},
                               exprs={**schema.exprs, **{c.name: t for t, c in new.items()}})


def _types(eng: Any, d: Any, source: exp.Expression,
           nodes: dict[str, tuple[exp.Expression, tuple[str, str]]]) -> dict[str, ColumnInfo]:
    """Column infos of expressions, typed by one zero-row statement on the engine."""
    if not nodes:
        return {}
    aliases = {name: f"c{i}" for i, name in enumerate(nodes)}
    q = exp.select(*(exp.alias_(node.copy(), aliases[n], quoted=True)
                     for n, (node, _) in nodes.items())).from_(source).limit(0)
    answer = eng.execute(d.render(q))
    out = {}
    for name, (_, (kind, type_name)) in nodes.items():
        field = answer.schema.field(aliases[name])
        engine_type = _type_name(field.type, d.sqlglot or None)
        if engine_type is None:  # the engine does not say: the allow-list's reading
            out[name] = ColumnInfo(name, kind, type_name)
            continue
        got = classify(engine_type, d.sqlglot or None)
        if kind == "boolean" and got == "integer":  # an engine without booleans
            got, engine_type = "boolean", "BOOLEAN"
        elif type_name in ("BIGINT", "DOUBLE") and got in _NUMBERS:
            # one answer type on every engine: engines type arithmetic their own way (DuckDB
            # keeps ``amount * 100`` a DECIMAL, PostgreSQL an unsized numeric, MariaDB makes
            # ``ceil(amount)`` a BIGINT), so a number is what the allow-list reads it as
            got, engine_type = kind, type_name
        out[name] = ColumnInfo(name, got, engine_type)
    return out


#: the number kinds of planner.schema.classify
_NUMBERS = ("integer", "double", "decimal")


def _type_name(t: pa.DataType, dialect: str | None) -> str | None:
    """An Arrow type of an engine's answer as an SQL type name of ``dialect`` (None: no
    type)."""
    if pa.types.is_boolean(t):
        return "BOOLEAN"
    if pa.types.is_integer(t):
        width = t.bit_width + (8 if pa.types.is_unsigned_integer(t) and t.bit_width < 64 else 0)
        if pa.types.is_unsigned_integer(t) and t.bit_width == 64:
            # the engine's own name (ClickHouse UInt64: length() answers one; MariaDB BIGINT
            # UNSIGNED), which its dialect classifies; elsewhere the exact DECIMAL(20, 0)
            name = exp.DataType(this=exp.DataType.Type.UBIGINT).sql(dialect=dialect)
            return name if classify(name, dialect) == "integer" else "DECIMAL(20,0)"
        return {8: "TINYINT", 16: "SMALLINT", 32: "INTEGER"}.get(width, "BIGINT")
    if pa.types.is_floating(t):
        return "DOUBLE"
    if pa.types.is_decimal(t):
        return f"DECIMAL({t.precision},{t.scale})"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_binary(t) \
            or pa.types.is_large_binary(t):
        return "VARCHAR"
    if pa.types.is_date(t):
        return "DATE"
    if pa.types.is_timestamp(t):
        return "TIMESTAMP WITH TIME ZONE" if t.tz else "TIMESTAMP"
    return None


def _dimension(eng: Any, d: Any, cfg: SourceConfig, schema: SourceSchema, dc: Any
               ) -> tuple[Dimension, dict[str, ColumnInfo]]:
    parts = eng.split_table(dc.table)
    described = dict(eng.describe(parts))
    if not described:
        raise EngineUnavailable(cfg.name, f"[{dc.where}.table] table {dc.table!r} not found")
    if dc.fact_column not in schema.columns:
        raise EngineUnavailable(cfg.name, f"[{dc.where}.fact_column] {dc.fact_column!r} is not "
                                f"a column of {cfg.table!r}; nearest: "
                                f"{', '.join(nearest(dc.fact_column, schema.physical().columns))}")
    for k, c in [("key", dc.key)] + [("columns", c) for c in dc.columns]:
        if c not in described:
            raise EngineUnavailable(cfg.name, f"[{dc.where}.{k}] {c!r} is not a column of "
                                    f"{dc.table!r}; nearest: {', '.join(nearest(c, described))}")
    dim = Dimension(dc.name, parts, dc.fact_column, dc.key, tuple(dc.columns),
                    _duplicate(eng, d, parts, dc.key),
                    ColumnInfo(dc.key, classify(described[dc.key], d.sqlglot or None),
                               described[dc.key]))
    if dim.duplicate is not None:
        log.warning("dimension %r of source %r: key %r is not unique (e.g. %r); requests that "
                    "use it are refused", dim.name, cfg.name, dim.key, dim.duplicate)
    cols = {dim.column_name(c): ColumnInfo(dim.column_name(c),
                                           classify(described[c], d.sqlglot or None),
                                           described[c]) for c in dc.columns}
    return dim, cols


def _duplicate(eng: Any, d: Any, parts: tuple[str, ...], key: str) -> str | None:
    """A key value with more than one row in the dimension table, or None (one statement)."""
    col = d.column(key, "t")
    q = (exp.select(exp.alias_(col.copy(), "v", quoted=True))
         .from_(exp.alias_(d.table(parts), "t", table=True, quoted=True))
         .where(exp.Not(this=exp.Is(this=col.copy(), expression=exp.Null())))
         .group_by(col.copy())
         .having(exp.GT(this=exp.Count(this=exp.Star()), expression=exp.Literal.number(1)))
         .limit(1))
    row = eng.fetch_row(d.render(q))
    return None if not row else str(row.get("v"))
