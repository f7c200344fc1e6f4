"""Limits: what one request may ask for and how much of a source it may hold.

* request shape caps (``[limits]`` in the config): channels, ``by`` keys, filter predicates,
  IN-list length, ``filter_sql`` length — refused with a 422 whose pointer names the part;
* request body size, also for chunked bodies without ``Content-Length`` (ASGI middleware,
  413);
* a deadline per request (``statement_timeout_ms`` of the source, ``app.deadline``): the
  whole request -- planning, extents, main statement, shaping -- must finish within it; a
  running statement is interrupted from a timer thread when the budget runs out (DuckDB:
  ``cursor.interrupt()`` through the engine's ``canceller()``) and the request answers 504;
* abandoned work (``app.sessions``): a request superseded by a newer one of its session, or
  whose client disconnected, has its running statement stopped through the same
  ``canceller()`` (409 / 499) and starts no further statement;
* admission control per source (``max_concurrent`` requests running on it at once): beyond
  it a request waits at most ``queue_wait_ms`` and then answers 503 with ``Retry-After``.

The result group cap is the server's ``max_limit``: a request without ``limit`` gets
``min(10000, max_limit)`` rows and ``stats.truncated`` says when groups were cut; an explicit
``limit`` above the cap is a 422.

Config::

    [limits]
    max_channels = 16            # keys + measures, counting by[] and facet row/col
    max_by = 16
    max_filters = 256            # predicates in where, nested any/not included
    max_in_list = 10000          # values in one in / not_in (and IN lists in filter_sql)
    max_filter_sql_chars = 4096
    statement_timeout_ms = 30000 # 0: no timeout
    max_concurrent = 8           # per source
    queue_wait_ms = 0            # how long a request may wait for a slot

    [sources.deliveries]
    statement_timeout_ms = 5000  # per-source overrides of the last three
    max_concurrent = 4
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

from app import deadline, observability, sessions
from app.engines.base import EngineError, EngineUnavailable
from app.problems import PROBLEM_JSON, Problem
from planner.errors import PlanError, pointer
from planner.model import ChartRequest

#: per-source keys (``[sources.NAME]``) that override the ``[limits]`` defaults
SOURCE_LIMIT_KEYS = ("statement_timeout_ms", "max_concurrent", "queue_wait_ms")


@dataclass
class Limits:
    max_channels: int = 16
    max_by: int = 16
    max_filters: int = 256
    max_in_list: int = 10_000
    max_filter_sql_chars: int = 4096
    statement_timeout_ms: int = 30_000
    max_concurrent: int = 8
    queue_wait_ms: int = 0

    @classmethod
    def keys(cls) -> list[str]:
        return [f.name for f in dataclasses.fields(cls)]


def parse_limits(raw: Any, fail: Callable[[tuple[str, ...], str, str | None], Exception]) -> Limits:
    """``[limits]`` table -> Limits. ``fail(key, message, fix)`` builds the ConfigError."""
    out = Limits()
    if raw is None:
        return out
    if not isinstance(raw, dict):
        raise fail(("limits",), "must be a table", "write [limits] on its own line")
    valid = Limits.keys()
    for k, v in raw.items():
        if k not in valid:
            import difflib

            near = difflib.get_close_matches(k, valid, n=1, cutoff=0.5)
            raise fail(("limits", k), "unknown key",
                       (f"did you mean {near[0]!r}? " if near else "") + f"valid keys: {', '.join(valid)}")
        out_v = _int(v, ("limits", k), fail, allow_zero=k in ("statement_timeout_ms", "queue_wait_ms"))
        setattr(out, k, out_v)
    return out


def _int(v: Any, key: tuple[str, ...], fail, allow_zero: bool) -> int:
    if isinstance(v, str) and v.strip().isdigit():  # values from environment overrides
        v = int(v.strip())
    if isinstance(v, bool) or not isinstance(v, int) or v < 0 or (v == 0 and not allow_zero):
        raise fail(key, f"is {v!r}; it must be a {'non-negative' if allow_zero else 'positive'} "
                   "integer", f"e.g. {key[-1]} = {getattr(Limits(), key[-1], 1)}")
    return v


def source_limits(limits: Limits, options: dict[str, Any], source: str,
                  fail: Callable[[tuple[str, ...], str, str | None], Exception] | None = None
                  ) -> Limits:
    """The limits of one source: ``[limits]`` with the source's own overrides."""
    out = dataclasses.replace(limits)
    for k in SOURCE_LIMIT_KEYS:
        if k in options:
            f = fail or (lambda key, msg, fix: ValueError(f"[{'.'.join(key)}] {msg}; {fix}"))
            setattr(out, k, _int(options[k], ("sources", source, k), f,
                                 allow_zero=k != "max_concurrent"))
    return out


