"""Replicas that share answers: three sluice processes (uvicorn, loopback ports, one config)
with ``[cache] url`` pointing at Redis, sprayed by a threaded test client.

Outside references: DuckDB itself, queried directly with hand-written SQL on the same file
(the answers), and each replica's own ``/metrics`` (engine executions:
``sluice_engine_duration_seconds_count``, one per chart that ran on the engine).

The machine's Redis (127.0.0.1:6379) serves the sharing tests (the keys are unique to this
run's fixture file, with a short TTL); the "Redis stopped" test starts its OWN throwaway
redis-server on a free port and kills it — the shared one is never stopped.
"""

from __future__ import annotations

import threading
import time

import duckdb
import pytest

import replica_cluster as rc  # tests/ is on sys.path (no __init__.py)

ROWS = 1_000_000
#: a chart that takes DuckDB a noticeable time on ROWS rows (median and distinct per k)
SLOW = {"source": "s", "channels": {"x": {"column": "k"}, "y": {"agg": "median", "column": "x"},
                                    "size": {"agg": "count_distinct", "column": "x"}}}
CHARTS = [
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "count"}}},
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "sum", "column": "x"}}},
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "max", "column": "k"}}},
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "avg", "column": "x"}},
     "where": [{"column": "k", "lt": 2500}]},
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "min", "column": "x"}},
     "where": [{"column": "x", "gte": 10.0}]},
    {"source": "s", "channels": {"x": {"column": "grp"}, "y": {"agg": "count_distinct", "column": "k"}}},
]
#: the same charts as hand-written SQL (the reference), ordered like sluice's answers
REFERENCE_SQL = [
    "SELECT grp, COUNT(*) FROM t GROUP BY grp ORDER BY grp",
    "SELECT grp, SUM(x) FROM t GROUP BY grp ORDER BY grp",
    "SELECT grp, MAX(k) FROM t GROUP BY grp ORDER BY grp",
    "SELECT grp, AVG(x) FROM t WHERE k < 2500 GROUP BY grp ORDER BY grp",
    "SELECT grp, MIN(x) FROM t WHERE x >= 10.0 GROUP BY grp ORDER BY grp",
    "SELECT grp, COUNT(DISTINCT k) FROM t GROUP BY grp ORDER BY grp",
]
# timeout_ms: a Redis call slower than this counts as Redis being away (the replica backs
# off and computes alone). With 250 ms a chart once ran twice in CI on a loaded 2-core
# machine (a timed-out lease extension is the likely cause); the replicas share one local
# Redis here, so 2 s is no real outage
SHARED = {"shared_ttl_s": 300, "lock_ms": 1500, "wait_ms": 30000, "timeout_ms": 2000}


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    root = tmp_path_factory.mktemp("replicas")
    db = root / "replicas.duckdb"
    rc.make_duckdb(db, ROWS)
    con = duckdb.connect(str(db), read_only=True)
    refs = [con.execute(q).fetchall() for q in REFERENCE_SQL]
    con.close()
    return root, db, refs


def machine_redis() -> str:
    if not rc.port_open(6379):
        pytest.skip("no Redis on 127.0.0.1:6379 (.ci/services.sh starts one)")
    return "redis://127.0.0.1:6379/0"


@pytest.fixture(scope="module")
def trio(data):
    root, db, _ = data
    cfg = rc.write_config(root / "shared.toml", db, machine_redis(), **SHARED)
    reps = rc.Replicas(cfg, 3, root).start()
    yield reps
    reps.stop()


def check(answer: dict, ref: list[tuple]) -> None:
    """A chart answer equals DuckDB's own rows for the same question (floats to 1e-9)."""
    cols = [c["name"] for c in answer["columns"]]
    got = list(zip(*(answer["data"][c] for c in cols)))
    assert len(got) == len(ref), (got, ref)
    for g, w in zip(got, ref):
        assert g[0] == w[0]
        assert abs(g[1] - w[1]) <= 1e-9 * max(1.0, abs(w[1])), (g, w)


