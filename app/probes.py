"""Probes that never wait behind queries.

* **Liveness** (``/healthz``) is an ``async`` route that does no I/O: it runs on the event
  loop, so a full worker thread pool (every thread busy with a slow chart) cannot delay it.
* **Readiness** (``/readyz``) checks each source (schema and row count through the catalog)
  in a thread of its own, under a short budget of its own (``[server] ready_timeout_s``,
  ``app.deadline``), at most once per ``ready_ttl_s`` per source: 60 probes while a
  warehouse is down share one check per source instead of filling the thread pool, and each
  answers within the budget whether or not the check has finished (a check still running is
  reported as not ready, with how long it has run).
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import threading
import time
from typing import Any

from app import deadline
from app.engines import EngineError


class Readiness:
    def __init__(self, catalog: Any, timeout_s: float = 2.0, ttl_s: float = 1.0) -> None:
        self.catalog = catalog
        self.timeout_s, self.ttl_s = timeout_s, ttl_s
        self._lock = threading.Lock()
        self._running: dict[str, tuple[float, concurrent.futures.Future]] = {}
        self._last: dict[str, tuple[float, dict[str, Any]]] = {}  # check started at, detail

    def _check(self, name: str, fut: concurrent.futures.Future, started: float) -> None:
        t0 = time.perf_counter()
        engine = self.catalog.config(name).engine
        try:
            with deadline.within(self.timeout_s):
                entry = self.catalog.entry(name)
            detail: dict[str, Any] = {"ready": True, "engine": engine, "row_count": entry.row_count,
                                      "columns": len(entry.schema.columns)}
        except EngineError as e:
            detail = {"ready": False, "engine": engine, "error": e.message}
        except Exception as e:  # noqa: BLE001 - a probe must answer, whatever the engine raised
            detail = {"ready": False, "engine": engine, "error": f"{type(e).__name__}: {e}"}
        detail["check_ms"] = round((time.perf_counter() - t0) * 1000.0, 3)
        with self._lock:  # an answer is as old as the moment its check started
            self._last[name] = (started, detail)
            self._running.pop(name, None)
        fut.set_result(detail)

    def _start(self, name: str, now: float) -> concurrent.futures.Future | None:
        """The running check of ``name`` (started now if the last answer is too old)."""
        with self._lock:
            run = self._running.get(name)
            if run is not None:
                return run[1]
            last = self._last.get(name)
            if last is not None and now - last[0] < self.ttl_s:
                return None
            fut: concurrent.futures.Future = concurrent.futures.Future()
            self._running[name] = (now, fut)
        threading.Thread(target=self._check, args=(name, fut, now), daemon=True,
                         name=f"sluice-ready-{name}").start()
        return fut

    async def report(self, names: list[str]) -> tuple[bool, dict[str, Any]]:
        now = time.monotonic()
        futs = [f for f in (self._start(n, now) for n in names) if f is not None]
        if futs:
            await asyncio.wait([asyncio.wrap_future(f) for f in futs], timeout=self.timeout_s)
        out: dict[str, Any] = {}
        now = time.monotonic()
        with self._lock:
            for n in names:
                run = self._running.get(n)
                last = self._last.get(n)
                if last is not None and (run is None or now - last[0] < self.ttl_s):
                    out[n] = dict(last[1], age_ms=round((now - last[0]) * 1000.0, 1))
                else:
                    out[n] = {"ready": False, "engine": self.catalog.config(n).engine,
                              "error": f"no answer within {self.timeout_s:g} s "
                                       "(ready_timeout_s); the check is still running",
                              "check_ms": round((now - run[0]) * 1000.0, 3) if run else None}
        return all(d["ready"] for d in out.values()), out
