"""Linked charts of one batch: brushing and linking (Becker & Cleveland, "Brushing
scatterplots", Technometrics 29(2), 1987) as ordinary chart requests.

Chart i of a ``BatchRequest`` is asked as the ``ChartRequest`` whose ``where`` is the
batch's ``where``, then the chart's own, then the ``brush`` of every OTHER chart in chart
order -- never its own brush, so the brushed chart keeps its whole distribution. With
``stable`` (the default) and brushes from other charts, its ``layout_filters`` is the count
of the batch's and its own filters: data-driven bin layouts and top-N membership come from
the rows before the brushes, so bars keep their place while a brush moves. Its answer is
exactly the answer of that chart request asked alone (bins, top-N, stats, the result and
plan caches). ``Linked.origins`` remembers where in the batch body each filter of
the composed ``where`` came from, so a problem inside one points into the batch.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from planner.errors import PlanError, pointer
from planner.model import BatchRequest, ChartRequest

_WHERE = re.compile(r"^/where/(\d+)(?=/|$)")


@dataclass(frozen=True)
class Linked:
    """Chart ``index`` of a batch as a chart request."""

    index: int
    request: ChartRequest
    #: ids of the charts whose brush filters this one, in chart order
    brushes: list[str]
    #: per filter of ``request.where``: its JSON Pointer in the batch body
    origins: list[str]
    #: whether the chart's ``tz`` is the batch's (a problem at /tz points at the batch's)
    batch_tz: bool

    @property
    def stable(self) -> bool:
        """Whether its bin layouts and top-N come from the rows before the brushes."""
        return self.request.split_layout

    def batch_pointer(self, ptr: str | None) -> str:
        """A pointer into the composed chart request -> the pointer into the batch body."""
        chart = f"/charts/{self.index}"
        if ptr is None:
            return chart
        m = _WHERE.match(ptr)
        if m is not None and int(m.group(1)) < len(self.origins):
            return self.origins[int(m.group(1))] + ptr[m.end():]
        if self.batch_tz and (ptr == "/tz" or ptr.startswith("/tz/")):
            return ptr
        return chart + ptr


def check_ids(batch: BatchRequest) -> None:
    """422 at ``/charts/<i>/id`` for an id given twice or a brush on a chart without one, at
    ``/charts/<i>/layout_filters`` for a chart that sets its own (``stable`` does)."""
    seen: dict[str, int] = {}
    for i, chart in enumerate(batch.charts):
        if chart.layout_filters is not None:
            raise PlanError(pointer("charts", i, "layout_filters"), "a chart of a batch takes "
                            "its layout filters from the batch: `stable` (default true) lays "
                            "it out from the batch's where and its own, without the brushes")
        if chart.id is None:
            if chart.brush:
                raise PlanError(pointer("charts", i, "id"), f"chart {i} has a brush but no "
                                "id: the answers of the charts it filters name it by its id")
            continue
        if chart.id in seen:
            raise PlanError(pointer("charts", i, "id"), f"chart id {chart.id!r} is given twice "
                            f"(charts {seen[chart.id]} and {i}); ids are unique within a batch")
        seen[chart.id] = i


def compose(batch: BatchRequest, index: int) -> Linked:
    """Chart ``index`` of ``batch`` (checked by ``check_ids``) as its chart request."""
    chart = batch.charts[index]
    inherited: dict[str, object] = {"source": batch.source}
    batch_tz = batch.tz is not None and chart.tz is None
    if batch_tz:  # the dashboard's zone
        inherited["tz"] = batch.tz
    base = ChartRequest.model_validate(  # (its session is claimed by the route)
        chart.model_dump(by_alias=True, exclude_none=True,
                         exclude={"session", "id", "brush", "where", "source", "stable",
                                  "layout_filters"}) | inherited)
    where = list(batch.where) + list(chart.where)
    origins = [pointer("where", k) for k in range(len(batch.where))]
    origins += [pointer("charts", index, "where", k) for k in range(len(chart.where))]
    brushes = []
    for j, other in enumerate(batch.charts):
        if j == index or not other.brush:
            continue
        brushes.append(str(other.id))
        where += other.brush
        origins += [pointer("charts", j, "brush", k) for k in range(len(other.brush))]
    # no re-validation: each filter was validated where it was written; the composed list's
    # length is capped by [limits] max_filters when the chart is planned (pointer mapped back)
    update: dict[str, object] = {"where": where}
    if chart.stable and brushes:  # layouts from the rows before the brushes (BatchChart.stable)
        update["layout_filters"] = len(batch.where) + len(chart.where)
    request = base.model_copy(update=update)
    return Linked(index, request, brushes, origins, batch_tz)
