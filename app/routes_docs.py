"""Documentation routes that work without internet access.

* ``/docs`` (Swagger UI) and ``/redoc``: FastAPI's pages, with their JavaScript and CSS served
  from the installed ``fastapi-offline`` package under ``/docs-assets`` instead of a CDN;
* ``/problems/<slug>``: one short page per problem ``type`` (RFC 9457 section 3.1.1: the
  type URI should resolve to documentation for humans), from ``app.problems.PROBLEM_TYPES``;
  ``/problems`` lists them.

``register(app)`` adds all of it; the app is created with ``docs_url=None`` so these replace
FastAPI's CDN-backed defaults.
"""

from __future__ import annotations

import html
from pathlib import Path

from fastapi import APIRouter, FastAPI
from fastapi.openapi.docs import get_redoc_html, get_swagger_ui_html
from starlette.responses import HTMLResponse
from starlette.staticfiles import StaticFiles

from app.problems import PROBLEM_TYPES, Problem

ASSETS = "/docs-assets"

router = APIRouter(include_in_schema=False)


def assets_dir() -> Path:
    """Swagger UI and ReDoc bundles shipped inside the fastapi-offline wheel (PyPI)."""
    import fastapi_offline

    return Path(fastapi_offline.__file__).with_name("static")


@router.get("/docs", response_class=HTMLResponse)
def docs() -> HTMLResponse:
    return get_swagger_ui_html(openapi_url="/openapi.json", title="sluice — API",
                               swagger_js_url=f"{ASSETS}/swagger-ui-bundle.js",
                               swagger_css_url=f"{ASSETS}/swagger-ui.css",
                               swagger_favicon_url=f"{ASSETS}/favicon.png")


@router.get("/redoc", response_class=HTMLResponse)
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


@router.get("/problems", response_class=HTMLResponse)
def problems_index() -> HTMLResponse:
    items = "".join(f'<li><a href="/problems/{s}">{html.escape(s)}</a> — {html.escape(t)} '
                    f"({html.escape(st)})</li>" for s, (t, st, _) in sorted(PROBLEM_TYPES.items()))
    body = ("<h1>sluice problem types</h1><p>Error answers are "
            "<code>application/problem+json</code> (RFC 9457); their <code>type</code> is one "
            f"of these.</p><ul>{items}</ul>")
    return HTMLResponse(_PAGE.format(title="sluice problem types", body=body))


@router.get("/problems/{slug}", response_class=HTMLResponse)
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


def register(app: FastAPI) -> None:
    app.include_router(router)
    app.mount(ASSETS, StaticFiles(directory=assets_dir()), name="docs-assets")
