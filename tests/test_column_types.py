"""Columns whose engine type does not behave as their kind (``Dialect.readable``).

* A UUID column is a string kind. PostgreSQL, DuckDB, MariaDB (10.7+) and ClickHouse store
  it as a 128-bit type: before, a top-N chart answered 502 ("Cannot mix values of type
  VARCHAR and UUID in CASE", PostgreSQL: invalid input syntax for type uuid: "(other)"), and
  so did a ``where`` comparing it with a string that is not a UUID, or ``contains``.
* DuckDB's TIMESTAMP_NS holds years 1677..2262 only: comparing it with the year-1 bound of
  the range test made the whole source unusable (the catalog's row count failed).

References: Python's ``uuid`` module (RFC 9562 text form: lowercase, hyphenated) and
``collections.Counter`` over the generated rows; pandas ``dt.floor`` in ``Europe/Berlin``
for the hourly bins (tz database rules, DST change on 2026-03-29).
"""

from __future__ import annotations

import collections
import math
import contextlib
import datetime as dt
import random
import uuid

import duckdb
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load as _load  # noqa: E402 - one loader for tests/ helpers

fx = _load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "clickhouse"]
RNG = random.Random(20261204)
UUIDS = [str(uuid.UUID(int=RNG.getrandbits(128), version=4)) for _ in range(12)]
N = 400
T0 = dt.datetime(2026, 3, 28, 20, 0, tzinfo=dt.timezone.utc)


def _rows() -> list[dict]:
    out = []
    for i in range(N):
        u = None if i % 9 == 0 else UUIDS[min(int(RNG.expovariate(0.4)), len(UUIDS) - 1)]
        # plus 0..999 ns, which reading as microseconds floors away; row 5 sits 0.4 us
        # before an hour (a rounding CAST would move it into the next)
        t = None if i % 13 == 0 else T0 + dt.timedelta(minutes=7 * i, microseconds=i)
        if i == 5:
            t = T0 + dt.timedelta(hours=1, microseconds=-1)
        out.append({"id": i, "u": u, "t": t, "ns": 600 if i == 5 else i % 1000})
    return out


ROWS = _rows()


@contextlib.contextmanager
def _serve(sources: dict, label: str):
    """A test client of an app on ``sources`` (request log off)."""
    from app.main import create_app
    from app.settings import parse_settings

    app = create_app(parse_settings({"sources": sources, "server": {"request_log": False}},
                                    label))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def _chdb_table(root, table: str, columns: str, order: str, rows: list[str]) -> dict:
    """``sluice_test.<table>`` in the process's chdb folder (``fx.chdb_folder``), rows as
    SQL value tuples; its source config."""
    from chdb import session as chs

    folder = fx.chdb_folder(root)
    s = chs.Session(str(folder))
    s.query("CREATE DATABASE IF NOT EXISTS sluice_test")
    s.query(f"DROP TABLE IF EXISTS sluice_test.{table}")
    s.query(f"CREATE TABLE sluice_test.{table} ({columns}) ENGINE = MergeTree ORDER BY {order}")
    s.query(f"INSERT INTO sluice_test.{table} VALUES " + ", ".join(rows))
    s.close()
    return {"engine": "clickhouse", "path": str(folder), "table": f"sluice_test.{table}"}


