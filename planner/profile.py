"""Column profiles for filter widgets: one statement per (column, top) and dialect.

Pure: schema + column name + dialect -> a sqlglot statement (no I/O). The service runs it
and shapes the answer (``app/routes_sources.py``).

Two forms, chosen by ``top`` (the number of most frequent values wanted):

* **grouped** (``top > 0``; the default for text and boolean columns, for a category
  picker): the column is grouped once and window totals over the groups give the row count,
  the NULL count, the EXACT number of distinct non-NULL values and min/max; the first
  ``top`` groups by count (descending; ties by value ascending; the NULL group last) are
  returned. One row per returned group, every row carrying the totals::

      WITH grouped AS (SELECT col AS v, COUNT(*) AS n FROM t GROUP BY col),
           ranked AS (SELECT v, n, SUM(n) OVER () AS rows, ..., ROW_NUMBER() OVER (ORDER BY
                      CASE WHEN v IS NULL THEN 1 ELSE 0 END, n DESC, v) AS rank FROM grouped)
      SELECT ... FROM ranked WHERE rank <= top ORDER BY rank

* **aggregate** (``top == 0``; the default for numbers, dates and timestamps, for a range
  control): ``COUNT(*)``, ``COUNT(col)``, ``MIN``, ``MAX`` and the dialect's approximate
  distinct count (the same construct as ``agg: approx_count_distinct``; HyperLogLog,
  Flajolet et al. 2007, where the engine has a sketch, else an exact COUNT(DISTINCT) — the
  answer names the method). No frequent values: grouping a continuous column costs a hash
  table as large as the column and its most frequent exact values rarely mean anything.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from planner import names
from planner.errors import PlanError, nearest
from planner.model import MAX_TEXT_CHARS
from planner.schema import ColumnInfo, SourceSchema
from planner.source import relation, using

#: most frequent values returned by default for text and boolean columns
DEFAULT_TOP = 20
MAX_TOP = 100
PROFILE_KINDS = frozenset({"integer", "double", "decimal", "string", "boolean", "timestamp",
                           "timestamptz", "date"})
#: output names (planner.names.profile: the internal prefix, never a user column)
VALUE, COUNT, ROWS, NULLS, NON_NULL, DISTINCT, LO, HI, RANK, CUT = (
    names.profile(p) for p in ("value", "count", "rows", "nulls", "non_null", "distinct",
                               "min", "max", "rank", "cut"))


@dataclass(frozen=True)
class ProfilePlan:
    column: ColumnInfo
    top: int                      # 0: aggregate form (no frequent values)
    statement: exp.Expression
    sql: str
    dialect: str
    has_range: bool               # min/max computed (not for booleans)
    distinct_method: str          # how distinct_count is computed
    distinct_error: float | None  # relative standard error of an approximate count
    approximate: bool


def default_top(col: ColumnInfo) -> int:
    return DEFAULT_TOP if col.is_category else 0


def resolve(schema: SourceSchema, name: str) -> ColumnInfo:
    """The catalog column ``name``; 404 with the nearest names otherwise."""
    col = schema.column(name)
    if col is None:
        sugg = nearest(name, schema.columns)
        hint = f"; did you mean {', '.join(repr(s) for s in sugg)}?" if sugg else ""
        raise PlanError("", f"unknown column {name!r} in source {schema.name!r}{hint}",
                        slug="unknown-column", title="Unknown column", status=404,
                        suggestions=sugg)
    return col


def plan_profile(schema: SourceSchema, name: str, dialect, top: int | None = None) -> ProfilePlan:
    col = resolve(schema, name)
    if col.kind not in PROFILE_KINDS:
        raise PlanError("", f"column {name!r} has type {col.sql_type or col.kind!r}, which "
                        "sluice cannot profile (numbers, text, booleans, dates and timestamps)",
                        slug="unsupported-column", title="Column cannot be profiled")
    top = default_top(col) if top is None else int(top)
    if not 0 <= top <= MAX_TOP:
        raise PlanError("", f"top must be between 0 and {MAX_TOP}", slug="invalid-request")
    has_range = col.kind != "boolean"  # MIN(boolean) does not exist on PostgreSQL
    table = relation(using(schema, {col.name: ""}), dialect)  # a model column: joined
    value = dialect.column(col.name)
    if top == 0:
        ok = dialect.instant_range(value.copy(), col.kind) if col.is_temporal else None
        # min/max over the instants a chart can show (not 'infinity' / year 12000)
        ranged = value if ok is None else exp.Case(ifs=[exp.If(this=ok, true=value.copy())])
        stmt = _aggregate(dialect, value, table, has_range, ranged)
        method, err = dialect.caps.approx_distinct
        approximate = not method.startswith("exact")
    else:
        stmt = _grouped(dialect, value, table, top, has_range)
        method, err, approximate = "exact (GROUP BY)", None, False
    if col.kind == "string":
        stmt = _cut_text(dialect, stmt)
    return ProfilePlan(col, top, stmt, dialect.render(stmt), dialect.name, has_range, method,
                       err if approximate else None, approximate)


def _cut_text(d, stmt: exp.Select) -> exp.Select:
    """The text values (value, min, max) of the profile's statement cut to MAX_TEXT_CHARS
    characters, as a chart answer cuts them, with ``CUT``: 1 where one of them was longer."""
    out, longer = [], []
    source = stmt.args["from_"].this
    for e in stmt.expressions:
        name = e.alias_or_name
        if name not in (VALUE, LO, HI):
            out.append(e)
            continue
        v = e.this if isinstance(e, exp.Alias) else e
        out.append(_alias(d.text_prefix(v.copy(), MAX_TEXT_CHARS), name))
        whole = v.copy()
        if isinstance(whole, exp.Column) and isinstance(source, (exp.Table, exp.Identifier)):
            # qualified: ClickHouse reads a bare name as the select list's alias (cut)
            whole.set("table", exp.to_identifier(source.alias_or_name if isinstance(
                source, exp.Table) else source.name, quoted=True))
        longer.append(exp.GT(this=d.char_length(whole),
                             expression=exp.Literal.number(MAX_TEXT_CHARS)))
    flag = exp.Case(ifs=[exp.If(this=exp.or_(*longer), true=exp.Literal.number(1))],
                    default=exp.Literal.number(0))
    return stmt.select(*out, _alias(flag, CUT), append=False) if longer else stmt


def _alias(e: exp.Expression, name: str) -> exp.Alias:
    return exp.alias_(e, name, quoted=True)


def _aggregate(d, value: exp.Expression, table: exp.Expression, has_range: bool,
               ranged: exp.Expression) -> exp.Select:
    cols = [_alias(exp.Count(this=exp.Star()), ROWS),
            _alias(exp.Count(this=value.copy()), NON_NULL),
            _alias(d.agg("approx_count_distinct", value.copy(), None), DISTINCT)]
    if has_range:
        cols += [_alias(exp.Min(this=ranged.copy()), LO), _alias(exp.Max(this=ranged.copy()), HI)]
    return exp.select(*cols).from_(table)


def _grouped(d, value: exp.Expression, table: exp.Expression, top: int, has_range: bool) -> exp.Select:
    v, n = d.column(VALUE), d.column(COUNT)
    grouped = (exp.select(_alias(value.copy(), VALUE), _alias(exp.Count(this=exp.Star()), COUNT))
               .from_(table).group_by(value.copy()))

    def over(e: exp.Expression, **kw) -> exp.Expression:
        return exp.Window(this=e, **kw)

    is_null = exp.Is(this=v.copy(), expression=exp.Null())
    null_rows = exp.Case(ifs=[exp.If(this=is_null.copy(), true=n.copy())],
                         default=exp.Literal.number(0))
    null_last = exp.Case(ifs=[exp.If(this=is_null.copy(), true=exp.Literal.number(1))],
                         default=exp.Literal.number(0))
    order = exp.Order(expressions=[
        exp.Ordered(this=null_last, nulls_first=d._default_nulls_first(False)),
        exp.Ordered(this=n.copy(), desc=True, nulls_first=d._default_nulls_first(True)),
        # NULL is ranked by the term above, so the native NULL placement is left alone here
        exp.Ordered(this=v.copy(), nulls_first=d._default_nulls_first(False))])
    ranked_cols = [v.copy(), n.copy(),
                   _alias(over(exp.Sum(this=n.copy())), ROWS),
                   _alias(over(exp.Sum(this=null_rows)), NULLS),
                   _alias(over(exp.Count(this=v.copy())), DISTINCT)]
    if has_range:
        ranked_cols += [_alias(over(exp.Min(this=v.copy())), LO),
                        _alias(over(exp.Max(this=v.copy())), HI)]
    ranked_cols.append(_alias(over(exp.RowNumber(), order=order), RANK))
    g, r = names.profile("grouped"), names.profile("ranked")
    ranked = exp.select(*ranked_cols).from_(exp.to_identifier(g, quoted=True))
    rank = d.column(RANK)
    out = [d.column(c) for c in (VALUE, COUNT, ROWS, NULLS, DISTINCT)]
    if has_range:
        out += [d.column(LO), d.column(HI)]
    return (exp.select(*out).from_(exp.to_identifier(r, quoted=True))
            .where(exp.LTE(this=rank.copy(), expression=exp.Literal.number(top)))
            .order_by(exp.Ordered(this=rank.copy(), nulls_first=d._default_nulls_first(False)))
            .with_(exp.to_identifier(g, quoted=True), as_=grouped)
            .with_(exp.to_identifier(r, quoted=True), as_=ranked))
