"""Abandoned work is stopped (app.sessions): a newer request of the same session supersedes
the older one, and a client that disconnects stops its own statement.

Every check is about counts and order, never about time: requests are sent one after the
other once the previous one holds its session (and at least ~20 ms apart, like the moves of
a brush), and a test waits for an event (a statement started, an interrupt sent) before the
next step. The answer of the one request that runs to the end is checked against the same
aggregate asked of the engine directly through its own driver (duckdb, sqlite3, psycopg,
pymysql), before sluice opens the source.

The slow statement is a throwaway view per engine: DuckDB, a cross join of a generated
range (~6e7 rows); SQLite, a cross join of 3000 rows with itself (9e6); PostgreSQL,
generate_series with pg_sleep per row (lateral); MariaDB, the SEQUENCE engine with SLEEP
per row. Names carry PYTEST_XDIST_WORKER and the process id.
"""

from __future__ import annotations

import hashlib
import json
import os
import socket
import threading
import time

import pytest

import test_fuzz_fixture as fx  # noqa: E402  (pytest puts tests/ on sys.path)

WORKER = os.environ.get("PYTEST_XDIST_WORKER", "main")
VIEW = f"sluice_cancel_{WORKER}_{os.getpid()}"
MYSQL = dict(host="127.0.0.1", port=3306, user="root", database="test")
MYSQL_DSN = "mysql://root@127.0.0.1:3306/test"
KEYS = {"one": "key-one-" + "1" * 24, "two": "key-two-" + "2" * 24}
WAIT_S = 60  # how long a test waits for an event before it fails (never a measured bound)


def _wait(cond, what: str) -> None:
    end = time.monotonic() + WAIT_S
    while not cond():
        assert time.monotonic() < end, f"gave up waiting for {what}"
        time.sleep(0.005)


# ---- the slow source, per engine ---------------------------------------------------------
def _duckdb(root):
    import duckdb

    path = root / "slow.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE n AS SELECT range AS i FROM range(8000)")
    con.execute(f"CREATE VIEW {VIEW} AS SELECT (x.i * 7 + y.i) % 10 AS a, x.i * y.i AS b "
                "FROM n x, n y")
    con.close()

    def reference(sql):
        with duckdb.connect(str(path), read_only=True) as c:
            return c.execute(sql).fetchall()
    return f'engine = "duckdb"\npath = "{path}"\ntable = "{VIEW}"\nthreads = 1\n', reference, None


def _sqlite(root):
    import sqlite3

    path = root / "slow.sqlite"
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE n (a INTEGER, b INTEGER)")  # (a view's columns keep the
    con.executemany("INSERT INTO n VALUES (?, ?)",        # types of plain column references)
                    [(i % 10, i) for i in range(3000)])
    con.execute(f'CREATE VIEW "{VIEW}" AS SELECT x.a AS a, y.b AS b FROM n x, n y')
    con.commit()
    con.close()

    def reference(sql):
        with sqlite3.connect(path) as c:
            return c.execute(sql).fetchall()
    return f'engine = "sqlite"\npath = "{path}"\ntable = "{VIEW}"\n', reference, None


def _postgres(root):
    why = fx.postgres_up()
    if why is not None:
        pytest.skip(f"PostgreSQL is not reachable: {why}")
    import psycopg

    with psycopg.connect(fx.PG_DSN, autocommit=True) as con:
        con.execute(f'CREATE OR REPLACE VIEW "{VIEW}" AS SELECT g % 3 AS a, g AS b '
                    "FROM generate_series(1, 8) g, LATERAL (SELECT pg_sleep(0.1 + 0 * g)) s")

    def reference(sql):
        with psycopg.connect(fx.PG_DSN) as c:
            return c.execute(sql).fetchall()

    def drop():
        with psycopg.connect(fx.PG_DSN, autocommit=True) as c:
            c.execute(f'DROP VIEW IF EXISTS "{VIEW}"')
    return f'engine = "postgres"\ndsn = "{fx.PG_DSN}"\ntable = "{VIEW}"\n', reference, drop


def _mysql(root):
    try:
        import pymysql

        pymysql.connect(**MYSQL, connect_timeout=3).close()
    except Exception as e:  # noqa: BLE001
        pytest.skip(f"MariaDB is not reachable: {e}")

    def run(sql):
        c = pymysql.connect(**MYSQL, autocommit=True)
        try:
            with c.cursor() as cur:
                cur.execute(sql)
                return [tuple(r) for r in cur.fetchall()]
        finally:
            c.close()

    run(f"CREATE OR REPLACE VIEW `{VIEW}` AS SELECT seq % 3 AS a, seq AS b FROM seq_1_to_8 "
        "WHERE SLEEP(0.1) = 0")
    return (f'engine = "mysql"\ndsn = "{MYSQL_DSN}"\ntable = "test.{VIEW}"\n', run,
            lambda: run(f"DROP VIEW IF EXISTS `{VIEW}`"))