def _mysql_table(name: str, columns: str, rows: list[tuple]) -> dict:
    """``test.<name>`` on the MariaDB server; its source config."""
    import pymysql

    my = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                         autocommit=True)
    with my.cursor() as cur:
        cur.execute(f"DROP TABLE IF EXISTS `{name}`")
        cur.execute(f"CREATE TABLE `{name}` ({columns})")
        cur.executemany(f"INSERT INTO `{name}` VALUES ({', '.join(['%s'] * len(rows[0]))})", rows)
    my.close()
    return {"engine": "mysql", "dsn": fx.MYSQL_DSN, "table": f"test.{name}"}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    import psycopg

    root = tmp_path_factory.mktemp("column_types")
    name = f"sluice_types_{fx.worker()}"
    db = root / "types.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE t (id BIGINT, u UUID, tns TIMESTAMP_NS)")
    con.executemany("INSERT INTO t VALUES (?, ?, CAST(? AS TIMESTAMP_NS))",
                    [(r["id"], r["u"], None if r["t"] is None else
                      r["t"].replace(tzinfo=None).isoformat(" ") + f"{r['ns']:03d}")
                     for r in ROWS])
    con.close()
    with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP TABLE IF EXISTS "{name}"')
        conn.execute(f'CREATE TABLE "{name}" (id bigint, u uuid)')
        with conn.cursor().copy(f'COPY "{name}" (id, u) FROM STDIN') as cp:
            for r in ROWS:
                cp.write_row([r["id"], r["u"]])
    sources = {
        "duckdb": {"engine": "duckdb", "path": str(db), "table": "t"},
        "postgres": {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{name}"},
        "mysql": _mysql_table(name, "id BIGINT, u UUID", [(r["id"], r["u"]) for r in ROWS]),
        "clickhouse": _chdb_table(root, "column_types", "id Int64, u Nullable(UUID)", "id", [
            f"({r['id']}, {'NULL' if r['u'] is None else repr(r['u'])})" for r in ROWS]),
    }
    with _serve(sources, "<column types>") as c:
        yield c


def _chart(client, source: str, **body) -> dict:
    r = client.post("/v1/chart", json={"source": source, **body})
    assert r.status_code == 200, r.text
    return r.json()


def _count(client, source: str, where: list[dict]) -> int:
    return _chart(client, source, where=where, channels={"y": {"agg": "count"}})["data"]["count"][0]


@pytest.mark.parametrize("engine", ENGINES)
def test_uuid_top_n_where_and_profile(client, engine):
    counts = collections.Counter(r["u"] for r in ROWS if r["u"] is not None)
    nulls = sum(r["u"] is None for r in ROWS)
    ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    out = _chart(client, engine, channels={"x": {"column": "u", "top": 3}, "y": {"agg": "count"}})
    got = dict(zip(out["data"]["u"], out["data"]["count"]))
    want = {k: v for k, v in ranked[:3]}
    want["(other)"] = sum(v for _, v in ranked[3:])
    want[None] = nulls
    assert got == want

    u0, part = ranked[0][0], UUIDS[1][9:13]
    assert _count(client, engine, [{"column": "u", "eq": "not a uuid"}]) == 0
    assert _count(client, engine, [{"column": "u", "in": [u0, "nope"]}]) == counts[u0]
    assert _count(client, engine, [{"column": "u", "contains": part}]) == \
        sum(v for k, v in counts.items() if part in k)
    assert _count(client, engine, [{"column": "u", "gte": "8"}]) == \
        sum(v for k, v in counts.items() if k >= "8")  # text order of the RFC 9562 form
    assert _count(client, engine, [{"column": "u", "ne": "x"}]) == N - nulls

    p = client.get(f"/v1/sources/{engine}/columns/u")
    assert p.status_code == 200, p.text
    p = p.json()
    assert (p["kind"], p["null_count"], p["distinct_count"]) == ("string", nulls, len(counts))
    assert (p["min"], p["max"]) == (min(counts), max(counts))


def test_duckdb_timestamp_ns_hourly_bins_and_wide_filters(client):
    src = client.get("/v1/sources/duckdb")
    assert src.status_code == 200, src.text
    kinds = {c["name"]: c["kind"] for c in src.json()["columns"]}
    assert kinds["tns"] == "timestamp"
    out = _chart(client, "duckdb", tz="Europe/Berlin",
                 channels={"x": {"column": "tns", "trunc": "hour"}, "y": {"agg": "count"}})
    # a naive column is read as UTC; its hours in Berlin, across the spring-forward change
    ts = pd.Series([r["t"] for r in ROWS if r["t"] is not None])
    want = ts.dt.tz_convert("Europe/Berlin").dt.floor("h").value_counts().sort_index()
    got = pd.Series(out["data"]["count"], index=pd.to_datetime(out["data"]["tns"], utc=True))
    assert got[got.index.isna()].tolist() == [sum(r["t"] is None for r in ROWS)]  # NULL key
    got = got[got.index.notna() & (got > 0)]
    assert list(got.index) == list(want.index.tz_convert("UTC"))
    assert list(got) == list(want)
    with_t = sum(r["t"] is not None for r in ROWS)
    # bounds outside TIMESTAMP_NS's 1677..2262 are legal filters
    assert _count(client, "duckdb", [{"column": "tns", "gte": "1500-01-01T00:00:00Z"},
                                     {"column": "tns", "lt": "2500-01-01T00:00:00Z"}]) == with_t
    first = min(r["t"] for r in ROWS if r["t"] is not None)
    assert _count(client, "duckdb", [{"column": "tns", "lte": first.isoformat()}]) == 1
    m = _chart(client, "duckdb", channels={"y": {"agg": "max", "column": "tns"}})
    assert pd.Timestamp(m["data"]["max_tns"][0]) == pd.Timestamp(max(
        r["t"] for r in ROWS if r["t"] is not None))


# ---- more engine types: money, MIN / MAX of booleans, distinct of kindless types, -------
# ---- integers past int64 -----------------------------------------------------------------

@pytest.fixture(scope="module")
def more(tmp_path_factory):
    """PostgreSQL money, boolean, point and jsonb; MariaDB BIGINT UNSIGNED near 2**64;
    DuckDB lists. Row i: money i * 1.25, flag i % 3 = 0 (NULL when i % 7 = 0), point
    (i % 4, 0), jsonb {"a": i % 5}, big 2**64 - 1 - i, list [i % 6]."""
    import psycopg

    name = f"sluice_types_more_{fx.worker()}"
    with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP TABLE IF EXISTS "{name}"')
        conn.execute(f'''CREATE TABLE "{name}" AS SELECT i, (i * 1.25)::money AS cash,
            CASE WHEN i % 7 = 0 THEN NULL ELSE i % 3 = 0 END AS flag,
            point(i % 4, 0) AS pt, ('{{"a": ' || i % 5 || '}}')::jsonb AS js
            FROM generate_series(1, {N}) i''')
    db = tmp_path_factory.mktemp("column_types_more") / "lists.duckdb"
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE t AS SELECT i, [i % 6] AS l FROM range(1, {N + 1}) r(i)")
    con.close()
    with _serve({
            "postgres": {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{name}",
                         "columns": {"cash2": "cash * 2"}},
            "mysql": _mysql_table(name, "i INT, big BIGINT UNSIGNED",
                                  [(i, 2**64 - 1 - i) for i in range(1, N + 1)]),
            "duckdb": {"engine": "duckdb", "path": str(db), "table": "t"}},
            "<column types, more>") as c:
        yield c


def test_postgres_money_is_a_decimal(more):
    import decimal

    cash = [decimal.Decimal(i) * decimal.Decimal("1.25") for i in range(1, N + 1)]
    out = _chart(more, "postgres", channels={"y": {"agg": "sum", "column": "cash"},
                                             "size": {"agg": "max", "column": "cash"}})
    assert decimal.Decimal(str(out["data"]["sum_cash"][0])) == sum(cash)
    assert decimal.Decimal(str(out["data"]["max_cash"][0])) == max(cash)
    out = _chart(more, "postgres", channels={"x": {"column": "cash", "bin": {"width": 100}},
                                             "y": {"agg": "count"}})
    assert sum(out["data"]["count"]) == N
    assert out["data"]["count"][0] == sum(c < 100 for c in cash)
    p = more.get("/v1/sources/postgres/columns/cash")
    assert p.status_code == 200, p.text
    # what operators write over it reads a number too: a computed column, an expr, filters
    out = _chart(more, "postgres", where=[{"column": "cash", "gte": 100}],
                 filter_sql="cash < 400",
                 channels={"x": {"column": "cash2", "bin": {"width": 200}},
                           "y": {"agg": "sum", "column": "cash2"},
                           "size": {"agg": "max", "expr": "cash + cash"}})
    kept = [2 * c for c in cash if 100 <= c < 400]
    for lo, total, top in zip(out["data"]["x_lo"], out["data"]["sum_cash2"], out["data"]["max_cash + cash"]):
        part = [v for v in kept if lo <= v < lo + 200]
        assert decimal.Decimal(str(total)) == sum(part) and decimal.Decimal(str(top)) == max(part)


def test_postgres_min_max_of_a_boolean(more):
    flags = {i: None if i % 7 == 0 else i % 3 == 0 for i in range(1, N + 1)}
    out = _chart(more, "postgres", channels={
        "x": {"column": "i", "bin": {"width": 3, "origin": 0}},
        "y": {"agg": "min", "column": "flag"}, "size": {"agg": "max", "column": "flag"}})
    for lo, mn, mx in zip(out["data"]["x_lo"], out["data"]["min_flag"], out["data"]["max_flag"]):
        vals = [f for i, f in flags.items() if lo <= i < lo + 3 and f is not None]
        assert (mn, mx) == ((min(vals), max(vals)) if vals else (None, None)), lo


@pytest.mark.parametrize("engine,column,distinct", [
    ("postgres", "pt", 4), ("postgres", "js", 5), ("duckdb", "l", 6)])
def test_count_distinct_of_a_type_without_a_kind(more, engine, column, distinct):
    out = _chart(more, engine, channels={"y": {"agg": "count_distinct", "column": column}})
    assert out["data"][f"count_distinct_{column}"] == [distinct]


def test_mysql_bigint_unsigned_past_int64_is_exact(more):
    out = _chart(more, "mysql", where=[{"column": "i", "lte": 10}],
                 channels={"x": {"column": "big"}, "y": {"agg": "count"},
                           "size": {"agg": "max", "column": "big"}})
    assert out["data"]["big"] == sorted(2**64 - 1 - i for i in range(1, 11))
    assert out["data"]["max_big"] == out["data"]["big"]


def test_clickhouse_integers_wider_than_64_bits_are_exact(tmp_path_factory):
    """Int128 / Int256 arrived as Arrow fixed-size binary: 500 (bytes are not JSON). Read as
    Decimal256(76, 0): keys, sums and extremes equal Python's integers."""
    big = 10**30
    rows = [(i % 3, None if i == 4 else (i - 5) * big, 2**200 + i) for i in range(10)]
    src = _chdb_table(tmp_path_factory.mktemp("column_types_ch"), "wide_ints",
                      "g Int8, a Nullable(Int128), b UInt256", "g",
                      [f"({g}, {'NULL' if a is None else a}, {b})" for g, a, b in rows])
    with _serve({"ch": src}, "<wide ints>") as c:
        out = _chart(c, "ch", channels={"x": {"column": "g"}, "y": {"agg": "sum", "column": "a"},
                                        "size": {"agg": "max", "column": "b"}})
        for g, total, top in zip(out["data"]["g"], out["data"]["sum_a"], out["data"]["max_b"]):
            assert int(total) == sum(a for gg, a, _ in rows if gg == g and a is not None)
            assert int(top) == max(b for gg, _, b in rows if gg == g)
        keys = _chart(c, "ch", channels={"x": {"column": "a"}, "y": {"agg": "count"}})
        assert [None if k is None else int(k) for k in keys["data"]["a"]] == \
            sorted(a for _, a, _ in rows if a is not None) + [None]
        assert c.get("/v1/sources/ch/columns/b").status_code == 200


# ---- no rows from a driver without types -------------------------------------------------

@pytest.fixture(scope="module")
def engines(tmp_path_factory):
    with _serve(fx.five_engines(tmp_path_factory.mktemp("column_types_empty")),
                "<column types, empty>") as c:
        yield c


@pytest.mark.parametrize("engine", ["sqlite", "mysql", "postgres", "clickhouse", "duckdb"])
@pytest.mark.parametrize("x,y", [
    ({"column": "ts", "trunc": "month"}, {"agg": "count"}),
    ({"column": "ts", "trunc": "day"}, {"agg": "count_distinct", "column": "k"}),
    ({"column": "cat"}, {"agg": "max", "column": "ts"}),
    ({"column": "day", "trunc": "month"}, {"agg": "min", "column": "tsn"}),
])
def test_a_chart_no_row_matches_answers_empty(engines, engine, x, y):
    """A filter no row passes (flag both true and false): SQLite's rows come without types,
    so an empty time column was Arrow's null type, and reading its unit failed (500) for
    every chart with a time key or a time measure. Reference: pandas keeps no row of the
    fixture under that filter, so the answer is empty, with 0 matched rows."""
    frame = pd.DataFrame(fx.make_rows())
    kept = int((frame["flag"].isin([True]) & frame["flag"].isin([False])).sum())
    out = _chart(engines, engine, channels={"x": x, "y": y},
                 where=[{"column": "flag", "in": [True]}, {"column": "flag", "in": [False]}])
    assert all(v == [] for v in out["data"].values()), out["data"]
    assert out["stats"]["matched_rows"] == kept == 0 and out["stats"]["result_rows"] == 0


@pytest.mark.parametrize("engine", ["sqlite", "mysql", "postgres", "clickhouse", "duckdb"])
def test_aggregates_of_no_rows_are_null(engines, engine):
    """Without keys a chart is one group even when no row matches; its aggregates of no rows
    are NULL and its counts 0 (SQL standard, ISO/IEC 9075-2 "set functions": from memory).
    ``id`` is not Nullable on ClickHouse, which answered max 0, sum 0 and avg NaN there,
    and laid a rule's bins out around 0 (an empty extents row read as min = max = 0)."""
    none = [{"column": "n", "gt": 1000}]
    out = _chart(engines, engine, where=none, channels={
        "y": {"agg": "max", "column": "id"}, "size": {"agg": "sum", "column": "id"},
        "color": {"agg": "avg", "column": "id"}, "opacity": {"agg": "median", "column": "id"},
        "shape": {"agg": "count_distinct", "column": "id"}})
    assert out["data"] == {"max_id": [None], "sum_id": [None], "avg_id": [None],
                           "median_id": [None], "count_distinct_id": [0]}
    out = _chart(engines, engine, where=none, channels={
        "x": {"expr": "coalesce(n, 0)", "bin": {"rule": "fd"}}, "y": {"agg": "count"}})
    assert out["bins"]["x"]["start"] == 0.0 and out["data"]["count"] == []


def test_sqlite_sum_past_int64_is_a_clear_422(tmp_path):
    """SQLite's sum() of integers stops with "integer overflow" past 2^63 - 1 (sqlite.org
    lang_aggfunc: "sum() will throw an integer overflow exception if all inputs are integers
    or NULL and an integer overflow occurs at any point"); it has no wider type. That was a
    502; it is the engine's limit, a 422 at the channels that says what to do. avg, count
    and sums that fit still answer (references: Python integers)."""
    import sqlite3

    path = tmp_path / "big.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE t (g TEXT, v INTEGER)")
    rows = [("a", 2**62), ("a", 2**62), ("b", 2**62), ("b", -5)]
    conn.executemany("INSERT INTO t VALUES (?, ?)", rows)
    conn.commit()
    conn.close()
    with _serve({"s": {"engine": "sqlite", "path": str(path), "table": "t"}}, "<big>") as c:
        r = c.post("/v1/chart", json={"source": "s", "channels": {
            "x": {"column": "g"}, "y": {"agg": "sum", "column": "v"}}})
        assert r.status_code == 422, r.text
        body = r.json()
        assert body["type"].endswith("/unsupported") and body["pointer"] == "/channels"
        assert "2^63 - 1" in body["detail"]
        r = c.post("/v1/chart", json={"source": "s", "channels": {
            "x": {"column": "g"}, "y": {"agg": "sum", "column": "v"}},
            "where": [{"column": "g", "eq": "b"}]})
        assert r.status_code == 200 and r.json()["data"]["sum_v"] == [2**62 - 5]
        r = c.post("/v1/chart", json={"source": "s", "channels": {
            "x": {"column": "g"}, "y": {"agg": "avg", "column": "v"}}})
        assert r.status_code == 200
        assert r.json()["data"]["avg_v"] == [float(2**62), (2**62 - 5) / 2]


