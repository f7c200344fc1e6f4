"""Text values longer than 1,000 characters are cut in SQL, and the answer says so.

Before, a chart by a text column carried each value whole: 2,000 groups of 200,000
characters made an 800 MB JSON answer in 13 s (3.8 GB resident); 10,000 groups of 1 MB
would have taken the process down. Now keys and min / max of text are cut to
``planner.model.MAX_TEXT_CHARS`` characters (code points, not bytes: ClickHouse's
``substring`` counts bytes, so it cuts with ``substringUTF8``), ``stats.cut_text`` counts
the cut values per column (CSV and Parquet: the ``X-Sluice-Cut-Text`` header), and groups
and their order stay those of the whole values.

References: Python ``str`` slicing and ``sorted`` (code point order; every text column here
is binary-collated) over the generated rows, on DuckDB, PostgreSQL, MariaDB, SQLite and
ClickHouse.
"""

from __future__ import annotations

import sqlite3

import duckdb
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]
CAP = 1000
# 1,000 equal characters then a distinct tail: cut, they look alike but stay apart; the
# multi-byte ones would be cut in the middle of a character by a byte count
PREFIX = "東" * 600 + "z" * 400
TEXTS = [PREFIX + "b", PREFIX + "a", PREFIX + "a" * 3000, "short", "é" * 1001, "é" * 1000,
         "x" * 999, None]
ROWS = [(i, TEXTS[i % len(TEXTS)]) for i in range(40)]


