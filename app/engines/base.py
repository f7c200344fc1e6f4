"""The engine interface the service relies on, and what engines share.

* ``EngineBase``: every engine's base: its config, its ``statement_timeout_ms`` (parsed once
  here: ``timeout_ms``, ``timeout_s``, ``budget()``), the read-only statement guard
  (``select_only`` / ``check_read``), table names split on dots, one row read from
  ``execute``'s Arrow answer.
* ``RowEngine``: drivers that return Python rows from a DB-API cursor (PostgreSQL, MySQL /
  MariaDB, SQLite, Trino, Snowflake): a subclass runs one statement in ``_rows`` (its
  connection, its own deadline and error mapping) and this class guards it, turns the rows
  into an Arrow table (``arrow.rows_to_table`` typed by the driver's type codes) and reads
  one row.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, Protocol

import pyarrow as pa

from app import deadline
from app.engines.arrow import rows_to_table

if TYPE_CHECKING:
    from app.settings import SourceConfig

#: the only statements a ``select_only`` engine sends: one SELECT or WITH query
READ_STATEMENT = re.compile(r"^\s*(SELECT|WITH)\b", re.IGNORECASE)
DEFAULT_TIMEOUT_MS = 30_000


class EngineError(Exception):
    """A statement failed inside the engine."""

    def __init__(self, source: str, message: str) -> None:
        super().__init__(message)
        self.source = source
        self.message = message


class EngineUnavailable(EngineError):
    """The engine cannot be reached or opened (HTTP 503)."""


class EngineBase:
    """What every engine shares (see the module docstring)."""

    dialect: str = ""
    cfg: SourceConfig
    #: refuse anything but one SELECT / WITH statement before the driver sees it: for
    #: sessions a later statement could make writable again (MySQL's ``SET SESSION``), or
    #: that cannot be made read-only at all (warehouses)
    select_only = False
    select_only_message = "the {engine} engine runs SELECT statements only"

    def __init__(self, cfg: SourceConfig) -> None:
        self.cfg = cfg
        #: the source's ``statement_timeout_ms`` (default 30000; 0: none)
        self.timeout_ms = int(cfg.options.get("statement_timeout_ms", DEFAULT_TIMEOUT_MS))
        self.timeout_s: float | None = self.timeout_ms / 1000.0 if self.timeout_ms > 0 else None

    def budget(self) -> float | None:
        """Seconds the next driver call may take: what is left of the request's budget
        (``app.deadline``), else the statement timeout; None: unbounded."""
        return deadline.budget(self.timeout_s)

    def check_read(self, sql: str) -> None:
        if self.select_only and not READ_STATEMENT.match(sql):
            raise EngineError(self.cfg.name, self.select_only_message.format(engine=self.cfg.engine))

    def execute(self, sql: str, params: Sequence[Any] | None = None
                ) -> pa.Table:  # pragma: no cover - every engine defines it
        raise NotImplementedError

    def fetch_row(self, sql: str, params: Sequence[Any] | None = None) -> dict[str, Any]:
        t = self.execute(sql, params) if params else self.execute(sql)
        return {n: c[0].as_py() for n, c in zip(t.column_names, t.columns)} if t.num_rows else {}

    def split_table(self, table: str) -> tuple[str, ...]:
        return tuple(table.split("."))


Rows = tuple[list[str], list[Any], Sequence[Sequence[Any]]]  # names, type codes, rows


def cursor_rows(cur: Any) -> Rows:
    """A DB-API cursor's answer after ``execute``: column names, type codes and rows."""
    desc = cur.description or []
    rows = cur.fetchall() if cur.description else []
    return [d[0] for d in desc], [d[1] for d in desc], rows


class RowEngine(EngineBase):
    """An engine whose driver returns Python rows (see the module docstring)."""

    #: driver type code -> Arrow type; a code not listed is typed by its values
    type_codes: dict[Any, pa.DataType] = {}

    def _rows(self, sql: str, params: tuple | None) -> Rows:  # pragma: no cover - abstract
        """Run one statement on the driver: (names, type codes, rows)."""
        raise NotImplementedError

    def run(self, sql: str, params: Sequence[Any] | None = None) -> Rows:
        """``_rows`` behind the read-only guard; ``params`` as a tuple, or None."""
        self.check_read(sql)
        return self._rows(sql, tuple(params) if params else None)

    def execute(self, sql: str, params: Sequence[Any] | None = None) -> pa.Table:
        names, codes, rows = self.run(sql, params)
        return rows_to_table(names, rows, [self.type_codes.get(c) for c in codes])

    def fetch_row(self, sql: str, params: Sequence[Any] | None = None) -> dict[str, Any]:
        names, _, rows = self.run(sql, params)
        return dict(zip(names, rows[0])) if rows else {}


class Engine(Protocol):
    #: planner dialect name used to render SQL for this engine
    dialect: str

    def execute(self, sql: str, params: Sequence[Any] | None = None) -> pa.Table:
        """Run one read-only statement and return its result as Arrow. ``params``
        (optional): values for the statement's placeholders in the driver's paramstyle
        (``Capabilities.param_form``); duckdb, postgres, mysql and sqlite take them,
        other engines are only given statements without placeholders."""

    def fetch_row(self, sql: str, params: Sequence[Any] | None = None) -> dict[str, Any]:
        """Run a statement returning one row, as a dict (``params`` as for execute)."""

    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        """(column name, engine type name) for the table, in table order."""

    def split_table(self, table: str) -> tuple[str, ...]:
        """Qualified name parts of a configured table name."""

    def data_version(self) -> str:
        """Changes whenever the data may have changed (cache key part)."""

    def close(self) -> None: ...

    # Optional: ``canceller() -> Callable[[], None]`` returns a function that stops the
    # statement the calling thread runs next (app.limits fires it from a timer thread for
    # statement timeouts). duckdb, postgres, mysql and sqlite provide it; spark and
    # clickhouse enforce ``statement_timeout_ms`` themselves.