def test_sqlite_cells_of_another_storage_class_are_null_everywhere(tmp_path):
    """SQLite keeps 'abc' in a NUMERIC column and 'yes' in a BOOLEAN one as text (its type
    affinity rules, sqlite.org/datatype3.html). Such a cell reads as NULL for keys, measures
    and filters: before, a NUMERIC key answered 500 (text in a decimal column), a filter
    ``num >= 5`` kept the text cells (SQLite orders text above every number) and a key
    grouped them apart. Reference: the same rows in Python with those cells as None."""
    import decimal
    import sqlite3

    path = tmp_path / "cells.sqlite"
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE t (i INTEGER, num NUMERIC, r REAL, ok BOOLEAN)")
    cells = ["abc", 1.5, 7, None, "x7", 12.25, "", 3]
    okc = [1, 0, "yes", None, 1, "no", 0, 1]
    rows = [(i, cells[i % len(cells)], cells[(i + 1) % len(cells)], okc[i % len(okc)])
            for i in range(64)]
    con.executemany("INSERT INTO t VALUES (?, ?, ?, ?)", rows)
    con.commit()
    con.close()

    def number(v):
        return None if isinstance(v, str) else v

    nums = [number(r[1]) for r in rows]
    reals = [number(r[2]) for r in rows]
    oks = [None if isinstance(r[3], str) else bool(r[3]) if r[3] is not None else None
           for r in rows]
    with _serve({"s": {"engine": "sqlite", "path": str(path), "table": "t"}}, "<cells>") as c:
        out = _chart(c, "s", channels={"x": {"column": "num"}, "y": {"agg": "count"},
                                       "size": {"agg": "sum", "column": "r"}})
        got = {None if k is None else decimal.Decimal(str(k)): (n, s)
               for k, n, s in zip(out["data"]["num"], out["data"]["count"], out["data"]["sum_r"])}
        want: dict = {}
        for v, r in zip(nums, reals):
            key = None if v is None else decimal.Decimal(str(v))
            n, s = want.get(key, (0, None))
            want[key] = (n + 1, s if r is None else (s or 0) + r)
        assert got.keys() == want.keys()
        for k in want:
            assert got[k][0] == want[k][0]
            assert (got[k][1] is None) == (want[k][1] is None)
            if want[k][1] is not None:
                assert float(got[k][1]) == pytest.approx(want[k][1])
        assert _count(c, "s", [{"column": "num", "gte": 5}]) == sum(
            v is not None and v >= 5 for v in nums)
        flags = _chart(c, "s", channels={"x": {"column": "ok"}, "y": {"agg": "count"}})
        assert dict(zip(flags["data"]["ok"], flags["data"]["count"])) == \
            dict(collections.Counter(oks))


