"""Access: API keys (stored hashed in the config) granting sources, and the CORS allow-list.

Config::

    [server]
    cors_origins = ["https://dash.example.org"]   # browsers on these origins may call the API

    [[keys]]
    name = "dashboards"                           # optional, shows in logs only
    hash = "sha256:9f86d08..."                    # or a bare 64-hex sha256, or pbkdf2 (below)
    sources = ["deliveries"]                      # or ["*"] for every source
    rows = { deliveries = "region = 'North'" }    # optional: only these rows (below)

With no ``[[keys]]`` the API is open (a local tool). With keys, every route but the probes
and the docs (``/healthz``, ``/readyz``, ``/docs``, ``/openapi.json``, ``/``, ``/static``) needs
``Authorization: Bearer <key>`` or ``X-API-Key: <key>``: no key or a key that matches no hash
is a 401 (``WWW-Authenticate: Bearer``); a source the key is not granted is a 403 — the same
answer whether or not the source exists, so names cannot be probed — and ``GET /v1/sources``
lists only the granted sources.

Hashes: ``sha256:<hex>`` (or the bare hex) is SHA-256 of the key — fine for long random keys
(``python -m app.auth new`` makes one); ``pbkdf2_sha256$<iterations>$<salt hex>$<hex>`` is a
salted, stretched hash for keys people choose (``python -m app.auth hash KEY``).
Comparisons use ``hmac.compare_digest``.

Verifying a key never runs on the event loop (a PBKDF2 check costs ~50 ms of CPU): the
stretching runs in a small thread pool of its own (``HASH_THREADS``), a verified key is
remembered by its SHA-256 digest (bounded LRU; good and bad keys in separate maps, so a flood
of bad keys cannot evict the good ones), and a client whose keys keep failing waits before
its next unknown key is checked -- ``asyncio.sleep``, so nobody else waits with it
(``Backoff``: doubling from 50 ms to 2 s, forgotten after a minute without failures) -- and
checks one key at a time, so many connections from one address cannot occupy every hashing
thread. The
client is the connection's address (behind a reverse proxy, let uvicorn take it from
``X-Forwarded-For``: ``forwarded_allow_ips``). ``/healthz`` never looks at keys.

**Row conditions** (``rows``, a table of source name -> condition): the key reads only the
rows of that source where the condition holds. The condition is written like ``filter_sql``
and passes its allow-list (``planner.filter_sql``); offset-less instants in it are UTC. It
is ANDed into the FROM of every statement the key causes (``planner.source.relation``):
charts, batches, extents, ``/v1/sql``, column profiles, row counts (``row_count`` of
``/v1/sources/{name}``, ``stats.source_rows``); ``/readyz`` shows such a key no row count.
The config check reads the text (one condition, no comments or ``;``) and needs the source
granted to the key; its columns and types are checked when the source is introspected
(start-up, each new data version): a condition that does not fit is logged, and the key's
requests to that source answer 503 ``row-condition-invalid`` (never the unfiltered rows).

``/metrics`` shows every source's name and counters, so with keys configured it needs an
**operator key** (``operator = true`` in its ``[[keys]]`` table); any other key gets a 403.
"""

from __future__ import annotations

import asyncio
import contextvars
import hashlib
import hmac
import re
import secrets
import sys
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

from app.problems import PROBLEM_JSON, Problem

#: paths that never need a key (probes, API docs, the preview page and its files)
OPEN_PATHS = ("/healthz", "/readyz", "/docs", "/docs/oauth2-redirect", "/redoc", "/openapi.json", "/")
OPEN_PREFIXES = ("/static/",)
#: needs no key and never looks at one (liveness does no work at all)
LIVENESS = "/healthz"
#: needs an operator key when keys are configured
OPERATOR_PATHS = ("/metrics",)
#: threads that may run PBKDF2 at once (off the event loop, apart from the routes' pool)
HASH_THREADS = 2

_HEX64 = re.compile(r"[0-9a-f]{64}")


