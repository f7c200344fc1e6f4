"""Limits (app/limits.py): request caps with pointers, body size (also chunked), the result
group cap, statement timeouts (504), admission control (503 + Retry-After), DuckDB
memory_limit / threads from the config."""

from __future__ import annotations

import threading
import time

import pytest


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
BASE = {"source": "deliveries", "channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    root = tmp_path_factory.mktemp("limits")
    path = root / "l.duckdb"
    fx.build_duckdb(path)
    return path


def _client(db, tmp_path, extra: str):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = tmp_path / "sluice.toml"
    cfg.write_text(fx.config(db, extra=extra))
    return TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False)


@pytest.fixture
def strict(db, tmp_path):
    extra = ("[server]\nrequest_log = false\nmax_body_bytes = 4000\nmax_limit = 3\n"
             "[limits]\nmax_channels = 3\nmax_by = 1\nmax_filters = 2\nmax_in_list = 3\n"
             "max_filter_sql_chars = 40\n")
    with _client(db, tmp_path, extra) as c:
        yield c


def _problem(r, status, pointer=None):
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    p = r.json()
    if pointer is not None:
        assert p["pointer"] == pointer, p
    return p


def test_channel_caps(strict):
    body = {**BASE, "channels": {"x": {"column": "depot"}, "y": {"agg": "count"},
                                 "color": {"column": "region"}, "size": {"column": "vehicle"}}}
    p = _problem(strict.post("/v1/chart", json=body), 422, "/channels/size")
    assert "max_channels" in p["detail"]
    body = {**BASE, "channels": {"x": {"column": "depot"}, "by": [{"column": "region"}, {"column": "vehicle"}]}}
    _problem(strict.post("/v1/chart", json=body), 422, "/channels/by/1")


def test_filter_caps(strict):
    where = [{"column": "fee", "gt": 1}, {"any": [{"column": "fee", "lt": 100}, {"not": {"column": "depot", "eq": "x"}}]}]
    p = _problem(strict.post("/v1/chart", json={**BASE, "where": where}), 422, "/where/1/any/1/not")
    assert "max_filters" in p["detail"]
    where = [{"column": "depot", "in": ["a", "b", "c", "d"]}]
    _problem(strict.post("/v1/chart", json={**BASE, "where": where}), 422, "/where/0/in")
    where = [{"column": "depot", "not_in": ["a", "b", "c", "d"]}]
    _problem(strict.post("/v1/chart", json={**BASE, "where": where}), 422, "/where/0/not_in")
    _problem(strict.post("/v1/chart", json={**BASE, "filter_sql": "depot IN ('a','b','c','d')"}), 422, "/filter_sql")
    _problem(strict.post("/v1/chart", json={**BASE, "filter_sql": "fee > 1 AND " * 4 + "true"}), 422, "/filter_sql")
    assert strict.post("/v1/chart", json={**BASE, "filter_sql": "depot IN ('a','b','c')"}).status_code == 200


def test_result_group_cap_sets_truncated(strict):
    r = strict.post("/v1/chart", json=BASE)  # no limit: the server cap (3) applies
    assert r.status_code == 200
    out = r.json()
    assert out["stats"]["result_rows"] == 3 and out["stats"]["truncated"] is True
    assert out["stats"]["groups"] == 6  # five depots and NULL
    _problem(strict.post("/v1/chart", json={**BASE, "limit": 4}), 422, "/limit")
    assert strict.post("/v1/chart", json={**BASE, "limit": 2}).json()["stats"]["result_rows"] == 2


def test_body_cap_with_and_without_content_length(strict):
    big = {**BASE, "where": [{"column": "depot", "eq": "x" * 5000}]}
    p = _problem(strict.post("/v1/chart", json=big), 413)
    assert "4000" in p["detail"]

    def chunks():
        import json

        data = json.dumps(big).encode()
        for i in range(0, len(data), 512):
            yield data[i:i + 512]

    r = strict.post("/v1/chart", content=chunks(), headers={"content-type": "application/json"})
    _problem(r, 413)  # chunked: no Content-Length, cut off once past the cap

    def small():
        import json

        yield json.dumps(BASE).encode()

    r = strict.post("/v1/chart", content=small(), headers={"content-type": "application/json"})
    assert r.status_code == 200, r.text  # a chunked body under the cap goes through


def test_bad_content_length_is_400(strict):
    import json

    r = strict.post("/v1/chart", content=json.dumps(BASE).encode(),
                    headers={"content-type": "application/json", "content-length": "abc"})
    assert r.status_code in (400, 413) or r.status_code < 500


# ---- statement timeout and admission ---------------------------------------------------

SLOW_BODY = {"source": "slow", "channels": {"x": {"column": "a"}, "y": {"agg": "count_distinct", "column": "b"}}}