# ---- the first and last days a time key shows, in a zone -------------------------------

_DAY_US = 86_400_000_000


def _us(ordinal: int, t: dt.timedelta = dt.timedelta(0)) -> int:
    """Microseconds since 0001-01-01T00:00 of proleptic Gregorian day ``ordinal`` (1 =
    0001-01-01; 3,652,060 = 10000-01-01, past what Python's date holds) plus ``t``."""
    return (ordinal - 1) * _DAY_US + t // dt.timedelta(microseconds=1)


def _bin_start(v: dt.datetime, zone, unit: str) -> int | None:
    """The UTC start (microseconds since year 1) of ``trunc(unit)`` of the UTC instant ``v``
    in ``zone``, None before year 1. The zone's offset from Python's zoneinfo (tz database):
    near year 1 its LMT offset, and no transition near the values used here."""
    def off(local: dt.datetime) -> int:
        return zone.utcoffset(local) // dt.timedelta(microseconds=1)

    o = off(v)
    local = _us(v.toordinal(), v - v.replace(hour=0, minute=0, second=0, microsecond=0)) + o
    day = local // _DAY_US + 1  # the local day's ordinal
    if unit == "hour":
        start = local - local % 3_600_000_000
    elif day < 1:  # a local wall time in year 0: its month or year starts before year 1
        return None
    elif unit == "day" or day > dt.date.max.toordinal():  # (10000-01-01 starts all three)
        start = _us(day)
    else:
        d = dt.date.fromordinal(day)
        d = d.replace(day=1) if unit == "month" else d.replace(month=1, day=1)
        start = _us(d.toordinal())
    s_day = start // _DAY_US + 1
    at = dt.datetime.fromordinal(min(max(s_day, 2), dt.date.max.toordinal()))
    start -= off(at) if unit != "hour" else o
    return None if start < 0 else start