@pytest.fixture(scope="module", params=["duckdb", "postgres", "mysql", "sqlite"])
def slow(request, tmp_path_factory):
    root = tmp_path_factory.mktemp(f"cancel_{request.param}")
    source, reference, drop = {"duckdb": _duckdb, "postgres": _postgres, "mysql": _mysql,
                               "sqlite": _sqlite}[request.param](root)
    # the engine's own answer, asked through its driver before sluice opens the source
    quoted = f"`{VIEW}`" if request.param == "mysql" else f'"{VIEW}"'
    expected = {int(a): int(t) for a, t in reference(f"SELECT a, SUM(b) FROM {quoted} GROUP BY a")}
    yield {"engine": request.param, "root": root, "source": source, "expected": expected}
    if drop is not None:
        drop()


@pytest.fixture(scope="module")
def client(slow):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    keys = "".join(f'[[keys]]\nname = "{n}"\nhash = "sha256:{hashlib.sha256(k.encode()).hexdigest()}"'
                   '\nsources = ["slow"]\n' for n, k in KEYS.items())
    cfg = slow["root"] / "sluice.toml"
    # server sources' cache keys hold a time bucket of [cache] ttl_s (default 60 s): a
    # bucket boundary between a warm request and its hit would make the hit a miss, so the
    # bucket here outlasts the test
    cfg.write_text("[sources.slow]\n" + slow["source"] + "statement_timeout_ms = 120000\n"
                   "max_concurrent = 64\n" + keys + "[server]\nrequest_log = false\n"
                   "[cache]\nttl_s = 1000000000\n")
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        c.post("/v1/chart", json=body(-1), headers=key("one"))  # introspection (a COUNT(*))
        yield c


def key(name: str) -> dict[str, str]:
    return {"X-API-Key": KEYS[name]}


def body(i: int, session: str | None = None) -> dict:
    """A chart of the slow view; ``i`` makes each request (and its cache key) its own,
    while every row still matches."""
    out = {"source": "slow", "channels": {"x": {"column": "a"}, "y": {"agg": "sum", "column": "b"}},
           "where": [{"column": "b", "lte": 10 ** 12 + i}]}
    if session is not None:
        out["session"] = session
    return out


def reference(slow) -> dict:
    return slow["expected"]


class Spy:
    """Counts the source engine's statements (started, finished, failed) and the calls of
    the interrupts its ``canceller()`` hands out (the ones app.limits fires)."""

    def __init__(self, engine) -> None:
        self.engine = engine
        self.started = self.finished = self.failed = self.interrupts = 0
        self.lock = threading.Lock()
        self._execute, self._canceller = engine.execute, engine.canceller

        def execute(*a, **kw):
            with self.lock:
                self.started += 1
            try:
                out = self._execute(*a, **kw)
            except Exception:
                with self.lock:
                    self.failed += 1
                raise
            with self.lock:
                self.finished += 1
            return out

        def canceller():
            interrupt = self._canceller()

            def counted():
                with self.lock:
                    self.interrupts += 1
                interrupt()
            return counted

        engine.execute, engine.canceller = execute, canceller

    def close(self) -> None:
        del self.engine.execute, self.engine.canceller


@pytest.fixture
def spy(client):
    s = Spy(client.app.state.catalog.engine("slow"))
    yield s
    s.close()


def _counter(client, name: str, reason: str) -> float:
    m = client.app.state.metrics
    fam = m.abandoned_requests if name == "requests" else m.abandoned_seconds
    return fam.labels("slow", reason)._value.get()


def _problem(r, status: int, slug: str) -> dict:
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    p = r.json()
    assert p["type"] == f"/problems/{slug}" and p["status"] == status
    return p


def _holder(client, name: str, session: str):
    from app import auth

    grant = auth.KeyRing(client.app.state.settings.keys).lookup(KEYS[name])
    return client.app.state.sessions.holder((grant.key, session))


