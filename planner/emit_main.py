"""Emit: the main statement (step 2), one stage function per CTE::

    _base     key expressions (bin index, truncated time, top-N fold), outside-limit flags,
              measure inputs, over the filtered source rows
    _grouped  [ranked: built aggregates' windows] GROUP BY the keys and flags; aggregates
              and COUNT(*) ([pairs]: the COUNT(DISTINCT) rewrite, ``_distinct_pairs``);
              [relabelled, folded: the top-N fold, planner.emit_top]
    _counted  + matched rows and outside-limit rows (window sums over all groups);
              kept: groups inside the limits
    [dense]   every bin x every combination of the other keys (planner.emit_dense)
    [windowed] measures over the grouped table (``then``: planner.emit_window)
    _final    output columns (bin start/end), stack windows, group count, facet rank
    SELECT * FROM final [WHERE rank <= cap] ORDER BY ... LIMIT n

CTE names come from ``planner.names.cte``. In: a laid-out ``Plan``; out: ``exp.Select``. Pure.
"""

from __future__ import annotations

import dataclasses
import functools

from sqlglot import exp

from planner import aggregates, names
from planner.dialects.base import Dialect
from planner.emit_dense import _dense
from planner.emit_checked import bin_value, checkable, misbinned_expr
from planner.emit_extents import carried_extents, carried_keys, needs_extents, plain_min_max
from planner.emit_keys import _instant_in_range, _key_expr, _key_outputs, _outside_expr
from planner.emit_measures import _built, _measure_agg, _measure_input, _window_columns, part_input
from planner.emit_sql import _ref, _table
from planner.emit_text import answer_columns, cut_text, order_ref
from planner.emit_top import _fold_after_grouping, _fold_top, _top_cte, _top_key_expr
from planner.emit_window import _windowed
from planner.plan import Key, Measure, Plan
from planner.source import relation


def _main_statement(plan: Plan, guard: bool = False) -> exp.Select:
    """The main statement: the stages' CTEs, then the outer SELECT (facet cap, ORDER BY,
    LIMIT). Each stage appends its CTEs to ``ctes`` and returns the name of the last one.
    Numeric bins over an unknown range get the checked plain floor (``checkable``) unless
    ``guard`` (the statement the service runs when the check failed) or a top-N fold
    re-groups the rows."""
    d, req = plan.dialect, plan.request
    ctes: list[tuple[str, exp.Expression]] = []
    fold = _fold_after_grouping(plan)
    if not guard and not fold and any(checkable(d, k) for k in plan.keys):
        plan = dataclasses.replace(plan, keys=tuple(
            dataclasses.replace(k, checked=True) if checkable(d, k) else k for k in plan.keys))
    flags = _base(plan, ctes, fold)
    group_cols = [k.internal for k in plan.keys] + [k.outside_flag for k in flags]
    current = _grouped(plan, ctes, group_cols, fold)
    current = _counted(plan, ctes, current, flags)
    if req.empty_bins != "omit":  # dense (empty_bins)
        current = _dense(plan, ctes, current, flags)
    current = _windowed(plan, ctes, current)  # then: measures over the grouped table
    cap = req.facet.max_groups if req.facet is not None else None
    _final(plan, ctes, current, flags, cap)

    final = ctes[-1][1]
    outer = exp.select(*(_ref(n) for n in answer_columns(plan, final)) if plan.text_outputs
                       else [exp.Star()]).from_(_table(names.cte("final")))
    if cap is not None:
        outer = outer.where(exp.LTE(this=_ref(names.facet_rank()), expression=d.number(cap)), copy=False)
    terms = _sort_terms(plan, internal=False)
    if terms:
        outer = outer.order_by(*terms, copy=False)
    outer = outer.limit(d.number(req.limit), copy=False)
    kept = names.cte("grouped") if _materialize_grouped(plan) else None
    for name, q in ctes:
        outer = outer.with_(exp.to_identifier(name, quoted=True), as_=q, copy=False,
                            materialized=True if name == kept else None)
    return outer