def _text_us(text: str) -> int:
    """An answer's RFC 3339 instant (a five-digit local year allowed) in microseconds since
    0001-01-01T00:00Z."""
    date, _, rest = text.partition("T")
    y, m, d = (int(p) for p in date.split("-"))
    ordinal = dt.date.max.toordinal() + 1 if y == 10000 else dt.date(y, m, d).toordinal()
    h, mi, sec = (int(p) for p in rest[:8].split(":"))
    shift = 0
    if not rest.endswith("Z"):
        sign = 1 if rest[8] == "+" else -1
        oh, om = (int(p) for p in rest[9:].split(":"))
        shift = sign * (oh * 3600 + om * 60) * 1_000_000
    return _us(ordinal, dt.timedelta(hours=h, minutes=mi, seconds=sec)) - shift


@pytest.mark.parametrize("engine", ["duckdb", "postgres"])
@pytest.mark.parametrize("x", [
    {"column": "d", "trunc": "month", "tz": "Europe/Berlin"},
    {"column": "t", "trunc": "day", "tz": "Asia/Tokyo"},
    {"column": "t", "trunc": "year", "tz": "America/New_York"},
    {"column": "t", "trunc": "hour", "tz": "Pacific/Kiritimati"},
])
def test_sentinel_dates_in_a_zone(tmp_path, engine, x):
    """0001-01-01 and 9999-12-31 are common sentinels ("unknown", the open end of a slowly
    changing dimension). In a zone, the local bin of a year-1 value can start before
    0001-01-01T00:00Z (Berlin's local midnight then is 23:07 UTC the day before: its LMT
    offset): that bin is NULL, like every instant outside years 1..9999. Before, DuckDB
    answered 500 (Python cannot hold the instant) and PostgreSQL 502 (nor can its driver),
    and so did the domain of an in-range bin whose local year is 10000 (9999-12-31T15:00Z in
    Tokyo). Reference: each bin start from Python's zoneinfo offsets (``_bin_start``)."""
    import zoneinfo

    import psycopg

    days = [dt.date(1, 1, 1), dt.date(1, 3, 1), dt.date(2020, 5, 5), dt.date(9999, 12, 31)]
    times = [dt.datetime(1, 1, 1, 0, 10), dt.datetime(1, 3, 1, 12), dt.datetime(2020, 5, 5),
             dt.datetime(9999, 12, 31, 23, 59)]
    if engine == "duckdb":
        db = tmp_path / "edges.duckdb"
        con = duckdb.connect(str(db))
        con.execute("CREATE TABLE e (d DATE, t TIMESTAMP)")
        con.executemany("INSERT INTO e VALUES (?, ?)", list(zip(days, times)))
        con.close()
        src = {"engine": "duckdb", "path": str(db), "table": "e"}
    else:
        name = f"sluice_edges_{fx.worker()}"
        with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
            conn.execute(f'DROP TABLE IF EXISTS "{name}"')
            conn.execute(f'CREATE TABLE "{name}" (d date, t timestamp)')
            for a, b in zip(days, times):
                conn.execute(f'INSERT INTO "{name}" VALUES (%s, %s)', (a, b))
        src = {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{name}"}
    zone = zoneinfo.ZoneInfo(x["tz"])
    values = [dt.datetime(v.year, v.month, v.day) for v in days] if x["column"] == "d" else times
    want = collections.Counter(_bin_start(v, zone, x["trunc"]) for v in values)
    body = {"source": "e", "channels": {"x": x, "y": {"agg": "count"}}}
    with _serve({"e": src}, "<edges>") as c:
        arrow = c.post("/v1/chart", json=body,
                       headers={"accept": "application/vnd.apache.arrow.stream"})
        assert arrow.status_code == 200, arrow.text
        r = c.post("/v1/chart", json=body)
        assert r.status_code == 200, r.text
    out = r.json()
    got = collections.Counter()
    for key, n in zip(out["data"][x["column"]], out["data"]["count"]):
        got[None if key is None else _text_us(key)] += n
    assert got == want
    assert [_text_us(t) for t in out["domains"][x["column"]]] == \
        [min(k for k in want if k is not None), max(k for k in want if k is not None)]


@pytest.mark.parametrize("x", [
    {"column": "d", "trunc": "month", "tz": "Europe/Berlin"},
    {"column": "t", "trunc": "day", "tz": "Asia/Tokyo"},
    {"column": "t", "trunc": "year", "tz": "America/New_York"},
    {"column": "t", "trunc": "month"},
])
def test_clickhouse_calendar_bins_outside_1970_to_2149(tmp_path_factory, x):
    """ClickHouse's toStartOfMonth and friends clamped a Date32 / DateTime64 to Date's range
    (1970..2149): 1900-01-01 came back as 1970-01-01 and 2299-12-31 as 2149-06-05, silently.
    Every statement now sets enable_extended_results_for_datetime_functions. Reference: bin
    starts from Python's zoneinfo offsets (``_bin_start``), over the whole DateTime64 range."""
    import zoneinfo

    days = [dt.date(1900, 1, 1), dt.date(1955, 6, 15), dt.date(2020, 5, 5), dt.date(2299, 12, 31)]
    times = [dt.datetime(1900, 1, 1, 0, 10), dt.datetime(1955, 6, 15, 12), dt.datetime(2020, 5, 5),
             dt.datetime(2299, 12, 31, 23, 59)]
    src = _chdb_table(tmp_path_factory.mktemp("column_types_ch_dates"), "far_dates",
                      "d Date32, t DateTime64(6, 'UTC')", "d",
                      [f"('{a.isoformat()}', '{b.isoformat(' ')}')" for a, b in zip(days, times)])
    zone = zoneinfo.ZoneInfo(x.get("tz", "UTC"))
    values = [dt.datetime(v.year, v.month, v.day) for v in days] if x["column"] == "d" else times
    want = collections.Counter(_bin_start(v, zone, x["trunc"]) for v in values)
    with _serve({"ch": src}, "<far dates>") as c:
        out = _chart(c, "ch", channels={"x": x, "y": {"agg": "count"}})
    got = collections.Counter()
    for key, n in zip(out["data"][x["column"]], out["data"]["count"]):
        got[None if key is None else _text_us(key)] += n
    assert got == want


@pytest.mark.parametrize("x", [
    {"column": "t", "trunc": "day", "tz": "Europe/Berlin"},
    {"column": "t", "trunc": "hour", "tz": "Asia/Kolkata"},
    {"column": "t", "trunc": "month", "tz": "America/New_York"},
    {"column": "d", "trunc": "year", "tz": "Australia/Sydney"},
    {"column": "t", "extract": "hour", "tz": "Europe/Dublin"},
])
def test_mysql_zoned_bins_outside_1970_to_2038(x):
    """MariaDB's CONVERT_TZ converts only instants of the TIMESTAMP range (1970-01-01 ..
    2038-01-19 UTC) and returns others unchanged: a 1945 summer day in Berlin (UTC+3 then)
    was binned as UTC's. Outside that range the zone's offsets are in the statement now.
    Reference: bin starts and local hours from Python's zoneinfo (the tz database), for
    summer and winter values of years 1000..9999, none near a transition."""
    import zoneinfo

    fx.ensure_mysql_time_zones()
    years = [1000, 1583, 1900, 1916, 1945, 1955, 1969, 2020, 2040, 2100, 2299, 5000, 9999]
    times = [dt.datetime(y, m, 15, h, 20) for y in years for m, h in ((1, 2), (7, 21))]
    src = _mysql_table(f"sluice_far_zones_{fx.worker()}", "d DATE, t DATETIME(6)",
                       [(v.date(), v) for v in times])
    zone = zoneinfo.ZoneInfo(x["tz"])
    if "extract" in x:
        local = [v.replace(tzinfo=dt.timezone.utc).astimezone(zone) for v in times]
        want = collections.Counter(t.hour for t in local)
    else:
        values = [dt.datetime(v.year, v.month, v.day) for v in times] if x["column"] == "d" \
            else times
        want = collections.Counter(_bin_start(v, zone, x["trunc"]) for v in values)
    with _serve({"my": src}, "<far zones>") as c:
        out = _chart(c, "my", channels={"x": x, "y": {"agg": "count"}})
    name = f"{x['column']}_{x['extract']}" if "extract" in x else x["column"]
    got = collections.Counter()
    for key, n in zip(out["data"][name], out["data"]["count"]):
        got[key if "extract" in x else _text_us(key)] += n
    assert got == want


def test_mysql_zone_conversions_equal_zoneinfo_in_every_zone():
    """``to_local`` / ``from_local`` of the MySQL dialect in every zone Python knows, at
    instants one hour and one second either side of the zone's transitions in seven years
    before 1970 or after 2038 (years drawn at random, fixed seed), and at the ends of
    DATETIME's range. Reference: Python's zoneinfo (the tz database): local times of a UTC
    instant, and the UTC instant of a local time with ``fold=0`` (the earlier reading in an
    overlap; in a gap, the offset before it), the rule documented beside the SQL."""
    import zoneinfo

    import pymysql
    from sqlglot import exp

    from planner.dialects import get_dialect

    fx.ensure_mysql_time_zones()
    d, utc, rng = get_dialect("mysql"), dt.timezone.utc, random.Random(20261205)

    def offset(zone, t):
        return t.replace(tzinfo=utc).astimezone(zone).utcoffset()

    def transitions(zone, year):  # by bisection of the offset between fortnights
        pts = [dt.datetime(year, 1, 1) + dt.timedelta(days=15 * k) for k in range(25)]
        for a, b in zip(pts, pts[1:]):
            if offset(zone, a) != offset(zone, b):
                while b - a > dt.timedelta(seconds=1):
                    m = a + (b - a) / 2
                    a, b = (m, b) if offset(zone, m) == offset(zone, a) else (a, m)
                yield b.replace(microsecond=0)

    my = pymysql.connect(host="127.0.0.1", user="root", password="", database="test")
    checked, wrong = 0, []
    with my.cursor() as cur:
        for name in sorted(zoneinfo.available_timezones()):
            zone = zoneinfo.ZoneInfo(name)
            years = [rng.randint(1850, 1969) for _ in range(3)] + \
                [rng.randint(2039, 9998) for _ in range(3)] + [1969]
            values = [dt.datetime(1000, 1, 1), dt.datetime(9999, 12, 30, 12)]
            for t in (t for y in years for t in transitions(zone, y)):
                wall = t.replace(tzinfo=utc).astimezone(zone).replace(tzinfo=None)
                for s in (-3601, -1, 0, 1, 3599):
                    values += [t + dt.timedelta(seconds=s), wall + dt.timedelta(seconds=s)]
            values = [v + dt.timedelta(microseconds=rng.randint(0, 999_999)) for v in values]
            rows = " UNION ALL ".join(
                f"SELECT {i} AS i, CAST('{v.isoformat(' ')}' AS DATETIME(6)) AS v"
                for i, v in enumerate(values))
            v = exp.column("v")
            cur.execute(f"SELECT i, {d.to_local(v, 'timestamp', name).sql('mysql')}, "
                        f"{d.from_local(v.copy(), name).sql('mysql')} FROM ({rows}) r ORDER BY i")
            for i, local, instant in cur.fetchall():
                u = values[i]
                want_local = u.replace(tzinfo=utc).astimezone(zone).replace(tzinfo=None)
                want_instant = u.replace(tzinfo=zone).astimezone(utc).replace(tzinfo=None)
                checked += 1
                if local != want_local:
                    wrong.append((name, "to_local", u, local, want_local))
                # (inside 1970..2038 CONVERT_TZ reads a local time in a gap its own way)
                if instant != want_instant and not dt.datetime(1970, 1, 2) <= u <= \
                        dt.datetime(2038, 1, 18):
                    wrong.append((name, "from_local", u, instant, want_instant))
    my.close()
    assert checked > 15_000
    assert wrong == []


@pytest.mark.parametrize("fact_type,dim_type", [
    ("money", "money"), ("money", "numeric"), ("numeric", "money")])
def test_postgres_money_dimension_keys(fact_type, dim_type):
    """A join to a dimension table compares the fact key as every statement reads it (money
    as numeric, ``Dialect.stored``) with the dimension's key read the same way: before,
    ``numeric = money`` has no operator (502). Reference: the labels of the generated rows
    joined in Python (``collections.Counter``)."""
    import psycopg

    fact, dim = f"sluice_money_fact_{fx.worker()}", f"sluice_money_dim_{fx.worker()}"
    prices = [1, 2.5, 2.5, 7, 7, 7, 9.99, None]
    labels = {1: "low", 2.5: "low", 7: "mid", 9.99: "high"}
    with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
        for name, cols in ((fact, f"id int, price {fact_type}"),
                           (dim, f"price {dim_type}, label text")):
            conn.execute(f'DROP TABLE IF EXISTS "{name}"')
            conn.execute(f'CREATE TABLE "{name}" ({cols})')
        for i, p in enumerate(prices):
            conn.execute(f'INSERT INTO "{fact}" VALUES (%s, %s::numeric::{fact_type})', (i, p))
        for p, label in labels.items():
            conn.execute(f'INSERT INTO "{dim}" VALUES (%s::numeric::{dim_type}, %s)', (p, label))
    src = {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{fact}", "dimensions": [
        {"table": f"public.{dim}", "fact_column": "price", "key": "price",
         "columns": ["label"], "name": "band"}]}
    with _serve({"pg": src}, "<money keys>") as c:
        out = _chart(c, "pg", channels={"x": {"column": "band.label"}, "y": {"agg": "count"}})
    got = dict(zip(out["data"]["band.label"], out["data"]["count"]))
    assert got == collections.Counter(labels.get(p) for p in prices)


