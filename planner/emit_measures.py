"""Emit: measure inputs and aggregates, and the aggregates built from window columns.

``_measure_input`` is the per-row value a measure aggregates, ``_measure_agg`` its
aggregate per group: the dialect's own, or, where the target has no such function
(``_built``), a quantile or deviation built from window columns (``_window_columns``)
computed over the rows before grouping. Used by the extents statement, the top-N ranking
and the grouped stage. Pure.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from sqlglot import exp

from planner import aggregates
from planner.dialects.base import Dialect
from planner.emit_sql import _ref
from planner.plan import Measure
from planner.schema import ColumnInfo

if TYPE_CHECKING:
    from planner.measure_sql import Part


# ---- aggregates the target has no function for ------------------------------------------
#: Hyndman & Fan (1996) type 7 quantiles (= numpy.percentile(method="linear")) and two-pass
#: deviations, built from window columns computed over the rows before grouping.

def _built(d: Dialect, agg: str) -> str | None:
    """"quantile" / "deviation" when ``agg`` is built from windows on this target (the
    registry's ``built``, keyed on the dialect's ``caps.quantile_method`` /
    ``caps.stddev_method``)."""
    how = aggregates.get(agg).built
    if how == "quantile" and d.caps.quantile_method == "window":
        return "quantile"
    if how == "deviation" and d.caps.stddev_method == "two_pass":
        return "deviation"
    return None


def _measure_input(d: Dialect, m: Measure) -> exp.Expression | None:
    """The per-row value measure ``m`` aggregates, over the source rows ``"s"``: its column,
    or for share the 1 / 0 / NULL indicator (planner/aggregates.py ``measure_input``)."""
    column = d.column(m.col.name, "s") if m.col is not None else None
    if m.input_expr is not None:  # a named measure's scalar input (planner/measure_sql.py)
        column = m.input_expr.copy()
    cond = m.condition.copy() if m.condition is not None else None
    return _read_input(d, m.spec.agg, column, m.col if m.input_expr is None else None,
                       m.input_kind, cond)


def part_input(d: Dialect, part: "Part") -> exp.Expression | None:
    """The per-row input of a composite named measure's aggregate ``part``, read as a
    single measure's is (``_read_input``)."""
    assert part.input is not None
    return _read_input(d, part.agg, part.input.copy(), part.column, part.kind, None)


def _read_input(d: Dialect, agg: str, arg: exp.Expression | None, col: ColumnInfo | None,
                input_kind: str | None, cond: exp.Expression | None) -> exp.Expression | None:
    """``arg`` as the aggregate ``agg`` reads it on ``d``. ``col``: the column when ``arg``
    is one; else ``input_kind``, a named measure's input kind (planner/measure_sql.py)."""
    if agg in ("min", "max") and col is not None and col.kind == "boolean" \
            and not d.caps.boolean_min_max:
        # no MIN(boolean) on the target: the 1 / 0 / NULL indicator, read back as boolean
        return aggregates.truth_indicator(exp.EQ(this=arg, expression=d.boolean(True)))
    if agg in ("count_distinct", "approx_count_distinct") and col is not None \
            and col.kind == "other":
        # a type of no kind (point, json, a list) may have no equality on the target
        # (PostgreSQL: point, json): its distinct text forms
        return d.text(arg)
    if agg in ("count_distinct", "approx_count_distinct") and col is not None \
            and col.kind == "double":
        return d.group_number(arg)  # -0.0 and 0.0 are one value
    if agg == "sum" and arg is not None:
        # widened where the engine's own sum of the type can overflow
        if col is not None:
            wide = d.sum_input(arg, col.sql_type, col.kind)
        else:
            wide = d.sum_input(arg, "", "integer") if input_kind == "integer" else None
        return arg if wide is None else wide
    return aggregates.measure_input(d, agg, arg, cond)


