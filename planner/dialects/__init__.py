"""Registry of target dialects: name -> Dialect instance."""

from __future__ import annotations

from planner.dialects.base import FEATURES, Dialect
from planner.dialects.duckdb import DuckDB

DIALECTS: dict[str, Dialect] = {d.name: d for d in (DuckDB(),)}


def get_dialect(name: str) -> Dialect:
    try:
        return DIALECTS[name]
    except KeyError:
        raise KeyError(name) from None


__all__ = ["DIALECTS", "FEATURES", "Dialect", "get_dialect"]
