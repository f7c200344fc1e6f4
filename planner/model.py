"""The chart request (DESIGN.md vocabulary), validated with pydantic v2.

The JSON Schema of ``ChartRequest`` is published in the OpenAPI document. Type checks that
need the source's schema (bin on text, avg of a string, unknown columns) happen later in
``planner.bind``; this module checks the shape of the request on its own.
"""

from __future__ import annotations

import math
import re
import unicodedata
from typing import Annotated, Any, Literal, Union

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Discriminator,
    StrictBool,
    Field,
    Tag,
    field_validator,
    model_validator,
)

from planner import aggregates

#: the aggregate names of the registry (planner/aggregates.py)
AggName = Literal[aggregates.NAMES]  # type: ignore[valid-type]
TruncUnit = Literal["year", "quarter", "month", "week", "day", "hour", "minute", "second"]
ExtractField = Literal[
    "year", "quarter", "month", "week", "isoyear", "day", "dow", "isodow", "doy",
    "hour", "minute", "second",
]
BinRule = Literal["sturges", "scott", "fd", "sqrt"]
ChannelName = Literal["x", "y", "color", "size", "shape", "opacity", "row", "col"]
#: a measure over the grouped table (planner/emit_window.py)
ThenName = Literal["fraction", "cumulative", "change"]
WithinName = Literal["all", "axis", "facet"]

MAX_BINS = 10_000
#: longest text value an answer carries: a longer key value or min / max of a text column is
#: cut to this many characters in SQL (the answer's ``stats.cut_text`` counts them), so 10,000
#: rows of a text column stay within ~40 MB however long the stored values are
MAX_TEXT_CHARS = 1000
#: deepest nesting of ``any`` / ``not`` in ``where`` (a predicate directly in ``where`` is
#: depth 0). SQLite's parser refuses OR/AND chains nested ~23 levels deep (SQLite 3.40,
#: measured), so 16 keeps every engine below its own parser and recursion limits.
MAX_FILTER_DEPTH = 16
#: integers in a request must fit 64 bits, signed or unsigned (the widest integer columns
#: the engines store): beyond that a literal changes type differently on every engine.
INT_MIN, INT_MAX = -(2 ** 63), 2 ** 64 - 1

_BAD_TEXT = re.compile("[\x00\ud800-\udfff]")


def _no_nul(v: str) -> str:
    # NUL ends a C string: engines would cut the text (or fail) instead of using it as sent;
    # a lone UTF-16 surrogate (JSON "\ud800" without its pair) is not a Unicode scalar
    # value (RFC 8259 section 8.2), so no engine or encoder can carry it as UTF-8
    bad = _BAD_TEXT.search(v)
    if bad is not None:
        if bad.group() == "\x00":
            raise ValueError("text may not contain NUL (\\u0000) characters")
        raise ValueError(f"text may not contain a lone UTF-16 surrogate (\\u{ord(bad.group()):04x}"
                         f" at character {bad.start()}): it is not valid Unicode (RFC 8259 "
                         "section 8.2)")
    return v


#: request text (names, labels, values): any Unicode but NUL and lone surrogates
Text = Annotated[str, AfterValidator(_no_nul)]


def _output_name(v: str) -> str:
    # MariaDB drops leading spaces of an alias (then ORDER BY misses it), engines differ on
    # control characters: one rule everywhere, checked before any engine sees the name
    if v != v.strip():
        raise ValueError("an output name may not start or end with white space")
    bad = next((c for c in v if unicodedata.category(c) == "Cc"), None)
    if bad is not None:
        raise ValueError(f"an output name may not contain control characters (U+{ord(bad):04X})")
    return v


#: output column names (``name``): text without edge white space or control characters
Name = Annotated[str, AfterValidator(_no_nul), AfterValidator(_output_name)]