def _materialize_grouped(plan: Plan) -> bool:
    """Whether the grouped CTE is written ``AS MATERIALIZED``: it computes an order
    statistic with the engine's own function on a dialect that says so
    (``caps.materialize_order_statistics``)."""
    d = plan.dialect
    if not d.caps.materialize_order_statistics:
        return False
    aggs = [m.spec.agg for m in plan.measures if not m.composite]
    aggs += [p.agg for m in plan.measures for p in m.parts]
    return any(aggregates.get(a).order_statistic and _built(d, a) is None for a in aggs)


def carriable(plan: Plan) -> bool:
    """Whether the main statement can carry its own extents row (``Plan.carry_extents``):
    every key with data-driven extents has only a plain MIN and MAX
    (``planner.emit_extents.plain_min_max``) over the very rows the main statement groups
    (no brushes kept out of the layout, no top-N fold re-grouping them). The service then
    lays out a changed filter from an earlier row, runs ONE statement, and keeps its answer
    only when the carried row gives the same layout (``planner.compile.layout_key``)."""
    r = plan.request
    if r.reduce is not None or r.split_layout or _fold_after_grouping(plan):
        return False
    keys = [k for k in plan.keys if needs_extents(k)]
    return bool(keys) and all(plain_min_max(plan.dialect, k) for k in keys)


def _ranged(plan: Plan) -> list[Key]:
    """The keys whose per-group smallest and largest value the grouped stage computes
    (``names.value_range``): checked bins and carried extents."""
    carried = {k.index for k in carried_keys(plan)}
    return [k for k in plan.keys if k.checked or k.index in carried]


def range_aggregates(k: Key, v: exp.Expression) -> list[tuple[exp.Expression, str]]:
    """Key ``k``'s smallest and largest value ``v`` per group, with their names
    (``names.value_range``): the checked floor's test and the carried extents read them."""
    return [(agg(this=v.copy()), names.value_range(k.index, end))
            for end, agg in (("min", exp.Min), ("max", exp.Max))]


def _over_all(e: exp.Expression) -> exp.Window:
    """``e`` as a window over all groups (``e OVER ()``)."""
    return exp.Window(this=e)


def _base(plan: Plan, ctes: list, fold: bool) -> list[Key]:
    """The base stage (and, without the fold, each top key's ranking CTE): per filtered
    source row the keys' grouping values, the outside-limit flags and the measure inputs.
    Returns the keys with an outside-limit flag."""
    d, keys, measures = plan.dialect, plan.keys, plan.measures
    src = relation(plan.schema, d)
    base = exp.select().from_(src)
    for k in keys:
        if k.spec.top is not None and not fold:
            rank_name = names.top_rank(k.index)
            ctes.append((rank_name, _top_cte(plan, k)))
            key_value = _top_key_expr(d, k, rank_name)
        else:
            key_value = _key_expr(d, k)
        base = base.select(exp.alias_(key_value, k.internal, quoted=True), copy=False)
    for k in _ranged(plan):  # the value itself: the per-group check (emit_checked), extents
        base = base.select(exp.alias_(bin_value(d, k), names.value(k.index), quoted=True), copy=False)
    flags = []
    for k in keys:
        flag = _outside_expr(d, k)
        if flag is not None:
            flags.append(k)
            base = base.select(exp.alias_(flag, k.outside_flag, quoted=True), copy=False)
    for m in measures:
        for j, part in enumerate(m.parts):  # a composite named measure's inputs
            if part.input is not None:
                base = base.select(exp.alias_(part_input(d, part), names.measure_part(m.index, j),
                                              quoted=True))
        arg = _measure_input(d, m) if m.has_input else exp.Null()
        if m.col is not None and m.col.is_temporal and m.aggregate.output == "input":
            arg = _instant_in_range(d, m.col, arg)  # the same instants a time key shows
        base = base.select(exp.alias_(arg, names.measure_input(m.index), quoted=True), copy=False)
    if not keys and not measures:  # pragma: no cover - the model requires a channel
        base = base.select(exp.Literal.number(1), copy=False)
    if plan.where is not None:
        base = base.where(plan.where.copy(), copy=False)
    ctes.append((names.cte("base"), base))
    return flags