# =====================================================================================
# request shape
# =====================================================================================

def _too_many(ptr: str, what: str, n: int, cap: int, key: str) -> PlanError:
    return PlanError(ptr, f"{what}: {n} given, this server allows at most {cap} "
                     f"([limits] {key})", slug="limit-exceeded", title="Request exceeds a limit")


def check_request(req: ChartRequest, limits: Limits) -> None:
    """Shape caps that do not need the source's schema (422 with a pointer)."""
    if len(req.channels.by) > limits.max_by:
        raise _too_many(pointer("channels", "by", limits.max_by), "too many by keys",
                        len(req.channels.by), limits.max_by, "max_by")
    chans = req.keyed_channels()
    if len(chans) > limits.max_channels:
        path = chans[limits.max_channels][0]
        raise _too_many(pointer(*path), "too many channels", len(chans), limits.max_channels,
                        "max_channels")
    for count, (path, f) in enumerate(req.predicates(), 1):
        if count > limits.max_filters:
            raise _too_many(pointer(*path), "too many filter predicates", count,
                            limits.max_filters, "max_filters")
        for op in ("in", "not_in"):
            values = getattr(f, "in_" if op == "in" else op)
            if values is not None and len(values) > limits.max_in_list:
                raise _too_many(pointer(*path, op), f"too many values in {op}", len(values),
                                limits.max_in_list, "max_in_list")
    if req.filter_sql is not None and len(req.filter_sql) > limits.max_filter_sql_chars:
        raise _too_many(pointer("filter_sql"), "filter_sql is too long (characters)",
                        len(req.filter_sql), limits.max_filter_sql_chars, "max_filter_sql_chars")


def check_filter_sql(req: ChartRequest, limits: Limits, schema: Any, dialect: Any) -> None:
    """IN lists inside ``filter_sql`` obey ``max_in_list`` too (needs the schema to parse)."""
    if req.filter_sql is None:
        return
    from planner.filter_sql import compile_filter_sql

    compile_filter_sql(req.filter_sql, schema, dialect, max_chars=limits.max_filter_sql_chars,
                       max_in_list=limits.max_in_list)


def clamp_limit(req: ChartRequest, max_limit: int) -> ChartRequest:
    """The result group cap: an unset ``limit`` becomes ``min(default, max_limit)``; an
    explicit one above the cap is refused (422 at /limit)."""
    if req.limit <= max_limit:
        return req
    if "limit" not in req.model_fields_set:
        return req.model_copy(update={"limit": max_limit})
    raise PlanError(pointer("limit"), f"limit {req.limit} exceeds this server's cap of "
                    f"{max_limit} rows (without limit an answer has at most "
                    f"{min(type(req).model_fields['limit'].default, max_limit)} rows)",
                    slug="limit-exceeded", title="Request exceeds a limit")


# =====================================================================================
# admission control and statement timeouts
# =====================================================================================

class Overloaded(Problem):
    def __init__(self, source: str, running: int, retry_after: int = 1) -> None:
        super().__init__(503, "overloaded", "Source busy",
                         f"source {source!r} is already running {running} queries (its "
                         "max_concurrent); retry shortly", source=source,
                         headers={"Retry-After": str(retry_after)})


