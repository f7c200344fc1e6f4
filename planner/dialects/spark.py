"""Spark SQL (checked live through pyspark in local mode and over the wire on a Spark Connect
server, tests/test_spark_connect.py) and Databricks (generated).

* The session time zone must be UTC (the engine sets ``spark.sql.session.timeZone``); a
  "naive wall-clock time" is a TIMESTAMP read in that UTC session: ``from_utc_timestamp`` /
  ``to_utc_timestamp`` convert instants to and from a zone's wall clock.
* date_trunc('WEEK') is the ISO week (Monday). ``dayofweek`` is 1 = Sunday, ``weekday`` is
  0 = Monday, ``weekofyear`` is the ISO week, EXTRACT(YEAROFWEEK) the ISO year.
* Exact type 7 quantiles: ``percentile`` (linear interpolation).
* approx_count_distinct: HyperLogLog++ (relative standard deviation 0.05 by default).
"""

from __future__ import annotations

import dataclasses
import datetime as dt

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


class Spark(Dialect):
    name = "spark"
    sqlglot = "spark"
    caps = Capabilities(
        wide_instants=True,  # 'infinity' and years past 9999 are legal values
        approx_distinct=("hyperloglog++", 0.05),
        # GROUPING SETS + grouping(); a CTE read several times keeps one plan whose shuffle
        # the engine reuses (ReusedExchange)
        grouping_sets=True, shared_cte="engine",
    )
    agg_spellings = {"approx_count_distinct": "approx_count_distinct"}
    notes = {
        "engine": "live engine (local mode and a Spark Connect server)",
        "quantile": "percentile()",
        "approx_count_distinct": "approx_count_distinct (HLL++)",
        "tz": "from_utc_timestamp (UTC session)",
        "trunc_week": "date_trunc('WEEK')",
        "extract": "weekofyear, weekday, ...",
        "null_safe_eq": "<=>",
        "text_match": "instr / startswith",
        "division": "`/` is always DOUBLE",
        "limit": "LIMIT",
        "quoting": "`name`",
    }

    def _ts(self, e: exp.Expression, kind: str) -> exp.Expression:
        return e if kind == "timestamptz" else self.cast(e, "TIMESTAMP")

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.cast(self.lit(value.date().isoformat()), "DATE")
        # an explicit offset: the same instant whatever the session time zone
        return self.cast(self.lit(self.wall_text(utc, True) + "+00:00"), "TIMESTAMP")

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        return self.cast(self.lit(self.wall_text(value) + "+00:00"), "TIMESTAMP")

    def sum_input(self, ref, sql_type, kind):
        # sum() of a BIGINT is a BIGINT: past 2^63 it fails (ANSI mode, the default since
        # Spark 4: ARITHMETIC_OVERFLOW, a 502) or wraps (ANSI off). Integers are summed as
        # DECIMAL(38, 0), exact to 10^38
        if kind == "integer":
            return self.cast(ref, "DECIMAL(38, 0)")
        return None

    def to_local(self, e, kind, tz):
        inst = self._ts(e, kind)
        if tz == "UTC":
            return inst
        return self.fn("from_utc_timestamp", inst, self.lit(tz))

    def from_local(self, e, tz):
        if tz == "UTC":
            return e
        return self.fn("to_utc_timestamp", e, self.lit(tz))

    def trunc(self, unit, naive):
        return self.fn("date_trunc", self.lit(unit.upper()), naive)

    def add_units(self, naive, n, unit):
        if unit == "quarter":
            n, unit = self.times(n, 3), "month"
        if unit == "week":
            n, unit = self.times(n, 7), "day"
        if isinstance(n, exp.Expression):  # make_interval(years, months, weeks, days)
            zero = self.lit(0)
            parts = {"year": [n], "month": [zero, n], "day": [zero, zero.copy(), zero.copy(), n]}
            return exp.Add(this=naive, expression=self.fn("make_interval", *parts[unit]))
        return exp.Add(this=naive, expression=exp.Interval(this=self.lit(str(n)),
                                                           unit=self.var(unit.upper())))

    def int_series(self, n, name):
        # range(n): the table-valued function of the integers 0 .. n-1 (column "id")
        return exp.select(exp.alias_(self.column("id"), name, quoted=True)).from_(
            exp.Table(this=self.fn("range", self.lit(n))))

    def extract(self, field, naive):
        fns = {"year": "year", "quarter": "quarter", "month": "month", "week": "weekofyear",
               "day": "dayofmonth", "doy": "dayofyear", "hour": "hour", "minute": "minute",
               "second": "second"}
        if field in fns:
            part = self.fn(fns[field], naive)
        elif field == "isoyear":
            part = exp.Extract(this=self.var("YEAROFWEEK"), expression=naive)
        elif field == "dow":
            part = exp.Sub(this=self.fn("dayofweek", naive), expression=self.lit(1))
        elif field == "isodow":
            part = exp.Add(this=self.fn("weekday", naive), expression=self.lit(1))
        else:
            raise ValueError(field)
        return self.bigint(part)

    def epoch(self, e, kind):
        micros = self.fn("unix_micros", self._ts(e, kind))
        return exp.Div(this=self.double(micros), expression=self.real(1e6))

    def from_epoch(self, seconds):
        micros = self.bigint(exp.Round(this=exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))))
        return self.fn("timestamp_micros", micros)

    def contains(self, col, s):
        return exp.GT(this=self.fn("instr", col, self.string(s)), expression=self.lit(0))

    def starts_with(self, col, s):
        return self.fn("startswith", col, self.string(s))

    def quantile(self, arg, q):
        return self.fn("percentile", self.double(arg), self.number(q))


class Databricks(Spark):
    name = "databricks"
    sqlglot = "databricks"
    caps = dataclasses.replace(
        Spark.caps,
        checked="golden",
    )