def _grouped(plan: Plan, ctes: list, group_cols: list[str], fold: bool) -> str:
    """[ranked] (window columns for aggregates the target has no function for), grouped
    (GROUP BY the keys and flags: aggregates and COUNT(*); [pairs]: ``_distinct_pairs``)
    and, with the top-N fold, relabelled / folded (planner.emit_top ``_fold_top``)."""
    d, measures = plan.dialect, plan.measures
    rows_name = names.cte("base")
    inputs = {names.measure_input(m.index): (_ref(names.measure_input(m.index)), m.spec.agg)
              for m in measures if m.has_input}
    inputs.update({names.measure_part(m.index, j): (_ref(names.measure_part(m.index, j)), p.agg)
                   for m in measures for j, p in enumerate(m.parts) if p.input is not None})
    windows = _window_columns(d, [_ref(c) for c in group_cols], inputs)
    if windows:
        ctes.append((names.cte("ranked"),
                     exp.select(exp.Star(), *windows).from_(_table(rows_name))))
        rows_name = names.cte("ranked")
    grouped = exp.select(*[_ref(c) for c in group_cols]).from_(_table(rows_name))
    for m in measures:
        if m.composite:  # the formula over its aggregates (planner/measure_sql.py)
            grouped = grouped.select(exp.alias_(_composite(d, m), m.internal, quoted=True))
            continue
        arg = _ref(names.measure_input(m.index)) if m.has_input else None
        if fold and m.aggregate.fold == "mean":  # partials the fold re-aggregates (_fold_top)
            grouped = grouped.select(
                exp.alias_(exp.Sum(this=d.double(arg)), names.measure_partial(m.index, "sum"),
                           quoted=True),
                exp.alias_(exp.Count(this=arg.copy()), names.measure_partial(m.index, "cnt"),
                           quoted=True), copy=False)
            continue
        agg = _measure_agg(d, m.spec.agg, arg, m.spec.q, names.measure_input(m.index))
        if (m.aggregate.built == "quantile" and m.col is not None and m.col.kind == "integer"
                and d.caps.quantile_interpolates_integers):
            # the engine interpolates integer input in DOUBLE itself: sorting the narrow
            # integers instead of their DOUBLE casts is ~1.5x faster (10M rows, DuckDB 2.0)
            agg = agg.transform(lambda n: n.this if isinstance(n, exp.Cast)
                                and n.this == arg else n)
        grouped = grouped.select(exp.alias_(agg, m.internal, quoted=True), copy=False)
    grouped = grouped.select(exp.alias_(exp.Count(this=exp.Star()), names.rows(), quoted=True), copy=False)
    for k in _ranged(plan):
        grouped = grouped.select(*[exp.alias_(e, n, quoted=True) for e, n in
                                   range_aggregates(k, _ref(names.value(k.index)))], copy=False)
    if group_cols:
        grouped = grouped.group_by(*[_ref(c) for c in group_cols], copy=False)
    pairs = _distinct_pairs(d, grouped, rows_name, group_cols)
    if pairs is not None:
        ctes.append((names.cte("pairs"), pairs[0]))
        grouped = pairs[1]
    ctes.append((names.cte("grouped"), grouped))
    if fold:
        return _fold_top(plan, ctes, group_cols)
    return names.cte("grouped")


def _composite(d: Dialect, m: Measure) -> exp.Expression:
    """A composite named measure per group: its formula, each placeholder j replaced by
    aggregate j over its input column ``measure_part(i, j)``."""
    aggs = []
    for j, p in enumerate(m.parts):
        name = names.measure_part(m.index, j)
        aggs.append(_measure_agg(d, p.agg, _ref(name) if p.input is not None else None, None,
                                 name))
    assert m.formula is not None
    return m.formula.copy().transform(
        lambda n: aggs[int(n.this)].copy() if isinstance(n, exp.Placeholder) else n)


