"""Shared answer cache in Redis: several sluice replicas see one another's answers.

Optional (``[cache] url = "redis://host:6379/0"``); ``app.cache.ResultCache`` consults it
after its own LRU and before running a chart, so the key is the same as the local one
(canonical request, data version, representation) — hashed (SHA-256) into
``sluice:v1:answer:<hex>``.

* **Values** are the encoded JSON answer (the bytes a local hit would send) with its media
  type and timing, compressed with zlib (RFC 1950/1951, level 1: fast; chart answers are
  repetitive JSON and shrink several times). A value over ``shared_max_value_bytes`` after
  compression is not stored; every value has a TTL (``shared_ttl_s``), and the total is
  bounded server-side by Redis ``maxmemory`` with an LRU policy (deploy/compose.replicas.yaml).
  Arrow answers (kept as tables, not bytes) stay in each replica's own cache.
* **Single flight across replicas**: the replica that misses takes a short lock
  (``SET lock NX PX lock_ms``, common practice for a Redis lease), refreshes it while the
  chart runs (compare-and-extend in a Lua script, so only the holder extends or deletes it),
  stores the answer and releases the lock. The others poll the answer key (every
  ``poll_ms``) while the lock exists, for at most ``wait_ms``; if the holder dies its lease
  runs out within ``lock_ms`` and a waiter takes over, so nothing is lost.
* **Redis down or slow never fails a request**: every call has a short socket timeout
  (``timeout_ms``); an error marks the cache down (one log line, the metric
  ``sluice_cache_events_total{event="shared_error"}``) and the request goes on with the
  local cache only. Further calls are skipped until a back-off (0.5 s doubling to 30 s)
  has passed, then one call tries again and, if it works, the shared cache is back
  (logged once).
"""

from __future__ import annotations

import hashlib
import logging
import threading
import time
import uuid
import zlib
from typing import Any, Callable

import orjson

log = logging.getLogger("sluice.shared_cache")

PREFIX = "sluice:v1:"
DEFAULTS = {"shared_ttl_s": 3600.0, "shared_max_value_bytes": 4 * 1024 * 1024,
            "lock_ms": 5000, "wait_ms": 30000, "poll_ms": 20, "timeout_ms": 250}

_EXTEND = """if redis.call('get', KEYS[1]) == ARGV[1] then
  return redis.call('pexpire', KEYS[1], ARGV[2]) else return 0 end"""
_RELEASE = """if redis.call('get', KEYS[1]) == ARGV[1] then
  return redis.call('del', KEYS[1]) else return 0 end"""


def digest(key: tuple) -> str:
    """SHA-256 of a ``ResultCache`` key (canonical request, data version, representation)."""
    h = hashlib.sha256()
    for part in key:
        b = part if isinstance(part, bytes) else str(part).encode()
        h.update(len(b).to_bytes(8, "big"))
        h.update(b)
    return h.hexdigest()


def pack(body: bytes, media_type: str, timing: dict[str, float]) -> bytes:
    meta = orjson.dumps({"m": media_type, "t": timing})
    return zlib.compress(len(meta).to_bytes(4, "big") + meta + body, 1)


def unpack(value: bytes) -> tuple[bytes, str, dict[str, float]]:
    raw = zlib.decompress(value)
    n = int.from_bytes(raw[:4], "big")
    meta = orjson.loads(raw[4:4 + n])
    return raw[4 + n:], meta["m"], meta["t"]