def _in_range(v: Any) -> Any:
    if isinstance(v, int) and not isinstance(v, bool) and not INT_MIN <= v <= INT_MAX:
        raise ValueError(f"integers must lie in [-2^63, 2^64-1]; this one has {len(str(abs(v)))} "
                         "digits (write an approximate value as a float, e.g. 1e30)")
    if isinstance(v, float) and not math.isfinite(v):
        raise ValueError("numbers must be finite")
    return v


#: a value compared in ``where``; bool first: JSON true must not become 1
Scalar = Annotated[Union[bool, int, float, Text], AfterValidator(_in_range)]


#: a request's ``session``: short and plain (it is echoed in problem details and logs)
SESSION_PATTERN = r"^[A-Za-z0-9._:~-]{1,64}$"
Session = Annotated[str, Field(min_length=1, max_length=64, pattern=SESSION_PATTERN)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)


class Bin(_Strict):
    """How a number or timestamp key is binned. Exactly one of bins / width / rule."""

    bins: Annotated[int, Field(ge=1, le=MAX_BINS)] | None = Field(
        None, description="Target number of bins; the width is rounded to a nice number "
        "(Heckbert 1990) or, on timestamps, to a calendar step.")
    width: float | None = Field(None, gt=0, description="Bin width h (numbers only).")
    origin: float | None = Field(None, description="Bin origin x0 (with width).")
    rule: BinRule | None = Field(None, description="Bin-count rule (numbers only).")
    limits: tuple[float | str, float | str] | None = Field(
        None, description="[lo, hi]; rows outside are counted in stats.outside_limits.")

    @field_validator("width", "origin")
    @classmethod
    def _finite(cls, v: float | None) -> float | None:
        if v is not None and not math.isfinite(v):
            raise ValueError("must be a finite number")
        return v

    @model_validator(mode="after")
    def _one_method(self) -> "Bin":
        chosen = [k for k in ("bins", "width", "rule") if getattr(self, k) is not None]
        if len(chosen) > 1:
            raise ValueError(f"give only one of bins, width, rule (got {', '.join(chosen)})")
        if self.origin is not None and self.width is None:
            raise ValueError("origin goes with width")
        if not chosen:
            self.bins = 20
        return self


