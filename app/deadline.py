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

The deadline lives in a ``ContextVar``: Starlette copies the context into the worker thread
of a sync route, so the engine code running there sees the request's budget.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from contextvars import ContextVar

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
