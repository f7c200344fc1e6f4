"""Service configuration: a TOML file named by ``SLUICE_CONFIG`` (read with tomllib).

With no config the service serves the demo DuckDB file that ``make serve`` builds::

    [sources.deliveries]
    engine = "duckdb"
    path = "data/demo.duckdb"
    table = "deliveries"

Relative paths are resolved against the config file's folder (or the working directory for
the built-in default).

Environment overrides (applied on top of the file, or of the built-in demo config):

* ``SLUICE_<KEY>`` sets ``[server] <key>``, e.g. ``SLUICE_MAX_LIMIT=5000``;
* ``SLUICE_<SECTION>__<KEY>[__<KEY>...]`` sets any key by its TOML path, ``__`` between
  parts, e.g. ``SLUICE_SERVER__MAX_BODY_BYTES=2000000``,
  ``SLUICE_SOURCES__DELIVERIES__PATH=/data/demo.duckdb``,
  ``SLUICE_SOURCES__SALES__DSN=postgresql://...`` (a source named only in the environment
  is created; it then needs ``ENGINE`` and ``TABLE`` too).

Names are case-insensitive. Values are strings converted to the key's type. ``SLUICE_CONFIG``
and ``SLUICE_DEMO_PATH`` are not overrides; other ``SLUICE_*`` names are left to the parts of
sluice that read them, except near-misses of a valid override name, which are reported.

Everything is validated before the service starts: a :class:`ConfigError` names the file (or
the environment variable), the key, and the fix; an unknown key comes with the nearest valid
one.
"""

from __future__ import annotations

import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

DEFAULT_DEMO = Path("data/demo.duckdb")


class ConfigError(Exception):
    """A config the service cannot start with. The message names file, key and fix.

    ``file`` is the config file (or ``<built-in demo config>``), ``key`` the dotted TOML key
    (``sources.deliveries.path``), ``env`` the environment variable the value came from, if any.
    """

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None,
                 env: str | None = None, fix: str | None = None) -> None:
        super().__init__(message)
        self.file, self.key, self.env, self.fix = file, key, env, fix


@dataclass
class SourceConfig:
    name: str
    engine: str
    table: str
    path: str | None = None
    dsn: str | None = None
    options: dict[str, Any] = field(default_factory=dict)
    #: the source model (DESIGN.md "Source model"): [sources.X.columns] name -> SQL expression
    columns: dict[str, str] = field(default_factory=dict)
    #: [[sources.X.dimensions]]
    dimensions: list["DimensionConfig"] = field(default_factory=list)
    #: [sources.NAME.measures]: measure name -> aggregate expression (planner/measure_sql.py)
    measures: dict[str, str] = field(default_factory=dict)


@dataclass
class DimensionConfig:
    """One ``[[sources.X.dimensions]]``: a many-to-one join, its columns named ``<name>.<col>``."""

    name: str
    table: str
    fact_column: str
    key: str
    columns: list[str]
    #: the dotted config key, for messages (``sources.deliveries.dimensions[0]``)
    where: str = ""


@dataclass
class Settings:
    sources: dict[str, SourceConfig]
    config_path: str | None = None
    # [server] keys: every field below (int, float, bool or str) is a valid [server] key and
    # SLUICE_<NAME> override; add a field here to add a setting.
    max_limit: int = 100_000
    max_body_bytes: int = 1_000_000
    request_log: bool = True  # one JSON log line per request on the "sluice.access" logger
    # connection hygiene (app.server, `sluice serve`) and probes (app.probes)
    header_timeout_s: float = 10.0  # request line + headers must arrive within this
    keepalive_timeout_s: float = 5.0  # idle keep-alive connections are closed after this
    body_timeout_s: float = 30.0  # the whole request body must arrive within this (408)
    max_connections: int = 1000  # open connections + running requests; beyond: 503
    shutdown_timeout_s: float = 15.0  # SIGTERM: requests still running after this are cut
    ready_timeout_s: float = 2.0  # /readyz answers within this
    ready_ttl_s: float = 1.0  # a source's readiness check is reused for this long
    # not [server] scalars: [limits] (app.limits.Limits), [[keys]] (app.auth.ApiKey) and
    # [server] cors_origins
    limits: Any = None
    keys: list = field(default_factory=list)
    cors_origins: list = field(default_factory=list)
    # [cache] (app.cache): enabled, max_bytes, ttl_s; url + options: app.shared_cache
    cache: dict = field(default_factory=lambda: {"enabled": True, "max_bytes": 64 * 1024 * 1024,
                                                 "ttl_s": 60.0})

    @property
    def source_names(self) -> list[str]:
        return sorted(self.sources)