def _window_columns(d: Dialect, partition: list[exp.Expression],
                    args: dict[str, tuple[exp.Expression | None, str]]) -> list[exp.Expression]:
    """Window columns per measure input, named ``<prefix>_r`` (row number of the value in
    its group, NULLs last), ``<prefix>_c`` (non-NULL values in the group) and ``<prefix>_mu``
    (the group mean), for the aggregates ``_built`` says need them."""
    out: list[exp.Expression] = []
    for prefix, (arg, agg) in args.items():
        need = _built(d, agg) if arg is not None else None
        if need is None:
            continue
        part = [p.copy() for p in partition] or None
        if need == "quantile":
            order = exp.Order(expressions=d.order_nulls_last_plain(_double(d, arg)))
            rn = exp.Window(this=exp.RowNumber(), partition_by=part, order=order)
            out.append(exp.alias_(rn, f"{prefix}_r", quoted=True))
            # the same window (one sort), whole partition as the frame
            whole = exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING",
                                   end="UNBOUNDED", end_side="FOLLOWING")
            out.append(exp.alias_(exp.Window(this=exp.Count(this=arg.copy()),
                                             partition_by=[p.copy() for p in partition] or None,
                                             order=order.copy(), spec=whole),
                                  f"{prefix}_c", quoted=True))
        else:
            out.append(exp.alias_(exp.Window(this=exp.Avg(this=_double(d, arg)), partition_by=part),
                                  f"{prefix}_mu", quoted=True))
    return out


def _columns_of(*exprs: exp.Expression | None) -> list[exp.Column]:
    """The distinct column references in ``exprs`` (what a narrowed sub-query must keep)."""
    seen: dict[str, exp.Column] = {}
    for e in exprs:
        for c in (e.find_all(exp.Column) if e is not None else ()):
            if c.table == "s":  # source columns, not the window columns named by the caller
                seen.setdefault(c.sql(), c.copy())
    return list(seen.values())


def _double(d: Dialect, e: exp.Expression) -> exp.Expression:
    """``e`` as a double (not cast twice)."""
    if isinstance(e, exp.Cast) and e == d.double(e.this):
        return e.copy()
    return d.double(e.copy())


def _measure_agg(d: Dialect, agg: str, arg: exp.Expression | None, q: float | None,
                 prefix: str) -> exp.Expression:
    """The aggregate of ``arg`` per group: the dialect's own, or built from the window
    columns ``<prefix>_*`` (``_window_columns``) where the target has none."""
    how = _built(d, agg) if arg is not None else None
    if how is None:
        return d.agg(agg, arg, q)
    assert arg is not None
    v = _double(d, arg)
    if how == "quantile":
        # type 7: h = (n - 1) q; x[floor h] + (h - floor h) (x[floor h + 1] - x[floor h]),
        # x[i] the i-th smallest value (1-based row number i + 1)
        n = _ref(f"{prefix}_c")
        h = exp.Mul(this=exp.Paren(this=exp.Sub(this=n, expression=exp.Literal.number(1))),
                    expression=d.real(0.5 if agg == "median" else float(q)))
        lo = d.floor(h)

        def at(offset: int) -> exp.Expression:
            hit = exp.EQ(this=_ref(f"{prefix}_r"),
                         expression=exp.Add(this=lo.copy(), expression=exp.Literal.number(offset)))
            return exp.Max(this=exp.Case(ifs=[exp.If(this=hit, true=v.copy())]))

        frac = exp.Max(this=exp.Sub(this=h.copy(), expression=lo.copy()))
        x0, x1 = at(1), at(2)
        return exp.Case(ifs=[exp.If(this=exp.GT(this=frac, expression=exp.Literal.number(0)),
                                    true=exp.Add(this=x0, expression=exp.Mul(
                                        this=frac.copy(),
                                        expression=exp.Paren(this=exp.Sub(this=x1, expression=x0.copy())))))],
                        default=x0.copy())
    # two-pass deviations, corrected (Chan, Golub & LeVeque 1983): with e = x - mean,
    # M2 = sum(e^2) - sum(e)^2 / n; var_pop = M2 / n, var_samp = M2 / (n - 1)
    e = exp.Paren(this=exp.Sub(this=v, expression=_ref(f"{prefix}_mu")))
    n = d.double(exp.Count(this=arg.copy()))
    s1 = exp.Sum(this=e.copy())
    m2 = exp.Sub(this=exp.Sum(this=exp.Mul(this=e.copy(), expression=e.copy())),
                 expression=exp.Div(this=exp.Mul(this=s1, expression=s1.copy()),
                                    expression=exp.Nullif(this=n.copy(), expression=exp.Literal.number(0))))
    m2 = exp.Case(ifs=[exp.If(this=exp.LT(this=m2.copy(), expression=exp.Literal.number(0)),
                              true=d.real(0.0))], default=m2)
    denom = n if agg.endswith("_pop") else exp.Sub(this=n, expression=exp.Literal.number(1))
    var = exp.Div(this=m2, expression=exp.Nullif(this=denom, expression=exp.Literal.number(0)))
    return exp.Sqrt(this=var) if agg.startswith("stddev") else var
