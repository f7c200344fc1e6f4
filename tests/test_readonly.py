"""Read-only proof: no path through sluice can write.

The API never takes SQL (``filter_sql`` is rebuilt from an allow-list, see
tests/test_injection.py), and below that, every engine connection refuses writes on its own:
even a hand-crafted statement run through the DuckDB engine's ``execute()`` fails, because
the file is opened read-only with external (file system / network) access disabled and the
configuration locked; on PostgreSQL the session is ``default_transaction_read_only``.
"""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pytest

from app.engines import EngineError
from app.engines.duckdb import DuckDBEngine
from app.settings import SourceConfig

WRITES = [
    "INSERT INTO canary VALUES (99, 'x')",
    "UPDATE canary SET v = 'changed'",
    "DELETE FROM canary",
    "CREATE TABLE evil (i INTEGER)",
    "CREATE VIEW evil AS SELECT 1",
    "CREATE MACRO evil(a) AS a",
    "DROP TABLE canary",
    "ALTER TABLE canary ADD COLUMN z INTEGER",
    "TRUNCATE canary",
    "COPY canary TO '{tmp}/leak.csv'",
    "COPY (SELECT 1) TO '{tmp}/leak.parquet' (FORMAT parquet)",
    "EXPORT DATABASE '{tmp}/export'",
    "ATTACH '{tmp}/other.duckdb' AS other",
    "ATTACH ':memory:' AS other",
    "INSTALL httpfs",
    "LOAD httpfs",
    "SET enable_external_access = true",
    "SET GLOBAL lock_configuration = false",
    "SET memory_limit = '100TB'",
    "SELECT * FROM read_csv('/etc/passwd')",
    "SELECT * FROM read_text('/etc/hostname')",
    "SELECT * FROM glob('/*')",
    "SELECT * FROM '/etc/passwd'",
]


@pytest.fixture(scope="module")
def duck(tmp_path_factory):
    root = tmp_path_factory.mktemp("readonly")
    path = root / "canary.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE canary (i INTEGER, v VARCHAR)")
    con.execute("INSERT INTO canary VALUES (1, 'original'), (2, 'original')")
    con.close()
    eng = DuckDBEngine(SourceConfig(name="canary", engine="duckdb", table="canary",
                                    path=str(path)))
    yield eng, path, root
    eng.close()


#: accepted by a read-only DuckDB as no-ops; the file must still be untouched
NO_OPS = ["CHECKPOINT", "VACUUM", "FORCE CHECKPOINT"]


@pytest.mark.parametrize("stmt", NO_OPS)
def test_duckdb_maintenance_statements_change_nothing(duck, stmt):
    eng, path, _ = duck
    before = (os.stat(path).st_size, os.stat(path).st_mtime_ns)
    try:
        eng.execute(stmt)
    except EngineError:
        pass
    assert (os.stat(path).st_size, os.stat(path).st_mtime_ns) == before


@pytest.mark.parametrize("stmt", WRITES)
def test_duckdb_engine_refuses_writes_and_file_access(duck, stmt):
    eng, path, root = duck
    before = (os.stat(path).st_size, os.stat(path).st_mtime_ns)
    with pytest.raises(EngineError):
        eng.execute(stmt.format(tmp=root))
    assert (os.stat(path).st_size, os.stat(path).st_mtime_ns) == before
    assert not list(Path(root).glob("leak*")) and not (Path(root) / "export").exists()
    rows = eng.execute("SELECT i, v FROM canary ORDER BY i").to_pylist()
    assert rows == [{"i": 1, "v": "original"}, {"i": 2, "v": "original"}]


def test_duckdb_settings_stay_locked(duck):
    eng, _, _ = duck
    row = eng.fetch_row("SELECT current_setting('access_mode') AS m, "
                        "current_setting('enable_external_access') AS x, "
                        "current_setting('lock_configuration') AS l, "
                        "current_setting('TimeZone') AS tz")
    assert row == {"m": "read_only", "x": False, "l": True, "tz": "UTC"}


