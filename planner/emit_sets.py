"""Emit: ONE statement for several charts of a batch that read the same rows.

Charts whose composed filters are equal read the same rows; grouping them one statement
each scans those rows once per chart. Here they are grouped once, with GROUPING SETS
(Gray, Bosworth, Layman & Pirahesh, "Data Cube: A Relational Aggregation Operator
Generalizing Group-By, Cross-Tab, and Sub-Totals", ICDE 1996 / Data Mining and Knowledge
Discovery 1(1), 1997)::

    base      every chart's key expressions, outside-limit flags and measure inputs
              (equal expressions once) over the filtered rows
    sets<j>   GROUP BY GROUPING SETS ((chart 0's keys and flags), (chart 1's ...), ...):
              the charts' aggregates, COUNT(*), and the set id = sum of GROUPING(c_j) * 2^j
              -- GROUPING() tells a rolled-up column from a NULL key (one grouping per
              aggregate list where the engine shares the base rows itself; a plain GROUP
              BY where a grouping has one set)
    per chart i: c<i>_grouped (its set's rows, renamed to the chart's own internal names),
              then the chart's OWN counted -> kept -> [windowed] -> final stages
              (planner.emit_main, planner.emit_window), its
              sort as ROW_NUMBER() and its LIMIT / facet cap as filters on it
    spine     one row per chart; each chart's rows LEFT JOINed to its spine row, so every
              column keeps the type it has when the chart is asked alone

Numeric bins keep the exact (proven plain or guarded) index: never the checked plain
floor of planner/emit_checked.py, whose miss would need a second run of the whole
statement. The answer of chart i is the rows whose ``chart()`` is i, ordered by its order column,
with its columns renamed back (``Shared.columns``): the table its own main statement gives.
Only shapes whose stages after grouping are counted / kept / final qualify (``combinable``);
the others (top-N, empty_bins, built quantiles / deviations, count_distinct, M4) run as
their own statements. ``sets_extents`` merges the extents statements of charts under one
filter into one SELECT the same way. In: laid-out Plans; out: sqlglot trees. Pure.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from sqlglot import exp

from planner import names
from planner.emit_checked import bin_value
from planner.emit_extents import carried_keys
from planner.emit_keys import _instant_in_range, _key_expr, _outside_expr
from planner.emit_main import _counted, _final, _sort_terms, range_aggregates
from planner.emit_text import answer_columns
from planner.emit_window import _windowed
from planner.emit_measures import _measure_agg, _measure_input
from planner.emit_sql import _ref, _table
from planner.plan import Plan
from planner.source import relation

#: aggregates whose grouped value is one function of the group's rows (no windows, no pairs)
AGGREGATES = frozenset({"count", "sum", "avg", "min", "max", "share"})

#: at most this many distinct grouping columns in one statement (the set id's bits)
MAX_SET_COLUMNS = 30


def combinable(plan: Plan) -> bool:
    """Whether the chart may share a grouping-sets statement: the dialect has GROUPING SETS
    and computes a shared CTE once (``caps.grouping_sets``, ``caps.shared_cte``), and the
    chart's main statement is base -> grouped -> counted -> [kept] -> final."""
    d, req = plan.dialect, plan.request
    return (d.caps.grouping_sets and d.caps.shared_cte is not None and req.reduce is None
            and req.empty_bins == "omit" and bool(plan.keys)
            and all(k.spec.top is None for k in plan.keys)
            and all(m.spec.agg in AGGREGATES and m.aggregate.built is None
                    for m in plan.measures))


@dataclass(frozen=True)
class Shared:
    """A statement answering several charts: per chart, (column in the statement, column of
    its own main statement) pairs and the name of its order column."""

    statement: exp.Select
    columns: tuple[tuple[tuple[str, str], ...], ...]
    orders: tuple[str, ...]


class _Columns:
    """Expressions of the shared rows, each written once (equal rendered SQL, one name)."""

    def __init__(self, plan: Plan, count: list[int]) -> None:
        self.d = plan.dialect
        self.named: dict[str, tuple[str, exp.Expression]] = {}
        self.count = count  # shared by the row and the aggregate columns: distinct names

    def add(self, e: exp.Expression) -> str:
        key = self.d.render(e)
        hit = self.named.get(key)
        if hit is None:
            hit = self.named[key] = (names.sets_column(self.count[0]), e)
            self.count[0] += 1
        return hit[0]


def _rename(q: exp.Expression, mapping: dict[str, str]) -> exp.Expression:
    """``q`` reading the CTEs of ``mapping``'s keys under their new names."""
    def swap(n: exp.Expression) -> exp.Expression:
        if isinstance(n, exp.Table) and n.name in mapping and not n.args.get("db"):
            return _table(mapping[n.name])
        return n
    return q.transform(swap)


def _own(chart: tuple) -> tuple[str, ...]:
    """A chart's grouping columns: its keys' and outside flags' (one grouping set)."""
    keys, flags = chart[0], chart[1]
    return tuple(dict.fromkeys(keys + [f for _, f in flags]))


