"""Abandoned work is stopped: sessions that supersede older requests, and clients that left.

Dashboards ask a chart again on every move of a brush; the answer to a brush position the
user has already left only keeps the engine busy. Two things stop such work:

* **sessions**: a chart request (``/v1/chart``, each chart of ``/v1/batch``, or the batch as
  a whole) may name a ``session``, a short client-chosen string. A newer request with the
  same session and the same API key (``app.auth.Grant.key``; sessions of different keys
  never touch) *supersedes* the older one: its running statements are interrupted and it
  answers 409 (problem type ``superseded``). Newer means arrived later at this process (a
  sequence number taken when the request comes in), so an older request that reaches its
  claim late is the one refused;
* **disconnects**: when the HTTP client goes away before the answer, ``WorkMiddleware`` sees
  the ASGI ``http.disconnect`` message and stops the request's statements the same way
  (answer 499, which nobody reads; it shows in logs and metrics).

Both only mark the request's :class:`Work` as stopped and call the functions registered on
it. ``app.limits.GuardedEngine`` registers one per running statement: the engine's own
``canceller()`` (DuckDB interrupt, PostgreSQL cancel request, MySQL ``KILL QUERY``, SQLite
interrupt, Spark job group / Connect tag), the same one the statement timeout fires, and it
starts no statement for a stopped request. Engine time of stopped statements and the count
of stopped requests go to ``app.observability`` (``sluice_abandoned_*``).

The registry (:class:`Sessions`, one per app) is bounded: it holds the sessions of running
requests plus the newest sequence number of recently finished ones (so a late, older
request of that session is still refused), at most ``max_entries`` in all, least recently
used dropped first. A request releases its sessions when it ends, whatever the outcome.
"""

from __future__ import annotations

import asyncio
import itertools
import threading
from collections import OrderedDict
from collections.abc import Callable
from contextvars import ContextVar
from typing import Any

from app.problems import Problem

SUPERSEDED = "superseded"
DISCONNECTED = "disconnected"


class Stopped(Problem):
    """The request's own work was stopped (not the fault of a request sharing its answer:
    the result cache's single flight lets a waiting request run the chart itself)."""

    own_request = True


class Superseded(Stopped):
    def __init__(self, source: str, session: str | None) -> None:
        super().__init__(409, "superseded", "Replaced by a newer request",
                         f"a newer request of the same session ({session!r}) replaced this "
                         "one; its statements were cancelled and it has no answer",
                         source=source, session=session)


class ClientGone(Stopped):
    def __init__(self, source: str) -> None:
        super().__init__(499, "client-closed", "Client closed the request",
                         "the client disconnected before the answer; its statements were "
                         "cancelled", source=source)


class Work:
    """The engine work of one HTTP request: the stop functions of its running statements,
    and, once stopped, why (``superseded`` by a newer request of a session, or the client
    ``disconnected``)."""

    def __init__(self, registry: "Sessions | None" = None, seq: int = 0) -> None:
        self.registry, self.seq = registry, seq
        self.reason: str | None = None
        self.session: str | None = None  # the session a newer request claimed
        self.finished = False
        self._claims: list[tuple[str, str]] = []
        self._stops: dict[int, Callable[[], None]] = {}
        self._ids = itertools.count(1)
        self._counted = False
        self._lock = threading.Lock()

    # ---- sessions ------------------------------------------------------------------------
    def claim(self, session: str | None) -> None:
        """Run under ``session`` (of the caller's API key): older requests of it stop."""
        if session is None or self.registry is None:
            return
        from app import auth

        self.registry.claim((auth.current().key, session), self)

    # ---- stopping ------------------------------------------------------------------------
    def stop(self, reason: str, session: str | None = None) -> bool:
        """Mark the work stopped and fire every running statement's stop function. False
        when it had finished or was stopped already."""
        with self._lock:
            if self.reason is not None or self.finished:
                return False
            self.reason, self.session = reason, session
            stops = list(self._stops.values())
        for s in stops:
            s()
        return True

    @property
    def stopped(self) -> bool:
        return self.reason is not None

    def attach(self, stop: Callable[[], None]) -> int | None:
        """Register a running statement's stop function; None when already stopped (then
        the statement must not start)."""
        with self._lock:
            if self.reason is not None:
                return None
            n = next(self._ids)
            self._stops[n] = stop
            return n

    def detach(self, token: int | None) -> None:
        if token is not None:
            with self._lock:
                self._stops.pop(token, None)

    def problem(self, source: str) -> Stopped:
        """The answer of a stopped request (counted once per request)."""
        with self._lock:
            first, self._counted = not self._counted, True
        if first:
            from app import observability

            observability.record_abandoned(source, self.reason or SUPERSEDED)
        if self.reason == DISCONNECTED:
            return ClientGone(source)
        return Superseded(source, self.session)

    def check(self, source: str) -> None:
        """Raise the stopped request's problem, if it was stopped."""
        if self.reason is not None:
            raise self.problem(source)

    def finish(self) -> None:
        """The request ended: nothing more to stop; its sessions are released."""
        with self._lock:
            self.finished = True
            self._stops.clear()
        if self.registry is not None:
            for key in self._claims:
                self.registry.release(key, self)


