"""Access: API keys (stored hashed in the config) granting sources, and the CORS allow-list.

Config::

    [server]
    cors_origins = ["https://dash.example.org"]   # browsers on these origins may call the API

    [[keys]]
    name = "dashboards"                           # optional, shows in logs only
    hash = "sha256:9f86d08..."                    # or a bare 64-hex sha256, or pbkdf2 (below)
    sources = ["deliveries"]                      # or ["*"] for every source

With no ``[[keys]]`` the API is open (a local tool). With keys, every route but the probes
and the docs (``/healthz``, ``/readyz``, ``/docs``, ``/openapi.json``, ``/``, ``/static``) needs
``Authorization: Bearer <key>`` or ``X-API-Key: <key>``: no key or a key that matches no hash
is a 401 (``WWW-Authenticate: Bearer``); a source the key is not granted is a 403 — the same
answer whether or not the source exists, so names cannot be probed — and ``GET /v1/sources``
lists only the granted sources.

Hashes: ``sha256:<hex>`` (or the bare hex) is SHA-256 of the key — fine for long random keys
(``python -m app.auth new`` makes one); ``pbkdf2_sha256$<iterations>$<salt hex>$<hex>`` is a
salted, stretched hash for keys people choose (``python -m app.auth hash KEY``). A verified
key is remembered in memory by its SHA-256, so the stretching costs once per key and process.
Comparisons use ``hmac.compare_digest``.
"""

from __future__ import annotations

import contextvars
import hashlib
import hmac
import re
import secrets
import sys
import threading
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

from app.problems import PROBLEM_JSON, Problem

#: paths that never need a key (probes, API docs, the preview page and its files)
OPEN_PATHS = ("/healthz", "/readyz", "/docs", "/docs/oauth2-redirect", "/redoc", "/openapi.json", "/")
OPEN_PREFIXES = ("/static/",)

_HEX64 = re.compile(r"[0-9a-f]{64}")


@dataclass(frozen=True)
class ApiKey:
    hash: str
    sources: tuple[str, ...]
    name: str = ""

    def grants(self, source: str) -> bool:
        return "*" in self.sources or source in self.sources


@dataclass(frozen=True)
class Grant:
    """Who is calling: the key's name and the sources it may read (``None``: all, no keys)."""

    name: str = ""
    sources: frozenset[str] | None = None

    def allows(self, source: str) -> bool:
        return self.sources is None or "*" in self.sources or source in self.sources


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
        extra = set(k) - {"hash", "sources", "name"}
        if extra:
            raise fail(key + (sorted(extra)[0],), "unknown key", "valid keys: hash, sources, name")
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
        h = h.strip()
        h = h if h.startswith("pbkdf2_sha256$") else h.lower()
        out.append(ApiKey(h, tuple(srcs), name))
    return out


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

@dataclass
class KeyRing:
    keys: list[ApiKey]
    _known: dict[str, Grant | None] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def lookup(self, presented: str) -> Grant | None:
        fp = sha256_hex(presented)
        if fp in self._known:
            return self._known[fp]
        match = None
        for k in self.keys:
            if _matches(k.hash, presented):
                match = k
                break
        grant = Grant(match.name, frozenset(match.sources)) if match else None
        with self._lock:
            if len(self._known) > 10_000:  # bad keys must not grow memory without bound
                self._known.clear()
            self._known[fp] = grant
        return grant


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

    def __init__(self, app: Any, keys: list[ApiKey]) -> None:
        self.app = app
        self.ring = KeyRing(list(keys))

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if scope["type"] != "http" or not self.ring.keys:
            await self.app(scope, receive, send)
            return
        path = scope.get("path", "")
        headers = {k.lower(): v for k, v in scope.get("headers", [])}
        presented = _presented(headers)
        grant = self.ring.lookup(presented) if presented is not None else None
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
