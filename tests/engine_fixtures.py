"""One fixture table, generated deterministically in Python, loaded into every live engine.

The rows (``make_rows``) carry what differs between engines: NULLs in every column,
negative numbers, values on bin edges, decimals, booleans, unicode and case-variant text
('alpha' / 'Alpha' / 'Zürich' / '東京'), a high-cardinality key (~2000 distinct values) and
timestamps on both sides of the 2026 daylight-saving changes in Europe/Berlin (29 March,
25 October) and America/New_York (8 March, 1 November), with millisecond fractions.

Storage per engine (all hold the same values):

* DuckDB file: ``ts TIMESTAMPTZ``, ``tsn TIMESTAMP`` (naive, read as UTC), ``day DATE``.
* PostgreSQL db ``test``, schema ``sluice_test_<worker>`` (dropped and recreated):
  ``timestamptz`` / ``timestamp``; text columns ``COLLATE "C"`` (code-point order like DuckDB).
* MariaDB db ``test``, table ``sluice_engines_<worker>``: ``DATETIME(3)`` for both times
  (naive UTC), ``BOOLEAN`` (= TINYINT(1)), text ``utf8mb4_nopad_bin`` (binary, no padding).
* SQLite file: the documented convention of ``planner.dialects.sqlite`` — ``TIMESTAMP``
  columns holding UTC text ``YYYY-MM-DD HH:MM:SS.SSS``; booleans 0/1 in a ``BOOLEAN`` column.
* chdb folder: database ``sluice_test``, MergeTree table; ``DateTime64(3, 'UTC')``.
* Spark: a Parquet file read as a temporary view (``ts`` TIMESTAMP, ``tsn`` TIMESTAMP_NTZ).

Worker-specific names keep parallel pytest workers (xdist) from touching each other's data.
"""

from __future__ import annotations

import datetime as dt
import decimal
import os
import random
import sqlite3
import subprocess
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq

SEED = 20260329
N_ROWS = 3000
UTC = dt.timezone.utc
PG_DSN = "postgresql://postgres@127.0.0.1:5432/test"
MYSQL_DSN = "mysql://root@127.0.0.1:3306/test"

CATS = ["alpha", "beta", "gamma", "Alpha", "Zürich", "東京", "naïve", "a_b", ""]
CAT_WEIGHTS = [30, 22, 17, 9, 8, 6, 4, 3, 1]
GROUPS = ["north", "south", "east"]
DST_UTC = [dt.datetime(2026, 3, 8, 7, tzinfo=UTC), dt.datetime(2026, 3, 29, 1, tzinfo=UTC),
           dt.datetime(2026, 10, 25, 1, tzinfo=UTC), dt.datetime(2026, 11, 1, 6, tzinfo=UTC)]

#: ``[cache]`` for tests that expect a cache hit on a server source: a server source's cache
#: key holds a time bucket of ``ttl_s`` (default 60 s, app/cache.py source_version), so a
#: bucket boundary between a request and its repeat turns the hit into a miss; this bucket
#: outlasts any test run
STEADY_CACHE = {"ttl_s": 1_000_000_000}
COLUMNS = ["id", "cat", "grp", "k", "n", "x", "amount", "flag", "ts", "tsn", "day"]


def worker() -> str:
    return os.environ.get("PYTEST_XDIST_WORKER", "main")


