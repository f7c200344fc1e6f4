"""MySQL 8 / MariaDB 10.3+ (checked live on MariaDB).

* Wall-clock times: CONVERT_TZ, which needs the server's time zone tables loaded
  (``mysql_tzinfo_to_sql /usr/share/zoneinfo | mysql mysql``); the engine refuses a
  statement that needs them when they are empty, since CONVERT_TZ would silently give NULL.
* No date_trunc: built from DATE_FORMAT / WEEKDAY (ISO week = Monday) / MAKEDATE.
* Epoch arithmetic with TIMESTAMPDIFF / TIMESTAMPADD in microseconds, independent of the
  session time zone (naive DATETIME values are read as UTC).
* No exact continuous percentile aggregate (MariaDB's PERCENTILE_CONT is a window function
  only, MySQL has none): median, quantile and the Freedman–Diaconis rule are built from
  ROW_NUMBER() / COUNT() windows (Hyndman & Fan type 7, ``caps.quantile_method = "window"``).
* No NULLS FIRST/LAST: emulated with a CASE term.
* Filters on text (eq, ne, lt.., in, not_in, contains, starts_with) compare bytes (a BINARY
  operand), so they are case- and accent-sensitive like DuckDB whatever the column's
  collation. Grouping and ordering follow the column's collation: use a binary collation
  (utf8mb4_bin / utf8mb4_nopad_bin) for groups identical to DuckDB's.
* approx_count_distinct is answered exactly (COUNT DISTINCT).
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities

_EPOCH = "1970-01-01 00:00:00"


class MySQL(Dialect):
    name = "mysql"
    sqlglot = "mysql"
    caps = Capabilities(
        # MariaDB / MySQL DOUBLE columns hold no inf or NaN
        extremes_show_nonfinite=True,
        param_form=("each", "format"),
        identifiers_bmp_only=True,
        quantile_method="window",
        nulls_order_native=False,
        approx_distinct=("exact (COUNT DISTINCT)", 0.0),
    )
    notes = {
        "approx_count_distinct": "exact COUNT(DISTINCT)",
        "tz": "CONVERT_TZ (needs tz tables)",
        "trunc_week": "DATE - WEEKDAY days",
        "extract": "YEAR(), WEEK(x, 3), WEEKDAY(), ...",
        "null_safe_eq": "<=>",
        "text_match": "BINARY operands (every text filter)",
        "division": "operands cast to DOUBLE",
        "limit": "LIMIT",
        "quoting": "`name`",
    }

    def text_literal(self, v: str) -> exp.Expression:
        # A binary operand makes MySQL compare bytes: no case/accent folding, no PAD SPACE,
        # whatever the column's collation (DuckDB compares bytes too).
        return self.cast(self.string(v), "BINARY")

    def _dt(self, e: exp.Expression) -> exp.Expression:
        return self.cast(e, "DATETIME(6)")

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        return self._dt(self.lit(self.wall_text(value)))

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.cast(self.lit(value.date().isoformat()), "DATE")
        return self._dt(self.lit(self.wall_text(utc, True)))

    def to_local(self, e: exp.Expression, kind: str, tz: str) -> exp.Expression:
        naive = self._dt(e) if kind == "date" else e
        if tz == "UTC":
            return naive
        return self.fn("CONVERT_TZ", naive, self.lit("UTC"), self.lit(tz))

    def from_local(self, e: exp.Expression, tz: str) -> exp.Expression:
        if tz == "UTC":
            return e
        return self.fn("CONVERT_TZ", e, self.lit(tz), self.lit("UTC"))

    def _fmt(self, e: exp.Expression, fmt: str) -> exp.Expression:
        return self._dt(self.fn("DATE_FORMAT", e, self.lit(fmt)))

    def trunc(self, unit: str, naive: exp.Expression) -> exp.Expression:
        fmts = {"second": "%Y-%m-%d %H:%i:%s", "minute": "%Y-%m-%d %H:%i:00",
                "hour": "%Y-%m-%d %H:00:00", "day": "%Y-%m-%d 00:00:00",
                "month": "%Y-%m-01 00:00:00", "year": "%Y-01-01 00:00:00"}
        if unit in fmts:
            return self._fmt(naive, fmts[unit])
        if unit == "week":  # ISO week: back to Monday (WEEKDAY: Monday = 0)
            return self._dt(self.fn("DATE_SUB", self.fn("DATE", naive), exp.Interval(
                this=self.fn("WEEKDAY", naive.copy()), unit=self.var("DAY"))))
        if unit == "quarter":
            year_start = self.fn("MAKEDATE", self.fn("YEAR", naive), self.lit(1))
            months = exp.Mul(this=exp.Paren(this=exp.Sub(this=self.fn("QUARTER", naive.copy()),
                                                         expression=self.lit(1))),
                             expression=self.lit(3))
            return self._dt(self.fn("DATE_ADD", year_start, exp.Interval(
                this=months, unit=self.var("MONTH"))))
        raise ValueError(unit)

    def add_units(self, naive: exp.Expression, n: int, unit: str) -> exp.Expression:
        if unit == "quarter":
            n, unit = self.times(n, 3), "month"
        if unit == "week":
            n, unit = self.times(n, 7), "day"
        return self.fn("DATE_ADD", naive, exp.Interval(this=self.count_arg(n),
                                                       unit=self.var(unit.upper())))

    def extract(self, field: str, naive: exp.Expression) -> exp.Expression:
        simple = {"year": "YEAR", "quarter": "QUARTER", "month": "MONTH", "day": "DAYOFMONTH",
                  "doy": "DAYOFYEAR", "hour": "HOUR", "minute": "MINUTE", "second": "SECOND"}
        if field in simple:
            part = self.fn(simple[field], naive)
        elif field == "week":  # mode 3: ISO 8601 weeks (Monday first, week 1 has 4+ days)
            part = self.fn("WEEK", naive, self.lit(3))
        elif field == "isoyear":
            part = exp.IntDiv(this=self.fn("YEARWEEK", naive, self.lit(3)), expression=self.lit(100))
        elif field == "dow":  # DAYOFWEEK: Sunday = 1
            part = exp.Sub(this=self.fn("DAYOFWEEK", naive), expression=self.lit(1))
        elif field == "isodow":  # WEEKDAY: Monday = 0
            part = exp.Add(this=self.fn("WEEKDAY", naive), expression=self.lit(1))
        else:
            raise ValueError(field)
        return self.cast(part, "SIGNED")

    def epoch(self, e: exp.Expression, kind: str) -> exp.Expression:
        micros = self.fn("TIMESTAMPDIFF", self.var("MICROSECOND"), self._dt(self.lit(_EPOCH)), e)
        return exp.Div(this=self.double(micros), expression=self.real(1e6))

    def from_epoch(self, seconds: exp.Expression) -> exp.Expression:
        micros = self.cast(exp.Round(this=exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))),
                           "SIGNED")
        return self.fn("TIMESTAMPADD", self.var("MICROSECOND"), micros, self._dt(self.lit(_EPOCH)))

    def _bin_text(self, e: exp.Expression) -> exp.Expression:
        """``CONVERT(e USING utf8mb4) COLLATE utf8mb4_bin``: compared by characters, case-
        and accent-sensitive, whatever the column's character set and collation."""
        charset = exp.DataType(this=exp.DataType.Type.CHARACTER_SET, kind=exp.Var(this="utf8mb4"))
        return exp.Collate(this=exp.Cast(this=e, to=charset), expression=exp.Var(this="utf8mb4_bin"))

    def like(self, e, parts, fold):
        e = self._bin_text(e)
        if fold:
            e = self.replace_ascii_lower(e)
        esc = self.like_escape
        return exp.Escape(this=exp.Like(this=e, expression=self.string(self.like_text(parts, esc, "%_"))),
                          expression=self.string(esc))

    def contains(self, col: exp.Expression, s: str) -> exp.Expression:
        return exp.GT(this=self.fn("INSTR", self.cast(col, "BINARY"), self.cast(self.string(s), "BINARY")),
                      expression=self.lit(0))

    def starts_with(self, col: exp.Expression, s: str) -> exp.Expression:
        n = len(s.encode("utf-8"))
        return exp.EQ(this=self.fn("LEFT", self.cast(col, "BINARY"), self.lit(n)),
                      expression=self.cast(self.string(s), "BINARY"))
