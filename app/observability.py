"""Metrics, request ids and the one-line-per-request JSON log.

Why it is shaped this way:

* **One registry per app.** ``Metrics`` owns a ``prometheus_client.CollectorRegistry``; each
  ``create_app`` makes its own, so tests (or one process serving several apps) never collide
  on metric names and each ``/metrics`` shows only its own app.
* **Module-level handles for other modules.** Code that has no app at hand (the result cache,
  engines) counts through proxies that resolve to the metrics of the app serving the current
  request (a ``ContextVar`` set by the middleware; Starlette copies it into the worker thread
  of a sync route)::

      from app import observability
      observability.CACHE_EVENTS.labels(source, "hit").inc()     # or "miss", "store", "evict"

  Outside a request they count into ``DEFAULT``, which no app serves.
* **A pure ASGI middleware**, not ``BaseHTTPMiddleware``: it adds microseconds, not a task
  group, to every request (the service's own budget is a few milliseconds).
* **Labels stay bounded**: the route label is the route *template* (``/v1/sources/{name}``),
  unmatched paths share one label, so a scanner cannot blow up the series count.

Metric names (all prefixed ``sluice_``): ``http_request_duration_seconds{method,route,status}``
(histogram), ``http_requests_in_flight``, ``engine_duration_seconds{source}`` (histogram),
``cache_events_total{source,event}``, ``rows_scanned_total{source}`` (source rows that
matched the request's filters), ``rows_returned_total{source}``,
``abandoned_requests_total{source,reason}`` (requests superseded by a newer one of their
session, or whose client disconnected: ``app.sessions``) and
``abandoned_engine_seconds_total{source,reason}`` (engine time of their stopped statements).
"""

from __future__ import annotations

import asyncio
import logging
import os
import re
import sys
import time
from contextvars import ContextVar
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

import orjson
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Gauge, Histogram, generate_latest

ACCESS_LOGGER = "sluice.access"
REQUEST_ID_HEADER = "x-request-id"
#: an incoming id is kept only if it is short and plain (it goes into logs and headers)
_ID_OK = re.compile(r"^[A-Za-z0-9._:@/+=-]{1,128}$")
UNMATCHED = "<unmatched>"

_LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


class Metrics:
    """All metric families of one app, in that app's own registry."""

    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry or CollectorRegistry(auto_describe=True)
        r = self.registry
        self.request_seconds = Histogram(
            "sluice_http_request_duration_seconds", "HTTP request latency by route template and status",
            ["method", "route", "status"], buckets=_LATENCY_BUCKETS, registry=r)
        self.in_flight = Gauge("sluice_http_requests_in_flight", "HTTP requests being served", registry=r)
        self.engine_seconds = Histogram(
            "sluice_engine_duration_seconds", "Time spent in the engine per chart, by source",
            ["source"], buckets=_LATENCY_BUCKETS, registry=r)
        self.cache_events = Counter(
            "sluice_cache_events", "Result cache events by source (hit, miss, ...)",
            ["source", "event"], registry=r)
        self.rows_scanned = Counter(
            "sluice_rows_scanned", "Source rows scanned that matched the request filters", ["source"],
            registry=r)
        self.rows_returned = Counter(
            "sluice_rows_returned", "Result rows returned to clients", ["source"], registry=r)
        # abandoned work (app.sessions): requests superseded by a newer one of their session
        # or whose client disconnected, and the engine time their stopped statements took
        self.abandoned_requests = Counter(
            "sluice_abandoned_requests", "Requests stopped before their answer, by source and "
            "reason (superseded, disconnected)", ["source", "reason"], registry=r)
        self.abandoned_seconds = Counter(
            "sluice_abandoned_engine_seconds", "Engine time of statements stopped because "
            "their request was superseded or its client disconnected", ["source", "reason"],
            registry=r)

    def declare_sources(self, names: list[str]) -> None:
        """Create the per-source series at zero, so dashboards see them before traffic."""
        for name in names:
            for event in ("hit", "miss"):
                self.cache_events.labels(name, event)
            self.rows_scanned.labels(name)
            self.rows_returned.labels(name)
            for reason in ("superseded", "disconnected"):
                self.abandoned_requests.labels(name, reason)
                self.abandoned_seconds.labels(name, reason)

    def render(self) -> tuple[bytes, str]:
        """Prometheus text exposition of this registry, and its content type."""
        return generate_latest(self.registry), CONTENT_TYPE_LATEST


DEFAULT = Metrics()


@dataclass
class RequestInfo:
    request_id: str
    metrics: Metrics
    source: str | None = None


_current: ContextVar[RequestInfo | None] = ContextVar("sluice_request", default=None)


def current() -> RequestInfo | None:
    """The request being served in this context, if any."""
    return _current.get()


def current_metrics() -> Metrics:
    info = _current.get()
    return info.metrics if info is not None else DEFAULT


def request_id_of(scope: dict[str, Any]) -> str | None:
    """The request id, also where the middleware's context is gone (the 500 handler runs
    outside it, in Starlette's ServerErrorMiddleware)."""
    state = scope.get("state")
    rid = state.get("request_id") if isinstance(state, dict) else None
    if rid is None:
        info = _current.get()
        rid = info.request_id if info is not None else None
    return rid


def note_source(name: str) -> None:
    """Tell the request log which source this request used."""
    info = _current.get()
    if info is not None:
        info.source = name


class _Family:
    """``CACHE_EVENTS.labels(...)`` on the metrics of the app serving this request."""

    def __init__(self, attr: str) -> None:
        self._attr = attr

    def labels(self, *values: str, **kw: str) -> Any:
        return getattr(current_metrics(), self._attr).labels(*values, **kw)


