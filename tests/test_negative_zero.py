"""-0.0 and 0.0 are one value (IEEE 754: they compare equal), on every live engine.

ClickHouse groups and looks up a Float64 by its bits: a plain key answered two ``0.0``
groups, a histogram two ``[0, 5)`` rows (floor(-0.0 / 5) is -0.0), ``count_distinct``
counted both, and ``in: [0.0]`` (a hash set) did not match -0.0 while ``eq: 0`` did.
``Dialect.group_number`` adds 0 there (-0 + 0 = +0). ``round(-0.4)`` is -0.0 too, so an
expression key split the same way.

References: Python, where -0.0 == 0.0 and hash(-0.0) == hash(0.0) (``collections.Counter``
and ``set`` group them as one), and ``numpy.histogram``.
"""

from __future__ import annotations

import collections

import numpy as np
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]
XS = [-0.0, 0.0, 1.5, -0.0, 12.0, None, 0.0, -0.4, 7.0, -0.0]


def _rows() -> list[dict]:
    rows = fx.make_rows()[:len(XS)]
    return [{**r, "x": x} for r, x in zip(rows, XS)]


ROWS = _rows()


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    sources = fx.five_engines(tmp_path_factory.mktemp("negative_zero"), ROWS)
    app = create_app(parse_settings({"sources": sources, "cache": {"enabled": False},
                                     "server": {"request_log": False}}, "<negative zero>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def _chart(client, engine: str, **body) -> dict:
    r = client.post("/v1/chart", json={"source": engine, **body})
    assert r.status_code == 200, r.text
    return r.json()["data"]


def _count(client, engine: str, **body) -> int:
    return _chart(client, engine, channels={"y": {"agg": "count"}}, **body)["count"][0]


@pytest.mark.parametrize("engine", ENGINES)
def test_plain_key_and_distinct_count(client, engine):
    d = _chart(client, engine, channels={"x": {"column": "x"}, "y": {"agg": "count"}})
    want = collections.Counter(ROWS_X := [r["x"] for r in ROWS])
    assert dict(zip(d["x"], d["count"])) == dict(want)
    d = _chart(client, engine, channels={"y": {"agg": "count_distinct", "column": "x"}})
    assert d["count_distinct_x"] == [len({x for x in ROWS_X if x is not None})]


@pytest.mark.parametrize("engine", ENGINES)
def test_bins(client, engine):
    d = _chart(client, engine, channels={"x": {"column": "x", "bin": {"width": 5, "origin": 0}},
                                         "y": {"agg": "count"}})
    xs = np.array([x for x in XS if x is not None])
    edges = np.arange(-5.0, 20.0, 5.0)
    counts, _ = np.histogram(xs, bins=edges)
    want = {float(lo): int(c) for lo, c in zip(edges[:-1], counts) if c}
    want[None] = 1
    assert dict(zip(d["x_lo"], d["count"])) == want


@pytest.mark.parametrize("engine", ENGINES)
def test_sets_and_conditions(client, engine):
    zeros = sum(1 for x in XS if x == 0.0)
    assert _count(client, engine, where=[{"column": "x", "in": [0.0]}]) == zeros
    assert _count(client, engine, where=[{"column": "x", "in": [-0.0, 7]}]) == zeros + 1
    assert _count(client, engine, where=[{"column": "x", "not_in": [0.0]}]) == \
        sum(1 for x in XS if x is not None and x != 0.0)
    assert _count(client, engine, where=[{"column": "x", "eq": 0}]) == zeros
    assert _count(client, engine, filter_sql="x IN (0.0, 7)") == zeros + 1


@pytest.mark.parametrize("engine", ENGINES)
def test_expression_key(client, engine):
    d = _chart(client, engine, channels={"x": {"expr": "round(x, 0)"}, "y": {"agg": "count"}})
    # round half away from zero (README filter_sql); round(-0.4) is -0.0 == 0.0
    want = collections.Counter(None if x is None else float(np.sign(x) * np.floor(abs(x) + 0.5))
                               for x in XS)
    assert dict(zip(d["round(x, 0)"], d["count"])) == dict(want)
