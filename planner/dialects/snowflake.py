"""Snowflake (generated only).

TIMESTAMP_NTZ is the naive wall clock (always written explicitly: plain TIMESTAMP follows
the TIMESTAMP_TYPE_MAPPING parameter). CONVERT_TIMEZONE converts; the ISO week and the day
of week are built from DAYOFWEEKISO so they do not depend on the WEEK_START parameter.
PERCENTILE_CONT WITHIN GROUP is an aggregate here (type 7).
"""

from __future__ import annotations


from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


class Snowflake(Dialect):
    name = "snowflake"
    sqlglot = "snowflake"
    caps = Capabilities(
        checked="golden",
        approx_distinct=("hyperloglog", 0.016),
        grouping_sets=True,  # (generated only: not measured, so one statement per chart)
    )
    instant_type = "TIMESTAMP_TZ"
    instant_suffix = " +00:00"
    naive_type = "TIMESTAMP_NTZ"
    agg_spellings = {"approx_count_distinct": "APPROX_COUNT_DISTINCT"}
    notes = {
        "quantile": "PERCENTILE_CONT WITHIN GROUP",
        "approx_count_distinct": "APPROX_COUNT_DISTINCT (HLL)",
        "tz": "CONVERT_TIMEZONE",
        "trunc_week": "built from DAYOFWEEKISO",
        "extract": "WEEKISO, YEAROFWEEKISO, DAYOFWEEKISO",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "CONTAINS / STARTSWITH",
        "division": "operands cast to DOUBLE",
        "limit": "LIMIT",
        "quoting": '"name"',
    }

    def to_local(self, e, kind, tz):
        if kind == "timestamptz":
            return self.cast(self.fn("CONVERT_TIMEZONE", self.lit(tz), e), "TIMESTAMP_NTZ")
        naive = self.cast(e, "TIMESTAMP_NTZ") if kind == "date" else e
        if tz == "UTC":
            return naive
        return self.fn("CONVERT_TIMEZONE", self.lit("UTC"), self.lit(tz), naive)

    def from_local(self, e, tz):
        if tz == "UTC":
            return e
        return self.fn("CONVERT_TIMEZONE", self.lit(tz), self.lit("UTC"), e)

    def trunc(self, unit, naive):
        if unit == "week":
            back = exp.Sub(this=self.fn("DAYOFWEEKISO", naive), expression=self.lit(1))
            return self.fn("DATEADD", self.var("DAY"), exp.Neg(this=exp.Paren(this=back)),
                           self.fn("DATE_TRUNC", self.lit("DAY"), naive.copy()))
        return self.fn("DATE_TRUNC", self.lit(unit.upper()), naive)

    def int_series(self, n, name):
        # GENERATOR rows numbered by ROW_NUMBER (SEQ4 alone may have gaps)
        rows = exp.Anonymous(this="TABLE", expressions=[exp.Anonymous(this="GENERATOR", expressions=[
            exp.Kwarg(this=self.var("ROWCOUNT"), expression=self.lit(n))])])
        i = exp.Sub(this=exp.Window(this=exp.RowNumber(), order=exp.Order(expressions=[
            exp.Ordered(this=self.fn("SEQ4"))])), expression=self.lit(1))
        return exp.select(exp.alias_(i, name, quoted=True)).from_(exp.Table(this=rows))

    def add_units(self, naive, n, unit):
        return self.fn("DATEADD", self.var(unit.upper()), self.count_arg(n), naive)

    def extract(self, field, naive):
        fns = {"year": "YEAR", "quarter": "QUARTER", "month": "MONTH", "week": "WEEKISO",
               "isoyear": "YEAROFWEEKISO", "day": "DAYOFMONTH", "doy": "DAYOFYEAR",
               "isodow": "DAYOFWEEKISO", "hour": "HOUR", "minute": "MINUTE", "second": "SECOND"}
        if field == "dow":
            return self.fn("MOD", self.fn("DAYOFWEEKISO", naive), self.lit(7))
        return self.fn(fns[field], naive)

    def epoch(self, e, kind):
        micros = self.fn("DATE_PART", self.var("EPOCH_MICROSECOND"), e)
        return exp.Div(this=self.double(micros), expression=self.lit(1000000))

    def from_epoch(self, seconds):
        micros = self.bigint(exp.Round(this=exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))))
        return self.fn("TO_TIMESTAMP_NTZ", micros, self.lit(6))

    def contains(self, col, s):
        return self.fn("CONTAINS", col, self.string(s))

    def starts_with(self, col, s):
        return self.fn("STARTSWITH", col, self.string(s))
