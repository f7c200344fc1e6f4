"""Legal data values that have no place in a bin (issue 10.8): DOUBLE inf / -inf / NaN and
timestamps outside years 1..9999 ('infinity', '-infinity', year 12000).

Convention (README "Bins"): such a value is treated like NULL by every key -- it lands in the
NULL bin (bin keys null), never widens a layout read from the data, and is never counted as
outside explicit limits. Outside references: numpy.histogram_bin_edges / numpy.histogram on
the finite values (numpy refuses a non-finite range) and pandas.cut, which maps inf and NaN
to NaN (the NULL bin). Engines: DuckDB, PostgreSQL, SQLite (inf as REAL 9e999; SQLite stores
NaN as NULL), MariaDB (no inf or NaN: finite values and NULL only), ClickHouse through chdb
(in a subprocess: chdb allows one data folder per process).
"""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from planner.model import ChartRequest

UTC = dt.timezone.utc
FINITE = [round((i * 7.31) % 53.0 - 3.0, 3) for i in range(240)]
WORKER = os.environ.get("PYTEST_XDIST_WORKER", "main")
PG_DSN = "postgresql://postgres@127.0.0.1:5432/test"
MYSQL_DSN = "mysql://root@127.0.0.1:3306/test"
TIMES = [dt.datetime(2026, 1, 1, tzinfo=UTC) + dt.timedelta(hours=37 * i) for i in range(120)]


def values(engine: str) -> list:
    extra = {"mysql": [None, None], "sqlite": [math.inf, -math.inf, None, None]}.get(
        engine, [math.inf, -math.inf, math.nan, None])
    return FINITE + extra


def _load_duckdb(root: Path) -> dict:
    path = root / "legal.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE t (v DOUBLE, ts TIMESTAMPTZ)")
    con.executemany("INSERT INTO t VALUES (?, ?)", [(v, None) for v in values("duckdb")])
    con.executemany("INSERT INTO t VALUES (NULL, ?)", [(t,) for t in TIMES])
    con.execute("INSERT INTO t VALUES (NULL, 'infinity'), (NULL, '-infinity'), "
                "(NULL, '12000-01-01 00:00:00+00'), (NULL, NULL)")
    con.close()
    return {"engine": "duckdb", "path": str(path), "table": "t"}


def _load_postgres() -> dict:
    import psycopg

    schema = f"sluice_legal_{WORKER}"
    with psycopg.connect(PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        conn.execute(f'CREATE SCHEMA "{schema}"')
        conn.execute(f'CREATE TABLE "{schema}".t (v double precision, ts timestamptz)')
        with conn.cursor() as cur:
            cur.executemany(f'INSERT INTO "{schema}".t VALUES (%s, NULL)', [(v,) for v in values("postgres")])
            cur.executemany(f'INSERT INTO "{schema}".t VALUES (NULL, %s)', [(t,) for t in TIMES])
        conn.execute(f"""INSERT INTO "{schema}".t VALUES (NULL, 'infinity'), (NULL, '-infinity'),
                         (NULL, '12000-01-01 00:00:00+00'), (NULL, NULL)""")
    return {"engine": "postgres", "dsn": PG_DSN, "table": f"{schema}.t"}


def _load_sqlite(root: Path) -> dict:
    path = root / "legal.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE t (v REAL, ts TIMESTAMP)")
    conn.executemany("INSERT INTO t VALUES (?, NULL)", [(v,) for v in values("sqlite")])
    conn.executemany("INSERT INTO t VALUES (NULL, ?)",
                     [(t.strftime("%Y-%m-%d %H:%M:%S.000"),) for t in TIMES] + [(None,)])
    conn.commit()
    conn.close()
    return {"engine": "sqlite", "path": str(path), "table": "t"}