def spray(ports: list[int], bodies: list[dict], per_body: int) -> list[tuple[int, dict, int]]:
    """``per_body`` identical requests for each body, all released at once, spread round
    robin over the replicas; (status, answer, body index) for each."""
    jobs = [(i, n) for i in range(len(bodies)) for n in range(per_body)]
    out: list = [None] * len(jobs)
    barrier = threading.Barrier(len(jobs))

    def one(j: int, i: int, n: int) -> None:
        barrier.wait()
        s, a = rc.post(ports[(j + n) % len(ports)], bodies[i])
        out[j] = (s, a, i)

    threads = [threading.Thread(target=one, args=(j, i, n)) for j, (i, n) in enumerate(jobs)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    return out


def test_identical_concurrent_requests_run_once_across_replicas(trio):
    before = trio.executions()
    waits = trio.events("shared_wait")
    results = spray(trio.ports, [SLOW], 24)
    assert all(s == 200 for s, _, _ in results), [a for s, a, _ in results if s != 200][:2]
    assert trio.executions() - before == 1  # 24 requests, 3 replicas, one engine execution
    # the other replicas really waited on the lease (not just found a finished answer)
    assert trio.events("shared_wait") > waits
    first = results[0][1]["data"]
    assert all(a["data"] == first for _, a, _ in results)
    # reference: DuckDB's own median / count distinct per k
    con = duckdb.connect(str(trio.config.parent / "replicas.duckdb"), read_only=True)
    ref = con.execute("SELECT k, median(x), COUNT(DISTINCT x) FROM t GROUP BY k ORDER BY k").fetchall()
    con.close()
    assert first["k"] == [r[0] for r in ref]
    assert all(abs(a - b[1]) < 1e-9 for a, b in zip(first["median_x"], ref))
    assert first["count_distinct_x"] == [r[2] for r in ref]


def test_mixed_requests_run_once_each_and_are_correct(trio, data):
    _, _, refs = data
    before = trio.executions()
    results = spray(trio.ports, CHARTS, 6)
    assert all(s == 200 for s, _, _ in results)
    assert trio.executions() - before == len(CHARTS)  # one execution per distinct request
    for _, a, i in results:
        check(a, refs[i])


def test_replica_killed_loses_nothing(trio, data):
    """A replica dies while it holds the lease of a slow chart: the request another replica
    is waiting on is answered (its lease ran out, it ran the chart), and every answer the
    dead replica stored is still served by the others from Redis, without the engine."""
    _, _, refs = data
    doomed, other = trio.ports[0], trio.ports[1]
    heavy = {**SLOW, "channels": {**SLOW["channels"], "color": {"column": "grp"}}}
    for attempt in range(5):  # until the kill lands while the leader is still computing
        slow = {**heavy, "where": [{"column": "x", "gt": 1.0 + attempt}]}  # a fresh key
        out: dict = {}
        waits = rc.metric(other, "sluice_cache_events_total", event="shared_wait")
        t = threading.Thread(target=lambda: _quiet(lambda: out.update(leader=rc.post(doomed, slow))))
        t.start()
        time.sleep(0.1)  # the leader takes the lease
        waiter = threading.Thread(target=lambda: out.update(waiter=rc.post(other, slow)))
        waiter.start()
        deadline = time.monotonic() + 5
        while rc.metric(other, "sluice_cache_events_total", event="shared_wait") == waits \
                and time.monotonic() < deadline and "leader" not in out:
            time.sleep(0.02)
        if "leader" not in out:
            break
        waiter.join(60)  # the leader was quicker than the kill: try a fresh key
    else:
        pytest.fail("the slow chart always finished before the kill")
    trio.kill(0)
    waiter.join(60)
    t.join(5)
    assert "leader" not in out  # the leader's request died with its replica
    status, answer = out["waiter"]
    assert status == 200, answer
    assert answer["stats"]["result_rows"] > 0
    # it did wait on the dead replica's lease, then ran the chart itself
    assert rc.metric(other, "sluice_cache_events_total", event="shared_wait") == waits + 1
    assert answer["cache"] == "miss"
    # the dead replica's earlier answers are still there (computed only by it: fresh keys)
    fresh = [{**c, "where": [*c.get("where", []), {"column": "id", "gte": 0}]} for c in CHARTS]
    before = trio.executions()
    for c in fresh:
        s, _ = rc.post(trio.ports[2], c)
        assert s == 200
    base = trio.executions()
    assert base - before == len(fresh)
    trio.kill(2)  # the replica that computed them dies too
    ran = rc.metric(other, "sluice_engine_duration_seconds_count", source="s")
    for c, ref in zip(fresh, refs):
        s, a = rc.post(other, c)
        assert s == 200 and a["cache"] == "hit"
        check(a, ref)
    assert rc.metric(other, "sluice_engine_duration_seconds_count", source="s") == ran


def _quiet(fn):
    try:
        fn()
    except OSError:  # the killed replica's connection
        pass


def test_redis_stopped_answers_stay_correct_and_sharing_comes_back(data):
    root, db, refs = data
    if rc.RedisServer.binary() is None:
        pytest.skip("redis-server is not installed (apt-get install redis-server)")
    redis = rc.RedisServer(root).start()
    cfg = rc.write_config(root / "throwaway.toml", db, redis.url, **SHARED)
    reps = rc.Replicas(cfg, 3, root).start()
    try:
        results = spray(reps.ports, CHARTS[:3], 3)
        assert all(s == 200 for s, _, _ in results)
        assert reps.executions() == 3
        # a frozen Redis (accepts connections, never answers): the 250 ms socket timeouts
        redis.freeze()
        t0 = time.monotonic()
        results = spray(reps.ports, CHARTS[2:4], 3)
        assert all(s == 200 for s, _, _ in results), [a for s, a, _ in results if s != 200][:2]
        for _, a, i in results:
            check(a, refs[2 + i])
        assert time.monotonic() - t0 < 15
        assert reps.events("shared_error") >= 1
        redis.stop()  # and then gone
        t0 = time.monotonic()
        results = spray(reps.ports, CHARTS, 3)  # known ones (local hits or recomputed), new ones
        took = time.monotonic() - t0
        assert all(s == 200 for s, _, _ in results), [a for s, a, _ in results if s != 200][:2]
        for _, a, i in results:
            check(a, refs[i])
        assert took < 20, took  # no request waited on the dead Redis for long
        assert any("local cache only" in reps.log(i) for i in range(3))
        # Redis back on the same port: the replicas use it again by themselves (back-off)
        redis = rc.RedisServer(root, redis.port).start()
        stores = reps.events("shared_store")
        deadline = time.monotonic() + 40
        n = 0
        while reps.events("shared_store") == stores and time.monotonic() < deadline:
            n += 1
            body = {**CHARTS[0], "where": [{"column": "k", "gte": n}]}
            for p in reps.ports:
                assert rc.post(p, body)[0] == 200
            time.sleep(0.5)
        assert reps.events("shared_store") > stores
        assert any("reachable again" in reps.log(i) for i in range(3))
    finally:
        reps.stop()
        redis.stop()


# ---- the shared cache itself (in-process, no replicas) ---------------------------------------

def test_shared_values_are_zlib_compressed_with_ttl_and_size_cap():
    """What lands in Redis: zlib data (RFC 1950, decompressed here by Python's zlib) holding
    the answer bytes, with a TTL; a value over the cap is not stored at all."""
    import os
    import uuid
    import zlib

    import redis as redis_py

    from app.shared_cache import PREFIX, SharedCache, digest

    url = machine_redis()
    sc = SharedCache(url, shared_ttl_s=60, shared_max_value_bytes=4000)
    raw = redis_py.Redis.from_url(url)
    key = (b'{"test":"' + uuid.uuid4().hex.encode() + b'"}', "v1", "json")
    body = b'{"data":{"grp":[' + b'"north","south","east","west",' * 2000 + b'"x"]}'
    assert sc.put(key, body, "application/json", {"execute": 1.5})
    name = PREFIX + "answer:" + digest(key)
    try:
        value = raw.get(name)
        assert body in zlib.decompress(value)  # reference: zlib itself
        assert len(value) * 10 < len(body)      # repetitive JSON shrinks (here > 10x)
        assert 0 < raw.pttl(name) <= 60_000
        assert sc.get(key) == (body, "application/json", {"execute": 1.5})
        big = (key[0] + b"big", "v1", "json")
        assert not sc.put(big, os.urandom(8000), "application/json", {})  # incompressible
        assert raw.exists(PREFIX + "answer:" + digest(big)) == 0
    finally:
        raw.delete(name)


def test_unreachable_redis_costs_one_timeout_then_backs_off(caplog):
    """A Redis that is not there: the first call fails within the socket timeout and logs
    once; calls during the back-off do not touch the network at all."""
    import logging

    from app.shared_cache import SharedCache

    sc = SharedCache(f"redis://127.0.0.1:{rc.free_port()}/0", timeout_ms=200)
    key = (b"{}", "v", "json")
    with caplog.at_level(logging.WARNING, logger="sluice.shared_cache"):
        t0 = time.monotonic()
        assert sc.get(key) is None
        assert sc.lease(key) is None and not sc.put(key, b"{}", "application/json", {})
        assert time.monotonic() - t0 < 1.0
    assert sc.errors == 1 and not sc.up  # the later calls were skipped (back-off)
    assert sum("local cache only" in r.getMessage() for r in caplog.records) == 1
