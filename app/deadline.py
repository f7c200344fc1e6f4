"""Request deadlines: one monotonic instant per request that every engine call respects.

A chart request runs under its source's ``statement_timeout_ms`` as a whole -- planning,
the extents statement, the main statement, shaping -- not per statement: ``within(s)``
opens the budget (nested budgets only ever shorten it), ``remaining()`` is what is left.

* ``app.limits.GuardedEngine`` times each statement's cancellation with ``remaining()``
  and refuses to start one once the budget is spent (504);
* engines whose driver can block on a silent server (PostgreSQL, MySQL/MariaDB, the
  ClickHouse HTTP client) give every call a client-side deadline of ``remaining()`` (or
  their own statement timeout outside a request) plus ``GRACE_S``, so a frozen warehouse
  answers 504 on time instead of never (see each engine);
* probes (``/readyz``) open their own, short budget.

``after(seconds, fn)`` is the alarm those cancellations use: one thread per process keeps
every armed alarm in a heap, rather than a ``threading.Timer`` thread started (and
cancelled) per statement, which cost ~0.15 ms a statement and one thread per statement in
flight. A due alarm runs its function on a thread of its own, so a cancel that blocks (a
PostgreSQL cancel request, a MariaDB ``KILL QUERY`` connection) holds up no other alarm.

The deadline lives in a ``ContextVar``: Starlette copies the context into the worker thread
of a sync route, so the engine code running there sees the request's budget.
"""

from __future__ import annotations

import contextlib
import heapq
import itertools
import os
import threading
import time
from collections.abc import Callable, Iterator
from contextvars import ContextVar
from typing import Any

#: how long past the budget a driver may take to report a cancelled statement before the
#: engine drops the connection itself (the server may not answer a cancel at all)
GRACE_S = 0.5

_deadline: ContextVar[float | None] = ContextVar("sluice_deadline", default=None)


class DeadlineExceeded(Exception):
    """The request's budget is spent (raised between stages; the service maps it to 504)."""


@contextlib.contextmanager
def within(seconds: float | None) -> Iterator[None]:
    """Run the block under a budget of ``seconds`` (None or <= 0: no new budget). A budget
    already open stays in force when it ends sooner."""
    if seconds is None or seconds <= 0:
        yield
        return
    new = time.monotonic() + seconds
    old = _deadline.get()
    token = _deadline.set(new if old is None else min(old, new))
    try:
        yield
    finally:
        _deadline.reset(token)


def remaining() -> float | None:
    """Seconds left in the current budget (may be <= 0), or None without one."""
    d = _deadline.get()
    return None if d is None else d - time.monotonic()


def budget(default: float | None) -> float | None:
    """The time a call may take now: what is left of the request's budget, else ``default``
    (an engine's own statement timeout). None: unbounded."""
    left = remaining()
    if left is None:
        return default if default and default > 0 else None
    return max(left, 0.0)


def check() -> None:
    """Raise :class:`DeadlineExceeded` once the budget is spent."""
    left = remaining()
    if left is not None and left <= 0:
        raise DeadlineExceeded()


class Alarm:
    """A function due at a monotonic instant, unless cancelled first (``after``)."""

    __slots__ = ("at", "_fn", "_args", "_lock", "cancelled", "fired")

    def __init__(self, at: float, fn: Callable[..., Any], args: tuple) -> None:
        self.at, self._fn, self._args = at, fn, args
        self._lock = threading.Lock()
        self.cancelled = False
        self.fired = False  # the function was started (it may still be running)

    def cancel(self) -> None:
        """Stop the alarm if it has not fired; after it fired this does nothing."""
        with self._lock:
            now = not self.fired and not self.cancelled
            if now:
                self.cancelled = True
        if now:
            _ALARMS.dropped()

    def _fire(self) -> None:
        with self._lock:
            if self.cancelled:
                return
            self.fired = True
        threading.Thread(target=self._fn, args=self._args, daemon=True,
                         name="sluice-alarm").start()


class _Alarms:
    """The armed alarms of this process, in a heap, and the one thread that fires them."""

    def __init__(self) -> None:
        self._cv = threading.Condition()
        self._heap: list[tuple[float, int, Alarm]] = []
        self._seq = itertools.count()
        self._cancelled = 0  # cancelled alarms still in the heap
        self._pid: int | None = None  # the thread belongs to this process (not a fork)

    def add(self, alarm: Alarm) -> None:
        with self._cv:
            if self._pid != os.getpid():
                self._pid = os.getpid()
                threading.Thread(target=self._loop, daemon=True, name="sluice-alarms").start()
            heapq.heappush(self._heap, (alarm.at, next(self._seq), alarm))
            if self._heap[0][2] is alarm:
                self._cv.notify()

    def dropped(self) -> None:
        with self._cv:
            self._cancelled += 1
            if self._cancelled > 64 and self._cancelled > len(self._heap) // 2:
                self._heap = [e for e in self._heap if not e[2].cancelled]
                heapq.heapify(self._heap)
                self._cancelled = 0

    def _loop(self) -> None:
        pid = os.getpid()
        while True:
            with self._cv:
                if self._pid != pid:
                    return
                while self._heap and self._heap[0][2].cancelled:
                    heapq.heappop(self._heap)
                    self._cancelled = max(0, self._cancelled - 1)
                if not self._heap:
                    self._cv.wait()
                    continue
                wait = self._heap[0][0] - time.monotonic()
                if wait > 0:
                    self._cv.wait(wait)
                    continue
                alarm = heapq.heappop(self._heap)[2]
            alarm._fire()

    def armed(self) -> int:
        """Alarms not yet fired nor cancelled (for tests)."""
        with self._cv:
            return sum(1 for e in self._heap if not e[2].cancelled)


_ALARMS = _Alarms()


def after(seconds: float, fn: Callable[..., Any], *args: Any) -> Alarm:
    """Run ``fn(*args)`` (on a thread of its own) ``seconds`` from now unless the returned
    alarm is cancelled first; the ``threading.Timer`` this replaces, without a thread per
    alarm."""
    alarm = Alarm(time.monotonic() + max(0.0, seconds), fn, args)
    _ALARMS.add(alarm)
    return alarm