CACHE_EVENTS = _Family("cache_events")
ENGINE_SECONDS = _Family("engine_seconds")
ROWS_SCANNED = _Family("rows_scanned")
ROWS_RETURNED = _Family("rows_returned")


def record_chart(source: str, meta: dict[str, Any], timing: dict[str, float] | None) -> None:
    """Count one answered chart: engine time, rows matched (scanned) and returned."""
    note_source(source)
    m = current_metrics()
    stats = meta.get("stats") or {}
    if timing and "execute" in timing:
        m.engine_seconds.labels(source).observe(max(0.0, float(timing["execute"])) / 1000.0)
    if isinstance(stats.get("matched_rows"), int):
        m.rows_scanned.labels(source).inc(stats["matched_rows"])
    if isinstance(stats.get("result_rows"), int):
        m.rows_returned.labels(source).inc(stats["result_rows"])


def record_abandoned(source: str, reason: str) -> None:
    """Count one request stopped before its answer (``reason``: superseded, disconnected)."""
    current_metrics().abandoned_requests.labels(source, reason).inc()


def record_abandoned_seconds(source: str, reason: str, seconds: float) -> None:
    """Add the engine time of one statement of a stopped request."""
    current_metrics().abandoned_seconds.labels(source, reason).inc(max(0.0, seconds))


# ---- logging ---------------------------------------------------------------------------
class _JSONLineFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        fields = getattr(record, "fields", None)
        if not isinstance(fields, dict):
            fields = {"ts": _now(), "level": record.levelname.lower(), "logger": record.name,
                      "msg": record.getMessage()}
        return orjson.dumps(fields, default=str).decode()


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is at the time (test runners swap it)."""

    @property  # type: ignore[override]
    def stream(self):  # noqa: ANN201
        return sys.stderr

    @stream.setter
    def stream(self, value) -> None:  # noqa: ANN001
        pass


def access_logger() -> logging.Logger:
    """The request logger; writes one JSON object per line to stderr unless already set up."""
    log = logging.getLogger(ACCESS_LOGGER)
    if not log.handlers:
        handler = _StderrHandler()
        handler.setFormatter(_JSONLineFormatter())
        log.addHandler(handler)
        log.setLevel(logging.INFO)
        log.propagate = False
    return log


def _route_template(scope: dict[str, Any]) -> str:
    route = scope.get("route")
    path = getattr(route, "path", None)
    return path if isinstance(path, str) and path else UNMATCHED


class ObservabilityMiddleware:
    """Request id, latency/in-flight metrics and the access log line, for every HTTP request."""

    def __init__(self, app: Any, metrics: Metrics, log_requests: bool = True) -> None:
        self.app = app
        self.metrics = metrics
        self.log = access_logger() if log_requests else None
        if log_requests:
            # one line per request: ours (JSON, with request id and source), not uvicorn's too
            logging.getLogger("uvicorn.access").disabled = True

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        incoming = None
        for k, v in scope.get("headers", ()):
            if k == b"x-request-id":
                incoming = v.decode("latin-1")
                break
        rid = incoming if incoming is not None and _ID_OK.match(incoming) else os.urandom(16).hex()
        info = RequestInfo(rid, self.metrics)
        token = _current.set(info)
        state = scope.get("state")
        if isinstance(state, dict):  # for handlers that run outside this context (500s)
            state["request_id"] = rid
        else:
            scope["state"] = {"request_id": rid}
        status = 500
        t0 = time.perf_counter()
        self.metrics.in_flight.inc()

        async def _send(message: dict[str, Any]) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                headers = [(k, v) for k, v in message.get("headers", []) if k.lower() != b"x-request-id"]
                headers.append((b"x-request-id", rid.encode("latin-1")))
                message = dict(message, headers=headers)
            await send(message)

        started = False

        async def _send_tracked(message: dict[str, Any]) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await _send(message)

        try:
            await self.app(scope, receive, _send_tracked)
        except asyncio.CancelledError:
            # the server cut the request off (SIGTERM past shutdown_timeout_s): say so with
            # a 503 the client may retry elsewhere, not the server's bare 500
            if not started:
                await _send_problem_503(_send, scope.get("path", ""))
            raise
        finally:
            seconds = time.perf_counter() - t0
            self.metrics.in_flight.dec()
            route = _route_template(scope)
            method = scope.get("method", "")
            self.metrics.request_seconds.labels(method, route, str(status)).observe(seconds)
            _current.reset(token)
            if self.log is not None:
                fields: dict[str, Any] = {
                    "ts": _now(), "level": "info", "msg": "request", "method": method,
                    "path": scope.get("path", ""), "route": route, "status": status,
                    "duration_ms": round(seconds * 1000.0, 3), "request_id": rid,
                }
                if info.source is not None:
                    fields["source"] = info.source
                self.log.info("request", extra={"fields": fields})


async def _send_problem_503(send: Any, instance: str) -> None:
    from app.encode import dumps
    from app.problems import PROBLEM_JSON, Problem

    p = Problem(503, "shutting-down", "Server shutting down",
                "the server is shutting down and stopped this request; retry")
    body = dumps(p.body(instance))
    try:
        await send({"type": "http.response.start", "status": 503,
                    "headers": [(b"content-type", PROBLEM_JSON.encode()),
                                (b"content-length", str(len(body)).encode()),
                                (b"retry-after", b"1"), (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})
    except Exception:  # noqa: BLE001 - the connection may be gone already
        pass
