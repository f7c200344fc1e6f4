"""Charts of one ``/v1/batch`` under one composed filter share ONE GROUPING SETS statement
(Gray et al., "Data Cube", 1997; planner/emit_sets.py, app/batch_sets.py) where the dialect
has the capability, and one statement per chart where it has not.

References outside the project, on every live engine (DuckDB, PostgreSQL, MariaDB, SQLite,
ClickHouse embedded through chdb and over HTTP, Spark; the rows of tests/engine_fixtures.py):

(a) the engine itself: each chart sent alone to ``/v1/chart`` with ``Cache-Control:
    no-cache`` runs its own statements there; the batch member must equal that answer
    (data, columns, bins, domains, stats, truncation) but for ``sql``, ``stats.statements``
    and ``timing_ms``, which say what actually ran;
(b) pandas groupby on the fixture rows, filtered in pandas (count and mean per category,
    NULL its own group);
(c) the statements the engine saw (a counter around the engine's ``execute`` /
    ``fetch_row``): one main statement for the shared charts where
    ``caps.grouping_sets`` and ``caps.shared_cte`` say so, else one per chart.
"""

from __future__ import annotations

import datetime as dt
import math
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse", "clickhouse_http"]
TZ = "UTC"  # (SQLite has no other zone)

#: the shapes the shared statement takes, and one it does not (top-N: its own statement)
CHARTS = [
    {"id": "x5", "channels": {"x": {"column": "x", "bin": {"width": 5, "origin": 0}},
                              "y": {"agg": "count"}}},
    {"id": "n12", "channels": {"x": {"column": "n", "bin": {"bins": 12}}, "y": {"agg": "count"}}},
    {"id": "cat", "channels": {"x": {"column": "cat"}, "y": {"agg": "count"},
                               "size": {"agg": "avg", "column": "x"}}},
    {"id": "catgrp", "channels": {"x": {"column": "cat"}, "color": {"column": "grp"},
                                  "y": {"agg": "sum", "column": "amount"}},
     "sort": [{"channel": "y", "desc": True}], "limit": 7},
    {"id": "month", "channels": {"x": {"column": "ts", "trunc": "month"},
                                 "y": {"agg": "max", "column": "n"}},
     "facet": {"row": {"column": "grp"}, "max_groups": 3}},
    {"id": "xlim", "channels": {"x": {"column": "x", "bin": {"bins": 10, "limits": [-20, 20]}},
                                "y": {"agg": "min", "column": "n"}}},
    {"id": "top", "channels": {"x": {"column": "cat", "top": 3}, "y": {"agg": "count"}}},
]
SHARED = {"x5", "n12", "cat", "catgrp", "month", "xlim"}
DATA_BINS = {"x5", "n12"}  # layouts read from the data: an extents statement