def _load(engine: str, root) -> dict:
    name = f"sluice_long_{fx.worker()}"
    if engine == "duckdb":
        path = root / "long.duckdb"
        con = duckdb.connect(str(path))
        con.execute("CREATE TABLE t (id BIGINT, s VARCHAR)")
        con.executemany("INSERT INTO t VALUES (?, ?)", ROWS)
        con.close()
        return {"engine": "duckdb", "path": str(path), "table": "t"}
    if engine == "postgres":
        import psycopg

        with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
            conn.execute(f'DROP TABLE IF EXISTS "{name}"')
            conn.execute(f'CREATE TABLE "{name}" (id bigint, s text COLLATE "C")')
            with conn.cursor().copy(f'COPY "{name}" (id, s) FROM STDIN') as cp:
                for r in ROWS:
                    cp.write_row(r)
        return {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{name}"}
    if engine == "mysql":
        import pymysql

        my = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                             charset="utf8mb4", autocommit=True)
        with my.cursor() as cur:
            cur.execute(f"DROP TABLE IF EXISTS `{name}`")
            cur.execute(f"CREATE TABLE `{name}` (id BIGINT, s TEXT) CHARACTER SET utf8mb4 "
                        "COLLATE utf8mb4_bin")
            cur.executemany(f"INSERT INTO `{name}` VALUES (%s, %s)", ROWS)
        my.close()
        return {"engine": "mysql", "dsn": fx.MYSQL_DSN, "table": f"test.{name}"}
    if engine == "sqlite":
        path = root / "long.sqlite"
        conn = sqlite3.connect(path)
        conn.execute("CREATE TABLE t (id INTEGER, s TEXT)")
        conn.executemany("INSERT INTO t VALUES (?, ?)", ROWS)
        conn.commit()
        conn.close()
        return {"engine": "sqlite", "path": str(path), "table": "t"}
    from chdb import session as chs

    folder = fx.chdb_folder(root)
    s = chs.Session(str(folder))
    s.query("CREATE DATABASE IF NOT EXISTS sluice_test")
    s.query("DROP TABLE IF EXISTS sluice_test.long_text")
    s.query("CREATE TABLE sluice_test.long_text (id Int64, s Nullable(String)) "
            "ENGINE = MergeTree ORDER BY id")
    values = ", ".join("(%d, %s)" % (i, "NULL" if t is None else "'" + t + "'") for i, t in ROWS)
    s.query(f"INSERT INTO sluice_test.long_text VALUES {values}")
    s.close()
    return {"engine": "clickhouse", "path": str(folder), "table": "sluice_test.long_text"}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("long_text")
    sources = {e: _load(e, root) for e in ENGINES}
    app = create_app(parse_settings({"sources": sources, "cache": {"enabled": False},
                                     "server": {"request_log": False}}, "<long text>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def _cut(t):
    return None if t is None else t[:CAP]


@pytest.mark.parametrize("engine", ENGINES)
def test_keys_are_cut_and_counted_and_keep_their_order(client, engine):
    r = client.post("/v1/chart", json={"source": engine, "channels": {
        "x": {"column": "s"}, "y": {"agg": "count"}, "size": {"agg": "max", "column": "s"}}})
    assert r.status_code == 200, r.text
    got = r.json()
    whole = sorted({t for t in TEXTS if t is not None}) + [None]  # NULLs last
    assert got["data"]["s"] == [_cut(t) for t in whole]
    assert got["data"]["max_s"] == [_cut(t) for t in whole]
    assert got["data"]["count"] == [sum(1 for _, t in ROWS if t == w) for w in whole]
    longer = sum(1 for t in whole if t is not None and len(t) > CAP)
    assert got["stats"]["cut_text"] == {"s": longer, "max_s": longer}
    assert all(c["name"] != "_sluice_full0" for c in got["columns"])


@pytest.mark.parametrize("engine", ENGINES)
def test_no_cut_no_stat_and_a_sorted_limit(client, engine):
    r = client.post("/v1/chart", json={"source": engine, "channels": {
        "x": {"column": "s"}, "y": {"agg": "count"}},
        "where": [{"column": "id", "lt": 4}], "sort": [{"channel": "x", "desc": True}],
        "limit": 1})
    assert r.status_code == 200, r.text
    got = r.json()
    first = max(t for _, t in ROWS[:4])  # the whole values decide the order
    assert got["data"]["s"] == [_cut(first)] and got["stats"]["cut_text"] == {"s": 1}
    r = client.post("/v1/chart", json={"source": engine, "channels": {
        "x": {"column": "s"}, "y": {"agg": "count"}}, "where": [{"column": "s", "eq": "short"}]})
    assert "cut_text" not in r.json()["stats"]


def test_table_formats_say_what_was_cut(client):
    body = {"source": "duckdb", "channels": {"x": {"column": "s"}, "y": {"agg": "count"}}}
    r = client.post("/v1/chart", json=body, headers={"accept": "text/csv"})
    assert r.status_code == 200
    assert r.headers["x-sluice-cut-text"] == "s"
    assert max(len(line) for line in r.text.splitlines()) < 4 * CAP


def test_a_batch_cuts_each_chart(client):
    """Charts under one filter share a GROUPING SETS statement on DuckDB: each is cut."""
    r = client.post("/v1/batch", json={"source": "duckdb", "charts": [
        {"id": "a", "channels": {"x": {"column": "s"}, "y": {"agg": "count"}}},
        {"id": "b", "channels": {"x": {"column": "id", "bin": {"width": 10}},
                                 "y": {"agg": "max", "column": "s"}}}]})
    assert r.status_code == 200, r.text
    a, b = r.json()["results"]
    assert a["sql"][-1] == b["sql"][-1]  # one statement (b has its extents statement too)
    assert a["data"]["s"] == [_cut(t) for t in sorted({t for t in TEXTS if t}) + [None]]
    # the largest text of every 10 ids is PREFIX + "b" (id % 8 == 0; 東 sorts last)
    assert b["data"]["max_s"] == [_cut(PREFIX + "b")] * 4
    assert b["stats"]["cut_text"] == {"max_s": 4}


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("top", [None, 0])
def test_profiles_cut_values_min_and_max(client, engine, top):
    q = "" if top is None else f"?top={top}"
    r = client.get(f"/v1/sources/{engine}/columns/s{q}")
    assert r.status_code == 200, r.text
    got = r.json()
    texts = [t for _, t in ROWS if t is not None]
    assert got["min"] == _cut(min(texts)) and got["max"] == _cut(max(texts))
    assert got["cut_text"] is True
    if top is None:  # ties of equal counts in the order of the whole values
        counts = {t: texts.count(t) for t in set(texts)}
        want = sorted(counts, key=lambda t: (-counts[t], t))
        assert [v["value"] for v in got["top_values"]["values"]] == [_cut(t) for t in want]
    r = client.get(f"/v1/sources/{engine}/columns/id")
    assert "cut_text" not in r.json() or r.json()["cut_text"] is None
