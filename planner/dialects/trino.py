"""Trino (generated only).

``AT TIME ZONE`` on a TIMESTAMP WITH TIME ZONE then a cast to TIMESTAMP gives the wall
clock; ``with_timezone`` turns a wall clock back into an instant. date_trunc('week') is the
ISO week. Trino has only approx_percentile, so exact median / quantile are built from ROW_NUMBER() /
COUNT() windows (type 7).
"""

from __future__ import annotations


from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


class Trino(Dialect):
    name = "trino"
    sqlglot = "trino"
    caps = Capabilities(
        checked="golden",
        quantile_method="window",
        approx_distinct=("hyperloglog", 0.023),
        grouping_sets=True,  # (generated only: not measured, so one statement per chart)
    )
    instant_type = "TIMESTAMP(6) WITH TIME ZONE"
    instant_suffix = " UTC"
    naive_type = "TIMESTAMP(6)"
    agg_spellings = {"approx_count_distinct": "approx_distinct"}
    notes = {
        "approx_count_distinct": "approx_distinct (HLL)",
        "tz": "AT TIME ZONE / with_timezone",
        "trunc_week": "date_trunc('week')",
        "extract": "week(), year_of_week(), day_of_week()",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "strpos / starts_with",
        "division": "operands cast to DOUBLE",
        "limit": "LIMIT",
        "quoting": '"name"',
    }

    def _instant(self, e, kind):
        if kind == "timestamptz":
            return e
        if kind == "date":
            e = self.cast(e, "TIMESTAMP(6)")
        return self.fn("with_timezone", e, self.lit("UTC"))

    def to_local(self, e, kind, tz):
        if tz == "UTC" and kind != "timestamptz":
            return self.cast(e, "TIMESTAMP(6)") if kind == "date" else e
        return self.cast(exp.AtTimeZone(this=self._instant(e, kind), zone=self.lit(tz)), "TIMESTAMP(6)")

    def from_local(self, e, tz):
        return self.fn("with_timezone", e, self.lit(tz))

    def trunc(self, unit, naive):
        return self.fn("date_trunc", self.lit(unit), naive)

    def add_units(self, naive, n, unit):
        return self.fn("date_add", self.lit(unit), self.count_arg(n), naive)

    def extract(self, field, naive):
        fns = {"year": "year", "quarter": "quarter", "month": "month", "week": "week",
               "isoyear": "year_of_week", "day": "day", "doy": "day_of_year",
               "isodow": "day_of_week", "hour": "hour", "minute": "minute", "second": "second"}
        if field == "dow":
            return self.bigint(exp.Mod(this=self.fn("day_of_week", naive), expression=self.lit(7)))
        return self.bigint(self.fn(fns[field], naive))

    def epoch(self, e, kind):
        return self.fn("to_unixtime", self._instant(e, kind))

    def from_epoch(self, seconds):
        return self.fn("from_unixtime", seconds, self.lit("UTC"))

    def contains(self, col, s):
        return exp.GT(this=self.fn("strpos", col, self.string(s)), expression=self.lit(0))

    def starts_with(self, col, s):
        return self.fn("starts_with", col, self.string(s))