class Channel(_Strict):
    """A key (``column`` without ``agg``) or a measure (``agg``, with ``column`` as input, or
    ``measure``: a named measure of the source's config)."""

    column: Text | None = Field(None, min_length=1, max_length=256)
    expr: Text | None = Field(
        None, min_length=1, max_length=4096,
        description="In place of column: a scalar SQL expression over the source's columns "
        "(physical, computed, dimension columns as depots.city), from the allow-list of "
        "filter_sql widened to CASE, NULLIF, casts, ||, replace, date_trunc and extract "
        "(README \"Source model\"). Its kind comes from the engine.",
        examples=["fee / NULLIF(distance_km, 0)"])
    agg: AggName | None = None
    measure: Text | None = Field(
        None, min_length=1, max_length=256,
        description="A named measure of the source (config [sources.X.measures]; listed by "
        "/v1/sources/{name}) in place of agg and column.", examples=["revenue"])
    then: ThenName | None = Field(
        None, description="A measure over the grouped table, computed from this measure's "
        "value per group: fraction (the group's share of the sum over `within`), cumulative "
        "(the running sum along the axis key, in its order) or change (the difference from "
        "the previous group along the axis key). The axis key is the key on x, or on y when "
        "x holds a measure; the other keys (color, by, facets, ...) partition cumulative and "
        "change.")
    within: WithinName | None = Field(
        None, description="For then=fraction: the groups whose sum is the total: all (the "
        "default), axis (the groups of the same axis value and facet cell) or facet (the "
        "groups of the same facet cell).")
    q: float | None = Field(None, ge=0, le=1, description="Quantile in [0, 1] for agg=quantile.")
    condition: Text | None = Field(
        None, min_length=1, max_length=4096,
        description="For agg=share, in place of column: the condition whose share of the "
        "group's rows is answered, written like filter_sql (the same allow-list). Rows where "
        "it is NULL are left out.", examples=["delay_min > 15"])
    bin: Bin | None = None
    trunc: TruncUnit | None = None
    extract: ExtractField | None = None
    tz: Text | None = Field(None, min_length=1, max_length=64, description="IANA time zone name.")
    top: int | None = Field(None, ge=1, le=10_000, description="Keep the N largest groups.")
    other_label: Text = Field("(other)", max_length=256)
    name: Name | None = Field(None, min_length=1, max_length=128, description="Output column "
                              "name; unique among the answer's columns ignoring case (a clash "
                              "gets the channel prefixed); no edge white space or control "
                              "characters.")

    @model_validator(mode="after")
    def _consistent(self) -> "Channel":
        if self.column is not None and self.expr is not None and self.column != self.expr:
            raise ValueError("use one of column or expr")
        if self.expr is not None and self.column is None:  # checked as its column from here
            return self._checked(self.model_copy(update={"column": self.expr}))
        return self._checked(self)

    @staticmethod
    def _checked(self: "Channel") -> "Channel":
        if self.within is not None and self.then != "fraction":
            raise ValueError("within goes with then=fraction")
        if self.measure is not None:
            given = [k for k in ("agg", "column", "q", "condition", "bin", "trunc", "extract",
                                 "top") if getattr(self, k) is not None]
            if given:
                raise ValueError(f"measure names a whole measure of the source; drop "
                                 f"{', '.join(given)}")
        elif self.agg is None:
            if self.column is None:
                raise ValueError("a channel needs a column (a key), an agg or a measure "
                                 "(a measure)")
            if self.q is not None:
                raise ValueError("q goes with agg=quantile")
            if self.condition is not None:
                raise ValueError("condition goes with agg=share")
            if self.then is not None:
                raise ValueError("then applies to a measure (agg or measure), not to a key")
        else:
            entry = aggregates.get(self.agg)
            key_opts = [k for k in ("bin", "trunc", "extract", "top") if getattr(self, k) is not None]
            if key_opts:
                raise ValueError(f"{', '.join(key_opts)} applies to keys, not to a measure (agg)")
            if entry.takes_condition:
                if (self.column is None) == (self.condition is None):
                    raise ValueError(f"agg {self.agg} needs exactly one of column (a boolean "
                                     "column) or condition (filter_sql text)")
            elif self.condition is not None:
                raise ValueError("condition goes with agg=share")
            elif not entry.column_optional and self.column is None:
                raise ValueError(f"agg {self.agg} needs a column")
            if entry.takes_q and self.q is None:
                raise ValueError("agg quantile needs q (0..1)")
            if not entry.takes_q and self.q is not None:
                raise ValueError("q goes with agg=quantile")
        given = [k for k in ("bin", "trunc", "extract") if getattr(self, k) is not None]
        if len(given) > 1:
            raise ValueError(f"use one of bin, trunc, extract (got {', '.join(given)})")
        return self

    @property
    def is_measure(self) -> bool:
        return self.agg is not None or self.measure is not None


class Channels(_Strict):
    x: Channel | None = None
    y: Channel | None = None
    color: Channel | None = None
    size: Channel | None = None
    shape: Channel | None = None
    opacity: Channel | None = None
    by: list[Channel] = Field(default_factory=list, max_length=16,
                              description="Extra grouping keys with no visual channel.")

    @model_validator(mode="after")
    def _not_empty(self) -> "Channels":
        if not self.by and all(getattr(self, c) is None for c in VISUAL_CHANNELS):
            raise ValueError("at least one channel is needed")
        return self


VISUAL_CHANNELS = ("x", "y", "color", "size", "shape", "opacity")


