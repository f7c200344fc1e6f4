"""Scalar expressions (computed columns, ``{"expr": ...}``): ``filter_sql``'s allow-list, widened.

A computed column (``[sources.X.columns]``) or a request's ``expr`` is SQL text read and
*rebuilt* exactly like ``filter_sql`` (``planner.filter_sql``: the same reader, the same
column, literal, comparison, LIKE, arithmetic and function rules, the same limits) — this
module only adds the scalar constructs below, so nothing of the user's text reaches the
engine. What an expression may use beyond ``filter_sql``:

* ``CASE WHEN c THEN a [WHEN ...] [ELSE b] END`` and ``CASE x WHEN v THEN a ... END``
  (the conditions must be true/false, the results of one kind);
* ``NULLIF(a, b)`` (``COALESCE`` is already allowed);
* ``CAST(x AS DOUBLE)`` (numbers), ``CAST(x AS BIGINT)`` / ``INTEGER`` (numbers: a fraction
  is cut toward zero on every engine, written ``CAST(CASE WHEN x < 0 THEN ceil(x) ELSE
  floor(x) END AS BIGINT)`` because engines round or cut as they like) and ``CAST(x AS
  VARCHAR)`` / ``TEXT`` (integers and text only: engines print doubles and instants
  differently);
* text: ``a || b`` (NULL when either is NULL), ``replace(s, from, to)``;
* dates: ``date_trunc('unit', t)`` (the ``trunc`` precisions; a naive timestamp, instants
  read in UTC) and ``extract(field FROM t)`` (the ``extract`` fields), written per dialect by
  the same ``Dialect.trunc`` / ``Dialect.extract`` that temporal keys use;
* (like ``filter_sql``) a dimension column as ``depots.city`` (``[[sources.X.dimensions]]``).

``compile_expr`` returns the rebuilt tree over ``"s"`` (see ``planner.source``); errors are
422s whose pointer is the caller's and whose detail names the offending text; unknown columns
carry the nearest valid names. The kind of the result comes from the engine (a zero-row
query in app/catalog.py), not from here. Pure (no I/O).
"""

from __future__ import annotations

from sqlglot import exp

from planner import filter_sql as fs
from planner.dialects.base import Dialect
from planner.errors import PlanError
from planner.schema import SourceSchema

#: ``date_trunc`` units and ``extract`` fields an expression may name (the key options' lists)
TRUNC_UNITS = ("year", "quarter", "month", "week", "day", "hour", "minute", "second")
EXTRACT_FIELDS = ("year", "quarter", "month", "day", "hour", "minute", "second", "dow",
                  "isodow", "doy", "week", "isoyear", "epoch")

#: the functions of the allow-list, for messages and the README
FUNCTIONS = ("lower", "upper", "trim", "length", "abs", "round", "floor", "ceil", "coalesce",
             "nullif", "replace", "date_trunc", "extract", "cast")

_INTEGER_TYPES = (exp.DataType.Type.BIGINT, exp.DataType.Type.INT)
_TEXT_TYPES = (exp.DataType.Type.TEXT, exp.DataType.Type.VARCHAR)