class SharedCache:
    def __init__(self, url: str, client: Any = None, **opts: Any) -> None:
        o = {**DEFAULTS, **{k: v for k, v in opts.items() if v is not None}}
        self.url = url
        self.ttl_ms = int(float(o["shared_ttl_s"]) * 1000)
        self.max_value = int(o["shared_max_value_bytes"])
        self.lock_ms = int(o["lock_ms"])
        self.wait_s = int(o["wait_ms"]) / 1000.0
        self.poll_s = int(o["poll_ms"]) / 1000.0
        self.owner = uuid.uuid4().hex  # this replica's lease token prefix
        if client is None:
            import redis

            t = int(o["timeout_ms"]) / 1000.0
            client = redis.Redis.from_url(url, socket_timeout=t, socket_connect_timeout=t,
                                          retry_on_timeout=False, health_check_interval=0)
        self.r = client
        self._extend = self.r.register_script(_EXTEND)
        self._release = self.r.register_script(_RELEASE)
        self._lock = threading.Lock()
        self._down_until = 0.0
        self._backoff = 0.0
        self.errors = 0
        self.up = True

    # ---- health ----------------------------------------------------------------------------
    def _call(self, fn: Callable[[], Any], default: Any = None) -> Any:
        """``fn()`` unless Redis is in its back-off; any Redis error -> ``default``."""
        now = time.monotonic()
        if now < self._down_until:
            return default
        try:
            out = fn()
        except Exception as e:  # noqa: BLE001 - ConnectionError, TimeoutError, ResponseError
            self._failed(e)
            return default
        if not self.up:
            with self._lock:
                if not self.up:
                    self.up, self._backoff = True, 0.0
                    log.warning("shared cache %s is reachable again", self._where())
        return out

    def _failed(self, e: Exception) -> None:
        with self._lock:
            self.errors += 1
            self._backoff = min(30.0, self._backoff * 2 if self._backoff else 0.5)
            self._down_until = time.monotonic() + self._backoff
            was_up, self.up = self.up, False
        _event("shared_error")
        if was_up:
            log.warning("shared cache %s failed (%s: %s): local cache only, retrying in %.1f s",
                        self._where(), type(e).__name__, str(e)[:200], self._backoff)

    def _where(self) -> str:
        return self.url.split("@")[-1]  # never log a password in the URL

    # ---- answers -----------------------------------------------------------------------------
    def get(self, key: tuple) -> tuple[bytes, str, dict[str, float]] | None:
        value = self._call(lambda: self.r.get(PREFIX + "answer:" + digest(key)))
        if value is None:
            return None
        try:
            return unpack(value)
        except Exception:  # noqa: BLE001 - a foreign or truncated value: ignore it
            return None

    def put(self, key: tuple, body: bytes, media_type: str, timing: dict[str, float]) -> bool:
        value = pack(body, media_type, timing)
        if len(value) > self.max_value:
            _event("shared_too_large")
            return False
        return bool(self._call(lambda: self.r.set(PREFIX + "answer:" + digest(key), value,
                                                  px=self.ttl_ms), False))

    # ---- single flight -----------------------------------------------------------------------
    def lease(self, key: tuple) -> "Lease | None":
        """The lock for ``key`` if this replica got it (it should compute), else None."""
        name = PREFIX + "lock:" + digest(key)
        token = f"{self.owner}:{uuid.uuid4().hex}"
        got = self._call(lambda: self.r.set(name, token, nx=True, px=self.lock_ms), None)
        return Lease(self, name, token) if got else None  # None: held elsewhere, or Redis down

    def locked(self, key: tuple) -> bool:
        return bool(self._call(lambda: self.r.exists(PREFIX + "lock:" + digest(key)), 0))

    def wait(self, key: tuple) -> tuple[bytes, str, dict[str, float]] | None:
        """Poll for another replica's answer while its lock stands, at most ``wait_ms``."""
        deadline = time.monotonic() + self.wait_s
        while time.monotonic() < deadline and self.up:
            got = self.get(key)
            if got is not None:
                return got
            if not self.locked(key):
                return self.get(key)  # stored just before the lock went, or the holder died
            time.sleep(self.poll_s)
        return None


class Lease:
    """A held lock, extended every ``lock_ms / 3`` until released."""

    def __init__(self, cache: SharedCache, name: str, token: str) -> None:
        self.cache, self.name, self.token = cache, name, token
        self._stop = threading.Event()
        t = threading.Thread(target=self._keep, daemon=True, name="sluice-lease")
        t.start()

    def _keep(self) -> None:
        c = self.cache
        while not self._stop.wait(c.lock_ms / 3000.0):
            c._call(lambda: c._extend(keys=[self.name], args=[self.token, c.lock_ms]))

    def release(self) -> None:
        self._stop.set()
        c = self.cache
        c._call(lambda: c._release(keys=[self.name], args=[self.token]))


def _event(event: str) -> None:
    try:
        from app import observability

        observability.CACHE_EVENTS.labels("*", event).inc()
    except Exception:  # noqa: BLE001 - metrics never break an answer
        pass
