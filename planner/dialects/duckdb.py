"""DuckDB: the embedded default. TIMESTAMPTZ arithmetic uses DuckDB's ICU extension."""

from __future__ import annotations

from sqlglot import exp

from planner.dialects.base import Dialect, _data_type
from planner.dialects.capabilities import Capabilities


class DuckDB(Dialect):
    name = "duckdb"
    sqlglot = "duckdb"
    caps = Capabilities(
        # DuckDB orders NaN above +inf (checked here: min/max of {nan, 1, inf, -inf} = -inf, nan)
        extremes_show_nonfinite=True,
        param_form=("list", "qmark"),
        arg_min_max=True,
        wide_instants=True,  # 'infinity' and years past 9999 are legal values
        # DuckDB's approx_count_distinct is a HyperLogLog sketch. Relative error measured here
        # (DuckDB 2.0.1, 20 runs of 1e3..1e6 distinct hashed integers): RMS 3.0 %, worst 7 %.
        approx_distinct=("hyperloglog", 0.03),
        # quantile_cont of an integer column returns the DOUBLE interpolation (type 7) itself, so
        # the planner may leave out the CAST (planner/emit_main.py ``_grouped``; measured 480 -> 318 ms, 10M rows)
        quantile_interpolates_integers=True,
        # a window over a hash aggregate of quantile_cont slows its finalize down: the bench's
        # quantiles statement 370.6 ms as one CTE chain, 279.3 ms with the grouped CTE AS
        # MATERIALIZED (DuckDB 2.0.1, 10M rows, median of 8; histogram, top_n, hourly,
        # stacked and count_distinct were the same either way, so only order statistics)
        materialize_order_statistics=True,
        # DuckDB groups the (key, value) pairs itself for a lone COUNT(DISTINCT), but not beside
        # COUNT(*): measured on 10M rows (CPU time), 1.18x -> 1.11x of a hand-written
        # COUNT(DISTINCT) per group (bench count_distinct)
        distinct_pairs=True,
        # GROUPING SETS + GROUPING(); DuckDB computes the grouped sets every chart reads once
        # by itself, and faster than when told AS MATERIALIZED (212 vs 233 ms, 2M rows;
        # bench/RESULTS.md "Issue 12 item 2")
        grouping_sets=True, shared_cte="engine",
    )
    agg_spellings = {"approx_count_distinct": "approx_count_distinct"}

    def stored(self, ref: exp.Expression, sql_type: str, kind: str) -> exp.Expression | None:
        # TIMESTAMP_NS holds 1677..2262 only: comparing it with a year-1 (or any out-of-range)
        # TIMESTAMP fails ("Could not convert Timestamp to higher precision"). Read as
        # microseconds, the precision of every answer, floored: a CAST rounds, and would put
        # 12:59:59.9999996 into the next hour (floor division spelled out: // truncates)
        if kind == "timestamp" and sql_type.strip().upper() == "TIMESTAMP_NS":
            ns, k = self.fn("EPOCH_NS", ref), self.lit(1000)
            below = exp.Mod(this=exp.Paren(this=exp.Add(this=exp.Mod(this=ns, expression=k),
                                                        expression=k.copy())),
                            expression=k.copy())
            us = exp.IntDiv(this=exp.Paren(this=exp.Sub(this=ns.copy(), expression=below)),
                            expression=k.copy())
            return self.fn("MAKE_TIMESTAMP", us)
        if sql_type.strip().upper() in ("UHUGEINT", "UINT128"):
            # compared with any number DuckDB casts UHUGEINT down to the number's type and
            # fails past it, and it reaches Arrow as a signed 128-bit decimal (2^128 - 1
            # read as -1): read as DOUBLE, exact up to 2^53, as DuckDB's own sum of it is
            return self.double(ref)
        return super().stored(ref, sql_type, kind)

    @staticmethod
    def _naive(e: exp.Expression, kind: str) -> exp.Expression:
        """A date column as a naive TIMESTAMP (midnight); other kinds as they are."""
        if kind == "date":
            return exp.Cast(this=e, to=_data_type("TIMESTAMP", None).copy())
        return e

    def _utc(self, e: exp.Expression, kind: str) -> exp.Expression:
        """Column value as TIMESTAMPTZ (naive timestamps and dates are read as UTC)."""
        if kind == "timestamptz":
            return e
        e = self._naive(e, kind)
        return exp.Anonymous(this="timezone", expressions=[exp.Literal.string("UTC"), e])

    # In UTC, wall-clock time and instant differ only in type, so the conversions are plain
    # microsecond re-labels (make_timestamp / make_timestamptz of epoch_us) instead of ICU's
    # timezone(): measured on 10M rows (2 cores), an hourly date_trunc went from ~1.4 s to
    # ~0.15 s. Other zones keep timezone().
    def to_local(self, e: exp.Expression, kind: str, tz: str) -> exp.Expression:
        if tz == "UTC":
            if kind == "timestamptz":
                return exp.Anonymous(this="make_timestamp",
                                     expressions=[exp.Anonymous(this="epoch_us", expressions=[e])])
            return self._naive(e, kind)
        # timezone(tz, TIMESTAMPTZ) -> naive wall-clock TIMESTAMP in tz
        return exp.Anonymous(this="timezone",
                             expressions=[exp.Literal.string(tz), self._utc(e, kind)])

    def from_local(self, e: exp.Expression, tz: str) -> exp.Expression:
        if tz == "UTC":
            return exp.Anonymous(this="make_timestamptz",
                                 expressions=[exp.Anonymous(this="epoch_us", expressions=[e])])
        # timezone(tz, TIMESTAMP) -> TIMESTAMPTZ of that wall-clock time in tz
        return exp.Anonymous(this="timezone", expressions=[exp.Literal.string(tz), e])

    def trunc(self, unit: str, naive: exp.Expression) -> exp.Expression:
        # DuckDB's date_trunc('week', ...) is the ISO week (Monday).
        return exp.Anonymous(this="date_trunc", expressions=[exp.Literal.string(unit), naive])

    def extract(self, field: str, naive: exp.Expression) -> exp.Expression:
        return exp.Anonymous(this="date_part", expressions=[exp.Literal.string(field), naive])

    def epoch(self, e: exp.Expression, kind: str) -> exp.Expression:
        # epoch() of a naive TIMESTAMP reads it as UTC already: no ICU conversion needed.
        e = self._naive(e, kind)
        return exp.Anonymous(this="epoch", expressions=[e])

    def from_epoch(self, seconds: exp.Expression) -> exp.Expression:
        return exp.Anonymous(this="to_timestamp", expressions=[seconds])

    # Integer microseconds: an hourly key as (epoch_us + c) // 3600000000 groups a BIGINT
    # instead of make_timestamptz(epoch_us(date_trunc(...))) per row; measured on 2M rows
    # (one thread), the key's GROUP BY went from 1.36-1.59x to 1.09-1.10x of a hand-written
    # epoch_us(t) // 3600000000.
    def epoch_micros(self, e: exp.Expression, kind: str) -> exp.Expression:
        e = self._naive(e, kind)
        return exp.Anonymous(this="epoch_us", expressions=[e])

    def from_epoch_micros(self, micros: exp.Expression) -> exp.Expression:
        return exp.Anonymous(this="make_timestamptz", expressions=[micros])

    def quantile(self, arg: exp.Expression, q: float) -> exp.Expression:
        # quantile_cont interpolates linearly: Hyndman & Fan type 7.
        return exp.Anonymous(this="quantile_cont", expressions=[self.double(arg), self.number(q)])

    def int_series(self, n: int, name: str) -> exp.Select:
        # range(n): the table function of the integers 0 .. n-1 (column "range")
        return exp.select(exp.alias_(exp.column("range", quoted=True), name, quoted=True)).from_(
            exp.Table(this=exp.Anonymous(this="range", expressions=[exp.Literal.number(n)])))

    def finite(self, e: exp.Expression) -> exp.Expression:
        return exp.Anonymous(this="isfinite", expressions=[e])