class Predicate(_Strict):
    """One column, one or more operators; all must hold."""

    column: Text = Field(min_length=1, max_length=256)
    eq: Scalar | None = None
    ne: Scalar | None = None
    lt: Scalar | None = None
    lte: Scalar | None = None
    gt: Scalar | None = None
    gte: Scalar | None = None
    in_: list[Scalar] | None = Field(None, alias="in", max_length=10_000)
    not_in: list[Scalar] | None = Field(None, max_length=10_000)
    is_null: StrictBool | None = None
    contains: Text | None = Field(None, max_length=1024)
    starts_with: Text | None = Field(None, max_length=1024)

    @model_validator(mode="after")
    def _has_operator(self) -> "Predicate":
        if not self.operators():
            raise ValueError(
                "a predicate needs at least one operator: eq, ne, lt, lte, gt, gte, in, "
                "not_in, is_null, contains, starts_with")
        return self

    def operators(self) -> list[tuple[str, Any]]:
        """(operator name as written in JSON, value) for every operator given."""
        out = []
        for field_name, info in type(self).model_fields.items():
            if field_name == "column":
                continue
            v = getattr(self, field_name)
            if v is not None:
                out.append((info.alias or field_name, v))
        return out


class AnyOf(_Strict):
    any: list["Filter"] = Field(min_length=1, max_length=256)


class NotOf(_Strict):
    not_: "Filter" = Field(alias="not")


def _filter_tag(v: Any) -> str:
    if isinstance(v, dict):
        if "any" in v:
            return "any"
        if "not" in v:
            return "not"
        return "predicate"
    if isinstance(v, AnyOf):
        return "any"
    if isinstance(v, NotOf):
        return "not"
    return "predicate"


Filter = Annotated[
    Union[
        Annotated[Predicate, Tag("predicate")],
        Annotated[AnyOf, Tag("any")],
        Annotated[NotOf, Tag("not")],
    ],
    Discriminator(_filter_tag),
]
AnyOf.model_rebuild()
NotOf.model_rebuild()

def filter_depth(where: Any, prefix: str = "/where") -> tuple[int, str] | None:
    """(depth, JSON Pointer) of the first filter nested deeper than MAX_FILTER_DEPTH in a raw
    (decoded JSON) ``where`` list, else None. Iterative: safe on any nesting."""
    if not isinstance(where, list):
        return None
    stack: list[tuple[Any, str, int]] = [(f, f"{prefix}/{i}", 0) for i, f in enumerate(where)]
    stack.reverse()  # popped in document order: the first offender is reported
    while stack:
        f, ptr, depth = stack.pop()
        if depth > MAX_FILTER_DEPTH:
            return depth, ptr
        if not isinstance(f, dict):
            continue
        if isinstance(f.get("not"), dict):
            stack.append((f["not"], ptr + "/not", depth + 1))
        if isinstance(f.get("any"), list):
            stack.extend(reversed([(g, f"{ptr}/any/{j}", depth + 1)
                                   for j, g in enumerate(f["any"])]))
    return None


def shallow_filters(v: Any, prefix: str) -> Any:
    """``v`` (a raw filter list at ``prefix``) unless it nests deeper than MAX_FILTER_DEPTH."""
    depth = filter_depth(v, prefix)
    if depth is not None:
        raise ValueError(f"any/not nest {depth[0]} levels deep at {depth[1]}; at most "
                         f"{MAX_FILTER_DEPTH}")
    return v


#: Discriminator tags that pydantic inserts into error locations; stripped from pointers.
FILTER_TAGS = frozenset({"predicate", "any", "not"})


class Facet(_Strict):
    row: Channel | None = None
    col: Channel | None = None
    max_groups: int | None = Field(None, ge=1, le=100_000,
                                   description="At most this many result rows per facet cell.")

    @model_validator(mode="after")
    def _keys(self) -> "Facet":
        if self.row is None and self.col is None:
            raise ValueError("a facet needs row and/or col")
        return self


class SortItem(_Strict):
    channel: ChannelName
    desc: StrictBool = False


class Reduce(_Strict):
    method: Literal["m4"]
    width_px: int = Field(ge=1, le=20_000)


