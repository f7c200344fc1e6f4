"""Emit: the windowed stage -- measures over the grouped table (``then``; rules in
planner/window.py). One CTE ``windowed`` after grouping, the top-N fold and the dense stage:
every row of the CTE before it plus, per ``then`` measure, ``names.measure_window(i)``:

* fraction:   v / NULLIF(SUM(v) OVER (PARTITION BY <within>), 0), in DOUBLE
* cumulative: SUM(v) OVER (PARTITION BY <other keys> ORDER BY <axis>, NULLs last,
              ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)
* change:     v - <previous v> (``Dialect.previous``: LAG, or the target's spelling)

cumulative and change are NULL where the axis value or v is NULL; the NULL axis group sorts
last, so it enters no other group's window. Pure.
"""

from __future__ import annotations

from sqlglot import exp

from planner import names
from planner.emit_sql import _ref, _table
from planner.plan import Measure, Plan
from planner.window import axis_key, facet_keys


def _windowed(plan: Plan, ctes: list, current: str) -> str:
    """Appends the windowed CTE when a measure has ``then``; returns the current CTE."""
    todo = [m for m in plan.measures if m.spec.then is not None]
    if not todo:
        return current
    q = exp.select(exp.Star()).from_(_table(current))
    for m in todo:
        q = q.select(exp.alias_(_window_value(plan, m), names.measure_window(m.index),
                                quoted=True))
    ctes.append((names.cte("windowed"), q))
    return names.cte("windowed")


def _window_value(plan: Plan, m: Measure) -> exp.Expression:
    d, keys = plan.dialect, plan.keys
    v = _ref(m.internal)
    axis = axis_key(keys, m)
    if m.spec.then == "fraction":
        within = m.spec.within or "all"
        part_keys = facet_keys(keys) if within != "all" else []
        if within == "axis" and axis is not None:
            part_keys = [axis] + part_keys
        total = exp.Window(this=exp.Sum(this=d.double(v.copy())),
                           partition_by=[_ref(k.internal) for k in part_keys] or None)
        return exp.Div(this=d.double(v), expression=exp.Nullif(
            this=total, expression=exp.Literal.number(0)), typed=False, safe=False)
    assert axis is not None  # planner.window.check
    partition = [_ref(k.internal) for k in keys if k is not axis] or None
    order = d.order_nulls_last_plain(_ref(axis.internal))
    if m.spec.then == "cumulative":
        value: exp.Expression = exp.Window(
            this=exp.Sum(this=v.copy()), partition_by=partition,
            order=exp.Order(expressions=order),
            spec=exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING",
                                end="CURRENT ROW"))
    else:
        value = exp.Sub(this=v.copy(), expression=d.previous(v.copy(), partition, order))
    gaps = exp.or_(exp.Is(this=_ref(axis.internal), expression=exp.Null()),
                   exp.Is(this=v.copy(), expression=exp.Null()))
    return exp.Case(ifs=[exp.If(this=gaps, true=exp.Null())], default=value)
