"""Registry of target dialects: name -> Dialect instance, and the capability table.

Live-checked targets (a real engine in the test suite): duckdb, postgres, mysql (MariaDB /
MySQL 8), sqlite, clickhouse (chdb), spark (pyspark). Generated-only targets (golden SQL
files, parsed back with sqlglot): bigquery, snowflake, trino, redshift, databricks, tsql.
"""

from __future__ import annotations

from planner.dialects.base import FEATURES, TABLE_ROWS, Dialect
from planner.dialects.bigquery import BigQuery
from planner.dialects.clickhouse import ClickHouse
from planner.dialects.duckdb import DuckDB
from planner.dialects.mysql import MySQL
from planner.dialects.postgres import Postgres
from planner.dialects.redshift import Redshift
from planner.dialects.snowflake import Snowflake
from planner.dialects.spark import Databricks, Spark
from planner.dialects.sqlite import SQLite
from planner.dialects.trino import Trino
from planner.dialects.tsql import TSQL

DIALECTS: dict[str, Dialect] = {d.name: d for d in (
    DuckDB(), Postgres(), MySQL(), SQLite(), ClickHouse(), Spark(),
    BigQuery(), Snowflake(), Trino(), Redshift(), Databricks(), TSQL(),
)}

#: Other spellings accepted for ``?dialect=`` / ``--dialect``.
ALIASES: dict[str, str] = {"mariadb": "mysql", "postgresql": "postgres", "sqlserver": "tsql",
                           "mssql": "tsql"}


def get_dialect(name: str) -> Dialect:
    try:
        return DIALECTS[ALIASES.get(name, name)]
    except KeyError:
        raise KeyError(name) from None


def capability_table_markdown() -> str:
    """The README's feature x dialect table, generated from the dialect classes.

    Each cell says how the construct is written for that target ("no (422)" when the request
    is refused with ``not supported on <dialect>: <feature>``)."""
    names = list(DIALECTS)
    lines = ["| feature | " + " | ".join(names) + " |",
             "|---|" + "---|" * len(names)]
    for key, label in TABLE_ROWS:
        cells = [DIALECTS[n].how(key).replace("|", "\\|") for n in names]
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


__all__ = ["ALIASES", "DIALECTS", "FEATURES", "Dialect", "capability_table_markdown",
           "get_dialect"]
