"""DuckDB engine: one read-only connection per source, one cursor per worker thread."""

from __future__ import annotations

import os
import threading
from pathlib import Path
from collections.abc import Sequence
from typing import Any, Callable

import duckdb
import pyarrow as pa

from app.engines.base import EngineBase, EngineError, EngineUnavailable
from app.settings import SourceConfig


class DuckDBEngine(EngineBase):
    dialect = "duckdb"

    def __init__(self, cfg: SourceConfig) -> None:
        self.cfg = cfg
        self.path = Path(cfg.path or ":memory:")
        if not self.path.exists():
            raise EngineUnavailable(cfg.name, f"DuckDB file {self.path} does not exist "
                                    "(run `make demo` or fix `path` in the config)")
        # Read-only file, no file system / network access from SQL (read_csv, COPY TO, ATTACH,
        # INSTALL ... are refused by DuckDB itself), no extension auto-loading, and the
        # configuration locked once set, so no statement can loosen any of it.
        config: dict[str, Any] = {"enable_external_access": "false",
                                  "autoload_known_extensions": "false",
                                  "autoinstall_known_extensions": "false"}
        for key in ("memory_limit", "threads"):
            if key in cfg.options:
                config[key] = str(cfg.options[key])
        try:
            self._con = duckdb.connect(str(self.path), read_only=True, config=config)
            # (several sources on one file share one database instance: lock it once)
            if not self._con.execute("SELECT current_setting('lock_configuration')").fetchone()[0]:
                self._con.execute("SET GLOBAL TimeZone = 'UTC'")
                self._con.execute("SET GLOBAL lock_configuration = true")
        except duckdb.Error as e:
            raise EngineUnavailable(cfg.name, f"cannot open DuckDB file {self.path}: {e}") from None
        self._local = threading.local()
        self._cursors: list[duckdb.DuckDBPyConnection] = []
        self._lock = threading.Lock()

    def _cursor(self) -> duckdb.DuckDBPyConnection:
        cur = getattr(self._local, "cur", None)
        if cur is None:
            cur = self._con.cursor()  # TimeZone is UTC for every cursor (set globally above)
            self._local.cur = cur
            with self._lock:
                self._cursors.append(cur)
        return cur

    def execute(self, sql: str, params: Sequence[Any] | None = None) -> pa.Table:
        try:
            if params:  # bound values (planner.compile bind_sql): qmark style, lists allowed
                return self._cursor().sql(sql, params=list(params)).to_arrow_table()
            return self._cursor().sql(sql).to_arrow_table()
        except duckdb.Error as e:
            raise EngineError(self.cfg.name, str(e)) from None


    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        name = table[-1]
        schema = table[-2] if len(table) >= 2 else None
        q = ("SELECT column_name, data_type FROM information_schema.columns "
             "WHERE table_name = ? " + ("AND table_schema = ? " if schema else "") +
             "ORDER BY ordinal_position")
        params = [name] + ([schema] if schema else [])
        try:
            rows = self._cursor().execute(q, params).fetchall()
        except duckdb.Error as e:
            raise EngineError(self.cfg.name, str(e)) from None
        return [(r[0], r[1]) for r in rows]

    def data_version(self) -> str:
        st = os.stat(self.path)
        return f"{st.st_ino}:{st.st_size}:{st.st_mtime_ns}"

    def canceller(self) -> Callable[[], None]:
        """Interrupts the statement the *calling* thread is about to run (statement timeouts:
        ``app.limits`` calls it from a timer thread)."""
        return self._cursor().interrupt

    def interrupt(self) -> None:
        for cur in list(self._cursors):
            try:
                cur.interrupt()
            except duckdb.Error:
                pass

    def close(self) -> None:
        for cur in self._cursors:
            cur.close()
        self._con.close()
