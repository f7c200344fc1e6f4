"""Amazon Redshift (generated only): PostgreSQL-like, but CONVERT_TIMEZONE for wall-clock
times, APPROXIMATE COUNT(DISTINCT) (HyperLogLog), no isodow/isoyear date parts (built from
dow and the ISO week's Thursday)."""

from __future__ import annotations

import dataclasses

from sqlglot import exp

from planner.dialects.postgres import Postgres


class Redshift(Postgres):
    name = "redshift"
    sqlglot = "redshift"
    caps = dataclasses.replace(
        Postgres.caps,
        param_form=None,  # generated only: no driver here
        max_identifier_bytes=127,
        checked="golden",
        approx_distinct=("hyperloglog", 0.02),
        shared_cte=None,  # (generated only: not measured, so one statement per chart)
    )
    notes = {**Postgres.notes,
             "approx_count_distinct": "APPROXIMATE COUNT(DISTINCT)",
             "tz": "CONVERT_TIMEZONE",
             "extract": "DATE_PART (isodow/isoyear built)"}

    def to_local(self, e, kind, tz):
        naive = self._as_timestamp(e, kind)
        if kind == "timestamptz":
            return self.fn("CONVERT_TIMEZONE", self.lit(tz), naive)
        if tz == "UTC":
            return naive
        return self.fn("CONVERT_TIMEZONE", self.lit("UTC"), self.lit(tz), naive)

    def from_local(self, e, tz):
        if tz == "UTC":
            return e
        return self.fn("CONVERT_TIMEZONE", self.lit(tz), self.lit("UTC"), e)

    def _part(self, field: str, e: exp.Expression) -> exp.Expression:
        return self.fn("DATE_PART", self.lit(field), e)

    def extract(self, field, naive):
        if field == "isodow":
            dow = self._part("dow", naive)
            part = exp.Add(this=exp.Mod(this=exp.Paren(this=exp.Add(this=dow, expression=self.lit(6))),
                                        expression=self.lit(7)), expression=self.lit(1))
        elif field in ("isoyear", "week"):
            thursday = exp.Add(this=self.trunc("week", naive), expression=exp.Interval(
                this=self.lit("3"), unit=self.var("DAY")))
            if field == "isoyear":
                part = self._part("year", thursday)
            else:
                part = exp.Add(this=exp.IntDiv(this=exp.Paren(this=exp.Sub(
                    this=self._part("doy", thursday), expression=self.lit(1))),
                    expression=self.lit(7)), expression=self.lit(1))
        elif field == "second":
            part = exp.Floor(this=self._part("second", naive))
        else:
            part = self._part(field, naive)
        return self.bigint(part)

    def epoch(self, e, kind):
        return self.double(self._part("epoch", self._as_timestamp(e, kind)))

    def from_epoch(self, seconds):
        return exp.Add(this=self.cast(self.lit("1970-01-01 00:00:00"), "TIMESTAMP"),
                       expression=exp.Mul(this=self.paren(seconds), expression=exp.Interval(
                           this=self.lit("1"), unit=self.var("SECOND"))))
