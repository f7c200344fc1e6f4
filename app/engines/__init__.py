"""Engines execute planned SQL where the data lives and return Arrow tables.

Every engine opens its source read-only. ``open_engine`` picks the module by the config's
``engine`` key; client libraries are imported only when a source needs them.

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

from app.engines.base import Engine, EngineError, EngineUnavailable
from app.settings import SourceConfig


def open_engine(cfg: SourceConfig) -> Engine:
    kind = cfg.engine
    if kind == "duckdb":
        from app.engines.duckdb import DuckDBEngine

        return DuckDBEngine(cfg)
    if kind == "postgres":
        from app.engines.postgres import PostgresEngine

        return PostgresEngine(cfg)
    if kind == "mysql":
        from app.engines.mysql import MySQLEngine

        return MySQLEngine(cfg)
    if kind == "sqlite":
        from app.engines.sqlite import SQLiteEngine

        return SQLiteEngine(cfg)
    if kind == "clickhouse":
        from app.engines.clickhouse import open_clickhouse

        return open_clickhouse(cfg)
    if kind == "spark":
        from app.engines.spark import SparkEngine

        return SparkEngine(cfg)
    if kind in ("trino", "bigquery", "snowflake"):
        from app.engines import warehouses

        cls = {"trino": warehouses.TrinoEngine, "bigquery": warehouses.BigQueryEngine,
               "snowflake": warehouses.SnowflakeEngine}[kind]
        return cls(cfg)
    raise EngineUnavailable(cfg.name, f"engine {kind!r} is not available in this build")


__all__ = ["Engine", "EngineError", "EngineUnavailable", "open_engine"]