def make_rows() -> list[dict]:
    rng = random.Random(SEED)
    rows = []
    start = dt.datetime(2026, 1, 1, tzinfo=UTC)
    for i in range(N_ROWS):
        if i % 4 == 0:  # clusters around the DST changes (+- 36 h)
            centre = DST_UTC[(i // 4) % len(DST_UTC)]
            ts = centre + dt.timedelta(seconds=rng.randint(-36 * 3600, 36 * 3600))
        else:
            ts = start + dt.timedelta(seconds=rng.randint(0, 364 * 86400))
        ts = ts + dt.timedelta(milliseconds=rng.choice([0, 0, 0, 250, 999]))
        x = round(rng.gauss(3.0, 20.0), 3)
        if i % 50 == 7:
            x = float(rng.choice([-40, -10, 0, 10, 20, 40]))  # exactly on bin edges
        rows.append({
            "id": i,
            "cat": None if i % 23 == 5 else rng.choices(CATS, CAT_WEIGHTS)[0],
            "grp": None if i % 31 == 3 else GROUPS[rng.randrange(3)],
            "k": None if i % 97 == 11 else f"k{rng.randrange(2200):05d}",
            "n": None if i % 17 == 2 else rng.randint(-50, 50),
            "x": None if i % 13 == 4 else x,
            "amount": None if i % 29 == 9 else decimal.Decimal(rng.randint(-50000, 250000)) / 100,
            "flag": None if i % 19 == 6 else (rng.random() < 0.4),
            "ts": None if i % 41 == 8 else ts,
            "tsn": None if i % 43 == 10 else ts.replace(tzinfo=None),
            "day": None if i % 37 == 12 else ts.date(),
        })
    return rows


def arrow_table(rows: list[dict]) -> pa.Table:
    return pa.table({
        "id": pa.array([r["id"] for r in rows], pa.int64()),
        "cat": pa.array([r["cat"] for r in rows], pa.string()),
        "grp": pa.array([r["grp"] for r in rows], pa.string()),
        "k": pa.array([r["k"] for r in rows], pa.string()),
        "n": pa.array([r["n"] for r in rows], pa.int32()),
        "x": pa.array([r["x"] for r in rows], pa.float64()),
        "amount": pa.array([r["amount"] for r in rows], pa.decimal128(12, 2)),
        "flag": pa.array([r["flag"] for r in rows], pa.bool_()),
        "ts": pa.array([r["ts"] for r in rows], pa.timestamp("ms", tz="UTC")),
        "tsn": pa.array([r["tsn"] for r in rows], pa.timestamp("ms")),
        "day": pa.array([r["day"] for r in rows], pa.date32()),
    })


# --- loaders: each returns the source config (TOML table) for that engine ----------------

def load_duckdb(root: Path, table: pa.Table) -> dict:
    path = root / "engines.duckdb"
    con = duckdb.connect(str(path))
    con.execute("SET TimeZone = 'UTC'")
    con.register("src", table)
    con.execute("CREATE TABLE t AS SELECT id, cat, grp, k, n, x, CAST(amount AS DECIMAL(12,2)) "
                "AS amount, flag, CAST(ts AS TIMESTAMPTZ) AS ts, CAST(tsn AS TIMESTAMP) AS tsn, "
                "CAST(day AS DATE) AS day FROM src")
    con.close()
    return {"engine": "duckdb", "path": str(path), "table": "t"}


def load_postgres(rows: list[dict]) -> dict:
    import psycopg

    schema = f"sluice_test_{worker()}"
    with psycopg.connect(PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        conn.execute(f'CREATE SCHEMA "{schema}"')
        conn.execute(f'''CREATE TABLE "{schema}".t (id bigint, cat text COLLATE "C",
            grp text COLLATE "C", k text COLLATE "C", n integer, x double precision,
            amount numeric(12,2), flag boolean, ts timestamptz, tsn timestamp, day date)''')
        with conn.cursor().copy(f'COPY "{schema}".t ({", ".join(COLUMNS)}) FROM STDIN') as cp:
            for r in rows:
                cp.write_row([r[c] for c in COLUMNS])
        conn.execute(f'ANALYZE "{schema}".t')
    return {"engine": "postgres", "dsn": PG_DSN, "table": f"{schema}.t",
            "statement_timeout_ms": 20000}


def ensure_mysql_time_zones() -> None:
    """CONVERT_TZ needs the server's time zone tables (standard MySQL/MariaDB set-up step)."""
    import pymysql

    conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="mysql")
    with conn.cursor() as cur:
        cur.execute("SELECT COUNT(*) FROM mysql.time_zone_name")
        loaded = cur.fetchone()[0] > 0
    conn.close()
    if loaded:
        return
    tool = next((t for t in ("mariadb-tzinfo-to-sql", "mysql_tzinfo_to_sql")
                 if subprocess.run(["which", t], capture_output=True).returncode == 0), None)
    if tool is None:
        raise RuntimeError("MariaDB time zone tables are empty and mysql_tzinfo_to_sql is missing")
    sql = subprocess.run([tool, "/usr/share/zoneinfo"], capture_output=True, check=True).stdout
    subprocess.run(["mysql", "-h", "127.0.0.1", "-uroot", "mysql"], input=sql, check=True,
                   capture_output=True)


def load_mysql(rows: list[dict]) -> dict:
    import pymysql

    ensure_mysql_time_zones()
    name = f"sluice_engines_{worker()}"
    conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                           charset="utf8mb4", autocommit=True)
    with conn.cursor() as cur:
        cur.execute(f"DROP TABLE IF EXISTS `{name}`")
        cur.execute(f"""CREATE TABLE `{name}` (id BIGINT, cat VARCHAR(64), grp VARCHAR(16),
            k VARCHAR(16), n INT, x DOUBLE, amount DECIMAL(12,2), flag BOOLEAN,
            ts DATETIME(3), tsn DATETIME(3), day DATE)
            CHARACTER SET utf8mb4 COLLATE utf8mb4_nopad_bin""")
        def conv(r):
            out = [r[c] for c in COLUMNS]
            out[8] = r["ts"].replace(tzinfo=None) if r["ts"] else None
            return out
        cur.executemany(f"INSERT INTO `{name}` ({', '.join(COLUMNS)}) VALUES "
                        f"({', '.join(['%s'] * len(COLUMNS))})", [conv(r) for r in rows])
    conn.close()
    return {"engine": "mysql", "dsn": MYSQL_DSN, "table": f"test.{name}",
            "statement_timeout_ms": 20000}


def sqlite_time(t: dt.datetime | None) -> str | None:
    """The SQLite storage convention: UTC text 'YYYY-MM-DD HH:MM:SS.SSS'."""
    if t is None:
        return None
    t = t.astimezone(UTC) if t.tzinfo else t
    return t.strftime("%Y-%m-%d %H:%M:%S.") + f"{t.microsecond // 1000:03d}"


def load_sqlite(root: Path, rows: list[dict]) -> dict:
    path = root / "engines.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("""CREATE TABLE t (id INTEGER, cat TEXT, grp TEXT, k TEXT, n INTEGER, x REAL,
        amount DECIMAL(12,2), flag BOOLEAN, ts TIMESTAMP, tsn TIMESTAMP, day DATE)""")
    conn.executemany("INSERT INTO t VALUES (?,?,?,?,?,?,?,?,?,?,?)", [
        (r["id"], r["cat"], r["grp"], r["k"], r["n"], r["x"],
         None if r["amount"] is None else float(r["amount"]),
         None if r["flag"] is None else int(r["flag"]), sqlite_time(r["ts"]), sqlite_time(r["tsn"]),
         None if r["day"] is None else r["day"].isoformat())
        for r in rows])
    conn.commit()
    conn.close()
    return {"engine": "sqlite", "path": str(path), "table": "t"}


_CHDB_FOLDER: list[Path] = []


def chdb_folder(root: Path) -> Path:
    """chdb opens ONE data folder per process: every loader of a test session uses the first
    folder asked for (tables of other test files go into other databases there)."""
    if not _CHDB_FOLDER:
        _CHDB_FOLDER.append(root / "chdb")
    return _CHDB_FOLDER[0]


def load_chdb(root: Path, table: pa.Table) -> dict:
    from chdb import session as chs

    folder = chdb_folder(root)
    parquet = root / "engines_ch.parquet"
    pq.write_table(table, parquet)
    s = chs.Session(str(folder))
    s.query("CREATE DATABASE IF NOT EXISTS sluice_test")
    s.query("DROP TABLE IF EXISTS sluice_test.t")
    s.query("""CREATE TABLE sluice_test.t (id Int64, cat Nullable(String), grp Nullable(String),
        k Nullable(String), n Nullable(Int32), x Nullable(Float64), amount Nullable(Decimal(12, 2)),
        flag Nullable(Bool), ts Nullable(DateTime64(3, 'UTC')), tsn Nullable(DateTime64(3, 'UTC')),
        day Nullable(Date32))
        ENGINE = MergeTree ORDER BY id""")
    s.query(f"INSERT INTO sluice_test.t SELECT * FROM file('{parquet}', Parquet)")
    s.close()
    return {"engine": "clickhouse", "path": str(folder), "table": "sluice_test.t"}


def load_spark(root: Path, table: pa.Table) -> dict:
    path = root / "engines_spark.parquet"
    pq.write_table(table, path)
    # A short-lived local JVM: C1 only, serial GC; small data: no adaptive execution or
    # whole-stage code generation (measured here: about 3x faster per chart).
    return {"engine": "spark", "path": str(path), "table": "sluice_engines",
            "shuffle_partitions": 2, "options": {
                "java_options": "-XX:TieredStopAtLevel=1 -XX:+UseSerialGC",
                "spark_conf": {"spark.sql.adaptive.enabled": False,
                               "spark.sql.codegen.wholeStage": False}}}


def five_engines(root: Path, rows: list[dict] | None = None) -> dict[str, dict]:
    """The fixture rows (``make_rows()`` unless given) loaded into DuckDB, PostgreSQL, MariaDB,
    SQLite and chdb: one source config per engine, named by engine (the tests' matrix)."""
    rows = make_rows() if rows is None else rows
    table = arrow_table(rows)
    return {"duckdb": load_duckdb(root, table), "postgres": load_postgres(rows),
            "mysql": load_mysql(rows), "sqlite": load_sqlite(root, rows),
            "clickhouse": load_chdb(root, table)}
