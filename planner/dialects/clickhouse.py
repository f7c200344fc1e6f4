"""ClickHouse (checked live through chdb, the ClickHouse engine embedded).

* A ClickHouse DateTime is always an instant. A "naive wall-clock time" is represented as a
  ``DateTime64(6, 'UTC')`` whose UTC fields are the wall clock: the instant shifted by the
  zone's offset at that instant (``timeZoneOffset``); back to an instant by parsing the
  wall-clock text in the zone.
* Truncation: toStartOf* / toMonday (ISO week), re-typed to DateTime64(6, 'UTC').
* Exact type 7 quantiles: ``quantileExactInclusive`` (R7, linear interpolation).
* Variance / standard deviation: the numerically stable ``*Stable`` variants, NULL (not inf /
  nan) for groups with too few values, as in SQL.
* approx_count_distinct: ``uniqCombined`` (HyperLogLog-based, ~1% error).
* Outer joins fill missing columns with default values unless ``join_use_nulls = 1``: every
  statement carries ``SETTINGS join_use_nulls = 1`` so unmatched rows read as NULL, and
  ``enable_extended_results_for_datetime_functions = 1`` so calendar truncation of a
  DateTime64 / Date32 stays in its range (1900..2299) instead of clamping to 1970..2149.
* contains / starts_with: ``position`` / ``startsWith`` (byte-exact, case-sensitive).
* The previous row (``then: change``): ``lag`` answers the type's default (0), not NULL, on a
  partition's first row, so it is ``lagInFrame(toNullable(v))`` over the whole partition
  as the frame (ClickHouse docs, "Window Functions": lag/lead workarounds).
"""

from __future__ import annotations

import datetime as dt
import re

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


def _stable(fn: str, need: int):
    """A numerically stable deviation; ClickHouse answers inf / nan where SQL answers NULL
    (one value for *_samp, none for *_pop): NULL unless there are ``need`` values."""
    def build(d, arg, q):
        return exp.Case(ifs=[exp.If(this=exp.GTE(this=exp.Count(this=arg.copy()),
                                                 expression=d.lit(need)),
                                    true=d.fn(fn, d.double(arg)))])
    return build


#: ClickHouse's integers wider than 64 bits, Nullable / LowCardinality wrappers included
_WIDE_INT = re.compile(r"(nullable\()?(lowcardinality\()?u?int(128|256)\)*")


