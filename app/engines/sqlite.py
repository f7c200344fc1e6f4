"""SQLite engine (stdlib sqlite3): the file is opened with a ``file:...?mode=ro`` URI and
``PRAGMA query_only``; one connection per worker thread. A statement running longer than
``statement_timeout_ms`` (default 30000) is interrupted through the progress handler.

Timestamps are stored as UTC text (see ``planner.dialects.sqlite`` for the convention);
the service types them from the plan.
"""

from __future__ import annotations

import os
import sqlite3
import threading
import time
from pathlib import Path
from collections.abc import Sequence
from typing import Any
from urllib.parse import quote

import pyarrow as pa

from app import deadline
from app.engines.arrow import rows_to_table
from app.engines.base import EngineBase, EngineError, EngineUnavailable
from app.settings import SourceConfig


class SQLiteEngine(EngineBase):
    dialect = "sqlite"

    def __init__(self, cfg: SourceConfig) -> None:
        self.cfg = cfg
        self.path = Path(cfg.path or "")
        if not self.path.is_file():
            raise EngineUnavailable(cfg.name, f"SQLite file {self.path} does not exist")
        self._timeout_s = int(cfg.options.get("statement_timeout_ms", 30_000)) / 1000.0
        self._local = threading.local()
        self._conns: list[sqlite3.Connection] = []
        self._lock = threading.Lock()
        self._conn()

    def _conn(self) -> sqlite3.Connection:
        conn = getattr(self._local, "conn", None)
        if conn is None:
            uri = f"file:{quote(str(self.path.resolve()))}?mode=ro"
            try:
                conn = sqlite3.connect(uri, uri=True, check_same_thread=False)
                conn.execute("PRAGMA query_only = ON")
            except sqlite3.Error as e:
                raise EngineUnavailable(self.cfg.name, f"cannot open SQLite file {self.path}: {e}") from None
            self._local.conn = conn
            with self._lock:
                self._conns.append(conn)
        return conn

    def _run(self, sql: str, params: tuple = ()) -> tuple[list[str], list[tuple]]:
        conn = self._conn()
        secs = deadline.budget(self._timeout_s)  # the request's budget, else the source's
        end = time.monotonic() + (secs if secs is not None else float("inf"))
        conn.set_progress_handler(lambda: 1 if time.monotonic() > end else 0, 10_000)
        try:
            cur = conn.execute(sql, params)
            rows = cur.fetchall()
            names = [d[0] for d in cur.description or []]
        except sqlite3.OperationalError as e:
            if "interrupted" in str(e):
                raise EngineError(self.cfg.name, "SQLite: interrupted (maximum statement "
                                  "execution time exceeded)") from None
            raise EngineError(self.cfg.name, f"SQLite: {e}") from None
        except sqlite3.Error as e:
            raise EngineError(self.cfg.name, f"SQLite: {e}") from None
        finally:
            conn.set_progress_handler(None, 0)
        return names, rows

    def execute(self, sql: str, params: Sequence[Any] | None = None) -> pa.Table:
        names, rows = self._run(sql, tuple(params or ()))
        return rows_to_table(names, rows)

    def fetch_row(self, sql: str, params: Sequence[Any] | None = None) -> dict[str, Any]:
        names, rows = self._run(sql, tuple(params or ()))
        return dict(zip(names, rows[0])) if rows else {}

    def split_table(self, table: str) -> tuple[str, ...]:
        return (table,)

    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        _, rows = self._run("SELECT name, type FROM pragma_table_info(?) ORDER BY cid", (table[-1],))
        return [(r[0], r[1] or "") for r in rows]

    def data_version(self) -> str:
        parts = []
        for p in (self.path, Path(str(self.path) + "-wal")):
            try:
                st = os.stat(p)
                parts.append(f"{st.st_ino}:{st.st_size}:{st.st_mtime_ns}")
            except OSError:
                pass
        return "|".join(parts)

    def canceller(self):
        """Interrupts the statement the *calling* thread runs next (statement timeouts)."""
        return self._conn().interrupt

    def close(self) -> None:
        with self._lock:
            for c in self._conns:
                c.close()
            self._conns.clear()
