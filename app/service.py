"""The one code path every route uses: plan -> execute -> shape the answer.

Routes, the CLI and the benchmarks call ``ChartService``; nothing else talks to engines.
"""

from __future__ import annotations

import dataclasses
import hashlib
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import orjson
import pyarrow as pa
import pyarrow.compute as pc

from app.catalog import Catalog, SourceEntry, UnknownSource
from app.encode import (column_values, domain, instant_text, normalize_column, type_name,
                        wire_values)
from app import auth
from app.engines import Engine
from app.engines.base import EngineError, EngineUnavailable
from app.limits import Limiter, Limits, check_filter_sql, check_request, clamp_limit
from app.engines.arrow import conform, key_zone, request_zone
from planner import names as internal
from planner.compile import (Plan, bind_sql, bind_values, bins_meta, carriable,
                             carried_extents, checked_bins, display_sql, extents_finite,
                             finish, guarded, guarded_extents_sql, layout_key, param_shape,
                             param_style, prepare)
from planner.compile import count_sql as count_sql_of
from planner.dialects import DIALECTS, get_dialect
from planner.errors import PlanError, Unsupported, nearest, pointer
from planner.model import MAX_BINS, VISUAL_CHANNELS, ChartRequest


@dataclass
class ChartResult:
    plan: Plan
    entry: SourceEntry
    table: pa.Table  # user-visible columns only, normalised types
    meta: dict[str, Any]
    timing: dict[str, float] = field(default_factory=dict)


class _ByteLRU:
    """A dict bounded by the bytes its entries are charged (least recently used go first);
    an entry larger than the budget is not kept. Thread-safe."""

    def __init__(self, max_bytes: int) -> None:
        self.max_bytes = int(max_bytes)
        self.nbytes = 0
        self._d: OrderedDict[Any, tuple[Any, int]] = OrderedDict()
        self._lock = threading.Lock()

    def __len__(self) -> int:
        return len(self._d)

    def get(self, key: Any) -> Any:
        with self._lock:
            hit = self._d.get(key)
            if hit is None:
                return None
            self._d.move_to_end(key)
            return hit[0]

    def put(self, key: Any, value: Any, nbytes: int) -> None:
        if nbytes > self.max_bytes:
            return
        with self._lock:
            old = self._d.pop(key, None)
            if old is not None:
                self.nbytes -= old[1]
            self._d[key] = (value, nbytes)
            self.nbytes += nbytes
            while self.nbytes > self.max_bytes and self._d:
                _, (_, n) = self._d.popitem(last=False)
                self.nbytes -= n


#: what one cached plan is charged beyond twice its SQL text: a base for the Plan object,
#: its keys, measures and output columns, plus per byte of the request shape (literal
#: values become sqlglot nodes of ~1 KB each in ``where``) and per bound value (the request
#: model the plan keeps holds the long lists). Measured with tracemalloc (DuckDB, request
#: included): 17 KB retained for a two-channel chart, 42 KB with bins/top/stack/filters,
#: 303 KB for 300 literal IN values, ~0.35 MB for a 5,000-value bound list parsed from
#: JSON; the charge is at or above each.
_PLAN_BASE_BYTES = 16 * 1024
_SHAPE_FACTOR = 64
_BOUND_VALUE_BYTES = 64


def _plan_charge(shape: bytes, bound_values: int, sql: str | None) -> int:
    return (_PLAN_BASE_BYTES + _SHAPE_FACTOR * len(shape) + _BOUND_VALUE_BYTES * bound_values
            + 2 * len(sql or ""))


