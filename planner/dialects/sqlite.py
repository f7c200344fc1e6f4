"""SQLite (checked live, stdlib sqlite3; needs SQLite >= 3.30 for NULLS FIRST/LAST and
>= 3.25 for window functions).

Storage convention for timestamps (SQLite has no timestamp type): a column declared
``TIMESTAMP`` (or ``DATETIME``) holds UTC text in exactly the form
``YYYY-MM-DD HH:MM:SS.SSS`` (SQLite's own ``strftime('%Y-%m-%d %H:%M:%f')``: always three
fraction digits); a ``DATE`` column holds ``YYYY-MM-DD``. Filters compare that text with
literals written in the same fixed-width form, so the comparison is exact (and can use an
index); values stored in another form would compare wrongly in filters. Keys never group
them wrongly: a cell that breaks the convention (an integer or text SQLite's date functions
cannot read in a TIMESTAMP/DATE column) is NULL for bins and time keys (``instant_range``).
A cell of another storage class in a number or boolean column ('abc' in a NUMERIC or REAL
column, 'yes' in a BOOLEAN one) is NULL for every read, filters included (``stored``).
Results come back as text and the service types them from the plan.

SQLite has no time zone database: only UTC is accepted (``tz`` other than UTC -> 422). It has
no percentile or standard deviation aggregates: median, quantile and the Freedman–Diaconis
rule are built from ROW_NUMBER() / COUNT() windows (Hyndman & Fan type 7), stddev / variance
and Scott's rule in two passes (a window mean, then the squared deviations); the standard
deviations need SQRT (SQLite's math functions, built in by default since 3.35).
approx_count_distinct is exact.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from planner.dialects.base import Dialect, _data_type
from planner.dialects.capabilities import Capabilities


class SQLite(Dialect):
    name = "sqlite"
    sqlglot = "sqlite"
    caps = Capabilities(
        # SQLite stores NaN as NULL; inf comes back from MIN / MAX (checked here)
        extremes_show_nonfinite=True,
        param_form=("json", "qmark"),
        unsupported=frozenset({"tz"}),
        quantile_method="window",
        stddev_method="two_pass",
        approx_distinct=("exact (COUNT DISTINCT)", 0.0),
        whole_integer_cells=False,  # an INTEGER column keeps 2.5 as a REAL cell
        float64_reals=True,  # every REAL is an 8-byte double
    )
    notes = {
        "approx_count_distinct": "exact COUNT(DISTINCT)",
        "trunc_week": "date(x, '-6 days', 'weekday 1')",
        "extract": "strftime (ISO week built)",
        "null_safe_eq": "IS",
        "text_match": "INSTR / SUBSTR (case-sensitive)",
        "division": "operands cast to REAL; FLOOR built from CAST",
        "limit": "LIMIT",
        "quoting": '"name"',
    }

    def double(self, e: exp.Expression) -> exp.Expression:
        return exp.Cast(this=e, to=_data_type("DOUBLE", None).copy())

    def instant_range(self, e: exp.Expression, kind: str) -> exp.Expression | None:
        # a cell outside the storage convention (not text SQLite's date functions read:
        # 'garbage', an integer) is NULL for every time key
        check = self.fn("date" if kind == "date" else "datetime", e)
        return exp.and_(exp.EQ(this=self.fn("typeof", e.copy()), expression=self.lit("text")),
                        exp.Not(this=exp.Is(this=check, expression=exp.Null())))

    def stored(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        # a cell of another storage class than the column's kind ('abc' in a NUMERIC or
        # REAL column, 'yes' in a BOOLEAN one) is NULL for everything, keys, measures and
        # filters alike (SQLite would group it apart and compare text above every number)
        if kind in ("integer", "double", "decimal"):
            return self.number_cell(ref)
        if kind == "boolean":
            return exp.Case(ifs=[exp.If(this=exp.EQ(this=self.fn("typeof", ref),
                                                    expression=self.lit("integer")),
                                        true=ref.copy())])
        return None

    def join_key(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        # stored only NULLs cells of another storage class, which equal no number anyway;
        # the bare key lets SQLite look it up through an index (an expression cannot)
        return None

    def number_cell(self, col: exp.Expression) -> exp.Expression:
        # a REAL / INTEGER column may hold text ('abc' CASTs to 0.0): such cells are NULL
        kinds = [self.lit("integer"), self.lit("real")]
        return exp.Case(ifs=[exp.If(this=exp.In(this=self.fn("typeof", col), expressions=kinds),
                                    true=col.copy())])

    def floor(self, e: exp.Expression) -> exp.Expression:
        # FLOOR needs the optional math functions; CAST truncates toward zero.
        e = self.paren(e)
        t = self.cast(e, "INTEGER")
        return exp.Paren(this=exp.Sub(this=t, expression=exp.Paren(
            this=exp.LT(this=e.copy(), expression=t.copy()))))

    def timestamp_literal(self, value: dt.datetime, kind: str) -> exp.Expression:
        utc = value.astimezone(dt.timezone.utc)
        if kind == "date":
            return self.lit(value.date().isoformat())
        # the storage form (3 fraction digits); a sub-millisecond instant keeps 6 digits,
        # which still orders correctly against the 3-digit stored text
        frac = f"{utc.microsecond:06d}"
        return self.lit((self.wall_text(utc) + ".") + (frac[:3] if frac.endswith("000") else frac))

    def local_literal(self, value: dt.datetime) -> exp.Expression:
        return self.lit(self.wall_text(value))

    def _f(self, fmt: str, e: exp.Expression, *mods: str) -> exp.Expression:
        return self.fn("strftime", self.lit(fmt), e, *[self.lit(m) for m in mods])

    def _int(self, e: exp.Expression) -> exp.Expression:
        return self.cast(e, "INTEGER")

    def to_local(self, e, kind, tz):
        if tz != "UTC":  # pragma: no cover - refused by the planner ("tz" unsupported)
            raise ValueError("SQLite has no time zones")
        return e

    def from_local(self, e, tz):
        return e

    def _monday(self, naive):
        return self.fn("date", naive, self.lit("-6 days"), self.lit("weekday 1"))

    def trunc(self, unit, naive):
        fmts = {"second": "%Y-%m-%d %H:%M:%S", "minute": "%Y-%m-%d %H:%M:00",
                "hour": "%Y-%m-%d %H:00:00", "day": "%Y-%m-%d 00:00:00",
                "month": "%Y-%m-01 00:00:00", "year": "%Y-01-01 00:00:00"}
        if unit in fmts:
            return self._f(fmts[unit], naive)
        if unit == "week":
            return exp.DPipe(this=self._monday(naive), expression=self.lit(" 00:00:00"))
        if unit == "quarter":  # back (month - 1) % 3 months from the month start (NULL-safe)
            back = exp.Mod(this=exp.Paren(this=exp.Sub(this=self._int(self._f("%m", naive)),
                                                        expression=self.lit(1))),
                           expression=self.lit(3))
            modifier = exp.DPipe(this=exp.DPipe(this=self.lit("-"), expression=self.paren(back)),
                                 expression=self.lit(" months"))
            day = self.fn("date", naive.copy(), self.lit("start of month"), modifier)
            return exp.DPipe(this=day, expression=self.lit(" 00:00:00"))
        raise ValueError(unit)

    def add_units(self, naive, n, unit):
        if unit == "quarter":
            n, unit = self.times(n, 3), "month"
        if unit == "week":
            n, unit = self.times(n, 7), "day"
        if isinstance(n, exp.Expression):  # the modifier '+<n> <unit>s' built in SQL
            mod = exp.DPipe(this=exp.DPipe(this=self.lit("+"), expression=self.cast(n, "TEXT")),
                            expression=self.lit(f" {unit}s"))
            return self.fn("strftime", self.lit("%Y-%m-%d %H:%M:%S"), naive, mod)
        return self._f("%Y-%m-%d %H:%M:%S", naive, f"{n:+d} {unit}s")

    def extract(self, field, naive):
        fmts = {"year": "%Y", "month": "%m", "day": "%d", "doy": "%j", "hour": "%H",
                "minute": "%M", "second": "%S", "dow": "%w"}
        if field in fmts:
            return self._int(self._f(fmts[field], naive))
        if field == "quarter":
            return exp.Add(this=exp.IntDiv(this=exp.Paren(this=exp.Sub(
                this=self._int(self._f("%m", naive)), expression=self.lit(1))),
                expression=self.lit(3)), expression=self.lit(1))
        if field == "isodow":
            return exp.Add(this=exp.Mod(this=exp.Paren(this=exp.Add(
                this=self._int(self._f("%w", naive)), expression=self.lit(6))),
                expression=self.lit(7)), expression=self.lit(1))
        # ISO week and year: those of the Thursday of the ISO week.
        thursday = self.fn("date", self._monday(naive), self.lit("+3 days"))
        if field == "isoyear":
            return self._int(self._f("%Y", thursday))
        if field == "week":
            return exp.Add(this=exp.IntDiv(this=exp.Paren(this=exp.Sub(
                this=self._int(self._f("%j", thursday)), expression=self.lit(1))),
                expression=self.lit(7)), expression=self.lit(1))
        raise ValueError(field)

    def epoch(self, e, kind):
        # whole seconds plus milliseconds, both exact integers, then one division
        secs = self._int(self._f("%s", e))
        millis = exp.Mod(this=self._int(exp.Round(this=exp.Mul(
            this=self.cast(self._f("%f", e.copy()), "REAL"), expression=self.lit(1000)))),
            expression=self.lit(1000))
        return exp.Div(this=self.double(exp.Add(this=exp.Mul(this=secs, expression=self.lit(1000)),
                                                expression=millis)),
                       expression=self.real(1000.0))

    def like(self, e, parts, fold):
        # LIKE folds ASCII case in SQLite (and only ASCII, by default), which is ILIKE here;
        # LIKE itself is GLOB, case-sensitive, with * ? [ written as [*] [?] [[]
        if fold:
            return exp.Escape(this=exp.Like(this=e, expression=self.string(
                self.like_text(parts, self.like_escape, "%_"))), expression=self.string(self.like_escape))
        glob = []
        for kind, text in parts:
            glob.append("*" if kind == "any" else "?" if kind == "one" else
                        "".join(f"[{ch}]" if ch in "*?[" else ch for ch in text))
        return exp.Paren(this=exp.Glob(this=e, expression=self.string("".join(glob))))

    def ascii_lower(self, e):
        return self.replace_ascii_lower(e)

    def from_epoch(self, seconds):
        return self._f("%Y-%m-%d %H:%M:%f", seconds, "unixepoch")