class ExprBuilder(fs._Builder):
    """``filter_sql``'s builder plus the scalar constructs of the module docstring."""

    def _refuse(self, node: exp.Expression, what: str | None = None) -> PlanError:
        if what is None and isinstance(node, exp.Anonymous):
            what = f"functions outside the allow-list ({' '.join(FUNCTIONS)})"
        return super()._refuse(node, what)

    def build(self, node: exp.Expression, depth: int = 0) -> fs._Typed:
        handler = _HANDLERS.get(type(node))
        if handler is None or (isinstance(node, exp.Cast) and _is_typed_literal(node)):
            return super().build(node, depth)
        self.nodes += 1
        if depth > fs.MAX_DEPTH or self.nodes > fs.MAX_NODES:
            raise fs._fail(f"the expression is nested too deeply or too long (at most "
                           f"{fs.MAX_DEPTH} levels and {fs.MAX_NODES} terms)",
                           slug="limit-exceeded")
        return handler(self, node, depth + 1)

    # ---- constructs ----------------------------------------------------------------
    def _case(self, node: exp.Case, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "ifs", "default"})
        subject = self.build(node.this, depth) if node.this is not None else None
        conds, results = [], []
        for branch in node.args.get("ifs") or []:
            if not isinstance(branch, exp.If):
                raise self._refuse(branch)
            self._only_args(branch, {"this", "true"})
            cond = self.build(branch.this, depth)
            if subject is not None:  # CASE x WHEN v: x = v
                (a, b), _ = self._unify([subject, cond], node)
                cond = fs._Typed(exp.EQ(this=a.copy(), expression=b), "boolean")
            self._need(cond, ("boolean",), "CASE WHEN", node)
            conds.append(cond.node)
            results.append(self.build(branch.args["true"], depth))
        if not conds:
            raise self._refuse(node, "CASE without WHEN")
        default = node.args.get("default")
        if default is not None:
            results.append(self.build(default, depth))
        parts, kind = self._unify(results, node)
        ifs = [exp.If(this=c, true=r) for c, r in zip(conds, parts)]
        out = exp.Case(ifs=ifs, default=parts[len(conds)] if default is not None else None)
        return fs._Typed(out, kind)

    def _nullif(self, node: exp.Nullif, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "expression"})
        (a, b), kind = self._unify([self.build(node.this, depth),
                                    self.build(node.expression, depth)], node)
        return fs._Typed(exp.Nullif(this=a, expression=b), kind)

    def _cast(self, node: exp.Cast, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "to", "_type"})
        to = node.args.get("to")
        a = self.build(node.this, depth)
        t = to.this if isinstance(to, exp.DataType) and not to.expressions else None
        if t == exp.DataType.Type.DOUBLE:
            self._need(a, ("integer", "number"), "CAST AS DOUBLE", node)
            return fs._Typed(self.d.double(a.node), "number")
        if t in _INTEGER_TYPES:
            self._need(a, ("integer", "number"), "CAST AS BIGINT", node)
            v = a.node
            if a.kind == "number":  # cut toward zero, the same on every engine
                v = exp.Case(ifs=[exp.If(this=exp.LT(this=v.copy(), expression=exp.Literal.number(0)),
                                         true=exp.Ceil(this=v.copy()))],
                             default=exp.Floor(this=v.copy()))
            return fs._Typed(self.d.bigint(v), "integer")
        if t in _TEXT_TYPES:
            self._need(a, ("integer", "string"), "CAST AS VARCHAR", node)
            return fs._Typed(self.d.cast(a.node, "VARCHAR"), "string")
        raise self._refuse(node, "casts to types other than DOUBLE, BIGINT, INTEGER, VARCHAR "
                                 "and TEXT (and DATE '...' / TIMESTAMP '...' literals)")

    def _concat(self, node: exp.DPipe, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "expression", "safe"})
        a, b = self.build(node.this, depth), self.build(node.expression, depth)
        for t in (a, b):
            self._need(t, ("string",), "||", node)
        return fs._Typed(exp.DPipe(this=a.node, expression=b.node), "string")

    def _replace(self, node: exp.Replace, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "expression", "replacement"})
        parts = [self.build(node.args[k], depth) for k in ("this", "expression", "replacement")]
        for t in parts:
            self._need(t, ("string",), "replace", node)
        s, old, new = (p.node for p in parts)
        return fs._Typed(exp.Replace(this=s, expression=old, replacement=new), "string")

    def _temporal(self, t: fs._Typed, what: str, node: exp.Expression) -> exp.Expression:
        if not t.temporal or t.literal_text is not None:
            raise fs._fail(f"{what} needs a timestamp or date column: "
                           f"{fs._quote(self._text(node))}", slug="type-mismatch")
        return self.d.to_local(t.node, t.kind, "UTC")

    def _date_trunc(self, node: exp.TimestampTrunc, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "unit"})
        unit = node.args.get("unit")
        name = unit.name.lower() if isinstance(unit, exp.Var) else ""
        if name not in TRUNC_UNITS:
            raise fs._fail(f"date_trunc takes one of {', '.join(TRUNC_UNITS)} as a string: "
                           f"{fs._quote(self._text(node))}")
        if name == "week" and not self.d.supports("trunc_week"):
            raise fs._fail(f"ISO week truncation is not supported on {self.d.name}",
                           slug="unsupported")
        naive = self._temporal(self.build(node.this, depth), "date_trunc", node)
        return fs._Typed(self.d.trunc(name, naive), "timestamp")

    def _extract(self, node: exp.Extract, depth: int) -> fs._Typed:
        self._only_args(node, {"this", "expression"})
        part = node.this
        name = part.name.lower() if isinstance(part, (exp.Var, exp.Identifier)) else ""
        if name not in EXTRACT_FIELDS:
            raise fs._fail(f"extract takes one of {', '.join(EXTRACT_FIELDS)}: "
                           f"{fs._quote(self._text(node))}")
        if not self.d.supports("extract"):
            raise fs._fail(f"date part extraction is not supported on {self.d.name}",
                           slug="unsupported")
        naive = self._temporal(self.build(node.expression, depth), "extract", node)
        if name == "epoch":  # seconds since 1970 with their fraction (instants read in UTC)
            return fs._Typed(self.d.epoch(naive, "timestamp"), "number")
        return fs._Typed(self.d.extract(name, naive), "integer")  # whole numbers


