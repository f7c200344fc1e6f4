"""/healthz, /readyz, /metrics, request ids and the JSON request log."""

from __future__ import annotations

import json
import logging
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from app import observability
from app.main import create_app
from app.settings import parse_settings

HIST = {"source": "deliveries",
        "channels": {"x": {"column": "distance_km", "bin": {"bins": 10}}, "y": {"agg": "count"}}}


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory) -> Path:
    from app.demo import build_demo

    path = tmp_path_factory.mktemp("obs") / "demo.duckdb"
    build_demo(path, rows=5_000, progress=False)
    return path


def make_app(db: Path, **extra_sources):
    sources = {"deliveries": {"engine": "duckdb", "path": str(db), "table": "deliveries"}}
    sources.update(extra_sources)
    return create_app(parse_settings({"sources": sources}, "<test>"))


@pytest.fixture()
def client(demo_db):
    with TestClient(make_app(demo_db), raise_server_exceptions=False) as c:
        yield c


class Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.records: list[dict] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(json.loads(self.format(record)))


@pytest.fixture()
def access_lines():
    log = observability.access_logger()
    h = Lines()
    h.setFormatter(log.handlers[0].formatter)
    log.addHandler(h)
    yield h.records
    log.removeHandler(h)


def samples(text: str) -> dict[tuple, float]:
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def test_healthz(client):
    r = client.get("/healthz")
    assert r.status_code == 200 and r.json() == {"status": "ok"}


def test_readyz_ok_and_per_source_detail(client):
    r = client.get("/readyz")
    assert r.status_code == 200
    d = r.json()["sources"]["deliveries"]
    assert d["ready"] is True and d["row_count"] == 5_000 and d["engine"] == "duckdb"
    assert d["columns"] > 5 and d["check_ms"] >= 0


def test_readyz_names_the_broken_source(demo_db, tmp_path):
    app = make_app(demo_db, gone={"engine": "duckdb", "path": str(tmp_path / "nope.duckdb"),
                                  "table": "t"})
    with TestClient(app) as c:
        r = c.get("/readyz")
    assert r.status_code == 503
    body = r.json()
    assert body["ready"] is False
    assert body["sources"]["deliveries"]["ready"] is True
    assert body["sources"]["gone"]["ready"] is False
    assert "nope.duckdb" in body["sources"]["gone"]["error"]


def test_metrics_after_a_chart(client):
    r = client.post("/v1/chart", json=HIST)
    assert r.status_code == 200
    stats = r.json()["stats"]
    client.get("/v1/sources/nosuch")
    client.get("/no/such/page")
    m = client.get("/metrics")
    assert m.status_code == 200
    assert m.headers["content-type"].startswith("text/plain; version=")
    s = samples(m.text)
    assert s[("sluice_http_request_duration_seconds_count",
              (("method", "POST"), ("route", "/v1/chart"), ("status", "200")))] == 1
    # route templates, not raw paths; unmatched paths share one label
    assert s[("sluice_http_request_duration_seconds_count",
              (("method", "GET"), ("route", "/v1/sources/{name}"), ("status", "404")))] == 1
    assert s[("sluice_http_request_duration_seconds_count",
              (("method", "GET"), ("route", "<unmatched>"), ("status", "404")))] == 1
    assert s[("sluice_engine_duration_seconds_count", (("source", "deliveries"),))] == 1
    assert s[("sluice_rows_scanned_total", (("source", "deliveries"),))] == stats["matched_rows"]
    assert s[("sluice_rows_returned_total", (("source", "deliveries"),))] == stats["result_rows"]
    # the /metrics request itself is in flight while it renders
    assert s[("sluice_http_requests_in_flight", ())] == 1
    # cache series exist at zero before the cache counts anything
    assert s[("sluice_cache_events_total", (("event", "hit"), ("source", "deliveries")))] == 0


def test_cache_counter_handle_counts_into_the_serving_app(demo_db):
    """observability.CACHE_EVENTS, used by app/cache.py, lands in the app serving the request."""
    a, b = make_app(demo_db), make_app(demo_db)  # separate registries: no name clash

    @a.get("/_probe_cache")
    def _probe() -> dict:
        observability.CACHE_EVENTS.labels("deliveries", "hit").inc()
        return {}

    with TestClient(a) as ca, TestClient(b) as cb:
        ca.get("/_probe_cache")
        ca.get("/_probe_cache")
        sa, sb = samples(ca.get("/metrics").text), samples(cb.get("/metrics").text)
    key = ("sluice_cache_events_total", (("event", "hit"), ("source", "deliveries")))
    assert sa[key] == 2 and sb[key] == 0


