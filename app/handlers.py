"""Exceptions as problem+json answers (RFC 9457): the app's exception handlers, one per
exception class (``HANDLERS``, given to ``FastAPI(exception_handlers=...)``), and
``engine_problem``, which a batch also uses for one chart's engine failure."""

from __future__ import annotations

import logging
from typing import Any, Awaitable, Callable

from fastapi import Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException
from starlette.responses import Response

from app import observability
from app.engines import EngineError, EngineUnavailable
from app.limits import server_timeout
from app.problems import Problem, from_plan_error, problem_response, validation_handler
from planner.errors import PlanError

log = logging.getLogger("sluice")


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


async def _plan_error(request: Request, exc: PlanError) -> Response:
    return problem_response(from_plan_error(exc), request.url.path)


async def _http_error(request: Request, exc: HTTPException) -> Response:
    # unknown route (404), wrong method (405), undecodable body (400): problem+json too
    slug = {400: "bad-request", 404: "not-found", 405: "method-not-allowed"}.get(
        exc.status_code, "http-error")
    return problem_response(Problem(exc.status_code, slug, str(exc.detail), str(exc.detail),
                                    headers=dict(exc.headers or {})), request.url.path)


async def _problem(request: Request, exc: Problem) -> Response:
    return problem_response(exc, request.url.path)


async def _engine_error(request: Request, exc: EngineError) -> Response:
    # EngineUnavailable too (503; 504 for a timeout)
    return problem_response(engine_problem(exc), request.url.path)


async def _internal(request: Request, exc: Exception) -> Response:
    rid = observability.request_id_of(request.scope)
    log.exception("internal error (request_id %s)", rid)
    return problem_response(Problem(500, "internal", "Internal error",
                                    "sluice failed to answer; the error is logged",
                                    request_id=rid,
                                    headers={"X-Request-ID": rid} if rid else None),
                            request.url.path)


#: exception class -> handler (the most specific class that matches handles it)
HANDLERS: dict[Any, Callable[[Request, Any], Awaitable[Response] | Response]] = {
    RequestValidationError: validation_handler,  # 422 with JSON pointers
    PlanError: _plan_error,
    HTTPException: _http_error,
    Problem: _problem,
    EngineError: _engine_error,
    Exception: _internal,
}
