"""The planner's entry points: ``prepare`` (step 1) and ``finish`` (step 2).

The planner is a pipeline (no module imports a later stage)::

    planner.bind    request + schema + dialect -> frozen bound Plan (planner.where, .values)
    compile.prepare   = bind + the extents statement (planner.emit_extents), a new Plan
    planner.layout  bound Plan + extents row -> a new, laid-out Plan (keys' bin layouts)
    compile.finish    = layout + the main statement (planner.emit_main), a new Plan
    app.service     shape: the engine's answer -> the response

1. ``prepare`` (step 1) binds the request and, when a bin layout depends on the data
   (``bins`` or ``rule`` without ``limits``), builds ONE extents statement that gathers every
   statistic all such bins need (min, max, count, the population standard deviation for
   Scott's rule, the quartiles for Freedman–Diaconis).
2. ``finish(plan, extents_row)`` (step 2) fixes the bin layouts and builds the main
   statement: one grouped SELECT (a chain of CTEs) that also carries, through window
   functions, the number of matched rows, the rows outside explicit limits and the number of
   groups before LIMIT, so a chart costs at most two statements. ``layout_key`` is what the
   main statement takes from the extents row (the plan cache's key); ``count_sql`` the
   statement run when the main one returns no rows.

The emit stage (``Plan`` -> sqlglot statements) lives in small modules, each importing
only earlier ones::

    planner.emit_sql       quoted column / table references
    planner.emit_keys      key expressions (bin index, exactness proofs, time trunc /
                           integer bins), outside-limit flags, key output columns
    planner.emit_measures  measure inputs, aggregates, window-built quantiles / deviations
    planner.emit_extents   the extents statement
    planner.emit_top       top-N: ranking CTE or fold of the grouped rows
    planner.emit_dense     empty_bins: the bin series, grid, cells, dense CTEs
    planner.emit_main      the main statement: base -> grouped -> counted -> kept ->
                           [dense] -> final, COUNT(DISTINCT) pairs, stack columns, sort
    planner.emit_sets      several charts of a batch under one filter: one GROUPING SETS
                           statement (``sets_statement``) and one extents statement

In: ``Plan`` (+ extents row); out: ``exp.Select`` trees on a NEW plan (``dataclasses.replace``;
the plan passed in is never changed, so a bound plan can be shared), rendered by
``Plan.extents_sql`` / ``Plan.main_sql``. Pure (no I/O). The names app/ and tests/ import
from here (``prepare``, ``finish``, ``count_sql``, ``layout_key``, ``bind_sql``,
``bind_values``, ``display_sql``, ``param_shape``, ``bins_meta``, ``Plan``, and the batch's
``combinable`` / ``sets_statement`` / ``sets_extents``) stay importable
from here. Internal column and CTE names: ``planner.names``.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from sqlglot import exp

from planner import m4, names
from planner.bind import bind
from planner.dialects.base import Dialect
from planner.emit_checked import checkable
from planner.emit_extents import (_extents_statement, carried_extents,  # noqa: F401 (app/)
                                   extents_checks, finite_proved)
from planner.emit_keys import _outside_expr, _unguarded_index
from planner.emit_main import _main_statement, carriable
from planner.emit_sets import combinable, sets_extents, sets_statement  # noqa: F401 (app/)
from planner.layout import lay_out, lay_out_key
from planner.model import ChartRequest
from planner.plan import Plan
from planner.schema import SourceSchema
from planner.source import relation

# re-exported: the names app/ and tests/ import from planner.compile
from planner.layout import bins_meta  # noqa: F401
from planner.where import bind_sql, bind_values, display_sql, param_shape, param_style  # noqa: F401


def count_sql(plan: Plan) -> str:
    """Matched rows and outside-limit counts without grouping (used when the main
    statement returns no rows, so its window totals are absent)."""
    d = plan.dialect
    sel = [exp.alias_(exp.Count(this=exp.Star()), names.matched(), quoted=True)]
    for k in plan.keys:
        flag = _outside_expr(d, k)
        if flag is not None:
            sel.append(exp.alias_(exp.Sum(this=flag), k.outside_flag, quoted=True))
    q = exp.select(*sel).from_(relation(plan.schema, d))
    if plan.where is not None:
        q = q.where(plan.where, copy=False)
    return d.render(q)


def finish(plan: Plan, extents_row: dict[str, Any] | None = None, carry: bool = False) -> Plan:
    """Step 2: a new plan with the bins laid out from the extents row and the main
    statement (``plan`` itself is left as it was). ``carry``: the main statement also
    carries the extents row of its own rows (``carriable`` plans only), so a layout taken
    from an earlier row can be checked against it."""
    row = extents_row or {}
    if plan.request.reduce is not None:  # M4 line reduction: planner/m4.py
        return dataclasses.replace(plan, reduced_row=row, main=m4.main_statement(plan, row))
    laid = _proved(lay_out(plan, row), row)
    if carry:
        assert carriable(laid), "finish(carry=True) of a plan that cannot carry its extents"
        laid = dataclasses.replace(laid, carry_extents=True)
    return dataclasses.replace(laid, main=_main_statement(laid))


def _proved(plan: Plan, row: dict[str, Any]) -> Plan:
    """``plan`` with each double bin the extents row proves finite marked so."""
    keys = tuple(dataclasses.replace(k, finite=True)
                 if k.mode == "nbin" and finite_proved(plan.dialect, k, row) else k
                 for k in plan.keys)
    return dataclasses.replace(plan, keys=keys)


def guarded(plan: Plan) -> Plan:
    """A finished plan whose main statement writes every numeric bin index with its
    floating-point guard: run when the checked plain floor's flag (``names.misbinned``)
    says some group's values do not all lie in its bin (``planner.emit_keys.checkable``)."""
    return dataclasses.replace(plan, main=_main_statement(plan, guard=True))


