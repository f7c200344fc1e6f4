"""Measures over the grouped table (``then`` on a measure channel): the rules, at bind time.

A ``then`` measure is computed from the measure's value per group of the answer, after
grouping, the top-N fold and ``empty_bins`` (planner/emit_window.py writes it as window
functions over those rows), so every group of the answer takes part -- also ``(other)`` and
empty bins -- whatever ``limit`` and ``facet.max_groups`` later keep:

* ``fraction``: value / (sum of the values over the partition); NULL where the value is
  NULL or the sum is 0. Partition (``within``): ``all`` -- every group; ``axis`` -- the
  groups with the same axis value and facet cell (what ``stack: fraction`` piles);
  ``facet`` -- the groups of the same facet cell (needs a facet).
* ``cumulative``: the running sum of the values along the axis key (pandas ``cumsum``),
  within each combination of the other keys; NULL where the value is NULL.
* ``change``: the value minus the previous group's along the axis key (pandas ``diff``),
  within each combination of the other keys; NULL for the first group and where either
  value is NULL.

The *axis key* is the key on x; when x holds a measure, the key on y. Along it the groups
are ordered by the key's own order (bin index, time, number, the engine's text order); the
group whose axis value is NULL has no place on the axis: its cumulative and change are NULL
and it enters no other group's (it does count in a fraction's total).
"""

from __future__ import annotations

from planner.dialects.base import Dialect
from planner.errors import PlanError, Unsupported, pointer
from planner.plan import Key, Measure

#: the answer types (app.engines.arrow.output_types) and output-name suffixes
SUFFIX = {"fraction": "fraction", "cumulative": "cumulative", "change": "change"}
NUMERIC_OUTPUTS = ("integer", "double", "sum")


def axis_key(keys: tuple[Key, ...] | list[Key], measure: Measure) -> Key | None:
    """The key the measure runs along: on x, or on y when x holds a measure."""
    on = "y" if measure.channel == "x" else "x"
    return next((k for k in keys if k.channel == on), None)


def facet_keys(keys) -> list[Key]:
    return [k for k in keys if k.channel in ("row", "col")]


def check(d: Dialect, keys: list[Key], measures: list[Measure]) -> None:
    """Refuses (422, pointer at the measure's ``then`` / ``within``) what has no meaning."""
    for m in measures:
        then = m.spec.then
        if then is None:
            continue
        ptr = pointer(*m.path, "then")
        if not d.supports("window"):
            raise Unsupported(ptr, d.name, "then (needs window functions)")
        if not is_numeric(m):
            raise PlanError(ptr, f"then={then} needs a number measure; {m.describe()} "
                            f"answers {m.col.kind if m.col is not None else 'no number'}",
                            slug="type-mismatch", title="then does not fit the measure")
        within = m.spec.within or "all"
        axis = axis_key(keys, m)
        if axis is None and (then != "fraction" or within == "axis"):
            on = "y" if m.channel == "x" else "x"
            what = "within=axis" if then == "fraction" else f"then={then}"
            raise PlanError(pointer(*m.path, "within") if then == "fraction" else ptr,
                            f"{what} runs along the axis key, a key on {on}; the request has "
                            f"none (add a key on {on})")
        if within == "facet" and not facet_keys(keys):
            raise PlanError(pointer(*m.path, "within"),
                            "within=facet needs a facet (facet.row and/or facet.col)")


def is_numeric(m: Measure) -> bool:
    out = m.output_kind
    if out == "input":
        return (m.col is not None and m.col.is_number) or m.input_kind in ("integer", "number")
    return out in NUMERIC_OUTPUTS
