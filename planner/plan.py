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

    @property
    def internal(self) -> str:
        return names.measure(self.index)

    @property
    def aggregate(self) -> aggregates.Aggregate:
        return aggregates.get(self.spec.agg)

    @property
    def has_input(self) -> bool:
        """The aggregate reads a per-row value (a column or a condition; not count(*))."""
        return self.col is not None or self.condition is not None


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

    # ---- SQL text --------------------------------------------------------------------
    @property
    def extents_sql(self) -> str | None:
        return self.dialect.render(self.extents) if self.extents is not None else None

    @property
    def main_sql(self) -> str:
        assert self.main is not None, "planner.compile.finish(plan, row) first"
        return self.dialect.render(self.main)
