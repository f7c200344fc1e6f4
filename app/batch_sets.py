"""Charts of one ``/v1/batch`` that read the same rows, answered by ONE statement.

The rule (DEVELOPERS.md "Batches: one statement per filter", measured in bench/RESULTS.md):
charts of a batch whose composed filters are equal -- the same ``where`` and ``filter_sql``
after ``planner.linked`` composed them, read in the same ``tz`` -- and whose shape
``planner.emit_sets.combinable`` accepts are planned into one GROUPING SETS statement
(Gray et al. 1997) on dialects with ``caps.grouping_sets`` and a ``caps.shared_cte``; their
data-driven bins come from one merged extents statement. Every other chart -- another
filter (a brush that differs), top-N, empty_bins, quantiles, M4, a dialect without
GROUPING SETS -- runs as its own statements, as it would alone.

Each chart's answer is built by the same ``ChartService._shape`` from the table its own main
statement would have given (the shared statement's rows of that chart, its columns renamed
back), so it equals the chart asked alone but for ``sql`` / ``stats.statements`` (the
statements that actually ran for it) and ``timing_ms``. Answers go into the result cache
per chart as usual (``app.routes_charts.json_answer``); the shared statement runs when the
first member misses the cache, once for the whole group.
"""

from __future__ import annotations

import dataclasses
import threading
import time
from typing import Any, Callable

import orjson
import pyarrow as pa
import pyarrow.compute as pc

from planner import names
from planner.compile import (bind_sql, bind_values, combinable, display_sql, layout_key,
                             param_style, prepare, sets_extents, sets_statement)
from planner.errors import PlanError
from planner.model import ChartRequest


def filter_key(req: ChartRequest) -> bytes:
    """Charts with equal keys read the same rows: source, ``where``, ``filter_sql``, ``tz``
    (the zone offset-less instants in the filters are read in) and which of the filters
    decide the layouts (``layout_filters``, when fewer than all), canonical JSON."""
    d = req.model_dump(mode="json", include={"source", "where", "filter_sql", "tz"})
    d["layout_filters"] = req.layout_filters if req.split_layout else None
    return orjson.dumps(d, option=orjson.OPT_SORT_KEYS)


def shared_runs(service: Any, requests: dict[int, ChartRequest]
                ) -> dict[int, Callable[[], Any]]:
    """Per chart index that shares a statement: a function giving its ``ChartResult``
    (charts not listed run alone). Nothing runs until a member asks."""
    groups: dict[bytes, list[tuple[int, ChartRequest]]] = {}
    for i, req in requests.items():
        groups.setdefault(filter_key(req), []).append((i, req))
    out: dict[int, Callable[[], Any]] = {}
    for members in groups.values():
        if len(members) < 2:
            continue
        group = _Group(service, members)
        for i, _ in members:
            out[i] = (lambda g, i: lambda: g.result(i))(group, i)
    return out


@dataclasses.dataclass
class _Member:
    index: int
    req: ChartRequest
    prep: Any
    values: list
    k: int = 0  # its place in the shared statement (planner.names.chart())
    row: dict | None = None
    #: the shape's last extents row when its own is not cached: laid out from it, the chart
    #: carries its own row in the shared statement (``Plan.carry_extents``), checked after
    guess: dict | None = None
    statements: list = dataclasses.field(default_factory=list)