def test_duckdb_timestamp_ns_dimension_keys(tmp_path):
    """A TIMESTAMP_NS fact key is read in microseconds, floored; the dimension's TIMESTAMP_NS
    key is now read the same way, so keys with nanoseconds still match (before: no row
    matched, every label NULL). Reference: the labels joined in Python."""
    db = tmp_path / "ns_keys.duckdb"
    stamps = ["2026-03-01 10:00:00.000001234", "2026-03-01 10:00:00.000005678",
              "2026-03-02 00:00:00"]
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE f (id INT, t TIMESTAMP_NS)")
    con.execute("CREATE TABLE d (t TIMESTAMP_NS, label VARCHAR)")
    con.executemany("INSERT INTO f VALUES (?, CAST(? AS TIMESTAMP_NS))",
                    [(i, stamps[i % 3]) for i in range(9)])
    con.executemany("INSERT INTO d VALUES (CAST(? AS TIMESTAMP_NS), ?)",
                    [(s, f"shift {i}") for i, s in enumerate(stamps)])
    con.close()
    src = {"engine": "duckdb", "path": str(db), "table": "f", "dimensions": [
        {"table": "d", "fact_column": "t", "key": "t", "columns": ["label"], "name": "shift"}]}
    with _serve({"ns": src}, "<ns keys>") as c:
        out = _chart(c, "ns", channels={"x": {"column": "shift.label"}, "y": {"agg": "count"}})
    assert dict(zip(out["data"]["shift.label"], out["data"]["count"])) == \
        collections.Counter(f"shift {i % 3}" for i in range(9))