def guarded_extents_sql(plan: Plan) -> str:
    """The extents statement with every double value tested for finiteness: run when a min
    or max of the plain one (``extents_checks``) comes back non-finite."""
    q = _extents_statement(plan, guarded=True)
    assert q is not None
    return plan.dialect.render(q)


def extents_finite(plan: Plan, row: dict[str, Any] | None) -> bool:
    """Whether an extents row of the plain statement is exact: every checked min / max is
    NULL or a finite number (``planner.emit_extents.extents_checks``)."""
    for c in extents_checks(plan) if row else ():
        v = row.get(c)
        if v is not None and not math.isfinite(float(v)):
            return False
    return True


def checked_bins(plan: Plan) -> tuple[tuple[str, float], ...]:
    """(column, width) of each numeric key of a finished plan whose bin index is the checked
    plain floor (``planner.emit_checked.checkable``): data whose values sit on a width's edges
    (prices in cents, widths of 0.1) fail the check for every layout of that width, so the
    service remembers these and asks ``guarded`` at once."""
    return tuple((k.col.name, k.nbins.width) for k in plan.keys
                 if checkable(plan.dialect, k) and k.nbins is not None)


def layout_key(plan: Plan, extents_row: dict[str, Any] | None = None,
               memo: dict | None = None) -> tuple:
    """What ``finish(extents_row)`` takes from the row: equal keys (same request shape)
    give the same main statement, so a brush whose new extents keep the bin layout
    reuses it. Numeric bins: the layout and how its index is written over the row's
    range (``planner.emit_keys._unguarded_index``); time bins: step, first bin, count, closed
    stop. M4 reductions read the whole row. Raises what ``finish`` raises (bad layouts).
    ``memo``: a dict the caller owns (e.g. the plan cache, per shared plan), keys by row, so a
    repeated row costs no layout work."""
    row = extents_row or {}
    raw = tuple(sorted(row.items(), key=lambda kv: kv[0]))
    if plan.request.reduce is not None:
        return ("row",) + raw
    hit = memo.get(raw) if memo is not None else None  # (a repeated row: no layout work)
    if hit is not None:
        return hit
    out: list[Any] = []
    for k in plan.keys:
        if k.mode == "nbin":
            k = lay_out_key(k, row)  # a laid-out copy: the plan itself stays unlaid
            b = k.nbins
            out.append((b.start, b.width, b.count, b.method, _unguarded_index(plan.dialect, k),
                        finite_proved(plan.dialect, k, row)))
        elif k.mode == "tbin":
            k = lay_out_key(k, row)
            out.append((k.tstep.iso, k.tstart, k.tcount, k.tclosed))
    key = tuple(out)
    if memo is not None:
        if len(memo) >= 256:
            memo.clear()
        memo[raw] = key
    return key


def prepare(request: ChartRequest, schema: SourceSchema, dialect: Dialect,
            params: bool = False) -> Plan:
    """Step 1: the checked plan (``planner.bind.bind``) with its extents statement, when a
    bin layout (or an M4 reduction) depends on the data. ``params``: see ``bind``."""
    plan = bind(request, schema, dialect, params)
    if request.reduce is not None:  # M4 line reduction: planner/m4.py
        return dataclasses.replace(plan, extents=m4.extents_statement(plan))
    return dataclasses.replace(plan, extents=_extents_statement(plan))
