"""Result cache (app/cache.py): hit/miss, invalidation by data version, LRU by bytes,
single flight."""

from __future__ import annotations

import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import duckdb
import orjson
import pytest
from fastapi.testclient import TestClient

from app.cache import Entry, ResultCache, canonical, open_json, stamp_json
from app.main import create_app
from app.settings import load_settings
from planner.model import ChartRequest

HIST = {"source": "t", "channels": {"x": {"column": "v", "bin": {"bins": 10}}, "y": {"agg": "count"}}}


def _make_db(path: Path, n: int) -> None:
    tmp = path.with_name(path.name + ".tmp")
    if tmp.exists():
        tmp.unlink()
    con = duckdb.connect(str(tmp))
    con.execute(f"CREATE TABLE t AS SELECT range::DOUBLE AS v, (range % 3)::VARCHAR AS c FROM range({n})")
    con.execute("CHECKPOINT")
    con.close()
    os.replace(tmp, path)  # a new file identity, as `make demo` produces


@pytest.fixture()
def app_client(tmp_path):
    db = tmp_path / "t.duckdb"
    _make_db(db, 1000)
    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.t]\nengine = "duckdb"\npath = "{db}"\ntable = "t"\n\n'
                   '[cache]\nenabled = true\nmax_bytes = 1000000\n')
    app = create_app(load_settings(cfg))
    with TestClient(app) as c:
        yield c, app, db


def test_miss_then_hit_same_answer(app_client):
    client, app, _ = app_client
    r1 = client.post("/v1/chart", json=HIST)
    r2 = client.post("/v1/chart", json=HIST)
    assert r1.status_code == r2.status_code == 200
    a, b = r1.json(), r2.json()
    assert a["cache"] == "miss" and b["cache"] == "hit"
    for k in ("data", "columns", "bins", "stats", "domains"):
        assert a[k] == b[k]
    assert "lookup" in b["timing_ms"]


def test_key_is_canonical(app_client):
    client, _, _ = app_client
    client.post("/v1/chart", json=HIST)
    # same request: other key order, a default spelled out
    same = {"channels": {"y": {"agg": "count"}, "x": {"bin": {"bins": 10}, "column": "v"}},
            "source": "t", "limit": 10000}
    assert client.post("/v1/chart", json=same).json()["cache"] == "hit"
    other = dict(HIST, limit=5)
    assert client.post("/v1/chart", json=other).json()["cache"] == "miss"


def test_no_cache_header_bypasses_lookup(app_client):
    client, _, _ = app_client
    client.post("/v1/chart", json=HIST)
    r = client.post("/v1/chart", json=HIST, headers={"Cache-Control": "no-cache"})
    assert r.json()["cache"] == "miss"


def test_arrow_answers_are_cached_separately(app_client):
    import pyarrow as pa

    client, _, _ = app_client
    h = {"Accept": "application/vnd.apache.arrow.stream"}
    client.post("/v1/chart", json=HIST)  # the JSON entry does not serve Arrow
    r1 = client.post("/v1/chart", json=HIST, headers=h)
    r2 = client.post("/v1/chart", json=HIST, headers=h)
    m1 = orjson.loads(pa.ipc.open_stream(r1.content).schema.metadata[b"sluice"])
    t2 = pa.ipc.open_stream(r2.content)
    m2 = orjson.loads(t2.schema.metadata[b"sluice"])
    assert (m1["cache"], m2["cache"]) == ("miss", "hit")
    assert t2.read_all().num_rows == 10


def test_invalidated_when_the_duckdb_file_changes(app_client):
    client, _, db = app_client
    a = client.post("/v1/chart", json=HIST).json()
    assert a["stats"]["matched_rows"] == 1000
    assert client.post("/v1/chart", json=HIST).json()["cache"] == "hit"
    _make_db(db, 2000)  # the file is replaced: new inode / size / mtime
    b = client.post("/v1/chart", json=HIST).json()
    assert b["cache"] == "miss"


def test_disabled_cache_always_misses(tmp_path):
    db = tmp_path / "t.duckdb"
    _make_db(db, 100)
    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.t]\nengine = "duckdb"\npath = "{db}"\ntable = "t"\n\n[cache]\nenabled = false\n')
    with TestClient(create_app(load_settings(cfg))) as c:
        assert [c.post("/v1/chart", json=HIST).json()["cache"] for _ in range(2)] == ["miss", "miss"]


def _entry(n: int) -> Entry:
    return Entry(b"x" * n, "application/json", {})


