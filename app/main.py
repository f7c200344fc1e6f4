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

from app import answers, auth, formats, observability, routes_docs
from app.cache import Entry, ResultCache, canonical, open_json, source_version, stamp_json
from app.catalog import Catalog, UnknownSource
from app.compression import CompressionMiddleware
from app.encode import ARROW_STREAM, arrow_stream, dumps
from app.engines import EngineError, EngineUnavailable
from app.limits import BodyLimitMiddleware, server_timeout
from app.probes import Readiness
from app.problems import Problem, from_plan_error, problem_response, validation_handler
from app.service import ChartService
from app.settings import ConfigError, Settings, load_settings
from app.warmup import warm_up
from planner.dialects import DIALECTS
from planner.errors import PlanError, nearest
from planner.model import BatchRequest, ChartRequest

log = logging.getLogger("sluice")
STATIC_DIR = Path(__file__).with_name("static")  # the preview page (app/static)


class JSONResponse(Response):
    media_type = "application/json"

    def render(self, content: Any) -> bytes:
        return dumps(content)


_problem_responses = answers.problem_responses  # problem+json entries for the OpenAPI document
#: request headers a page on another origin may send (README: Cache-Control: no-cache to
#: recompute, X-Request-ID to correlate, X-API-Key / Authorization for keys), and response
#: headers it may read
CORS_ALLOW_HEADERS = ["Accept", "Accept-Encoding", "Authorization", "Cache-Control",
                      "Content-Type", "X-API-Key", "X-Request-ID"]
CORS_EXPOSE_HEADERS = ["X-Request-ID", "Retry-After", "X-Sluice-Truncated",
                       "X-Sluice-Approximate"]


