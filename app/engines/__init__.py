"""Engines execute planned SQL where the data lives and return Arrow tables.

Every engine opens its source read-only. ``open_engine`` picks the module by the config's
``engine`` key.
"""

from __future__ import annotations

from app.engines.base import Engine, EngineError, EngineUnavailable
from app.settings import SourceConfig


def open_engine(cfg: SourceConfig) -> Engine:
    if cfg.engine == "duckdb":
        from app.engines.duckdb import DuckDBEngine

        return DuckDBEngine(cfg)
    raise EngineUnavailable(cfg.name, f"engine {cfg.engine!r} is not available in this build")


__all__ = ["Engine", "EngineError", "EngineUnavailable", "open_engine"]
