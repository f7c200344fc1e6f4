"""Operations: probes, metrics, the preview page and documentation that works offline.

* ``/healthz`` (liveness, async, no I/O) and ``/readyz`` (readiness with its own deadline and
  shared cached checks, ``app.probes``); ``/metrics`` (Prometheus text, ``app.observability``);
* ``/``: the preview page, with its files under ``/static`` (app/static);
* ``/docs`` (Swagger UI) and ``/redoc``: FastAPI's pages, with their JavaScript and CSS served
  from the installed ``fastapi-offline`` package under ``/docs-assets`` instead of a CDN (the
  app is created with ``docs_url=None`` so these replace FastAPI's CDN-backed defaults);
* ``/problems/<slug>``: one short page per problem ``type`` (RFC 9457 section 3.1.1: the
  type URI should resolve to documentation for humans), from ``app.problems.PROBLEM_TYPES``;
  ``/problems`` lists them.

``router`` holds the routes; ``mounts()`` the two static file folders.
"""

from __future__ import annotations

import html
from pathlib import Path

from fastapi import APIRouter, Request
from fastapi.openapi.docs import get_redoc_html, get_swagger_ui_html
from starlette.responses import FileResponse, HTMLResponse, Response
from starlette.routing import Mount
from starlette.staticfiles import StaticFiles

from app import answers, auth
from app.answers import JSONResponse
from app.problems import PROBLEM_TYPES, Problem

STATIC_DIR = Path(__file__).with_name("static")  # the preview page (app/static)
ASSETS = "/docs-assets"

router = APIRouter(tags=["operations"])


@router.get("/healthz", response_model=None,
            responses=answers.ok(answers.Health, "The process is up"))
async def healthz() -> Response:
    """Liveness: the process is up and answering. An async route doing no I/O, so it
    never waits for a worker thread behind running queries (app.probes)."""
    return JSONResponse({"status": "ok"})


@router.get("/readyz", response_model=None,
            responses={**answers.ok(answers.Readiness, "Every source answers"),
                       503: {"model": answers.Readiness, "description": "A source does not"}})
async def readyz(request: Request) -> Response:
    """Readiness: every configured source answers; 503 with per-source detail if not.
    Answers within ``ready_timeout_s``; checks are shared and cached (app.probes)."""
    st = request.app.state
    ok, detail = await st.readiness.report(st.catalog.names())
    detail = {k: v for k, v in detail.items() if auth.allowed(k)}  # no key: no names
    for k in [k for k in detail if auth.rows_for(k) is not None]:  # a key's rows: no total
        detail[k] = {n: v for n, v in detail[k].items() if n != "row_count"}
    return JSONResponse({"ready": ok, "sources": detail}, status_code=200 if ok else 503)


@router.get("/metrics", response_class=Response,
            responses={200: {"description": "Prometheus text exposition format 0.0.4",
                             "content": {"text/plain": {"schema": {"type": "string"}}}}})
def metrics_text(request: Request) -> Response:
    """Prometheus text exposition of this app's metrics (with keys configured: operator
    keys only, app.auth)."""
    body, ctype = request.app.state.metrics.render()
    return Response(body, media_type=ctype)


@router.get("/", include_in_schema=False)
def preview() -> Response:
    return FileResponse(STATIC_DIR / "index.html", media_type="text/html")


def assets_dir() -> Path:
    """Swagger UI and ReDoc bundles shipped inside the fastapi-offline wheel (PyPI)."""
    import fastapi_offline

    return Path(fastapi_offline.__file__).with_name("static")


@router.get("/docs", response_class=HTMLResponse, include_in_schema=False)
def docs() -> HTMLResponse:
    return get_swagger_ui_html(openapi_url="/openapi.json", title="sluice — API",
                               swagger_js_url=f"{ASSETS}/swagger-ui-bundle.js",
                               swagger_css_url=f"{ASSETS}/swagger-ui.css",
                               swagger_favicon_url=f"{ASSETS}/favicon.png")


@router.get("/redoc", response_class=HTMLResponse, include_in_schema=False)
def redoc() -> HTMLResponse:
    return get_redoc_html(openapi_url="/openapi.json", title="sluice — API",
                          redoc_js_url=f"{ASSETS}/redoc.standalone.js",
                          redoc_favicon_url=f"{ASSETS}/favicon.png", with_google_fonts=False)


_PAGE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>body{{font:16px/1.5 system-ui,sans-serif;max-width:42em;margin:2em auto;padding:0 1em}}
code{{background:#f3f3f3;padding:0 .2em}}</style></head>
<body>{body}</body></html>
"""


def _inline_code(text: str) -> str:
    parts = html.escape(text).split("`")
    return "".join(f"<code>{p}</code>" if i % 2 else p for i, p in enumerate(parts))


@router.get("/problems", response_class=HTMLResponse, include_in_schema=False)
def problems_index() -> HTMLResponse:
    items = "".join(f'<li><a href="/problems/{s}">{html.escape(s)}</a> — {html.escape(t)} '
                    f"({html.escape(st)})</li>" for s, (t, st, _) in sorted(PROBLEM_TYPES.items()))
    body = ("<h1>sluice problem types</h1><p>Error answers are "
            "<code>application/problem+json</code> (RFC 9457); their <code>type</code> is one "
            f"of these.</p><ul>{items}</ul>")
    return HTMLResponse(_PAGE.format(title="sluice problem types", body=body))


@router.get("/problems/{slug}", response_class=HTMLResponse, include_in_schema=False)
def problem_page(slug: str) -> HTMLResponse:
    entry = PROBLEM_TYPES.get(slug)
    if entry is None:
        raise Problem(404, "not-found", "Not found", f"no problem type {slug[:80]!r}; "
                      "see /problems")
    title, status, text = entry
    body = (f"<h1>{html.escape(title)}</h1><p>HTTP status {html.escape(status)} · type "
            f"<code>/problems/{html.escape(slug)}</code></p><p>{_inline_code(text)}</p>"
            "<p>The answer is <code>application/problem+json</code> (RFC 9457): "
            "<code>detail</code> says what happened, <code>pointer</code> (RFC 6901) names the "
            "request member at fault. <a href=\"/problems\">All problem types</a> · "
            "<a href=\"/docs\">API documentation</a></p>")
    return HTMLResponse(_PAGE.format(title=html.escape(title), body=body))


def mounts() -> list[Mount]:
    """The static folders: the preview page's files and the docs pages' assets."""
    return [Mount("/static", StaticFiles(directory=STATIC_DIR), name="static"),
            Mount(ASSETS, StaticFiles(directory=assets_dir()), name="docs-assets")]
