"""Spark over the wire: a real Spark Connect server (started from the installed pyspark by
tests/spark_connect_server.py, one per test session, loopback only) as a ``spark`` source
with an ``sc://`` URL.

Outside references: DuckDB's answers on the same fixture rows (the engine matrix of
tests/test_engines_matrix.py, every case), the Spark server itself (its catalog listing and
row counts, read through a separate raw Connect session; its OPERATION_CANCELED error for an
interrupted operation), and the wall clock for "on time".

Order matters and is fixed by the file: matrix, read-only, timeout, freeze, kill (the kill
restarts the server; nothing runs after it but the recovery check). Measured on the shared
2-core machine: the module takes 3-5 min (server start 15-40 s, matrix 67-154 s with three
charts in flight, the restart 25-45 s), depending on the other load.
"""

from __future__ import annotations

import threading
import time
import warnings

import pytest

import spark_connect_server as scs  # tests/ is on sys.path (no __init__.py)
from test_engines_matrix import CASES, answer, check_approx, check_case, duck, fx

pytestmark = [pytest.mark.filterwarnings("ignore::FutureWarning"),  # pyspark on pandas 3
              pytest.mark.filterwarnings("ignore:.*RETRIES_EXCEEDED")]  # the dead-server tests

CHART = {"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}}
BIG = "sluice_big"  # a global temporary view of 10^11 generated rows: slow to count


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    srv = scs.ConnectServer(tmp_path_factory.mktemp("spark_connect"))
    why = srv.available()
    if why:
        pytest.skip(why)
    srv.start()
    yield srv
    srv.stop()


def raw_session(url: str):
    """A plain Connect session, not sluice's: the outside view of the server."""
    from pyspark.sql.connect.session import SparkSession as RemoteSession

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        return RemoteSession.builder.remote(url).create()


@pytest.fixture(scope="module")
def sources(server, tmp_path_factory):
    root = tmp_path_factory.mktemp("spark_connect_data")
    table = fx.arrow_table(fx.make_rows())
    spark = fx.load_spark(root, table)
    raw = raw_session(server.url)
    raw.range(0, 10**11).selectExpr("id", "id % 7 AS g").createOrReplaceGlobalTempView(BIG)
    yield {
        "duckdb": fx.load_duckdb(root, table),
        "spark_connect": {"engine": "spark", "dsn": server.url, "path": spark["path"],
                          "table": spark["table"], "statement_timeout_ms": 20000,
                          "options": {"spark_conf": spark["options"]["spark_conf"]}},
        "spark_big": {"engine": "spark", "dsn": server.url, "table": f"global_temp.{BIG}",
                      "statement_timeout_ms": 3000,
                      "options": {"cancel_grace_ms": 3000,
                                  "spark_conf": spark["options"]["spark_conf"]}},
    }
    raw._client.close()


@pytest.fixture(scope="module")
def service(sources):
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    # no result cache: every request below must reach the server
    catalog = Catalog(parse_settings({"sources": sources, "cache": {"enabled": False}},
                                     "<spark connect>"))
    yield ChartService(catalog)
    catalog.close()


def test_engine_matrix_over_spark_connect(service):
    """Every engine-matrix case over the wire equals DuckDB's answer (or the promised 422);
    all failures are listed together."""
    from concurrent.futures import ThreadPoolExecutor

    for case in CASES:  # the references first (DuckDB, in-process)
        duck(service, case)
    t0 = time.monotonic()
    failures = []
    try:
        check_approx(service, "spark_connect")
    except AssertionError as e:
        failures.append(f"approx_count_distinct vs exact: {e}")

    def one(case: str) -> str | None:
        try:
            check_case(service, "spark_connect", case)
        except Exception as e:  # noqa: BLE001 - collected and reported together
            return f"{case}: {type(e).__name__}: {str(e)[:600]}"
        return None

    # three charts in flight (as a dashboard would send them): the server's two cores stay
    # busy while another statement is planned or on the wire
    with ThreadPoolExecutor(3) as pool:
        failures += [f for f in pool.map(one, CASES) if f]
    print(f"\nspark connect matrix: {len(CASES)} cases in {time.monotonic() - t0:.1f} s")
    assert not failures, f"{len(failures)} of {len(CASES)} cases differ:\n" + "\n".join(failures)
    assert service.catalog.engine("spark_connect").remote == service.catalog.config("spark_connect").dsn


WRITES = [
    "CREATE TABLE sluice_write_probe (a INT)",
    "CREATE TABLE sluice_write_probe AS SELECT 1 AS a",
    "INSERT INTO sluice_engines SELECT * FROM sluice_engines",
    "WITH s AS (SELECT 1 AS a) INSERT INTO sluice_write_probe SELECT a FROM s",
    "INSERT OVERWRITE DIRECTORY '/tmp/sluice_leak' USING parquet SELECT 1",
    "CREATE OR REPLACE TEMPORARY VIEW sluice_engines AS SELECT 1 AS a",
    "DROP VIEW sluice_engines",
    "CACHE TABLE sluice_probe AS SELECT 1",
    "SET spark.sql.session.timeZone = America/New_York",
    "ADD JAR /tmp/evil.jar",
    "SELECT 1; DROP VIEW sluice_engines",
    "REFRESH TABLE sluice_engines",
    "USE other_db",
]


@pytest.mark.parametrize("stmt", WRITES)
def test_read_only_over_the_wire(service, server, stmt):
    """A write reaches neither the server's catalog nor the data: the server's own listing
    (a raw session) and row count are unchanged, and the session still answers in UTC."""
    from app.engines import EngineError

    eng = service.catalog.engine("spark_connect")
    before = service.catalog.entry("spark_connect").row_count
    with pytest.raises(EngineError, match="single query"):
        eng.execute(stmt)
    raw = raw_session(server.url)
    try:
        names = {t.name for t in raw.catalog.listTables("default")}
        assert "sluice_write_probe" not in names and "sluice_probe" not in names, names
    finally:
        raw._client.close()
    row = eng.fetch_row("SELECT COUNT(*) AS n, CAST(current_timezone() AS STRING) AS tz "
                        "FROM sluice_engines")
    assert row == {"n": before, "tz": "UTC"}
    assert before == fx.N_ROWS  # reference: the fixture's own row count


def test_the_server_itself_would_write(server):
    """Control for the test above: the same server accepts CREATE TABLE from a plain
    session (Spark has no read-only session), so the refusal is sluice's own guard."""
    raw = raw_session(server.url)
    try:
        raw.sql("CREATE TABLE sluice_control (a INT) USING parquet")
        assert "sluice_control" in {t.name for t in raw.catalog.listTables("default")}
        raw.sql("DROP TABLE sluice_control")
    finally:
        raw._client.close()


def test_statement_timeout_interrupts_the_server_job(service):
    """app.limits' timer fires the engine's canceller: the server cancels the tagged
    operation (its own OPERATION_CANCELED error), the answer is a 504 on time, and the
    session goes on answering."""
    from app.limits import StatementTimeout

    eng = service.catalog.engine("spark_connect")
    guarded = service.limiter.guard("spark_connect", eng)
    guarded._ms = 1500  # this statement only
    t0 = time.monotonic()
    with pytest.raises(StatementTimeout):
        guarded.execute("SELECT COUNT(*) AS n FROM range(0, 100000000000)")
    took = time.monotonic() - t0
    assert 1.4 < took < 1.5 + 5.0, took  # timeout + the cancel grace (default 5 s)
    # the server said it cancelled (not an abandoned call): the raw engine error carries it
    cancel = eng.canceller()
    threading.Timer(1.0, cancel).start()
    from app.engines import EngineError

    with pytest.raises(EngineError, match="OPERATION_CANCELED"):
        eng.execute("SELECT COUNT(*) AS n FROM range(0, 100000000000)")
    # the same session goes on answering (reference: the fixture's own row count)
    assert eng.fetch_row("SELECT COUNT(*) AS n FROM sluice_engines")["n"] == fx.N_ROWS


def _client(service):
    from fastapi.testclient import TestClient

    from app.main import create_app

    return TestClient(create_app(service.catalog.settings), raise_server_exceptions=False)


def _slow_request(c, out: dict) -> threading.Thread:
    def run():
        t0 = time.monotonic()
        r = c.post("/v1/chart", json={"source": "spark_big", "channels": {"y": {"agg": "count"}}})
        out["status"], out["body"], out["s"] = r.status_code, r.json(), time.monotonic() - t0
    t = threading.Thread(target=run)
    t.start()
    return t


def _until_ok(c, seconds: float) -> tuple[int, float]:
    t0 = time.monotonic()
    while True:
        r = c.post("/v1/chart", json={"source": "spark_connect", **CHART})
        if r.status_code == 200 or time.monotonic() - t0 > seconds:
            return r.status_code, time.monotonic() - t0
        time.sleep(0.5)


def test_slow_statement_over_http_is_a_504(service):
    with _client(service) as c:
        out: dict = {}
        _slow_request(c, out).join(30)
        assert out["status"] == 504, out
        assert out["body"]["type"].endswith("/statement-timeout")
        assert out["s"] < 3.0 + 3.0 + 1.0, out["s"]  # timeout + grace + slack


def test_frozen_server_mid_query_is_a_503_on_time_then_recovers(service, server):
    """SIGSTOP during a slow statement: the cancel is not answered, so the request ends
    after statement_timeout_ms + cancel_grace_ms with 503; after SIGCONT the source answers
    again by itself (DuckDB's answer for the same chart)."""
    want = answer(service, "duckdb", CHART)["data"]
    with _client(service) as c:
        assert c.post("/v1/chart", json={"source": "spark_connect", **CHART}).status_code == 200
        out: dict = {}
        t = _slow_request(c, out)
        time.sleep(1.0)
        server.freeze()
        try:
            t.join(30)
        finally:
            server.thaw()
        assert out["status"] == 503, out
        assert out["body"]["type"].endswith("/source-unavailable"), out["body"]
        assert 3.0 + 3.0 - 0.5 < out["s"] < 3.0 + 3.0 + 2.0, out["s"]  # timeout + grace: on time
        status, _ = _until_ok(c, 30)
        assert status == 200
        assert c.post("/v1/chart", json={"source": "spark_connect", **CHART}).json()["data"] == want


def test_killed_server_mid_query_is_a_503_then_recovers_after_restart(service, server):
    """SIGKILL during a slow statement: 503 well before the statement timeout; the server
    restarted on the same port (new session ids, no temporary views) is used again by
    itself, and answers like DuckDB."""
    want = answer(service, "duckdb", CHART)["data"]
    with _client(service) as c:
        out: dict = {}
        t = _slow_request(c, out)
        time.sleep(1.0)
        server.kill()
        t.join(30)
        assert out["status"] == 503, out
        assert out["s"] < 1.0 + 2.5, out["s"]  # well below the 3 s timeout + 3 s grace
        r = c.post("/v1/chart", json={"source": "spark_connect", **CHART})
        assert r.status_code == 503 and r.headers.get("Retry-After")
        server.start()
        status, _ = _until_ok(c, 60)
        assert status == 200
        assert c.post("/v1/chart", json={"source": "spark_connect", **CHART}).json()["data"] == want
