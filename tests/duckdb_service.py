"""A ChartService over a throwaway DuckDB file the test fills itself (one helper for the
reference tests that need their own rows: edge instants, odd zones, integer ranges, ...)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any


def duckdb_service(path: Path, build: Callable[[Any], dict[str, str]],
                   label: str) -> Iterator[Any]:
    """Yield a ChartService whose sources are the tables ``build(con)`` creates in the
    DuckDB file ``path`` (it returns source name -> table); the session's zone is UTC."""
    import duckdb

    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    con = duckdb.connect(str(path))
    con.execute("SET TimeZone = 'UTC'")
    tables = build(con)
    con.close()
    sources = {name: {"engine": "duckdb", "path": str(path), "table": table}
               for name, table in tables.items()}
    catalog = Catalog(parse_settings({"sources": sources}, label))
    try:
        yield ChartService(catalog)
    finally:
        catalog.close()