def test_lru_eviction_by_bytes():
    cache = ResultCache(max_bytes=3 * (1000 + 128 + 2) + 10)
    keys = [ResultCache.key(b"r%d" % i, "v") for i in range(4)]
    for k in keys[:3]:
        cache.put(k, _entry(1000 - len(k[0]) - len(k[1]) + 2))
    assert len(cache) == 3
    assert cache.get(keys[0]) is not None  # 0 is now the most recently used
    cache.put(keys[3], _entry(1000 - 2 + 2))
    assert cache.get(keys[1]) is None  # the least recently used went first
    assert cache.get(keys[0]) is not None and cache.get(keys[3]) is not None
    assert cache.nbytes <= cache.max_bytes
    assert cache.evictions >= 1
    cache.put(ResultCache.key(b"huge", "v"), _entry(10 * cache.max_bytes))  # never stored
    assert cache.get(ResultCache.key(b"huge", "v")) is None


def test_single_flight_unit():
    cache = ResultCache(max_bytes=10_000)
    runs = []
    gate = threading.Event()

    def slow() -> Entry:
        runs.append(1)
        gate.wait(5)
        return _entry(10)

    key = ResultCache.key(b"same", "v")
    with ThreadPoolExecutor(8) as pool:
        futs = [pool.submit(cache.compute, key, "s", slow) for _ in range(8)]
        time.sleep(0.3)
        gate.set()
        states = sorted(f.result()[1] for f in futs)
    assert len(runs) == 1
    assert states.count("miss") == 1 and states.count("hit") == 7


def test_single_flight_errors_reach_every_waiter():
    cache = ResultCache(max_bytes=10_000)
    gate = threading.Event()

    def boom() -> Entry:
        gate.wait(5)
        raise RuntimeError("engine down")

    key = ResultCache.key(b"k", "v")
    with ThreadPoolExecutor(4) as pool:
        futs = [pool.submit(cache.compute, key, "s", boom) for _ in range(4)]
        time.sleep(0.2)
        gate.set()
        errors = [type(f.exception()).__name__ for f in futs]
    assert errors == ["RuntimeError"] * 4
    assert len(cache) == 0


def test_single_flight_through_the_service(app_client):
    client, app, _ = app_client
    engine = app.state.catalog.engine("t")
    calls = []
    real = engine.execute

    def counting(sql, *a, **kw):
        calls.append(sql)
        time.sleep(0.3)  # long enough for every request to arrive while the first runs
        return real(sql, *a, **kw)

    engine.execute = counting
    try:
        with ThreadPoolExecutor(8) as pool:
            resps = list(pool.map(lambda _: client.post("/v1/chart", json=HIST), range(8)))
    finally:
        engine.execute = real
    assert all(r.status_code == 200 for r in resps)
    assert sorted(r.json()["cache"] for r in resps).count("miss") == 1
    main_runs = [s for s in calls if "GROUP BY" in s.upper()]
    assert len(main_runs) == 1, calls


def test_stamp_is_valid_json():
    payload = {"data": {"a": [1, 2]}, "stats": {"n": 1}}
    body = stamp_json(open_json(payload), "hit", {"lookup": 0.1})
    assert orjson.loads(body) == {**payload, "cache": "hit", "timing_ms": {"lookup": 0.1}}


def test_canonical_sorted_and_stable():
    a = ChartRequest.model_validate(HIST)
    b = ChartRequest.model_validate({"channels": {"y": {"agg": "count"},
                                                  "x": {"column": "v", "bin": {"bins": 10}}},
                                     "source": "t"})
    assert canonical(a) == canonical(b)


class _Engine:
    def __init__(self, v: str) -> None:
        self.v = v

    def data_version(self) -> str:
        return self.v


def test_server_sources_expire_after_the_ttl():
    from app.cache import source_version

    eng = _Engine("stats:1")
    a = source_version("postgres", eng, 60, now=1000.0)
    assert source_version("postgres", eng, 60, now=1019.0) == a  # same bucket
    assert source_version("postgres", eng, 60, now=1021.0) != a  # the TTL has passed
    eng.v = "stats:2"
    assert source_version("postgres", eng, 60, now=1000.0) != a  # the data changed
    # file engines: the file identity alone, no expiry
    f = _Engine("ino:size:mtime")
    assert source_version("duckdb", f, 60, now=0.0) == source_version("duckdb", f, 60, now=1e9)
    # ttl_s = 0: never the same key twice
    assert source_version("mysql", eng, 0) != source_version("mysql", eng, 0)


def test_ttl_setting_is_read(tmp_path):
    db = tmp_path / "t.duckdb"
    _make_db(db, 10)
    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.t]\nengine = "duckdb"\npath = "{db}"\ntable = "t"\n\n[cache]\nttl_s = 5\n')
    assert load_settings(cfg).cache["ttl_s"] == 5.0
