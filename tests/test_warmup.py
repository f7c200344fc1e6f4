"""The start-up warm-up (app/warmup.py): it must never stop the service from starting, must
stay within its time budget, and must leave answers unchanged. Its effect on the first
request's planning time is measured by `make bench` (case first_request, bench/RESULTS.md),
not asserted here: timings on a shared machine are not a test.
"""

from __future__ import annotations

import threading
import time
from types import SimpleNamespace

from fastapi.testclient import TestClient

from app.demo import build_demo
from app.main import create_app
from app.settings import load_settings
from app.warmup import _requests, warm_up
from planner.schema import ColumnInfo

HIST = {"source": "deliveries",
        "channels": {"x": {"column": "distance_km", "bin": {"bins": 10}}, "y": {"agg": "count"}}}


def _config(tmp_path, first: str = "") -> object:
    db = tmp_path / "d.duckdb"
    if not db.exists():
        build_demo(db, 2_000, progress=False)
    cfg = tmp_path / "sluice.toml"
    cfg.write_text(first + f'\n[sources.deliveries]\nengine = "duckdb"\npath = "{db}"\n'
                   'table = "deliveries"\n\n[server]\nrequest_log = false\n')
    return load_settings(cfg, environ={})


def test_warm_up_plans_each_engine_kind_once(tmp_path):
    app = create_app(_config(tmp_path))
    report = warm_up(app.state.service)
    assert list(report) == ["duckdb"] and report["duckdb"] > 0
    # every representative request plans, and as ONE statement: no extents statement runs
    # on the source at start-up (only the catalog's describe + row count)
    cols = list(app.state.catalog.entry("deliveries").schema.columns.values())
    with TestClient(app) as c:
        for body in _requests("deliveries", cols):
            r = c.post("/v1/sql", json=body)
            assert r.status_code == 200, r.text
            assert len(r.json()["sql"]) == 1


def test_a_source_that_is_down_does_not_stop_start_up(tmp_path, caplog):
    # the first source by name (a DuckDB file that does not exist) is down: start-up goes on, the
    # next source of that engine kind is warmed instead and answers; the down one answers
    # 503 as it did before the warm-up existed
    gone = f'[sources.a_gone]\nengine = "duckdb"\npath = "{tmp_path / "nope.duckdb"}"\ntable = "t"\n'
    settings = _config(tmp_path, gone)
    import duckdb  # the reference count, before the service opens the file its own way

    con = duckdb.connect(str(tmp_path / "d.duckdb"), read_only=True)
    n = con.execute("SELECT count(distance_km) FROM deliveries").fetchone()[0]
    con.close()
    app = create_app(settings)
    with caplog.at_level("WARNING", logger="sluice"):
        assert list(warm_up(app.state.service)) == ["duckdb"]
    assert any("'a_gone'" in r.getMessage() for r in caplog.records)  # tried, skipped, logged
    with TestClient(app, raise_server_exceptions=False) as c:  # lifespan runs the warm-up
        assert c.get("/healthz").status_code == 200
        r = c.post("/v1/chart", json=HIST)
        assert r.status_code == 200
        # the binned counts add up to the rows with a value (DuckDB's count as reference)
        data = r.json()["data"]
        assert sum(k for k, lo in zip(data["count"], data["x_lo"]) if lo is not None) == n
        assert c.post("/v1/chart", json={**HIST, "source": "a_gone"}).status_code == 503


def test_warm_up_is_bounded_by_its_budget():
    # a catalog that hangs (a warehouse that never answers): warm_up returns after its
    # budget (wall clock, time.monotonic), the daemon thread goes on alone
    release = threading.Event()

    class HangingCatalog:
        def names(self):
            return ["slow"]

        def config(self, name):
            return SimpleNamespace(engine="postgres")

        def entry(self, name):
            release.wait(10)
            raise RuntimeError("gave up")

    t0 = time.monotonic()
    report = warm_up(SimpleNamespace(catalog=HangingCatalog()), budget_s=0.3)
    elapsed = time.monotonic() - t0
    release.set()
    assert report == {} and 0.25 <= elapsed < 3.0


def test_representative_requests_use_only_the_sources_columns():
    cols = [ColumnInfo("t", "timestamptz"), ColumnInfo("v", "double"), ColumnInfo("c", "string")]
    reqs = _requests("s", cols)
    used = set()

    def walk(x):
        if isinstance(x, dict):
            if "column" in x:
                used.add(x["column"])
            for v in x.values():
                walk(v)
        elif isinstance(x, list):
            for v in x:
                walk(v)
    walk(reqs)
    assert used == {"t", "v", "c"} and len(reqs) == 3
    # a table with only text columns still gets a request; one with nothing plannable none
    assert len(_requests("s", [ColumnInfo("c", "string")])) == 1
    assert _requests("s", [ColumnInfo("b", "other")]) == []


def test_warm_up_loads_what_the_first_answer_would(tmp_path):
    """In a fresh process, the warm-up leaves nothing for the first answer to load: the
    modules loaded by answering a time chart after the warm-up are the same as before it
    (pyarrow imports pandas on the first time-zone-aware timestamp: ~300 ms of the first
    answer before, bench/RESULTS.md stop 25)."""
    import subprocess
    import sys
    import textwrap

    _config(tmp_path)  # the demo file
    script = textwrap.dedent(f"""
        import sys
        from app.main import create_app
        from app.settings import load_settings
        from app.warmup import warm_up
        from planner.model import ChartRequest
        app = create_app(load_settings({str(tmp_path / "sluice.toml")!r}, environ={{}}))
        warm_up(app.state.service)
        from planner.values import time_zone_names
        print("zone names read:", time_zone_names.cache_info().currsize)
        before = set(sys.modules)
        svc = app.state.service
        req = ChartRequest.model_validate({{"source": "deliveries", "tz": "Europe/Berlin",
            "channels": {{"x": {{"column": "delivered_at", "trunc": "month"}},
                          "y": {{"agg": "avg", "column": "fee"}}}}}})
        svc.to_json(svc.run(req), wire=True)
        print(sorted(m for m in set(sys.modules) - before if m.split(".")[0] in ("pandas", "pyarrow")))
    """)
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout[-2000:]
    # and the zone names a request's tz is checked against are read already (the first
    # zoned request planned in ~19 ms before, the next in ~5)
    assert "zone names read: 1" in out.stdout, out.stdout[-2000:]