@dataclass(frozen=True)
class ApiKey:
    hash: str
    sources: tuple[str, ...]
    name: str = ""
    operator: bool = False  # may read /metrics
    #: (source, row condition) pairs: the rows this key may read of those sources
    rows: tuple[tuple[str, str], ...] = ()
    index: int = -1  # position in [[keys]] (config errors name it)

    def grants(self, source: str) -> bool:
        return "*" in self.sources or source in self.sources


@dataclass(frozen=True)
class Grant:
    """Who is calling: the key's name and the sources it may read (``None``: all, no keys)."""

    name: str = ""
    sources: frozenset[str] | None = None
    operator: bool = False
    #: which configured key this is (its stored hash; "" without keys): names may repeat,
    #: and app.sessions keeps the sessions of different keys apart by it
    key: str = field(default="", repr=False)
    #: the key's row conditions, (source, condition text) pairs (``[[keys]] rows``)
    rows: tuple[tuple[str, str], ...] = ()

    def allows(self, source: str) -> bool:
        return self.sources is None or "*" in self.sources or source in self.sources

    def rows_for(self, source: str) -> str | None:
        """The row condition this key reads ``source`` under (None: every row)."""
        for name, cond in self.rows:
            if name == source:
                return cond
        return None


OPEN = Grant()
NOBODY = Grant("", frozenset())
_current: contextvars.ContextVar[Grant] = contextvars.ContextVar("sluice_grant", default=OPEN)


def current() -> Grant:
    """The grant of the request being served (set by :class:`AuthMiddleware`)."""
    return _current.get()


def allowed(source: str) -> bool:
    return current().allows(source)


def require(source: str, ptr: str | None = "/source") -> None:
    """403 unless the caller's key grants ``source`` (asked before the source is looked up,
    so an unknown and a forbidden source get the same answer)."""
    g = current()
    if not g.allows(source):
        raise Problem(403, "forbidden-source", "Source not granted",
                      f"this API key is not granted source {source!r}", ptr)


def rows_for(source: str) -> str | None:
    """The calling key's row condition on ``source`` (None: every row)."""
    return current().rows_for(source)


def filter_names(names: Iterable[str]) -> list[str]:
    g = current()
    return [n for n in names if g.allows(n)]


# ---- hashing -------------------------------------------------------------------------