def test_duckdb_memory_limit_and_threads_come_from_config(tmp_path):
    path = tmp_path / "cfg.duckdb"
    duckdb.connect(str(path)).close()
    eng = DuckDBEngine(SourceConfig(name="c", engine="duckdb", table="t", path=str(path),
                                    options={"memory_limit": "300MB", "threads": 1}))
    try:
        row = eng.fetch_row("SELECT current_setting('memory_limit') AS m, "
                            "current_setting('threads') AS t")
        assert row["t"] == 1
        assert row["m"].startswith("286") or row["m"].startswith("300")  # 300 MB = 286.1 MiB
    finally:
        eng.close()


def test_no_api_route_writes(duck):
    """Every route leaves the source file untouched (sizes and modification times)."""
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import parse_settings

    _, path, _ = duck
    before = (os.stat(path).st_size, os.stat(path).st_mtime_ns)
    settings = parse_settings({"sources": {"canary": {"engine": "duckdb", "path": str(path),
                                                      "table": "canary"}}})
    body = {"source": "canary", "channels": {"x": {"column": "v"}, "y": {"agg": "count"}},
            "filter_sql": "i > 0 AND v <> 'x''); DROP TABLE canary; --'"}
    with TestClient(create_app(settings), raise_server_exceptions=False) as c:
        r = c.post("/v1/chart", json=body)
        assert r.status_code == 200, r.text
        assert r.json()["data"] == {"v": ["original"], "count": [2]}
        assert c.post("/v1/sql", json=body).status_code == 200
        assert c.get("/v1/sources/canary").status_code == 200
        assert c.get("/v1/sources").status_code == 200
    assert (os.stat(path).st_size, os.stat(path).st_mtime_ns) == before


def test_postgres_sessions_are_read_only():
    """The machine's PostgreSQL: sluice's engine sets default_transaction_read_only, so even
    a hand-written INSERT fails. Checked through app/engines/postgres.py when it exists."""
    try:
        from app.engines import postgres as pg_engine  # noqa: F401
    except ImportError:
        pytest.skip("app/engines/postgres.py is not there yet (issue 3)")
    import psycopg

    dsn = "postgresql://postgres@127.0.0.1:5432/test"
    try:
        admin = psycopg.connect(dsn, autocommit=True, connect_timeout=3)
    except psycopg.OperationalError as e:
        pytest.skip(f"PostgreSQL is not reachable on 127.0.0.1:5432: {e}")
    with admin:
        admin.execute("CREATE TABLE IF NOT EXISTS sluice_ro_canary (i int)")
        admin.execute("TRUNCATE sluice_ro_canary")
        admin.execute("INSERT INTO sluice_ro_canary VALUES (1)")
    eng = pg_engine.PostgresEngine(SourceConfig(name="pg", engine="postgres",
                                                table="sluice_ro_canary", dsn=dsn,
                                                options={"pool_max": 1}))
    try:
        for stmt in ("INSERT INTO sluice_ro_canary VALUES (2)", "DELETE FROM sluice_ro_canary",
                     "CREATE TABLE sluice_ro_evil (i int)", "DROP TABLE sluice_ro_canary",
                     "SET default_transaction_read_only = off; INSERT INTO sluice_ro_canary VALUES (3)"):
            with pytest.raises(EngineError):
                eng.execute(stmt)
        # a SET in one statement must not unlock the next one (pooled connections are RESET)
        for unlock in ("SET default_transaction_read_only = off",
                       "SET SESSION CHARACTERISTICS AS TRANSACTION READ WRITE"):
            try:
                eng.execute(unlock)
            except EngineError:
                pass
            with pytest.raises(EngineError):
                eng.execute("INSERT INTO sluice_ro_canary VALUES (4)")
        assert eng.execute("SELECT count(*) AS n FROM sluice_ro_canary").to_pylist() == [{"n": 1}]
    finally:
        eng.close()
