"""HTTP API. ``uvicorn app.main:app`` serves it; ``create_app(settings)`` builds one.

``create_app`` only assembles: settings -> catalog -> service -> the app's state, its
exception handlers (``app.handlers``), its middleware (``middleware``) and its routes
(``routes``: the routers of one module per noun, ``app.routes_charts``,
``app.routes_sources``, ``app.routes_operations``).
"""

from __future__ import annotations

import sys
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from starlette.middleware import Middleware
from starlette.middleware.cors import CORSMiddleware
from starlette.routing import BaseRoute

from app import (auth, observability, routes_charts, routes_operations, routes_sources,
                 sessions)
from app.cache import ResultCache
from app.catalog import Catalog
from app.compression import CompressionMiddleware
from app.handlers import HANDLERS, engine_problem  # noqa: F401 - engine_problem: public name
from app.limits import BodyLimitMiddleware
from app.probes import Readiness
from app.service import ChartService
from app.settings import ConfigError, Settings, load_settings
from app.warmup import warm_up

#: request headers a page on another origin may send (README: Cache-Control: no-cache to
#: recompute, X-Request-ID to correlate, X-API-Key / Authorization for keys), and response
#: headers it may read
CORS_ALLOW_HEADERS = ["Accept", "Accept-Encoding", "Authorization", "Cache-Control",
                      "Content-Type", "X-API-Key", "X-Request-ID"]
CORS_EXPOSE_HEADERS = ["X-Request-ID", "Retry-After", "X-Sluice-Truncated",
                       "X-Sluice-Approximate"]
#: the routers, in the order their paths appear in the OpenAPI document
ROUTERS = (routes_charts.router, routes_sources.router, routes_operations.router)


def routes() -> list[BaseRoute]:
    """Every router's routes, then the static folders, as one list on the app itself (so
    ``app.routes`` lists every path; FastAPI 0.16x keeps an included router as one entry)."""
    return [*(r for router in ROUTERS for r in router.routes), *routes_operations.mounts()]


def middleware(settings: Settings, metrics: observability.Metrics,
               registry: sessions.Sessions | None = None) -> list[Middleware]:
    """Outermost first: observability times, counts and logs every request (413s and 404s
    included); CORS answers preflights itself; then API keys; the body cap (also chunked
    bodies); each request's work (app.sessions: sessions, disconnects); compression
    innermost, so it sees the final body."""
    cors = getattr(settings, "cors_origins", None)
    return [
        Middleware(observability.ObservabilityMiddleware, metrics=metrics,
                   log_requests=settings.request_log),
        *([Middleware(CORSMiddleware, allow_origins=cors, allow_methods=["GET", "POST"],
                      max_age=600, allow_headers=CORS_ALLOW_HEADERS,
                      expose_headers=CORS_EXPOSE_HEADERS)] if cors else []),
        Middleware(auth.AuthMiddleware, keys=getattr(settings, "keys", None) or []),
        Middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes,
                   body_timeout_s=settings.body_timeout_s),
        Middleware(sessions.WorkMiddleware, registry=registry),  # superseded / client left
        Middleware(CompressionMiddleware),
    ]


@asynccontextmanager
async def lifespan(app: FastAPI):
    warm_up(app.state.service)  # plan once per engine kind: the first request plans warm
    yield
    app.state.catalog.close()


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or load_settings()
    catalog = Catalog(settings)
    service = ChartService(catalog)
    metrics = observability.Metrics()  # one registry per app
    metrics.declare_sources(catalog.names())
    registry = sessions.Sessions()  # the running requests' sessions (app.sessions)
    app = FastAPI(
        title="sluice",
        version="0.1.0",
        summary="Chart requests in, grouped SQL pushed down to the engine, mark-ready tables out.",
        lifespan=lifespan,
        docs_url=None, redoc_url=None,  # offline docs pages: app/routes_operations.py
        exception_handlers=HANDLERS,
        middleware=middleware(settings, metrics, registry),
        routes=routes(),
    )
    st: Any = app.state  # what the routes read (request.app.state)
    st.settings, st.catalog, st.service, st.metrics = settings, catalog, service, metrics
    st.sessions = registry
    st.cache = ResultCache.from_config(getattr(settings, "cache", None) or {})  # + Redis
    st.readiness = Readiness(catalog, settings.ready_timeout_s, settings.ready_ttl_s)
    return app


def _lazy_app() -> FastAPI:
    try:
        return create_app()
    except ConfigError as e:  # fail fast and readably under `uvicorn app.main:app`
        print(f"sluice: config error: {e}", file=sys.stderr)
        raise SystemExit(3) from None


app = _lazy_app()
