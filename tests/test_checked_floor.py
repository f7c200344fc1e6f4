"""Width / origin bins over a range nobody knows at plan time: the plain floor, checked.

The main statement writes the bin index as ``floor((v - origin) / width)`` and carries each
group's min / max value; when a group holds a value outside its bin (a value within a few
ulps of an edge, where IEEE division rounds across it) the service runs the guarded form
(planner/emit_keys.py ``checkable``). Either way every row must be counted in the bin
``lo <= v < hi`` that the answer reports.

Outside reference: ``pandas.cut(values, edges, right=False)`` over the answer's own edges,
computed as ``origin + i * width`` in IEEE double arithmetic by numpy, on the same rows read
back from each engine's file. Engines: DuckDB and SQLite (files written here), PostgreSQL
(the test server on 127.0.0.1).
"""

from __future__ import annotations

import math
import os
import sqlite3

import duckdb
import numpy as np
import pandas as pd
import pytest

from planner.model import ChartRequest

WIDTH = 0.1
#: values ON the edges origin + i*width (as doubles) and one ulp either side: the plain
#: floor puts some of them one bin off (e.g. -19.700000000000003 = -197 * 0.1 floors to -198)
EDGE_VALUES = sorted({v for i in range(-250, 250)
                      for e in [i * WIDTH]
                      for v in (e, math.nextafter(e, -math.inf), math.nextafter(e, math.inf))})
#: values nowhere near an edge (the check passes: no second statement)
PLAIN_VALUES = [(i + 0.5) * WIDTH for i in range(-250, 250)]


def _write(root, name, values):
    db = root / f"{name}.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE t (v DOUBLE)")
    con.executemany("INSERT INTO t VALUES (?)", [[v] for v in values] + [[None]])
    con.close()
    lite = root / f"{name}.sqlite"
    c = sqlite3.connect(lite)
    c.execute("CREATE TABLE t (v REAL)")
    c.executemany("INSERT INTO t VALUES (?)", [(v,) for v in values] + [(None,)])
    c.commit()
    c.close()
    return {f"{name}_duckdb": {"engine": "duckdb", "path": str(db), "table": "t"},
            f"{name}_sqlite": {"engine": "sqlite", "path": str(lite), "table": "t"}}


def _postgres(name, values):
    import psycopg

    dsn = "postgresql://postgres@127.0.0.1:5432/test"  # as tests/engine_fixtures.py
    schema = f"checked_{name}_{os.environ.get('PYTEST_XDIST_WORKER', 'main')}".replace("-", "_")
    try:
        with psycopg.connect(dsn, autocommit=True) as conn:
            conn.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE")
            conn.execute(f"CREATE SCHEMA {schema}")
            conn.execute(f"CREATE TABLE {schema}.t (v double precision)")
            with conn.cursor() as cur:
                cur.executemany(f"INSERT INTO {schema}.t VALUES (%s)",
                                [(v,) for v in values] + [(None,)])
    except psycopg.OperationalError as e:  # pragma: no cover - make test starts it
        pytest.fail(f"PostgreSQL is not reachable at {dsn}: {e}")
    return {f"{name}_postgres": {"engine": "postgres", "dsn": dsn, "table": f"{schema}.t"}}


@pytest.fixture(scope="module")
def service(tmp_path_factory):
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("checked_floor")
    sources = {**_write(root, "edges", EDGE_VALUES), **_write(root, "plain", PLAIN_VALUES),
               **_postgres("edges", EDGE_VALUES), **_postgres("plain", PLAIN_VALUES)}
    catalog = Catalog(parse_settings({"sources": sources}, "<checked floor>"))
    yield ChartService(catalog)
    catalog.close()


ENGINES = ["duckdb", "sqlite", "postgres"]


def _chart(service, source, where=()):
    req = ChartRequest.model_validate({
        "source": source, "limit": 10000, "where": list(where),
        "channels": {"x": {"column": "v", "bin": {"width": WIDTH, "origin": 0}},
                     "y": {"agg": "count"}}})
    out = service.to_json(service.run(req))
    d = out["data"]  # columnar: one list per output column
    out["rows"] = [dict(zip(d, vals)) for vals in zip(*d.values())]
    return out


def _expected(values, bins):
    """pandas.cut over the answer's layout: edges start + i*width (numpy float64), the last
    bin closed (values equal to its end belong to it, README "bin edges")."""
    edges = bins["start"] + np.arange(bins["count"] + 1, dtype=np.float64) * bins["width"]
    codes = pd.cut(pd.Series(values, dtype="float64"), edges, right=False, labels=False)
    counts = {float(edges[int(i)]): int(n) for i, n in codes.value_counts().items()}
    last = float(edges[-2])
    counts[last] = counts.get(last, 0) + sum(1 for v in values if v == edges[-1])
    assert sum(counts.values()) == len(values), "every value lies within the layout"
    return {lo: n for lo, n in counts.items() if n}


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name,values", [("edges", EDGE_VALUES), ("plain", PLAIN_VALUES)])
def test_width_bins_count_every_value_in_its_reported_bin(service, engine, name, values):
    out = _chart(service, f"{name}_{engine}")
    got = {r["x_lo"]: r["count"] for r in out["rows"] if r["x_lo"] is not None}
    assert got == _expected(values, out["bins"]["x"])  # reference: pandas.cut(right=False)
    nulls = [r["count"] for r in out["rows"] if r["x_lo"] is None]
    assert nulls == [1]
    b = out["bins"]["x"]
    for r in out["rows"]:
        if r["x_lo"] is not None:  # the reported edges are start + i*width, start + (i+1)*width
            i = round((r["x_lo"] - b["start"]) / WIDTH)
            assert (r["x_lo"], r["x_hi"]) == (b["start"] + i * WIDTH, b["start"] + (i + 1) * WIDTH)


@pytest.mark.parametrize("engine", ENGINES)
def test_guarded_form_runs_only_when_the_check_fails(service, engine):
    """Values on the edges need the guarded statement (a second main statement, reported in
    ``sql`` and ``stats.statements``, after the extents statement); values mid-bin are
    answered by the checked plain floor alone; a repeat of the failed layout, or another
    layout of the same column and width on that source, runs the guarded form at once."""
    from app.service import ChartService
    from planner import names

    service = ChartService(service.catalog)  # its own memory of failed layouts

    def mains(out):  # the main statements run (the extents one may come from its cache)
        return [q for q in out["sql"] if names.cte("base") in q]

    plain = _chart(service, f"plain_{engine}")
    assert [names.misbinned() in q for q in mains(plain)] == [True]  # checked, no re-run
    first = _chart(service, f"edges_{engine}")
    assert [names.misbinned() in q for q in mains(first)] == [True, False]  # then guarded
    again = _chart(service, f"edges_{engine}")
    assert [names.misbinned() in q for q in mains(again)] == [False]  # guarded at once
    assert again["data"] == first["data"]
    # another layout of the same width on that source (a brush moved the data's min): the
    # data sits on this width's edges, so the guarded form runs at once
    moved = _chart(service, f"edges_{engine}", [{"column": "v", "gte": -20}])
    assert moved["bins"]["x"]["start"] != first["bins"]["x"]["start"]
    assert [names.misbinned() in q for q in mains(moved)] == [False]
    rows = [v for v in EDGE_VALUES if v >= -20]
    got = {r["x_lo"]: r["count"] for r in moved["rows"] if r["x_lo"] is not None}
    assert got == _expected(rows, moved["bins"]["x"])  # reference: pandas.cut(right=False)