# ---- supersession --------------------------------------------------------------------------
def test_twenty_moves_of_a_brush_only_the_last_answers(client, spy, slow):
    """20 requests of one session, each sent once the one before holds the session and
    ~20 ms after it: the first 19 answer 409 superseded, the last 200 with the engine's own
    answer; only the last statement ran to its end, the others were interrupted."""
    n = 20
    answers: dict[int, object] = {}
    before = _counter(client, "requests", "superseded")
    threads = []
    for i in range(n):
        held = _holder(client, "one", "brush")

        def send(i=i):
            answers[i] = client.post("/v1/chart", json=body(i, "brush"), headers=key("one"))
        t = threading.Thread(target=send)
        t.start()
        threads.append(t)
        time.sleep(0.02)
        _wait(lambda: _holder(client, "one", "brush") not in (None, held) or i in answers,
              f"request {i} to claim its session")
    for t in threads:
        t.join(WAIT_S)
    for i in range(n - 1):
        p = _problem(answers[i], 409, "superseded")
        assert "newer request of the same session" in p["detail"] and p["session"] == "brush"
    last = answers[n - 1]
    assert last.status_code == 200, last.text
    got = last.json()["data"]
    assert dict(zip(got["a"], got["sum_b"])) == reference(slow)
    assert spy.finished == 1  # only the last statement ran to its end
    assert spy.failed == spy.started - 1 and spy.interrupts >= spy.failed
    assert _counter(client, "requests", "superseded") - before == n - 1
    assert _counter(client, "seconds", "superseded") > 0
    assert _holder(client, "one", "brush") is None  # released: nothing left running


def _start_slow(client, spy, name: str, session: str, i: int, out: dict):
    started = spy.started

    def send():
        out[(name, session, i)] = client.post("/v1/chart", json=body(i, session), headers=key(name))
    t = threading.Thread(target=send)
    t.start()
    _wait(lambda: spy.started > started, "the statement to start")
    return t


def test_other_sessions_and_other_keys_do_not_cancel(client, spy, slow):
    """Same session name under another key, and another session under the same key, run
    side by side: all three answer 200 and no interrupt is sent."""
    out: dict = {}
    threads = [_start_slow(client, spy, "one", "tab", 100, out),
               _start_slow(client, spy, "two", "tab", 101, out),
               _start_slow(client, spy, "one", "other-tab", 102, out)]
    for t in threads:
        t.join(WAIT_S)
    ref = reference(slow)
    for r in out.values():
        assert r.status_code == 200, r.text
        assert dict(zip(r.json()["data"]["a"], r.json()["data"]["sum_b"])) == ref
    assert spy.interrupts == 0 and spy.failed == 0 and spy.finished == 3


def test_a_cache_hit_is_unaffected(client, spy, slow):
    """A cached answer is served whatever its session: a hit with the session of a running
    request answers 200 from the cache (and, being newer, supersedes that request); a
    request that waits for another session's identical flight still answers when that
    flight's own request is superseded."""
    warm = client.post("/v1/chart", json=body(200), headers=key("one"))
    assert warm.status_code == 200
    out: dict = {}
    t = _start_slow(client, spy, "one", "dash", 201, out)
    hit = client.post("/v1/chart", json=body(200, "dash"), headers=key("one"))
    assert hit.status_code == 200 and hit.json()["cache"] == "hit"
    assert hit.json()["data"] == warm.json()["data"]
    t.join(WAIT_S)
    _problem(out[("one", "dash", 201)], 409, "superseded")

    # single flight across sessions: the leader (session s1) is superseded; the waiter
    # (session s2, same chart) runs it itself
    leader = _start_slow(client, spy, "one", "s1", 300, out)
    coalesced = client.app.state.cache.coalesced

    def wait_for_it():
        out["waiter"] = client.post("/v1/chart", json=body(300, "s2"), headers=key("one"))
    w = threading.Thread(target=wait_for_it)
    w.start()
    _wait(lambda: client.app.state.cache.coalesced > coalesced, "the second request to wait")
    newer = client.post("/v1/chart", json=body(301, "s1"), headers=key("one"))
    assert newer.status_code == 200, newer.text
    leader.join(WAIT_S)
    w.join(WAIT_S)
    _problem(out[("one", "s1", 300)], 409, "superseded")
    assert out["waiter"].status_code == 200, out["waiter"].text
    assert dict(zip(out["waiter"].json()["data"]["a"],
                    out["waiter"].json()["data"]["sum_b"])) == reference(slow)


def test_a_newer_batch_supersedes_the_older_batch(client, spy, slow):
    """A batch names its session once (the charts inherit it): the older batch answers the
    409 problem as a whole, the newer one 200 with every chart answered."""
    out: dict = {}

    def batch(i):
        return {"source": "slow", "session": "board", "charts": [
            {"channels": body(i)["channels"], "where": body(i)["where"]}]}

    started = spy.started
    t = threading.Thread(target=lambda: out.setdefault(
        "old", client.post("/v1/batch", json=batch(400), headers=key("one"))))
    t.start()
    _wait(lambda: spy.started > started, "the older batch's statement")
    new = client.post("/v1/batch", json=batch(401), headers=key("one"))
    t.join(WAIT_S)
    _problem(out["old"], 409, "superseded")
    assert new.status_code == 200
    (res,) = new.json()["results"]
    assert dict(zip(res["data"]["a"], res["data"]["sum_b"])) == reference(slow)


