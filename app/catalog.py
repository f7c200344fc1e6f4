"""The source catalog: engines, introspected schemas and row counts.

Column names and types come only from the engine (``describe``), never from a request.
Schemas and row counts are cached per source and refreshed when the engine's data version
changes, so a request costs no catalog round trip.

File engines that can tell their file was replaced or removed (``stale()``, DuckDB) are closed
and opened again on the next request that needs them: a rebuilt file renamed over the old
one is answered from at once, a deleted one is a 503 naming the source until it returns.

An API key with a row condition on a source (``[[keys]] rows``, app.auth) sees the source
through ``view(name, rows)``: the same entry with the condition on its schema (so every
statement reads only those rows: ``planner.source.relation``) and its own row count, counted
once per data version and condition. Each introspection checks every key's condition
against the columns found and logs the ones that no longer fit (their requests get a 503).
"""

from __future__ import annotations

import dataclasses
import logging
import threading
import time
from dataclasses import dataclass
from typing import Any

from sqlglot import exp

from app import deadline, model
from app.engines import Engine, EngineError, EngineUnavailable, open_engine
from app.settings import Settings, SourceConfig
from planner.dialects import get_dialect
from planner.errors import PlanError
from planner.schema import ColumnInfo, SourceSchema, classify
from planner.source import relation, row_condition

log = logging.getLogger("sluice")


@dataclass
class SourceEntry:
    cfg: SourceConfig
    schema: SourceSchema
    row_count: int
    version: str


class UnknownSource(Exception):
    def __init__(self, name: str, known: list[str]) -> None:
        super().__init__(name)
        self.name = name
        self.known = known


