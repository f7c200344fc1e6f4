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
from urllib.parse import quote

from app.engines.base import EngineError, EngineUnavailable, RowEngine, Rows, cursor_rows
from planner.errors import PlanError, pointer
from app.settings import SourceConfig


class SQLiteEngine(RowEngine):
    dialect = "sqlite"

    def __init__(self, cfg: SourceConfig) -> None:
        super().__init__(cfg)
        self.path = Path(cfg.path or "")
        if not self.path.is_file():
            raise EngineUnavailable(cfg.name, f"SQLite file {self.path} does not exist")
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

    def _rows(self, sql: str, params: tuple | None = None) -> Rows:
        conn = self._conn()
        secs = self.budget()  # the request's budget, else the source's
        end = time.monotonic() + (secs if secs is not None else float("inf"))
        conn.set_progress_handler(lambda: 1 if time.monotonic() > end else 0, 10_000)
        try:
            answer = cursor_rows(conn.execute(sql, params or ()))
        except sqlite3.OperationalError as e:
            if "interrupted" in str(e):
                raise EngineError(self.cfg.name, "SQLite: interrupted (maximum statement "
                                  "execution time exceeded)") from None
            if str(e) == "integer overflow":
                # sum() of integers stops past 2^63 - 1 and SQLite has no wider type (total()
                # would make every sum a double): the engine's limit, not a failure (422)
                raise PlanError(pointer("channels"), f"source {self.cfg.name!r}: a sum ran past "
                                "2^63 - 1, the largest SQLite integer (SQLite has no wider "
                                "type and stops with 'integer overflow'); sum fewer rows "
                                "(where) or ask for avg", slug="unsupported",
                                title="Not supported by the target engine") from None
            raise EngineError(self.cfg.name, f"SQLite: {e}") from None
        except sqlite3.Error as e:
            raise EngineError(self.cfg.name, f"SQLite: {e}") from None
        finally:
            conn.set_progress_handler(None, 0)
        return answer

    def split_table(self, table: str) -> tuple[str, ...]:
        return (table,)

    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        _, _, rows = self._rows("SELECT name, type FROM pragma_table_info(?) ORDER BY cid",
                                (table[-1],))
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