def _counted(plan: Plan, ctes: list, current: str, flags: list[Key]) -> str:
    """counted (+ matched rows and outside-limit rows: window sums over all groups) and,
    with outside-limit flags, kept (the groups inside the limits)."""
    counted = exp.select(exp.Star()).from_(_table(current))
    counted = counted.select(exp.alias_(_over_all(exp.Sum(this=_ref(names.rows()))),
                                        names.matched(), quoted=True), copy=False)
    for k in flags:
        cnt = exp.Sum(this=exp.Case(ifs=[exp.If(
            this=exp.EQ(this=_ref(k.outside_flag), expression=exp.Literal.number(1)),
            true=_ref(names.rows()))], default=exp.Literal.number(0)))
        counted = counted.select(exp.alias_(_over_all(cnt), names.outside_count(k.index),
                                            quoted=True), copy=False)
    checked = [k for k in plan.keys if k.checked]
    if checked:  # over every group, before limits, caps and LIMIT drop any
        counted = counted.select(exp.alias_(misbinned_expr(plan.dialect, checked),
                                            names.misbinned(), quoted=True), copy=False)
    for k in carried_keys(plan):  # the extents row over every group (carriable)
        for end, agg in (("min", exp.Min), ("max", exp.Max)):
            counted = counted.select(exp.alias_(
                _over_all(agg(this=_ref(names.value_range(k.index, end)))),
                names.extents(k.index, end), quoted=True), copy=False)
    ctes.append((names.cte("counted"), counted))
    current = names.cte("counted")
    if flags:
        kept = exp.select(exp.Star()).from_(_table(current)).where(exp.and_(*[
            exp.EQ(this=_ref(k.outside_flag), expression=exp.Literal.number(0)) for k in flags]))
        ctes.append((names.cte("kept"), kept))
        current = names.cte("kept")
    return current


def _final(plan: Plan, ctes: list, current: str, flags: list[Key], cap: int | None) -> str:
    """final: the output columns (bin start / end), stack windows, row / matched / group
    counts, outside-limit counts and, with a facet cap, each group's rank in its facet."""
    d, keys = plan.dialect, plan.keys
    final = exp.select().from_(_table(current))
    outputs = [e for k in keys for e in _key_outputs(d, k)]
    outputs += [exp.alias_(_ref(m.value), m.name, quoted=True) for m in plan.measures]
    final = final.select(*cut_text(plan, outputs), copy=False)
    if plan.stack_measure is not None:
        final = final.select(*_stack_columns(plan), copy=False)
    final = final.select(
        exp.alias_(_ref(names.rows()), names.rows(), quoted=True),
        exp.alias_(_over_all(exp.Max(this=_ref(names.matched()))), names.matched(), quoted=True),
        exp.alias_(_over_all(exp.Count(this=exp.Star())), names.groups(), quoted=True), copy=False)
    for k in flags:
        final = final.select(exp.alias_(_over_all(exp.Max(this=_ref(names.outside_count(k.index)))),
                                        names.outside_count(k.index), quoted=True), copy=False)
    totals = [names.misbinned()] if any(k.checked for k in keys) else []
    totals += carried_extents(plan)
    for t in totals:  # (empty cells of the dense grid carry NULL)
        final = final.select(exp.alias_(_over_all(exp.Max(this=_ref(t))), t, quoted=True),
                             copy=False)
    if cap is not None:
        facet_keys = [k for k in keys if k.channel in ("row", "col")]
        rank = exp.Window(this=exp.RowNumber(),
                          partition_by=[_ref(k.internal) for k in facet_keys] or None,
                          order=exp.Order(expressions=_sort_terms(plan, internal=True)))
        final = final.select(exp.alias_(rank, names.facet_rank(), quoted=True), copy=False)
    ctes.append((names.cte("final"), final))
    return names.cte("final")