class ChartRequest(_Strict):
    """A chart request: which columns sit on which channels, filtered, binned, faceted."""

    source: Text = Field(min_length=1, max_length=256)
    channels: Channels
    where: list[Filter] = Field(default_factory=list, max_length=256)
    facet: Facet | None = None
    stack: Literal["sum", "fraction", "centered"] | None = None
    empty_bins: Literal["omit", "zero", "null"] = "omit"
    sort: list[SortItem] = Field(default_factory=list, max_length=16)
    limit: int = Field(10_000, ge=1, le=1_000_000)
    tz: Text | None = Field(
        None, min_length=1, max_length=64,
        description="The request's IANA time zone: the default tz of every temporal key and "
        "the zone in which instants without an offset in where, limits and filter_sql are "
        "read. A key's own tz overrides it for that key. Default UTC.",
        examples=["Europe/Berlin"])
    reduce: Reduce | None = Field(
        None, description="Line reduction: {\"method\": \"m4\", \"width_px\": W} answers at most "
        "4*W raw points (x, y) that draw the same pixels as the whole series (Jugel et al., "
        "M4, PVLDB 7(10), 2014); channels x (number/timestamp column) and y (number column).")
    filter_sql: Text | None = Field(
        None, min_length=1, max_length=4096,
        description="An extra condition written as SQL (DuckDB-flavoured generic SQL), ANDed "
        "with `where`. Only an allow-list is accepted: catalog columns, literals (numbers, "
        "strings, true/false, NULL, DATE '...', TIMESTAMP '...'), comparisons, AND/OR/NOT, "
        "IN (list), BETWEEN, IS [NOT] NULL, [I]LIKE, + - * / %, parentheses and the functions "
        "lower, upper, trim, length, abs, round, floor, ceil, coalesce. Anything else is a "
        "422 whose pointer is /filter_sql. The server may set a lower length cap.",
        examples=["fee > 10 AND depot IN ('North Yard')"])
    session: Session | None = Field(
        None, description="A short client-chosen name (letters, digits and . _ : ~ -, at most "
        "64): a newer request with the same session (and the same API key) interrupts this "
        "one's running statements, and this one answers 409 (problem type superseded).",
        examples=["tab-7f3a"])
    layout_filters: int | None = Field(
        None, ge=0, le=256,
        description="How many leading filters of `where` (together with `filter_sql`) decide "
        "the data-driven bin layouts (extent, rule statistics) and the top-N membership; the "
        "later filters only select the rows that are counted. Default: all of them. A "
        "/v1/batch sets it for a linked chart so its bars do not move while other charts' "
        "brushes do (see `stable`). M4 reductions take their pixel columns from all filters.",
        examples=[1])

    @field_validator("where", mode="before")
    @classmethod
    def _shallow(cls, v: Any) -> Any:
        return shallow_filters(v, "/where")

    @property
    def split_layout(self) -> bool:
        """Whether fewer filters decide the layouts than select the rows (``layout_filters``
        below the length of ``where``)."""
        return self.layout_filters is not None and self.layout_filters < len(self.where)

    def predicates(self) -> list[tuple[tuple[str | int, ...], "Predicate"]]:
        """Every predicate of ``where`` with its path in the request, depth first in request
        order (inside ``any`` and ``not`` too): the order the planner binds values in."""
        out: list[tuple[tuple[str | int, ...], Predicate]] = []

        def walk(f: Any, path: tuple[str | int, ...]) -> None:
            if isinstance(f, AnyOf):
                for j, g in enumerate(f.any):
                    walk(g, path + ("any", j))
            elif isinstance(f, NotOf):
                walk(f.not_, path + ("not",))
            else:
                out.append((path, f))

        for i, f in enumerate(self.where):
            walk(f, ("where", i))
        return out

    def keyed_channels(self) -> list[tuple[tuple[str | int, ...], str, Channel]]:
        """Every channel with its path in the request and its channel name, in order:
        x, y, color, size, shape, opacity, by[i], facet row, facet col."""
        out: list[tuple[tuple[str | int, ...], str, Channel]] = []
        for nm in VISUAL_CHANNELS:
            ch = getattr(self.channels, nm)
            if ch is not None:
                out.append((("channels", nm), nm, ch))
        for i, ch in enumerate(self.channels.by):
            out.append((("channels", "by", i), "by", ch))
        if self.facet is not None:
            for nm in ("row", "col"):
                ch = getattr(self.facet, nm)
                if ch is not None:
                    out.append((("facet", nm), nm, ch))
        return out