#: keys every source may carry; ``options`` is a free table passed to the engine unchecked
SOURCE_KEYS = ("engine", "table", "path", "dsn", "options", "columns", "dimensions",
               "measures")
#: keys of one [[sources.X.dimensions]] entry (``name`` defaults to the table's last part)
DIMENSION_KEYS = ("table", "fact_column", "key", "columns", "name")
#: engine kinds, and the options each may carry at its top level: ``app.engines.ENGINES``
TOP_KEYS = ("sources", "server", "limits", "keys", "cache")
#: per-source overrides of [limits] (see app/limits.py)
SOURCE_LIMIT_KEYS = ("statement_timeout_ms", "max_concurrent", "queue_wait_ms")
#: environment variables that are not overrides
ENV_RESERVED = ("SLUICE_CONFIG", "SLUICE_DEMO_PATH")
ENV_PREFIX = "SLUICE_"


def _server_fields() -> dict[str, type]:
    """[server] keys: the typed fields of Settings (other than sources/config_path)."""
    import dataclasses
    import typing

    hints = typing.get_type_hints(Settings)
    return {f.name: hints[f.name] for f in dataclasses.fields(Settings)
            if f.name not in ("sources", "config_path") and hints[f.name] in (int, float, bool, str)}


def _nearest_key(name: str, valid: list[str] | tuple[str, ...], cutoff: float = 0.5) -> str:
    import difflib

    lowered = {v.lower(): v for v in valid}
    hits = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=cutoff)
    return f"did you mean {lowered[hits[0]]!r}? " if hits else ""


MEASURE_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")


def _parse_measures(ctx: "_Ctx", key: tuple[str, ...], raw: Any) -> dict[str, str]:
    """[sources.NAME.measures]: each a name (letters, digits, _) and an aggregate expression
    whose shape planner/measure_sql.py accepts; its columns are checked against the source's
    schema per request (the schema is introspected later)."""
    from planner.dialects import get_dialect
    from planner.errors import PlanError
    from planner.measure_sql import compile_measure

    example = 'revenue = "sum(fee)"'
    if not isinstance(raw, dict):
        raise ctx.fail(key + ("measures",), "must be a table",
                       f"write [sources.{key[-1]}.measures], then lines like {example}")
    out: dict[str, str] = {}
    for name, text in raw.items():
        mkey = key + ("measures", name)
        if not MEASURE_NAME.match(name):
            raise ctx.fail(mkey, "is not a measure name", "use letters, digits and _ (at most "
                           "64, not starting with a digit), e.g. on_time_share")
        if not isinstance(text, str):
            raise ctx.fail(mkey, "must be a string", f"write the aggregate as text: {example}")
        try:
            compile_measure(name, text, None, get_dialect("duckdb"))
        except PlanError as e:
            raise ctx.fail(mkey, e.detail, 'write an aggregate expression such as "sum(fee)", '
                           '"avg(CASE WHEN on_time THEN 1.0 ELSE 0.0 END)" or '
                           '"sum(fee) / count(*)"') from None
        out[name] = text
    return out


class _Ctx:
    """Where values came from, so an error can name the file or the environment variable."""

    def __init__(self, path: str, origins: dict[tuple[str, ...], str] | None = None) -> None:
        self.path = path
        self.origins = origins or {}

    def fail(self, key: tuple[str, ...], msg: str, fix: str | None = None) -> ConfigError:
        dotted = ".".join(key)
        env = self.origins.get(key)
        where = f"{self.path} (value from environment variable {env})" if env else self.path
        text = f"{where}: [{dotted}] {msg}"
        if fix:
            text += f"; {fix}"
        return ConfigError(text, file=self.path, key=dotted, env=env, fix=fix)