@pytest.fixture(scope="module")
def clickhouse_dsn(tmp_path_factory):
    root = tmp_path_factory.mktemp("gsets_ch")
    proc = subprocess.Popen([sys.executable, str(Path(__file__).with_name("chdb_http_server.py")),
                             str(root)], stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline().split()
        assert len(line) == 2, f"chdb_http_server.py did not start (exit {proc.poll()})"
        port, table = line
        yield f"http://127.0.0.1:{port}/", table
    finally:
        proc.terminate()
        proc.wait(20)


@pytest.fixture(scope="module")
def client(tmp_path_factory, clickhouse_dsn):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("gsets")
    rows = fx.make_rows()
    table = fx.arrow_table(rows)
    dsn, ch_table = clickhouse_dsn
    sources = {"duckdb": fx.load_duckdb(root, table), "postgres": fx.load_postgres(rows),
               "mysql": fx.load_mysql(rows), "sqlite": fx.load_sqlite(root, rows),
               "clickhouse": fx.load_chdb(root, table),
               "clickhouse_http": {"engine": "clickhouse", "dsn": dsn, "table": ch_table}}
    app = create_app(parse_settings({"sources": sources, "cache": fx.STEADY_CACHE}, "<grouping sets>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def frame():
    df = pd.DataFrame(fx.make_rows())
    return df.assign(n=df["n"].astype("Int64"), x=df["x"].astype("Float64"))


class Counter:
    """The statements an engine is asked to run (``execute``: main statements;
    ``fetch_row``: extents and empty-answer totals)."""

    def __init__(self, monkeypatch, engine) -> None:
        self.execute: list[str] = []
        self.fetch_row: list[str] = []
        for name in ("execute", "fetch_row"):
            original = getattr(engine, name)

            def spy(sql, *args, _orig=original, _log=getattr(self, name), **kw):
                _log.append(sql)
                return _orig(sql, *args, **kw)
            monkeypatch.setattr(engine, name, spy)


def _counted_batch(client, monkeypatch, body: dict) -> tuple[list, list[str], list[str]]:
    """POST /v1/batch: its answers, the extents / totals rows the engine was asked for and
    the main statements it ran -- the planner's (not the catalog's row count); an engine
    may answer fetch_row through its own execute."""
    count = Counter(monkeypatch, client.app.state.catalog.engine(body["source"]))
    r = client.post("/v1/batch", json=body)
    assert r.status_code == 200, r.text
    rows_asked = [s for s in count.fetch_row if "_sluice_" in s]
    executed = [s for s in count.execute if s not in count.fetch_row and "_sluice_" in s]
    monkeypatch.undo()
    return r.json()["results"], rows_asked, executed


def _shares(client, source: str) -> bool:
    """Whether the source's dialect takes the shared path (its capability record)."""
    from planner.dialects import get_dialect

    caps = get_dialect(client.app.state.catalog.engine(source).dialect).caps
    return caps.grouping_sets and caps.shared_cte is not None


def _same(res: dict) -> dict:
    """An answer without what says which statements ran for it and how long they took."""
    out = {k: v for k, v in res.items()
           if k not in ("sql", "timing_ms", "cache", "id", "brushes", "stable", "stats")}
    out["stats"] = {k: v for k, v in res["stats"].items() if k != "statements"}
    return out


def _close(a, b) -> bool:
    """Equal, but floats to 1e-12 relative: a mean of doubles summed in another order (the
    shared statement's grouping against the chart's own) may differ in the last digit --
    IEEE 754 addition is not associative."""
    if isinstance(a, float) and isinstance(b, float):
        return math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-300)
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_close(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_close(x, y) for x, y in zip(a, b))
    return a == b


def _alone(client, body: dict, chart: dict) -> dict:
    req = {"source": body["source"], "tz": body["tz"], "where": body["where"],
           **{k: v for k, v in chart.items() if k != "id"}}
    r = client.post("/v1/chart", json=req, headers={"Cache-Control": "no-cache"})
    assert r.status_code == 200, r.text
    return r.json()


def _check_cat(res: dict, sub: pd.DataFrame) -> None:
    """reference: pandas groupby (dropna=False: a NULL category is its own group)."""
    g = sub.groupby("cat", dropna=False)
    want_n = {(None if pd.isna(k) else k): int(v) for k, v in g.size().items()}
    want_mean = {(None if pd.isna(k) else k): (None if pd.isna(v) else float(v))
                 for k, v in g["x"].mean().items()}
    data = res["data"]
    assert dict(zip(data["cat"], data["count"])) == want_n
    for k, v in zip(data["cat"], data["avg_x"]):
        w = want_mean[k]
        assert (v is None and w is None) or math.isclose(v, w, rel_tol=1e-12, abs_tol=1e-12)


@pytest.mark.parametrize("engine", ENGINES)
def test_shared_filter_batch_equals_each_chart_alone(client, frame, engine, monkeypatch):
    lo = -30 - ENGINES.index(engine)  # a filter of its own: no cached answer or extents
    body = {"source": engine, "tz": TZ, "where": [{"column": "n", "gte": lo}], "charts": CHARTS}
    results, rows_asked, executed = _counted_batch(client, monkeypatch, body)
    for chart, res in zip(CHARTS, results):
        assert "status" not in res, res
        assert _same(res) == _same(_alone(client, body, chart)), chart["id"]  # (a)
    sub = frame[(frame["n"] >= lo).fillna(False)]
    _check_cat(results[2], sub)  # (b)
    assert results[2]["stats"]["matched_rows"] == len(sub)
    assert results[3]["stats"]["truncated"] is True  # the limit's notice, as alone
    # (c) the statements the engine ran for the batch
    by_id = {c["id"]: res for c, res in zip(CHARTS, results)}
    if _shares(client, engine):
        assert len(executed) == 2  # the shared statement + the top-N chart's own
        assert len(rows_asked) == 1  # one extents statement for both data-driven layouts
        mains = {by_id[i]["sql"][-1] for i in SHARED}
        assert len(mains) == 1 and "GROUPING SETS" in mains.pop()
        assert "GROUPING SETS" not in by_id["top"]["sql"][-1]
    else:
        assert len(executed) == len(CHARTS)
        assert len(rows_asked) == len(DATA_BINS)
        assert not any("GROUPING SETS" in s for res in results for s in res["sql"])


@pytest.mark.parametrize("engine", [e for e in ENGINES if e != "clickhouse_http"])
def test_a_moving_filter_carries_the_layouts_in_the_shared_statement(client, engine, monkeypatch):
    """A batch re-asked with a new filter (a moving range) lays its data-driven bins out
    from the last extents row and carries each one's own min / max in the shared statement
    (``planner.emit_main.carriable``): no extents statement; a chart whose carried row gives
    another layout runs again alone. Reference: every chart equals the same chart asked of a
    service with empty caches (its extents statement first)."""
    from app.service import ChartService

    changed = 0
    previous = None
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)
    windows = [(0, 300), (1, 300), (2, 299), (100, 4), (100.5, 4), (150, 150)]  # days
    for step, (start, days) in enumerate(windows):
        lo = t0 + dt.timedelta(days=start, minutes=7 * ENGINES.index(engine))
        hi = lo + dt.timedelta(days=days)
        body = {"source": engine, "tz": TZ, "charts": CHARTS, "where": [
            {"column": "ts", "gte": lo.isoformat(), "lt": hi.isoformat()}]}
        results, rows_asked, executed = _counted_batch(client, monkeypatch, body)
        fresh = ChartService(client.app.state.catalog)  # reference: empty caches
        real = client.app.state.service
        client.app.state.service = fresh
        try:
            for chart, res in zip(CHARTS, results):
                assert "status" not in res, res
                assert _close(_same(res), _same(_alone(client, body, chart))), (step, chart["id"])
        finally:
            client.app.state.service = real
        layout = [res["bins"]["x"] for c, res in zip(CHARTS, results) if c["id"] in DATA_BINS]
        if step and _shares(client, engine):
            moved = sum(a != b for a, b in zip(layout, previous))
            changed += moved
            assert rows_asked == [], rows_asked  # the shared statement carried the extents
            # the shared statement + the top-N chart's own (+ each chart whose layout moved,
            # again alone)
            assert len(executed) == 2 + moved, (step, executed)
            for c, res in zip(CHARTS, results):  # what ran for it, the shared one included
                if c["id"] in SHARED:
                    assert "_sluice_spine" in res["sql"][0]  # (the shared statement)
                    assert res["stats"]["statements"] == len(res["sql"])
        previous = layout
    if _shares(client, engine):
        assert 0 < changed < 2 * (len(windows) - 1)  # both paths: layouts held, some moved


def test_member_answer_is_cached_for_the_chart_alone(client):
    """A later /v1/chart equal to a shared member is answered from the result cache, with
    the member's bytes (reference: the batch answer)."""
    body = {"source": "duckdb", "tz": TZ, "where": [{"column": "n", "gte": -20}],
            "charts": CHARTS[:3]}
    res = client.post("/v1/batch", json=body).json()["results"]
    req = {"source": "duckdb", "tz": TZ, "where": body["where"],
           **{k: v for k, v in CHARTS[2].items() if k != "id"}}
    alone = client.post("/v1/chart", json=req).json()
    assert alone["cache"] == "hit"
    assert {k: v for k, v in alone.items() if k not in ("cache", "timing_ms")} == \
        {k: v for k, v in res[2].items()
         if k not in ("cache", "timing_ms", "id", "brushes", "stable")}


def test_different_brushes_are_separate_statements(client, monkeypatch):
    """Linked charts whose composed filters differ (each is filtered by the other's brush)
    run one statement each, on a dialect that could share one (reference: the engine's
    statement count; each still equals the chart alone)."""
    charts = [dict(CHARTS[2], brush=[{"column": "cat", "in": ["alpha", "beta"]}]),
              dict(CHARTS[1], brush=[{"column": "n", "gte": 0, "lt": 20}])]
    body = {"source": "duckdb", "tz": TZ, "where": [{"column": "n", "gte": -45}],
            "charts": charts}
    count = Counter(monkeypatch, client.app.state.catalog.engine("duckdb"))
    results = client.post("/v1/batch", json=body).json()["results"]
    executed = [s for s in count.execute if s not in count.fetch_row and "_sluice_" in s]
    monkeypatch.undo()
    assert len(executed) == 2 and not any("GROUPING SETS" in s for s in executed)
    for i, res in enumerate(results):
        other = charts[1 - i]["brush"]
        alone = _alone(client, dict(body, where=body["where"] + other),  # stable layouts
                       {**{k: v for k, v in charts[i].items() if k != "brush"},
                        "layout_filters": len(body["where"])})
        assert _same(res) == _same(alone)


def test_empty_shared_answer_has_the_totals_of_the_chart_alone(client):
    """A filter that keeps no rows: every member answers no rows with matched_rows 0, as
    the chart alone does (reference: the engine alone, its own totals statement)."""
    body = {"source": "postgres", "tz": TZ, "where": [{"column": "n", "gt": 1000}],
            "charts": CHARTS[2:6]}
    for chart, res in zip(body["charts"], client.post("/v1/batch", json=body).json()["results"]):
        assert res["stats"]["matched_rows"] == 0 and res["data"][res["columns"][0]["name"]] == []
        assert _same(res) == _same(_alone(client, body, chart))


def test_spark_shared_statement(tmp_path_factory, monkeypatch):
    """Spark SQL (local mode): three charts under one filter, one statement (GROUPING SETS),
    each equal to the chart alone (reference: Spark running each chart's own statement)."""
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("gsets_spark")
    src = fx.load_spark(root, fx.arrow_table(fx.make_rows()))
    src["table"] = "sluice_gsets"
    app = create_app(parse_settings({"sources": {"spark": src}, "cache": fx.STEADY_CACHE},
                                    "<grouping sets spark>"))
    body = {"source": "spark", "tz": "UTC", "where": [{"column": "n", "gte": -10}],
            "charts": [CHARTS[2], CHARTS[3], {"id": "grp", "channels": {
                "x": {"column": "grp"}, "y": {"agg": "count"}, "size": {"agg": "avg", "column": "x"}}}]}
    with TestClient(app, raise_server_exceptions=False) as c:
        count = Counter(monkeypatch, c.app.state.catalog.engine("spark"))
        r = c.post("/v1/batch", json=body)
        executed = [s for s in count.execute if s not in count.fetch_row and "_sluice_" in s]
        monkeypatch.undo()
        assert r.status_code == 200, r.text
        results = r.json()["results"]
        shares = _shares(c, "spark")
        assert len(executed) == (1 if shares else 3)
        # cat and grp have the same aggregates: one GROUPING SETS grouping of the two
        assert ("GROUPING SETS" in results[0]["sql"][-1]) == shares
        for chart, res in zip(body["charts"], results):
            assert "status" not in res, res
            assert _same(res) == _same(_alone(c, body, chart))
        check_linked_stable(c, "spark")


def check_linked_stable(c: TestClient, source: str) -> None:
    """Linked charts on ``source`` with a brush on another chart (tests/test_linked.py's
    dashboard, at the brush step whose rows would move both layouts): every chart equals
    the chart alone with ``layout_filters`` (the engine), Freedman-Diaconis edges and the
    top 4 from the rows of the shared where (numpy, pandas)."""
    tl = load("test_linked")
    lo, hi = tl.N_STEPS[1]
    body = tl.stable_batch(source, lo, hi)
    results = c.post("/v1/batch", json=body).json()["results"]
    frame = tl.fixture_frame()
    layout = frame[tl._mask(frame, set())]
    sub = layout[((layout["n"] >= lo) & (layout["n"] < hi)).fillna(False)]
    for i, res in enumerate(results[:3]):
        assert "status" not in res and res["stable"] is True, res
        alone = c.post("/v1/chart", json=tl._composed(body, i)).json()
        assert tl._answer(alone) == tl._answer(res)
    tl.check_fd(results[0], sub, layout)
    tl.check_cat(results[1], sub, layout)
