"""HTTP API. ``uvicorn app.main:app`` serves it; ``create_app(settings)`` builds one."""

from __future__ import annotations

import logging
import sys
import time
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

from fastapi import FastAPI, Query, Request
from fastapi.exceptions import RequestValidationError
from starlette.responses import FileResponse, Response
from starlette.staticfiles import StaticFiles

from app import auth, observability
from app.cache import Entry, ResultCache, canonical, open_json, source_version, stamp_json
from app.catalog import Catalog, UnknownSource
from app.encode import ARROW_STREAM, arrow_stream, dumps
from app.engines import EngineError, EngineUnavailable
from app.limits import BodyLimitMiddleware, server_timeout
from app.problems import PROBLEM_JSON, Problem, from_plan_error, problem_response, validation_handler
from app.service import ChartService
from app.settings import ConfigError, Settings, load_settings
from planner.dialects import DIALECTS
from planner.errors import PlanError, nearest
from planner.model import BatchRequest, ChartRequest

log = logging.getLogger("sluice")
STATIC_DIR = Path(__file__).with_name("static")  # the preview page (app/static)


class JSONResponse(Response):
    media_type = "application/json"

    def render(self, content: Any) -> bytes:
        return dumps(content)


def _problem_responses() -> dict[int | str, dict[str, Any]]:
    desc = {400: "Malformed request", 401: "No or bad API key (when keys are configured)",
            403: "The API key is not granted this source", 404: "Unknown source",
            413: "Body too large",
            422: "The request cannot be planned (the pointer names the field)",
            503: "The source's engine is unavailable, or busy (Retry-After)",
            504: "The statement ran past the source's statement_timeout_ms"}
    return {code: {"description": d, "content": {PROBLEM_JSON: {}}} for code, d in desc.items()}


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or load_settings()
    catalog = Catalog(settings)
    service = ChartService(catalog)

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        yield
        catalog.close()

    app = FastAPI(
        title="sluice",
        version="0.1.0",
        summary="Chart requests in, grouped SQL pushed down to the engine, mark-ready tables out.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.catalog = catalog
    app.state.service = service
    cache_cfg = getattr(settings, "cache", None) or {}
    cache = app.state.cache = ResultCache(cache_cfg.get("max_bytes", 64 * 1024 * 1024),
                                          cache_cfg.get("enabled", True))
    metrics = app.state.metrics = observability.Metrics()  # one registry per app
    metrics.declare_sources(catalog.names())

    # ---- errors -----------------------------------------------------------------------
    app.add_exception_handler(RequestValidationError, validation_handler)

    @app.exception_handler(PlanError)
    async def _plan_error(request: Request, exc: PlanError) -> Response:
        return problem_response(from_plan_error(exc), request.url.path)

    from starlette.exceptions import HTTPException as _HTTPException

    @app.exception_handler(_HTTPException)
    async def _http_error(request: Request, exc: _HTTPException) -> Response:
        # unknown route (404), wrong method (405), undecodable body (400): problem+json too
        slug = {400: "bad-request", 404: "not-found", 405: "method-not-allowed"}.get(
            exc.status_code, "http-error")
        return problem_response(Problem(exc.status_code, slug, str(exc.detail), str(exc.detail),
                                        headers=dict(exc.headers or {})), request.url.path)

    @app.exception_handler(Problem)
    async def _problem(request: Request, exc: Problem) -> Response:
        return problem_response(exc, request.url.path)

    @app.exception_handler(EngineUnavailable)
    async def _unavailable(request: Request, exc: EngineUnavailable) -> Response:
        if server_timeout(exc.message):  # the server's own statement_timeout (app.limits)
            return problem_response(Problem(504, "statement-timeout", "Statement timed out",
                                            f"source {exc.source!r}: {exc.message}",
                                            source=exc.source), request.url.path)
        return problem_response(Problem(503, "source-unavailable", "Source unavailable",
                                        f"source {exc.source!r}: {exc.message}", source=exc.source,
                                        headers={"Retry-After": "5"}), request.url.path)

    @app.exception_handler(EngineError)
    async def _engine_error(request: Request, exc: EngineError) -> Response:
        log.error("engine error on %s: %s", exc.source, exc.message)
        return problem_response(Problem(502, "engine-error", "The engine rejected the statement",
                                        f"source {exc.source!r}: {exc.message}", source=exc.source),
                                request.url.path)

    @app.exception_handler(Exception)
    async def _internal(request: Request, exc: Exception) -> Response:
        rid = observability.request_id_of(request.scope)
        log.exception("internal error (request_id %s)", rid)
        return problem_response(Problem(500, "internal", "Internal error",
                                        "sluice failed to answer; the error is logged",
                                        request_id=rid,
                                        headers={"X-Request-ID": rid} if rid else None),
                                request.url.path)


    # ---- routes -----------------------------------------------------------------------
    @app.post("/v1/chart", responses=_problem_responses(), tags=["charts"])
    def chart(req: ChartRequest, request: Request) -> Response:
        """Run a chart request and return the mark-ready table (JSON, or Arrow IPC stream
        when the client accepts ``application/vnd.apache.arrow.stream``)."""
        t_in = time.perf_counter()
        service.check_source(req.source)  # auth before any cached answer
        lookup = "no-cache" not in request.headers.get("cache-control", "").lower()
        if ARROW_STREAM not in request.headers.get("accept", ""):
            return Response(json_answer(req, lookup, t_in), media_type="application/json")

        def run() -> Entry:  # kept as (table, meta): the metadata is re-stamped per answer
            result = service.run(req)
            observability.record_chart(req.source, result.meta, result.timing)
            return _ArrowEntry(result.table, dict(result.meta), dict(result.timing))

        entry, state = cached(req, "arrow", run, lookup)
        meta = dict(entry.meta)
        meta["cache"] = state
        meta["timing_ms"] = entry.timing if state == "miss" else {
            "lookup": round((time.perf_counter() - t_in) * 1000.0, 3)}
        return Response(arrow_stream(entry.table, meta), media_type=ARROW_STREAM)

    def cached(req: ChartRequest, fmt: str, run, lookup: bool) -> tuple[Entry, str]:
        """The cached answer for ``req`` in ``fmt`` (single-flight), or ``run()``'s."""
        if not cache.enabled:
            return run(), "miss"
        version = source_version(catalog.config(req.source).engine, catalog.engine(req.source),
                                 float(cache_cfg.get("ttl_s", 60.0)))
        return cache.compute(cache.key(canonical(req), version, fmt), req.source, run,
                             lookup=lookup)

    def json_answer(req: ChartRequest, lookup: bool, t_in: float) -> bytes:
        """The JSON answer bytes, from the cache when it has them (chart and batch routes)."""
        def run() -> Entry:
            result = service.run(req)
            observability.record_chart(req.source, result.meta, result.timing)
            t0 = time.perf_counter()
            payload = service.to_json(result)
            payload.pop("cache", None)
            payload.pop("timing_ms", None)
            body = open_json(payload)
            timing = dict(result.timing)
            timing["encode"] = round((time.perf_counter() - t0) * 1000.0, 3)
            return Entry(body, "application/json", timing)

        entry, state = cached(req, "json", run, lookup)
        timing = entry.timing if state == "miss" else {
            "lookup": round((time.perf_counter() - t_in) * 1000.0, 3)}
        return stamp_json(entry.body, state, timing)

    @app.post("/v1/batch", responses=_problem_responses(), tags=["charts"])
    def batch(req: BatchRequest) -> Response:
        """Several charts on one source. Each result is the chart's answer (cached like
        /v1/chart), or its problem document (pointer prefixed with ``/charts/<i>``); the
        batch itself answers 200."""
        service.check_source(req.source)
        results = []
        for i, chart in enumerate(req.charts):
            if chart.source is not None and chart.source != req.source:
                results.append(dumps(Problem(422, "invalid-request", "Chart names another source",
                                             f"a batch runs on one source ({req.source!r})",
                                             f"/charts/{i}/source").body()))
                continue
            inherited = {"source": req.source}
            if req.tz is not None and chart.tz is None:  # the dashboard's zone
                inherited["tz"] = req.tz
            full = ChartRequest.model_validate(
                chart.model_dump(by_alias=True, exclude_none=True) | inherited)
            try:
                results.append(json_answer(full, True, time.perf_counter()))
            except PlanError as e:
                prob = from_plan_error(e)
                prob.ptr = f"/charts/{i}{prob.ptr}" if prob.ptr is not None else f"/charts/{i}"
                results.append(dumps(prob.body()))
        # the answers are already encoded (and may come from the cache): splice the bytes
        head = dumps({"source": req.source})[:-1] + b',"results":['
        return Response(head + b",".join(results) + b"]}", media_type="application/json")

    @app.post("/v1/sql", responses=_problem_responses(), tags=["charts"])
    def plan_sql(req: ChartRequest,
                 dialect: str | None = Query(None, description="Target dialect; default: the "
                                             "source's own engine. One of: " + ", ".join(sorted(DIALECTS)))
                 ) -> Response:
        """Plan only: the SQL sluice would run, for ``dialect``."""
        observability.note_source(req.source)
        return JSONResponse(service.plan_sql(req, dialect))

    @app.get("/v1/sources", tags=["sources"])
    def sources() -> Response:
        out = []
        for name in auth.filter_names(catalog.names()):  # only the sources the key grants
            cfg = catalog.config(name)
            out.append({"name": name, "engine": cfg.engine, "table": cfg.table})
        return JSONResponse({"sources": out})

    @app.get("/v1/sources/{name}", responses=_problem_responses(), tags=["sources"])
    def source(name: str) -> Response:
        auth.require(name, None)  # 403 before 404: names cannot be probed
        try:
            cfg = catalog.config(name)
        except UnknownSource as e:
            raise Problem(404, "unknown-source", "Unknown source", f"unknown source {name!r}",
                          "", suggestions=nearest(name, auth.filter_names(e.known))) from None
        entry = catalog.entry(name)
        cols = [{"name": c.name, "type": c.sql_type, "kind": c.kind}
                for c in entry.schema.columns.values()]
        return JSONResponse({"name": name, "engine": cfg.engine, "table": cfg.table,
                             "columns": cols, "row_count": entry.row_count})

    @app.get("/healthz", tags=["operations"])
    def healthz() -> Response:
        """Liveness: the process is up and answering (touches no source)."""
        return JSONResponse({"status": "ok"})

    @app.get("/readyz", tags=["operations"])
    def readyz() -> Response:
        """Readiness: every configured source answers; 503 with per-source detail if not."""
        detail, ok = {}, True
        for name in catalog.names():
            t0 = time.perf_counter()
            engine = catalog.config(name).engine
            try:
                entry = catalog.entry(name)
                detail[name] = {"ready": True, "engine": engine, "row_count": entry.row_count,
                                "columns": len(entry.schema.columns)}
            except EngineError as e:
                ok = False
                detail[name] = {"ready": False, "engine": engine, "error": e.message}
            except Exception as e:  # a probe must answer, whatever the engine raised
                ok = False
                detail[name] = {"ready": False, "engine": engine, "error": f"{type(e).__name__}: {e}"}
            detail[name]["check_ms"] = round((time.perf_counter() - t0) * 1000.0, 3)
        detail = {k: v for k, v in detail.items() if auth.allowed(k)}  # no key: no names
        return JSONResponse({"ready": ok, "sources": detail}, status_code=200 if ok else 503)

    @app.get("/metrics", tags=["operations"], response_class=Response)
    def metrics_text() -> Response:
        """Prometheus text exposition of this app's metrics."""
        body, ctype = metrics.render()
        return Response(body, media_type=ctype)

    # ---- preview page (app/static) ----------------------------------------------------
    @app.get("/", include_in_schema=False)
    def preview() -> Response:
        return FileResponse(STATIC_DIR / "index.html", media_type="text/html")

    app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")

    # body cap (also chunked bodies), then API keys, then CORS (answers preflights itself)
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes)
    app.add_middleware(auth.AuthMiddleware, keys=getattr(settings, "keys", None) or [])
    if getattr(settings, "cors_origins", None):
        from starlette.middleware.cors import CORSMiddleware

        app.add_middleware(CORSMiddleware, allow_origins=settings.cors_origins,
                           allow_methods=["GET", "POST"], max_age=600,
                           allow_headers=["Authorization", "X-API-Key", "Content-Type", "Accept"])
    # outermost: times, counts and logs every request, 413s and 404s included
    app.add_middleware(observability.ObservabilityMiddleware, metrics=metrics,
                       log_requests=settings.request_log)
    return app


class _ArrowEntry(Entry):
    """A cached Arrow answer: the table and its metadata, encoded per answer (cheap for the
    few hundred rows of a chart) so ``cache`` and ``timing_ms`` are true for each one."""

    def __init__(self, table: Any, meta: dict[str, Any], timing: dict[str, float]) -> None:
        super().__init__(b"", ARROW_STREAM, timing)
        self.table = table
        self.meta = meta

    @property
    def nbytes(self) -> int:
        return int(self.table.nbytes) + len(dumps(self.meta)) + 128


def _lazy_app() -> FastAPI:
    try:
        return create_app()
    except ConfigError as e:  # fail fast and readably under `uvicorn app.main:app`
        print(f"sluice: config error: {e}", file=sys.stderr)
        raise SystemExit(3) from None


app = _lazy_app()