def _load_mysql() -> dict:
    import pymysql

    name = f"sluice_legal_{WORKER}"
    conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="test", autocommit=True)
    with conn.cursor() as cur:
        cur.execute(f"DROP TABLE IF EXISTS `{name}`")
        cur.execute(f"CREATE TABLE `{name}` (v DOUBLE, ts DATETIME(3))")
        cur.executemany(f"INSERT INTO `{name}` VALUES (%s, NULL)", [(v,) for v in values("mysql")])
        cur.executemany(f"INSERT INTO `{name}` VALUES (NULL, %s)",
                        [(t.replace(tzinfo=None),) for t in TIMES] + [(None,)])
    conn.close()
    return {"engine": "mysql", "dsn": MYSQL_DSN, "table": f"test.{name}"}


@pytest.fixture(scope="module")
def service(tmp_path_factory):
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("legal")
    sources = {"duckdb": _load_duckdb(root), "postgres": _load_postgres(),
               "sqlite": _load_sqlite(root), "mysql": _load_mysql()}
    catalog = Catalog(parse_settings({"sources": sources}, "<legal data>"))
    yield ChartService(catalog)
    catalog.close()


def run(service, engine: str, body: dict) -> dict:
    out = service.to_json(service.run(ChartRequest.model_validate({"source": engine, **body})))
    names = [c["name"] for c in out["columns"]]
    n = len(out["data"][names[0]])
    out["rows"] = [{k: out["data"][k][i] for k in names} for i in range(n)]
    return out


def column_v(engine: str) -> list:
    """The whole v column: the values, then NULL on every time row."""
    time_rows = len(TIMES) + (4 if engine in ("duckdb", "postgres") else 1)
    return values(engine) + [None] * time_rows


def check_rule(out: dict, engine: str) -> None:
    finite = np.array(FINITE)
    edges = np.histogram_bin_edges(finite, bins="sturges")  # reference: numpy on the finite values
    counts, _ = np.histogram(finite, bins=edges)  # reference: numpy.histogram
    b = out["bins"]["x"]
    assert b["count"] == len(edges) - 1 and math.isclose(b["start"], edges[0]) \
        and math.isclose(b["stop"], edges[-1]), (engine, b)
    got = [r["count"] for r in out["rows"] if r["x_lo"] is not None]
    assert got == [int(c) for c in counts if c], engine
    nulls = [r["count"] for r in out["rows"] if r["x_lo"] is None]
    cut = pd.cut(pd.Series(column_v(engine), dtype=float), edges, include_lowest=True)
    assert nulls == [int(cut.isna().sum())], engine  # reference: pandas.cut (inf / NaN -> NaN)


def check_limits(out: dict, engine: str) -> None:
    finite = np.array(FINITE)
    assert out["stats"]["outside_limits"]["x"] == int(((finite < 0) | (finite > 40)).sum())  # reference: numpy mask
    inside = [r for r in out["rows"] if r["x_lo"] is not None]
    assert len(inside) == 8 and all(0 <= r["x_lo"] and r["x_hi"] <= 40 for r in inside)
    assert sum(r["count"] for r in inside) == int(((finite >= 0) & (finite <= 40)).sum())  # reference: numpy mask


def check_times(out: dict, engine: str) -> None:
    in_range = [r for r in out["rows"] if r["ts_lo"] is not None]
    assert sum(r["count"] for r in in_range) == len(TIMES)  # every instant of years 1..9999 is binned
    b = out["bins"]["x"]
    assert dt.datetime.fromisoformat(b["start"]) <= TIMES[0] < TIMES[-1] <= dt.datetime.fromisoformat(b["stop"])
    nulls = [r["count"] for r in out["rows"] if r["ts_lo"] is None]
    assert nulls == [len(values(engine)) + (4 if engine in ("duckdb", "postgres") else 1)]


BODIES = {
    "rule": ({"channels": {"x": {"column": "v", "bin": {"rule": "sturges"}}, "y": {"agg": "count"}}}, check_rule),
    "limits": ({"channels": {"x": {"column": "v", "bin": {"bins": 8, "limits": [0, 40]}}, "y": {"agg": "count"}},
                "empty_bins": "zero"}, check_limits),
    "times": ({"channels": {"x": {"column": "ts", "bin": {"bins": 12}, "name": "ts"},
                            "y": {"agg": "count"}}}, check_times),
}