class StatementTimeout(Problem):
    def __init__(self, source: str, ms: int, silent: str | None = None) -> None:
        if silent:  # the warehouse itself did not answer (frozen, black-holed)
            detail = (f"source {source!r}: {silent}; the request's deadline is {ms} ms "
                      "(statement_timeout_ms)")
        else:
            detail = (f"source {source!r}: the request ran longer than {ms} ms "
                      "(statement_timeout_ms) and was cancelled; narrow the request "
                      "(where, fewer bins or keys)")
        super().__init__(504, "statement-timeout", "Statement timed out", detail, source=source)


class _Slot:
    def __init__(self, n: int) -> None:
        self.sem = threading.BoundedSemaphore(n)
        self.n = n


class Limiter:
    """Per-source admission (a semaphore each) and guarded engines (statement timeouts)."""

    def __init__(self, limits: Limits, source_options: dict[str, dict[str, Any]]) -> None:
        self.limits = limits
        self._per_source = {name: source_limits(limits, opts, name)
                            for name, opts in source_options.items()}
        self._slots: dict[str, _Slot] = {}
        self._lock = threading.Lock()

    def of(self, source: str) -> Limits:
        return self._per_source.get(source, self.limits)

    def _slot(self, source: str) -> _Slot:
        slot = self._slots.get(source)
        if slot is None:
            with self._lock:
                slot = self._slots.setdefault(source, _Slot(self.of(source).max_concurrent))
        return slot

    def running(self, source: str) -> int:
        slot = self._slots.get(source)
        return 0 if slot is None else slot.n - slot.sem._value  # noqa: SLF001 - a gauge only

    @contextlib.contextmanager
    def admit(self, source: str) -> Iterator[None]:
        """Hold one of the source's ``max_concurrent`` slots, or answer 503."""
        slot = self._slot(source)
        wait = self.of(source).queue_wait_ms / 1000.0
        ok = slot.sem.acquire(timeout=wait) if wait > 0 else slot.sem.acquire(blocking=False)
        if not ok:
            raise Overloaded(source, slot.n)
        try:
            yield
        finally:
            slot.sem.release()

    @contextlib.contextmanager
    def deadline(self, source: str) -> Iterator[None]:
        """The whole request under the source's ``statement_timeout_ms`` (app.deadline);
        a budget spent between statements (planning, shaping) is a 504 too."""
        ms = self.of(source).statement_timeout_ms
        with deadline.within(ms / 1000.0 if ms > 0 else None):
            try:
                yield
            except deadline.DeadlineExceeded:
                raise StatementTimeout(source, ms) from None

    def check_deadline(self, source: str) -> None:
        try:
            deadline.check()
        except deadline.DeadlineExceeded:
            raise StatementTimeout(source, self.of(source).statement_timeout_ms) from None

    def guard(self, source: str, engine: Any, user_sql: bool = False) -> "GuardedEngine":
        return GuardedEngine(engine, source, self.of(source).statement_timeout_ms, user_sql)


