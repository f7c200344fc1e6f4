"""PostgreSQL engine: psycopg 3 with a psycopg_pool connection pool.

Read-only at the session level: every connection starts with
``-c default_transaction_read_only=on`` (so any write fails inside PostgreSQL), a
``statement_timeout`` from the source option ``statement_timeout_ms`` (default 30000) and
``TimeZone=UTC``. Options: ``pool_min`` (default 1), ``pool_max`` (default 4),
``connect_timeout_s`` (default 10).

Client-side deadline: the server's ``statement_timeout`` cannot fire on a server that is
stopped or behind a network black hole (the kernel still accepts the connection and
acknowledges every byte, so TCP keepalives do not help). Every call therefore runs under
``app.deadline.budget`` (the request's budget, else ``statement_timeout_ms``): at the
budget ``app.limits`` sends a cancel request (``cancel_safe``, itself bounded), and
``GRACE_S`` later a watchdog shuts the connection's socket down, so the blocked driver call
returns at once (504, "did not answer ... (client-side deadline)") and the pool replaces
the connection. Waiting for a pooled connection and opening the pool are bounded by the
same budget (503 when no connection could be had).
"""

from __future__ import annotations

import os
import socket
import threading
import time
from typing import Any

import pyarrow as pa

from app import deadline
from app.engines.arrow import UTC_US
from app.engines.base import EngineError, EngineUnavailable, RowEngine, Rows, cursor_rows
from app.settings import SourceConfig

# PostgreSQL type OIDs -> Arrow types (numeric is left to value inspection).
_OID_TYPES: dict[int, pa.DataType] = {
    16: pa.bool_(), 20: pa.int64(), 21: pa.int64(), 23: pa.int64(), 26: pa.int64(),
    700: pa.float64(), 701: pa.float64(), 25: pa.string(), 1042: pa.string(),
    1043: pa.string(), 19: pa.string(), 1114: UTC_US, 1184: UTC_US, 1082: pa.date32(),
}