def _type_word(t: type) -> str:
    return {int: "an integer", float: "a number", bool: "true or false", str: "a string"}[t]


def _coerce(ctx: _Ctx, key: tuple[str, ...], value: Any, t: type, example: str) -> Any:
    """Check ``value`` is a ``t``; strings from the environment are converted."""
    if key in ctx.origins and isinstance(value, str) and t is not str:
        text = value.strip()
        try:
            if t is bool:
                if text.lower() in ("1", "true", "yes", "on"):
                    return True
                if text.lower() in ("0", "false", "no", "off"):
                    return False
                raise ValueError(text)
            return t(text)
        except ValueError:
            raise ctx.fail(key, f"is {value!r}, which is not {_type_word(t)}",
                           f"set {ctx.origins[key]}={example}") from None
    ok = isinstance(value, t) and not (t in (int, float) and isinstance(value, bool))
    if t is float and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    if not ok:
        raise ctx.fail(key, f"is {value!r} ({type(value).__name__}), not {_type_word(t)}",
                       f"write {key[-1]} = {example}")
    return value


def _check_unknown(ctx: _Ctx, prefix: tuple[str, ...], got: dict[str, Any], valid: list[str] | tuple[str, ...],
                   hint: str = "") -> None:
    for k in got:
        if k not in valid:
            raise ctx.fail(prefix + (k,), "unknown key",
                           f"{_nearest_key(k, valid)}valid keys here: {', '.join(valid)}{hint}")


def _computed_columns(ctx: _Ctx, key: tuple[str, ...], raw: Any) -> dict[str, str]:
    """[sources.X.columns]: names and SQL text, read by the expression allow-list's reader now
    (syntax, comments, one expression); the columns they name are checked at introspection."""
    from planner.errors import PlanError
    from planner.filter_sql import parse_text

    if not isinstance(raw, dict):
        raise ctx.fail(key + ("columns",), "must be a table of name = \"SQL expression\"",
                       f"write [{'.'.join(key)}.columns] then fee_per_km = \"fee / distance_km\"")
    out: dict[str, str] = {}
    for col, text in raw.items():
        k = key + ("columns", col)
        if not isinstance(text, str):
            raise ctx.fail(k, f"is {text!r}, not an SQL expression string",
                           f'write {col} = "fee / NULLIF(distance_km, 0)"')
        _check_model_name(ctx, k, col)
        try:
            parse_text(text)
        except PlanError as e:
            raise ctx.fail(k, e.detail.replace("filter_sql", "the expression"),
                           "see README \"Source model\" for what an expression may use") from None
        out[col] = text
    return out


def _check_model_name(ctx: _Ctx, k: tuple[str, ...], name: str) -> None:
    from planner.names import INTERNAL

    if not name or name != name.strip() or "." in name or name.lower().startswith(INTERNAL):
        raise ctx.fail(k, f"{name!r} is not a column name sluice can give",
                       f"use letters, digits and _ (no '.', not starting with {INTERNAL})")


def _dimensions(ctx: _Ctx, key: tuple[str, ...], raw: Any) -> list[DimensionConfig]:
    if not isinstance(raw, list) or not all(isinstance(r, dict) for r in raw):
        raise ctx.fail(key + ("dimensions",), "must be an array of tables",
                       f"write [[{'.'.join(key)}.dimensions]] with table, fact_column, key, columns")
    out: list[DimensionConfig] = []
    for i, r in enumerate(raw):
        k = key + (f"dimensions[{i}]",)
        _check_unknown(ctx, k, r, DIMENSION_KEYS)
        vals = {}
        for field_ in ("table", "fact_column", "key"):
            if not r.get(field_):
                raise ctx.fail(k + (field_,), "is missing",
                               'e.g. table = "depots", fact_column = "depot", key = "depot"')
            vals[field_] = _coerce(ctx, k + (field_,), r[field_], str, '"depots"')
        cols = r.get("columns")
        if not isinstance(cols, list) or not cols or not all(isinstance(c, str) and c for c in cols):
            raise ctx.fail(k + ("columns",), "must be a non-empty array of column names",
                           'e.g. columns = ["city", "opened_on"]')
        if len(set(cols)) != len(cols):
            raise ctx.fail(k + ("columns",), "names a column twice", None)
        name = r.get("name") or vals["table"].split(".")[-1]
        name = _coerce(ctx, k + ("name",), name, str, '"depots"')
        _check_model_name(ctx, k + ("name",), name)
        if name.lower() == "s":
            raise ctx.fail(k + ("name",), "'s' is the alias of the source rows",
                           "set name = to another word")
        if any(d.name == name for d in out):
            raise ctx.fail(k + ("name",), f"{name!r} names two dimensions",
                           "give one of them name = \"...\"")
        out.append(DimensionConfig(name, vals["table"], vals["fact_column"], vals["key"],
                                   list(cols), ".".join(k)))
    return out