class GuardedEngine:
    """An engine whose statements are cancelled after ``timeout_ms`` (504), and whose
    errors on a request with ``filter_sql`` are the filter's fault (422 at /filter_sql)."""

    def __init__(self, engine: Any, source: str, timeout_ms: int, user_sql: bool) -> None:
        self._engine, self._source, self._ms, self._user_sql = engine, source, timeout_ms, user_sql
        self.dialect = engine.dialect

    def __getattr__(self, name: str) -> Any:
        return getattr(self._engine, name)

    def _run(self, fn: Callable[[str], Any], sql: str) -> Any:
        # a request stopped by a newer one of its session, or whose client left
        # (app.sessions), starts nothing more
        work = sessions.current()
        if work is not None:
            work.check(self._source)
        # the statement gets what is left of the request's budget (app.deadline), else the
        # source's own statement_timeout_ms; a spent budget runs nothing more (504)
        left = deadline.remaining()
        if left is not None and left <= 0:
            raise StatementTimeout(self._source, self._ms)
        secs = left if left is not None else (self._ms / 1000.0 if self._ms > 0 else None)
        cancel = getattr(self._engine, "canceller", None)
        if cancel is None or (secs is None and work is None):
            return self._call(fn, sql, fired=None, work=work)
        interrupt = cancel()
        state = {"done": False, "fired": False}
        lock = threading.Lock()

        # An interrupt is sent under ``lock``, and the statement's end takes it: KILL QUERY
        # (MariaDB) names the connection, not the statement, so one still in flight when
        # the statement ended would stop the next statement this thread's connection runs
        # (seen: a brush move answered 504 when the previous move's re-sent KILL landed).
        def fire() -> None:
            with lock:
                if state["done"]:
                    return
                state["fired"] = True
                interrupt()

        def stop() -> None:  # the request was stopped (app.sessions): the same interrupt
            threading.Thread(target=_interrupt_until_done, args=(interrupt, state, lock),
                             daemon=True).start()

        timer = deadline.after(secs, fire) if secs is not None else None
        token = work.attach(stop) if work is not None else None
        t0 = time.perf_counter()
        try:
            if work is not None and token is None:  # stopped in between: do not start
                raise work.problem(self._source)
            return self._call(fn, sql, fired=state, work=work)
        finally:
            # (bounded: a cancel that does not return in time must not hold the request)
            held = lock.acquire(timeout=_INTERRUPT_WAIT_S)
            state["done"] = True
            if held:
                lock.release()
            if timer is not None:
                timer.cancel()
            if work is not None:
                work.detach(token)
                if work.stopped and token is not None:
                    observability.record_abandoned_seconds(
                        self._source, work.reason or "", time.perf_counter() - t0)

    def _call(self, fn: Callable[[str], Any], sql: str, fired: dict | None,
              work: Any = None) -> Any:
        try:
            out = fn(sql)
        except EngineError as e:
            if work is not None and work.stopped:  # interrupted for app.sessions: 409 / 499
                raise work.problem(self._source) from None
            if server_timeout(e.message):
                raise StatementTimeout(self._source, self._ms,
                                       e.message if CLIENT_DEADLINE in e.message else None) from None
            if isinstance(e, EngineUnavailable):
                raise  # the warehouse is down (even if the timer fired meanwhile): 503
            if fired is not None and fired["fired"]:
                raise StatementTimeout(self._source, self._ms) from None
            if self._user_sql:
                raise PlanError(pointer("filter_sql"), "the engine could not evaluate "
                                f"filter_sql: {e.message.splitlines()[0][:300]}",
                                slug="bad-filter-sql", title="filter_sql failed on the engine") from None
            raise
        if work is not None and work.stopped:  # it ended before the interrupt reached it
            raise work.problem(self._source)
        return out

    def execute(self, sql: str, params: Any = None) -> Any:
        fn = self._engine.execute
        return self._run(fn if not params else lambda q: fn(q, params), sql)

    def fetch_row(self, sql: str, params: Any = None) -> Any:
        fn = self._engine.fetch_row
        return self._run(fn if not params else lambda q: fn(q, params), sql)


#: pauses between the interrupts sent to a stopped request's statement: a cancel that
#: reaches the driver before the statement has started is lost (DuckDB's interrupt, a
#: PostgreSQL cancel while no connection is active yet), so it is sent again until the
#: statement has ended (at most len + 1 times, ~1.6 s in all)
_REFIRE_S = (0.02, 0.05, 0.1, 0.2, 0.4, 0.8)


#: how long a statement's end waits for an interrupt in flight (MariaDB's KILL QUERY
#: connection is bounded by 2 s connect / read / write timeouts)
_INTERRUPT_WAIT_S = 10.0


def _interrupt_until_done(interrupt: Callable[[], None], state: dict,
                          lock: threading.Lock) -> None:
    for pause in (0.0, *_REFIRE_S):
        if pause:
            time.sleep(pause)
        with lock:  # (sent under the lock: see GuardedEngine._run)
            if state["done"]:
                return
            try:
                interrupt()
            except Exception:  # noqa: BLE001 - finished meanwhile; the next try or the end decides
                pass


#: what engines write when their own watchdog gave up on a server that did not answer
CLIENT_DEADLINE = "(client-side deadline)"