def _aggregates(chart: tuple) -> list[str]:
    """A chart's aggregate columns: its measures' and its carried extents' (in order)."""
    return chart[2] + [c for c, _ in chart[3]]


def _group_cols(charts: list[tuple]) -> list[str]:
    return list(dict.fromkeys(c for chart in charts for c in _own(chart)))


def sets_statement(plans: Sequence[Plan]) -> Shared | None:
    """One statement for ``plans`` (each ``combinable``, equal ``where`` and dialect, laid
    out), or None when their grouping columns exceed ``MAX_SET_COLUMNS``."""
    first = plans[0]
    d = first.dialect
    count = [0]
    rows = _Columns(first, count)  # base: per-row expressions
    aggs = _Columns(first, count)  # sets: aggregates over base columns
    # per chart: (keys' columns, flags' columns, measures' columns, [(aggregate column,
    # value_range name)] of the keys whose extents it carries: Plan.carry_extents)
    charts = []
    for plan in plans:
        keys = [rows.add(_key_expr(d, k)) for k in plan.keys]
        flags = []
        for k in plan.keys:
            flag = _outside_expr(d, k)
            if flag is not None:
                flags.append((k, rows.add(flag)))
        measures = []
        for m in plan.measures:
            arg = None
            if m.has_input:
                e = _measure_input(d, m)
                if m.col is not None and m.col.is_temporal and m.aggregate.output == "input":
                    e = _instant_in_range(d, m.col, e)  # the same instants a time key shows
                arg = _ref(rows.add(e))
            name = arg.name if arg is not None else names.rows()
            measures.append(aggs.add(_measure_agg(d, m.spec.agg, arg, m.spec.q, name)))
        ranged = []
        for k in carried_keys(plan):  # each group's smallest / largest value (emit_main)
            ranged += [(aggs.add(e), own) for e, own in
                       range_aggregates(k, _ref(rows.add(bin_value(d, k))))]
        charts.append((keys, flags, measures, ranged))
    # charts grouped apart by the aggregates they need: GROUPING SETS computes every
    # aggregate in every set, so on an engine that shares the rows between several groupings
    # by itself ("engine") each aggregate list gets its own grouping (DuckDB, 2M rows: 80
    # against 113 ms); where the rows would be materialised for that, one grouping
    by_aggs: dict[tuple, list[int]] = {}
    for i, chart in enumerate(charts):
        sig = tuple(sorted(set(_aggregates(chart)))) if d.caps.shared_cte == "engine" else ()
        by_aggs.setdefault(sig, []).append(i)
    if max(len(_group_cols([charts[i] for i in g])) for g in by_aggs.values()) > MAX_SET_COLUMNS:
        return None

    ctes: list[tuple[str, exp.Expression, bool]] = []
    base = exp.select(*[exp.alias_(e, n, quoted=True) for n, e in rows.named.values()])
    base = base.from_(relation(first.schema, d))
    if first.where is not None:
        base = base.where(first.where.copy())
    ctes.append((names.cte("base"), base, False))

    where_of: dict[int, tuple[str, exp.Expression | None]] = {}  # chart -> its grouping, set test
    agg_named = {n: e for n, e in aggs.named.values()}
    for j, members in enumerate(by_aggs.values()):
        group_cols = _group_cols([charts[i] for i in members])
        bit = {c: 1 << b for b, c in enumerate(group_cols)}
        sets = list(dict.fromkeys(_own(charts[i]) for i in members))
        grouped = exp.select(*[_ref(c) for c in group_cols])
        if len(sets) > 1:
            set_id: exp.Expression = exp.Literal.number(0)
            for c in group_cols:
                set_id = exp.Add(this=set_id, expression=exp.Mul(
                    this=exp.Grouping(expressions=[_ref(c)]),
                    expression=exp.Literal.number(bit[c])))
            grouped = grouped.select(exp.alias_(set_id, names.set_id(), quoted=True))
        used = list(dict.fromkeys(n for i in members for n in _aggregates(charts[i])))
        grouped = grouped.select(*[exp.alias_(agg_named[n], n, quoted=True) for n in used])
        grouped = grouped.select(exp.alias_(exp.Count(this=exp.Star()), names.rows(),
                                            quoted=True))
        grouped = grouped.from_(_table(names.cte("base")))
        if len(sets) > 1:
            grouped.set("group", exp.Group(grouping_sets=[exp.GroupingSets(expressions=[
                exp.Tuple(expressions=[_ref(c) for c in st]) for st in sets])]))
        else:
            grouped = grouped.group_by(*[_ref(c) for c in group_cols])
        name = names.sets(j)
        ctes.append((name, grouped, d.caps.shared_cte == "materialized"))
        for i in members:
            test = None
            if len(sets) > 1:
                value = sum(b for c, b in bit.items() if c not in _own(charts[i]))
                test = exp.EQ(this=_ref(names.set_id()), expression=exp.Literal.number(value))
            where_of[i] = (name, test)

    spine: exp.Expression | None = None
    columns, orders, joins = [], [], []
    for i, (plan, (keys, flags, measures, ranged)) in enumerate(zip(plans, charts)):
        sl = exp.select(*[exp.alias_(_ref(c), k.internal, quoted=True)
                          for c, k in zip(keys, plan.keys)])
        sl = sl.select(*[exp.alias_(_ref(c), k.outside_flag, quoted=True) for k, c in flags])
        sl = sl.select(*[exp.alias_(_ref(c), m.internal, quoted=True)
                         for c, m in zip(measures, plan.measures)])
        sl = sl.select(*[exp.alias_(_ref(c), own, quoted=True) for c, own in ranged])
        source, test = where_of[i]
        sl = sl.select(_ref(names.rows())).from_(_table(source))
        if test is not None:
            sl = sl.where(test)
        mapping = {names.cte(s): names.chart_cte(i, s) for s in ("grouped", "counted", "kept",
                                                                  "windowed", "final")}
        own_ctes: list = [(names.cte("grouped"), sl)]
        cap = plan.request.facet.max_groups if plan.request.facet is not None else None
        current = _counted(plan, own_ctes, names.cte("grouped"), [k for k, _ in flags])
        current = _windowed(plan, own_ctes, current)  # then: measures over its groups
        _final(plan, own_ctes, current, [k for k, _ in flags], cap)
        for name, q in own_ctes:
            ctes.append((mapping[name], _rename(q, mapping), False))
        final_names = answer_columns(plan, own_ctes[-1][1])
        order = names.chart_column(i, "ord")
        tag = names.chart_column(i, "tag")
        out = exp.select(exp.alias_(exp.Literal.number(i), tag, quoted=True), *[
            exp.alias_(_ref(n), names.chart_column(i, j), quoted=True)
            for j, n in enumerate(final_names)])
        rank = exp.Window(this=exp.RowNumber(), order=exp.Order(
            expressions=_sort_terms(plan, internal=False)))
        out = out.select(exp.alias_(rank, order, quoted=True)).from_(
            _table(names.chart_cte(i, "final")))
        if cap is not None:
            out = out.where(exp.LTE(this=_ref(names.facet_rank()), expression=d.number(cap)))
        ctes.append((names.chart_cte(i, "out"), out, False))
        cut = exp.select(exp.Star()).from_(_table(names.chart_cte(i, "out"))).where(
            exp.LTE(this=_ref(order), expression=d.number(plan.request.limit)))
        ctes.append((names.chart_cte(i, "cut"), cut, False))
        columns.append(tuple((names.chart_column(i, j), n) for j, n in enumerate(final_names)))
        orders.append(order)
        joins.append((names.chart_cte(i, "cut"), tag))
        one = exp.select(exp.alias_(exp.Literal.number(i), names.chart(), quoted=True))
        spine = one if spine is None else exp.union(spine, one, distinct=False)
    ctes.append((names.cte("spine"), spine, False))

    sp = names.cte("spine")
    outer = exp.select(exp.column(names.chart(), sp, quoted=True)).from_(_table(sp))
    for (cut, tag), cols, order in zip(joins, columns, orders):
        outer = outer.select(*[exp.column(c, cut, quoted=True) for c, _ in cols],
                             exp.column(order, cut, quoted=True))
        outer = outer.join(_table(cut), join_type="left", on=exp.EQ(
            this=exp.column(tag, cut, quoted=True),
            expression=exp.column(names.chart(), sp, quoted=True)))
    for name, q, materialized in ctes:
        outer = outer.with_(exp.to_identifier(name, quoted=True), as_=q, copy=False,
                            materialized=True if materialized else None)
    return Shared(outer, tuple(columns), tuple(orders))


def sets_extents(plans: Sequence[Plan]) -> tuple[exp.Select, tuple[tuple[tuple[str, str], ...],
                                                                   ...]] | None:
    """The extents statements of ``plans`` (prepared, equal ``where``) as ONE SELECT when
    each is a plain aggregate SELECT over the source rows; per plan, (column of the merged
    statement, its own extents name) pairs. None when one of them has another shape."""
    first = plans[0]
    d = first.dialect
    sel: list[exp.Expression] = []
    columns = []
    for i, plan in enumerate(plans):
        q = plan.extents
        if q is None or not isinstance(q.args["from_"].this, exp.Table) or q.args.get("with_"):
            return None
        own = []
        for e in q.expressions:
            name = names.chart_column(i, e.alias)
            sel.append(exp.alias_(e.this.copy(), name, quoted=True))
            own.append((name, e.alias))
        columns.append(tuple(own))
    out = exp.select(*sel).from_(relation(first.schema, d))
    if first.extents_where is not None:
        out = out.where(first.extents_where.copy())
    return out, tuple(columns)