def _model_names(ctx: _Ctx, key: tuple[str, ...], src: SourceConfig) -> None:
    """Computed column names and dimension names are one name space (``depots.city``)."""
    for d in src.dimensions:
        if d.name in src.columns:
            raise ctx.fail(key + ("columns", d.name), f"{d.name!r} is also a dimension's name",
                           "rename the computed column")


def parse_settings(data: dict[str, Any], path: str = "<config>", base: Path | None = None,
                   origins: dict[tuple[str, ...], str] | None = None) -> Settings:
    """Validate a parsed config and build Settings. Raises ConfigError naming file, key, fix."""
    from app.engines import ENGINES  # the engine registry (lazy: engines import SourceConfig)

    base = base or Path.cwd()
    ctx = _Ctx(path, origins)
    _check_unknown(ctx, (), data, TOP_KEYS)
    raw_sources = data.get("sources")
    if not isinstance(raw_sources, dict) or not raw_sources:
        raise ctx.fail(("sources",), "no sources", "add a table like [sources.NAME] with "
                       "engine, table and path or dsn")
    sources: dict[str, SourceConfig] = {}
    for name, s in raw_sources.items():
        key = ("sources", name)
        if not isinstance(s, dict):
            raise ctx.fail(key, "must be a table with engine, table and path or dsn",
                           f"write [sources.{name}] on its own line, then engine = ..., table = ...")
        engine = s.get("engine")
        if not isinstance(engine, str) or engine not in ENGINES:
            near = _nearest_key(str(engine), ENGINES) if isinstance(engine, str) else ""
            raise ctx.fail(key + ("engine",), f"is {engine!r}" if engine is not None else "is missing",
                           f"{near}use one of {', '.join(ENGINES)}")
        kind = ENGINES[engine]
        valid = list(SOURCE_KEYS) + list(kind.options) + list(SOURCE_LIMIT_KEYS)
        _check_unknown(ctx, key, s, valid,
                       f" (an engine-specific option goes under [sources.{name}.options])")
        table = s.get("table")
        if table is None or table == "":
            raise ctx.fail(key + ("table",), "is missing", "name the table (or schema.table) to chart, "
                           'e.g. table = "deliveries"')
        table = _coerce(ctx, key + ("table",), table, str, '"deliveries"')
        src_path = s.get("path")
        if src_path is not None:
            src_path = _coerce(ctx, key + ("path",), src_path, str, '"data/demo.duckdb"')
            p = Path(src_path).expanduser()
            src_path = str(p if p.is_absolute() else (base / p))
        if kind.file and not src_path:
            raise ctx.fail(key + ("path",), "is missing", f'a {engine} source needs path = "FILE"')
        dsn = s.get("dsn")
        if dsn is not None:
            dsn = _coerce(ctx, key + ("dsn",), dsn, str, '"postgresql://user@host/db"')
        options = {k: v for k, v in s.items() if k not in SOURCE_KEYS}
        extra = s.get("options", {})
        if not isinstance(extra, dict):
            raise ctx.fail(key + ("options",), "must be a table", f"write [sources.{name}.options]")
        options.update(extra)
        sources[name] = SourceConfig(name=name, engine=engine, table=table, path=src_path,
                                     dsn=dsn, options=options,
                                     columns=_computed_columns(ctx, key, s.get("columns", {})),
                                     dimensions=_dimensions(ctx, key, s.get("dimensions", [])),
                                     measures=_parse_measures(ctx, key, s.get("measures", {})))
        _model_names(ctx, key, sources[name])
    server = data.get("server", {})
    if not isinstance(server, dict):
        raise ctx.fail(("server",), "must be a table", "write [server] on its own line")
    fields = _server_fields()
    _check_unknown(ctx, ("server",), server, list(fields) + ["cors_origins"])
    st = Settings(sources=sources, config_path=path)
    for k, t in fields.items():
        if k in server:
            default = getattr(st, k)
            example = str(default).lower() if t is bool else repr(default) if t is str else f"{default}"
            v = _coerce(ctx, ("server", k), server[k], t, example)
            if t in (int, float) and v <= 0:
                raise ctx.fail(("server", k), f"is {v}; it must be positive", f"e.g. {k} = {default}")
            setattr(st, k, v)
    from app.auth import parse_cors, parse_keys  # (lazy: app.limits imports app.engines)
    from app.limits import parse_limits, source_limits

    st.limits = parse_limits(data.get("limits"), ctx.fail)
    for name, src in sources.items():
        source_limits(st.limits, src.options, name, ctx.fail)  # checked now, used per request
    st.keys = parse_keys(data.get("keys"), sources, ctx.fail)
    st.cors_origins = parse_cors(server.get("cors_origins"), ctx.fail)
    cache = data.get("cache", {})
    if not isinstance(cache, dict):
        raise ctx.fail(("cache",), "must be a table", "write [cache] on its own line")
    _check_unknown(ctx, ("cache",), cache, ["enabled", "max_bytes", "ttl_s"] + SHARED_CACHE_KEYS)
    _parse_shared_cache(ctx, cache, st)
    if "ttl_s" in cache:
        v = _coerce(ctx, ("cache", "ttl_s"), cache["ttl_s"], float, "60")
        if v < 0:
            raise ctx.fail(("cache", "ttl_s"), f"is {v}; it must be 0 or more",
                           "e.g. ttl_s = 60 (server sources; 0: never cache them)")
        st.cache["ttl_s"] = float(v)
    if "enabled" in cache:
        st.cache["enabled"] = _coerce(ctx, ("cache", "enabled"), cache["enabled"], bool, "true")
    if "max_bytes" in cache:
        v = _coerce(ctx, ("cache", "max_bytes"), cache["max_bytes"], int, "67108864")
        if v < 0:
            raise ctx.fail(("cache", "max_bytes"), f"is {v}; it must be 0 or more",
                           "e.g. max_bytes = 67108864 (64 MiB; 0 disables the cache)")
        st.cache["max_bytes"] = v
    return st


