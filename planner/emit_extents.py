"""Emit: the extents statement (step 1 of a chart with data-dependent bin layouts).

ONE statement gathers every statistic the data-dependent bins need, named
``planner.names.extents(i, stat)``: min and max, the count for a rule, the population
standard deviation for Scott's rule, the quartiles for Freedman–Diaconis (built from window
columns where the target has no aggregate). ``planner.layout`` reads them back. Pure.
"""

from __future__ import annotations

import math

from sqlglot import exp

from planner import names
from planner.dialects.base import Dialect
from planner.emit_keys import _instant_in_range
from planner.emit_measures import _built, _columns_of, _measure_agg, _window_columns
from planner.plan import Key, Plan
from planner.source import relation


def _bin_input(d: Dialect, k: Key, guarded: bool = True) -> exp.Expression:
    """The value a numeric bin places: the column as DOUBLE, NULL when it is not finite
    (inf, -inf, NaN: such rows go to the NULL bin and never widen a layout from the data).
    ``guarded=False``: the plain value (``_unguarded``)."""
    v = d.double(d.number_cell(d.column(k.col.name, "s")))
    if not d.nonfinite(k.col.kind) or not guarded:  # integers (and most decimals): finite
        return v
    return exp.Case(ifs=[exp.If(this=d.finite(v), true=v.copy())])


def _unguarded(d: Dialect, k: Key) -> bool:
    """Whether the extents statement reads a double key's plain values: the dialect's MIN /
    MAX show any non-finite value (``caps.extremes_show_nonfinite``) and the statement
    carries the key's min and max (no limits), so finite extremes prove the guard changed
    nothing -- no inf or NaN among the rows, hence equal counts, deviations, quartiles."""
    return (d.caps.extremes_show_nonfinite and d.nonfinite(k.col.kind) and k.mode == "nbin"
            and k.nlimits is None)


def extents_checks(plan: Plan) -> tuple[str, ...]:
    """The extents row's columns that must be finite (or NULL) for the plain statement of
    ``_extents_statement`` to equal the guarded one; empty when it is guarded throughout.
    Otherwise the caller runs ``_extents_statement(plan, guarded=True)`` instead."""
    d = plan.dialect
    return tuple(names.extents(k.index) + stat for k in plan.keys
                 if k.binned and k.spec.bin is not None and _unguarded(d, k)
                 for stat in ("min", "max"))


def finite_proved(d: Dialect, k: Key, row: dict | None) -> bool:
    """Whether the extents ``row`` proves that key ``k`` (a double bin) has no inf or NaN
    among the rows it bins: it came from the plain statement (no ``names.extents_guarded``)
    that read the key's own values (``_unguarded``), whose MIN / MAX would show any
    non-finite value, and both are finite or NULL. The main statement reads the same rows or
    fewer (a chart's brushes only narrow its layout rows), so its bin index may skip the
    finiteness guard -- on 10M rows in DuckDB the guarded histogram cost 1.28x the plain one
    (bench/RESULTS.md, stop 22)."""
    if not row or names.extents_guarded() in row or not _unguarded(d, k):
        return False
    p = names.extents(k.index)
    if p + "min" not in row:
        return False
    return all(v is None or math.isfinite(float(v)) for v in (row[p + "min"], row[p + "max"]))


def needs_extents(k: Key) -> bool:
    """Whether key ``k``'s layout reads the extents row: a data-driven bin (not a time bin
    with limits, nor nice bins / a width over explicit limits without a rule)."""
    if not (k.binned and k.spec.bin is not None):
        return False
    if k.mode == "tbin":
        return k.tlimits is None
    return not (k.spec.bin.rule is None and k.nlimits is not None)


def plain_min_max(d: Dialect, k: Key) -> bool:
    """Whether key ``k``'s extents are just the MIN and MAX of its plain value
    (``planner.emit_checked.bin_value``): a numeric bin without a rule or limits, whose
    values the statement reads unguarded (integers, decimals, ``_unguarded`` doubles)."""
    return (k.mode == "nbin" and k.spec.bin is not None and k.spec.bin.rule is None
            and k.nlimits is None and (not d.nonfinite(k.col.kind) or _unguarded(d, k)))


