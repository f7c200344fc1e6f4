"""``filter_sql``: a condition written as SQL text, accepted only from an allow-list.

Analysts often think of a filter as SQL (``fee > 10 AND depot IN ('North Yard')``). The
text is parsed by sqlglot (DuckDB-flavoured generic SQL) and then *rebuilt* node by node
into a fresh expression tree: nothing of the parsed tree is reused, so a construct this
module does not know cannot reach the engine. What is allowed:

* column references, resolved in the source's catalog and re-created as catalog
  identifiers (never qualified, never with the text the user typed); ``depots.city`` is the
  one name of a dimension column (``[[sources.X.dimensions]]``);
* literals: numbers, strings (no NUL), ``true``/``false``, ``NULL``, and
  ``DATE '...'`` / ``TIMESTAMP '...'`` (ISO 8601) — each re-created as a typed literal;
* comparisons (``= <> < <= > >=``, ``IS [NOT] DISTINCT FROM``), ``AND``/``OR``/``NOT``,
  ``IN (list)``, ``BETWEEN``, ``IS [NOT] NULL``, ``IS [NOT] TRUE/FALSE``, ``[I]LIKE``
  (optionally with ``ESCAPE``), ``+ - * / %`` and unary minus, parentheses;
* the scalar functions ``lower upper trim length abs round floor ceil coalesce``.

The same text means the same thing on every engine (issue 9.8); per-dialect SQL implements
these definitions exactly (``Dialect.like`` / ``Dialect.round_half_away``):

* ``round(x, n)`` (n a whole number from -15 to 15, default 0) reads x as a double, forms
  y = x * 10^n (x / 10^-n for n < 0) in double arithmetic, takes the whole number nearest y
  with **ties away from zero** and scales back (``r / 10^n``); |x| >= 2^52 is left as it is.
  So ``round(87/60, 1)`` is 1.5 and ``round(-0.125, 2)`` is -0.13 everywhere (PostgreSQL's
  own round of a double ties to even; SQLite's rounds 0.49999999999999994 up). Reference:
  Python ``decimal.Decimal(y)`` (the exact binary value) quantized ROUND_HALF_UP.
  Written out, the rounding repeats its operand: round() may nest two deep.
* ``x LIKE 'pattern'``: case- and accent-sensitive, character by character (a character is a
  code point, whatever the encoding or collation): ``%`` any run of characters, ``_``
  exactly one. There is **no escape character** unless the text says ``ESCAPE 'c'``; then
  ``c%``, ``c_`` and ``cc`` are literal and c before anything else is refused. A backslash
  is an ordinary character. The pattern must be a string literal.
* ``x ILIKE 'pattern'``: the same, with the ASCII letters A-Z and a-z equal; every other
  character (``Ü`` / ``ü``, ``Σ`` / ``σ``) still compares exactly, on every engine and
  locale (MariaDB has no ILIKE and folds by collation; PostgreSQL's by locale).
* ``NOT LIKE`` / ``NOT ILIKE`` are the negations (NULL stays NULL).

How each target writes them: standard ``LIKE ... ESCAPE '!'`` (the planner's own escape
character) on DuckDB, PostgreSQL, Spark, Snowflake, Trino, Redshift; MySQL/MariaDB compare
``CONVERT(x USING utf8mb4) COLLATE utf8mb4_bin``; SQLite uses ``GLOB`` for LIKE (its LIKE
folds ASCII case, which is exactly ILIKE there); ClickHouse and BigQuery escape with a
backslash (no ESCAPE clause); T-SQL writes ``[%] [_] [[]`` under a BIN2 collation. ILIKE
lower-cases the pattern's ASCII letters here and the value's with ``TRANSLATE`` (ClickHouse:
``lower``, ASCII-only; MySQL/SQLite: 26 ``REPLACE`` calls).

Everything else (sub-queries, other functions such as ``read_csv`` or ``pg_read_file``,
casts to other types, placeholders, comments, several statements, ...) is refused with a
:class:`~planner.errors.PlanError` (422) whose pointer is ``/filter_sql`` and whose detail
quotes the offending text.

Types are checked here, from the catalog, so a mistyped filter is a 422 and not an engine
error: arithmetic needs numbers, ``LIKE`` needs text, both sides of a comparison must be of
one kind (a string literal compared with a timestamp column must be an ISO 8601 instant and
becomes a typed timestamp literal). Division is always true division (``CAST(a AS DOUBLE) /
NULLIF(b, 0)``) and ``%`` needs integers (``a % NULLIF(b, 0)``), so ``x / 0`` is NULL on every
engine instead of an error on some and infinity on others.

This module is pure (no I/O); the service calls it through ``planner.where``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import sqlglot
from sqlglot import exp
from sqlglot.tokens import TokenType

from planner.dialects.base import Dialect
from planner.errors import PlanError, nearest, pointer
from planner.schema import ColumnInfo, SourceSchema
from planner.values import _parse_instant  # one ISO 8601 reading for where and filter_sql

#: Read dialect of the text: DuckDB-flavoured generic SQL.
READ_DIALECT = "duckdb"
#: Default caps; the service passes its configured ``[limits]`` values.
MAX_CHARS = 4096
MAX_DEPTH = 48
MAX_NODES = 2000
MAX_IN_LIST = 10_000
#: cap on the size of one rebuilt round() operand tree (round repeats its operand)
MAX_BUILT_NODES = 20_000

PTR = pointer("filter_sql")

_INT = re.compile(r"[+-]?\d+")
_TEMPORAL = ("timestamp", "timestamptz", "date")


def _quote(text: str, limit: int = 120) -> str:
    text = text if len(text) <= limit else text[: limit - 1] + "…"
    return repr(text)


def _fail(detail: str, slug: str = "bad-filter-sql", suggestions: list[str] | None = None) -> PlanError:
    return PlanError(PTR, detail, slug=slug, title="filter_sql is not allowed",
                     suggestions=suggestions)


@dataclass
class _Typed:
    """A rebuilt expression and its kind: integer | number | string | boolean | timestamp |
    timestamptz | date | null, plus whether it is a bare string (or typed date) literal that
    may still become a timestamp literal next to a temporal operand."""

    node: exp.Expression
    kind: str
    literal_text: str | None = None  # the string of a bare string / DATE / TIMESTAMP literal

    @property
    def numeric(self) -> bool:
        return self.kind in ("integer", "number")

    @property
    def temporal(self) -> bool:
        return self.kind in _TEMPORAL


def _col_kind(col: ColumnInfo) -> str:
    if col.kind == "integer":
        return "integer"
    if col.kind in ("double", "decimal"):
        return "number"
    return col.kind


class _Builder:
    def __init__(self, schema: SourceSchema, d: Dialect, max_in_list: int,
                 tz: str | None = None) -> None:
        self.schema, self.d, self.max_in_list = schema, d, max_in_list
        self.tz = tz  # zone of offset-less TIMESTAMP literals (None: the request's, else UTC)
        self.nodes = 0

    # ---- helpers -----------------------------------------------------------------
    @staticmethod
    def _text(node: exp.Expression) -> str:
        try:
            return node.sql(dialect=READ_DIALECT)
        except Exception:  # noqa: BLE001 - only used for messages
            return type(node).__name__

    def _refuse(self, node: exp.Expression, what: str | None = None) -> PlanError:
        what = what or _DESCRIBE.get(type(node), f"{type(node).__name__} expressions")
        return _fail(f"{what} are not allowed in filter_sql: {_quote(self._text(node))}")

    def _only_args(self, node: exp.Expression, allowed: set[str]) -> None:
        extra = [k for k, v in node.args.items() if v not in (None, False, []) and k not in allowed]
        if extra:
            what = ("qualified column names" if isinstance(node, exp.Column) else
                    f"{type(node).__name__} expressions with {', '.join(sorted(extra))}")
            raise self._refuse(node, what)

    def _instant(self, t: _Typed, kind: str, node: exp.Expression) -> exp.Expression:
        assert t.literal_text is not None
        try:
            value = _parse_instant(t.literal_text, PTR, self.tz)
        except PlanError as e:
            if e.slug == "out-of-range":
                raise _fail(e.detail, slug="out-of-range") from None
            raise _fail(f"{_quote(t.literal_text)} is compared with a {kind} but is not an ISO "
                        f"8601 date or timestamp (in {_quote(self._text(node))})",
                        slug="type-mismatch") from None
        return self.d.timestamp_literal(value, kind)

    def _unify(self, parts: list[_Typed], node: exp.Expression) -> tuple[list[exp.Expression], str]:
        """Operands of one comparison / IN / BETWEEN / coalesce: one kind for all of them."""
        kinds = {p.kind for p in parts if p.kind != "null"}
        temporal = [p for p in parts if p.temporal and p.literal_text is None]
        if temporal:
            target = temporal[0].kind
            out = []
            for p in parts:
                if p.literal_text is not None:
                    out.append(self._instant(p, target, node))
                elif p.temporal or p.kind == "null":
                    out.append(p.node)
                else:
                    raise _fail(f"cannot compare a {target} with a {p.kind}: "
                                f"{_quote(self._text(node))}", slug="type-mismatch")
            return out, target
        if kinds <= {"integer", "number"} and kinds:
            return [p.node for p in parts], ("integer" if kinds == {"integer"} else "number")
        # typed DATE/TIMESTAMP literals among themselves or with strings: compare as instants
        if kinds <= set(_TEMPORAL) | {"string"} and kinds & set(_TEMPORAL):
            if all(p.literal_text is not None or p.kind == "null" for p in parts):
                target = next(k for k in ("timestamptz", "timestamp", "date") if k in kinds)
                return [self._instant(p, target, node) if p.literal_text is not None else p.node
                        for p in parts], target
        if len(kinds) > 1:
            raise _fail(f"cannot compare {' with '.join(sorted(kinds))}: "
                        f"{_quote(self._text(node))}", slug="type-mismatch")
        return [p.node for p in parts], (kinds.pop() if kinds else "null")

    def _need(self, t: _Typed, kinds: tuple[str, ...], what: str, node: exp.Expression) -> None:
        if t.kind not in kinds and t.kind != "null":
            raise _fail(f"{what} needs {' or '.join(kinds)}, got {t.kind}: "
                        f"{_quote(self._text(node))}", slug="type-mismatch")

    # ---- the walk ----------------------------------------------------------------
    def build(self, node: exp.Expression, depth: int = 0) -> _Typed:
        self.nodes += 1
        if depth > MAX_DEPTH or self.nodes > MAX_NODES:
            raise _fail(f"filter_sql is nested too deeply or too long (at most {MAX_DEPTH} "
                        f"levels and {MAX_NODES} terms)", slug="limit-exceeded")
        d = self.d
        sub = lambda n: self.build(n, depth + 1)  # noqa: E731

        if isinstance(node, exp.Paren):
            self._only_args(node, {"this"})
            t = sub(node.this)
            return _Typed(exp.Paren(this=t.node), t.kind, t.literal_text)

        if isinstance(node, exp.Column):
            table = node.args.get("table")
            if isinstance(table, exp.Identifier) and isinstance(node.this, exp.Identifier):
                # a dimension column: depots.city ([[sources.X.dimensions]]) is one name
                self._only_args(node, {"this", "table"})
                quoted = bool(table.args.get("quoted") or node.this.args.get("quoted"))
                return self._column(exp.Identifier(this=f"{table.name}.{node.this.name}",
                                                   quoted=quoted), node)
            self._only_args(node, {"this"})
            ident = node.this
            if not isinstance(ident, exp.Identifier):
                raise self._refuse(node, "this kind of column reference")
            return self._column(ident, node)

        if isinstance(node, exp.Literal):
            self._only_args(node, {"this", "is_string"})
            if node.is_string:
                value = node.this
                if "\x00" in value:
                    raise _fail("strings in filter_sql may not contain NUL characters",
                                slug="bad-value")
                return _Typed(d.string(value), "string", value)
            return self._number(node)

        if isinstance(node, exp.Boolean):
            return _Typed(d.boolean(bool(node.this)), "boolean")

        if isinstance(node, exp.Null):
            return _Typed(exp.Null(), "null")

        if isinstance(node, exp.Cast):
            return self._typed_literal(node)

        if isinstance(node, (exp.And, exp.Or)):
            # a long AND / OR chain is one level, not one level per term: flatten it without
            # recursion and rebuild it left-deep (as the parser wrote it)
            op = type(node)
            operands: list[exp.Expression] = []
            stack = [node]
            while stack:
                n = stack.pop()
                if type(n) is op:
                    self._only_args(n, {"this", "expression"})
                    self.nodes += 1
                    stack += [n.expression, n.this]
                else:
                    operands.append(n)
            built = []
            for o in operands:
                t = sub(o)
                self._need(t, ("boolean",), op.__name__.upper(), node)
                built.append(t.node)
            out = built[0]
            for b in built[1:]:
                out = op(this=out, expression=b)
            return _Typed(out, "boolean")

        if isinstance(node, exp.Not):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("boolean",), "NOT", node)
            return _Typed(exp.Not(this=a.node), "boolean")

        if isinstance(node, _COMPARISONS):
            self._only_args(node, {"this", "expression"})
            (a, b), kind = self._unify([sub(node.this), sub(node.expression)], node)
            if kind == "boolean" and not isinstance(node, (exp.EQ, exp.NEQ, exp.NullSafeEQ,
                                                           exp.NullSafeNEQ)):
                raise _fail(f"booleans compare only with = or <>: {_quote(self._text(node))}",
                            slug="type-mismatch")
            return _Typed(type(node)(this=a, expression=b), "boolean")

        if isinstance(node, exp.Between):
            self._only_args(node, {"this", "low", "high"})
            (a, lo, hi), _ = self._unify([sub(node.this), sub(node.args["low"]),
                                          sub(node.args["high"])], node)
            return _Typed(exp.Between(this=a, low=lo, high=hi), "boolean")

        if isinstance(node, exp.In):
            self._only_args(node, {"this", "expressions"})
            items = node.expressions
            if not items:
                raise self._refuse(node, "IN without a list")
            if len(items) > self.max_in_list:
                raise _fail(f"IN lists in filter_sql may have at most {self.max_in_list} "
                            f"values (got {len(items)})", slug="limit-exceeded")
            parts, kind = self._unify([sub(node.this)] + [sub(i) for i in items], node)
            if kind == "number":  # -0.0 is looked up as 0.0 (Dialect.group_number)
                parts = [self.d.group_number(p) for p in parts]
            return _Typed(exp.In(this=parts[0], expressions=parts[1:]), "boolean")

        if isinstance(node, exp.Is):
            self._only_args(node, {"this", "expression"})
            a = sub(node.this)
            rhs = node.expression
            if isinstance(rhs, exp.Null):
                return _Typed(exp.Is(this=a.node, expression=exp.Null()), "boolean")
            if isinstance(rhs, exp.Boolean):
                self._need(a, ("boolean",), "IS TRUE / IS FALSE", node)
                return _Typed(exp.Is(this=a.node, expression=d.boolean(bool(rhs.this))), "boolean")
            raise self._refuse(node, "IS with anything but NULL, TRUE or FALSE")

        if isinstance(node, (exp.Like, exp.ILike)):
            return self._like(node, None, depth)

        if isinstance(node, exp.Escape):
            self._only_args(node, {"this", "expression"})
            inner = node.this
            if not isinstance(inner, (exp.Like, exp.ILike)):
                raise self._refuse(node, "ESCAPE outside LIKE")
            esc = node.expression
            if not (isinstance(esc, exp.Literal) and esc.is_string and len(esc.this) == 1
                    and esc.this != "\x00"):
                raise _fail(f"ESCAPE takes one character: {_quote(self._text(node))}")
            return self._like(inner, esc.this, depth)

        if isinstance(node, exp.Neg):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("integer", "number"), "unary minus", node)
            return _Typed(exp.Neg(this=a.node), a.kind)

        if isinstance(node, (exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Mod)):
            self._only_args(node, {"this", "expression", "typed", "safe"})
            a, b = sub(node.this), sub(node.expression)
            op = {exp.Add: "+", exp.Sub: "-", exp.Mul: "*", exp.Div: "/", exp.Mod: "%"}[type(node)]
            if isinstance(node, exp.Mod):
                for t in (a, b):
                    self._need(t, ("integer",), "%", node)
                return _Typed(exp.Mod(this=a.node, expression=self._nonzero(b.node)), "integer")
            for t in (a, b):
                self._need(t, ("integer", "number"), op, node)
            if isinstance(node, exp.Div):
                return _Typed(exp.Div(this=d.double(a.node), expression=self._nonzero(b.node),
                                      typed=False, safe=False), "number")
            kind = "integer" if a.kind == b.kind == "integer" else "number"
            return _Typed(type(node)(this=a.node, expression=b.node), kind)

        if isinstance(node, (exp.Lower, exp.Upper)):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("string",), type(node).__name__.lower(), node)
            return _Typed(type(node)(this=a.node), "string")

        if isinstance(node, exp.Trim):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("string",), "trim", node)
            return _Typed(exp.Trim(this=a.node), "string")

        if isinstance(node, exp.Length):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("string",), "length", node)
            return _Typed(exp.Length(this=a.node), "integer")

        if isinstance(node, exp.Abs):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("integer", "number"), "abs", node)
            return _Typed(exp.Abs(this=a.node), a.kind)

        if isinstance(node, (exp.Floor, exp.Ceil)):
            self._only_args(node, {"this"})
            a = sub(node.this)
            self._need(a, ("integer", "number"), type(node).__name__.lower(), node)
            return _Typed(type(node)(this=a.node), a.kind)

        if isinstance(node, exp.Round):
            self._only_args(node, {"this", "decimals"})
            a = sub(node.this)
            self._need(a, ("integer", "number"), "round", node)
            # the written-out rounding repeats its operand: nested rounds grow fast
            if sum(1 for _ in a.node.walk()) * 10 > MAX_BUILT_NODES:
                raise _fail("round() is nested too deeply in filter_sql", slug="limit-exceeded")
            places = node.args.get("decimals")
            if places is None:
                return _Typed(round_half_away(d, a.node, 0), "number")
            sign = 1
            if isinstance(places, exp.Neg):  # round(x, -1): a negated literal
                sign, places = -1, places.this
            if not (isinstance(places, exp.Literal) and not places.is_string
                    and _INT.fullmatch(places.this) and -15 <= int(places.this) <= 15):
                raise _fail("round(x, n) needs n as a whole number from -15 to 15: "
                            f"{_quote(self._text(node))}")
            return _Typed(round_half_away(d, a.node, sign * int(places.this)), "number")

        if isinstance(node, exp.Coalesce):
            self._only_args(node, {"this", "expressions"})
            parts, kind = self._unify([sub(node.this)] + [sub(e) for e in node.expressions], node)
            return _Typed(exp.Coalesce(this=parts[0], expressions=parts[1:]), kind)

        raise self._refuse(node)

    # ---- node kinds ----------------------------------------------------------------
    def _column(self, ident: exp.Identifier, node: exp.Expression) -> _Typed:
        name = ident.this
        col = self.schema.column(name)
        if col is None and not ident.quoted:
            folded = [c for c in self.schema.columns if c.lower() == name.lower()]
            if len(folded) == 1:
                col = self.schema.column(folded[0])
        if col is None:
            sugg = nearest(name, self.schema.columns)
            hint = f"; did you mean {', '.join(repr(s) for s in sugg)}?" if sugg else ""
            raise _fail(f"unknown column {_quote(name)} in filter_sql (source "
                        f"{self.schema.name!r}){hint}", slug="unknown-column", suggestions=sugg)
        kind = _col_kind(col)
        if kind not in ("integer", "number", "string", "boolean") + _TEMPORAL:
            raise _fail(f"column {col.name!r} has type {col.sql_type}, which filter_sql cannot "
                        "use", slug="type-mismatch")
        return _Typed(self.d.column(col.name, "s"), kind)

    def _number(self, node: exp.Literal) -> _Typed:
        text = node.this
        if _INT.fullmatch(text):
            v: int | float = int(text)
            if abs(v) > 2**63 - 1:
                raise _fail(f"the number {_quote(text)} is too large", slug="bad-value")
            return _Typed(self.d.number(v), "integer")
        try:
            f = float(text)
        except ValueError:
            raise self._refuse(node, "this number syntax") from None
        if not math.isfinite(f):
            raise _fail(f"numbers must be finite: {_quote(text)}", slug="bad-value")
        return _Typed(self.d.number(f), "number")

    def _typed_literal(self, node: exp.Cast) -> _Typed:
        """``DATE '2026-01-01'`` / ``TIMESTAMP '...'`` (sqlglot reads them as casts)."""
        to = node.args.get("to")
        inner = node.this
        if (isinstance(inner, exp.Literal) and inner.is_string and isinstance(to, exp.DataType)
                and not to.expressions):
            t = to.this
            kind = ("date" if t in (exp.DataType.Type.DATE,) else
                    "timestamptz" if t in (exp.DataType.Type.TIMESTAMPTZ,) else
                    "timestamp" if t in (exp.DataType.Type.TIMESTAMP,
                                         exp.DataType.Type.TIMESTAMPNTZ) else None)
            if kind is not None:
                if "\x00" in inner.this:
                    raise _fail("strings in filter_sql may not contain NUL characters",
                                slug="bad-value")
                typed = _Typed(exp.Null(), "string", inner.this)
                # a typed literal standing alone is checked (and rebuilt) right here
                return _Typed(self._instant(typed, kind, node), kind, inner.this)
        raise self._refuse(node, "casts (other than DATE '...' and TIMESTAMP '...' literals)")

    def _like(self, node: exp.Expression, escape: str | None, depth: int) -> _Typed:
        """[NOT] [I]LIKE with the semantics of the module docstring, written per dialect."""
        self._only_args(node, {"this", "expression", "negate"})
        a = self.build(node.this, depth + 1)
        self._need(a, ("string",), "LIKE", node)
        pat = node.expression
        if not (isinstance(pat, exp.Literal) and pat.is_string):
            raise _fail(f"a LIKE pattern must be a string literal: {_quote(self._text(node))}",
                        slug="type-mismatch")
        if "\x00" in pat.this:
            raise _fail("strings in filter_sql may not contain NUL characters", slug="bad-value")
        fold = isinstance(node, exp.ILike)
        parts = like_parts(pat.this, escape, fold, self._text(node))
        out = self.d.like(a.node, parts, fold)
        if node.args.get("negate"):
            out = exp.Not(this=exp.Paren(this=out))
        return _Typed(out, "boolean")

    @staticmethod
    def _nonzero(e: exp.Expression) -> exp.Expression:
        if isinstance(e, exp.Nullif) and e.expression == exp.Literal.number(0):
            return e  # NULLIF(b, 0) written by the user already
        return exp.Nullif(this=e, expression=exp.Literal.number(0))


def like_parts(pattern: str, escape: str | None, fold: bool, where: str
               ) -> tuple[tuple[str, str], ...]:
    """A LIKE pattern read by the SQL standard's rules: ``%`` any run of characters, ``_`` one
    character; with ``ESCAPE 'c'`` the pairs ``c%``, ``c_`` and ``cc`` are literal characters
    and c before anything else is an error; without ESCAPE every other character (the
    backslash too) is itself. ``fold`` (ILIKE) lower-cases the ASCII letters of literals."""
    parts: list[tuple[str, str]] = []
    lit: list[str] = []
    i = 0
    while i < len(pattern):
        ch = pattern[i]
        if escape is not None and ch == escape:
            nxt = pattern[i + 1] if i + 1 < len(pattern) else None
            if nxt not in ("%", "_", escape):
                raise _fail(f"in a LIKE pattern the ESCAPE character {escape!r} must come before "
                            f"%, _ or itself: {_quote(where)}")
            lit.append(nxt)
            i += 2
            continue
        if ch in "%_":
            if lit:
                parts.append(("lit", "".join(lit)))
                lit = []
            if not (ch == "%" and parts and parts[-1][0] == "any"):  # %% is %
                parts.append(("any" if ch == "%" else "one", ""))
        else:
            lit.append(ch)
        i += 1
    if lit:
        parts.append(("lit", "".join(lit)))
    if fold:
        parts = [(k, _ascii_lower(t)) for k, t in parts]
    return tuple(parts)


def _ascii_lower(text: str) -> str:
    return "".join(chr(ord(c) + 32) if "A" <= c <= "Z" else c for c in text)


#: |x| at and above which every double is a whole number
_WHOLE = 2.0 ** 52


def round_half_away(d: Dialect, x: exp.Expression, n: int) -> exp.Expression:
    """``round(x, n)``: y = x * 10^n (x / 10^-n for n < 0) in double arithmetic, the whole
    number nearest y with ties away from zero, scaled back; |x| >= 2^52 is already whole."""
    v = d.double(x)
    if n == 0:
        return d.round_half_away(v)
    if n > 0:
        scale = d.real(10.0 ** n)
        y = exp.Mul(this=d.paren(v.copy()), expression=scale)
        back = exp.Div(this=d.round_half_away(y), expression=scale.copy(), typed=False, safe=False)
        return exp.Case(ifs=[exp.If(this=exp.GTE(this=exp.Abs(this=v.copy()),
                                                 expression=d.real(_WHOLE)), true=v.copy())],
                        default=back)
    scale = d.real(10.0 ** -n)
    y = exp.Div(this=d.paren(v.copy()), expression=scale, typed=False, safe=False)
    return exp.Mul(this=exp.Paren(this=d.round_half_away(y)), expression=scale.copy())


_COMPARISONS = (exp.EQ, exp.NEQ, exp.LT, exp.LTE, exp.GT, exp.GTE, exp.NullSafeEQ,
                exp.NullSafeNEQ)

_DESCRIBE: dict[type, str] = {
    exp.Select: "sub-queries", exp.Subquery: "sub-queries", exp.Exists: "sub-queries",
    exp.Anonymous: "functions outside the allow-list (lower upper trim length abs round "
                   "floor ceil coalesce)",
    exp.Placeholder: "placeholders", exp.Star: "*", exp.Dot: "qualified names",
    exp.Case: "CASE expressions", exp.Window: "window functions",
}


def _check_tokens(text: str) -> None:
    try:
        tokens = sqlglot.Dialect.get_or_raise(READ_DIALECT).tokenize(text)
    except Exception as e:  # noqa: BLE001 - sqlglot raises TokenError and friends
        raise _fail(f"filter_sql cannot be read ({_short(e)}): {_quote(text)}") from None
    for tok in tokens:
        if tok.comments:
            raise _fail(f"comments are not allowed in filter_sql: {_quote(text)}")
        if tok.token_type == TokenType.SEMICOLON:
            raise _fail(f"filter_sql is one condition, not statements (found ';'): {_quote(text)}")


def _short(e: Exception) -> str:
    msg = str(e).splitlines()[0] if str(e) else type(e).__name__
    return msg[:160]


def parse_text(text: str, max_chars: int = MAX_CHARS) -> exp.Expression:
    """The checks every SQL text of a request or config passes before it is rebuilt (length,
    NUL, nesting, comments, one statement) and sqlglot's parse of it (``planner.expr_sql``
    shares them; the config checks a key's row condition with it before any source is
    opened)."""
    if len(text) > max_chars:
        raise _fail(f"filter_sql has {len(text)} characters; the limit is {max_chars}",
                    slug="limit-exceeded")
    if "\x00" in text:
        raise _fail("filter_sql may not contain NUL characters", slug="bad-value")
    if not text.strip():
        raise _fail("filter_sql is empty: write a condition such as \"fee > 10\"")
    # Cheap guard before the recursive-descent parser: deep nesting is refused up front.
    depth = best = 0
    for ch in text:
        if ch == "(":
            depth += 1
            best = max(best, depth)
        elif ch == ")":
            depth -= 1
    if best > MAX_DEPTH:
        raise _fail(f"filter_sql is nested too deeply (more than {MAX_DEPTH} parentheses)",
                    slug="limit-exceeded")
    _check_tokens(text)
    try:
        return sqlglot.parse_one(text, read=READ_DIALECT, into=exp.Condition)
    except RecursionError:
        raise _fail("filter_sql is nested too deeply", slug="limit-exceeded") from None
    except Exception as e:  # noqa: BLE001 - ParseError, TokenError, ...
        raise _fail(f"filter_sql must be a single SQL condition such as \"fee > 10 AND "
                    f"depot IN ('North Yard')\"; cannot read {_quote(text)} "
                    f"({_short(e)})") from None


def compile_filter_sql(text: str, schema: SourceSchema, d: Dialect, *,
                       max_chars: int = MAX_CHARS, max_in_list: int = MAX_IN_LIST,
                       tz: str | None = None) -> exp.Expression:
    """Parse, check and rebuild ``text``; the result is a boolean expression over ``"s"``."""
    try:
        parsed = parse_text(text, max_chars)
        built = _Builder(schema, d, max_in_list, tz).build(parsed)
    except RecursionError:
        raise _fail("filter_sql is nested too deeply", slug="limit-exceeded") from None
    if built.kind not in ("boolean",):
        raise _fail(f"filter_sql must be a condition (true or false), not a {built.kind}: "
                    f"{_quote(text)}", slug="type-mismatch")
    return exp.Paren(this=built.node)