@pytest.mark.parametrize("engine", ["duckdb", "postgres", "sqlite", "mysql"])
def test_min_max_of_timestamps_skip_instants_outside_years_1_to_9999(service, engine):
    """min/max of a timestamp column see the instants a time key shows: 'infinity',
    '-infinity' and year 12000 are skipped like NULL (they were a 500: no RFC 3339 text), in
    JSON and in every export. Reference: Python's min/max over the in-range instants."""
    body = {"channels": {"y": {"agg": "min", "column": "ts"}, "size": {"agg": "max", "column": "ts"},
                         "x": {"agg": "count", "column": "ts"}}}
    out = run(service, engine, body)
    lo, hi = out["data"]["min_ts"][0], out["data"]["max_ts"][0]
    assert dt.datetime.fromisoformat(lo) == min(TIMES) and dt.datetime.fromisoformat(hi) == max(TIMES)
    # count still counts every non-NULL cell (a value, even if it has no place on an axis)
    extra = 3 if engine in ("duckdb", "postgres") else 0
    assert out["data"]["count_ts"][0] == len(TIMES) + extra


@pytest.mark.parametrize("case", list(BODIES))
@pytest.mark.parametrize("engine", ["duckdb", "postgres", "sqlite", "mysql"])
def test_non_finite_values_go_to_the_null_bin(service, engine, case):
    body, check = BODIES[case]
    check(run(service, engine, body), engine)


CLICKHOUSE = textwrap.dedent('''
    import json, math, sys
    from chdb import session as chs
    folder, values = sys.argv[1], json.loads(sys.argv[2])
    s = chs.Session(folder)
    s.query("CREATE DATABASE IF NOT EXISTS legal")
    s.query("CREATE TABLE legal.t (v Nullable(Float64)) ENGINE = MergeTree ORDER BY tuple()")
    rows = ", ".join("(NULL)" if v is None else f"({v!r})" if isinstance(v, float) else f"({v})"
                     for v in values)
    s.query("INSERT INTO legal.t VALUES " + rows.replace("inf", "inf").replace("nan", "nan"))
    s.close()
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings
    from planner.model import ChartRequest
    cat = Catalog(parse_settings({"sources": {"ch": {"engine": "clickhouse", "path": folder,
                                                      "table": "legal.t"}}}, "<ch>"))
    svc = ChartService(cat)
    out = {}
    for name, body in json.loads(sys.argv[3]).items():
        out[name] = svc.to_json(svc.run(ChartRequest.model_validate({"source": "ch", **body})))
    print(json.dumps(out))
''')


def test_clickhouse_non_finite_values_go_to_the_null_bin(tmp_path):
    vals = [v if v is None or math.isfinite(v) else ("inf" if v > 0 else "-inf") if not math.isnan(v)
            else "nan" for v in values("clickhouse")]
    bodies = {k: b for k, (b, _) in BODIES.items() if k != "times"}
    proc = subprocess.run([sys.executable, "-c", CLICKHOUSE, str(tmp_path / "ch"), json.dumps(vals),
                           json.dumps(bodies)], capture_output=True, text=True, timeout=300,
                          env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])})
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    for name, (_, check) in BODIES.items():
        if name == "times":
            continue
        o = out[name]
        cols = [c["name"] for c in o["columns"]]
        o["rows"] = [{k: o["data"][k][i] for k in cols} for i in range(len(o["data"][cols[0]]))]
        if name == "rule":  # no time rows in this table
            finite = np.array(FINITE)
            edges = np.histogram_bin_edges(finite, bins="sturges")  # reference: numpy
            counts, _ = np.histogram(finite, bins=edges)
            assert [r["count"] for r in o["rows"] if r["x_lo"] is not None] == [int(c) for c in counts if c]
            cut = pd.cut(pd.Series(values("clickhouse"), dtype=float), edges, include_lowest=True)
            assert [r["count"] for r in o["rows"] if r["x_lo"] is None] == [int(cut.isna().sum())]  # reference: pandas.cut
        else:
            check(o, "clickhouse")


