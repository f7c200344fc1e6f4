"""The HTTP server's own defences (``sluice serve``): uvicorn options from ``[server]`` and a
header-read deadline uvicorn lacks.

uvicorn closes an *idle* keep-alive connection after ``timeout_keep_alive``, but a
connection that is sending its request line and headers -- however slowly ("slow loris") --
is never timed out, and neither is a new connection that sends nothing. ``protocol()`` wraps
uvicorn's HTTP protocol class (httptools, else h11) so that the request line and headers must
be complete within ``header_timeout_s`` of the first byte (or of the connection): otherwise
the server answers ``408 Request Timeout`` (RFC 9110, 15.5.9) and closes the connection.
Dribbling bytes does not extend the deadline. The body then has ``body_timeout_s``
(``app.limits.BodyLimitMiddleware``).

The other limits are uvicorn's own:

| ``[server]`` key       | uvicorn option               | effect                                     |
|------------------------|------------------------------|--------------------------------------------|
| ``keepalive_timeout_s``| ``timeout_keep_alive``       | idle keep-alive connections closed         |
| ``max_connections``    | ``limit_concurrency``        | beyond it new requests get 503             |
| ``shutdown_timeout_s`` | ``timeout_graceful_shutdown``| SIGTERM waits at most this for requests    |
| (fixed 16 KiB)         | ``h11_max_incomplete_event_size`` | request line + headers larger: 431 (RFC 6585) |

``uvicorn app.main:app`` run by hand has uvicorn's defaults (no header deadline, no
connection cap): use ``sluice serve``, or put a reverse proxy in front (README, *Deploying*).
"""

from __future__ import annotations

import asyncio
from typing import Any

MAX_HEADER_BYTES = 16 * 1024

_408_TEXT = b"request line and headers did not arrive in time"
_408 = (b"HTTP/1.1 408 Request Timeout\r\ncontent-type: text/plain; charset=utf-8\r\n"
        b"content-length: " + str(len(_408_TEXT)).encode() + b"\r\nconnection: close\r\n\r\n"
        + _408_TEXT)


_431_TEXT = b"request line and headers are larger than 16 KiB"
_431 = (b"HTTP/1.1 431 Request Header Fields Too Large\r\ncontent-type: text/plain; "
        b"charset=utf-8\r\ncontent-length: " + str(len(_431_TEXT)).encode()
        + b"\r\nconnection: close\r\n\r\n" + _431_TEXT)


def _base_protocol() -> type[asyncio.Protocol]:
    try:
        from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

        return HttpToolsProtocol
    except ImportError:  # pragma: no cover - uvicorn without httptools
        from uvicorn.protocols.http.h11_impl import H11Protocol

        return H11Protocol


def protocol(header_timeout_s: float, base: type[asyncio.Protocol] | None = None
             ) -> type[asyncio.Protocol]:
    """uvicorn's HTTP protocol class with a deadline for the request line and headers."""
    base = base or _base_protocol()

    class HeaderDeadlineProtocol(base):  # type: ignore[misc, valid-type]
        _header_timer: asyncio.TimerHandle | None = None

        def _waiting_for_headers(self) -> bool:
            cycle = getattr(self, "cycle", None)
            return cycle is None or cycle.response_complete

        def _arm(self) -> None:
            if self._header_timer is None:
                self._header_timer = self.loop.call_later(header_timeout_s, self._headers_late)

        def _disarm(self) -> None:
            if self._header_timer is not None:
                self._header_timer.cancel()
                self._header_timer = None

        def _headers_late(self) -> None:
            self._header_timer = None
            if self.transport.is_closing() or not self._waiting_for_headers():
                return
            try:
                self.transport.write(_408)
            finally:
                self.transport.close()

        def connection_made(self, transport: Any) -> None:
            super().connection_made(transport)
            self._arm()  # a connection that sends nothing is timed out too

        _header_bytes = 0

        def data_received(self, data: bytes) -> None:
            if self._waiting_for_headers():
                self._arm()  # from the first byte of a request on a kept-alive connection
                self._header_bytes += len(data)
            super().data_received(data)
            if not self._waiting_for_headers():
                self._disarm()  # headers complete: the request is being served
                self._header_bytes = 0
            elif self._header_bytes > MAX_HEADER_BYTES and not self.transport.is_closing():
                # httptools has no cap of its own (h11's is h11_max_incomplete_event_size)
                try:
                    self.transport.write(_431)
                finally:
                    self.transport.close()

        def connection_lost(self, exc: Exception | None) -> None:
            self._disarm()
            super().connection_lost(exc)

    HeaderDeadlineProtocol.__name__ = f"HeaderDeadline{base.__name__}"
    return HeaderDeadlineProtocol


def uvicorn_options(settings: Any) -> dict[str, Any]:
    """Keyword arguments for ``uvicorn.run`` / ``uvicorn.Config`` from ``[server]``."""
    return {
        "http": protocol(settings.header_timeout_s),
        "timeout_keep_alive": settings.keepalive_timeout_s,
        "limit_concurrency": settings.max_connections,
        "timeout_graceful_shutdown": settings.shutdown_timeout_s,
        "h11_max_incomplete_event_size": MAX_HEADER_BYTES,
    }