class Sessions:
    """(API key, session) -> the running request of that session and the newest sequence
    number seen; bounded by ``max_entries`` (least recently used go first)."""

    def __init__(self, max_entries: int = 4096) -> None:
        self.max_entries = int(max_entries)
        self._d: OrderedDict[tuple[str, str], tuple[int, Work | None]] = OrderedDict()
        self._lock = threading.Lock()
        self._seq = itertools.count(1)

    def work(self) -> Work:
        """A new request's work, numbered in arrival order."""
        return Work(self, next(self._seq))

    def __len__(self) -> int:
        return len(self._d)

    def holder(self, key: tuple[str, str]) -> Work | None:
        """The running request of ``key`` ((API key, session)), if any."""
        with self._lock:
            got = self._d.get(key)
        return None if got is None else got[1]

    def running(self) -> int:
        with self._lock:
            return sum(1 for _, w in self._d.values() if w is not None)

    def claim(self, key: tuple[str, str], work: Work) -> None:
        with self._lock:
            seq, holder = self._d.get(key, (0, None))
            if seq > work.seq:  # a newer request of this session came first
                loser: Work | None = work
            else:
                loser = holder if holder is not work else None
                self._d[key] = (work.seq, work)
                self._d.move_to_end(key)
                work._claims.append(key)
                while len(self._d) > self.max_entries:
                    self._d.popitem(last=False)
        if loser is not None:
            loser.stop(SUPERSEDED, key[1])

    def release(self, key: tuple[str, str], work: Work) -> None:
        with self._lock:
            got = self._d.get(key)
            if got is not None and got[1] is work:
                self._d[key] = (got[0], None)  # remembered: a late, older request is refused


_current: ContextVar[Work | None] = ContextVar("sluice_work", default=None)


def current() -> Work | None:
    """The work of the request being served (Starlette copies the context into the worker
    thread of a sync route)."""
    return _current.get()


class WorkMiddleware:
    """Gives every ``POST /v1/...`` request its :class:`Work` and stops it when the client
    disconnects. The ASGI ``receive`` is read by one pump task only (the spec allows one
    reader): the app reads the messages the pump passes on, and an ``http.disconnect``
    before the app has answered stops the work."""

    def __init__(self, app: Any, registry: Sessions | None = None) -> None:
        self.app = app
        self.sessions = registry if registry is not None else Sessions()

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if (scope["type"] != "http" or scope.get("method") != "POST"
                or not scope.get("path", "").startswith("/v1/")):
            await self.app(scope, receive, send)
            return
        work = self.sessions.work()
        token = _current.set(work)
        queue: asyncio.Queue = asyncio.Queue()
        gone = asyncio.Event()

        async def pump() -> None:
            while True:
                msg = await receive()
                queue.put_nowait(msg)
                if msg["type"] == "http.disconnect":
                    gone.set()
                    work.stop(DISCONNECTED)
                    return

        async def inner_receive() -> dict:
            if gone.is_set() and queue.empty():  # (asked again after the disconnect)
                return {"type": "http.disconnect"}
            return await queue.get()

        task = asyncio.get_running_loop().create_task(pump())
        try:
            await self.app(scope, inner_receive, send)
        finally:
            work.finish()
            task.cancel()
            _current.reset(token)