class _Group:
    """Charts under one filter; ``result(i)`` runs the shared statement once."""

    def __init__(self, service: Any, members: list[tuple[int, ChartRequest]]) -> None:
        self.service = service
        self.members = members
        self.lock = threading.Lock()
        self.done = False
        self.results: dict[int, Any] = {}
        #: statements that ran for a member whose answer was not kept (``_run_within``)
        self.spent: dict[int, list[str]] = {}
        self.error: BaseException | None = None

    def result(self, i: int) -> Any:
        with self.lock:
            if not self.done:
                self.done = True
                try:
                    self._run()
                except Exception as e:  # noqa: BLE001 - each member re-raises it
                    self.error = e
        if i in self.results:
            return self.results.pop(i)
        if self.error is not None and not isinstance(self.error, PlanError):
            raise self.error
        req = dict(self.members)[i]
        result = self.service.run(req)  # not part of the shared statement: alone
        spent = self.spent.pop(i, None)
        if spent:  # it had a place in the shared statement too: that statement ran for it
            result.meta["sql"] = spent + result.meta["sql"]
            result.meta["stats"]["statements"] = len(result.meta["sql"])
        return result

    def _run(self) -> None:
        svc = self.service
        source = self.members[0][1].source
        svc.check_source(source)
        with svc.limiter.deadline(source), svc.limiter.admit(source):
            self._run_within(source)
            svc.limiter.check_deadline(source)

    def _run_within(self, source: str) -> None:
        svc = self.service
        t0 = time.perf_counter()
        members: list[_Member] = []
        entry = engine = None
        for i, req in self.members:
            try:
                prep, entry, engine = svc._plan(req, cached=True)
            except PlanError:
                continue  # its own problem: it runs alone and answers it
            if not combinable(prep.plan):
                continue
            d = prep.plan.dialect
            values = bind_values(req, entry.schema, d) if prep.plan.slots else []
            members.append(_Member(i, req, prep, values))
        members = [m for m in members if m.values == members[0].values] if members else []
        if len(members) < 2:
            return
        for k, m in enumerate(members):
            m.k = k
        d = members[0].prep.plan.dialect
        style = param_style(d)
        values = members[0].values
        plan_ms = (time.perf_counter() - t0) * 1000.0
        t1 = time.perf_counter()
        self._extents(members, entry, engine, style)
        for m in members:
            svc.remember_layout(m.prep, m.row)
        t2 = time.perf_counter()
        finished = [svc._plans.finished(m.prep, entry, m.row or m.guess, m.guess is not None)
                    for m in members]
        key = tuple((m.prep.key, layout_key(m.prep.plan, m.row or m.guess, m.prep.layouts),
                     m.guess is not None) for m in members)
        shared = svc.shared_sql.get(key)
        if shared is None:
            built = sets_statement([p for p, _ in finished])
            if built is None:
                return
            shared = (d.render(built.statement), built.columns, built.orders)
            svc.shared_sql.put(key, shared, 4 * len(shared[0]) + 4096)
        text, columns, orders = shared
        plan_ms += (time.perf_counter() - t2) * 1000.0
        sql, args = bind_sql(text, values, style)
        shown = display_sql(text)
        t4 = time.perf_counter()
        raw = engine.execute(sql, args)
        execute_ms = (t2 - t1 + time.perf_counter() - t4) * 1000.0
        chart = raw.column(names.chart())
        for m, (plan, _), cols, order in zip(members, finished, columns, orders):
            t3 = time.perf_counter()
            ordv = pc.fill_null(raw.column(order), 0)
            mask = pc.and_(pc.equal(chart, m.k), pc.greater(ordv, 0))
            rows = raw.filter(mask)
            rows = rows.take(pc.sort_indices(rows.column(order)))
            sub = pa.table({own: rows.column(c) for c, own in cols})
            if m.guess is not None and not svc.carried_layout(m.prep, entry, plan, sub, m.guess,
                                                             values, style):
                self.spent[m.index] = m.statements + [shown]  # (shown in its answer too)
                continue  # another layout (or inf / NaN, no rows): it runs alone
            statements = m.statements + [shown]
            extra = (svc.totals(plan, engine, values, style, statements)  # as the chart alone
                     if sub.num_rows == 0 else None)
            table, meta = svc._shape(plan, entry, sub, extra, statements)
            timing = {"plan": round(plan_ms, 3), "execute": round(execute_ms, 3),
                      "shape": round((time.perf_counter() - t3) * 1000.0, 3)}
            self.results[m.index] = _result(plan, entry, table, meta, timing)

    def _extents(self, members: list[_Member], entry: Any, engine: Any, style: str) -> None:
        """Each member's extents row: the cache's, else the shape's last row as a guess
        (``ChartService.carried_layout`` checks it), else one merged statement for all
        that lack theirs (their own statement when only one does)."""
        svc = self.service
        need = []
        for m in members:
            m.row = svc.extents_row(m.prep, entry, engine, m.values, style, m.statements,
                                    lookup_only=True)
            if m.row is None and m.prep.carries:
                m.guess = m.prep.recent.get("row")
            if m.row is None and m.guess is None and m.prep.extents_sql is not None:
                need.append(m)
        if not need:
            return
        merged = None
        if len(need) > 1:
            key = ("extents",) + tuple(m.prep.key for m in need)
            merged = svc.shared_sql.get(key)
            if merged is None:
                plans = [prepare(m.prep.plan.request, entry.schema, m.prep.plan.dialect,
                                 params=True) for m in need]
                built = sets_extents(plans)
                merged = (False,) if built is None else (
                    True, plans[0].dialect.render(built[0]), built[1])
                svc.shared_sql.put(key, merged, 4 * len(merged[1]) + 4096 if built else 64)
        if merged is not None and merged[0]:
            _, text, columns = merged
            row = engine.fetch_row(*bind_sql(text, need[0].values, style))
            for m, cols in zip(need, columns):
                m.row = {own: row.get(c) for c, own in cols}
                m.statements.append(display_sql(text))
                m.row = svc.checked_extents(m.prep.plan, engine, m.row, m.values, style,
                                            m.statements)  # (inf or NaN: guarded, alone)
                _, args = bind_sql(m.prep.extents_sql, m.values, style)
                svc._plans.remember_extents(entry, m.prep.extents_sql, args, m.row)
            return
        for m in need:
            m.row = svc.extents_row(m.prep, entry, engine, m.values, style, m.statements)


def _result(plan: Any, entry: Any, table: pa.Table, meta: dict, timing: dict) -> Any:
    from app.service import ChartResult  # (app.service imports this module's users)

    return ChartResult(plan, entry, table, meta, timing)
