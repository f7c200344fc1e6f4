"""empty_bins planning is linear and bounded (issue 10.10): the bin series is generated in SQL
by the dialect (``Dialect.int_series``: DuckDB ``range``, PostgreSQL ``generate_series``,
ClickHouse ``numbers``, Spark ``range``, elsewhere a cross join of ten-row digit tables), so
the statement's size grows with log(bins), not with the bins.

Outside references: the process CPU clock (time.process_time) for the planning bound and sqlglot's
own parser for each target (every generated statement parses back in its dialect).
"""

from __future__ import annotations

import gc
import time

import pytest
import sqlglot

from planner.compile import finish, prepare
from planner.dialects import DIALECTS
from planner.model import ChartRequest
from planner.schema import ColumnInfo, SourceSchema

SCHEMA = SourceSchema("s", ("main", "t"), {
    "x": ColumnInfo("x", "double", "DOUBLE"), "ts": ColumnInfo("ts", "timestamptz", "TIMESTAMPTZ"),
    "grp": ColumnInfo("grp", "string", "VARCHAR")})

NUMERIC_10K = {"source": "s", "empty_bins": "zero",
               "channels": {"x": {"column": "x", "bin": {"width": 0.01, "limits": [0, 100]}},
                            "color": {"column": "grp"}, "y": {"agg": "count"}}}
DAYS_10K = {"source": "s", "empty_bins": "null",
            "channels": {"x": {"column": "ts", "bin": {"bins": 10000, "limits": [
                "2000-01-01T00:00:00Z", "2027-05-19T00:00:00Z"]}}, "y": {"agg": "count"}}}


def _plan_ms(body: dict, dialect: str) -> tuple[float, str]:
    """CPU milliseconds of planning and rendering (process time: the shared test machine's
    load does not count) and the SQL."""
    req = ChartRequest.model_validate(body)
    gc.disable()  # a collection of unrelated garbage is not planning time
    try:
        t0 = time.process_time()
        plan = finish(prepare(req, SCHEMA, DIALECTS[dialect]), {})
        sql = plan.main_sql
        return (time.process_time() - t0) * 1000.0, sql
    finally:
        gc.enable()


#: the live engines (the default DuckDB and the servers checked in the engine matrix)
LIVE = ["duckdb", "postgres", "mysql", "clickhouse", "spark"]


def _omit(body: dict) -> dict:
    return {**body, "empty_bins": "omit"}


def _best(body: dict, dialect: str) -> float:
    _plan_ms(body, dialect)  # warm imports and caches
    return min(_plan_ms(body, dialect)[0] for _ in range(7))


@pytest.mark.parametrize("dialect", LIVE)
@pytest.mark.parametrize("body", [NUMERIC_10K, DAYS_10K], ids=["numeric", "days"])
def test_ten_thousand_bins_plan_under_50_ms(dialect, body):
    best = _best(body, dialect)
    assert best < 50.0, f"{dialect}: planning 10,000 empty bins took {best:.1f} ms"  # reference: CPU clock


@pytest.mark.parametrize("dialect", sorted(DIALECTS))
@pytest.mark.parametrize("body", [NUMERIC_10K, DAYS_10K], ids=["numeric", "days"])
def test_empty_bins_cost_is_bounded_on_every_dialect(dialect, body):
    # the grid of 10,000 bins costs a few milliseconds over the same chart without it (the
    # rest is the bin expression, identical with or without empty_bins)
    extra = _best(body, dialect) - _best(_omit(body), dialect)
    assert extra < 30.0, f"{dialect}: empty_bins added {extra:.1f} ms"  # reference: CPU clock
    ms, sql = _plan_ms(body, dialect)
    assert len(sql) < 20_000, f"{dialect}: {len(sql)} characters of SQL for 10,000 bins"
    sqlglot.parse_one(sql, read=DIALECTS[dialect].sqlglot or None)  # reference: sqlglot's parser


def test_sql_grows_with_log_of_bins():
    sizes = [len(_plan_ms({**NUMERIC_10K, "channels": {**NUMERIC_10K["channels"], "x": {
        "column": "x", "bin": {"width": 1, "limits": [0, hi]}}}}, "mysql")[1]) for hi in (100, 10000)]
    d = DIALECTS["mysql"]
    two_digits = len(d.render(d.int_series(10000, "i"))) - len(d.render(d.int_series(100, "i")))
    assert sizes[1] <= sizes[0] + two_digits + 10  # 100x the bins: two more ten-row digit tables