class ClickHouse(Dialect):
    name = "clickhouse"
    sqlglot = "clickhouse"
    caps = Capabilities(
        approx_distinct=("hyperloglog (uniqCombined)", 0.01),
        # GROUPING SETS + GROUPING(), but a CTE is inlined at every reference
        # (enable_materialized_cte is off by default): one statement per chart
        grouping_sets=True,
    )
    agg_spellings = {"stddev_samp": _stable("stddevSampStable", 2),
                     "stddev_pop": _stable("stddevPopStable", 1),
                     "var_samp": _stable("varSampStable", 2),
                     "var_pop": _stable("varPopStable", 1),
                     "approx_count_distinct": "uniqCombined"}
    notes = {
        "quantile": "quantileExactInclusive",
        "approx_count_distinct": "uniqCombined (HLL)",
        "stddev": "varSampStable etc.",
        "tz": "timeZoneOffset / parse in zone",
        "trunc_week": "toMonday",
        "extract": "toISOWeek, toDayOfWeek, ...",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "position / startsWith",
        "division": "`/` is always Float64",
        "limit": "LIMIT (+ SETTINGS join_use_nulls = 1, enable_extended_results_for_datetime_functions = 1)",
        "quoting": '"name"',
    }

    def sum_input(self, ref, sql_type, kind):
        # sum() of Int64 / UInt64 wraps silently (two rows of 2^63 - 1 sum to -2): integers
        # up to 64 bits are summed as Decimal128(38, 0), exact to 10^38 (chdb, 20M rows in
        # 100 groups: 57 -> 98 ms); the wider ones are Decimal256 already (``stored``)
        if kind == "integer" and not _WIDE_INT.fullmatch(sql_type.strip().lower()):
            return self.fn("toDecimal128", ref, self.lit(0))
        return None

    def render(self, node: exp.Expression) -> str:
        if isinstance(node, exp.Select):
            node = node.copy()
            # extended results: toStartOfMonth and friends of a DateTime64 / Date32 answer in
            # their range (1900..2299); without it they clamp to Date's 1970..2149.
            # null for empty: min / max / sum of no rows are NULL as in SQL (else a column
            # that is not Nullable answers 0, its avg NaN, and an empty extents row lays out
            # bins around 0); count stays 0
            node.set("settings", [exp.EQ(this=exp.var(name), expression=exp.Literal.number(1))
                                  for name in ("join_use_nulls",
                                               "enable_extended_results_for_datetime_functions",
                                               "aggregate_functions_null_for_empty")])
        return node.sql(dialect=self.sqlglot, identify=True)

    def stored(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        # (U)Int128 / (U)Int256 travel as 16- or 32-byte binary in Arrow (no such integer
        # type there), and their sums too: read as Decimal256(76, 0), exact
        if kind == "integer" and _WIDE_INT.fullmatch(sql_type.strip().lower()):
            return self.fn("toDecimal256", ref, self.lit(0))
        return super().stored(ref, sql_type, kind)

    def text_prefix(self, e: exp.Expression, n: int) -> exp.Expression:
        # substring() counts bytes: it could cut a character in two
        return self.fn("substringUTF8", e, self.lit(1), self.lit(n))

    def group_number(self, e: exp.Expression) -> exp.Expression:
        # GROUP BY and uniqExact hash a Float64's bits: -0.0 and 0.0 were two groups
        return exp.Add(this=e, expression=exp.Literal.number(0))

    def number_cell(self, col: exp.Expression) -> exp.Expression:
        # bins: floor(-0.0 / w) is -0.0, a bin index apart from 0.0 (two [0, w) rows)
        return self.group_number(col)

    def text(self, e: exp.Expression) -> exp.Expression:
        # CAST(u AS String) refuses a NULL (of Nullable(UUID), say); toString keeps it NULL
        return self.fn("toString", e)

    def _dt64(self, e: exp.Expression, tz: str = "UTC") -> exp.Expression:
        return self.fn("toDateTime64", e, self.lit(6), self.lit(tz))

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.fn("toDate32", self.lit(value.date().isoformat()))
        return self._dt64(self.lit(self.wall_text(utc, True)))

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        return self._dt64(self.lit(self.wall_text(value)))

    def to_local(self, e, kind, tz):
        inst = self._dt64(e)
        if tz == "UTC":
            return inst
        offset = self.fn("timeZoneOffset", self.fn("toTimeZone", inst.copy(), self.lit(tz)))
        return self.fn("addSeconds", inst, offset)

    def from_local(self, e, tz):
        if tz == "UTC":
            return e
        return self._dt64(self.fn("toString", e), tz)

    def trunc(self, unit, naive):
        fns = {"second": "toStartOfSecond", "minute": "toStartOfMinute", "hour": "toStartOfHour",
               "day": "toStartOfDay", "week": "toMonday", "month": "toStartOfMonth",
               "quarter": "toStartOfQuarter", "year": "toStartOfYear"}
        return self._dt64(self.fn(fns[unit], naive))

    def add_units(self, naive, n, unit):
        fns = {"day": "addDays", "week": "addWeeks", "month": "addMonths",
               "quarter": "addQuarters", "year": "addYears"}
        return self.fn(fns[unit], naive, self.count_arg(n))

    def int_series(self, n, name):
        # numbers(n): the table function of the integers 0 .. n-1 (column "number")
        return exp.select(exp.alias_(self.column("number"), name, quoted=True)).from_(
            exp.Table(this=self.fn("numbers", self.lit(n))))

    def finite(self, e):
        return self.fn("isFinite", e)

    def extract(self, field, naive):
        fns = {"year": "toYear", "quarter": "toQuarter", "month": "toMonth", "week": "toISOWeek",
               "isoyear": "toISOYear", "day": "toDayOfMonth", "isodow": "toDayOfWeek",
               "doy": "toDayOfYear", "hour": "toHour", "minute": "toMinute", "second": "toSecond"}
        if field == "dow":  # toDayOfWeek: Monday = 1 .. Sunday = 7
            part = exp.Mod(this=self.fn("toDayOfWeek", naive), expression=self.lit(7))
        else:
            part = self.fn(fns[field], naive)
        return self.fn("toInt64", part)

    def epoch(self, e, kind):
        micros = self.fn("toUnixTimestamp64Micro", self._dt64(e))
        return exp.Div(this=self.fn("toFloat64", micros), expression=self.lit(1000000))

    def from_epoch(self, seconds):
        micros = self.fn("toInt64", self.fn("round", exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))))
        return self.fn("fromUnixTimestamp64Micro", micros, self.lit("UTC"))

    def double(self, e):
        return self.fn("toFloat64", e)

    def contains(self, col, s):
        return exp.GT(this=self.fn("position", col, self.string(s)), expression=self.lit(0))

    def starts_with(self, col, s):
        return self.fn("startsWith", col, self.string(s))

    def like(self, e, parts, fold):
        # no ESCAPE clause: the backslash escapes % _ and itself; lower() folds ASCII only
        if fold:
            e = self.fn("lower", e)
        return exp.Like(this=e, expression=self.string(self.like_text(parts, "\\", "%_")))

    def quantile(self, arg, q):
        return exp.ParameterizedAgg(this="quantileExactInclusive", expressions=[self.number(q)],
                                    params=[self.double(arg)])

    def previous(self, value, partition, order):
        whole = exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING",
                               end="UNBOUNDED", end_side="FOLLOWING")
        return exp.Window(this=self.fn("lagInFrame", self.fn("toNullable", value)),
                          partition_by=partition, order=exp.Order(expressions=order), spec=whole)
