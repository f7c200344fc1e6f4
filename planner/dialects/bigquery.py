"""BigQuery (generated only).

DATETIME is the naive wall clock, TIMESTAMP the instant: ``DATETIME(ts, tz)`` /
``TIMESTAMP(datetime, tz)`` convert; DATETIME_TRUNC(x, ISOWEEK) is the ISO week. BigQuery's
PERCENTILE_CONT is an analytic (window) function only and APPROX_QUANTILES is approximate, so
median / quantile are built from ROW_NUMBER() / COUNT() windows (type 7). approx_count_distinct is HyperLogLog++.
"""

from __future__ import annotations


from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


class BigQuery(Dialect):
    name = "bigquery"
    sqlglot = "bigquery"
    caps = Capabilities(
        checked="golden",
        quantile_method="window",
        approx_distinct=("hyperloglog++", None),
        grouping_sets=True,  # (generated only: not measured, so one statement per chart)
    )
    instant_type = "TIMESTAMP"
    naive_type = "DATETIME"
    agg_spellings = {"approx_count_distinct": "APPROX_COUNT_DISTINCT"}
    notes = {
        "approx_count_distinct": "APPROX_COUNT_DISTINCT (HLL++)",
        "tz": "DATETIME(ts, tz) / TIMESTAMP(dt, tz)",
        "trunc_week": "DATETIME_TRUNC(ISOWEEK)",
        "extract": "EXTRACT (ISOWEEK, ISOYEAR)",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "STRPOS / STARTS_WITH",
        "division": "`/` is always FLOAT64",
        "limit": "LIMIT",
        "quoting": "`name`",
    }

    def _instant(self, e, kind):
        if kind == "timestamptz":
            return e
        return self.fn("TIMESTAMP", self.fn("DATETIME", e) if kind == "date" else e)

    def to_local(self, e, kind, tz):
        return self.fn("DATETIME", self._instant(e, kind), self.lit(tz))

    def from_local(self, e, tz):
        return self.fn("TIMESTAMP", e, self.lit(tz))

    def trunc(self, unit, naive):
        part = "ISOWEEK" if unit == "week" else unit.upper()
        return self.fn("DATETIME_TRUNC", naive, self.var(part))

    def add_units(self, naive, n, unit):
        return self.fn("DATETIME_ADD", naive, exp.Interval(this=self.count_arg(n),
                                                           unit=self.var(unit.upper())))

    def extract(self, field, naive):
        parts = {"year": "YEAR", "quarter": "QUARTER", "month": "MONTH", "week": "ISOWEEK",
                 "isoyear": "ISOYEAR", "day": "DAY", "doy": "DAYOFYEAR", "hour": "HOUR",
                 "minute": "MINUTE", "second": "SECOND"}
        if field in parts:
            return exp.Extract(this=self.var(parts[field]), expression=naive)
        dow = exp.Extract(this=self.var("DAYOFWEEK"), expression=naive)  # Sunday = 1
        if field == "dow":
            return exp.Sub(this=dow, expression=self.lit(1))
        if field == "isodow":
            return exp.Add(this=self.fn("MOD", exp.Add(this=dow, expression=self.lit(5)), self.lit(7)),
                           expression=self.lit(1))
        raise ValueError(field)

    def epoch(self, e, kind):
        return exp.Div(this=self.fn("UNIX_MICROS", self._instant(e, kind)), expression=self.lit(1000000))

    def from_epoch(self, seconds):
        micros = self.cast(exp.Round(this=exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))), "INT64")
        return self.fn("TIMESTAMP_MICROS", micros)

    def contains(self, col, s):
        return exp.GT(this=self.fn("STRPOS", col, self.string(s)), expression=self.lit(0))

    def starts_with(self, col, s):
        return self.fn("STARTS_WITH", col, self.string(s))

    def like(self, e, parts, fold):
        # no ESCAPE clause: the backslash escapes % _ and itself
        if fold:
            e = self.ascii_lower(e)
        return exp.Like(this=e, expression=self.string(self.like_text(parts, "\\", "%_")))