@pytest.fixture(scope="module")
def slow_db(tmp_path_factory):
    """A view whose scan takes seconds (a large cross join computed on the fly)."""
    import duckdb

    root = tmp_path_factory.mktemp("slow")
    path = root / "slow.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE n AS SELECT range AS i FROM range(20000)")
    con.execute("CREATE VIEW slow AS SELECT (x.i * 7 + y.i) % 1000 AS a, x.i * y.i AS b "
                "FROM n x, n y")
    con.close()
    return path


def _slow_client(slow_db, tmp_path, extra=""):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.slow]\nengine = "duckdb"\npath = "{slow_db}"\ntable = "slow"\n'
                   "threads = 1\n" + extra + "\n[server]\nrequest_log = false\n"
                   "[cache]\nenabled = false\n")
    try:
        return TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False)
    except Exception:  # noqa: BLE001 - no [cache] section in this build
        cfg.write_text(cfg.read_text().replace("[cache]\nenabled = false\n", ""))
        return TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False)


def test_statement_timeout_is_504_and_the_service_goes_on(slow_db, tmp_path):
    with _slow_client(slow_db, tmp_path, "statement_timeout_ms = 300") as c:
        t0 = time.monotonic()
        r = c.post("/v1/chart", json=SLOW_BODY)
        took = time.monotonic() - t0
        p = _problem(r, 504)
        assert p["source"] == "slow" and "300 ms" in p["detail"]
        assert took < 5.0, took  # interrupted, not run to the end
        # the interrupted cursor is usable again
        r = c.post("/v1/chart", json={"source": "slow", "channels": {"x": {"column": "a"}},
                                      "filter_sql": "a < 0"})
        assert r.status_code in (200, 504), r.text
        assert c.get("/healthz").status_code == 200


def test_admission_control_503_with_retry_after(slow_db, tmp_path):
    with _slow_client(slow_db, tmp_path, "max_concurrent = 1\nstatement_timeout_ms = 3000") as c:
        results = {}

        def slow():
            results["slow"] = c.post("/v1/chart", json=SLOW_BODY)

        t = threading.Thread(target=slow)
        t.start()
        deadline = time.monotonic() + 5
        limiter = c.app.state.service.limiter
        while limiter.running("slow") == 0 and time.monotonic() < deadline:
            time.sleep(0.01)
        assert limiter.running("slow") == 1
        r = c.post("/v1/chart", json={"source": "slow", "channels": {"x": {"column": "a"}}})
        p = _problem(r, 503)
        assert r.headers["retry-after"] == "1" and p["source"] == "slow"
        t.join(10)
        assert results["slow"].status_code in (200, 504)
        assert limiter.running("slow") == 0  # the slot is released, also after a timeout


def test_limits_are_validated_in_the_config(tmp_path):
    from app.settings import ConfigError, load_settings

    cfg = tmp_path / "s.toml"
    for bad in ("[limits]\nmax_inlist = 3\n", "[limits]\nmax_concurrent = 0\n",
                "[limits]\nstatement_timeout_ms = -1\n"):
        cfg.write_text(fx.config(tmp_path / "x.duckdb") + bad)
        with pytest.raises(ConfigError) as e:
            load_settings(cfg, environ={})
        assert "limits." in str(e.value)
    cfg.write_text(fx.config(tmp_path / "x.duckdb", extra="max_concurrent = 0\n"))
    with pytest.raises(ConfigError):
        load_settings(cfg, environ={})


def test_duckdb_memory_limit_and_threads_from_config(db, tmp_path):
    with _client(db, tmp_path, 'memory_limit = "256MB"\nthreads = 1\n[server]\nrequest_log = false\n') as c:
        assert c.post("/v1/chart", json=BASE).status_code == 200
        eng = c.app.state.catalog.engine("deliveries")
        row = eng.fetch_row("SELECT current_setting('threads') AS t, current_setting('memory_limit') AS m")
        assert row["t"] == 1 and row["m"].startswith("244")  # 256 MB = 244.1 MiB