class PlanCache:
    """Planning without re-planning: the SQL of a request is a pure function of (request
    shape, dialect, source data version, extents row), so sqlglot builds and renders it
    once and later requests reuse the text. The *shape* is the canonical request with every
    long ``in``/``not_in`` list replaced by its padded length and every bindable comparison
    value (eq..gte, contains, starts_with) by its JSON type: those are bound parameters
    (``planner.compile.bind_values``), so requests that differ only in their values share
    one plan -- a brush plans once, and so does a stream of new 5,000-value lists.

    * ``prepared``: the frozen bound Plan per (shape, dialect, version) -- shared
      read-only: its extents SQL is used, and every main statement is laid out from it,
      with a memo of ``layout_key`` by extents row beside it (``Prepared.layouts``);
    * ``extents_row``: the extents statement's answer per (source, version, SQL, bound
      values digest): a data-driven bin costs ONE statement once its extents are known;
    * ``finished``: the finished Plan (without its rendered sqlglot trees) and its main SQL
      text per (shape key, what the main statement takes from the extents row:
      ``planner.compile.layout_key``, e.g. the bin layouts), read-only once built: a new
      plan laid out from the prepared one (``planner.compile.finish``), no second bind.

    Each is an LRU bounded by bytes (``max_bytes`` split 4:1:4): a miss only costs planning.
    """

    def __init__(self, max_bytes: int = 64 * 1024 * 1024) -> None:
        self.max_bytes = int(max_bytes)
        self._prepared = _ByteLRU(self.max_bytes * 4 // 9)
        self._extents = _ByteLRU(self.max_bytes // 9)
        self._finished = _ByteLRU(self.max_bytes * 4 // 9)

    @property
    def nbytes(self) -> int:
        return self._prepared.nbytes + self._extents.nbytes + self._finished.nbytes

    def prepared(self, req: ChartRequest, entry: SourceEntry, dialect: Any) -> "Prepared":
        shape = orjson.dumps(param_shape(req, dialect, entry.schema), option=orjson.OPT_SORT_KEYS)
        # the key's row condition is part of the plan (planner.source.relation): keys apart
        key = (shape, dialect.name, entry.schema.name, entry.version, entry.schema.rows)
        prep = self._prepared.get(key)
        if prep is None:
            plan = prepare(req, entry.schema, dialect, params=True)
            bound = sum(len(v) if isinstance(v, list) else  # (SQLite: JSON text; else one value)
                        v.count(",") + 1 if isinstance(v, str) and v.startswith("[") else 1
                        for v in bind_values(req, entry.schema, dialect)) if plan.slots else 0
            # rendered once: the text is what is reused (the plan kept without its tree)
            prep = Prepared(dataclasses.replace(plan, extents=None), key, plan.extents_sql, bound,
                            carries=plan.extents is not None and carriable(plan))
            self._prepared.put(key, prep, _plan_charge(shape, bound, prep.extents_sql))
        return prep

    def extents_row(self, entry: SourceEntry, sql: str, args: list[Any]) -> dict[str, Any] | None:
        return self._extents.get(_extents_key(entry, sql, args))

    def remember_extents(self, entry: SourceEntry, sql: str, args: list[Any],
                         row: dict[str, Any]) -> None:
        self._extents.put(_extents_key(entry, sql, args), row, 2 * len(sql) + 64 * len(row) + 512)

    def finished(self, prep: "Prepared", entry: SourceEntry, row: dict[str, Any] | None,
                 carry: bool = False) -> tuple[Plan, str]:
        # not the row: a brush keeps its layout
        key = (prep.key, layout_key(prep.plan, row, prep.layouts), carry)
        hit = self._finished.get(key)
        if hit is None:
            plan = finish(prep.plan, row, carry)  # a new plan; the shared bound one stays as it is
            # the text is what is reused; the trees are big
            hit = (dataclasses.replace(plan, main=None, extents=None), plan.main_sql)
            self._finished.put(key, hit, _plan_charge(prep.key[0], prep.bound_values, hit[1]))
        return hit


def _extents_key(entry: SourceEntry, sql: str, args: list[Any]) -> tuple:
    # (the SQL holds the row condition too; the condition is named for plain reading)
    return (entry.schema.name, entry.version, entry.schema.rows, sql, _digest(args))


def _digest(args: list[Any]) -> bytes:
    """A short fingerprint of bound values (an extents row belongs to the values too)."""
    if not args:
        return b""
    return hashlib.blake2b(orjson.dumps(args, default=str), digest_size=16).digest()


@dataclass(frozen=True)
class Prepared:
    """A checked, never-finished plan shared between requests (read-only), its cache key
    and its rendered extents statement (SQL text with parameter slots). ``layouts``: the
    cache's memo of ``planner.compile.layout_key`` by extents row for this plan (owned by
    the cache, not part of the frozen plan)."""

    plan: Plan
    key: tuple
    extents_sql: str | None
    bound_values: int = 0  # values of its bound lists (for the byte charge)
    layouts: dict = field(default_factory=dict, repr=False, compare=False)
    #: the main statement can carry its own extents row (``planner.compile.carriable``)
    carries: bool = False
    #: ``"row"``: the last finite extents row of this shape -- a new filter value is first
    #: laid out from it, in one statement that carries its own row to check the layout
    recent: dict = field(default_factory=dict, repr=False, compare=False)


def _extents_only(req: ChartRequest, schema: Any) -> ChartRequest:
    """The request's keys (same order, so the same extents names) and filters without what
    only the chart needs (the keys' time zones, top, measures, stack): bin extents depend on
    neither. The request's tz stays: it is how the filters' instants are read."""
    def strip(ch):
        if ch is None:
            return None
        if ch.is_measure:
            return ch.model_copy(update={"agg": "count", "column": None, "q": None,
                                         "condition": None, "measure": None, "then": None,
                                         "within": None, "expr": None})
        col = schema.column(ch.column)
        return ch.model_copy(update={"tz": "UTC" if col is not None and col.is_temporal
                                     else None, "top": None})

    ch = req.channels
    channels = ch.model_copy(update={**{n: strip(getattr(ch, n)) for n in VISUAL_CHANNELS},
                                     "by": [strip(c) for c in ch.by]})
    facet = None if req.facet is None else req.facet.model_copy(update={
        "row": strip(req.facet.row), "col": strip(req.facet.col), "max_groups": None})
    return req.model_copy(update={"channels": channels, "facet": facet, "stack": None,
                                  "sort": [], "empty_bins": "omit"})


def _zones(plan: Plan) -> dict[str, str]:
    """Output column -> the zone its timestamps are written in (JSON offsets, Arrow type)."""
    return {n: key_zone(plan, k) for k in plan.keys for n in k.names}


def _column_meta(c: Any, t: pa.DataType) -> dict[str, Any]:
    """``columns[]`` entry: name, channel, role, type (and a decimal's precision/scale)."""
    out = {"name": c.name, "channel": c.channel, "role": c.role, "type": type_name(t)}
    if pa.types.is_decimal(t):
        out["precision"], out["scale"] = t.precision, t.scale
    return out


def _misbinned(raw: pa.Table) -> bool:
    """Whether the main statement's per-group check of a plain-floor bin index failed
    (``planner.emit_keys.checkable``: some group holds a value outside its bin)."""
    name = internal.misbinned()
    if name not in raw.column_names or raw.num_rows == 0:
        return False
    return bool(raw.column(name)[0].as_py())


def carried_row(plan: Plan, raw: pa.Table | None) -> dict[str, Any] | None:
    """The extents row a main statement with ``carry_extents`` carried over all its groups
    (``planner.compile.carried_extents``), or None when it returned no rows."""
    cols = carried_extents(plan)
    if raw is None or raw.num_rows == 0 or not cols or any(c not in raw.column_names for c in cols):
        return None
    return {c: raw.column(c)[0].as_py() for c in cols}


def _flag_count(raw: pa.Table, name: str) -> int:
    """How many rows of ``raw`` have the 1 / 0 flag column ``name`` set (0 without it)."""
    if name not in raw.column_names or not raw.num_rows:
        return 0
    return int(pc.sum(raw.column(name)).as_py() or 0)


def _ms(t0: float) -> float:
    return round((time.perf_counter() - t0) * 1000.0, 3)


class ChartService:
    def __init__(self, catalog: Catalog) -> None:
        self.catalog = catalog
        self._plans = PlanCache()
        #: texts of the statements several charts of a batch share (app/batch_sets.py)
        self.shared_sql = _ByteLRU(8 * 1024 * 1024)
        #: checked plain-floor bins (planner.compile.checked_bins) that missed an edge on a
        #: source: (source, the key's row condition, column, width) -> later layouts of them
        #: run the guarded form at once; and the guarded plans by checked main statement
        #: (both bounded)
        self._guard_bins: set[tuple[str, str | None, str, float]] = set()
        self._guarded = _ByteLRU(4 * 1024 * 1024)
        st = catalog.settings
        self.limiter = Limiter(getattr(st, "limits", None) or Limits(),
                               {n: c.options for n, c in st.sources.items()})

    # ---- planning ------------------------------------------------------------------
    def entry(self, name: str) -> SourceEntry:
        """The source as the calling API key sees it: with its row condition, if it has one
        (``[[keys]] rows``, app.auth; the grant is the request's own, a context variable)."""
        return self.catalog.view(name, auth.rows_for(name))

    def check_source(self, name: str) -> None:
        """404 (pointer /source) with the nearest names when ``name`` is not configured;
        403 first when the caller's API key does not grant it (app.auth)."""
        auth.require(name)
        try:
            self.catalog.config(name)
        except UnknownSource as e:
            known = auth.filter_names(e.known)  # never name sources the key may not see
            raise PlanError(pointer("source"), f"unknown source {name!r}; known sources: "
                            f"{', '.join(known)}", slug="unknown-source", title="Unknown source",
                            status=404, suggestions=nearest(name, known)) from None

    def _plan(self, req: ChartRequest, dialect_name: str | None = None,
              cached: bool = False) -> tuple[Any, SourceEntry, Engine]:
        # the source is checked by the callers (run, plan_sql), before the deadline and admit
        limits = self.limiter.of(req.source)
        check_request(req, limits)  # [limits] caps, 422 with pointers
        engine = self.limiter.guard(req.source, self.catalog.engine(req.source),
                                    user_sql=req.filter_sql is not None)  # statement timeout
        entry = self.catalog.with_exprs(self.entry(req.source), req)  # key rows, expr kinds
        check_filter_sql(req, limits, entry.schema, get_dialect(engine.dialect))
        if dialect_name is None:
            dialect_name = engine.dialect
        try:
            dialect = get_dialect(dialect_name)
        except KeyError:
            raise PlanError("", f"unknown dialect {dialect_name!r}; use one of "
                            f"{', '.join(sorted(DIALECTS))}", slug="unknown-dialect", status=400) from None
        req = self._clamp(req)
        if cached:  # a shared, never-finished plan (Prepared): see _run
            return self._plans.prepared(req, entry, dialect), entry, engine
        return prepare(req, entry.schema, dialect), entry, engine

    def _clamp(self, req: ChartRequest) -> ChartRequest:
        return clamp_limit(req, self.catalog.settings.max_limit)

    def _extents(self, plan: Plan, engine: Engine) -> dict[str, Any] | None:
        """Run the extents statement in the SOURCE's dialect (the values are dialect-free)."""
        if plan.extents is None:
            return None
        native = get_dialect(engine.dialect)
        if native is not plan.dialect:  # built from the target's constructs: rebuild natively
            try:
                plan = prepare(plan.request, plan.schema, native)
            except Unsupported:  # e.g. tz on a SQLite source: extents need none of it
                plan = prepare(_extents_only(plan.request, plan.schema), plan.schema, native)
            if plan.extents is None:
                return None
        row = engine.fetch_row(native.render(plan.extents))  # (literal values: no params)
        return self.checked_extents(plan, engine, row, [], "qmark", [])

    def plan_sql(self, req: ChartRequest, dialect_name: str | None) -> dict[str, Any]:
        self.check_source(req.source)
        # the source's deadline covers the whole request (app.deadline); max_concurrent, else 503
        with self.limiter.deadline(req.source), self.limiter.admit(req.source):
            return self._plan_sql(req, dialect_name)

    def _plan_sql(self, req: ChartRequest, dialect_name: str | None) -> dict[str, Any]:
        """SQL for ``dialect_name`` without running the chart (the extents statement, if any,
        runs on the source so the main statement shows the real bin layout)."""
        t0 = time.perf_counter()
        plan, entry, engine = self._plan(req, dialect_name)
        row = self._extents(plan, engine)
        plan = finish(plan, row)
        sql = ([plan.extents_sql] if plan.extents is not None else []) + [plan.main_sql]
        return {"dialect": plan.dialect.name, "sql": sql,
                "bins": self._bins(plan), "timing_ms": {"plan": _ms(t0)}}

    # ---- running -------------------------------------------------------------------
    def run(self, req: ChartRequest) -> ChartResult:
        self.check_source(req.source)
        # the source's deadline covers the whole request: planning, extents, execution and
        # shaping (app.deadline); max_concurrent per source, else 503
        with self.limiter.deadline(req.source), self.limiter.admit(req.source):
            result = self._run(req)
            self.limiter.check_deadline(req.source)  # shaping ran past it: 504 all the same
            return result

    def _run(self, req: ChartRequest) -> ChartResult:
        timing: dict[str, float] = {}
        t0 = time.perf_counter()
        prep, entry, engine = self._plan(req, cached=True)
        dialect = prep.plan.dialect
        # this request's values for the plan's parameter slots (long IN lists), checked
        values = bind_values(req, entry.schema, dialect) if prep.plan.slots else []
        style = param_style(dialect)
        timing["plan"] = _ms(t0)
        t1 = time.perf_counter()
        statements: list[str] = []
        guess = prep.recent.get("row") if prep.carries else None
        row = self.extents_row(prep, entry, engine, values, style, statements,
                               lookup_only=guess is not None)
        t2 = time.perf_counter()
        plan_more = 0.0
        raw = None
        if row is None and guess is not None:  # a new filter: one statement, checked after
            plan, main_sql = self._plans.finished(prep, entry, guess, carry=True)
            plan_more += _ms(t2)
            raw, plan, main_sql = self._main(req, plan, main_sql, entry, engine, values, style,
                                             statements, speculative=True)
            if not self.carried_layout(prep, entry, plan, raw, guess, values, style):
                raw = None  # another layout (or inf / NaN): laid out from its own row
                row = self.extents_row(prep, entry, engine, values, style, statements)
            t2 = time.perf_counter()
        if raw is None:
            plan, main_sql = self._plans.finished(prep, entry, row)
            plan_more += _ms(t2)
            raw, plan, main_sql = self._main(req, plan, main_sql, entry, engine, values, style,
                                             statements)
        else:
            raw, plan, main_sql = self._recheck(req, plan, main_sql, raw, entry, engine, values,
                                                style, statements)
        self.remember_layout(prep, row)
        extra = self.totals(plan, engine, values, style, statements) if raw.num_rows == 0 else None
        timing["execute"] = round(_ms(t1) - plan_more, 3)
        timing["plan"] = round(timing["plan"] + plan_more, 3)
        t3 = time.perf_counter()
        table, meta = self._shape(plan, entry, raw, extra, statements)
        timing["shape"] = _ms(t3)
        return ChartResult(plan, entry, table, meta, timing)

    def carried_layout(self, prep: "Prepared", entry: SourceEntry, plan: Plan,
                       raw: pa.Table | None, guess: dict[str, Any], values: list[Any],
                       style: str) -> bool:
        """Whether the answer of a main statement laid out from ``guess`` (``carry=True``)
        stands: the extents row it carried (``carried_row``) is finite and gives the same
        layout (``layout_key``), i.e. the extents statement would have led to the same
        statement. A finite carried row is remembered as that statement's answer either way;
        a non-finite one ends the guessing for this shape (the guarded extents follow), so a
        batch member that runs again alone does not guess a second time."""
        row = carried_row(plan, raw)
        if row is None:
            return False
        if not extents_finite(prep.plan, row):  # inf / NaN under such filters: no more
            prep.recent.pop("row", None)  # guesses until a finite row is laid out again
            return False
        self._plans.remember_extents(entry, prep.extents_sql,
                                     bind_sql(prep.extents_sql, values, style)[1], row)
        self.remember_layout(prep, row)
        same = layout_key(prep.plan, guess, prep.layouts)
        return layout_key(prep.plan, row, prep.layouts) == same

    @staticmethod
    def remember_layout(prep: "Prepared", row: dict[str, Any] | None) -> None:
        """Keep ``row`` as the shape's last extents row (the next new filter starts from
        it) when the shape can carry its extents and the row is a finite plain one."""
        if (prep.carries and row and extents_finite(prep.plan, row)
                and internal.extents_guarded() not in row):
            prep.recent["row"] = row

    def _main(self, req: ChartRequest, plan: Plan, main_sql: str, entry: SourceEntry,
              engine: Engine, values: list[Any], style: str, statements: list[str],
              speculative: bool = False) -> tuple[pa.Table | None, Plan, str]:
        """Run a finished plan's main statement: guarded at once for a bin the checked
        plain floor missed before, and again guarded when it misses now (``_recheck``).
        ``speculative``: the layout came from an earlier extents row (``carry=True``), so an
        engine error -- say, a value that layout cannot place -- answers None and the caller
        lays the chart out from its own row; it is rechecked once the layout is confirmed."""
        if self._known_misbinned(req, plan, entry):
            plan, main_sql = self._guarded_plan(main_sql, plan)
        statements.append(display_sql(main_sql))
        try:
            raw = engine.execute(*bind_sql(main_sql, values, style))
        except (EngineError, PlanError) as e:
            if not speculative or isinstance(e, EngineUnavailable):
                raise
            return None, plan, main_sql
        if speculative:
            return raw, plan, main_sql
        return self._recheck(req, plan, main_sql, raw, entry, engine, values, style, statements)

    def _known_misbinned(self, req: ChartRequest, plan: Plan, entry: SourceEntry) -> bool:
        # per row condition too: what one key's rows did never shows in another's answer
        return any((req.source, entry.schema.rows, *c) in self._guard_bins
                   for c in checked_bins(plan))

    def _recheck(self, req: ChartRequest, plan: Plan, main_sql: str, raw: pa.Table,
                 entry: SourceEntry, engine: Engine, values: list[Any], style: str,
                 statements: list[str]) -> tuple[pa.Table, Plan, str]:
        """``raw`` unless the checked plain floor missed an edge (``_misbinned``): then the
        guarded form's answer, and the bins are remembered (``_known_misbinned``)."""
        if not _misbinned(raw):
            return raw, plan, main_sql
        if len(self._guard_bins) >= 4096:
            self._guard_bins.clear()
        self._guard_bins.update((req.source, entry.schema.rows, *c) for c in checked_bins(plan))
        plan, main_sql = self._guarded_plan(main_sql, plan)
        statements.append(display_sql(main_sql))
        return engine.execute(*bind_sql(main_sql, values, style)), plan, main_sql

    def extents_row(self, prep: "Prepared", entry: SourceEntry, engine: Engine,
                    values: list[Any], style: str, statements: list[str],
                    lookup_only: bool = False) -> dict[str, Any] | None:
        """The extents row of ``prep`` for these values: the cache's for this data version,
        else the engine's (one more statement, added to ``statements``) -- or None with
        ``lookup_only`` when the cache lacks it (a batch merges the missing ones)."""
        extents_sql = prep.extents_sql
        if extents_sql is None:
            return None
        sql, args = bind_sql(extents_sql, values, style)
        row = self._plans.extents_row(entry, extents_sql, args)
        if row is None and not lookup_only:
            statements.append(display_sql(extents_sql))
            row = engine.fetch_row(sql, args)  # GuardedEngine: no args, no params
            row = self.checked_extents(prep.plan, engine, row, values, style, statements)
            self._plans.remember_extents(entry, extents_sql, args, row)
        return row

    def checked_extents(self, plan: Plan, engine: Engine, row: dict[str, Any] | None,
                        values: list[Any], style: str, statements: list[str]
                        ) -> dict[str, Any] | None:
        """``row`` when the plain extents statement's extremes are finite
        (``planner.compile.extents_finite``), else the guarded statement's row (one more
        statement, added to ``statements``): data with inf or NaN."""
        if extents_finite(plan, row):
            return row
        text = guarded_extents_sql(plan)
        statements.append(display_sql(text))
        return engine.fetch_row(*bind_sql(text, values, style))

    def totals(self, plan: Plan, engine: Engine, values: list[Any], style: str,
               statements: list[str]) -> dict[str, Any]:
        """Matched and outside-limit counts when the main statement returned no rows (its
        window totals are absent): one more statement, added to ``statements``."""
        count_sql = count_sql_of(plan)
        statements.append(display_sql(count_sql))
        return engine.fetch_row(*bind_sql(count_sql, values, style))

    def _guarded_plan(self, main_sql: str, plan: Plan) -> tuple[Plan, str]:
        """``planner.compile.guarded(plan)`` and its text, kept by the checked statement's
        text (the text is what is reused; the trees are big)."""
        hit = self._guarded.get(main_sql)
        if hit is None:
            g = guarded(plan)
            hit = (dataclasses.replace(g, main=None), g.main_sql)
            self._guarded.put(main_sql, hit, 2 * (len(main_sql) + len(hit[1])) + 4096)
        return hit

    def _bins(self, plan: Plan) -> dict[str, Any]:
        out = bins_meta(plan)
        tz = {k.label: key_zone(plan, k) for k in plan.keys}
        for ch, b in out.items():
            for key in ("start", "stop"):
                if not isinstance(b.get(key), (int, float)) and b.get(key) is not None:
                    b[key] = instant_text(b[key], tz.get(ch))
        return out

    def _shape(self, plan: Plan, entry: SourceEntry, raw: pa.Table, extra: dict[str, Any] | None,
               statements: list[str]) -> tuple[pa.Table, dict[str, Any]]:
        raw = conform(raw, plan)  # engine representations (0/1, text times) -> plan kinds
        def first(name: str) -> Any:
            if raw.num_rows and name in raw.column_names:
                return raw.column(name)[0].as_py()
            return None

        if extra is not None:
            matched = int(extra.get(internal.matched()) or 0)
            outside = {k.label: int(extra.get(k.outside_flag) or 0) for k in plan.keys if k.has_limits}
        else:
            matched = int(first(internal.matched()) or 0)
            outside = {k.label: int(first(internal.outside_count(k.index)) or 0)
                       for k in plan.keys if k.has_limits}
        groups = int(first(internal.groups()) or 0)

        tz_of = _zones(plan)
        names = [c.name for c in plan.columns]
        arrays = {n: normalize_column(raw.column(n)) for n in names}
        table = pa.table(arrays)
        columns = [_column_meta(c, table.column(c.name).type) for c in plan.columns]
        domains: dict[str, Any] = {}
        for c in plan.columns:
            dom = domain(table.column(c.name), tz_of.get(c.name, plan.request.tz))
            if dom is not None:
                domains[c.name] = dom
        bins = self._bins(plan)
        for k in plan.keys:  # width + origin without limits: the layout is what the data used
            b = bins.get(k.label)
            if k.mode == "nbin" and b is not None and b.get("count") is None:
                lo = domains.get(k.names[0])
                hi = domains.get(k.names[1])
                if lo and hi:
                    b["start"], b["stop"] = lo[0], hi[1]
                    count = (hi[1] - lo[0]) / b["width"]
                    if not count <= MAX_BINS:  # (also NaN / infinity)
                        raise PlanError(pointer(*k.path, "bin", "width"),
                                        f"width {b['width']:g} over the data range "
                                        f"[{lo[0]:g}, {hi[1]:g}] makes {count:.3g} bins; at most "
                                        f"{MAX_BINS}: use a larger width or limits",
                                        slug="too-many-bins")
                    b["count"] = int(round(count))
                else:
                    b["start"] = b["stop"] = None
                    b["count"] = 0
        for ch, b in bins.items():
            domains.setdefault(ch, [b.get("start"), b.get("stop")])
        truncated = groups > table.num_rows
        stats = {
            "source_rows": entry.row_count,
            "matched_rows": matched,
            "result_rows": table.num_rows,
            "groups": max(groups, table.num_rows),
            "truncated": truncated,
            "statements": len(statements),
        }
        if outside:
            stats["outside_limits"] = outside
        cut = {name: n for j, name in enumerate(plan.text_outputs)
               if (n := _flag_count(raw, internal.cut_text(j)))}
        if cut:  # text values cut to MAX_TEXT_CHARS characters (planner/emit_main.py)
            stats["cut_text"] = cut
        meta: dict[str, Any] = {
            "columns": columns, "bins": bins, "domains": domains, "stats": stats,
            "sql": statements, "dialect": plan.dialect.name,
        }
        if plan.request.reduce is not None:  # M4: say the answer is a reduced line
            from planner import m4

            meta["reduced"] = m4.response_meta(plan, plan.reduced_row,
                                               m4.layout(plan.reduced_row)[2])
        if plan.approximate:
            method, err = plan.dialect.caps.approx_distinct
            approx_cols = [m.name for m in plan.measures if m.internal in plan.approximate]
            meta["approximate"] = True
            meta["approximation"] = {"columns": approx_cols, "method": method,
                                     "relative_standard_error": err}
        return table, meta

    def to_json(self, result: ChartResult, wire: bool = False) -> dict[str, Any]:
        """The JSON answer as Python values; decimals stay ``Decimal`` (``app.encode.dumps``
        writes their exact digits). ``wire=True``: decimal columns as ready JSON fragments
        (for the HTTP body; the same bytes, faster)."""
        tz_of = _zones(result.plan)
        values = wire_values if wire else column_values
        data = {n: values(result.table.column(n), tz_of.get(n, request_zone(result.plan)))
                for n in result.table.column_names}
        meta = result.meta
        out = {"columns": meta["columns"], "data": data}
        out.update((k, v) for k, v in meta.items() if k != "columns")
        return out
