"""Result cache: encoded answers keyed by (canonical request, source data version).

Why it looks like this:

* **Key.** The canonical request is the validated model dumped as JSON with sorted keys
  (``canonical``), so key order, whitespace and defaults written out or left implicit all map
  to one entry. The second part is ``engine.data_version()``: file identity (inode, size,
  mtime) for DuckDB, so a rebuilt file is never answered from old entries; a TTL bucket for
  server engines (their module decides). The third part is the representation (``json`` /
  ``arrow``), because what is cached is the encoded body. A fourth part, the calling API
  key's row condition on the source (``[[keys]] rows``), keeps keys that see different rows
  apart; the shared cache's digest covers every part.
* **Encoded bytes.** A hit must cost ~nothing, so the JSON body is stored *without* its
  ``cache`` and ``timing_ms`` members and these are appended on the way out (``stamp``): one
  bytes concatenation, no re-encoding.
* **LRU with a byte budget** (``[cache] max_bytes``, default 64 MiB): entries are charged their
  body size plus key size; the least recently used go first. An answer larger than the whole
  budget is not stored.
* **Single flight.** Identical requests that arrive while the first is still running wait for
  it and share its answer, so N concurrent identical requests run the engine once.

* **Shared** (optional, ``[cache] url``): ``app.shared_cache`` in Redis behind the LRU, so
  replicas share JSON answers and run a chart once between them (a lease in Redis); Redis
  down or slow only means local caching.

Counters go to ``app.observability`` when that module is present (``hit``, ``miss``,
``store``, ``evict``; with a shared cache ``shared_hit``, ``shared_store``, ``shared_wait``,
``shared_error``, ``shared_too_large``).
"""

from __future__ import annotations

import threading
import time
from collections import OrderedDict
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any, Callable

import orjson

from app.engines import ENGINES

try:  # issue 5's metrics; the cache works without them
    from app import observability as _obs
except Exception:  # noqa: BLE001 - optional
    _obs = None

DEFAULT_MAX_BYTES = 64 * 1024 * 1024
DEFAULT_TTL_S = 60.0


def source_version(engine_kind: str, engine: Any, ttl_s: float = DEFAULT_TTL_S,
                   now: float | None = None) -> str:
    """The data-version part of a cache key. File engines: ``engine.data_version()`` (file
    identity) alone. Server engines: their own version (statistics counters, where they
    have one, may lag or miss changes) plus a time bucket of ``ttl_s`` seconds, so no
    answer outlives ``[cache] ttl_s`` (0 disables caching for server sources)."""
    version = engine.data_version()
    kind = ENGINES.get(engine_kind)
    if kind is not None and kind.file:  # data_version() is the files' identity: exact
        return version
    if ttl_s <= 0:
        return f"{version}|nocache|{time.time_ns()}"
    t = time.time() if now is None else now
    return f"{version}|ttl{ttl_s:g}:{int(t // ttl_s)}"


def canonical(model: Any) -> bytes:
    """Sorted JSON of a validated pydantic model (aliases as in the request)."""
    return orjson.dumps(model.model_dump(mode="json", by_alias=True, exclude_none=True),
                        option=orjson.OPT_SORT_KEYS)


@dataclass
class Entry:
    body: bytes            # encoded answer; for JSON without its closing "}" stamp members
    media_type: str
    timing: dict[str, float]  # how long the original answer took (reported as timing_ms.original)
    source: str = ""

    @property
    def nbytes(self) -> int:
        return len(self.body) + 128


def stamp_json(open_body: bytes, cache: str, timing: dict[str, float]) -> bytes:
    """Close a JSON body cut before its last ``}`` with ``cache`` and ``timing_ms``."""
    return b"".join((open_body, b',"cache":"', cache.encode(), b'","timing_ms":',
                     orjson.dumps(timing), b"}"))


def open_json(payload: dict[str, Any]) -> bytes:
    """orjson body of ``payload`` minus its closing brace, ready for ``stamp_json``."""
    from app.encode import dumps  # exact decimals, dates (app.encode._default)

    return dumps(payload)[:-1]


