"""The OpenAPI document, the offline docs page and the problem type pages.

References: openapi-spec-validator (the OpenAPI 3.1 specification's schema), jsonschema
(JSON Schema 2020-12, the dialect OpenAPI 3.1 uses) to check real answers and the examples
against the documented response schemas, Python's html.parser for the assets the docs page
loads, RFC 3986 reference resolution (urllib.parse.urljoin) for problem ``type`` URIs, and
RFC 9457 section 3.1.1 (a type URI should resolve to human-readable documentation).
"""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urljoin

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    """The demo source (app/demo.py, 5,000 rows) behind the real app."""
    from fastapi.testclient import TestClient

    from app.demo import build_demo
    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path_factory.mktemp("openapi") / "demo.duckdb"
    build_demo(db, rows=5000, progress=False)
    app = create_app(parse_settings({"sources": {"deliveries": {
        "engine": "duckdb", "path": str(db), "table": "deliveries"}},
        "server": {"request_log": False}}, "<openapi>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def doc(client):
    r = client.get("/openapi.json")
    assert r.status_code == 200
    return r.json()


def test_document_validates(doc):
    validator = pytest.importorskip("openapi_spec_validator")
    validator.validate(doc)  # raises on any violation of the OpenAPI 3.1 schema


def _json_schema(doc, ref_or_schema):
    """A response schema as a standalone JSON Schema (components inlined as $defs)."""
    import copy
    import json

    text = json.dumps(ref_or_schema).replace("#/components/schemas/", "#/$defs/")
    out = json.loads(text)
    out["$defs"] = json.loads(json.dumps(doc["components"]["schemas"]).replace(
        "#/components/schemas/", "#/$defs/"))
    return copy.deepcopy(out)


def test_every_route_documents_its_success_answer(doc):
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            ok = {c: r for c, r in op["responses"].items() if c.startswith("2")}
            assert ok, f"{method.upper()} {path}: no 2xx response"
            for code, resp in ok.items():
                content = resp.get("content") or {}
                assert content, f"{method.upper()} {path} {code}: no content"
                for media, body in content.items():
                    assert body.get("schema"), f"{method.upper()} {path} {code} {media}: empty schema"
    chart = doc["paths"]["/v1/chart"]["post"]["responses"]
    assert chart["200"]["content"]["application/json"]["schema"] == {
        "$ref": "#/components/schemas/ChartAnswer"}
    assert {"application/vnd.apache.arrow.stream", "text/csv",
            "application/vnd.apache.parquet"} <= set(chart["200"]["content"])
    assert "406" in chart and "422" in chart
    assert chart["422"]["content"]["application/problem+json"]["schema"] == {
        "$ref": "#/components/schemas/ProblemDetail"}


def test_examples_match_their_schemas(doc):
    jsonschema = pytest.importorskip("jsonschema")
    checked = 0
    for name, schema in doc["components"]["schemas"].items():
        for example in schema.get("examples", []):
            jsonschema.Draft202012Validator(_json_schema(doc, {"$ref": f"#/components/schemas/{name}"})
                                            ).validate(example)
            checked += 1
    assert checked >= 8  # ChartAnswer, ProblemDetail, BatchAnswer, SqlAnswer, SourcesAnswer, SourceDetail, Health, Readiness


@pytest.mark.parametrize("method,path,body,status", [
    ("post", "/v1/chart", {"source": "deliveries", "channels": {
        "x": {"column": "distance_km", "bin": {"bins": 10}}, "y": {"agg": "count"},
        "size": {"agg": "min", "column": "fee"}}}, 200),
    ("post", "/v1/chart", {"source": "deliveries", "channels": {
        "x": {"column": "distanse_km"}}}, 422),
    ("post", "/v1/sql", {"source": "deliveries", "channels": {
        "x": {"column": "vehicle"}, "y": {"agg": "count"}}}, 200),
    ("post", "/v1/batch", {"source": "deliveries", "charts": [
        {"channels": {"x": {"column": "vehicle"}, "y": {"agg": "count"}}},
        {"channels": {"x": {"column": "nope"}}}]}, 200),
    ("get", "/v1/sources", None, 200),
    ("get", "/v1/sources/deliveries", None, 200),
    ("get", "/v1/sources/nope", None, 404),
    ("get", "/healthz", None, 200),
    ("get", "/readyz", None, 200),
])
def test_real_answers_match_the_documented_schema(client, doc, method, path, body, status):
    jsonschema = pytest.importorskip("jsonschema")
    r = getattr(client, method)(path, **({"json": body} if body is not None else {}))
    assert r.status_code == status, r.text
    template = re.sub(r"/v1/sources/[^/]+$", "/v1/sources/{name}", path)
    resp = doc["paths"][template][method]["responses"][str(status)]
    media = r.headers["content-type"].split(";")[0]
    schema = resp["content"][media]["schema"]
    jsonschema.Draft202012Validator(_json_schema(doc, schema)).validate(r.json())


class _Assets(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.urls: list[str] = []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k in ("src", "href") and v:
                self.urls.append(v)


@pytest.mark.parametrize("page", ["/docs", "/redoc"])
def test_docs_pages_load_only_local_assets(client, page):
    r = client.get(page)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    p = _Assets()
    p.feed(r.text)
    assert p.urls, "the page references no assets"
    for url in p.urls:
        assert url.startswith("/") and not url.startswith("//"), f"{page} loads {url}"
        a = client.get(url)
        assert a.status_code == 200, url
    assert "cdn" not in r.text.lower() and "https://" not in r.text  # nothing from elsewhere
    assert "'/openapi.json'" in r.text or '"/openapi.json"' in r.text or "spec-url=\"/openapi.json\"" in r.text


def _slugs_in_source() -> set[str]:
    """Every problem slug the code can answer with (app/ and planner/)."""
    pats = [r'slug="([a-z][a-z-]+)"', r'(?:Problem|__init__)\(\s*\d{3},\s*"([a-z][a-z-]+)"',
            r'_reject\(scope, send, \d{3}, "([a-z][a-z-]+)"', r'\b\d{3}: "([a-z]+-[a-z-]+)"']
    found: set[str] = set()
    for f in [*(REPO / "app").rglob("*.py"), *(REPO / "planner").rglob("*.py")]:
        text = f.read_text()
        for p in pats:
            found.update(re.findall(p, text))
    return found


def test_every_problem_type_resolves_to_a_page(client):
    from app.problems import PROBLEM_TYPES

    raised = _slugs_in_source()
    assert len(raised) >= 15  # the scan finds the code's slugs (it would pass vacuously otherwise)
    assert raised <= set(PROBLEM_TYPES), f"undocumented problem types: {raised - set(PROBLEM_TYPES)}"
    for slug, (title, _, _) in PROBLEM_TYPES.items():
        r = client.get(f"/problems/{slug}")
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html"), slug
        assert title.split()[0] in r.text
    index = client.get("/problems")
    assert index.status_code == 200 and all(f"/problems/{s}" in index.text for s in PROBLEM_TYPES)
    assert client.get("/problems/no-such-problem").status_code == 404


def test_a_real_problem_type_uri_resolves(client):
    r = client.post("/v1/chart", json={"source": "deliveries", "channels": {"x": {"column": "nope"}}})
    assert r.status_code == 422
    base = str(r.request.url)
    page = client.get(urljoin(base, r.json()["type"]))  # RFC 3986 section 5.2 resolution
    assert page.status_code == 200 and "Unknown column" in page.text