def sha256_hex(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def hash_key(key: str, iterations: int = 200_000) -> str:
    """A salted PBKDF2-SHA256 hash for the config."""
    salt = secrets.token_hex(16)
    dk = hashlib.pbkdf2_hmac("sha256", key.encode("utf-8"), bytes.fromhex(salt), iterations)
    return f"pbkdf2_sha256${iterations}${salt}${dk.hex()}"


def _matches(stored: str, key: str) -> bool:
    if stored.startswith("pbkdf2_sha256$"):
        _, it, salt, want = stored.split("$")
        dk = hashlib.pbkdf2_hmac("sha256", key.encode("utf-8"), bytes.fromhex(salt), int(it))
        return hmac.compare_digest(dk.hex(), want)
    want = stored.removeprefix("sha256:")
    return hmac.compare_digest(sha256_hex(key), want)


def _valid_hash(h: str) -> bool:
    if h.startswith("pbkdf2_sha256$"):
        parts = h.split("$")
        return (len(parts) == 4 and parts[1].isdigit() and int(parts[1]) >= 1000
                and re.fullmatch(r"[0-9a-f]{8,}", parts[2]) is not None
                and _HEX64.fullmatch(parts[3]) is not None)
    return _HEX64.fullmatch(h.removeprefix("sha256:")) is not None


def parse_keys(raw: Any, sources: Iterable[str],
               fail: Callable[[tuple[str, ...], str, str | None], Exception]) -> list[ApiKey]:
    """``[[keys]]`` -> ApiKeys; every named source must exist."""
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise fail(("keys",), "must be an array of tables", "write [[keys]] (double brackets)")
    known = set(sources)
    out = []
    for i, k in enumerate(raw):
        key = ("keys", str(i))
        if not isinstance(k, dict):
            raise fail(key, "must be a table with hash and sources", "write [[keys]] then hash = ...")
        extra = set(k) - {"hash", "sources", "name", "operator", "rows"}
        if extra:
            raise fail(key + (sorted(extra)[0],), "unknown key",
                       "valid keys: hash, sources, name, operator, rows")
        h = k.get("hash")
        if not isinstance(h, str) or not _valid_hash(h.strip().lower()):
            raise fail(key + ("hash",), "is missing or not a hash",
                       'hash = "sha256:<64 hex digits>" or a pbkdf2_sha256$... string '
                       "(python -m app.auth hash KEY); never the key itself")
        srcs = k.get("sources")
        if not isinstance(srcs, list) or not srcs or not all(isinstance(s, str) for s in srcs):
            raise fail(key + ("sources",), "must be a non-empty list of source names",
                       'e.g. sources = ["deliveries"] (or ["*"] for all)')
        for s in srcs:
            if s != "*" and s not in known:
                raise fail(key + ("sources",), f"names unknown source {s!r}",
                           f"known sources: {', '.join(sorted(known))}")
        name = k.get("name", "")
        if not isinstance(name, str):
            raise fail(key + ("name",), "must be a string", 'e.g. name = "dashboards"')
        operator = k.get("operator", False)
        if not isinstance(operator, bool):
            raise fail(key + ("operator",), "must be true or false",
                       "operator = true lets this key read /metrics")
        rows = _parse_rows(k.get("rows"), srcs, known, key, fail)
        h = h.strip()
        h = h if h.startswith("pbkdf2_sha256$") else h.lower()
        out.append(ApiKey(h, tuple(srcs), name, operator, rows, i))
    return out


def _parse_rows(raw: Any, granted: list[str], known: set[str], key: tuple[str, ...],
                fail: Callable[[tuple[str, ...], str, str | None], Exception]
                ) -> tuple[tuple[str, str], ...]:
    """``rows = { source = "condition" }``: each source known and granted, each condition
    one condition of the filter_sql allow-list as far as it can be read without the source's
    columns (those are checked at introspection: app.catalog)."""
    from planner.errors import PlanError
    from planner.filter_sql import parse_filter_sql

    if raw is None:
        return ()
    example = "rows = { deliveries = \"region = 'North'\" }"
    if not isinstance(raw, dict) or not raw:
        raise fail(key + ("rows",), "must be a table of source name = condition", example)
    out = []
    for src, cond in raw.items():
        at = key + ("rows", src)
        if src not in known:
            raise fail(at, f"names unknown source {src!r}", f"known sources: {', '.join(sorted(known))}")
        if "*" not in granted and src not in granted:
            raise fail(at, f"source {src!r} is not in this key's sources",
                       "add it to sources or remove it from rows")
        if not isinstance(cond, str) or not cond.strip():
            raise fail(at, "must be a non-empty condition (text)", example)
        try:
            parse_filter_sql(cond)
        except PlanError as e:
            raise fail(at, f"is not a condition sluice accepts: {e.detail}",
                       "write it like filter_sql: columns, literals, comparisons, AND/OR/NOT, "
                       "IN, BETWEEN, LIKE (README: filter_sql)") from None
        out.append((src, cond.strip()))
    return tuple(out)


def parse_cors(raw: Any, fail: Callable[[tuple[str, ...], str, str | None], Exception]) -> list[str]:
    if raw is None:
        return []
    if not isinstance(raw, list) or not all(isinstance(o, str) and o for o in raw):
        raise fail(("server", "cors_origins"), "must be a list of origins",
                   'e.g. cors_origins = ["https://dash.example.org"]')
    for o in raw:
        if o != "*" and not re.fullmatch(r"https?://[^/\s]+", o):
            raise fail(("server", "cors_origins"), f"{o!r} is not an origin",
                       "an origin is scheme://host[:port] with no path, e.g. https://dash.example.org")
    return list(raw)


# ---- the middleware --------------------------------------------------------------------

class _Lru:
    """A bounded map, oldest entry dropped first (thread-safe)."""

    def __init__(self, cap: int) -> None:
        self.cap = cap
        self._d: OrderedDict[str, Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, k: str, default: Any = None) -> Any:
        with self._lock:
            if k not in self._d:
                return default
            self._d.move_to_end(k)
            return self._d[k]

    def put(self, k: str, v: Any) -> None:
        with self._lock:
            self._d[k] = v
            self._d.move_to_end(k)
            while len(self._d) > self.cap:
                self._d.popitem(last=False)

    def pop(self, k: str) -> None:
        with self._lock:
            self._d.pop(k, None)

    def __len__(self) -> int:
        return len(self._d)


_MISSING = object()


class KeyRing:
    """The configured keys, and what was learnt about presented keys (by SHA-256 digest)."""

    def __init__(self, keys: list[ApiKey], good: int = 1024, bad: int = 4096) -> None:
        self.keys = keys
        self.slow = any(k.hash.startswith("pbkdf2_sha256$") for k in keys)
        self._good = _Lru(good)
        self._bad = _Lru(bad)

    def known(self, presented: str) -> Grant | None | object:
        """The remembered answer for ``presented``, or ``_MISSING`` (cheap: one SHA-256)."""
        fp = sha256_hex(presented)
        g = self._good.get(fp)
        if g is not None:
            return g
        return None if self._bad.get(fp) is not None else _MISSING

    def verify(self, presented: str) -> Grant | None:
        """Check ``presented`` against every hash (slow with PBKDF2: run it off the loop)."""
        match = None
        for k in self.keys:
            if _matches(k.hash, presented):
                match = k
                break
        fp = sha256_hex(presented)
        if match is None:
            self._bad.put(fp, True)
            return None
        grant = Grant(match.name, frozenset(match.sources), match.operator, match.hash,
                      match.rows)
        self._good.put(fp, grant)
        return grant

    def lookup(self, presented: str) -> Grant | None:
        """Blocking lookup (for callers off the event loop)."""
        hit = self.known(presented)
        return self.verify(presented) if hit is _MISSING else hit  # type: ignore[return-value]


class Backoff:
    """Per-client delay before an unknown key is checked, after failed ones: 50 ms, doubling
    per failure up to ``max_s``; a client without failures for ``forget_s`` starts afresh.
    The delay is an ``await`` on the caller's own request, so other clients never wait."""

    def __init__(self, base_s: float = 0.05, max_s: float = 2.0, forget_s: float = 60.0,
                 clients: int = 10_000) -> None:
        self.base_s, self.max_s, self.forget_s = base_s, max_s, forget_s
        self._state = _Lru(clients)  # client -> (failures, time of the last one)

    def delay(self, client: str) -> float:
        st = self._state.get(client)
        if st is None:
            return 0.0
        n, last = st
        if time.monotonic() - last > self.forget_s:
            self._state.pop(client)
            return 0.0
        return min(self.base_s * 2 ** (n - 1), self.max_s)

    def failed(self, client: str) -> None:
        st = self._state.get(client)
        n = 0 if st is None or time.monotonic() - st[1] > self.forget_s else st[0]
        self._state.put(client, (min(n + 1, 64), time.monotonic()))

    def succeeded(self, client: str) -> None:
        self._state.pop(client)


def _presented(headers: dict[bytes, bytes]) -> str | None:
    auth = headers.get(b"authorization")
    if auth is not None:
        text = auth.decode("latin-1").strip()
        scheme, _, value = text.partition(" ")
        if scheme.lower() == "bearer" and value.strip():
            return value.strip()
        return None
    key = headers.get(b"x-api-key")
    if key is not None and key.strip():
        return key.decode("latin-1").strip()
    return None


class AuthMiddleware:
    """401 without a valid key (when keys are configured); sets the request's grant."""

    def __init__(self, app: Any, keys: list[ApiKey], backoff: Backoff | None = None) -> None:
        self.app = app
        self.ring = KeyRing(list(keys))
        self.backoff = backoff or Backoff()
        self._limiter: Any = None  # anyio.CapacityLimiter, made inside the loop
        self._client_locks = _Lru(10_000)  # client address -> asyncio.Lock

    async def _grant(self, scope: dict, presented: str) -> Grant | None:
        hit = self.ring.known(presented)
        if hit is not _MISSING:
            return hit  # type: ignore[return-value]
        if not self.ring.slow:  # SHA-256 only: microseconds, fine on the loop
            return self.ring.verify(presented)
        import anyio.to_thread

        client = (scope.get("client") or ("?", 0))[0]
        lock = self._client_locks.get(client)
        if lock is None:
            lock = asyncio.Lock()
            self._client_locks.put(client, lock)
        # one check at a time per client: many connections from one address cannot take
        # every hashing thread (others' first keys would queue behind them)
        async with lock:
            hit = self.ring.known(presented)  # (checked meanwhile by this client's other request)
            if hit is not _MISSING:
                return hit  # type: ignore[return-value]
            wait = self.backoff.delay(client)
            if wait > 0:
                await asyncio.sleep(wait)  # this client only
            if self._limiter is None:
                self._limiter = anyio.CapacityLimiter(HASH_THREADS)
            grant = await anyio.to_thread.run_sync(self.ring.verify, presented,
                                                   limiter=self._limiter)
        if grant is None:
            self.backoff.failed(client)
        else:
            self.backoff.succeeded(client)
        return grant

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if scope["type"] != "http" or not self.ring.keys:
            await self.app(scope, receive, send)
            return
        path = scope.get("path", "")
        if path == LIVENESS:  # liveness never waits for a key check
            token = _current.set(NOBODY)
            try:
                await self.app(scope, receive, send)
            finally:
                _current.reset(token)
            return
        headers = {k.lower(): v for k, v in scope.get("headers", [])}
        presented = _presented(headers)
        grant = await self._grant(scope, presented) if presented is not None else None
        if scope.get("method") == "OPTIONS" or path in OPEN_PATHS or path.startswith(OPEN_PREFIXES):
            # open, but without a valid key no source is visible (/readyz shows no names)
            token = _current.set(grant or NOBODY)
            try:
                await self.app(scope, receive, send)
            finally:
                _current.reset(token)
            return
        if grant is None:
            detail = ("this API needs a key: send Authorization: Bearer <key> or X-API-Key: <key>"
                      if presented is None else "the API key is not valid")
            await _send_problem(send, Problem(401, "unauthorized", "Unauthorized", detail,
                                              headers={"WWW-Authenticate": "Bearer"}), path)
            return
        if path in OPERATOR_PATHS and not grant.operator:
            await _send_problem(send, Problem(403, "operator-only", "Operator key needed",
                                              f"{path} shows every source: it needs a key with "
                                              "operator = true"), path)
            return
        token = _current.set(grant)
        try:
            await self.app(scope, receive, send)
        finally:
            _current.reset(token)


async def _send_problem(send: Callable, p: Problem, instance: str) -> None:
    from app.encode import dumps

    body = dumps(p.body(instance))
    headers = [(b"content-type", PROBLEM_JSON.encode()), (b"content-length", str(len(body)).encode())]
    headers += [(k.lower().encode(), v.encode()) for k, v in p.headers.items()]
    await send({"type": "http.response.start", "status": p.status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


def main(argv: list[str] | None = None) -> int:
    """``python -m app.auth new`` (a random key and its hash) | ``hash KEY`` (pbkdf2)."""
    args = sys.argv[1:] if argv is None else argv
    if args[:1] == ["new"]:
        key = secrets.token_urlsafe(32)
        print(f"key:  {key}\nhash: sha256:{sha256_hex(key)}")
        return 0
    if len(args) == 2 and args[0] == "hash":
        print(hash_key(args[1]))
        return 0
    print("usage: python -m app.auth new | hash KEY", file=sys.stderr)
    return 2


if __name__ == "__main__":
    raise SystemExit(main())