class ResultCache:
    def __init__(self, max_bytes: int = DEFAULT_MAX_BYTES, enabled: bool = True,
                 shared: Any = None, ttl_s: float = DEFAULT_TTL_S) -> None:
        self.max_bytes = int(max_bytes)
        #: ``[cache] ttl_s``: the time bucket of a server source's data version (source_version)
        self.ttl_s = float(ttl_s)
        self.enabled = bool(enabled) and self.max_bytes > 0
        #: optional ``app.shared_cache.SharedCache`` (Redis) behind the LRU: JSON answers only
        self.shared = shared if self.enabled else None
        self._entries: OrderedDict[tuple, Entry] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self._inflight: dict[tuple, Future] = {}
        self.hits = self.misses = self.stores = self.evictions = self.coalesced = 0

    @classmethod
    def from_config(cls, cfg: dict[str, Any]) -> "ResultCache":
        """The ``[cache]`` table: ``enabled``, ``max_bytes``, ``ttl_s`` and, with ``url``, the shared
        Redis cache (``app.shared_cache``) and its options."""
        shared = None
        if cfg.get("url") and cfg.get("enabled", True):
            from app.shared_cache import DEFAULTS, SharedCache

            shared = SharedCache(cfg["url"], **{k: cfg[k] for k in DEFAULTS if k in cfg})
        return cls(cfg.get("max_bytes", DEFAULT_MAX_BYTES), cfg.get("enabled", True), shared,
                   cfg.get("ttl_s", DEFAULT_TTL_S))

    # ---- keys ----------------------------------------------------------------------------
    @staticmethod
    def key(canonical_request: bytes, data_version: str, variant: str = "json",
            rows: str | None = None) -> tuple:
        """``rows``: the API key's row condition on the source (app.auth), a fourth part
        only when there is one, so keys without conditions keep their keys (and shared
        entries) as they were."""
        base = (canonical_request, data_version, variant)
        return base if rows is None else base + (rows,)

    # ---- LRU -----------------------------------------------------------------------------
    @property
    def nbytes(self) -> int:
        return self._bytes

    def __len__(self) -> int:
        return len(self._entries)

    def get(self, key: tuple) -> Entry | None:
        if not self.enabled:
            return None
        with self._lock:
            e = self._entries.get(key)
            if e is not None:
                self._entries.move_to_end(key)
                self.hits += 1
        if e is not None:
            self._event(e.source, "hit")
        return e

    def put(self, key: tuple, entry: Entry) -> None:
        if not self.enabled:
            return
        size = entry.nbytes + len(key[0]) + len(key[1])
        if size > self.max_bytes:
            return
        evicted = []
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self._bytes -= old.nbytes + len(key[0]) + len(key[1])
            self._entries[key] = entry
            self._bytes += size
            self.stores += 1
            while self._bytes > self.max_bytes and self._entries:
                k, e = self._entries.popitem(last=False)
                self._bytes -= e.nbytes + len(k[0]) + len(k[1])
                self.evictions += 1
                evicted.append(e.source)
        self._event(entry.source, "store")
        for src in evicted:
            self._event(src, "evict")

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()
            self._bytes = 0

    # ---- single flight -------------------------------------------------------------------
    def compute(self, key: tuple, source: str, fn: Callable[[], Entry],
                lookup: bool = True) -> tuple[Entry, str]:
        """The cached entry (``"hit"``) or ``fn()``'s (``"miss"``); concurrent callers with
        the same key wait for the one running and share its entry (reported as a hit: they
        did not run the engine). ``lookup=False`` (``Cache-Control: no-cache``) skips the
        lookup and the sharing, runs ``fn`` and refreshes the entry."""
        if not self.enabled:
            return fn(), "miss"
        if lookup:
            e = self.get(key)
            if e is not None:
                return e, "hit"
            with self._lock:
                fut = self._inflight.get(key)
                leader = fut is None
                if leader:
                    fut = self._inflight[key] = Future()
            if not leader:
                with self._lock:
                    self.coalesced += 1
                try:
                    e = fut.result()
                except Exception as exc:
                    if getattr(exc, "own_request", False):  # the leader's request was stopped
                        return self.compute(key, source, fn, lookup)  # (app.sessions): run here
                    raise
                self._event(source, "hit")
                return e, "hit"
        else:
            fut = None
        shared = self.shared if key[2] == "json" else None
        lease = None
        try:
            if shared is not None and lookup:  # another replica's answer, or its flight
                e = self._from_shared(key, source)
                if e is None:
                    lease = shared.lease(key)
                    if lease is None and shared.up:  # held elsewhere: wait for its answer
                        self._event(source, "shared_wait")
                        e = self._from_shared(key, source, wait=True)
                        if e is None:  # the holder died or is slow: run it here
                            lease = shared.lease(key)
                if e is not None:
                    self._finish(key, fut, e)
                    return e, "hit"
            with self._lock:
                self.misses += 1
            self._event(source, "miss")
            e = fn()
            e.source = source
            self.put(key, e)  # stored before the flight ends: no gap for a second run
            if shared is not None and type(e) is Entry:
                if shared.put(key, e.body, e.media_type, e.timing):
                    self._event(source, "shared_store")
        except BaseException as exc:
            if fut is not None:
                fut.set_exception(exc)
                with self._lock:
                    self._inflight.pop(key, None)
            raise
        finally:
            if lease is not None:
                lease.release()
        self._finish(key, fut, e)
        return e, "miss"

    def _finish(self, key: tuple, fut: Future | None, e: Entry) -> None:
        if fut is not None:
            fut.set_result(e)
            with self._lock:
                self._inflight.pop(key, None)

    def _from_shared(self, key: tuple, source: str, wait: bool = False) -> Entry | None:
        got = self.shared.wait(key) if wait else self.shared.get(key)
        if got is None:
            return None
        body, media_type, timing = got
        e = Entry(body, media_type, timing, source)
        self.put(key, e)
        self._event(source, "shared_hit")
        return e

    @staticmethod
    def _event(source: str, event: str) -> None:
        if _obs is None:
            return
        try:
            _obs.CACHE_EVENTS.labels(source, event).inc()
        except Exception:  # noqa: BLE001 - metrics must never break an answer
            pass