def _is_typed_literal(node: exp.Cast) -> bool:
    return isinstance(node.this, exp.Literal) and node.this.is_string


_HANDLERS = {
    exp.Case: ExprBuilder._case,
    exp.Nullif: ExprBuilder._nullif, exp.Cast: ExprBuilder._cast,
    exp.DPipe: ExprBuilder._concat, exp.Replace: ExprBuilder._replace,
    exp.TimestampTrunc: ExprBuilder._date_trunc, exp.DateTrunc: ExprBuilder._date_trunc,
    exp.Extract: ExprBuilder._extract,
}


#: an expression's kind as the allow-list reads it -> (column kind, type name), for engines
#: that cannot type a query (SQLite) and for planning without an engine
KINDS = {"integer": ("integer", "BIGINT"), "number": ("double", "DOUBLE"),
         "string": ("string", "VARCHAR"), "boolean": ("boolean", "BOOLEAN"),
         "date": ("date", "DATE"), "timestamp": ("timestamp", "TIMESTAMP"),
         "timestamptz": ("timestamptz", "TIMESTAMPTZ")}


def compile_typed(text: str, schema: SourceSchema, d: Dialect, ptr: str, *,
                  what: str = "expr", max_chars: int = fs.MAX_CHARS
                  ) -> tuple[exp.Expression, tuple[str, str]]:
    """Parse, check and rebuild the scalar expression ``text`` over ``"s"``: the tree and its
    (kind, type name) as the allow-list reads it; a PlanError at ``ptr`` (its detail says
    ``what``) for anything outside the allow-list."""
    try:
        parsed = fs.parse_text(text, max_chars)
        built = ExprBuilder(schema, d, fs.MAX_IN_LIST).build(parsed)
        if built.kind == "null":
            raise fs._fail(f"the expression {fs._quote(text)} has no type (it is NULL)",
                           slug="type-mismatch")
    except RecursionError:
        raise PlanError(ptr, f"{what} is nested too deeply", slug="limit-exceeded",
                        title=f"{what} is not allowed") from None
    except PlanError as e:
        raise PlanError(ptr, e.detail.replace("filter_sql", what), slug=e.slug,
                        title=f"{what} is not allowed", status=e.status,
                        suggestions=e.suggestions) from None
    node = built.node
    if isinstance(node, (exp.Binary, exp.Unary)) and not isinstance(node, exp.Paren):
        node = exp.Paren(this=node)
    col = schema.column(node.name) if isinstance(node, exp.Column) else None
    if col is not None:  # a bare column keeps its own type (a DECIMAL(12, 2) stays one)
        return node, (col.kind, col.sql_type)
    return node, KINDS[built.kind]


def compile_expr(text: str, schema: SourceSchema, d: Dialect, ptr: str, *,
                 what: str = "expr", max_chars: int = fs.MAX_CHARS) -> exp.Expression:
    """The rebuilt tree of ``compile_typed``."""
    return compile_typed(text, schema, d, ptr, what=what, max_chars=max_chars)[0]
