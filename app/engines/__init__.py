"""Engines execute planned SQL where the data lives and return Arrow tables.

Every engine opens its source read-only. ``ENGINES`` registers each engine kind by its
config name (``engine = "..."``): the module and class (or factory) that opens it, whether
its data is a local file, and the options a source may carry at its top level.
``app.settings`` validates sources against it and ``open_engine`` opens them; the module
(and its client library) is imported only when a source needs it. A new kind:
``register(EngineKind(...))``, or a line below.

| engine       | module                  | client library (extra)                  |
|--------------|-------------------------|-----------------------------------------|
| duckdb       | duckdb.py               | duckdb (always)                         |
| postgres     | postgres.py             | psycopg[binary,pool] (engines)          |
| mysql        | mysql.py                | pymysql (engines)                       |
| sqlite       | sqlite.py               | stdlib sqlite3                          |
| clickhouse   | clickhouse.py           | chdb (engines) / HTTP with urllib       |
| spark        | spark.py                | pyspark + Java 17 (engines)             |
| trino        | warehouses.py           | trino (trino)                           |
| bigquery     | warehouses.py           | google-cloud-bigquery (bigquery)        |
| snowflake    | warehouses.py           | snowflake-connector-python (snowflake)  |
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable

from app.engines.base import Engine, EngineBase, EngineError, EngineUnavailable, RowEngine

if TYPE_CHECKING:
    from app.settings import SourceConfig


@dataclass(frozen=True)
class EngineKind:
    name: str
    #: ``"module:attribute"``: a class (or factory) called with the source's SourceConfig
    opener: str
    #: the data is a local file (``path`` required; cached by file identity, app.cache)
    file: bool = False
    #: engine options a source may write at its top level (checked by app.settings);
    #: anything else engine-specific goes under ``[sources.NAME.options]``
    options: tuple[str, ...] = ()

    def open(self, cfg: SourceConfig) -> Engine:
        module, attr = self.opener.split(":")
        opener: Callable[[SourceConfig], Engine] = getattr(importlib.import_module(module), attr)
        return opener(cfg)


ENGINES: dict[str, EngineKind] = {}


def register(kind: EngineKind) -> EngineKind:
    ENGINES[kind.name] = kind
    return kind


for _kind in (
    EngineKind("duckdb", "app.engines.duckdb:DuckDBEngine", file=True,
               options=("memory_limit", "threads")),
    EngineKind("postgres", "app.engines.postgres:PostgresEngine",
               options=("pool_min", "pool_max", "connect_timeout_s")),
    EngineKind("mysql", "app.engines.mysql:MySQLEngine", options=("connect_timeout_s",)),
    EngineKind("sqlite", "app.engines.sqlite:SQLiteEngine", file=True),
    EngineKind("clickhouse", "app.engines.clickhouse:open_clickhouse"),  # chdb or HTTP
    EngineKind("spark", "app.engines.spark:SparkEngine",
               options=("master", "shuffle_partitions")),
    EngineKind("trino", "app.engines.warehouses:TrinoEngine"),
    EngineKind("bigquery", "app.engines.warehouses:BigQueryEngine"),
    EngineKind("snowflake", "app.engines.warehouses:SnowflakeEngine"),
):
    register(_kind)


def open_engine(cfg: SourceConfig) -> Engine:
    kind = ENGINES.get(cfg.engine)
    if kind is None:
        raise EngineUnavailable(cfg.name, f"engine {cfg.engine!r} is not available in this build")
    return kind.open(cfg)


__all__ = ["ENGINES", "Engine", "EngineBase", "EngineError", "EngineKind", "EngineUnavailable",
           "RowEngine", "open_engine", "register"]