#: [cache] keys of the shared Redis cache (app.shared_cache): url, then numbers (defaults there)
SHARED_CACHE_KEYS = ["url", "shared_ttl_s", "shared_max_value_bytes", "lock_ms", "wait_ms",
                     "poll_ms", "timeout_ms"]


def _parse_shared_cache(ctx: Any, cache: dict, st: Settings) -> None:
    if "url" in cache:
        url = cache["url"]
        if not isinstance(url, str) or not url.startswith(("redis://", "rediss://", "unix://")):
            raise ctx.fail(("cache", "url"), f"is {url!r}; it must be a Redis URL",
                           'e.g. url = "redis://127.0.0.1:6379/0" (rediss:// for TLS)')
        st.cache["url"] = url
    for k in SHARED_CACHE_KEYS[1:]:
        if k in cache:
            v = _coerce(ctx, ("cache", k), cache[k], float, "1000")
            if v <= 0:
                raise ctx.fail(("cache", k), f"is {v}; it must be more than 0", None)
            st.cache[k] = v


def _env_name_of(parts: tuple[str, ...]) -> str:
    return ENV_PREFIX + "__".join(p.upper() for p in parts)


def apply_env(data: dict[str, Any], environ: dict[str, str] | None = None
              ) -> tuple[dict[str, Any], dict[tuple[str, ...], str]]:
    """Overlay ``SLUICE_*`` overrides on a parsed config. Returns (new data, origins)."""
    import copy

    environ = dict(os.environ if environ is None else environ)
    data = copy.deepcopy(data)
    origins: dict[tuple[str, ...], str] = {}
    fields = list(_server_fields())
    shortcuts = {ENV_PREFIX + f.upper(): f for f in fields}
    for var in sorted(environ):
        if not var.upper().startswith(ENV_PREFIX) or var.upper() in ENV_RESERVED:
            continue
        value = environ[var]
        upper = var.upper()
        if upper in shortcuts:
            parts: tuple[str, ...] = ("server", shortcuts[upper])
        elif "__" in upper:
            raw = [p.lower() for p in upper[len(ENV_PREFIX):].split("__")]
            if any(not p for p in raw):
                raise ConfigError(f"environment variable {var}: empty part between '__'",
                                  env=var, fix="e.g. SLUICE_SOURCES__DELIVERIES__PATH=/data/demo.duckdb")
            if raw[0] not in TOP_KEYS:
                raise ConfigError(
                    f"environment variable {var}: unknown section {raw[0]!r}; "
                    f"{_nearest_key(raw[0], TOP_KEYS)}use SLUICE_SERVER__KEY or SLUICE_SOURCES__NAME__KEY",
                    env=var, key=".".join(raw))
            if raw[0] == "sources":
                if len(raw) < 3:
                    raise ConfigError(f"environment variable {var}: name the source and the key, e.g. "
                                      "SLUICE_SOURCES__DELIVERIES__PATH", env=var)
                srcs = data.setdefault("sources", {})
                if not isinstance(srcs, dict):
                    srcs = data["sources"] = {}
                # match an existing source case-insensitively ('-' and '_' alike)
                norm = {n.lower().replace("-", "_"): n for n in srcs}
                raw[1] = norm.get(raw[1], raw[1])
            parts = tuple(raw)
        else:
            valid = list(shortcuts) + ["SLUICE_SERVER__<KEY>", "SLUICE_SOURCES__<NAME>__<KEY>"]
            # only a close miss is reported: other SLUICE_* names belong to other modules
            near = _nearest_key(upper, list(shortcuts), cutoff=0.88)
            if near:
                raise ConfigError(f"environment variable {var}: not a sluice setting; {near}"
                                  f"overrides: {', '.join(valid)}", env=var)
            continue  # someone else's variable
        node = data
        for p in parts[:-1]:
            nxt = node.get(p)
            if not isinstance(nxt, dict):
                nxt = node[p] = {}
            node = nxt
        if value.lstrip().startswith("["):  # a list: TOML array syntax, e.g. ["a", "b"]
            try:
                value = tomllib.loads(f"v = {value}")["v"]
            except tomllib.TOMLDecodeError as e:
                raise ConfigError(f"environment variable {var}: not a TOML array ({e}); "
                                  'write it like ["a", "b"]', env=var, key=".".join(parts)) from None
        node[parts[-1]] = value
        origins[parts] = var
    return data, origins