def test_duckdb_uhugeint_is_read_as_a_double(tmp_path):
    """DuckDB compares a UHUGEINT with a number by casting it to the number's type, which
    failed (502) for any value past it, and hands values above 2^127 to Arrow as signed:
    the max of 2^128 - 1 came back as -1. Read as DOUBLE, exact to 2^53. Reference: Python's
    integers of the generated rows, as floats (IEEE 754 nearest)."""
    db = tmp_path / "uhuge.duckdb"
    values = [0, 5, 2 ** 53, 2 ** 127 + 12345, 2 ** 128 - 1, None]
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE u (id INT, big UHUGEINT)")
    con.executemany("INSERT INTO u VALUES (?, CAST(? AS UHUGEINT))",
                    [(i, None if v is None else str(v)) for i, v in enumerate(values)])
    con.close()
    present = [float(v) for v in values if v is not None]
    with _serve({"u": {"engine": "duckdb", "path": str(db), "table": "u"}}, "<uhugeint>") as c:
        assert _count(c, "u", [{"column": "big", "gte": 5}]) == sum(v >= 5 for v in present)
        assert _count(c, "u", [{"column": "big", "in": list(range(20))}]) == \
            sum(v in range(20) for v in values if v is not None)
        out = _chart(c, "u", channels={"y": {"agg": "max", "column": "big"}})
        assert out["data"]["max_big"] == [max(present)]
        out = _chart(c, "u", channels={"x": {"column": "big"}, "y": {"agg": "count"}},
                     sort=[{"channel": "x"}])
        assert out["data"]["big"][:-1] == sorted(present)


def test_postgres_numeric_nan_and_infinity():
    """PostgreSQL's numeric holds 'NaN' and (since 14) '+-Infinity'. Any answer holding one
    gave 500 (pyarrow raises TypeError for Decimal('Infinity')), and bins took the layout
    from them: [0, 1) held 2.0. They are now what a double's are: the NULL bin, and the
    measure is a double (inf in Arrow, null in JSON). Reference: pandas.cut of the finite
    values over the answer's edges, and Python's float arithmetic for the sum."""
    import psycopg
    import pyarrow as pa

    name = f"sluice_numeric_nan_{fx.worker()}"
    values = ["1.25", "2", "NaN", "Infinity", "-Infinity", None, "7.5", "3"]
    with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP TABLE IF EXISTS "{name}"')
        conn.execute(f'CREATE TABLE "{name}" (id int, n numeric)')
        for i, v in enumerate(values):
            conn.execute(f'INSERT INTO "{name}" VALUES (%s, %s::numeric)', (i, v))
    finite = [float(v) for v in values if v not in (None, "NaN", "Infinity", "-Infinity")]
    src = {"engine": "postgres", "dsn": fx.PG_DSN, "table": f"public.{name}"}
    with _serve({"pg": src}, "<numeric nan>") as c:
        out = _chart(c, "pg", channels={"x": {"column": "n", "bin": {"bins": 4}},
                                         "y": {"agg": "count"}})
        d = out["data"]
        edges = sorted({e for e in d["x_lo"] + d["x_hi"] if e is not None})
        want = pd.cut(pd.Series(finite), edges, right=False).value_counts()
        got = {lo: n for lo, n in zip(d["x_lo"], d["count"]) if lo is not None}
        assert got == {iv.left: n for iv, n in want.items() if n}
        assert dict(zip(d["x_lo"], d["count"]))[None] == len(values) - len(finite)
        body = {"source": "pg", "channels": {"y": {"agg": "sum", "column": "n"}},
                "where": [{"column": "id", "lte": 3}]}
        assert c.post("/v1/chart", json=body).json()["data"]["sum_n"] == [None]  # NaN
        r = c.post("/v1/chart", json=body, headers={"accept": "application/vnd.apache.arrow.stream"})
        assert r.status_code == 200, r.text
        assert math.isnan(pa.ipc.open_stream(r.content).read_all()["sum_n"][0].as_py())
        out = _chart(c, "pg", channels={"y": {"agg": "sum", "column": "n"}},
                     where=[{"column": "id", "in": [0, 1, 3]}])
        assert out["data"]["sum_n"] == [None]  # 1.25 + 2 + inf: infinite, null in JSON
        out = _chart(c, "pg", channels={"y": {"agg": "sum", "column": "n"}},
                     where=[{"column": "id", "in": [0, 1, 6]}])
        assert out["data"]["sum_n"] == [sum([1.25, 2.0, 7.5])]