def engine_problem(exc: EngineError) -> Problem:
    """The problem document for an engine failure: 504 for a server-side statement timeout,
    503 (Retry-After) when the source is unavailable, 502 when it rejected the statement."""
    if server_timeout(exc.message):  # the server's own statement_timeout (app.limits)
        return Problem(504, "statement-timeout", "Statement timed out",
                       f"source {exc.source!r}: {exc.message}", source=exc.source)
    if isinstance(exc, EngineUnavailable):
        return Problem(503, "source-unavailable", "Source unavailable",
                       f"source {exc.source!r}: {exc.message}", source=exc.source,
                       headers={"Retry-After": "5"})
    log.error("engine error on %s: %s", exc.source, exc.message)
    return Problem(502, "engine-error", "The engine rejected the statement",
                   f"source {exc.source!r}: {exc.message}", source=exc.source)


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or load_settings()
    catalog = Catalog(settings)
    service = ChartService(catalog)

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        warm_up(service)  # plan once per engine kind: the first request plans warm (app.warmup)
        yield
        catalog.close()

    app = FastAPI(
        title="sluice",
        version="0.1.0",
        summary="Chart requests in, grouped SQL pushed down to the engine, mark-ready tables out.",
        lifespan=lifespan,
        docs_url=None, redoc_url=None,  # offline docs pages: app/routes_docs.py
    )
    app.state.settings = settings
    app.state.catalog = catalog
    app.state.service = service
    cache_cfg = getattr(settings, "cache", None) or {}
    cache = app.state.cache = ResultCache.from_config(cache_cfg)  # + [cache] url: Redis
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

    @app.exception_handler(EngineError)  # EngineUnavailable too (503; 504 for a timeout)
    async def _engine_error(request: Request, exc: EngineError) -> Response:
        return problem_response(engine_problem(exc), request.url.path)

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
    @app.post("/v1/chart", tags=["charts"], response_model=None,
              responses={**answers.ok(answers.ChartAnswer, "The chart's mark-ready table: JSON "
                                      "by default; Arrow IPC stream, CSV or Parquet by Accept",
                                      content=answers.CHART_FORMATS),
                         **_problem_responses()})
    def chart(req: ChartRequest, request: Request) -> Response:
        """Run a chart request and return the mark-ready table. The format follows
        ``Accept`` (app/formats.py): ``application/json`` (default),
        ``application/vnd.apache.arrow.stream``, ``text/csv`` or
        ``application/vnd.apache.parquet``; anything else is a 406 problem."""
        t_in = time.perf_counter()
        fmt = formats.choose(request.headers.get("accept"))
        service.check_source(req.source)  # auth before any cached answer
        lookup = "no-cache" not in request.headers.get("cache-control", "").lower()
        if fmt == formats.JSON:
            return Response(json_answer(req, lookup, t_in), media_type="application/json",
                            headers={"Vary": "Accept"})

        def run() -> Entry:  # kept as (table, meta): the metadata is re-stamped per answer
            result = service.run(req)
            observability.record_chart(req.source, result.meta, result.timing)
            return _ArrowEntry(result.table, dict(result.meta), dict(result.timing))

        entry, state = cached(req, "arrow", run, lookup)
        meta = dict(entry.meta)
        meta["cache"] = state
        meta["timing_ms"] = entry.timing if state == "miss" else {
            "lookup": round((time.perf_counter() - t_in) * 1000.0, 3)}
        if fmt == ARROW_STREAM:
            body = arrow_stream(entry.table, meta)
        elif fmt == formats.CSV:
            body = formats.csv_body(entry.table, {})  # zones: the Arrow timestamp types
        else:
            body = formats.parquet_body(entry.table, meta)
        return Response(body, media_type=formats.MEDIA_TYPES[fmt],
                        headers={"Vary": "Accept", **formats.table_headers(meta)})

    def cached(req: ChartRequest, fmt: str, run, lookup: bool) -> tuple[Entry, str]:
        """The cached answer for ``req`` in ``fmt`` (single-flight), or ``run()``'s."""
        if not cache.enabled:
            return run(), "miss"
        with service.limiter.deadline(req.source):  # the data version is asked on time too
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
            payload = service.to_json(result, wire=True)  # decimals: exact digits, vectorised
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

    @app.post("/v1/batch", tags=["charts"], response_model=None,
              responses={**answers.ok(answers.BatchAnswer, "One answer or problem per chart"),
                         **_problem_responses()})
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
            except (PlanError, Problem, EngineError) as e:
                # this chart's own problem (422, 403, 503, 504, ...); the others still answer
                prob = (from_plan_error(e) if isinstance(e, PlanError)
                        else engine_problem(e) if isinstance(e, EngineError) else e)
                prob.ptr = f"/charts/{i}{prob.ptr}" if prob.ptr is not None else f"/charts/{i}"
                results.append(dumps(prob.body()))
        # the answers are already encoded (and may come from the cache): splice the bytes
        head = dumps({"source": req.source})[:-1] + b',"results":['
        return Response(head + b",".join(results) + b"]}", media_type="application/json")

    @app.post("/v1/sql", tags=["charts"], response_model=None,
              responses={**answers.ok(answers.SqlAnswer, "The SQL for the dialect"),
                         **_problem_responses()})
    def plan_sql(req: ChartRequest,
                 dialect: str | None = Query(None, description="Target dialect; default: the "
                                             "source's own engine. One of: " + ", ".join(sorted(DIALECTS)))
                 ) -> Response:
        """Plan only: the SQL sluice would run, for ``dialect``."""
        observability.note_source(req.source)
        return JSONResponse(service.plan_sql(req, dialect))

    @app.get("/v1/sources", tags=["sources"], response_model=None,
             responses={**answers.ok(answers.SourcesAnswer, "The sources the key may read"),
                        **_problem_responses(401)})
    def sources() -> Response:
        """Configured sources (only those the API key grants)."""
        out = []
        for name in auth.filter_names(catalog.names()):  # only the sources the key grants
            cfg = catalog.config(name)
            out.append({"name": name, "engine": cfg.engine, "table": cfg.table})
        return JSONResponse({"sources": out})

    @app.get("/v1/sources/{name}", tags=["sources"], response_model=None,
             responses={**answers.ok(answers.SourceDetail, "Columns, kinds and row count"),
                        **_problem_responses(401, 403, 404, 503)})
    def source(name: str) -> Response:
        """A source's introspected columns (engine type and kind) and row count."""
        auth.require(name, None)  # 403 before 404: names cannot be probed
        try:
            cfg = catalog.config(name)
        except UnknownSource as e:
            raise Problem(404, "unknown-source", "Unknown source", f"unknown source {name!r}",
                          "", suggestions=nearest(name, auth.filter_names(e.known))) from None
        with service.limiter.deadline(name):  # a frozen warehouse answers on time
            entry = catalog.entry(name)
        cols = [{"name": c.name, "type": c.sql_type, "kind": c.kind}
                for c in entry.schema.columns.values()]
        return JSONResponse({"name": name, "engine": cfg.engine, "table": cfg.table,
                             "columns": cols, "row_count": entry.row_count})

    @app.get("/healthz", tags=["operations"], response_model=None,
             responses=answers.ok(answers.Health, "The process is up"))
    async def healthz() -> Response:
        """Liveness: the process is up and answering. An async route doing no I/O, so it
        never waits for a worker thread behind running queries (app.probes)."""
        return JSONResponse({"status": "ok"})

    readiness = app.state.readiness = Readiness(catalog, settings.ready_timeout_s,
                                                settings.ready_ttl_s)

    @app.get("/readyz", tags=["operations"], response_model=None,
             responses={**answers.ok(answers.Readiness, "Every source answers"),
                        503: {"model": answers.Readiness, "description": "A source does not"}})
    async def readyz() -> Response:
        """Readiness: every configured source answers; 503 with per-source detail if not.
        Answers within ``ready_timeout_s``; checks are shared and cached (app.probes)."""
        ok, detail = await readiness.report(catalog.names())
        detail = {k: v for k, v in detail.items() if auth.allowed(k)}  # no key: no names
        return JSONResponse({"ready": ok, "sources": detail}, status_code=200 if ok else 503)

    @app.get("/metrics", tags=["operations"], response_class=Response,
             responses={200: {"description": "Prometheus text exposition format 0.0.4",
                              "content": {"text/plain": {"schema": {"type": "string"}}}}})
    def metrics_text() -> Response:
        """Prometheus text exposition of this app's metrics (with keys configured: operator
        keys only, app.auth)."""
        body, ctype = metrics.render()
        return Response(body, media_type=ctype)

    from app.routes_sources import router as sources_router  # column profiles

    app.include_router(sources_router)

    # ---- preview page (app/static) ----------------------------------------------------
    @app.get("/", include_in_schema=False)
    def preview() -> Response:
        return FileResponse(STATIC_DIR / "index.html", media_type="text/html")

    app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")
    routes_docs.register(app)  # /docs and /redoc with local assets, /problems/<slug> pages

    # compression (innermost: sees the final body), body cap (also chunked bodies), then API
    # keys, then CORS (answers preflights itself)
    app.add_middleware(CompressionMiddleware)
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes,
                       body_timeout_s=settings.body_timeout_s)
    app.add_middleware(auth.AuthMiddleware, keys=getattr(settings, "keys", None) or [])
    if getattr(settings, "cors_origins", None):
        from starlette.middleware.cors import CORSMiddleware

        app.add_middleware(CORSMiddleware, allow_origins=settings.cors_origins,
                           allow_methods=["GET", "POST"], max_age=600,
                           allow_headers=CORS_ALLOW_HEADERS, expose_headers=CORS_EXPOSE_HEADERS)
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
