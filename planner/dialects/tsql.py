"""T-SQL / SQL Server 2022 (generated only).

SQL Server names time zones with Windows names, not IANA names: only UTC is accepted.
DATETRUNC (2022) with iso_week for the ISO week; day of week built with @@DATEFIRST so it
does not depend on the session's SET DATEFIRST. PERCENTILE_CONT is a window function only:
median / quantile are built from ROW_NUMBER() / COUNT() windows (type 7). No NULLS FIRST/LAST: emulated with a CASE term. String
matches use a binary collation (case- and accent-sensitive like DuckDB) and N'' literals.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities

_BIN = "Latin1_General_100_BIN2"


class TSQL(Dialect):
    name = "tsql"
    sqlglot = "tsql"
    caps = Capabilities(
        boolean_min_max=False,
        checked="golden",
        unsupported=frozenset({"tz"}),
        quantile_method="window",
        nulls_order_native=False,
        approx_distinct=("hyperloglog", 0.02),
        grouping_sets=True,  # (generated only: not measured, so one statement per chart)
    )
    agg_spellings = {"stddev_samp": "STDEV", "stddev_pop": "STDEVP", "var_samp": "VAR",
                     "var_pop": "VARP", "approx_count_distinct": "APPROX_COUNT_DISTINCT"}
    notes = {
        "approx_count_distinct": "APPROX_COUNT_DISTINCT (HLL)",
        "stddev": "STDEV / STDEVP / VAR / VARP",
        "trunc_week": "DATETRUNC(iso_week)",
        "extract": "DATEPART (iso_week; @@DATEFIRST-safe weekday)",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "CHARINDEX / LEFT with a BIN2 collation",
        "division": "operands cast to FLOAT",
        "limit": "TOP n",
        "quoting": "[name]",
    }

    def string(self, v: str) -> exp.Expression:
        return exp.National(this=v)

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.cast(self.lit(value.date().isoformat()), "DATE")
        text = self.wall_text(utc, True)
        if kind == "timestamptz":
            return self.cast(self.lit(text + " +00:00"), "DATETIMEOFFSET")
        return self.cast(self.lit(text), "DATETIME2")

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        return self.cast(self.lit(self.wall_text(value)), "DATETIME2")

    def to_local(self, e, kind, tz):
        if kind == "timestamptz":  # the UTC wall clock of a DATETIMEOFFSET
            e = self.fn("SWITCHOFFSET", e, self.lit("+00:00"))
        return self.cast(e, "DATETIME2")  # UTC only (tz is refused)

    def from_local(self, e, tz):
        return e

    def trunc(self, unit, naive):
        return self.fn("DATETRUNC", self.var("iso_week" if unit == "week" else unit), naive)

    def int_series(self, n, name):
        # GENERATE_SERIES (SQL Server 2022): column "value"
        return exp.select(exp.alias_(self.column("value"), name, quoted=True)).from_(
            exp.Table(this=self.fn("GENERATE_SERIES", self.lit(0), self.lit(max(n - 1, 0)))))

    def add_units(self, naive, n, unit):
        return self.fn("DATEADD", self.var(unit), self.count_arg(n), naive)

    def _weekday0(self, naive, monday_first: bool) -> exp.Expression:
        """0-based day of week independent of SET DATEFIRST."""
        shift = 2 if monday_first else 1
        return exp.Mod(this=exp.Paren(this=exp.Sub(this=exp.Add(
            this=self.fn("DATEPART", self.var("weekday"), naive),
            expression=exp.Var(this="@@DATEFIRST")), expression=self.lit(shift))),
            expression=self.lit(7))

    def extract(self, field, naive):
        parts = {"year": "year", "quarter": "quarter", "month": "month", "week": "iso_week",
                 "day": "day", "doy": "dayofyear", "hour": "hour", "minute": "minute",
                 "second": "second"}
        if field in parts:
            return self.fn("DATEPART", self.var(parts[field]), naive)
        if field == "dow":
            return self._weekday0(naive, False)
        if field == "isodow":
            return exp.Add(this=self._weekday0(naive, True), expression=self.lit(1))
        if field == "isoyear":
            thursday = self.fn("DATEADD", self.var("day"), self.lit(3), self.trunc("week", naive))
            return self.fn("DATEPART", self.var("year"), thursday)
        raise ValueError(field)

    def epoch(self, e, kind):
        micros = self.fn("DATEDIFF_BIG", self.var("microsecond"),
                         self.cast(self.lit("1970-01-01"), "DATETIME2"), e)
        return exp.Div(this=self.double(micros), expression=self.real(1e6))

    def from_epoch(self, seconds):
        whole = self.bigint(exp.Floor(this=seconds))
        millis = self.cast(exp.Round(this=exp.Mul(this=exp.Paren(this=exp.Sub(
            this=self.paren(seconds.copy()), expression=exp.Floor(this=seconds.copy()))),
            expression=self.lit(1000)), expressions=[self.lit(0)]), "INT")
        base = self.fn("DATEADD", self.var("second"), whole, self.cast(self.lit("1970-01-01"), "DATETIME2"))
        return self.fn("DATEADD", self.var("millisecond"), millis, base)

    def _bin(self, e: exp.Expression) -> exp.Expression:
        return exp.Collate(this=e, expression=exp.Var(this=_BIN))

    def contains(self, col, s):
        return exp.GT(this=self.fn("CHARINDEX", self.string(s), self._bin(col)), expression=self.lit(0))

    def starts_with(self, col, s):
        return exp.EQ(this=self._bin(self.fn("LEFT", col, self.lit(len(s)))), expression=self.string(s))

    def like(self, e, parts, fold):
        # a binary collation (case- and accent-sensitive); % _ [ written as [%] [_] [[]
        e = self._bin(e)
        if fold:
            e = self.ascii_lower(e)
        pattern = []
        for kind, text in parts:
            pattern.append("%" if kind == "any" else "_" if kind == "one" else
                           "".join(f"[{ch}]" if ch in "%_[" else ch for ch in text))
        return exp.Like(this=e, expression=self.string("".join(pattern)))
