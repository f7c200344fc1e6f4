"""MySQL 8 / MariaDB 10.3+ (checked live on MariaDB).

* Wall-clock times: CONVERT_TZ, which needs the server's time zone tables loaded
  (``mysql_tzinfo_to_sql /usr/share/zoneinfo | mysql mysql``); the engine refuses a
  statement that needs them when they are empty, since CONVERT_TZ would silently give NULL.
  CONVERT_TZ converts only instants of the TIMESTAMP range (1970-01-01 00:00:01 to
  2038-01-19 03:14:07 UTC) and returns others unchanged, so outside a day within it the
  zone's offsets are written into the statement (``_zone_offset``): its transitions, read
  from the zone's TZif file (``planner.tzdb.zone_offsets``), as a binary search of CASEs,
  and after the last one its POSIX rule, evaluated per year in SQL.
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

from planner import tzdb
from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities

_EPOCH = dt.datetime(1970, 1, 1)


def _datetime_literal(t: dt.datetime) -> exp.Expression:
    """``TIMESTAMP'YYYY-MM-DD HH:MM:SS.ffffff'``, a DATETIME(6) literal (SQL standard typed
    literal; MySQL and MariaDB), written out because sqlglot spells it ``TIMESTAMP('...')``.
    MariaDB 10.11 evaluates ``CAST('...' AS DATETIME(6))`` and ``TIMESTAMP('...')`` again
    for every row: hourly epoch bins of 1M rows took 474 ms with the CAST as the epoch,
    380 ms with this literal, and a CASE around CONVERT_TZ 791 against 598 ms. (Filter
    values keep the CAST form, which their bound parameters replace the literal of; in a
    WHERE it costs 7 %.)"""
    return exp.Var(this=f"TIMESTAMP'{t.replace(tzinfo=None).isoformat(' ', 'microseconds')}'")


#: Where CONVERT_TZ is trusted (naive UTC or local times): a day inside the TIMESTAMP range,
#: beyond which it returns its argument unchanged (checked live on MariaDB 10.11).
_NATIVE = (dt.datetime(1970, 1, 2), dt.datetime(2038, 1, 18))
_NATIVE_S = tuple(int((t - dt.datetime(1970, 1, 1)).total_seconds()) for t in _NATIVE)


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
        window_extremes="first_value",
    )
    notes = {
        "approx_count_distinct": "exact COUNT(DISTINCT)",
        "tz": "CONVERT_TZ (needs tz tables); zone offsets in SQL outside 1970..2038",
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
        return _datetime_literal(value)

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.cast(self.lit(value.date().isoformat()), "DATE")
        return self._dt(self.lit(self.wall_text(utc, True)))

    def to_local(self, e: exp.Expression, kind: str, tz: str) -> exp.Expression:
        naive = self._dt(e) if kind == "date" else e
        if tz == "UTC":
            return naive
        return self._zoned(naive, tz, local=False)

    def from_local(self, e: exp.Expression, tz: str) -> exp.Expression:
        if tz == "UTC":
            return e
        return self._zoned(e, tz, local=True)

    def _zoned(self, v: exp.Expression, tz: str, local: bool) -> exp.Expression:
        """``v`` (naive UTC, or with ``local`` naive wall-clock time in tz) converted: by
        CONVERT_TZ inside ``_NATIVE``, by the zone's own offsets outside it."""
        ends = ("UTC", tz) if not local else (tz, "UTC")
        native = self.fn("CONVERT_TZ", v, self.lit(ends[0]), self.lit(ends[1]))
        try:
            zone = tzdb.zone_offsets(tz)
        except (OSError, ValueError):  # (zoneinfo validated the name: not seen in practice)
            return native
        offset = self._zone_offset(v, zone, local)
        shifted = self.fn("DATE_ADD", v.copy(), exp.Interval(
            this=exp.Neg(this=exp.Paren(this=offset)) if local else offset,
            unit=self.var("SECOND")))
        inside = exp.Between(this=v.copy(), low=self._naive_literal(_NATIVE_S[0]),
                             high=self._naive_literal(_NATIVE_S[1]))
        return exp.Case(ifs=[exp.If(this=inside, true=native)], default=shifted)

    def _zone_offset(self, v: exp.Expression, zone: tuple, local: bool) -> exp.Expression:
        """The zone's UTC offset in seconds at ``v`` outside ``_NATIVE``. Local times take the
        offset in force before a transition through its gap or overlap (Python's
        ``fold=0``), so a transition's boundary in local time is its instant plus the larger
        of the two offsets."""
        times, offsets, rule = zone
        bounds = [t + max(offsets[i], offsets[i + 1]) if local else t
                  for i, t in enumerate(times)]
        # transitions inside _NATIVE never decide: one boundary at its end stands for them
        lo, hi = _NATIVE_S
        last_inner = max((i for i, b in enumerate(bounds) if lo <= b <= hi), default=None)
        cuts: list[tuple[int, int]] = []  # (boundary, offset from it on)
        for i, b in enumerate(bounds):
            if lo <= b <= hi:
                if i != last_inner:
                    continue
                b = hi
            if not cuts or offsets[i + 1] != cuts[-1][1]:
                cuts.append((b, offsets[i + 1]))
        after_rule = self._rule_offset(v, rule, local)
        if not times:
            return after_rule
        first = offsets[0]
        search = self._offset_search(v, first, cuts)
        last = self._naive_literal(bounds[-1])
        return exp.Case(ifs=[exp.If(this=exp.GTE(this=v.copy(), expression=last),
                                    true=after_rule)], default=search)

    @staticmethod
    def _naive_literal(seconds: int) -> exp.Expression:
        return _datetime_literal(_EPOCH + dt.timedelta(seconds=seconds))

    def _offset_search(self, v: exp.Expression, first: int, cuts: list[tuple[int, int]]
                       ) -> exp.Expression:
        """Binary search of nested CASEs: the offset in force at ``v``, ``first`` before the
        first boundary of ``cuts``."""
        if not cuts:
            return self.lit(first)
        mid = len(cuts) // 2
        b, off = cuts[mid]
        return exp.Case(ifs=[exp.If(
            this=exp.LT(this=v.copy(), expression=self._naive_literal(b)),
            true=self._offset_search(v, first, cuts[:mid]))],
            default=self._offset_search(v, off, cuts[mid + 1:]))

    def _rule_offset(self, v: exp.Expression, rule: tzdb.ZoneRule, local: bool
                     ) -> exp.Expression:
        """The offset of a POSIX TZ rule at ``v``, in SQL: daylight time between this year's
        start and end transitions (the year of the standard time's wall clock)."""
        if rule.dst is None or rule.start is None or rule.end is None:
            return self.lit(rule.std)
        wall = v.copy() if local else self.fn("DATE_ADD", v.copy(), exp.Interval(
            this=self.lit(rule.std), unit=self.var("SECOND")))
        year = self.fn("YEAR", wall)
        # a boundary: the rule's local time in the offset before it, plus, for local
        # times, the larger offset (as in _zone_offset)
        shift = max(rule.std, rule.dst) if local else 0

        def boundary(day: tzdb.DayRule, before: int) -> exp.Expression:
            return self.fn("DATE_ADD", self._rule_day(year.copy(), day), exp.Interval(
                this=self.lit(day[4] - before + shift), unit=self.var("SECOND")))

        start = exp.GTE(this=v.copy(), expression=boundary(rule.start, rule.std))
        end = exp.LT(this=v.copy(), expression=boundary(rule.end, rule.dst))

        def order(day: tzdb.DayRule) -> int:
            return day[1] * 31 + day[2] * 7 if day[0] == "M" else day[1]

        within = (exp.And(this=start, expression=end) if order(rule.start) < order(rule.end)
                  else exp.Or(this=start, expression=end))  # southern: across new year
        return exp.Case(ifs=[exp.If(this=within, true=self.lit(rule.dst))],
                        default=self.lit(rule.std))

    def _rule_day(self, year: exp.Expression, day: tzdb.DayRule) -> exp.Expression:
        """The DATE of a POSIX day rule in ``year`` (POSIX.1-2017 section 8.3)."""
        form, n, week, weekday, _ = day
        jan1 = self.fn("MAKEDATE", year, self.lit(1))
        if form == "n":  # zero-based day of the year, February 29 counted
            return self.fn("MAKEDATE", year.copy(), self.lit(n + 1))
        if form == "J":  # day 1..365, February 29 never counted
            d = self.fn("MAKEDATE", year.copy(), self.lit(n))
            if n < 60:
                return d
            leap = exp.Sub(this=self.fn("DAYOFMONTH", self.fn("LAST_DAY", self.fn(
                "MAKEDATE", year.copy(), self.lit(32)))), expression=self.lit(28))
            return self.fn("DATE_ADD", d, exp.Interval(this=leap, unit=self.var("DAY")))
        first = self.fn("DATE_ADD", jan1, exp.Interval(this=self.lit(n - 1),
                                                        unit=self.var("MONTH")))
        if week < 5:  # the week-th weekday (0 = Sunday; DAYOFWEEK: 1 = Sunday)
            days = exp.Add(this=self.fn("MOD", exp.Sub(this=self.lit(weekday + 8),
                                                       expression=self.fn("DAYOFWEEK", first)),
                                        self.lit(7)), expression=self.lit(7 * (week - 1)))
            return self.fn("DATE_ADD", first.copy(), exp.Interval(this=days,
                                                                  unit=self.var("DAY")))
        last = self.fn("LAST_DAY", first)  # week 5: the last such weekday of the month
        back = self.fn("MOD", exp.Sub(this=self.fn("DAYOFWEEK", last),
                                      expression=self.lit(weekday - 6)), self.lit(7))
        return self.fn("DATE_SUB", last.copy(), exp.Interval(this=back, unit=self.var("DAY")))

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
        micros = self.fn("TIMESTAMPDIFF", self.var("MICROSECOND"), _datetime_literal(_EPOCH), e)
        return exp.Div(this=self.double(micros), expression=self.real(1e6))

    def from_epoch(self, seconds: exp.Expression) -> exp.Expression:
        micros = self.cast(exp.Round(this=exp.Mul(this=self.paren(seconds), expression=self.lit(1000000))),
                           "SIGNED")
        return self.fn("TIMESTAMPADD", self.var("MICROSECOND"), micros, _datetime_literal(_EPOCH))

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
