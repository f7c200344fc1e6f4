"""Emit: the dense stage (``empty_bins`` zero / null): every bin x every combination of the
other keys, merged with the data's groups (CTEs ``bins<i>``, ``others``, ``grid``,
``cells``, ``dense``; ``planner.names``). Pure.
"""

from __future__ import annotations

from sqlglot import exp

from planner import names
from planner.dialects.base import Dialect
from planner.emit_extents import carried_extents
from planner.emit_sql import _ref, _table
from planner.errors import PlanError, pointer
from planner.plan import Key, Plan
from planner.window import is_numeric

MAX_DENSE_CELLS = 200_000


def _bin_series(d: Dialect, k: Key) -> exp.Select:
    """Every bin of a binned key as its internal key value, from the dialect's integer series
    (``Dialect.int_series``): bin number i (numbers), start + i * step seconds (fixed time
    steps) or the first start + i calendar units (naive wall-clock times)."""
    i_name = names.series_index()
    i = _ref(i_name)
    if k.mode == "nbin":
        assert k.nbins is not None and k.nbins.count is not None
        count = k.nbins.count
        value = d.double(i)
    else:
        assert k.tstep is not None and k.tcount is not None
        count = k.tcount
        if k.tstep.is_fixed:
            value = exp.Add(this=d.real(k.tstart), expression=exp.Mul(
                this=d.double(i), expression=d.real(k.tstep.seconds)))
        else:
            value = d.add_units(d.local_literal(k.tstart), i, k.tstep.unit)
    series = exp.alias_(exp.Subquery(this=d.int_series(count, i_name)), names.series(),
                        table=True, quoted=True)
    return exp.select(exp.alias_(value, k.internal, quoted=True)).from_(series)


def _dense(plan: Plan, ctes: list, current: str, flags: list[Key]) -> str:
    d = plan.dialect
    binned = [k for k in plan.keys if k.binned]
    others = [k for k in plan.keys if not k.binned]
    cells = 1
    for k in binned:
        cells *= (k.nbins.count if k.mode == "nbin" else k.tcount) or 1
    if cells > MAX_DENSE_CELLS:
        raise PlanError(pointer("empty_bins"), f"empty_bins would emit {cells} bins "
                        f"(more than {MAX_DENSE_CELLS}); use fewer bins or tighter limits")
    sources: list[exp.Expression] = []
    for k in binned:  # every bin of the layout, generated in SQL (linear, bounded planning)
        name = names.bin_series(k.index)
        ctes.append((name, _bin_series(d, k)))
        sources.append(_table(name))
    if others:
        name = names.cte("others")
        ctes.append((name, exp.select(*[_ref(k.internal) for k in others]).distinct()
                     .from_(_table(current))))
        sources.append(_table(name))
    order = binned + others
    q = exp.select(*[_ref(k.internal) for k in order]).from_(sources[0])
    for s in sources[1:]:
        q = q.join(s, join_type="cross", copy=False)
    gname = names.cte("grid")
    ctes.append((gname, q))
    # The grid's rows and the data's rows, grouped by the keys (NULLs group together, like a
    # null-safe join, but one hash aggregation instead of a join: MariaDB ran the join
    # quadratically). A NULL bin (a NULL value, or inf / NaN) thus appears only where the data
    # has one, never one per group -- the grid holds only the bins of the layout.
    has = names.has_data()
    n, matched = names.rows(), names.matched()
    outs = [names.outside_count(k.index) for k in flags]
    if any(k.checked for k in plan.keys):  # the checked floor's flag (planner.emit_checked)
        outs.append(names.misbinned())
    outs += carried_extents(plan)  # (planner.emit_main.carriable)
    keys = [k.internal for k in plan.keys]
    data = exp.select(*[_ref(c) for c in keys], *[_ref(m.internal) for m in plan.measures],
                      _ref(n), _ref(matched), *[_ref(o) for o in outs],
                      exp.alias_(exp.Literal.number(1), has, quoted=True)).from_(_table(current))
    empty = exp.select(*[_ref(c) for c in keys],
                       *[exp.alias_(exp.Null(), m.internal, quoted=True) for m in plan.measures],
                       exp.alias_(exp.Literal.number(0), n, quoted=True),
                       exp.alias_(exp.Null(), matched, quoted=True),
                       *[exp.alias_(exp.Null(), o, quoted=True) for o in outs],
                       exp.alias_(exp.Literal.number(0), has, quoted=True)).from_(_table(gname))
    uname = names.cte("cells")
    ctes.append((uname, exp.union(data, empty, distinct=False)))
    missing = exp.EQ(this=exp.Max(this=_ref(has)), expression=exp.Literal.number(0))
    dense = exp.select(*[_ref(c) for c in keys]).from_(_table(uname))
    for m in plan.measures:  # one data row per cell at most: MAX returns its value unchanged
        # zero for number measures; an empty bin has no earliest date or largest text
        fill = (exp.Literal.number(0) if plan.request.empty_bins == "zero" and is_numeric(m)
                else exp.Null())
        dense = dense.select(exp.alias_(exp.Case(ifs=[exp.If(this=missing.copy(), true=fill)],
                                                 default=exp.Max(this=_ref(m.internal))),
                                        m.internal, quoted=True), copy=False)
    dense = dense.select(exp.alias_(exp.Sum(this=_ref(n)), n, quoted=True),
                         exp.alias_(exp.Max(this=_ref(matched)), matched, quoted=True),
                         *[exp.alias_(exp.Max(this=_ref(o)), o, quoted=True) for o in outs], copy=False)
    dense = dense.group_by(*[_ref(c) for c in keys], copy=False)
    name = names.cte("dense")
    ctes.append((name, dense))
    return name