def server_timeout(message: str) -> bool:
    """A timeout: enforced by the server itself (PostgreSQL ``statement_timeout``, MySQL
    ``max_execution_time``), or by the engine's client-side deadline when the server did not
    answer at all (504 either way: the gateway gave up waiting)."""
    low = message.lower()
    return ("canceling statement due to statement timeout" in low
            or "maximum statement execution time exceeded" in low
            or CLIENT_DEADLINE in low)


# =====================================================================================
# body size (also chunked bodies without Content-Length)
# =====================================================================================

async def replay_empty() -> dict:
    return {"type": "http.request", "body": b"", "more_body": False}


class BodyLimitMiddleware:
    """413 for a request body over ``max_bytes``, whether or not it declares its length.

    The body is read up front (it is at most ``max_bytes``, ~1 MB by default), then replayed
    to the app, so a chunked upload that grows past the cap is cut off without ever reaching
    the JSON parser."""

    def __init__(self, app: Any, max_bytes: int, body_timeout_s: float | None = None) -> None:
        self.app, self.max_bytes, self.body_timeout_s = app, max_bytes, body_timeout_s

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if scope["type"] != "http" or scope.get("method") in ("GET", "HEAD", "OPTIONS"):
            await self.app(scope, receive, send)
            return
        headers = {k.lower(): v for k, v in scope.get("headers", [])}
        length = headers.get(b"content-length")
        if length is not None:
            try:
                declared = int(length)
            except ValueError:
                declared = -1
            if declared < 0:
                await self._reject(scope, send, 400, "bad-request", "Malformed request",
                                   "Content-Length is not a number")
                return
            if declared > self.max_bytes:
                await self._too_large(scope, send, f"the body has {declared} bytes")
                return
        chunks: list[bytes] = []
        size = 0
        more = True
        # a body dribbled byte by byte must not hold a connection (and its memory) forever:
        # the whole body has body_timeout_s to arrive, else 408 (RFC 9110, 15.5.9)
        end = None if not self.body_timeout_s else asyncio.get_running_loop().time() + self.body_timeout_s
        while more:
            if end is None:
                msg = await receive()
            else:
                try:
                    msg = await asyncio.wait_for(receive(), max(end - asyncio.get_running_loop().time(), 0.0))
                except TimeoutError:
                    await self._reject(scope, send, 408, "body-timeout", "Request body too slow",
                                       f"the body did not arrive within {self.body_timeout_s:g} s "
                                       "(server body_timeout_s)")
                    return
            if msg["type"] == "http.disconnect":
                return
            body = msg.get("body", b"")
            size += len(body)
            if size > self.max_bytes:
                await self._too_large(scope, send, f"the body has more than {self.max_bytes} bytes")
                return
            chunks.append(body)
            more = msg.get("more_body", False)
        if scope.get("path", "").startswith("/v1/"):  # JSON routes: app.body checks first
            from app.body import check_body
            from app.problems import problem_response

            ctype = headers.get(b"content-type")
            problem = check_body(b"".join(chunks), ctype.decode("latin-1") if ctype else None)
            if problem is not None:
                await problem_response(problem, scope.get("path"))(scope, replay_empty, send)
                return
        replayed = False

        async def replay() -> dict:
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": b"".join(chunks), "more_body": False}
            return await receive()

        await self.app(scope, replay, send)

    async def _too_large(self, scope: dict, send: Callable, what: str) -> None:
        await self._reject(scope, send, 413, "body-too-large", "Request body too large",
                           f"{what}; the limit is {self.max_bytes} (server max_body_bytes)")

    async def _reject(self, scope: dict, send: Callable, status: int, slug: str, title: str,
                      detail: str) -> None:
        from app.encode import dumps

        body = dumps(Problem(status, slug, title, detail).body(scope.get("path")))
        await send({"type": "http.response.start", "status": status,
                    "headers": [(b"content-type", PROBLEM_JSON.encode()),
                                (b"content-length", str(len(body)).encode()),
                                (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})
