"""API fuzzing with schemathesis: cases generated from the app's own OpenAPI document, sent to
``create_app`` over a small fixture DuckDB. The one property: no answer is ever 5xx, and
every 4xx is ``application/problem+json`` (RFC 9457) with a status that matches.

Generation is steered so it reaches the planner and the engine, not only the validator:
``source`` is usually the real one and ``column`` members are usually real column names
(``_steer``); negative cases (bodies that break the schema) are sent too.

Runs are reproducible (``derandomize=True``). ``make test`` runs ~1,400 schemathesis cases
here and 1,000 mutation cases in tests/test_fuzz_mutations.py; ``make fuzz`` runs
``SLUICE_FUZZ_SCALE`` (default 8) times more of both. ``SLUICE_FUZZ_REPORT=FILE`` appends the
case and status counts per operation to FILE.
"""

from __future__ import annotations

import os

import pytest

schemathesis = pytest.importorskip("schemathesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from schemathesis import GenerationMode  # noqa: E402


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
SCALE = max(1, int(os.environ.get("SLUICE_FUZZ_SCALE", "1")))
COLUMNS = ["id", "depot", "vehicle", "region", "fee", "distance_km", "weight", "express",
           "delivered_at"]
SEEN: dict[str, dict[int, int]] = {}  # operation -> status -> count (reported at the end)
SKIPPED: dict[str, int] = {}


@pytest.fixture(scope="module")
def schema(tmp_path_factory):
    from app.main import create_app
    from app.settings import load_settings

    root = tmp_path_factory.mktemp("fuzz")
    db = root / "fuzz.duckdb"
    fx.build_duckdb(db)
    cfg = root / "sluice.toml"
    # small caps so limits are reached; a short statement timeout; the cache off, so every
    # case really runs
    cfg.write_text(fx.config(db) + "[server]\nrequest_log = false\nmax_limit = 5000\n"
                   "[limits]\nstatement_timeout_ms = 20000\nmax_concurrent = 64\n")
    from fastapi.testclient import TestClient

    app = create_app(load_settings(cfg, environ={}))
    with TestClient(app, raise_server_exceptions=False) as client:
        sch = schemathesis.openapi.from_asgi("/openapi.json", app)
        sch.sluice_client = client  # one long-lived client: cases are sent through it
        yield sch


def _steer(body, draw, depth=0):
    """Point generated bodies at the real source and columns most of the time."""
    if depth > 12:
        return body
    if isinstance(body, dict):
        out = {}
        for k, v in body.items():
            if k == "column" and isinstance(v, str) and draw(st.integers(0, 9)) < 8:
                v = draw(st.sampled_from(COLUMNS))
            elif k == "source" and isinstance(v, str) and draw(st.integers(0, 9)) < 9:
                v = "deliveries"
            elif k == "tz" and isinstance(v, str) and draw(st.integers(0, 9)) < 6:
                v = draw(st.sampled_from(["UTC", "Europe/Berlin", "America/New_York", "Asia/Kolkata"]))
            elif k == "filter_sql" and isinstance(v, str) and draw(st.integers(0, 9)) < 6:
                v = draw(st.sampled_from(FILTERS))
            else:
                v = _steer(v, draw, depth + 1)
            out[k] = v
        return out
    if isinstance(body, list):
        return [_steer(v, draw, depth + 1) for v in body]
    return body


KEY_OPTS = ("bin", "trunc", "extract", "top", "other_label")


def _repair_channel(c: dict, draw, key_only: bool = False) -> None:
    """Make a generated channel meaningful (so the planner and engine are reached)."""
    if key_only:
        c.pop("agg", None)
    if "agg" in c and c["agg"] is not None:
        for k in KEY_OPTS:
            c.pop(k, None)
        if c["agg"] != "count" and not c.get("column"):
            c["column"] = draw(st.sampled_from(COLUMNS))
        if c["agg"] == "quantile":
            c.setdefault("q", 0.5)
            if c["q"] is None:
                c["q"] = 0.5
        else:
            c.pop("q", None)
        c.pop("tz", None)
        return
    c.pop("agg", None)
    c.pop("q", None)
    if not c.get("column"):
        c["column"] = draw(st.sampled_from(COLUMNS))
    given = [k for k in ("bin", "trunc", "extract") if c.get(k) is not None]
    for k in given[1:]:
        c.pop(k)
    b = c.get("bin")
    if isinstance(b, dict):
        methods = [k for k in ("bins", "width", "rule") if b.get(k) is not None]
        for k in methods[1:]:
            b.pop(k)
        if b.get("width") is None:
            b.pop("origin", None)


def _repair(body: dict, draw) -> None:
    ch = body.get("channels")
    if not isinstance(ch, dict):
        return
    for name in ("x", "y", "color", "size", "shape", "opacity"):
        if isinstance(ch.get(name), dict):
            _repair_channel(ch[name], draw)
    for c in ch.get("by") or []:
        if isinstance(c, dict):
            _repair_channel(c, draw, key_only=False)
    if not any(isinstance(ch.get(n), dict) for n in ("x", "y", "color", "size", "shape", "opacity")) \
            and not ch.get("by"):
        ch["x"] = {"column": draw(st.sampled_from(COLUMNS))}
        ch["y"] = {"agg": "count"}
    facet = body.get("facet")
    if isinstance(facet, dict):
        for n in ("row", "col"):
            if isinstance(facet.get(n), dict):
                _repair_channel(facet[n], draw, key_only=True)
        if not any(isinstance(facet.get(n), dict) for n in ("row", "col")):
            body.pop("facet")


FILTERS = ["fee > 10", "depot IN ('North Yard', 'Harbour') AND NOT express", "weight % 3 = 0",
           "fee / weight > 0.5", "lower(vehicle) LIKE '%bike%'", "delivered_at >= '2026-03-01'",
           "depot IS NULL OR region = 'north'", "abs(fee - 12) < round(distance_km, 1)",
           "coalesce(depot, 'x') <> 'x'", "fee BETWEEN 1 AND 5", "fee > 1e300 * 1e300",
           "weight * 9223372036854775807 > 0", "id % 0 = 1", "length(depot) / 0 > 1"]


def _check(case, resp, op: str) -> None:
    if resp.status_code == 422 and os.environ.get("SLUICE_FUZZ_DEBUG"):
        print("422", resp.json().get("pointer"), resp.json().get("detail")[:120])
    SEEN.setdefault(op, {})
    SEEN[op][resp.status_code] = SEEN[op].get(resp.status_code, 0) + 1
    assert resp.status_code < 500, (
        f"{op} answered {resp.status_code}: {resp.text[:800]}\nbody: {str(case.body)[:1500]}\n"
        f"query: {case.query} path: {case.path_parameters}")
    if resp.status_code >= 400:
        ctype = resp.headers.get("content-type", "")
        assert ctype.startswith("application/problem+json"), (op, resp.status_code, ctype)
        assert resp.json()["status"] == resp.status_code


def _run(schema, path: str, method: str, mode: GenerationMode, data, steer: bool = True) -> None:
    from schemathesis.core.errors import InvalidSchema

    try:
        case = data.draw(schema[path][method].as_strategy(generation_mode=mode))
    except InvalidSchema:  # schemathesis cannot mutate this draw (e.g. a fixed-size array)
        SKIPPED[mode.value] = SKIPPED.get(mode.value, 0) + 1
        return
    if steer and isinstance(case.body, dict):
        case.body = _steer(case.body, data.draw)
        if mode == GenerationMode.POSITIVE and data.draw(st.integers(0, 9)) < 7:
            for chart in case.body.get("charts", [case.body]):
                if isinstance(chart, dict):
                    _repair(chart, data.draw)
    if "name" in (case.path_parameters or {}) and data.draw(st.booleans()):
        case.path_parameters = {**case.path_parameters, "name": "deliveries"}
    if "column" in (case.path_parameters or {}) and data.draw(st.integers(0, 9)) < 7:
        case.path_parameters = {**case.path_parameters, "column": data.draw(st.sampled_from(COLUMNS))}
    client = schema.sluice_client
    kw = {"params": case.query or None, "headers": {k: str(v) for k, v in (case.headers or {}).items()}}
    if method == "POST" and case.body is not None:
        if isinstance(case.body, (bytes, bytearray)):
            kw["content"] = bytes(case.body)  # not JSON at all
        else:
            import json

            kw["content"] = json.dumps(case.body, default=repr).encode()
        kw["headers"]["content-type"] = "application/json"
    resp = client.request(method, case.formatted_path, **kw)
    _check(case, resp, f"{method} {path} {mode.value}")


def _settings(n: int):
    return settings(max_examples=n * SCALE, derandomize=True, deadline=None, database=None,
                    suppress_health_check=list(HealthCheck), print_blob=True)


# ---- the cases (counts per make test; make fuzz multiplies them) ------------------------
CASES = {
    ("/v1/chart", "POST", GenerationMode.POSITIVE): 700,
    ("/v1/chart", "POST", GenerationMode.NEGATIVE): 60,
}
#: the other routes run from tests/test_fuzz_routes.py (a second file: xdist spreads files)
ROUTE_CASES = {
    ("/v1/sql", "POST", GenerationMode.POSITIVE): 200,
    ("/v1/sql", "POST", GenerationMode.NEGATIVE): 30,
    ("/v1/batch", "POST", GenerationMode.POSITIVE): 100,
    ("/v1/batch", "POST", GenerationMode.NEGATIVE): 20,
    ("/v1/sources/{name}", "GET", GenerationMode.POSITIVE): 150,
    ("/v1/sources/{name}/columns/{column}", "GET", GenerationMode.POSITIVE): 100,
    ("/v1/sources", "GET", GenerationMode.POSITIVE): 5,
    ("/healthz", "GET", GenerationMode.POSITIVE): 5,
    ("/readyz", "GET", GenerationMode.POSITIVE): 5,
}


def _make_test(path: str, method: str, mode: GenerationMode, n: int):
    @_settings(n)
    @given(data=st.data())
    def run(schema, data):
        _run(schema, path, method, mode, data)

    return run


def check_operation(schema, path, method, mode, n):
    if path not in set(schema.raw_schema.get("paths", {})):
        pytest.skip(f"{path} is not in the OpenAPI document")
    _make_test(path, method, mode, n)(schema)
    op = f"{method} {path} {mode.value}"
    total = sum(SEEN.get(op, {}).values())
    if path in ("/v1/sources", "/healthz", "/readyz"):
        assert total >= 1, op  # no parameters: hypothesis sees one distinct case
    else:
        assert total >= n * SCALE * 0.5, (op, SEEN.get(op))
    assert not [s for s in SEEN.get(op, {}) if s >= 500], SEEN.get(op)
    report(op, SEEN.get(op, {}))


def report(op: str, statuses: dict) -> None:
    """SLUICE_FUZZ_REPORT=FILE: append one JSON line per operation (cases and statuses)."""
    path = os.environ.get("SLUICE_FUZZ_REPORT")
    if path:
        import json

        with open(path, "a", encoding="utf-8") as f:
            f.write(json.dumps({"op": op, "cases": sum(statuses.values()),
                                "statuses": {str(k): v for k, v in sorted(statuses.items())}}) + "\n")


@pytest.mark.parametrize("path,method,mode", list(CASES), ids=[f"{m} {p} {g.value}" for p, m, g in CASES])
def test_no_5xx(schema, path, method, mode):
    check_operation(schema, path, method, mode, CASES[(path, method, mode)])


def test_total_case_count_meets_the_target():
    """schemathesis cases (here and tests/test_fuzz_routes.py) + mutation cases
    (tests/test_fuzz_mutations.py: 700 + 150 + 150) >= 2,000 per make test."""
    with_params = {k: v for k, v in (CASES | ROUTE_CASES).items()
                   if k[0] not in ("/v1/sources", "/healthz", "/readyz")}
    assert sum(with_params.values()) + 700 + 150 + 150 >= 2000  # 2,260
