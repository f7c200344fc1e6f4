"""M4 line reduction: per pixel column the first, last, minimum and maximum point.

Jugel, Jerzak, Hackenbroich, Markl: "M4: A Visualization-Oriented Time Series Data
Aggregation", PVLDB 7(10), 2014. A line chart W pixels wide is drawn with at most 4 points per
pixel column -- the ones with the first and last x and the smallest and largest y in that
column -- and the result rasterises to exactly the same pixels as the raw series (the
within-column segments are vertical and span [min, max]; the segments between columns join
the same last/first points). So at most 4*W rows leave the database, whatever N is.

Request shape (DEVELOPERS.md)::

    {"source": "...", "channels": {"x": {"column": "t"}, "y": {"column": "v"}},
     "reduce": {"method": "m4", "width_px": 800}, "where": [...]}

x is a number or timestamp column (not binned), y a number column; both are plain keys (no
agg). Rows where x or y is NULL are not points of the line and are skipped. The answer holds
the selected raw points ``(x, y)`` ordered by x, and says ``"reduced": {"method": "m4",
"width_px": W, "input_rows": N, "x_min": .., "x_max": ..}``.

Pixel column of a point (the renderer must map x the same way)::

    px = floor((x - x_min) * W / (x_max - x_min)), and W - 1 for x = x_max

with x in epoch seconds for timestamps; x_min/x_max are the extents of the matched points
(one extents statement, cached per data version by the service like every data-driven bin).
The per-column selection is one grouped scan with arg_min / arg_max (no join back to the
table); so the planner offers M4 only where those aggregates exist.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from sqlglot import exp

from planner import names
from planner.errors import PlanError, Unsupported, pointer
from planner.source import relation

if TYPE_CHECKING:
    from planner.plan import Plan


def check(plan: "Plan") -> None:
    """The request shape M4 accepts, with pointers to what does not fit."""
    req, d = plan.request, plan.dialect
    if not d.caps.arg_min_max:  # dialect data (planner/dialects)
        raise Unsupported(pointer("reduce"), d.name, "M4 reduction (needs arg_min/arg_max)")
    ch = req.channels
    if ch.x is None or ch.y is None:
        raise PlanError(pointer("reduce"), "reduce m4 needs channels x (a number or timestamp "
                        "column) and y (a number column)")
    extra = [n for n in ("color", "size", "shape", "opacity") if getattr(ch, n) is not None]
    if ch.by:
        extra.append("by")
    if extra:
        raise PlanError(pointer("channels", extra[0]), "reduce m4 draws one line: use only "
                        "channels x and y")
    for name in ("x", "y"):
        c = getattr(ch, name)
        if c.is_measure:
            raise PlanError(pointer("channels", name, "agg"),
                            "reduce m4 selects raw points: give a column, not an agg")
        for opt in ("bin", "trunc", "extract", "top"):
            if getattr(c, opt) is not None:
                raise PlanError(pointer("channels", name, opt),
                                f"reduce m4 works on raw values: {opt} does not apply")
    kx = next(k for k in plan.keys if k.channel == "x")
    ky = next(k for k in plan.keys if k.channel == "y")
    if not (kx.col.is_number or kx.col.kind in ("timestamp", "timestamptz", "date")):
        raise PlanError(pointer("channels", "x", "column"), f"reduce m4 needs a number or "
                        f"timestamp x; {kx.col.name!r} is {kx.col.kind}", slug="type-mismatch")
    if not ky.col.is_number:
        raise PlanError(pointer("channels", "y", "column"), f"reduce m4 needs a number y; "
                        f"{ky.col.name!r} is {ky.col.kind}", slug="type-mismatch")
    for what in ("facet", "stack"):
        if getattr(req, what) is not None:
            raise PlanError(pointer(what), f"reduce m4 does not combine with {what}")
    if req.empty_bins != "omit":
        raise PlanError(pointer("empty_bins"), "reduce m4 does not combine with empty_bins")
    if req.sort:
        raise PlanError(pointer("sort"), "reduce m4 answers points ordered by x; drop sort")


def _xy(plan: "Plan") -> tuple[Any, Any]:
    kx = next(k for k in plan.keys if k.channel == "x")
    ky = next(k for k in plan.keys if k.channel == "y")
    return kx, ky


def _x_number(plan: "Plan", ref: exp.Expression) -> exp.Expression:
    kx, _ = _xy(plan)
    d = plan.dialect
    return d.epoch(ref, kx.col.kind) if kx.col.is_temporal else d.double(ref)


def _filtered(plan: "Plan") -> exp.Expression:
    kx, ky = _xy(plan)
    d = plan.dialect
    cond: exp.Expression = exp.and_(
        exp.Not(this=exp.Is(this=d.column(kx.col.name, "s"), expression=exp.Null())),
        exp.Not(this=exp.Is(this=d.column(ky.col.name, "s"), expression=exp.Null())))
    if plan.where is not None:
        cond = exp.and_(cond, plan.where.copy())
    return cond


def extents_statement(plan: "Plan") -> exp.Select:
    """x_min, x_max (x as a number: epoch seconds for timestamps) and the point count."""
    kx, _ = _xy(plan)
    d = plan.dialect
    xv = _x_number(plan, d.column(kx.col.name, "s"))
    return (exp.select(exp.alias_(exp.Min(this=xv), names.m4("min"), quoted=True),
                       exp.alias_(exp.Max(this=xv.copy()), names.m4("max"), quoted=True),
                       exp.alias_(exp.Count(this=exp.Star()), names.m4("n"), quoted=True))
            .from_(relation(plan.schema, d))
            .where(_filtered(plan)))


def layout(row: dict[str, Any] | None) -> tuple[float | None, float | None, int]:
    row = row or {}
    lo, hi = row.get(names.m4("min")), row.get(names.m4("max"))
    n = int(row.get(names.m4("n")) or 0)
    return (None if lo is None else float(lo)), (None if hi is None else float(hi)), n


def main_statement(plan: "Plan", row: dict[str, Any] | None) -> exp.Select:
    """One grouped scan: per pixel column the four extreme points, then the distinct points
    ordered by x (ties by y), with the matched row count for the response."""
    assert plan.request.reduce is not None
    d = plan.dialect
    w = int(plan.request.reduce.width_px)
    kx, ky = _xy(plan)
    lo, hi, _ = layout(row)
    x = d.column(kx.col.name, "s")
    y = d.column(ky.col.name, "s")
    xv = _x_number(plan, x.copy())
    if lo is None or hi is None or not hi > lo:
        px: exp.Expression = exp.Literal.number(0)
    else:
        q = exp.Div(this=exp.Mul(this=exp.Paren(this=exp.Sub(this=xv, expression=d.real(lo))),
                                 expression=d.real(float(w))),
                    expression=d.real(hi - lo))
        px = exp.Case(ifs=[exp.If(this=exp.GTE(this=xv.copy(), expression=d.real(hi)),
                                  true=exp.Literal.number(w - 1))],
                      default=d.floor(q))

    def ident(n: str) -> exp.Identifier:
        return exp.to_identifier(n, quoted=True)

    def col(n: str) -> exp.Column:
        return exp.Column(this=ident(n))

    base = (exp.select(exp.alias_(x.copy(), "x", quoted=True), exp.alias_(y.copy(), "y", quoted=True),
                       exp.alias_(px, "px", quoted=True))
            .from_(relation(plan.schema, d))
            .where(_filtered(plan)))
    xa, ya = col("x"), col("y")
    agg = (exp.select(
        exp.alias_(exp.ArgMin(this=xa.copy(), expression=ya.copy()), "x1", quoted=True),
        exp.alias_(exp.Min(this=ya.copy()), "y1", quoted=True),
        exp.alias_(exp.ArgMax(this=xa.copy(), expression=ya.copy()), "x2", quoted=True),
        exp.alias_(exp.Max(this=ya.copy()), "y2", quoted=True),
        exp.alias_(exp.Min(this=xa.copy()), "x3", quoted=True),
        exp.alias_(exp.ArgMin(this=ya.copy(), expression=xa.copy()), "y3", quoted=True),
        exp.alias_(exp.Max(this=xa.copy()), "x4", quoted=True),
        exp.alias_(exp.ArgMax(this=ya.copy(), expression=xa.copy()), "y4", quoted=True),
        exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True))
        .from_(exp.Table(this=ident(names.m4("base"))))
        .group_by(col("px")))
    parts = [exp.select(exp.alias_(col(f"x{i}"), "x", quoted=True),
                        exp.alias_(col(f"y{i}"), "y", quoted=True))
             .from_(exp.Table(this=ident(names.m4("cols")))) for i in (1, 2, 3, 4)]
    points: exp.Expression = parts[0]
    for p in parts[1:]:
        points = exp.union(points, p, distinct=False)
    distinct = exp.select(col("x"), col("y")).distinct().from_(
        exp.Subquery(this=points, alias=exp.TableAlias(this=ident("p"))))
    total = exp.Subquery(this=exp.select(exp.Sum(this=col("n")))
                         .from_(exp.Table(this=ident(names.m4("cols")))))
    xname, yname = kx.names[0], ky.names[0]
    outer = (exp.select(
        exp.alias_(col("x"), xname, quoted=True),
        exp.alias_(col("y"), yname, quoted=True),
        exp.alias_(total, names.matched(), quoted=True),
        exp.alias_(exp.Window(this=exp.Count(this=exp.Star())), names.groups(), quoted=True))
        .from_(exp.Table(this=ident(names.m4("points"))))
        .order_by(exp.Ordered(this=col("x"), nulls_first=False),
                  exp.Ordered(this=col("y"), nulls_first=False))
        .limit(d.number(4 * w)))
    outer = outer.with_(ident(names.m4("base")), as_=base)
    outer = outer.with_(ident(names.m4("cols")), as_=agg)
    outer = outer.with_(ident(names.m4("points")), as_=distinct)
    return outer


def response_meta(plan: "Plan", row: dict[str, Any] | None, input_rows: int) -> dict[str, Any]:
    assert plan.request.reduce is not None
    lo, hi, _ = layout(row)
    return {"method": "m4", "width_px": int(plan.request.reduce.width_px),
            "input_rows": int(input_rows), "x_min": lo, "x_max": hi,
            "reference": "Jugel et al., M4, PVLDB 7(10), 2014"}