def test_postgres_statement_timeout_is_504(tmp_path):
    """PostgreSQL enforces the source's statement_timeout_ms itself; the answer is the same
    504 problem+json (checked on the machine's server with a throwaway view)."""
    why = fx.postgres_up()
    if why is not None:
        pytest.skip(f"PostgreSQL is not reachable on 127.0.0.1:5432: {why}")
    try:
        from app.engines import postgres  # noqa: F401
    except ImportError:
        pytest.skip("app/engines/postgres.py is not there")
    import os

    import psycopg
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    view = f"sluice_slow_{os.getpid()}"
    with psycopg.connect(fx.PG_DSN, autocommit=True) as con:
        con.execute(f'CREATE OR REPLACE VIEW "{view}" AS SELECT (x * 7 + y) % 1000 AS a, x * y AS b '
                    "FROM generate_series(1, 30000) x, generate_series(1, 30000) y")
    try:
        cfg = tmp_path / "s.toml"
        cfg.write_text(f'[sources.slowpg]\nengine = "postgres"\ndsn = "{fx.PG_DSN}"\ntable = "{view}"\n'
                       "statement_timeout_ms = 300\n[server]\nrequest_log = false\n"
                       "[cache]\nenabled = false\n")
        with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
            t0 = time.monotonic()
            r = c.post("/v1/chart", json={"source": "slowpg", "channels": {
                "x": {"column": "a"}, "y": {"agg": "count_distinct", "column": "b"}}})
            assert time.monotonic() - t0 < 20
            p = _problem(r, 504)
            assert p["source"] == "slowpg"
    finally:
        with psycopg.connect(fx.PG_DSN, autocommit=True) as con:
            con.execute(f'DROP VIEW IF EXISTS "{view}"')


@pytest.mark.parametrize("stage", ["plan", "shape"])
def test_the_deadline_covers_planning_and_shaping(db, tmp_path, monkeypatch, stage):
    """statement_timeout_ms bounds the whole request, not each statement: a planning (or
    shaping) step that outlasts it -- slowed here with a sleep around the real step -- ends
    in the 504, not in a late 200 (the statements themselves take milliseconds)."""
    import app.service as service_mod

    real = service_mod.prepare if stage == "plan" else service_mod.ChartService._shape

    def slow(*a, **kw):
        time.sleep(1.2)
        return real(*a, **kw)

    body = {"source": "deliveries", "channels": {"x": {"column": "fee", "bin": {"bins": 5}},
                                                 "y": {"agg": "count"}}}
    with _client(db, tmp_path, "statement_timeout_ms = 1000\n[server]\nrequest_log = false\n"
                 "[cache]\nenabled = false\n") as c:
        for attempt in range(3):  # warm (first open and imports); then well inside 1 s
            r = c.post("/v1/chart", json=body)
        assert r.status_code == 200 and sum(r.json()["data"]["count"]) == fx.N
        if stage == "plan":
            monkeypatch.setattr(service_mod, "prepare", slow)
        else:
            monkeypatch.setattr(service_mod.ChartService, "_shape", slow)
        other = {**body, "where": [{"column": "fee", "gte": 0}]}  # not planned before (PlanCache)
        p = _problem(c.post("/v1/chart", json=other), 504)
        assert p["source"] == "deliveries" and "1000 ms" in p["detail"]
        monkeypatch.undo()
        r = c.post("/v1/chart", json=body)  # the same request, unslowed: answered again
        assert r.status_code == 200 and sum(r.json()["data"]["count"]) == fx.N


# ---- the alarms statement timeouts use (app/deadline.after) ------------------------------

def test_alarms_fire_in_time_order_and_a_cancelled_one_never_does():
    """``deadline.after`` keeps the contract of the ``threading.Timer`` it replaces (Python
    library reference, threading.Timer): the function runs once after the interval unless
    cancelled first; cancelling after it fired changes nothing."""
    import threading
    import time

    from app import deadline

    got: list[tuple[str, float]] = []
    done = threading.Event()
    t0 = time.monotonic()

    def note(name: str) -> None:
        got.append((name, time.monotonic() - t0))
        if name == "last":
            done.set()

    late = deadline.after(0.30, note, "last")
    first = deadline.after(0.05, note, "first")
    gone = deadline.after(0.10, note, "cancelled")
    deadline.after(0.15, note, "second")
    gone.cancel()
    gone.cancel()  # twice: still one cancelled alarm
    assert done.wait(5)
    assert [n for n, _ in got] == ["first", "second", "last"]
    assert all(at >= due for (_, at), due in zip(got, (0.05, 0.15, 0.30)))
    assert first.fired and late.fired and not gone.fired and gone.cancelled
    late.cancel()  # after it fired: nothing happens
    assert late.fired and not late.cancelled


def test_a_blocking_alarm_holds_up_no_other_and_cancelled_ones_do_not_pile_up():
    """A cancel that blocks (a PostgreSQL cancel request to a silent server) runs on a thread
    of its own; thousands of cancelled statements leave no heap behind."""
    import threading
    import time

    from app import deadline

    release, second = threading.Event(), threading.Event()
    deadline.after(0.01, release.wait, 10)  # blocks for up to 10 s
    deadline.after(0.05, second.set)
    t0 = time.monotonic()
    assert second.wait(5) and time.monotonic() - t0 < 2
    release.set()
    before = deadline._ALARMS.armed()
    for _ in range(5000):
        deadline.after(600, print).cancel()
    assert deadline._ALARMS.armed() == before
    assert len(deadline._ALARMS._heap) < before + 200
