"""The capability layer: how each construct the planner needs is written for one target.

A dialect is mostly data (its sqlglot dialect name, its ``Capabilities`` record -- the set
of features it cannot express and every other fact the planner asks -- and the spellings of
its functions) plus small methods that build sqlglot expressions for the constructs where
targets differ. The compiler only ever calls these methods; it never assumes that sqlglot's
generic transpile produces valid SQL for a target.

Add a dialect: subclass ``Dialect`` in a new module, override what differs, register it in
``planner.dialects.DIALECTS``. Where the target cannot express a construct faithfully, list
the feature in ``caps.unsupported`` so the request is refused with a clear 422.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import re
import sys
from typing import ClassVar

from sqlglot import exp

from planner.dialects.capabilities import Capabilities

_UPPER = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
#: a UUID type name, ClickHouse's wrappers included
_UUID = re.compile(r"(nullable\()?(lowcardinality\()?uuid\)*")
#: Features a dialect may refuse, with the words used in the error message.
FEATURES: dict[str, str] = {
    "median": "exact median",
    "quantile": "exact quantile",
    "approx_count_distinct": "approximate count distinct",
    "count_distinct": "count distinct",
    "stddev": "standard deviation / variance",
    "tz": "time zone conversion",
    "trunc_week": "ISO week truncation",
    "extract": "date part extraction",
    "window": "window functions (stack, top, facet caps)",
    "nulls_order": "NULL ordering",
    "grouping_sets": "GROUPING SETS",
}

#: Rows of the README capability table: (feature key, label). A row is a feature a dialect
#: may refuse (``Capabilities.unsupported``), a field of ``Capabilities`` (its metadata names
#: the row) or a construct every dialect writes its own way (``notes``); the cell text comes
#: from ``Dialect.how``.
TABLE_ROWS: tuple[tuple[str, str], ...] = (
    ("engine", "checked against"),
    ("quantile", "median / quantile (exact, type 7)"),
    ("approx_count_distinct", "approx_count_distinct"),
    ("stddev", "stddev / variance"),
    ("tz", "time zones (`tz`)"),
    ("trunc_week", "ISO week `trunc`"),
    ("extract", "`extract` (isodow, isoyear, ...)"),
    ("window", "stack / top / facet max_groups"),
    ("nulls_order", "NULL ordering"),
    ("null_safe_eq", "null-safe equality"),
    ("text_match", "contains / starts_with"),
    ("division", "division"),
    ("limit", "row limit"),
    ("quoting", "identifier quoting"),
    ("identifiers", "output name limits"),
    ("params", "bound parameters (IN lists), paramstyle"),
    ("m4", "M4 `reduce`"),
    ("grouping_sets", "batch: charts under one filter (GROUPING SETS)"),
)

#: Cell text of the ``params`` row per ``Capabilities.param_form`` form.
_PARAM_FORMS = {"list": "one array (UNNEST)", "json": "one JSON array (json_each)",
                "each": "one per value"}


class Dialect:
    """Base: ANSI-ish SQL, overridden per target."""

    name: ClassVar[str] = "ansi"
    sqlglot: ClassVar[str] = ""  # sqlglot dialect name
    #: What the target can do: every fact the planner asks of it (planner/dialects/capabilities.py).
    caps: ClassVar[Capabilities] = Capabilities()
    #: Typed timestamp literals: the type of an instant, the text that names UTC after the
    #: wall-clock digits, and the type of a naive wall-clock time.
    instant_type: ClassVar[str] = "TIMESTAMPTZ"
    instant_suffix: ClassVar[str] = "+00:00"
    naive_type: ClassVar[str] = "TIMESTAMP"
    #: Cell text of the capability table for constructs written the target's own way.
    notes: ClassVar[dict[str, str]] = {}

    def __init_subclass__(cls, **kwargs) -> None:
        """A record field set as a class attribute would be silently ignored: refuse it."""
        super().__init_subclass__(**kwargs)
        stray = sorted(set(vars(cls)) & {f.name for f in dataclasses.fields(Capabilities)})
        if stray:
            raise TypeError(f"{cls.__name__}: {', '.join(stray)} belong in caps = Capabilities(...)")

    def param_array(self, marker: exp.Expression, value_type: type) -> exp.Expression:
        """The array parameter of the "list" form as the engine needs it typed."""
        return marker

    # --- rendering ------------------------------------------------------------------
    def render(self, node: exp.Expression) -> str:
        if self.caps.window_extremes == "first_value":
            node = node.transform(self._first_value_extreme)
        return node.sql(dialect=self.sqlglot or None, identify=True)

    def _first_value_extreme(self, node: exp.Expression) -> exp.Expression:
        """In a SELECT, each ``MIN / MAX(e) OVER (PARTITION BY p)`` as ``FIRST_VALUE(e) OVER
        (PARTITION BY p ORDER BY e [DESC], NULLs last)``: the same value in every row of the
        partition (the smallest / largest non-NULL e, NULL when there is none), computed in
        one sort (``caps.window_extremes``). A window's ORDER BY may name the select list's
        aliases (MariaDB reads ``_sluice_n`` there as the window aliased so, and refuses it),
        so its columns are qualified with the one relation of the FROM; a SELECT with joins
        keeps its windows."""
        if not isinstance(node, exp.Select):
            return node
        source = node.args.get("from_")
        source = source.this if source is not None else None
        if node.args.get("joins") or not isinstance(source, (exp.Table, exp.Subquery)) \
                or not source.alias_or_name:
            return node
        relation = source.alias_or_name
        for w in list(node.expressions):
            for win in list(w.find_all(exp.Window)):
                if (not isinstance(win.this, (exp.Min, exp.Max)) or win.args.get("order")
                        or win.args.get("spec") or win.find_ancestor(exp.Select) is not node):
                    continue
                e = win.this.this.copy()
                for c in e.find_all(exp.Column):
                    if not c.table:
                        c.set("table", exp.to_identifier(relation, quoted=True))
                order = self.order(e, desc=isinstance(win.this, exp.Max), nulls_first=False)
                win.replace(exp.Window(
                    this=exp.FirstValue(this=win.this.this.copy()),
                    partition_by=[p.copy() for p in win.args.get("partition_by") or []],
                    order=exp.Order(expressions=order)))
        return node

    def supports(self, feature: str) -> bool:
        return feature not in self.caps.unsupported

    def how(self, feature: str) -> str:
        """Capability-table cell: how the feature is written here, or why it is refused
        (facts from ``caps``, the target's own spellings from ``notes``)."""
        c = self.caps
        if feature == "engine":
            if c.checked != "live":
                return "golden SQL + parse"
            return self.notes.get("engine", "live engine")
        if feature == "quantile" and not self.supports("quantile"):
            return "no (422)"
        if feature == "quantile" and c.quantile_method == "window":
            return "built from ROW_NUMBER / COUNT"
        if feature == "stddev" and self.supports("stddev") and c.stddev_method == "two_pass":
            return "built: two-pass (window AVG)"
        if feature in c.unsupported:
            return "no (422)" if feature != "tz" else "UTC only (422)"
        if feature == "nulls_order" and "nulls_order" not in self.notes:
            return "native" if c.nulls_order_native else "emulated (CASE)"
        if feature == "approx_count_distinct" and feature not in self.notes:
            method, err = c.approx_distinct
            return method if err is None else f"{method} (rse {err:g})"
        if feature == "params":
            if c.param_form is None:
                return "no (literals)"
            form, style = c.param_form
            return f"{_PARAM_FORMS[form]}, {style}"
        if feature == "identifiers":
            limits = []
            if c.max_identifier_bytes is not None:
                limits.append(f"{c.max_identifier_bytes} bytes")
            if c.identifiers_bmp_only:
                limits.append("BMP only")
            return "; ".join(limits) + " (422)" if limits else "no limit"
        if feature == "m4":
            return "arg_min / arg_max" if c.arg_min_max else "no (422)"
        if feature == "grouping_sets":
            if not c.grouping_sets:
                return "one statement per chart"
            if c.shared_cte is None:
                return "GROUPING SETS; one statement per chart (CTE not shared)"
            return ("one statement (GROUPING SETS, CTE AS MATERIALIZED)"
                    if c.shared_cte == "materialized" else "one statement (GROUPING SETS)")
        return self.notes.get(feature, "yes")

    # --- small builders for subclasses ------------------------------------------------
    @staticmethod
    def fn(name: str, *args: exp.Expression) -> exp.Expression:
        """``NAME(args)`` exactly as written (sqlglot does not rename anonymous calls)."""
        return exp.Anonymous(this=name, expressions=list(args))

    @staticmethod
    def lit(v: str | int | float) -> exp.Expression:
        if isinstance(v, str):
            return exp.Literal.string(v)
        return exp.Literal.number(v)

    @staticmethod
    def paren(e: exp.Expression) -> exp.Expression:
        """``(e)`` when e is an operator expression (ASTs built by hand carry no implicit
        precedence: ``Mul(Add(a, b), c)`` would render as ``a + b * c``)."""
        if isinstance(e, (exp.Binary, exp.Unary)) and not isinstance(e, exp.Paren):
            return exp.Paren(this=e)
        return e

    @staticmethod
    def var(name: str) -> exp.Var:
        return exp.Var(this=name)

    def cast(self, e: exp.Expression, type_sql: str) -> exp.Expression:
        # (type names parsed once, here and in the casts below: sqlglot's parser costs
        # ~0.03-0.1 ms a call, and every compiled statement builds its casts again)
        return exp.Cast(this=e, to=_data_type(type_sql, self.sqlglot or None).copy())

    def bigint(self, e: exp.Expression) -> exp.Expression:
        return exp.Cast(this=e, to=_data_type("BIGINT", None).copy())

    @staticmethod
    def wall_text(t: dt.datetime, micro: bool = False) -> str:
        """``YYYY-MM-DD HH:MM:SS[.ffffff]`` of the wall-clock digits of ``t`` (the year always
        4 digits: strftime writes year 1 as ``1``)."""
        return t.replace(tzinfo=None).isoformat(" ", "microseconds" if micro else "seconds")

    # --- names and literals -----------------------------------------------------------
    @staticmethod
    def ident(name: str) -> exp.Identifier:
        return exp.to_identifier(name, quoted=True)

    def column(self, name: str, table: str | None = None) -> exp.Column:
        return exp.Column(this=self.ident(name), table=self.ident(table) if table else None)

    def table(self, parts: tuple[str, ...]) -> exp.Table:
        parts = tuple(parts)
        name = self.ident(parts[-1])
        db = self.ident(parts[-2]) if len(parts) >= 2 else None
        catalog = self.ident(parts[-3]) if len(parts) >= 3 else None
        return exp.Table(this=name, db=db, catalog=catalog)

    def number(self, v: float | int) -> exp.Expression:
        if isinstance(v, bool):
            raise TypeError("bool is not a number")
        if isinstance(v, int):
            lit = exp.Literal.number(str(abs(v)))
        else:
            lit = exp.Literal.number(repr(abs(float(v))))
        return exp.Neg(this=lit) if v < 0 else lit

    def real(self, v: float) -> exp.Expression:
        """A float constant typed DOUBLE (a bare ``50.0`` is DECIMAL on several engines)."""
        return self.double(self.number(float(v)))

    def string(self, v: str) -> exp.Expression:
        return exp.Literal.string(v)

    def text_literal(self, v: str) -> exp.Expression:
        """A string compared with a text column in ``where`` (eq, ne, lt.., in, not_in)."""
        return self.string(v)

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        """A naive wall-clock time as the dialect's naive timestamp value (the type that
        ``to_local`` / ``trunc`` produce), e.g. a calendar bin start in empty_bins grids."""
        return self.cast(self.lit(self.wall_text(value)), self.naive_type)

    def boolean(self, v: bool) -> exp.Expression:
        return exp.Boolean(this=v)

    def double(self, e: exp.Expression) -> exp.Expression:
        return exp.Cast(this=e, to=_data_type("DOUBLE", None).copy())

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        """An instant (aware) as a literal comparable with a column of ``kind``: typed
        with ``instant_type`` (text + ``instant_suffix`` names UTC) or ``naive_type``."""
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.cast(self.lit(value.date().isoformat()), "DATE")
        text = self.wall_text(utc, True)
        if kind == "timestamptz":
            return self.cast(self.lit(text + self.instant_suffix), self.instant_type)
        return self.cast(self.lit(text), self.naive_type)

    # --- arithmetic -----------------------------------------------------------------
    def floor(self, e: exp.Expression) -> exp.Expression:
        return exp.Floor(this=e)

    # --- strings --------------------------------------------------------------------
    def contains(self, col: exp.Expression, s: str) -> exp.Expression:
        return exp.GT(this=exp.StrPosition(this=col, substr=self.string(s)),
                      expression=exp.Literal.number(0))

    def starts_with(self, col: exp.Expression, s: str) -> exp.Expression:
        return exp.EQ(
            this=exp.Substring(this=col, start=exp.Literal.number(1),
                               length=exp.Literal.number(len(s))),
            expression=self.string(s))

    # --- filter_sql: LIKE and round (semantics in planner/filter_sql.py) ----------------
    #: escape character of the LIKE patterns the planner writes (never the user's)
    like_escape: ClassVar[str] = "!"

    @staticmethod
    def like_text(parts: tuple[tuple[str, str], ...], escape: str, specials: str) -> str:
        """A LIKE pattern from parts (``("lit", text)``, ``("any", "")`` for %, ``("one", "")``
        for _): every character of ``specials`` and the escape itself escaped in literals."""
        out = []
        for kind, text in parts:
            if kind == "any":
                out.append("%")
            elif kind == "one":
                out.append("_")
            else:
                out.append("".join(escape + ch if ch in specials + escape else ch for ch in text))
        return "".join(out)

    def like(self, e: exp.Expression, parts: tuple[tuple[str, str], ...],
             fold: bool) -> exp.Expression:
        """``e`` matches the pattern: case-sensitive, character by character; with ``fold``
        ASCII letters of ``e`` compare lower-cased (the pattern's literals already are).
        Standard LIKE with an explicit ESCAPE (so no engine's default escape applies)."""
        if fold:
            e = self.ascii_lower(e)
        esc = self.like_escape
        return exp.Escape(this=exp.Like(this=e, expression=self.string(self.like_text(parts, esc, "%_"))),
                          expression=self.string(esc))

    def ascii_lower(self, e: exp.Expression) -> exp.Expression:
        """``e`` with A-Z turned into a-z and every other character unchanged (no locale)."""
        return self.fn("TRANSLATE", e, self.string(_UPPER), self.string(_UPPER.lower()))

    def replace_ascii_lower(self, e: exp.Expression) -> exp.Expression:
        """ascii_lower from 26 case-sensitive REPLACE calls (targets without TRANSLATE)."""
        for ch in _UPPER:
            e = self.fn("REPLACE", e, self.string(ch), self.string(ch.lower()))
        return e

    def round_half_away(self, y: exp.Expression) -> exp.Expression:
        """The whole number nearest the double ``y``, ties away from zero. Exact: for
        a = |y| >= 0, a - floor(a) is computed without rounding, and a >= 2^52 is whole."""
        a = exp.Abs(this=y.copy())
        f = self.floor(a.copy())
        r = exp.Case(ifs=[
            exp.If(this=exp.GTE(this=a.copy(), expression=self.real(2.0 ** 52)), true=a.copy()),
            exp.If(this=exp.GTE(this=exp.Sub(this=a.copy(), expression=f.copy()),
                                expression=self.real(0.5)),
                   true=exp.Add(this=f.copy(), expression=exp.Literal.number(1)))],
            default=f.copy())
        return exp.Case(ifs=[exp.If(this=exp.LT(this=y.copy(), expression=exp.Literal.number(0)),
                                    true=exp.Neg(this=exp.Paren(this=r.copy())))],
                        default=r)

    # --- time -----------------------------------------------------------------------
    def to_local(self, e: exp.Expression, kind: str, tz: str) -> exp.Expression:
        """Wall-clock time in ``tz`` (a naive timestamp) of a column value."""
        raise NotImplementedError

    def from_local(self, e: exp.Expression, tz: str) -> exp.Expression:
        """The instant (timestamp with time zone) of a naive wall-clock time in ``tz``."""
        raise NotImplementedError

    def trunc(self, unit: str, naive: exp.Expression) -> exp.Expression:
        """date_trunc of a naive timestamp; ``week`` is the ISO week (Monday)."""
        return exp.TimestampTrunc(this=naive, unit=exp.Var(this=unit.upper()))

    def add_units(self, naive: exp.Expression, n: int | exp.Expression,
                  unit: str) -> exp.Expression:
        """naive + n calendar units (day, week, month, quarter, year); ``n`` is a number or
        an integer expression (a bin number of an ``int_series``)."""
        if unit == "quarter":
            n, unit = self.times(n, 3), "month"
        if unit == "week":
            n, unit = self.times(n, 7), "day"
        if isinstance(n, exp.Expression):  # n * INTERVAL '1' UNIT
            return exp.Add(this=naive, expression=exp.Mul(this=self.paren(n), expression=exp.Interval(
                this=exp.Literal.string("1"), unit=exp.Var(this=unit.upper()))))
        return exp.Add(this=naive, expression=exp.Interval(
            this=exp.Literal.string(str(n)), unit=exp.Var(this=unit.upper())))

    def times(self, n: int | exp.Expression, k: int) -> int | exp.Expression:
        """n * k for a number or an expression."""
        if isinstance(n, exp.Expression):
            return exp.Mul(this=self.paren(n), expression=exp.Literal.number(k))
        return n * k

    def count_arg(self, n: int | exp.Expression) -> exp.Expression:
        """A count argument of a date function: the literal, or the expression itself."""
        return n if isinstance(n, exp.Expression) else self.lit(n)

    # --- generated rows -------------------------------------------------------------
    def int_series(self, n: int, name: str) -> exp.Select:
        """A SELECT of the integers 0 .. n-1 in column ``name`` (the bins of empty_bins).

        Portable form: the cross join of ceil(log10 n) ten-row digit tables, so the SQL grows
        with log n, not n; dialects with a series function override it."""
        sel = [exp.select(exp.alias_(exp.Literal.number(i), "d", quoted=True)) for i in range(10)]
        node: exp.Expression = sel[0]
        for q in sel[1:]:
            node = exp.union(node, q, distinct=False)
        places = max(1, len(str(max(n - 1, 0))))
        tables = [exp.alias_(exp.Subquery(this=node.copy()), f"p{j}", table=True, quoted=True)
                  for j in range(places)]
        value: exp.Expression = exp.column("d", "p0", quoted=True)
        for j in range(1, places):
            value = exp.Add(this=value, expression=exp.Mul(
                this=exp.column("d", f"p{j}", quoted=True), expression=exp.Literal.number(10 ** j)))
        q = exp.select(exp.alias_(value, name, quoted=True)).from_(tables[0])
        for t in tables[1:]:
            q = q.join(t, join_type="cross")
        return q.where(exp.LT(this=value.copy(), expression=exp.Literal.number(n)))

    def instant_range(self, e: exp.Expression, kind: str) -> exp.Expression | None:
        """``e`` lies in years 1..9999 (UTC), or None when the engine cannot hold others."""
        if not self.caps.wide_instants:
            return None
        lo = dt.datetime(1, 1, 1, tzinfo=dt.timezone.utc)
        hi = dt.datetime(9999, 12, 31, 23, 59, 59, 999999, tzinfo=dt.timezone.utc)
        return exp.Between(this=e, low=self.timestamp_literal(lo, kind),
                           high=self.timestamp_literal(hi, kind))

    def stored(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        """A table column as everything reads it, row conditions and computed columns
        included (``planner.source.relation``, beneath the source model), when the engine's
        own type cannot serve as its kind; None: as it is (the base: every type)."""
        return None

    def sum_input(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        """A column as ``sum`` reads it when the engine's own sum of its type can overflow
        where the exact sum would not; None: as it is (the engine widens: DuckDB sums
        BIGINT into HUGEINT, PostgreSQL into numeric, MariaDB into DECIMAL)."""
        return None

    def join_key(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        """A dimension table's key as a join compares it with the fact column (which is read
        through ``stored``): through ``stored`` too, so both sides have one type."""
        return self.stored(ref, sql_type, kind)

    def readable(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        """A column as every statement reads it (``planner.source.relation``, above the
        source model) when its own type does not behave as its kind; None: as it is. A UUID
        column is a string kind:
        read as text, so comparing it with any string, ranking it beside ``(other)`` and
        searching it work as on text (PostgreSQL and DuckDB refuse ``uuid = 'x'`` for a
        non-UUID string and a CASE that mixes text with uuid)."""
        if kind == "string" and _UUID.fullmatch(sql_type.strip().lower()):
            return self.text(ref)
        return None

    def text(self, e: exp.Expression) -> exp.Expression:
        """``e``'s text form (NULL stays NULL)."""
        return self.cast(e, "TEXT")

    def number_cell(self, col: exp.Expression) -> exp.Expression:
        """A number column's value as bins read it; engines whose columns can hold cells of
        another type (SQLite) turn those into NULL."""
        return col

    def char_length(self, e: exp.Expression) -> exp.Expression:
        """The number of characters (code points) of a text."""
        return exp.Length(this=e)

    def text_prefix(self, e: exp.Expression, n: int) -> exp.Expression:
        """The first ``n`` characters of a text."""
        return exp.Substring(this=e, start=exp.Literal.number(1), length=exp.Literal.number(n))

    def group_number(self, e: exp.Expression) -> exp.Expression:
        """A double as a grouping value (a plain key, a distinct count's input): the same
        group for -0.0 and 0.0, which compare equal; engines that group by the bits
        (ClickHouse) add 0 (IEEE 754: -0 + 0 = +0)."""
        return e

    def nonfinite(self, kind: str) -> bool:
        """Whether a number column of ``kind`` can hold inf, -inf or NaN: a double, and a
        decimal where ``caps.nonfinite_decimals``."""
        return kind == "double" or (kind == "decimal" and self.caps.nonfinite_decimals)

    def finite(self, e: exp.Expression) -> exp.Expression:
        """``e`` (a DOUBLE) is neither infinite nor NaN (NaN compares above every number in
        PostgreSQL and DuckDB, false everywhere else; SQLite stores NaN as NULL)."""
        big = sys.float_info.max
        return exp.Between(this=e, low=self.real(-big), high=self.real(big))

    def extract(self, field: str, naive: exp.Expression) -> exp.Expression:
        return exp.Extract(this=exp.Var(this=field.upper()), expression=naive)

    def epoch(self, e: exp.Expression, kind: str) -> exp.Expression:
        """Seconds since 1970-01-01T00:00:00Z as a double (naive values read as UTC)."""
        raise NotImplementedError

    def from_epoch(self, seconds: exp.Expression) -> exp.Expression:
        """Timestamp with time zone for epoch seconds."""
        raise NotImplementedError

    def epoch_micros(self, e: exp.Expression, kind: str) -> exp.Expression | None:
        """Whole microseconds since 1970-01-01T00:00:00Z as a 64-bit integer (naive values
        read as UTC; NULL for 'infinity'), or None: then UTC time keys of fixed-length units
        group by a truncated timestamp instead of an integer bin number (planner/emit_keys.py,
        ``_trunc_micros``)."""
        return None

    def from_epoch_micros(self, micros: exp.Expression) -> exp.Expression:
        """Timestamp with time zone for integer epoch microseconds (with ``epoch_micros``)."""
        raise NotImplementedError

    def int_div(self, a: exp.Expression, b: exp.Expression) -> exp.Expression:
        """Integer quotient of two non-negative integers."""
        return exp.IntDiv(this=a, expression=b)

    # --- aggregates -----------------------------------------------------------------
    #: How this target spells aggregates (planner/aggregates.py reads it): aggregate name ->
    #: function name written as is, or a builder ``(dialect, arg, q) -> node``. Names not
    #: listed use the registry's portable build.
    agg_spellings: ClassVar[dict[str, object]] = {}

    def agg(self, name: str, arg: exp.Expression | None, q: float | None) -> exp.Expression:
        """The aggregate ``name`` (planner/aggregates.py) of ``arg`` as this target writes it."""
        from planner import aggregates

        return aggregates.spell(self, name, arg, q)

    def quantile(self, arg: exp.Expression, q: float) -> exp.Expression:
        """Exact continuous quantile, Hyndman & Fan (1996) type 7 (linear interpolation)."""
        return exp.WithinGroup(
            this=exp.Anonymous(this="PERCENTILE_CONT", expressions=[self.number(q)]),
            expression=exp.Order(expressions=[exp.Ordered(this=self.double(arg))]))

    # --- ordering -------------------------------------------------------------------
    def previous(self, value: exp.Expression, partition: list[exp.Expression] | None,
                 order: list[exp.Ordered]) -> exp.Expression:
        """The previous row's ``value`` in the window (NULL on the partition's first row):
        standard ``LAG``."""
        return exp.Window(this=exp.Lag(this=value), partition_by=partition,
                          order=exp.Order(expressions=order))

    def order(self, e: exp.Expression, desc: bool, nulls_first: bool) -> list[exp.Ordered]:
        if self.caps.nulls_order_native:
            return [exp.Ordered(this=e, desc=desc, nulls_first=nulls_first)]
        # Emulate: sort on "is null" first, then the value. Both terms carry the target's
        # own default NULL placement so sqlglot adds no second emulation of its own.
        isnull = exp.Case(ifs=[exp.If(this=exp.Is(this=e, expression=exp.Null()),
                                      true=exp.Literal.number(0 if nulls_first else 1))],
                          default=exp.Literal.number(1 if nulls_first else 0))
        return [exp.Ordered(this=isnull, nulls_first=self._default_nulls_first(False)),
                exp.Ordered(this=e.copy(), desc=desc,
                            nulls_first=self._default_nulls_first(desc))]

    def order_nulls_last_plain(self, e: exp.Expression) -> list[exp.Ordered]:
        """Ascending, NULLs last, written without NULLS FIRST/LAST on every target (a CASE
        term first): usable in every window, aggregate windows included."""
        isnull = exp.Case(ifs=[exp.If(this=exp.Is(this=e, expression=exp.Null()),
                                      true=exp.Literal.number(1))], default=exp.Literal.number(0))
        return [exp.Ordered(this=isnull, nulls_first=self._default_nulls_first(False)),
                exp.Ordered(this=e.copy(), nulls_first=self._default_nulls_first(False))]

    def _default_nulls_first(self, desc: bool) -> bool:
        """Where the target puts NULLs when ORDER BY says nothing (sqlglot's knowledge)."""
        from sqlglot.dialects.dialect import Dialect as SqlglotDialect

        ordering = SqlglotDialect.get_or_raise(self.sqlglot or None).NULL_ORDERING
        if ordering == "nulls_are_last":
            return False
        small = ordering == "nulls_are_small"
        return small != desc

    def null_safe_eq(self, a: exp.Expression, b: exp.Expression) -> exp.Expression:
        return exp.NullSafeEQ(this=a, expression=b)


@functools.lru_cache(maxsize=1024)
def _data_type(type_sql: str, dialect: str | None) -> exp.DataType:
    """``exp.DataType.build`` of a type name (shared: callers copy it). ``dialect`` None for
    the casts written as generic types (``bigint``, ``double``): a dialect's parse may name
    another type (DuckDB reads TIMESTAMP as TIMESTAMPNTZ)."""
    return exp.DataType.build(type_sql, dialect=dialect)