def test_request_id_kept_or_generated(client):
    r = client.get("/healthz", headers={"X-Request-ID": "trace-42"})
    assert r.headers["x-request-id"] == "trace-42"
    r = client.get("/healthz")
    assert len(r.headers["x-request-id"]) == 32
    # an id that would corrupt logs or headers is replaced
    r = client.get("/healthz", headers={"X-Request-ID": "a b\tc" + "x" * 200})
    assert " " not in r.headers["x-request-id"] and len(r.headers["x-request-id"]) == 32
    # errors carry it too
    r = client.post("/v1/chart", json={"source": "deliveries", "channels": {"x": {"column": "nope"}}},
                    headers={"X-Request-ID": "bad-req-1"})
    assert r.status_code == 422 and r.headers["x-request-id"] == "bad-req-1"


def test_one_json_log_line_per_request(client, access_lines):
    client.post("/v1/chart", json=HIST, headers={"X-Request-ID": "log-me"})
    client.get("/healthz")
    assert len(access_lines) == 2
    line = access_lines[0]
    assert line["method"] == "POST" and line["path"] == "/v1/chart" and line["status"] == 200
    assert line["request_id"] == "log-me" and line["source"] == "deliveries"
    assert isinstance(line["duration_ms"], float) and line["duration_ms"] > 0
    assert "source" not in access_lines[1] and access_lines[1]["status"] == 200


def test_request_log_can_be_switched_off(demo_db, access_lines):
    app = create_app(parse_settings({"server": {"request_log": False}, "sources": {
        "deliveries": {"engine": "duckdb", "path": str(demo_db), "table": "deliveries"}}}, "<test>"))
    with TestClient(app) as c:
        c.get("/healthz")
    assert access_lines == []


def test_unhandled_error_is_a_500_with_the_request_id(demo_db, access_lines):
    app = make_app(demo_db)

    @app.get("/_boom")
    def _boom() -> dict:
        raise RuntimeError("boom")

    with TestClient(app, raise_server_exceptions=False) as c:
        r = c.get("/_boom", headers={"X-Request-ID": "oops-1"})
        s = samples(c.get("/metrics").text)
    assert r.status_code == 500
    assert r.headers["x-request-id"] == "oops-1" and r.json()["request_id"] == "oops-1"
    assert "RuntimeError" not in r.text  # the details stay in the log
    line = next(x for x in access_lines if x["path"] == "/_boom")
    assert line["status"] == 500 and line["request_id"] == "oops-1"
    assert s[("sluice_http_request_duration_seconds_count",
              (("method", "GET"), ("route", "/_boom"), ("status", "500")))] == 1


def test_plain_uvicorn_writes_only_our_json_lines(demo_db, tmp_path):
    """`uvicorn app.main:app` (access log on by default) still logs one line per request."""
    import os
    import socket
    import subprocess
    import sys
    import time

    import httpx

    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.deliveries]\nengine = "duckdb"\npath = "{demo_db}"\ntable = "deliveries"\n')
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    env["SLUICE_CONFIG"] = str(cfg)
    log = tmp_path / "out.log"
    with open(log, "wb") as fh:
        proc = subprocess.Popen([sys.executable, "-m", "uvicorn", "app.main:app", "--port", str(port)],
                                cwd=Path(__file__).resolve().parents[1], env=env, stdout=fh,
                                stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 20
            while True:
                try:
                    httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1, headers={"X-Request-ID": "u-1"})
                    break
                except httpx.HTTPError:
                    assert proc.poll() is None and time.monotonic() < deadline, log.read_text()
                    time.sleep(0.1)
            httpx.post(f"http://127.0.0.1:{port}/v1/chart", json=HIST, timeout=10)
        finally:
            proc.terminate()
            proc.wait(10)
    lines = log.read_text().splitlines()
    ours = [json.loads(x) for x in lines if x.startswith("{")]
    assert [(x["method"], x["path"], x["status"]) for x in ours] == [
        ("GET", "/healthz", 200), ("POST", "/v1/chart", 200)]
    assert ours[0]["request_id"] == "u-1" and ours[1]["source"] == "deliveries"
    assert not any('"GET /healthz HTTP/1.1"' in x for x in lines)  # no uvicorn access line