def test_ubigint_key_above_int64_is_exact(tmp_path):
    """A UBIGINT of 2^64 - 1 as a key answers the exact integer (JSON numbers are unbounded,
    RFC 8259 section 6; Arrow keeps uint64) instead of failing a cast to int64 or double."""
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    path = tmp_path / "u.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE t AS SELECT * FROM (VALUES (18446744073709551615::UBIGINT), "
                "(18446744073709551615::UBIGINT), (7::UBIGINT), (NULL)) v(u)")
    con.close()
    cat = Catalog(parse_settings({"sources": {"u": {"engine": "duckdb", "path": str(path),
                                                    "table": "t"}}}, "<u>"))
    try:
        svc = ChartService(cat)
        out = run(svc, "u", {"channels": {"x": {"column": "u"}, "y": {"agg": "count"}}})
    finally:
        cat.close()
    assert out["data"]["u"] == [7, 2 ** 64 - 1, None]  # reference: the stored values (DuckDB UBIGINT max)
    assert out["data"]["count"] == [1, 2, 1]
    assert out["domains"]["u"] == [7, 2 ** 64 - 1]


def test_sqlite_cells_outside_the_storage_convention_are_null(tmp_path):
    """planner/dialects/sqlite.py documents the storage convention (UTC text timestamps,
    YYYY-MM-DD dates, numbers as INTEGER / REAL). A cell that breaks it -- text in a REAL
    column ('abc' would CAST to 0.0), an integer or unreadable text in a TIMESTAMP or DATE
    column -- reads as NULL: one NULL group, never a 500, never a wrong bin. Reference: the
    convention applied in Python (datetime.fromisoformat / date.fromisoformat)."""
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    rows = [("2026-01-01 10:00:00.000", 1.5, "2026-01-01"), ("2026-01-02 11:00:00.000", 2.5, "2026-01-02"),
            (1767225600, "abc", 20260101), ("garbage", 3.0, "2026/01/03"), (None, None, None)]
    path = tmp_path / "bad.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE t (ts TIMESTAMP, v REAL, d DATE)")
    conn.executemany("INSERT INTO t VALUES (?, ?, ?)", rows)
    conn.commit()
    conn.close()
    cat = Catalog(parse_settings({"sources": {"bad": {"engine": "sqlite", "path": str(path),
                                                      "table": "t"}}}, "<bad>"))

    def iso(v):  # reference: the documented convention, read in Python
        try:
            return dt.datetime.fromisoformat(v).replace(tzinfo=UTC) if isinstance(v, str) else None
        except ValueError:
            return None

    try:
        svc = ChartService(cat)
        plain = run(svc, "bad", {"channels": {"x": {"column": "ts"}, "y": {"agg": "count"}}})
        want = collections_counter([iso(r[0]) for r in rows])
        got = {None if t is None else dt.datetime.fromisoformat(t): n
               for t, n in zip(plain["data"]["ts"], plain["data"]["count"])}
        assert got == want
        days = run(svc, "bad", {"channels": {"x": {"column": "d", "trunc": "month"}, "y": {"agg": "count"}}})
        assert days["data"]["count"] == [2, 3]  # 2026-01-01 and 2026-01-02; three NULL-like cells
        binned = run(svc, "bad", {"channels": {"x": {"column": "v", "bin": {"width": 1, "origin": 0}},
                                               "y": {"agg": "count"}}})
        nums = [r[1] for r in rows if isinstance(r[1], float)]
        edges = np.array([1.0, 2.0, 3.0])  # the origin grid over the data 1.5 .. 3.0 (closed last bin)
        counts, _ = np.histogram(nums, bins=edges)  # reference: numpy on the REAL cells only
        assert [r["count"] for r in binned["rows"] if r["x_lo"] is not None] == [int(c) for c in counts if c]
        assert [r["count"] for r in binned["rows"] if r["x_lo"] is None] == [2]  # 'abc' and NULL
    finally:
        cat.close()


def collections_counter(items):
    out: dict = {}
    for i in items:
        out[i] = out.get(i, 0) + 1
    return out


