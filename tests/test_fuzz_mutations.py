"""Mutation fuzzing: valid chart requests, broken in 1-4 places by Hypothesis (a member
dropped, nulled, retyped, replaced with an extreme number or hostile text, a list blown up,
an unknown member added, the body cut or not JSON at all), sent to every POST route.

The schemathesis run (tests/test_fuzz.py) explores the OpenAPI schema; this one starts from
requests that work, so the mutants get past validation and into the planner and the engine.
Property: no 5xx, every 4xx is problem+json. ``make test``: 1,000 cases; ``make fuzz``:
``SLUICE_FUZZ_SCALE`` times more. Reproducible (``derandomize=True``).
"""

from __future__ import annotations

import copy
import json
import os

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
SCALE = max(1, int(os.environ.get("SLUICE_FUZZ_SCALE", "1")))

SEEDS = [
    {"channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}},
    {"channels": {"x": {"column": "fee", "bin": {"bins": 20}}, "y": {"agg": "count"}}},
    {"channels": {"x": {"column": "fee", "bin": {"width": 5, "origin": 0, "limits": [0, 100]}},
                  "y": {"agg": "sum", "column": "weight"}}, "empty_bins": "zero"},
    {"channels": {"x": {"column": "distance_km", "bin": {"rule": "fd"}}, "y": {"agg": "avg", "column": "fee"}}},
    {"channels": {"x": {"column": "delivered_at", "bin": {"bins": 30}}, "y": {"agg": "count"},
                  "color": {"column": "vehicle", "top": 2, "other_label": "rest"}}, "stack": "sum"},
    {"channels": {"x": {"column": "delivered_at", "trunc": "week", "tz": "Europe/Berlin"},
                  "y": {"agg": "median", "column": "fee"}}},
    {"channels": {"x": {"column": "delivered_at", "extract": "isodow"}, "y": {"agg": "quantile", "column": "fee", "q": 0.9}}},
    {"channels": {"x": {"column": "region"}, "y": {"agg": "count_distinct", "column": "depot"},
                  "by": [{"column": "express"}]}, "facet": {"row": {"column": "vehicle"}, "max_groups": 3},
     "sort": [{"channel": "y", "desc": True}], "limit": 10},
    {"channels": {"x": {"column": "depot"}, "y": {"agg": "stddev_samp", "column": "fee"}},
     "where": [{"column": "fee", "gte": 1, "lt": 30}, {"any": [{"column": "depot", "in": ["Harbour", "Airport"]},
                                                             {"not": {"column": "express", "eq": True}}]},
               {"column": "delivered_at", "gte": "2026-02-01", "lt": "2026-05-01T00:00:00Z"},
               {"column": "region", "contains": "or", "starts_with": "n"}, {"column": "depot", "is_null": False}]},
    {"channels": {"x": {"column": "vehicle"}, "y": {"agg": "max", "column": "delivered_at"}},
     "filter_sql": "fee > 10 AND depot IN ('North Yard') OR lower(vehicle) LIKE '%bike%'"},
    {"channels": {"y": {"column": "depot"}, "x": {"agg": "sum", "column": "fee"}}, "stack": "fraction"},
    {"channels": {"x": {"column": "fee", "bin": {"bins": 8, "limits": [0, 40]}}, "y": {"agg": "count"},
                  "color": {"column": "region"}}, "stack": "centered", "empty_bins": "null"},
]

HOSTILE_TEXT = ["", " ", "'", "\"", "' OR 1=1 --", "; DROP TABLE canary", "\x00", "\u202e",
                "\U0001f4a3", "a" * 5000, "NaN", "-1", "1e999", "null", "depot", "delivered_at",
                "Europe/Atlantis", "../../etc/passwd", "read_csv('/etc/passwd')", "(other)", "x",
                "_sluice_n", "count", "y_lo", "fee / 0 > 1", "ts"]
EXTREME_NUMBERS = [0, -1, 1, 2**31, 2**63, 2**64, -(2**63) - 1, 10**30, 1e308, -1e308, 5e-324,
                   0.5, -0.0, 1e-300, 10000, 10001, 1_000_001]
ODD_VALUES = [None, True, False, [], {}, [[[]]], {"a": {"b": {"c": None}}}, [None] * 50]


def _paths(node, prefix=()):
    yield prefix
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _paths(v, prefix + (i,))


def _get(node, path):
    for p in path:
        node = node[p]
    return node


def _mutate(body: dict, draw) -> dict:
    body = copy.deepcopy(body)
    for _ in range(draw(st.integers(1, 4))):
        paths = [p for p in _paths(body) if p]
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = _get(body, path[:-1])
        key = path[-1]
        op = draw(st.sampled_from(["drop", "null", "text", "number", "odd", "extra", "grow",
                                   "dup_key_value"]))
        if op == "drop":
            del parent[key]
        elif op == "null":
            parent[key] = None
        elif op == "text":
            parent[key] = draw(st.sampled_from(HOSTILE_TEXT) | st.text(max_size=40))
        elif op == "number":
            parent[key] = draw(st.sampled_from(EXTREME_NUMBERS) | st.integers() | st.floats(allow_nan=False))
        elif op == "odd":
            parent[key] = copy.deepcopy(draw(st.sampled_from(ODD_VALUES)))
        elif op == "extra" and isinstance(parent, dict):
            parent[draw(st.sampled_from(["bins", "colour", "where ", "q", "agg", "__proto__",
                                         "not", "any", "filter_sql"]))] = draw(st.sampled_from(HOSTILE_TEXT))
        elif op == "grow":
            value = parent[key]
            big = isinstance(value, (dict, list)) and len(json.dumps(value)) > 200
            n = draw(st.sampled_from([2, 17] if big else [2, 17, 300, 5000]))
            items = value if isinstance(value, list) else [value]
            parent[key] = [copy.deepcopy(v) for _ in range(n) for v in items][:20000]
        elif op == "dup_key_value" and isinstance(parent, dict):
            parent[key] = copy.deepcopy(body)  # self-similar nesting
    return body


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    root = tmp_path_factory.mktemp("mutations")
    db = root / "m.duckdb"
    fx.build_duckdb(db)
    cfg = root / "sluice.toml"
    cfg.write_text(fx.config(db) + "[server]\nrequest_log = false\n")
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        yield c


STATUSES: dict[int, int] = {}


def _send(client, path: str, content: bytes) -> None:
    r = client.post(path, content=content, headers={"content-type": "application/json"})
    STATUSES[r.status_code] = STATUSES.get(r.status_code, 0) + 1
    assert r.status_code < 500, f"{path} -> {r.status_code}: {r.text[:600]}\nbody: {content[:1500]!r}"
    if r.status_code >= 400:
        assert r.headers["content-type"].startswith("application/problem+json"), r.headers
        assert r.json()["status"] == r.status_code


@settings(max_examples=700 * SCALE, derandomize=True, deadline=None, database=None,
          suppress_health_check=list(HealthCheck))
@given(data=st.data())
def test_mutated_requests_never_5xx(client, data):
    seed = {"source": "deliveries", **data.draw(st.sampled_from(SEEDS))}
    body = _mutate(seed, data.draw)
    path = data.draw(st.sampled_from(["/v1/chart", "/v1/chart", "/v1/chart", "/v1/sql"]))
    _send(client, path, json.dumps(body, allow_nan=True).encode())


@settings(max_examples=150 * SCALE, derandomize=True, deadline=None, database=None,
          suppress_health_check=list(HealthCheck))
@given(data=st.data())
def test_mutated_batches_never_5xx(client, data):
    charts = [_mutate(data.draw(st.sampled_from(SEEDS)), data.draw)
              for _ in range(data.draw(st.integers(1, 4)))]
    body = {"source": "deliveries", "charts": charts}
    if data.draw(st.booleans()):
        body = _mutate(body, data.draw)
    _send(client, "/v1/batch", json.dumps(body, allow_nan=True).encode())


@settings(max_examples=150 * SCALE, derandomize=True, deadline=None, database=None,
          suppress_health_check=list(HealthCheck))
@given(data=st.data())
def test_broken_json_never_5xx(client, data):
    text = json.dumps({"source": "deliveries", **data.draw(st.sampled_from(SEEDS))}).encode()
    how = data.draw(st.sampled_from(["cut", "bytes", "flip", "deep", "nan"]))
    if how == "cut":
        text = text[: data.draw(st.integers(0, len(text)))]
    elif how == "bytes":
        text = data.draw(st.binary(max_size=200))
    elif how == "flip":
        i = data.draw(st.integers(0, len(text) - 1))
        text = text[:i] + bytes([data.draw(st.integers(0, 255))]) + text[i + 1:]
    elif how == "deep":
        n = data.draw(st.sampled_from([100, 1000, 20000, 100000]))
        text = b'{"source":"deliveries","channels":' + b'{"x":' * n + b'1' + b'}' * n + b'}'
    else:
        text = text.replace(b'"count"', b'NaN', 1).replace(b"20", b"Infinity", 1)
    _send(client, data.draw(st.sampled_from(["/v1/chart", "/v1/sql", "/v1/batch"])), text)


def test_statuses_seen():
    # (runs last in this file) no 5xx among all the mutants; counts for SLUICE_FUZZ_REPORT
    assert not [s for s in STATUSES if s >= 500], STATUSES
    path = os.environ.get("SLUICE_FUZZ_REPORT")
    if path and STATUSES:
        with open(path, "a", encoding="utf-8") as f:
            f.write(json.dumps({"op": "mutations (chart, sql, batch, broken JSON)",
                                "cases": sum(STATUSES.values()),
                                "statuses": {str(k): v for k, v in sorted(STATUSES.items())}}) + "\n")