class Catalog:
    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self._engines: dict[str, Engine] = {}
        self._entries: dict[str, SourceEntry] = {}
        self._lock = threading.Lock()
        self._open_locks: dict[str, threading.Lock] = {}
        self._failed: dict[str, tuple[float, str]] = {}  # name -> (when, why) of the last failed open
        #: (source, data version, expr text) -> its ColumnInfo (app/model.py)
        self._expr_kinds: dict[tuple[str, str, str], ColumnInfo] = {}
        self._views: dict[tuple[str, str], SourceEntry] = {}  # (source, row condition) -> view

    def names(self) -> list[str]:
        return self.settings.source_names

    def config(self, name: str) -> SourceConfig:
        try:
            return self.settings.sources[name]
        except KeyError:
            raise UnknownSource(name, self.names()) from None

    def engine(self, name: str) -> Engine:
        eng = self._engines.get(name)
        if eng is not None:
            stale = getattr(eng, "stale", None)
            if stale is not None and stale():
                self._retire_stale()
                eng = None
        if eng is None:
            eng = self._open(name)
        return eng

    def _open(self, name: str) -> Engine:
        """Open a source's engine: one opener per source, the others wait at most what is
        left of their deadline (app.deadline); a failure is shared with the requests that
        waited for it (a down warehouse costs one connection attempt, not one per waiting
        request), and the first request arriving after it tries again."""
        cfg = self.config(name)
        arrived = time.monotonic()
        with self._lock:
            lock = self._open_locks.setdefault(name, threading.Lock())
        left = deadline.budget(None)
        if not lock.acquire(timeout=-1 if left is None else max(left, 0.0)):
            raise EngineUnavailable(name, f"source {name!r} is still being opened; retry")
        try:
            eng = self._engines.get(name)
            if eng is not None:
                return eng
            failed = self._failed.get(name)
            if failed is not None and failed[0] >= arrived:  # failed while this one waited
                raise EngineUnavailable(name, failed[1])
            try:
                eng = open_engine(cfg)
            except EngineError as e:
                self._failed[name] = (time.monotonic(), e.message)
                raise
            self._failed.pop(name, None)
            self._engines[name] = eng
            return eng
        finally:
            lock.release()

    def _retire_stale(self) -> None:
        """Close every engine whose file changed (all at once: sources on one DuckDB file
        share one database instance, which only a fresh open after the last close renews)."""
        with self._lock:
            for n, e in list(self._engines.items()):
                stale = getattr(e, "stale", None)
                if stale is not None and stale():
                    self._engines.pop(n, None)
                    self._entries.pop(n, None)
                    try:
                        e.close()
                    except Exception:  # noqa: BLE001 - closing a replaced file's engine
                        pass

    def entry(self, name: str) -> SourceEntry:
        """Schema and row count of a source, introspected once per data version."""
        eng = self.engine(name)
        version = eng.data_version()
        cached = self._entries.get(name)
        if cached is not None and cached.version == version:
            return cached
        cfg = self.config(name)
        parts = eng.split_table(cfg.table)
        cols = eng.describe(parts)
        if not cols:
            raise EngineUnavailable(name, f"table {cfg.table!r} not found in source {name!r}")
        dialect = get_dialect(eng.dialect)
        schema = SourceSchema(
            name=name, table=parts,
            columns={c: ColumnInfo(c, classify(t, dialect.sqlglot or None), t) for c, t in cols},
            measures=dict(cfg.measures))
        schema = model.build(eng, cfg, schema, dialect)  # computed columns, dimensions
        schema, count = self._in_range(eng, cfg, schema, dialect)
        entry = SourceEntry(cfg, schema, count, version)
        self._check_rows(entry, dialect)
        self._entries[name] = entry
        return entry

    def _in_range(self, eng: Engine, cfg: SourceConfig, schema: SourceSchema, dialect
                  ) -> tuple[SourceSchema, int]:
        """(the schema with ``in_range`` set on each physical time column none of whose
        cells the dialect's range test (``Dialect.instant_range``) turns into NULL, the row
        count). Only on a file source: its data version is the file's identity, so the proof
        lasts exactly as long as the entry. There the row count's statement also counts each
        time column's cells that fail the test, in the same scan; elsewhere the plain row
        count."""
        from app.engines import ENGINES

        kind = ENGINES.get(cfg.engine)
        if kind is None or not kind.file:
            return schema, self._count(eng, schema)
        added = schema.model_columns()  # computed and dimension columns: not proved here
        checks = []  # (column, alias, its cells failing the test)
        for c in schema.columns.values():
            ref = dialect.column(c.name, "s")
            ok = dialect.instant_range(ref, c.kind) if c.is_temporal and c.name not in added \
                else None
            if ok is not None:  # (a NULL cell stays NULL either way; SQLite's test fails it)
                fails = exp.and_(exp.Not(this=exp.Is(this=ref.copy(), expression=exp.Null())),
                                 exp.Not(this=exp.Paren(this=ok)))
                checks.append((c, f"r{len(checks)}", exp.Sum(this=exp.Case(
                    ifs=[exp.If(this=fails, true=exp.Literal.number(1))],
                    default=exp.Literal.number(0)))))
        if not checks:
            return schema, self._count(eng, schema)
        q = exp.select(exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True),
                       *[exp.alias_(e, name, quoted=True) for _, name, e in checks])
        row = eng.fetch_row(dialect.render(q.from_(relation(schema, dialect))))
        proved = {c.name for c, name, _ in checks if not row.get(name)}  # 0, or NULL: no rows
        columns = {k: dataclasses.replace(c, in_range=True) if k in proved else c
                   for k, c in schema.columns.items()}
        return dataclasses.replace(schema, columns=columns), int(row.get("n") or 0)

    @staticmethod
    def _count(eng: Engine, schema: SourceSchema) -> int:
        dialect = get_dialect(eng.dialect)
        count_sql = dialect.render(
            exp.select(exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True))
            .from_(relation(schema, dialect)))
        return int(eng.fetch_row(count_sql).get("n") or 0)

    def _check_rows(self, entry: SourceEntry, dialect) -> None:
        """Log every key's row condition on this source that the columns found refuse (its
        requests answer 503 row-condition-invalid: ``planner.source.row_condition``)."""
        for k in getattr(self.settings, "keys", None) or []:
            for src, cond in k.rows:
                if src != entry.schema.name:
                    continue
                try:  # the relation's own compile (planner.source.row_condition)
                    row_condition(dataclasses.replace(entry.schema, rows=cond), dialect)
                except PlanError as e:
                    log.error("config: [keys.%d.rows.%s] does not fit source %r: %s; this key's "
                              "requests to it answer 503", k.index, src, src, e.detail)

    def view(self, name: str, rows: str | None) -> SourceEntry:
        """The source as a key with row condition ``rows`` sees it: the schema carries the
        condition, ``row_count`` counts only those rows (once per data version)."""
        entry = self.entry(name)
        if rows is None:
            return entry
        hit = self._views.get((name, rows))
        if hit is not None and hit.version == entry.version:
            return hit
        schema = dataclasses.replace(entry.schema, rows=rows)
        view = SourceEntry(entry.cfg, schema, self._count(self.engine(name), schema),
                           entry.version)
        self._views[(name, rows)] = view
        return view

    def with_exprs(self, entry: SourceEntry, request: Any) -> SourceEntry:
        """``entry`` whose schema also holds the request's ``{"expr": ...}`` terms, typed by
        the engine (a zero-row query, cached per source, data version and text)."""
        texts = [(path, ch.expr) for path, _, ch in request.keyed_channels()
                 if ch.expr is not None and ch.expr not in entry.schema.columns]
        if not texts:
            return entry
        eng = self.engine(entry.cfg.name)
        schema = model.with_exprs(eng, entry.schema, get_dialect(eng.dialect), texts,
                                  self._expr_kinds, entry.version)
        return dataclasses.replace(entry, schema=schema)

    def close(self) -> None:
        for eng in self._engines.values():
            try:
                eng.close()
            except EngineError:
                pass
        self._engines.clear()