def _distinct_pairs(d: Dialect, grouped: exp.Select, rows_name: str, group_cols: list[str]
                    ) -> tuple[exp.Select, exp.Select] | None:
    """The grouped stage as two groupings when its aggregates are COUNT(DISTINCT m) of one
    input ``m`` and the row count COUNT(*): first the distinct (keys, m) pairs with their row
    counts, then per group COUNT(m) (the non-NULL distinct values) and SUM of the row counts.
    Same answers; on dialects that say so (``caps.distinct_pairs``). Returns (pairs, grouped)."""
    if not d.caps.distinct_pairs or not group_cols:
        return None
    arg = None
    for e in grouped.expressions:
        inner = e.this if isinstance(e, exp.Alias) else e
        if isinstance(inner, exp.Column):
            continue
        if not isinstance(inner, exp.Count):
            return None
        if isinstance(inner.this, exp.Star):
            continue
        if not (isinstance(inner.this, exp.Distinct) and len(inner.this.expressions) == 1
                and isinstance(inner.this.expressions[0], exp.Column)):
            return None
        col = inner.this.expressions[0]
        if arg is not None and col != arg:
            return None
        arg = col
    if arg is None:
        return None
    n = names.rows()
    keys = [_ref(c) for c in group_cols]
    pairs = (exp.select(*keys, arg.copy(), exp.alias_(exp.Count(this=exp.Star()), n, quoted=True))
             .from_(_table(rows_name)).group_by(*[k.copy() for k in keys], arg.copy()))
    out = exp.select(*[k.copy() for k in keys]).from_(_table(names.cte("pairs")))
    for e in grouped.expressions:
        inner = e.this if isinstance(e, exp.Alias) else e
        if isinstance(inner, exp.Column):
            continue
        if isinstance(inner.this, exp.Star):
            agg: exp.Expression = d.bigint(exp.Sum(this=_ref(n)))  # COUNT(*)'s type
        else:
            agg = exp.Count(this=arg.copy())
        out = out.select(exp.alias_(agg, e.alias, quoted=True), copy=False)
    return pairs, out.group_by(*[k.copy() for k in keys])


def _stack_columns(plan: Plan) -> list[exp.Expression]:
    d = plan.dialect
    m = plan.stack_measure
    assert m is not None
    pos = "x" if m.channel == "y" else "y"
    part_keys = [k for k in plan.keys if k.channel in (pos, "row", "col")]
    pile_keys = [k for k in plan.keys if k not in part_keys]
    partition = [_ref(k.internal) for k in part_keys] or None
    order: list[exp.Ordered] = []
    for k in pile_keys:
        order += d.order(_ref(k.internal), False, True)
    value = exp.Coalesce(this=d.double(_ref(m.value)), expressions=[exp.Literal.number(0)])
    running = exp.Window(
        this=exp.Sum(this=value.copy()), partition_by=partition,
        order=exp.Order(expressions=order) if order else None,
        spec=exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING",
                            end="CURRENT ROW"))
    end: exp.Expression = running
    start: exp.Expression = exp.Sub(this=running.copy(), expression=value.copy())
    if plan.request.stack in ("fraction", "centered"):
        total = exp.Window(this=exp.Sum(this=value.copy()),
                           partition_by=[p.copy() for p in partition] if partition else None)
        if plan.request.stack == "fraction":
            denom = exp.Nullif(this=total, expression=exp.Literal.number(0))
            end = exp.Div(this=end, expression=denom)
            start = exp.Div(this=exp.Paren(this=start), expression=denom.copy())
        else:
            half = exp.Div(this=total, expression=exp.Literal.number(2))
            end = exp.Sub(this=end, expression=half)
            start = exp.Sub(this=exp.Paren(this=start), expression=half.copy())
    base, top = [c.name for c in plan.columns if c.role in ("stack_base", "stack_top")]
    return [exp.alias_(start, base, quoted=True), exp.alias_(end, top, quoted=True)]


def _sort_terms(plan: Plan, internal: bool) -> list[exp.Ordered]:
    """ORDER BY terms: the request's sort first, then every key ascending (NULLs last)."""
    d = plan.dialect
    out = functools.partial(order_ref, plan)  # a text output orders by its whole value
    by_channel: dict[str, exp.Expression] = {}
    for k in plan.keys:
        by_channel.setdefault(k.channel, _ref(k.internal) if internal else out(k.names[0]))
    for m in plan.measures:
        by_channel.setdefault(m.channel, _ref(m.value) if internal else out(m.name))
    terms: list[exp.Ordered] = []
    used: set[str] = set()
    for s in plan.request.sort:
        terms += d.order(by_channel[s.channel].copy(), s.desc, False)
        used.add(s.channel)
    for k in plan.keys:
        ref = _ref(k.internal) if internal else out(k.names[0])
        if k.channel in used and k.channel != "by":
            continue
        terms += d.order(ref, False, False)
    return terms