@pytest.mark.parametrize("engine", ["duckdb", "postgres", "sqlite", "mysql"])
def test_plain_extents_fall_back_to_the_guarded_statement(service, engine):
    """The extents statement reads the plain values (``caps.extremes_show_nonfinite``) and
    the guarded one runs only when a min or max comes back non-finite. With inf / NaN among
    the rows: three statements (plain extents, guarded extents, main) and the answer of
    ``check_rule`` (numpy on the finite values); MariaDB holds none: two. Over finite rows
    only (a where that inf and NaN fail): two statements, numpy's sturges edges."""
    from app.service import ChartService

    service = ChartService(service.catalog)  # (empty caches: every statement runs)
    body, _ = BODIES["rule"]
    out = run(service, engine, body)
    check_rule(out, engine)
    nonfinite = engine != "mysql"
    assert out["stats"]["statements"] == (3 if nonfinite else 2), out["sql"]
    guard = ("ISFINITE", "1.7976931348623157E+308")  # (Dialect.finite: a function or BETWEEN)
    # the main statement keeps its finiteness test where the rows hold inf / NaN; where the
    # plain extents proved them finite (planner.emit_extents.finite_proved) it has none
    assert [any(g in s.upper() for g in guard) for s in out["sql"]] \
        == ([False, True, True] if nonfinite else [False, False]), out["sql"]
    where = [{"column": "v", "gte": -1e300, "lte": 1e300}]
    out = run(service, engine, {**body, "where": where})
    assert out["stats"]["statements"] == 2
    assert not any(g in s.upper() for s in out["sql"] for g in guard), out["sql"]
    finite = np.array(FINITE)
    edges = np.histogram_bin_edges(finite, bins="sturges")  # reference: numpy
    counts, _ = np.histogram(finite, bins=edges)  # reference: numpy.histogram
    b = out["bins"]["x"]
    assert b["count"] == len(edges) - 1 and math.isclose(b["start"], edges[0])
    assert [r["count"] for r in out["rows"] if r["x_lo"] is not None] == [int(c) for c in counts if c]


@pytest.mark.parametrize("empty_bins", ["omit", "zero"])
@pytest.mark.parametrize("engine", ["duckdb", "postgres", "sqlite", "mysql"])
def test_a_new_filter_is_laid_out_from_the_last_row_and_checked(service, engine, empty_bins):
    """A new filter value of a chart shape seen before runs ONE statement laid out from the
    shape's last extents row; that statement carries its own min / max
    (``planner.emit_main.carriable``) and its answer stands only when they give the same
    layout. Each step's answer must equal the same request in a service with empty caches
    (the extents statement first) and numpy.histogram over the answer's edges of the values
    Python keeps; when the layout changes, when inf / NaN come in and when nothing matches,
    the service lays the chart out from the right row."""
    from app.service import ChartService

    warm = ChartService(service.catalog)
    vals = [v for v in values(engine) if v is not None]
    steps = [  # (where bounds, statements the warm service runs)
        ((-1e300, 1e300), 2),   # first of its shape: the extents, then the grouped statement
        ((-1e300, 1e299), 1),   # the same rows: the layout holds, one statement
        ((0.0, 40.0), 2),       # another layout: the carried row re-lays it out (no extents)
        ((0.5, 40.0), 1),       # the same layout from a new row: one statement
        ((1e6, 2e6), None),     # nothing matches
        ((-3.0, 3.0), None),
    ]
    for (lo, hi), statements in steps:
        body = {"channels": {"x": {"column": "v", "bin": {"bins": 10}}, "y": {"agg": "count"}},
                "where": [{"column": "v", "gte": lo, "lte": hi}], "empty_bins": empty_bins}
        got = run(warm, engine, body)
        alone = run(ChartService(service.catalog), engine, body)  # reference: empty caches
        assert (got["bins"], got["rows"]) == (alone["bins"], alone["rows"]), (lo, hi)
        kept = [v for v in vals if not math.isnan(v) and lo <= v <= hi]
        assert got["stats"]["matched_rows"] == len(kept)
        if statements is not None:
            assert got["stats"]["statements"] == statements, got["sql"]
        if kept:
            b = got["bins"]["x"]
            edges = [b["start"] + j * b["width"] for j in range(b["count"] + 1)]
            counts, _ = np.histogram(kept, bins=edges)  # reference: numpy.histogram
            assert [r["count"] for r in got["rows"] if r["count"]] == [int(c) for c in counts if c]
            if empty_bins == "zero":  # every bin of the layout, the empty ones as 0
                assert [r["count"] for r in got["rows"]] == [int(c) for c in counts]
    # without a where (another shape: no guess) the rows hold inf / NaN: the chart is laid
    # out from the guarded extents and binned with the finiteness test
    body = {"channels": {"x": {"column": "v", "bin": {"bins": 10}}, "y": {"agg": "count"}},
            "empty_bins": empty_bins}
    got, alone = run(warm, engine, body), run(ChartService(service.catalog), engine, body)
    assert (got["bins"], got["rows"]) == (alone["bins"], alone["rows"])
    # the plain extents, the guarded extents, the main statement (MariaDB holds no inf /
    # NaN: no guarded extents)
    assert got["stats"]["statements"] == (2 if engine == "mysql" else 3), got["sql"]
    finite = [v for v in vals if math.isfinite(v)]
    b = got["bins"]["x"]
    edges = [b["start"] + j * b["width"] for j in range(b["count"] + 1)]
    counts, _ = np.histogram(finite, bins=edges)  # reference: numpy.histogram
    assert [r["count"] for r in got["rows"] if r["x_lo"] is not None and r["count"]] \
        == [int(c) for c in counts if c]