class PostgresEngine(RowEngine):
    dialect = "postgres"
    type_codes = _OID_TYPES

    def __init__(self, cfg: SourceConfig) -> None:
        super().__init__(cfg)
        try:
            import psycopg
            from psycopg_pool import ConnectionPool
        except ImportError:
            raise EngineUnavailable(cfg.name, "the postgres engine needs psycopg and psycopg_pool "
                                    "(pip install 'sluice-charts[engines]')") from None
        if not cfg.dsn:
            raise EngineUnavailable(cfg.name, "a postgres source needs dsn = \"postgresql://...\"")
        self._psycopg = psycopg
        options = (f"-c default_transaction_read_only=on -c statement_timeout={self.timeout_ms} "
                   "-c TimeZone=UTC")
        self.pool = ConnectionPool(
            cfg.dsn, open=False, name=f"sluice-{cfg.name}",
            min_size=int(cfg.options.get("pool_min", 1)),
            max_size=int(cfg.options.get("pool_max", 4)),
            kwargs={"options": options, "autocommit": True,
                    "connect_timeout": int(cfg.options.get("connect_timeout_s", 10))},
            # a SET on a pooled connection (e.g. default_transaction_read_only = off) must not
            # outlive its statement: RESET ALL restores the read-only start-up options
            reset=lambda conn: conn.execute("RESET ALL"))
        connect_s = float(cfg.options.get("connect_timeout_s", 10))
        try:
            self.pool.open(wait=True, timeout=max(min(connect_s, deadline.budget(connect_s) or connect_s), 0.1))
        except Exception as e:  # noqa: BLE001 - PoolTimeout or OperationalError
            self.pool.close(timeout=1.0)
            raise EngineUnavailable(cfg.name, f"cannot connect to PostgreSQL: {e}") from None
        # waiting for a pooled connection is bounded like connecting: a down server answers
        # 503 after connect_timeout_s instead of the pool's default 30 s
        self._wait_s = float(cfg.options.get("connect_timeout_s", 10))
        self._version_lock = threading.Lock()
        self._version: tuple[float, str] | None = None
        self._active: dict[int, Any] = {}  # thread id -> connection running a statement

    def _rows(self, sql: str, params: tuple | None = None) -> Rows:
        psycopg = self._psycopg
        secs = self.budget()  # client-side deadline (module docstring)
        wait = self._wait_s if secs is None else max(min(self._wait_s, secs), 0.05)
        dog = _Watchdog(None if secs is None else secs + deadline.GRACE_S)
        try:
            with self.pool.connection(timeout=wait) as conn:
                dog.arm(conn)
                self._active[threading.get_ident()] = conn
                try:
                    answer = cursor_rows(conn.execute(sql, params))
                finally:
                    self._active.pop(threading.get_ident(), None)
        except psycopg.OperationalError as e:
            if dog.fired:
                raise EngineUnavailable(self.cfg.name, "PostgreSQL did not answer within "
                                        f"{secs:.1f} s (client-side deadline); the connection "
                                        "was dropped") from None
            raise EngineUnavailable(self.cfg.name, f"PostgreSQL: {e}") from None
        except psycopg.Error as e:
            raise EngineError(self.cfg.name, f"PostgreSQL: {e}".strip()) from None
        except Exception as e:  # noqa: BLE001 - pool timeout
            raise EngineUnavailable(self.cfg.name, f"PostgreSQL: {e}") from None
        finally:
            dog.disarm()
        return answer

    def _regclass_sql(self, table: tuple[str, ...]) -> tuple[str, tuple]:
        if len(table) >= 2:
            return "to_regclass(quote_ident(%s) || '.' || quote_ident(%s))", (table[-2], table[-1])
        return "to_regclass(quote_ident(%s))", (table[-1],)

    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        reg, params = self._regclass_sql(table)
        _, _, rows = self._rows(
            "SELECT a.attname, format_type(a.atttypid, a.atttypmod) FROM pg_attribute a "
            f"WHERE a.attrelid = {reg} AND a.attnum > 0 AND NOT a.attisdropped "
            "ORDER BY a.attnum", params)
        return [(r[0], r[1]) for r in rows]

    def data_version(self) -> str:
        """Table statistics counters (inserts/updates/deletes, last analyse), re-read at most
        once a second. PostgreSQL reports them with a short delay."""
        now = time.monotonic()
        cached = self._version
        if cached is not None and now - cached[0] < 1.0:
            return cached[1]
        reg, params = self._regclass_sql(self.split_table(self.cfg.table))
        _, _, rows = self._rows(
            "SELECT n_tup_ins, n_tup_upd, n_tup_del, n_live_tup, last_analyze, last_autoanalyze "
            f"FROM pg_stat_all_tables WHERE relid = {reg}", params)
        version = repr(rows[0]) if rows else "unknown"
        with self._version_lock:
            self._version = (now, version)
        return version

    def canceller(self):
        """Cancels the statement the *calling* thread runs next (``app.limits`` statement
        timeouts call it from a timer thread): PostgreSQL's cancel request."""
        ident = threading.get_ident()

        def cancel() -> None:
            conn = self._active.get(ident)
            if conn is not None:
                try:  # bounded: a stopped server never answers the cancel request either
                    conn.cancel_safe(timeout=max(deadline.GRACE_S, 0.1))
                except Exception:  # noqa: BLE001 - finished meanwhile, or no answer
                    pass
        return cancel

    def close(self) -> None:
        """Bounded, even with a frozen server: statements still running are cut off (their
        sockets shut down) and the pool gets 1 s to close."""
        for conn in list(self._active.values()):
            _shutdown(conn)
        self.pool.close(timeout=1.0)


def _shutdown(conn: Any) -> None:
    """Shut the connection's socket down: a driver call blocked on it returns at once."""
    try:
        s = socket.socket(fileno=os.dup(conn.pgconn.socket))
        try:
            s.shutdown(socket.SHUT_RDWR)  # acts on the socket, not just this fd
        finally:
            s.close()
    except Exception:  # noqa: BLE001 - already closed
        pass


class _Watchdog:
    """Shuts down the socket of a connection whose call outlives ``seconds``: the driver's
    blocked read returns (an OperationalError) and the pool discards the connection."""

    def __init__(self, seconds: float | None) -> None:
        self.seconds = seconds
        self.fired = False
        self._conn: Any = None
        self._timer: deadline.Alarm | None = None
        self._lock = threading.Lock()

    def arm(self, conn: Any) -> None:
        if self.seconds is None:
            return
        self._conn = conn
        self._timer = deadline.after(self.seconds, self._fire)

    def _fire(self) -> None:
        with self._lock:
            conn, self._conn = self._conn, None
            if conn is None:
                return
            self.fired = True
            _shutdown(conn)

    def disarm(self) -> None:
        with self._lock:
            self._conn = None
        if self._timer is not None:
            self._timer.cancel()
