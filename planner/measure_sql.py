"""Named measures: ``[sources.X.measures] name = "<aggregate expression>"``, checked and
rebuilt from an allow-list: the scalar one of computed columns (planner/expr_sql.py, which
widens filter_sql's) plus aggregates.

The expression is parsed by sqlglot (the filter_sql read dialect) and rebuilt node by node:

* aggregates of the registry (planner/aggregates.py) written as SQL functions: ``count(*)``,
  ``count(x)``, ``count(DISTINCT x)``, ``approx_count_distinct``, ``sum``, ``avg``, ``min``,
  ``max``, ``median``, ``stddev`` / ``stddev_samp``, ``stddev_pop``, ``variance`` /
  ``var_samp``, ``var_pop``; their argument is a *scalar* expression over the source's
  columns -- physical, computed and dimension columns -- as planner/expr_sql.py allows it
  (arithmetic, comparisons, CASE, NULLIF, COALESCE, casts, string and date functions); no
  aggregate inside an aggregate;
* outside the aggregates: numbers, ``+ - * /`` (``/`` is true division, x / 0 is NULL),
  unary minus, parentheses -- no bare columns (a column outside an aggregate has no value
  per group).

One aggregate over a scalar (``sum(fee)``, ``avg(CASE WHEN on_time THEN 1.0 ELSE 0.0 END)``)
is that built-in aggregate (it stacks, sorts, ranks and folds into ``(other)`` like
``{"agg": ...}``); anything else is *composite*: its value is a double, it works in grouped
charts, sort and ``then``; top-N and stack refuse it (planner/bind.py). Pure.

The scalar part is ``expr_sql.ExprBuilder``; ``_MeasureBuilder`` adds the aggregates and
refuses a column outside them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import sqlglot
from sqlglot import exp

from planner import aggregates
from planner.dialects.base import Dialect
from planner.errors import PlanError, nearest, pointer
from planner.expr_sql import ExprBuilder
from planner.filter_sql import MAX_CHARS, MAX_IN_LIST, READ_DIALECT, _quote, _Typed
from planner.plan import Measure
from planner.schema import ColumnInfo, SourceSchema

#: sqlglot node -> registry aggregate (count(DISTINCT x) is count_distinct)
AGG_NODES: dict[type, str] = {
    exp.Count: "count", exp.Sum: "sum", exp.Avg: "avg", exp.Min: "min", exp.Max: "max",
    exp.Median: "median", exp.Stddev: "stddev_samp", exp.StddevSamp: "stddev_samp",
    exp.StddevPop: "stddev_pop", exp.Variance: "var_samp", exp.VariancePop: "var_pop",
    exp.ApproxDistinct: "approx_count_distinct",
}
#: the kinds a rebuilt scalar has (planner/filter_sql.py) as column kinds (aggregates.accepts)
_AS_COLUMN_KIND = {"integer": "integer", "number": "double"}


@dataclass(frozen=True)
class Part:
    """One aggregate of a named measure: the registry name and its per-row input."""

    agg: str
    input: exp.Expression | None  # over the source rows "s"; None: count(*)
    column: ColumnInfo | None  # the input when it is a bare column
    kind: str  # the input's kind (filter_sql kinds: integer, number, string, ...)


@dataclass(frozen=True)
class NamedMeasure:
    name: str
    text: str
    parts: tuple[Part, ...]
    #: composite only: the value per group over ``exp.Placeholder(j)`` = part j's aggregate
    formula: exp.Expression | None

    @property
    def single(self) -> Part | None:
        return self.parts[0] if self.formula is None else None

    @property
    def output(self) -> str:
        """The answer kind (the registry's ``output`` of a single aggregate; else double)."""
        return aggregates.get(self.parts[0].agg).output if self.formula is None else "double"


class MeasureError(PlanError):
    """A named measure that is not allowed; ``detail`` says why (without a pointer: bind and
    the settings put it where the measure came from)."""


class _MeasureBuilder(ExprBuilder):
    def __init__(self, schema: SourceSchema | None, d: Dialect, tz: str | None) -> None:
        super().__init__(schema, d, MAX_IN_LIST, tz)  # type: ignore[arg-type]
        self.inside = False
        self.parts: list[Part] = []

    def _refuse(self, node, what=None):
        e = super()._refuse(node, what)
        return _error(e.detail)

    def build(self, node: exp.Expression, depth: int = 0) -> _Typed:
        agg = AGG_NODES.get(type(node))
        if agg is not None:
            return self._aggregate(node, agg, depth)
        if type(node) is exp.Anonymous and str(node.this).lower() in aggregates.NAMES:
            raise _error(f"{node.this}() is not written as a SQL aggregate here; use "
                         "count / sum / avg / min / max / median / stddev / variance")
        if isinstance(node, exp.Column) and not self.inside:
            raise _error(f"the column {_quote(self._text(node))} stands outside an aggregate "
                         "(it has no single value per group): wrap it, e.g. sum(...)")
        return super().build(node, depth)

    def _column(self, ident, node):
        if self.schema is None:  # the shape check of the settings: any column, kind unknown
            return _Typed(exp.column(ident.this, "s"), "null")
        return super()._column(ident, node)

    def _aggregate(self, node: exp.Expression, agg: str, depth: int) -> _Typed:
        if self.inside:
            raise _error(f"an aggregate inside an aggregate is not allowed: "
                         f"{_quote(self._text(node))}")
        arg = node.this
        if isinstance(node, exp.Count) and isinstance(arg, exp.Distinct):
            if len(arg.expressions) != 1:
                raise _error("count(DISTINCT ...) takes one expression")
            agg, arg = "count_distinct", arg.expressions[0]
        extra = [k for k, v in node.args.items()
                 if v not in (None, False, []) and k not in ("this", "big_int")]
        if extra:
            raise _error(f"{agg} takes one argument: {_quote(self._text(node))}")
        entry = aggregates.get(agg)
        if entry.feature and self.schema is not None and not self.d.supports(entry.feature):
            raise _error(f"{agg} is not supported on {self.d.name}", slug="unsupported")
        if isinstance(arg, exp.Star) or arg is None:
            if agg != "count":
                raise _error(f"{agg}(*) is not an aggregate; give it an expression")
            part = Part("count", None, None, "null")
        else:
            self.inside = True
            try:
                t = self.build(arg, depth + 1)
            finally:
                self.inside = False
            column = None
            if isinstance(t.node, exp.Column) and self.schema is not None:
                column = self.schema.column(t.node.name)
            kind = column.kind if column is not None else _AS_COLUMN_KIND.get(t.kind, t.kind)
            if t.kind != "null" and not entry.accepts(kind):
                raise _error(entry.mismatch.format(agg=agg, column=self._text(arg), kind=kind),
                             slug="type-mismatch")
            part = Part(agg, t.node, column, t.kind)
        self.parts.append(part)
        out = entry.output
        if out == "integer":
            kind_out = "integer"
        elif out in ("sum", "input"):
            kind_out = part.kind if part.kind in ("integer", "number") else (
                "number" if out == "sum" else part.kind)
        else:
            kind_out = "number"
        return _Typed(exp.Placeholder(this=str(len(self.parts) - 1)), kind_out)


def _error(detail: str, slug: str = "bad-measure") -> MeasureError:
    return MeasureError("", detail.replace("filter_sql", "a measure"), slug=slug,
                        title="Measure expression is not allowed")


def compile_measure(name: str, text: str, schema: SourceSchema | None, d: Dialect,
                    tz: str | None = None) -> NamedMeasure:
    """Parse, check and rebuild the named measure ``text``; ``schema`` None: the shape only
    (any column name, no types), as the settings check it before any engine is open."""
    if len(text) > MAX_CHARS or not text.strip() or "\x00" in text:
        raise _error(f"a measure is an aggregate expression of 1 to {MAX_CHARS} characters "
                     "(no NUL), e.g. \"sum(fee)\"")
    try:
        parsed = sqlglot.parse_one(text, read=READ_DIALECT)
    except Exception:  # noqa: BLE001 - ParseError, TokenError, ...
        raise _error(f"cannot read {_quote(text)} as one SQL expression, e.g. \"sum(fee)\" "
                     "or \"sum(fee) / count(*)\"") from None
    b = _MeasureBuilder(schema, d, tz)
    try:
        built = b.build(parsed)
    except MeasureError:
        raise
    except PlanError as e:  # filter_sql's own refusals, reworded
        raise _error(e.detail, slug=e.slug) from None
    except RecursionError:
        raise _error("the measure is nested too deeply") from None
    if not b.parts:
        raise _error(f"{_quote(text)} has no aggregate: a measure is computed per group, "
                     "e.g. \"sum(fee)\"")
    if built.kind not in ("integer", "number", "null") and not (
            len(b.parts) == 1 and isinstance(built.node, exp.Placeholder)):
        raise _error(f"a measure combining aggregates must be a number, not {built.kind}: "
                     f"{_quote(text)}", slug="type-mismatch")
    node = built.node
    while isinstance(node, exp.Paren):
        node = node.this
    formula = None if isinstance(node, exp.Placeholder) else built.node
    return NamedMeasure(name, text, tuple(b.parts), formula)


def bind_named(i: int, path: tuple, channel: str, ch: Any, schema: SourceSchema, d: Dialect,
               tz: str | None) -> Measure:
    """The ``Measure`` of ``{"measure": name}``: one registry aggregate binds as that
    built-in (the channel as if it said ``agg`` and ``column``); a composite carries its
    parts and formula."""
    name = ch.measure
    text = schema.measures.get(name)
    if text is None:
        known = sorted(schema.measures)
        sugg = nearest(name, known)
        hint = (f"; did you mean {', '.join(repr(s) for s in sugg)}?" if sugg else
                f"; it has {', '.join(repr(k) for k in known)}" if known else
                f"; it has none (config [sources.{schema.name}.measures])")
        raise PlanError(pointer(*path, "measure"), f"source {schema.name!r} has no measure "
                        f"{name!r}{hint}", slug="unknown-measure", title="Unknown measure",
                        suggestions=sugg)
    try:
        nm = compile_measure(name, text, schema, d, tz)
    except PlanError as e:
        raise PlanError(pointer(*path, "measure"), f"the measure {name!r} (config key "
                        f"sources.{schema.name}.measures.{name}) does not fit the source: "
                        f"{e.detail}", slug=e.slug, title="Measure expression is not allowed",
                        suggestions=e.suggestions) from None
    if ch.tz is not None:
        raise PlanError(pointer(*path, "tz"), "tz applies to temporal keys, not to a measure")
    part = nm.single
    if part is None:
        spec = ch.model_copy(update={"agg": None})
        return Measure(i, path, channel, spec, None, named=name, parts=nm.parts,
                       formula=nm.formula)
    col = part.column
    spec = ch.model_copy(update={"agg": part.agg, "column": col.name if col else None})
    return Measure(i, path, channel, spec, col, named=name,
                   input_expr=part.input if col is None else None,
                   input_kind=None if col is not None else part.kind)


def answer_kind(nm: NamedMeasure) -> str:
    """The kind of the measure's answer, in column kinds (``/v1/sources/{name}``): integer,
    double, decimal, string, ...; a composite is a double."""
    part = nm.single
    if part is None:
        return "double"
    out = aggregates.get(part.agg).output
    if out in ("integer", "double"):
        return out
    kind = part.column.kind if part.column is not None else _AS_COLUMN_KIND.get(part.kind,
                                                                                part.kind)
    if out == "sum":
        return kind if kind in ("integer", "decimal") else "double"
    return kind  # min / max: the input's own kind
