"""The plan: what the stages pass along (frozen data only, no SQL building).

``planner.bind`` makes a complete ``Plan`` from request + schema + dialect (keys with their
output names, measures, the compiled ``where``, output columns, all checked);
``planner.layout`` returns a NEW plan whose binned keys carry their layouts (from an extents
row), the bound plan stays as it was; ``planner.compile`` (emit: ``planner.emit_*``) returns
a new plan with ``extents`` / ``main``, the sqlglot statements, rendered by ``extents_sql`` /
``main_sql``. Every class here is frozen: a stage that changes something makes a copy
(``dataclasses.replace``), so one bound plan can be laid out for many extents rows. Internal
column names come from ``planner.names``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlglot import exp

from planner import aggregates
from planner import bins as binning
from planner import names
from planner.dialects.base import Dialect
from planner.model import Channel, ChartRequest
from planner.schema import ColumnInfo, SourceSchema


#: what a composite named measure (``sum(a) / sum(b)``) is to the stages: a double that no
#: partial folds into and no stack piles (planner/measure_sql.py)
COMPOSITE = aggregates.Aggregate("expression", None, "", "double", None, False)


@dataclass(frozen=True)
class Key:
    """A grouping term of the request."""

    index: int
    path: tuple[str | int, ...]
    channel: str
    spec: Channel
    col: ColumnInfo
    mode: str  # plain | nbin | tbin | trunc | extract
    tz: str
    names: tuple[str, ...] = ()
    # bin layout (filled by planner.layout)
    nbins: binning.NumericBins | None = None
    tstep: binning.TimeStep | None = None
    tstart: Any = None  # first bin's internal key value (epoch seconds or naive local datetime)
    tcount: int | None = None
    nlimits: tuple[float, float] | None = None
    vrange: tuple[float, float] | None = None  # values that land in the bins (limits or data)
    tlimits: tuple[dt.datetime, dt.datetime] | None = None
    #: time bins: the stop instant of a closed last bin (values equal to it go into it)
    tclosed: dt.datetime | None = None
    #: numeric bins over an unknown range written as the plain floor, verified per group
    #: after execution (``planner.emit_keys.checked_keys``); set by the emit stage only
    checked: bool = False
    #: a double bin whose rows hold no inf or NaN (``planner.emit_extents.finite_proved``):
    #: its bin index needs no finiteness test; set by the layout step only
    finite: bool = False

    @property
    def label(self) -> str:
        """Channel name in ``bins`` / ``stats``: x, y, ..., row, col, or by0, by1, ..."""
        return f"by{self.path[-1]}" if self.channel == "by" else self.channel

    @property
    def internal(self) -> str:
        return names.key(self.index)

    @property
    def outside_flag(self) -> str:
        return names.outside_flag(self.index)

    @property
    def binned(self) -> bool:
        return self.mode in ("nbin", "tbin")

    @property
    def has_limits(self) -> bool:
        return self.nlimits is not None or self.tlimits is not None


@dataclass(frozen=True)
class Measure:
    index: int
    path: tuple[str | int, ...]
    channel: str
    spec: Channel
    col: ColumnInfo | None
    name: str = ""
    #: the compiled ``condition`` (filter_sql text) of an aggregate over truth values (share)
    condition: exp.Expression | None = None
    #: a named measure (planner/measure_sql.py): its config name; the per-row input when it
    #: is one aggregate over a scalar expression (not a bare column) and that input's kind
    named: str | None = None
    input_expr: exp.Expression | None = None
    input_kind: str | None = None
    #: a composite named measure: its aggregates (measure_sql.Part) and the value per group
    #: over ``exp.Placeholder(j)`` = aggregate j
    parts: tuple[Any, ...] = ()
    formula: exp.Expression | None = None

    @property
    def internal(self) -> str:
        return names.measure(self.index)

    @property
    def value(self) -> str:
        """The column holding the channel's value per group after grouping: the aggregate,
        or with ``then`` its measure over the grouped table (planner/emit_window.py)."""
        return names.measure_window(self.index) if self.spec.then else self.internal

    @property
    def output_kind(self) -> str:
        """The registry's answer type of the aggregate (planner/aggregates.py ``output``)."""
        return self.aggregate.output

    @property
    def composite(self) -> bool:
        return self.formula is not None

    def describe(self) -> str:
        """The measure in words, for problem details: ``sum of 'fee'``, ``count``."""
        if self.named is not None:
            return f"measure {self.named!r}"
        if self.col is None:
            return str(self.spec.agg)
        return f"{self.spec.agg} of {self.col.name!r}"

    @property
    def aggregate(self) -> aggregates.Aggregate:
        if self.formula is not None:  # a composite: a double, folds into nothing, no pile
            if any(aggregates.get(p.agg).approximate for p in self.parts):
                return dataclasses.replace(COMPOSITE, approximate=True)
            return COMPOSITE
        return aggregates.get(self.spec.agg)

    @property
    def has_input(self) -> bool:
        """The aggregate reads a per-row value (a column, a condition or a named measure's
        scalar input; not count(*), not a composite's parts)."""
        return self.col is not None or self.condition is not None or self.input_expr is not None


@dataclass(frozen=True)
class OutputColumn:
    name: str
    channel: str
    role: str  # key | bin_lo | bin_hi | measure | stack_base | stack_top
    source: str | None = None  # source column name


@dataclass(frozen=True)
class Plan:
    request: ChartRequest
    schema: SourceSchema
    dialect: Dialect
    keys: tuple[Key, ...]
    measures: tuple[Measure, ...]
    where: exp.Expression | None
    extents: exp.Select | None = None
    main: exp.Select | None = None
    columns: tuple[OutputColumn, ...] = ()
    approximate: tuple[str, ...] = ()
    stack_measure: Measure | None = None
    reduced_row: dict[str, Any] | None = None  # extents of an M4 reduction (planner/m4.py)
    #: number of bound-parameter slots in the SQL (``prepare(..., params=True)``); their
    #: values come from ``bind_values(request, ...)``, the text from ``bind_sql``
    slots: int = 0
    #: the condition that decides data-driven layouts and top-N membership when it differs
    #: from ``where`` (``ChartRequest.layout_filters``: the first filters, without brushes)
    layout_where: exp.Expression | None = None
    #: the main statement also carries the extents row (``planner.emit_main.carriable``):
    #: its first row holds the ``names.extents`` min / max the extents statement would give
    carry_extents: bool = False

    @property
    def text_outputs(self) -> list[str]:
        """The output columns that hold text: plain text keys (top keys too) and min / max of
        text; the final stage cuts them to ``MAX_TEXT_CHARS`` (``names.cut_text(j)`` flags the
        rows of output j that were cut)."""
        out = [k.names[0] for k in self.keys if k.mode == "plain" and k.col.kind == "string"]
        return out + [m.name for m in self.measures if m.output_kind == "input" and (
            (m.col is not None and m.col.kind == "string") or m.input_kind == "string")]

    @property
    def extents_where(self) -> exp.Expression | None:
        """The rows the extents statement and the top-N ranking read."""
        return self.layout_where if self.request.split_layout else self.where

    # ---- SQL text --------------------------------------------------------------------
    @property
    def extents_sql(self) -> str | None:
        return self.dialect.render(self.extents) if self.extents is not None else None

    @property
    def main_sql(self) -> str:
        assert self.main is not None, "planner.compile.finish(plan, row) first"
        return self.dialect.render(self.main)
