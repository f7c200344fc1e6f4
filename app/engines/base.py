"""The engine interface the service relies on."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Protocol

import pyarrow as pa


class EngineError(Exception):
    """A statement failed inside the engine."""

    def __init__(self, source: str, message: str) -> None:
        super().__init__(message)
        self.source = source
        self.message = message


class EngineUnavailable(EngineError):
    """The engine cannot be reached or opened (HTTP 503)."""


class EngineBase:
    """What most engines share: table names split on dots, and one row read from the Arrow
    answer of ``execute`` (engines whose driver returns Python rows override ``fetch_row``)."""

    def execute(self, sql: str, params: Sequence[Any] | None = None
                ) -> pa.Table:  # pragma: no cover - every engine defines it
        raise NotImplementedError

    def fetch_row(self, sql: str, params: Sequence[Any] | None = None) -> dict[str, Any]:
        t = self.execute(sql, params) if params else self.execute(sql)
        return {n: c[0].as_py() for n, c in zip(t.column_names, t.columns)} if t.num_rows else {}

    def split_table(self, table: str) -> tuple[str, ...]:
        return tuple(table.split("."))


class Engine(Protocol):
    #: planner dialect name used to render SQL for this engine
    dialect: str

    def execute(self, sql: str, params: Sequence[Any] | None = None) -> pa.Table:
        """Run one read-only statement and return its result as Arrow. ``params``
        (optional): values for the statement's placeholders in the driver's paramstyle
        (``Dialect.param_form``); duckdb, postgres, mysql and sqlite take them,
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