@pytest.mark.parametrize("bad,where", [("x" * 65, "/session"), ("tab 1", "/session"),
                                       ("", "/session"), ("ü", "/session")])
def test_session_is_validated(client, bad, where):
    r = client.post("/v1/chart", json=body(0, bad), headers=key("one"))
    assert _problem(r, 422, "invalid-request")["pointer"] == where
    r = client.post("/v1/batch", json={"source": "slow", "charts": [
        {"channels": {"x": {"column": "a"}}, "session": bad}]}, headers=key("one"))
    assert _problem(r, 422, "invalid-request")["pointer"] == "/charts/0" + where


# ---- disconnects ---------------------------------------------------------------------------
def test_a_client_that_disconnects_stops_its_statement(slow):
    """Over a real socket (uvicorn): the client sends a slow chart and closes the connection
    once the statement runs; the engine's interrupt is sent, the request is counted as
    disconnected, and the engine answers the next request (its connection/pool is usable)."""
    import uvicorn

    from app.main import create_app
    from app.settings import load_settings

    cfg = slow["root"] / "live.toml"
    cfg.write_text("[sources.slow]\n" + slow["source"] + "statement_timeout_ms = 120000\n"
                   "[server]\nrequest_log = false\n[cache]\nenabled = false\n")
    app = create_app(load_settings(cfg, environ={}))
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    _wait(lambda: server.started, "uvicorn to start")
    try:
        import http.client

        def post(b):
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=WAIT_S)
            try:
                conn.request("POST", "/v1/chart", body=json.dumps(b),
                             headers={"content-type": "application/json"})
                r = conn.getresponse()
                return r.status, json.loads(r.read())
            finally:
                conn.close()

        assert post(body(0))[0] == 200  # introspected, warm
        spy = Spy(app.state.catalog.engine("slow"))
        try:
            data = json.dumps(body(500)).encode()
            sock = socket.create_connection(("127.0.0.1", port))
            sock.sendall(b"POST /v1/chart HTTP/1.1\r\nHost: x\r\nContent-Type: application/json"
                         b"\r\nContent-Length: " + str(len(data)).encode() + b"\r\n\r\n" + data)
            _wait(lambda: spy.started == 1, "the statement to start")
            sock.close()
            m = app.state.metrics
            _wait(lambda: m.abandoned_requests.labels("slow", "disconnected")._value.get() == 1,
                  "the disconnect to be counted")
            _wait(lambda: spy.failed + spy.finished == 1, "the statement to end")
            assert spy.interrupts >= 1 and spy.failed == 1 and spy.finished == 0
            assert m.abandoned_seconds.labels("slow", "disconnected")._value.get() > 0
            status, answer = post(body(501))  # the same engine answers the next request
            assert status == 200 and dict(zip(answer["data"]["a"], answer["data"]["sum_b"])) \
                == reference(slow)
            assert spy.finished == 1
        finally:
            spy.close()
    finally:
        server.should_exit = True
        thread.join(30)


# ---- the registry on its own ---------------------------------------------------------------
def test_the_registry_is_bounded_and_released():
    """At most max_entries (key, session) entries, least recently used dropped; a finished
    request holds nothing; a request that claims after a newer one of its session (it
    arrived first but got there late) is the one stopped; other keys are untouched."""
    from app.sessions import SUPERSEDED, Sessions

    reg = Sessions(max_entries=3)
    works = [reg.work() for _ in range(5)]
    for i, w in enumerate(works):
        reg.claim(("k", f"s{i}"), w)
    assert len(reg) == 3 and reg.running() == 3
    assert reg.holder(("k", "s0")) is None and reg.holder(("k", "s4")) is works[4]
    for w in works:
        w.finish()
    assert len(reg) == 3 and reg.running() == 0  # only sequence numbers are kept

    old, new, other = reg.work(), reg.work(), reg.work()
    reg.claim(("k", "tab"), new)
    reg.claim(("k", "tab"), old)  # older, later: refused
    assert old.reason == SUPERSEDED and new.reason is None
    reg.claim(("k2", "tab"), other)  # same session name, another key
    assert other.reason is None and new.reason is None
    newest = reg.work()
    reg.claim(("k", "tab"), newest)
    assert new.reason == SUPERSEDED and newest.reason is None and other.reason is None
    for w in (old, new, other, newest):
        w.finish()
    assert reg.running() == 0 and len(reg) <= 3
    stopped_after_finish = reg.work()
    stopped_after_finish.finish()
    assert stopped_after_finish.stop(SUPERSEDED) is False  # nothing left to stop
