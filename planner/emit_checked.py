"""Emit: the checked plain floor -- a numeric bin index verified per group after execution.

When ``planner.emit_keys._plain_floor_is_exact`` cannot prove the plain floor over a layout,
the main statement still writes ``floor((v - start) / width)`` (``Key.checked``), carries
each group's smallest and largest value and one flag over all groups; the service runs the
statement again with the guarded index (``planner.compile.guarded``) only when the flag is
set. In: laid-out keys; out: sqlglot expressions. Pure.
"""

from __future__ import annotations

from sqlglot import exp

from planner import names
from planner.dialects.base import Dialect
from planner.emit_keys import _nbin_edges, _unguarded_index
from planner.emit_sql import _ref
from planner.plan import Key


def checkable(d: Dialect, k: Key) -> bool:
    """Whether a laid-out key's bin index may be the plain floor checked after execution.

    When ``_plain_floor_is_exact`` cannot prove the plain floor over the layout (widths
    such as 0.1 whose edges ``start + i*width`` the quotient rounds across, or no known
    range), the guarded form costs ~1.7x the plain one (10M rows, DuckDB). But
    ``floor((v - start) / width)`` is monotone in ``v`` (IEEE subtraction, division by a
    positive number and floor all are), so the values of one group form an interval, and
    the group is exactly the bin ``edge_i <= v < edge_(i+1)`` iff its smallest value is
    >= ``edge_i`` and its largest < ``edge_(i+1)`` (the closed last bin and a start snapped
    above the data keep their clamps). The main statement carries each group's min / max
    (``value_range``) and one flag over all groups (``misbinned_expr``); the service runs
    the guarded form only when the flag is set -- values within a few ulps of an edge --
    so the usual cost is ~1.3x the plain floor instead of ~1.7x."""
    return k.mode == "nbin" and k.nbins is not None and _unguarded_index(d, k) is None


def bin_value(d: Dialect, k: Key) -> exp.Expression:
    """The DOUBLE value a numeric bin key bins (its ``names.value`` column in the base)."""
    return d.double(d.number_cell(d.column(k.col.name, "s")))


def misbinned_expr(d: Dialect, keys: list[Key]) -> exp.Expression:
    """1 when some group of a checked key holds a value outside its bin, else 0 (over all
    groups, before any cap or LIMIT: a misbinned group that is not shown still miscounts)."""
    bad = []
    for k in keys:
        i, n = _ref(k.internal), k.nbins.count
        lo, hi = _nbin_edges(d, k, i)
        below = exp.LT(this=_ref(names.value_range(k.index, "min")), expression=lo)
        above = exp.GTE(this=_ref(names.value_range(k.index, "max")), expression=hi)
        if n is not None:  # bin 0 takes values below a snapped start, bin n-1 from its end on
            below = exp.and_(exp.GT(this=i.copy(), expression=exp.Literal.number(0)), below)
            above = exp.and_(exp.LT(this=i.copy(), expression=d.number(n - 1)), above)
            wrong = exp.or_(exp.LT(this=i.copy(), expression=exp.Literal.number(0)),
                            exp.GT(this=i.copy(), expression=d.number(n - 1)), below, above)
        else:
            wrong = exp.or_(below, above)
        bad.append(exp.and_(exp.Not(this=exp.Is(this=i.copy(), expression=exp.Null())),
                            exp.Paren(this=wrong)))
    flag = exp.Case(ifs=[exp.If(this=exp.or_(*bad) if len(bad) > 1 else bad[0],
                                true=exp.Literal.number(1))], default=exp.Literal.number(0))
    return exp.Window(this=exp.Max(this=flag))