#: a chart's ``id`` inside a batch: short and plain (brushes name it, answers echo it)
CHART_ID_PATTERN = r"^[A-Za-z0-9._:~-]{1,64}$"
ChartId = Annotated[str, Field(min_length=1, max_length=64, pattern=CHART_ID_PATTERN)]


class BatchChart(ChartRequest):
    """A chart inside a batch: ``source`` comes from the batch."""

    source: Text | None = Field(None, min_length=1, max_length=256)  # type: ignore[assignment]
    id: ChartId | None = Field(None, description="The chart's name in the batch (letters, "
                               "digits and . _ : ~ -, at most 64), unique among its charts; "
                               "its answer echoes it and the other charts' answers list it "
                               "in `brushes` when its brush filters them. Needed with "
                               "`brush`.", examples=["distance"])
    brush: list[Filter] = Field(
        default_factory=list, max_length=256,
        description="Brushing and linking (Becker & Cleveland 1987): filters in the `where` "
        "vocabulary, usually the range or set selected on this chart (gte/lt on a number or "
        "timestamp key, in on a category key). Every OTHER chart of the batch is filtered by "
        "them; this chart is not, so it keeps its whole distribution.",
        examples=[[{"column": "distance_km", "gte": 5, "lt": 20}]])

    stable: StrictBool = Field(
        True, description="Stable bins while brushing: the chart's data-driven bin layouts "
        "and top-N membership come from the rows under the batch's `where` and its own, not "
        "the other charts' brushes, so its bars keep their place and width while a brush "
        "moves (counts still follow the brushes). false: layouts from all its filters, as "
        "the chart asked alone.")

    @field_validator("brush", mode="before")
    @classmethod
    def _shallow_brush(cls, v: Any) -> Any:
        return shallow_filters(v, "/brush")


class BatchRequest(_Strict):
    """Several charts on one source, answered together (each answer or problem in order).
    Chart i is asked as a chart request whose ``where`` is the batch's ``where``, then the
    chart's own, then every other chart's ``brush`` in chart order (``planner.linked``)."""

    model_config = ConfigDict(extra="forbid", populate_by_name=True, json_schema_extra={
        "examples": [{
            "source": "deliveries", "tz": "Europe/Berlin",
            "where": [{"column": "delivered_at", "gte": "2026-01-01"}],
            "charts": [
                {"id": "distance", "channels": {"x": {"column": "distance_km",
                                                      "bin": {"bins": 30}},
                                                "y": {"agg": "count"}},
                 "brush": [{"column": "distance_km", "gte": 5, "lt": 20}]},
                {"id": "vehicles", "channels": {"x": {"column": "vehicle"},
                                                "y": {"agg": "count"}},
                 "brush": [{"column": "vehicle", "in": ["van", "bike"]}]},
                {"id": "by_day", "channels": {"x": {"column": "delivered_at", "trunc": "day"},
                                              "y": {"agg": "count"}}}]}]})

    source: Text = Field(min_length=1, max_length=256)
    tz: Text | None = Field(None, min_length=1, max_length=64,
                            description="The dashboard's IANA time zone: the tz of every chart "
                            "that does not name its own.")
    session: Session | None = Field(None, description="The dashboard's session: the session "
                                    "of every chart that does not name its own.")
    where: list[Filter] = Field(default_factory=list, max_length=256,
                                description="Filters every chart of the batch (ANDed with its "
                                "own `where` and the other charts' brushes).")
    charts: list[BatchChart] = Field(min_length=1, max_length=32)

    @field_validator("where", mode="before")
    @classmethod
    def _shallow(cls, v: Any) -> Any:
        return shallow_filters(v, "/where")