def test_mysql_zero_dates_read_as_null():
    """MariaDB's default sql_mode accepts the zero date ``0000-00-00 00:00:00`` (and a zero
    month or day), which pymysql hands over as text: a chart whose answer held one gave 500
    (pyarrow cannot mix text into timestamps). Such a cell is NULL in the answer now, like
    a text timestamp outside the storage form. Reference: Python's datetime of the valid
    rows (MariaDB documents the zero date as a dummy value, "Date and Time Data Types")."""
    import pymysql

    name = f"sluice_zero_dates_{fx.worker()}"
    my = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                         autocommit=True)
    with my.cursor() as cur:
        cur.execute("SET SESSION sql_mode = ''")
        cur.execute(f"DROP TABLE IF EXISTS `{name}`")
        cur.execute(f"CREATE TABLE `{name}` (id INT, t DATETIME)")
        cur.execute(f"INSERT INTO `{name}` VALUES (1, '0000-00-00 00:00:00'), "
                    "(2, '2020-02-03 04:05:06'), (3, NULL), (4, '2020-02-28 23:00:00')")
    my.close()
    src = {"engine": "mysql", "dsn": fx.MYSQL_DSN, "table": f"test.{name}"}
    with _serve({"my": src}, "<zero dates>") as c:
        for x in ({"column": "t"}, {"column": "t", "trunc": "month"}):
            for accept in ("application/json", "application/vnd.apache.arrow.stream"):
                r = c.post("/v1/chart", headers={"accept": accept}, json={
                    "source": "my", "channels": {"x": x, "y": {"agg": "count"}}})
                assert r.status_code == 200, r.text
        out = _chart(c, "my", channels={"x": {"column": "t"}, "y": {"agg": "count"}},
                     where=[{"column": "id", "lte": 2}])
    assert sorted(out["data"]["t"], key=str) == ["2020-02-03T04:05:06Z", None]


def test_clickhouse_sums_of_64_bit_integers_do_not_wrap(tmp_path_factory):
    """ClickHouse's sum() of Int64 / UInt64 wraps silently past 2^63 / 2^64: two rows of
    2^63 - 1 summed to -2. Sums of integers are exact now, and so is the "(other)" group a
    top-N folds from them. Reference: Python's integer arithmetic over the generated rows."""
    big, ubig = 2 ** 63 - 1, 2 ** 64 - 1
    rows = [(1, "x", big, ubig, 127), (2, "x", big, ubig, 127), (3, "y", -5, 3, -128),
            (4, "z", big, 7, 1), (5, "w", 1, 1, 1)]
    src = _chdb_table(tmp_path_factory.mktemp("column_types_ch_sums"), "sums",
                      "id Int32, g String, a Int64, u UInt64, i8 Int8", "id",
                      [f"({i}, '{g}', {a}, {u}, {s})" for i, g, a, u, s in rows])
    # a named measure's aggregates read their inputs the same way (planner/emit_measures.py)
    src = {**src, "measures": {"net": "sum(a) - sum(i8)", "shifted": "sum(a + 0)"}}
    with _serve({"ch": src}, "<ch sums>") as c:
        named = _chart(c, "ch", channels={"x": {"column": "g"}, "y": {"measure": "net"}},
                       where=[{"column": "g", "eq": "x"}])
        assert named["data"]["net"] == [float(2 * big - 254)]  # a formula answers a double
        shifted = _chart(c, "ch", channels={"y": {"measure": "shifted"}},
                         where=[{"column": "g", "eq": "x"}])
        assert shifted["data"]["shifted"] == [2 * big]
        out = _chart(c, "ch", channels={"x": {"column": "g"}, "y": {"agg": "sum", "column": "a"},
                                         "color": {"agg": "sum", "column": "u"},
                                         "size": {"agg": "sum", "column": "i8"}})
        top = _chart(c, "ch", channels={"x": {"column": "g", "top": 1},
                                         "y": {"agg": "sum", "column": "a"}},
                     sort=[{"channel": "y", "desc": True}])
    for col, j in (("sum_a", 2), ("sum_u", 3), ("sum_i8", 4)):
        want = collections.Counter()
        for r in rows:
            want[r[1]] += r[j]
        assert dict(zip(out["data"]["g"], out["data"][col])) == dict(want)
    assert dict(zip(top["data"]["g"], top["data"]["sum_a"])) == \
        {"x": 2 * big, "(other)": big - 5 + 1}


def test_spark_sums_of_64_bit_integers_are_exact(tmp_path):
    """Spark's sum() of a BIGINT is a BIGINT: past 2^63 it failed (ANSI mode, the default
    since Spark 4: ARITHMETIC_OVERFLOW, a 502) or wrapped (ANSI off). Integers are summed as
    DECIMAL(38, 0) now. Reference: Python's integer arithmetic."""
    pytest.importorskip("pyspark")
    import pyarrow as pa

    big = 2 ** 63 - 1
    rows = [("x", big, 100), ("x", big, 100), ("y", -5, 1)]
    table = pa.table({"g": [r[0] for r in rows], "a": pa.array([r[1] for r in rows], pa.int64()),
                      "s": pa.array([r[2] for r in rows], pa.int8())})
    with _serve({"sp": fx.load_spark(tmp_path, table)}, "<spark sums>") as c:
        out = _chart(c, "sp", channels={"x": {"column": "g"}, "y": {"agg": "sum", "column": "a"},
                                         "color": {"agg": "sum", "column": "s"}})
    for col, j in (("sum_a", 1), ("sum_s", 2)):
        want = collections.Counter()
        for r in rows:
            want[r[0]] += r[j]
        assert dict(zip(out["data"]["g"], out["data"][col])) == dict(want)
