"""PostgreSQL (checked live): AT TIME ZONE for wall-clock times, date_trunc (ISO week),
EXTRACT (numeric since PG 14, so cast to BIGINT), PERCENTILE_CONT WITHIN GROUP (type 7).

PostgreSQL has no built-in approximate count distinct; ``approx_count_distinct`` is answered
exactly with COUNT(DISTINCT) (an exact answer is within any error bound; the response says
method "exact").
"""

from __future__ import annotations

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.dialects.capabilities import Capabilities


class Postgres(Dialect):
    name = "postgres"
    sqlglot = "postgres"
    caps = Capabilities(
        boolean_min_max=False,
        # PostgreSQL orders NaN above every other value (its docs; checked here as for DuckDB)
        extremes_show_nonfinite=True,
        nonfinite_decimals=True,  # numeric 'NaN', and '+-Infinity' since PostgreSQL 14
        param_form=("list", "format"),
        max_identifier_bytes=63,  # NAMEDATALEN - 1: longer names are cut
        wide_instants=True,  # 'infinity' and years past 9999 are legal values
        approx_distinct=("exact (COUNT DISTINCT)", 0.0),
        # GROUPING SETS since 9.5, AS MATERIALIZED since 12
        grouping_sets=True, shared_cte="materialized",
    )
    notes = {
        "quantile": "PERCENTILE_CONT WITHIN GROUP",
        "approx_count_distinct": "exact COUNT(DISTINCT)",
        "tz": "AT TIME ZONE",
        "trunc_week": "date_trunc('week')",
        "extract": "EXTRACT",
        "null_safe_eq": "IS NOT DISTINCT FROM",
        "text_match": "STRPOS / LEFT (case-sensitive)",
        "division": "operands cast to DOUBLE PRECISION",
        "limit": "LIMIT",
        "quoting": '"name"',
    }


    _ARRAY_TYPES = {str: "TEXT[]", int: "BIGINT[]", float: "DOUBLE PRECISION[]", bool: "BOOLEAN[]"}

    def stored(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        # money (a decimal kind) arrives as locale text ('$1.50') and casts to numeric only,
        # not to double precision
        if kind == "decimal" and sql_type.strip().lower() == "money":
            return self.cast(ref, "NUMERIC")
        return super().stored(ref, sql_type, kind)

    def param_array(self, marker, value_type):
        return self.cast(marker, self._ARRAY_TYPES[value_type])
    def _as_timestamp(self, e: exp.Expression, kind: str) -> exp.Expression:
        return self.cast(e, "TIMESTAMP") if kind == "date" else e

    def to_local(self, e: exp.Expression, kind: str, tz: str) -> exp.Expression:
        if kind == "timestamptz":
            return exp.AtTimeZone(this=e, zone=self.lit(tz))
        naive = self._as_timestamp(e, kind)
        if tz == "UTC":
            return naive
        # naive values are UTC: naive AT TIME ZONE 'UTC' is the instant, then the wall clock
        return exp.AtTimeZone(this=exp.Paren(this=exp.AtTimeZone(this=naive, zone=self.lit("UTC"))),
                              zone=self.lit(tz))

    def from_local(self, e: exp.Expression, tz: str) -> exp.Expression:
        # AT TIME ZONE binds tighter than +: parenthesise sums like "start + INTERVAL ..."
        if not isinstance(e, (exp.Column, exp.Func, exp.Paren)):
            e = exp.Paren(this=e)
        return exp.AtTimeZone(this=e, zone=self.lit(tz))

    def trunc(self, unit: str, naive: exp.Expression) -> exp.Expression:
        # date_trunc('week', ...) is the ISO week (Monday) in PostgreSQL.
        return self.fn("DATE_TRUNC", self.lit(unit), naive)

    def extract(self, field: str, naive: exp.Expression) -> exp.Expression:
        part: exp.Expression = exp.Extract(this=exp.Var(this=field.upper()), expression=naive)
        if field == "second":
            part = exp.Floor(this=part)
        return self.bigint(part)

    def epoch(self, e: exp.Expression, kind: str) -> exp.Expression:
        # EXTRACT(EPOCH FROM timestamp) reads a naive timestamp as UTC.
        return self.double(exp.Extract(this=exp.Var(this="EPOCH"),
                                       expression=self._as_timestamp(e, kind)))

    def from_epoch(self, seconds: exp.Expression) -> exp.Expression:
        return self.fn("TO_TIMESTAMP", seconds)

    def int_series(self, n: int, name: str) -> exp.Select:
        # generate_series(0, n - 1) AS t(name)
        alias = exp.TableAlias(this=self.ident("t"), columns=[self.ident(name)])
        return exp.select(self.column(name)).from_(exp.Table(
            this=self.fn("generate_series", self.lit(0), self.lit(max(n - 1, 0))), alias=alias))

    def contains(self, col: exp.Expression, s: str) -> exp.Expression:
        return exp.GT(this=self.fn("STRPOS", col, self.string(s)), expression=self.lit(0))

    def starts_with(self, col: exp.Expression, s: str) -> exp.Expression:
        return exp.EQ(this=self.fn("LEFT", col, self.lit(len(s))), expression=self.string(s))