@pytest.mark.parametrize("bins", [1, 4, 20])
def test_nice_bins_over_values_near_the_largest_double(tmp_path, bins):
    """Finite values reaching -1e308 (beside inf, which goes to the NULL bin): the nice-width
    search met an infinite width (lo / inf is finite, so the test let it through), and
    Decimal(inf) made it 500; a span past the largest double (hi - lo overflows) could also
    keep the grid search from ending. The layout now covers the finite values with finite
    edges. Reference: numpy.histogram of the finite values over the answer's edges."""
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path / "huge.duckdb"
    vals = [-1e308, -3.5e307, 2.5, 0.0, 1e307, float("inf"), None]
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE h (v DOUBLE)")
    con.executemany("INSERT INTO h VALUES (?)", [(v,) for v in vals])
    con.close()
    app = create_app(parse_settings({"sources": {"h": {"engine": "duckdb", "path": str(db),
                                                       "table": "h"}},
                                     "server": {"request_log": False}}, "<huge>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        r = c.post("/v1/chart", json={"source": "h", "channels": {
            "x": {"column": "v", "bin": {"bins": bins}}, "y": {"agg": "count"}}})
    assert r.status_code == 200, r.text
    d = r.json()["data"]
    edges = sorted({e for e in d["x_lo"] + d["x_hi"] if e is not None})
    assert all(math.isfinite(e) for e in edges)
    finite = [v for v in vals if v is not None and math.isfinite(v)]
    counts, _ = np.histogram(finite, bins=edges)
    assert [n for lo, n in zip(d["x_lo"], d["count"]) if lo is not None] == \
        [int(c) for c in counts if c]
    assert dict(zip(d["x_lo"], d["count"]))[None] == 2


def test_nice_bins_search_ends_when_the_span_overflows():
    """-1.7e308 .. 1.7e308: hi - lo is inf, and the nice-width search then tried widths so
    far below the spacing of doubles near the values that consecutive grid edges were the
    same double, and its loop never ended (bounded CPU). Now such widths are skipped; no
    nice width has finite edges here, so the layout is refused (LayoutError, which the
    planner turns into its one-bin fallback). Run in a subprocess with a timeout, so a
    regression fails instead of hanging the suite."""
    code = ("from planner import bins\n"
            "for t in (1, 4, 20):\n"
            "    try:\n"
            "        bins.nice_bins(-1.7e308, 1.7e308, t)\n"
            "    except bins.LayoutError:\n"
            "        pass\n"
            "print('ended')\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120, cwd=Path(__file__).resolve().parents[1])
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.strip() == "ended"
