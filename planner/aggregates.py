"""The registry of aggregates: everything sluice knows about each ``agg`` name, in one table.

One ``Aggregate`` per name says which column kinds it accepts, what type it answers, how its
per-group partials re-aggregate (the top-N ``(other)`` fold), whether it may be stacked,
whether it is approximate, which dialect feature it needs and how the planner builds it where
a target has no function for it. The request model (``planner.model.AggName``), the
planner (``planner.bind``: type, feature and stack checks; ``planner.emit_top``: the fold) and the
answer shaping (``app.engines.arrow.output_types``, ``approximate``) read this table instead
of lists of their own.

How an aggregate is *spelled* on a target is dialect data: ``Dialect.agg_spellings`` maps an
aggregate name to a function name (written as is, ``NAME(arg)``; the argument is cast to
DOUBLE where the entry says ``double_input``) or to a builder ``(dialect, arg, q) -> node``.
Names a dialect does not list are built by the entry's portable ``build`` (a sqlglot node
that renders correctly for every target). Add an aggregate: one entry below plus spellings
for the targets that write it differently (DEVELOPERS.md, "How to add an aggregate").
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable

from sqlglot import exp

if TYPE_CHECKING:  # pragma: no cover
    from planner.dialects.base import Dialect

NUMBER_KINDS = frozenset({"integer", "double", "decimal"})
#: kinds MIN / MAX can order on every target
ORDERABLE_KINDS = frozenset({"integer", "double", "decimal", "string", "boolean", "timestamp",
                             "timestamptz", "date"})

Builder = Callable[["Dialect", "exp.Expression | None", "float | None"], exp.Expression]


@dataclass(frozen=True)
class Aggregate:
    name: str
    #: accepted input column kinds (planner.schema kinds); None: any kind
    inputs: frozenset[str] | None
    #: the type error's text (``str.format`` fields: agg, column, kind)
    mismatch: str
    #: answer type: "integer" (int64), "double" (float64), "input" (the column's own type,
    #: timestamps in the request's zone) or "sum" (int64 over integers, wide decimal over
    #: decimals, else float64)
    output: str
    #: how per-group partials combine into the aggregate of their union (top-N fold):
    #: "sum", "min", "max", "mean" (from a sum and a count partial), or None (not foldable:
    #: top ranks the source rows instead)
    fold: str | None
    #: may be piled by ``stack`` (a sum of the values means something)
    stacks: bool
    #: the answer is an estimate (the response says ``"approximate": true``)
    approximate: bool = False
    #: the dialect feature (planner.dialects.base.FEATURES) a target must support
    feature: str | None = None
    #: where the target lacks the aggregate, the planner builds it from windows:
    #: "quantile" (when ``caps.quantile_method == "window"``), "deviation" (``caps.stddev_method ==
    #: "two_pass"``)
    built: str | None = None
    #: ``column`` may be omitted (``count`` counts rows)
    column_optional: bool = False
    #: takes ``q`` (a quantile in [0, 1])
    takes_q: bool = False
    #: accepts ``condition`` (filter_sql text) in place of ``column``
    takes_condition: bool = False
    #: the spelled function's argument is cast to DOUBLE
    double_input: bool = False
    #: the portable build (used where a dialect lists no spelling)
    build: Builder | None = None
    #: an order statistic (quantile, median): the finalize selects within each group's
    #: values, no bounded running state (``caps.materialize_order_statistics``)
    order_statistic: bool = False

    def accepts(self, kind: str) -> bool:
        return self.inputs is None or kind in self.inputs


def _double(d: "Dialect", arg: exp.Expression | None) -> exp.Expression:
    assert arg is not None
    return d.double(arg)


def _approx_distinct(d: "Dialect", arg, q) -> exp.Expression:
    if d.caps.approx_distinct[0].startswith("exact"):  # no sketch here: answer exactly
        return exp.Count(this=exp.Distinct(expressions=[arg]))
    return exp.ApproxDistinct(this=arg)


def _quantile(d: "Dialect", arg, q) -> exp.Expression:
    assert q is not None
    return d.quantile(arg, q)


_NEEDS_NUMBER = "{agg} needs a number column; {column!r} is {kind}"
_CANNOT_ORDER = "{agg} cannot order {kind} values"


def _num(name: str, build: Builder, fold: str | None = None, stacks: bool = True,
         **kw) -> Aggregate:
    return Aggregate(name, NUMBER_KINDS, _NEEDS_NUMBER, kw.pop("output", "double"),
                     fold, stacks, build=build, **kw)


_ENTRIES = (
    Aggregate("count", None, "", "integer", "sum", True, column_optional=True,
              build=lambda d, arg, q: exp.Count(this=arg if arg is not None else exp.Star())),
    Aggregate("count_distinct", None, "", "integer", None, True, feature="count_distinct",
              build=lambda d, arg, q: exp.Count(this=exp.Distinct(expressions=[arg]))),
    Aggregate("approx_count_distinct", None, "", "integer", None, True, approximate=True,
              feature="approx_count_distinct", build=_approx_distinct),
    _num("sum", lambda d, arg, q: exp.Sum(this=arg), fold="sum", output="sum"),
    _num("avg", lambda d, arg, q: exp.Avg(this=_double(d, arg)), fold="mean"),
    Aggregate("min", ORDERABLE_KINDS, _CANNOT_ORDER, "input", "min", False,
              build=lambda d, arg, q: exp.Min(this=arg)),
    Aggregate("max", ORDERABLE_KINDS, _CANNOT_ORDER, "input", "max", False,
              build=lambda d, arg, q: exp.Max(this=arg)),
    _num("median", lambda d, arg, q: d.quantile(arg, 0.5), feature="median", built="quantile",
         order_statistic=True),
    _num("quantile", _quantile, feature="quantile", built="quantile", takes_q=True,
         order_statistic=True),
    _num("stddev_samp", lambda d, arg, q: exp.StddevSamp(this=_double(d, arg)),
         feature="stddev", built="deviation", double_input=True),
    _num("stddev_pop", lambda d, arg, q: exp.StddevPop(this=_double(d, arg)),
         feature="stddev", built="deviation", double_input=True),
    _num("var_samp", lambda d, arg, q: exp.Variance(this=_double(d, arg)),
         feature="stddev", built="deviation", double_input=True),
    _num("var_pop", lambda d, arg, q: exp.VariancePop(this=_double(d, arg)),
         feature="stddev", built="deviation", double_input=True),
    # share: the fraction of a group's rows where a boolean column (or a condition) is true,
    # NULLs left out of numerator and denominator (pandas Series.mean() of a nullable
    # boolean, skipna); no non-NULL value: NULL. Its input is the 1 / 0 / NULL indicator
    # (``measure_input``), so it is the mean of that indicator and folds exactly from the
    # same sum / count partials as avg. A pile of shares means nothing: not stackable.
    Aggregate("share", frozenset({"boolean"}),
              "{agg} needs a boolean column; {column!r} is {kind} (give a condition "
              "instead, e.g. \"condition\": \"fee > 10\")", "double",
              "mean", False, takes_condition=True,
              build=lambda d, arg, q: exp.Avg(this=_double(d, arg))),
)

AGGREGATES: dict[str, Aggregate] = {a.name: a for a in _ENTRIES}
#: every aggregate name, in the order the request model lists them
NAMES: tuple[str, ...] = tuple(AGGREGATES)


def get(name: str) -> Aggregate:
    return AGGREGATES[name]


def spell(d: "Dialect", name: str, arg: exp.Expression | None,
          q: float | None) -> exp.Expression:
    """The aggregate ``name`` of ``arg`` as the target writes it: the dialect's spelling
    (``agg_spellings``) or the registry's portable build."""
    entry = AGGREGATES.get(name)
    if entry is None:
        raise ValueError(name)
    how = d.agg_spellings.get(name)
    if isinstance(how, str):
        assert arg is not None
        return d.fn(how, d.double(arg) if entry.double_input else arg)
    if how is not None:
        return how(d, arg, q)
    assert entry.build is not None
    return entry.build(d, arg, q)


def truth_indicator(condition: exp.Expression) -> exp.Expression:
    """1 where ``condition`` is true, 0 where it is false, NULL where it is NULL (so NULL
    rows stay out of both the count of true rows and the count of rows)."""
    cond = condition if isinstance(condition, exp.Paren) else exp.Paren(this=condition)
    return exp.Case(ifs=[exp.If(this=cond, true=exp.Literal.number(1)),
                         exp.If(this=exp.Not(this=cond.copy()), true=exp.Literal.number(0))])


def measure_input(d: "Dialect", name: str, column: exp.Expression | None,
                  condition: exp.Expression | None) -> exp.Expression | None:
    """The per-row value the aggregate ``name`` reads: the column itself, or for an
    aggregate over truth values (``share``) the 1 / 0 / NULL indicator of the condition or
    of the boolean column being true."""
    if not AGGREGATES[name].takes_condition:
        return column
    if condition is None:
        assert column is not None
        condition = exp.EQ(this=column, expression=d.boolean(True))
    return truth_indicator(condition)