def carried_keys(plan: Plan) -> list[Key]:
    """The keys whose extents a main statement with ``Plan.carry_extents`` carries
    (``planner.emit_main.carriable``); none without it."""
    return [k for k in plan.keys if needs_extents(k)] if plan.carry_extents else []


def carried_extents(plan: Plan) -> list[str]:
    """The extents row's columns such a main statement carries over all its groups: each
    carried key's plain min and max, named as the extents statement names them."""
    return [names.extents(k.index, end) for k in carried_keys(plan) for end in ("min", "max")]


def _extents_statement(plan: Plan, guarded: bool = False) -> exp.Select | None:
    """The extents statement; ``guarded``: every double value tested for finiteness (the
    statement the checked one falls back to, ``extents_checks``)."""
    d = plan.dialect
    sel: list[exp.Expression] = []
    built: dict[str, tuple[exp.Expression, str]] = {}  # window inputs (see _window_columns)
    for k in plan.keys:
        if not needs_extents(k):
            continue
        b = k.spec.bin
        ref = d.column(k.col.name, "s")
        p = names.extents(k.index)
        if k.mode == "tbin":
            ep = d.epoch(_instant_in_range(d, k.col, ref), k.col.kind)
            sel += [exp.alias_(exp.Min(this=ep), p + "min", quoted=True),
                    exp.alias_(exp.Max(this=ep.copy()), p + "max", quoted=True)]
            continue
        v = _bin_input(d, k, guarded or not _unguarded(d, k))
        if k.nlimits is not None:  # numpy trims the data to the range before applying a rule
            lo, hi = k.nlimits
            v = exp.Case(ifs=[exp.If(this=exp.Between(this=v.copy(), low=d.real(lo),
                                                      high=d.real(hi)), true=v.copy())])
        # the data's (or, with limits, the kept values') min and max: the layout's extent,
        # and the peak-to-peak of numpy's sturges / sqrt rules
        if b.rule in (None, "sturges", "sqrt") or k.nlimits is None:
            sel += [exp.alias_(exp.Min(this=v.copy()), p + "min", quoted=True),
                    exp.alias_(exp.Max(this=v.copy()), p + "max", quoted=True)]
        if b.rule is not None:
            sel.append(exp.alias_(exp.Count(this=v.copy()), p + "n", quoted=True))
        # Scott: population standard deviation; Freedman-Diaconis: the quartiles (type 7),
        # built from windows over all matched rows where the target has no aggregate
        if b.rule == "scott":
            sd = (_measure_agg(d, "stddev_pop", v, None, p + "w") if _built(d, "stddev_pop")
                  else exp.StddevPop(this=v.copy()))
            sel.append(exp.alias_(sd, p + "sd", quoted=True))
            built[p + "w"] = (v.copy(), "stddev_pop")
        if b.rule == "fd":
            for name, q in (("q1", 0.25), ("q3", 0.75)):
                qe = (_measure_agg(d, "quantile", v, q, p + "w") if _built(d, "quantile")
                      else d.quantile(v.copy(), q))
                sel.append(exp.alias_(qe, p + name, quoted=True))
            built[p + "w"] = (v.copy(), "quantile")
    if not sel:
        return None
    if guarded:  # (its row proves nothing about finiteness: finite_proved)
        sel.append(exp.alias_(exp.Literal.number(1), names.extents_guarded(), quoted=True))
    src: exp.Expression = relation(plan.schema, d)
    windows = _window_columns(d, [], built)
    if windows:  # the source rows with their window columns, still called "s"
        inner = exp.select(*_columns_of(*sel), *windows).from_(src)
        if plan.extents_where is not None:
            inner = inner.where(plan.extents_where.copy(), copy=False)
        return exp.select(*sel).from_(exp.alias_(exp.Subquery(this=inner), "s", quoted=True))
    q = exp.select(*sel).from_(src)
    if plan.extents_where is not None:  # (layout_filters: without the brushes)
        q = q.where(plan.extents_where.copy(), copy=False)
    return q
