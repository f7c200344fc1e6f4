"""Service configuration: a TOML file named by ``SLUICE_CONFIG`` (read with tomllib).

With no config the service serves the demo DuckDB file that ``make serve`` builds::

    [sources.deliveries]
    engine = "duckdb"
    path = "data/demo.duckdb"
    table = "deliveries"

Relative paths are resolved against the config file's folder (or the working directory for
the built-in default).
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

DEFAULT_DEMO = Path("data/demo.duckdb")
ENGINES = ("duckdb", "postgres", "mysql", "sqlite", "clickhouse", "spark", "trino",
           "bigquery", "snowflake")


class ConfigError(Exception):
    """A config file the service cannot start with. The message names file, key and fix."""


@dataclass
class SourceConfig:
    name: str
    engine: str
    table: str
    path: str | None = None
    dsn: str | None = None
    options: dict[str, Any] = field(default_factory=dict)


@dataclass
class Settings:
    sources: dict[str, SourceConfig]
    config_path: str | None = None
    max_limit: int = 100_000
    max_body_bytes: int = 1_000_000

    @property
    def source_names(self) -> list[str]:
        return sorted(self.sources)


def _fail(path: str, key: str, msg: str) -> ConfigError:
    return ConfigError(f"{path}: [{key}] {msg}")


def parse_settings(data: dict[str, Any], path: str = "<config>", base: Path | None = None) -> Settings:
    base = base or Path.cwd()
    raw_sources = data.get("sources")
    if not isinstance(raw_sources, dict) or not raw_sources:
        raise _fail(path, "sources", "no sources: add a table like [sources.NAME] with "
                    "engine, table and path or dsn")
    sources: dict[str, SourceConfig] = {}
    for name, s in raw_sources.items():
        key = f"sources.{name}"
        if not isinstance(s, dict):
            raise _fail(path, key, "must be a table with engine, table and path or dsn")
        engine = s.get("engine")
        if engine not in ENGINES:
            raise _fail(path, f"{key}.engine", f"is {engine!r}; use one of {', '.join(ENGINES)}")
        table = s.get("table")
        if not isinstance(table, str) or not table:
            raise _fail(path, f"{key}.table", "is missing: name the table (or schema.table) to chart")
        src_path = s.get("path")
        if src_path is not None:
            p = Path(src_path)
            src_path = str(p if p.is_absolute() else (base / p))
        if engine in ("duckdb", "sqlite") and not src_path:
            raise _fail(path, f"{key}.path", f"is missing: a {engine} source needs path = \"file\"")
        known = {"engine", "table", "path", "dsn"}
        sources[name] = SourceConfig(name=name, engine=engine, table=table, path=src_path,
                                     dsn=s.get("dsn"),
                                     options={k: v for k, v in s.items() if k not in known})
    server = data.get("server", {})
    st = Settings(sources=sources, config_path=path)
    if "max_limit" in server:
        st.max_limit = int(server["max_limit"])
    if "max_body_bytes" in server:
        st.max_body_bytes = int(server["max_body_bytes"])
    return st


def load_settings(path: str | os.PathLike[str] | None = None) -> Settings:
    """Read the config named by ``path`` or ``SLUICE_CONFIG``; the demo source otherwise."""
    if path is None:
        path = os.environ.get("SLUICE_CONFIG") or None
    if path is None:
        demo = os.environ.get("SLUICE_DEMO_PATH", str(DEFAULT_DEMO))
        return parse_settings({"sources": {"deliveries": {
            "engine": "duckdb", "path": demo, "table": "deliveries"}}}, "<built-in demo config>")
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as e:
        raise ConfigError(f"{p}: cannot read the config file ({e.strerror}); set SLUICE_CONFIG "
                          "to an existing TOML file") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{p}: not valid TOML: {e}") from None
    return parse_settings(data, str(p), p.resolve().parent)