def load_settings(path: str | os.PathLike[str] | None = None,
                  environ: dict[str, str] | None = None) -> Settings:
    """Read the config named by ``path`` or ``SLUICE_CONFIG`` (the demo source otherwise),
    overlay ``SLUICE_*`` environment overrides and validate."""
    env = os.environ if environ is None else environ
    if path is None:
        path = env.get("SLUICE_CONFIG") or None
    if path is None:
        demo = env.get("SLUICE_DEMO_PATH", str(DEFAULT_DEMO))
        from app.demo import MODEL  # the demo's columns, dimensions, measures

        data, origins = apply_env({"sources": {"deliveries": {
            "engine": "duckdb", "path": demo, "table": "deliveries", **MODEL}}}, dict(env))
        return parse_settings(data, "<built-in demo config>", origins=origins)
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as e:
        raise ConfigError(f"{p}: cannot read the config file ({e.strerror}); set SLUICE_CONFIG "
                          "to an existing TOML file", file=str(p),
                          fix="set SLUICE_CONFIG to an existing TOML file") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{p}: not valid TOML: {e}", file=str(p),
                          fix="fix the TOML syntax at the line and column shown") from None
    data, origins = apply_env(data, dict(env))
    return parse_settings(data, str(p), p.resolve().parent, origins)
