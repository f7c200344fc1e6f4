"""Charts of tens of thousands of groups answer within their statement timeout, on every
live engine (DuckDB, PostgreSQL, MariaDB, SQLite, ClickHouse).

The windows over all groups (matched rows, outside-limit counts, the layout check: ``MIN /
MAX(e) OVER ()``) are recomputed over the whole frame for every row by MariaDB 10.11: on
20,000 groups one window took 11.7 s, so a chart of 40,000 groups (or a dense grid of 200 x
200 bins) ran into any statement timeout and answered 504. MariaDB now computes them as
``FIRST_VALUE(e) OVER (ORDER BY e ...)`` (``caps.window_extremes``).

The sources here have a 10 s statement timeout; before that change the MariaDB cases took
longer than that. References: ``collections.Counter`` over the generated rows, and for the
grid ``numpy.histogram2d`` (bins [a, b), the last closed).
"""

from __future__ import annotations

import collections

import numpy as np
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]
COPIES = 12  # 36,000 rows, one distinct k per row


def _rows() -> list[dict]:
    base = fx.make_rows()
    out = []
    for c in range(COPIES):
        for r in base:
            i = c * len(base) + r["id"]
            out.append({**r, "id": i, "k": f"k{i:06d}"})
    return out


ROWS = _rows()


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    sources = fx.five_engines(tmp_path_factory.mktemp("many_groups"), ROWS)
    for cfg in sources.values():
        cfg["statement_timeout_ms"] = 10000
    app = create_app(parse_settings({"sources": sources, "cache": {"enabled": False},
                                     "server": {"request_log": False}}, "<many groups>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.mark.parametrize("engine", ENGINES)
def test_forty_thousand_groups(client, engine):
    r = client.post("/v1/chart", json={
        "source": engine, "channels": {"x": {"column": "k"}, "y": {"agg": "count"},
                                       "size": {"agg": "max", "column": "x"}},
        "sort": [{"channel": "x", "desc": True}], "limit": 5})
    assert r.status_code == 200, r.text
    got = r.json()
    want = collections.Counter(row["k"] for row in ROWS)
    assert got["stats"]["groups"] == len(want) == len(ROWS)
    assert got["stats"]["matched_rows"] == len(ROWS)
    assert got["stats"]["truncated"] is True
    assert got["data"]["k"] == sorted(want, reverse=True)[:5]
    by_k = {row["k"]: row["x"] for row in ROWS}
    assert got["data"]["max_x"] == [by_k[k] for k in got["data"]["k"]]


@pytest.mark.parametrize("engine", ENGINES)
def test_dense_grid_of_forty_thousand_cells(client, engine):
    r = client.post("/v1/chart", json={
        "source": engine, "empty_bins": "zero", "limit": 50000,
        "channels": {"x": {"column": "x", "bin": {"width": 0.5, "origin": 0, "limits": [-50, 50]}},
                     "y": {"column": "n", "bin": {"width": 0.5, "origin": 0, "limits": [-50, 50]}},
                     "color": {"agg": "count"}}})
    assert r.status_code == 200, r.text
    got = r.json()
    d = got["data"]
    cells = {(a, b): c for a, b, c in zip(d["x_lo"], d["y_lo"], d["count"]) if a is not None
             and b is not None}
    assert len(cells) == 200 * 200
    inside = [(row["x"], row["n"]) for row in ROWS if row["x"] is not None and row["n"] is not None
              and -50 <= row["x"] <= 50 and -50 <= row["n"] <= 50]
    edges = np.arange(-50, 50.5, 0.5)
    hist, _, _ = np.histogram2d([p[0] for p in inside], [p[1] for p in inside], bins=[edges, edges])
    want = {(float(edges[i]), float(edges[j])): int(hist[i, j])
            for i in range(200) for j in range(200)}
    assert cells == want
    assert got["stats"]["outside_limits"] == {
        "x": sum(1 for row in ROWS if row["x"] is not None and not -50 <= row["x"] <= 50),
        "y": sum(1 for row in ROWS if row["n"] is not None and not -50 <= row["n"] <= 50)}
