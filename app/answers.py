"""Response models: the OpenAPI description of every answer (``/docs``, ``/openapi.json``).

The routes encode their answers themselves (orjson, cached bytes), so these models document
and do not validate; they allow extra members so that additions stay compatible. The shapes
are the ones app/service.py builds (DEVELOPERS.md *Response conventions*).
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field
from starlette.responses import Response

from app.encode import ARROW_STREAM, dumps
from app.formats import CSV, PARQUET
from app.problems import PROBLEM_JSON


class JSONResponse(Response):
    """A JSON answer encoded with orjson (``app.encode.dumps``: decimals keep their digits)."""

    media_type = "application/json"

    def render(self, content: Any) -> bytes:
        return dumps(content)


class _Open(BaseModel):
    model_config = ConfigDict(extra="allow")


class OutputColumn(_Open):
    name: str
    channel: str = Field(description="x, y, color, size, shape, opacity, by, row or col")
    role: Literal["key", "bin_lo", "bin_hi", "measure", "stack_base", "stack_top"]
    type: Literal["integer", "double", "decimal", "string", "boolean", "timestamp", "date",
                  "null"] | str
    precision: int | None = Field(None, description="decimals only")
    scale: int | None = Field(None, description="decimals only")


class BinLayout(_Open):
    start: float | str | None = Field(description="first edge (number, or RFC 3339 instant)")
    stop: float | str | None = Field(description="last edge (closed)")
    count: int
    method: str = Field(description="nice | width | sturges | scott | fd | sqrt | calendar")
    width: float | None = Field(None, description="numeric bins")
    step: str | None = Field(None, description="time bins: ISO 8601 duration (PT1H, P1D, P3M)")


class Stats(_Open):
    source_rows: int
    matched_rows: int = Field(description="rows after where")
    result_rows: int
    groups: int = Field(description="groups before limit")
    truncated: bool = Field(description="true when limit cut groups off")
    statements: int = Field(description="SQL statements run for this answer")
    outside_limits: dict[str, int] | None = Field(None, description="per binned channel: "
                                                  "rows outside its limits")
    cut_text: dict[str, int] | None = Field(None, description="per text column: values "
                                            "longer than 1000 characters, cut to 1000")


class Approximation(_Open):
    columns: list[str]
    method: str
    relative_standard_error: float


class ChartAnswer(_Open):
    """A chart's mark-ready table, columnar, with what a front end needs to draw it."""

    columns: list[OutputColumn]
    data: dict[str, list[Any]] = Field(description="column name -> values (timestamps RFC "
                                       "3339, decimals exact numbers, non-finite floats null)")
    bins: dict[str, BinLayout]
    domains: dict[str, list[Any]]
    stats: Stats
    sql: list[str]
    dialect: str
    approximate: bool | None = None
    approximation: Approximation | None = None
    reduced: dict[str, Any] | None = Field(None, description="M4 line reduction (Jugel et al. 2014)")
    cache: Literal["hit", "miss"]
    timing_ms: dict[str, float]

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "columns": [
            {"name": "x_lo", "channel": "x", "role": "bin_lo", "type": "double"},
            {"name": "x_hi", "channel": "x", "role": "bin_hi", "type": "double"},
            {"name": "count", "channel": "y", "role": "measure", "type": "integer"},
            {"name": "min_fee", "channel": "size", "role": "measure", "type": "decimal",
             "precision": 10, "scale": 2}],
        "data": {"x_lo": [0, 5, 10], "x_hi": [5, 10, 15], "count": [10, 12, 3],
                 "min_fee": [3.76, 4.1, 12.8]},
        "bins": {"x": {"start": 0, "stop": 15, "width": 5, "count": 3, "method": "nice"}},
        "domains": {"x_lo": [0, 10], "x_hi": [5, 15], "count": [3, 12], "x": [0, 15]},
        "stats": {"source_rows": 5000, "matched_rows": 25, "result_rows": 3, "groups": 3,
                  "truncated": False, "statements": 2},
        "sql": ["SELECT MIN(\"distance_km\") ...", "WITH \"_sluice_base\" AS (...) SELECT ..."],
        "dialect": "duckdb", "cache": "miss",
        "timing_ms": {"plan": 0.4, "execute": 3.1, "shape": 0.3, "encode": 0.1}}]})


class ProblemError(_Open):
    pointer: str = Field(description="RFC 6901 JSON Pointer into the request body")
    detail: str


class ProblemDetail(_Open):
    """RFC 9457 problem details; ``type`` resolves to a page describing the problem."""

    type: str = Field(description="/problems/<slug>")
    title: str
    status: int
    detail: str
    pointer: str | None = None
    errors: list[ProblemError] | None = None
    instance: str | None = None
    suggestions: list[str] | None = None
    id: str | None = Field(None, description="in a /v1/batch result: the chart's id, when it "
                           "has one")
    brushes: list[str] | None = Field(None, description="in a /v1/batch result: ids of the "
                                      "charts whose brush filters this chart (never its own)")
    stable: bool | None = Field(None, description="in a /v1/batch result: whether its layouts "
                                "would come from the rows before the brushes")

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "type": "/problems/unknown-column", "title": "Unknown column", "status": 422,
        "detail": "unknown column 'distanse_km' in source 'deliveries'; did you mean "
                  "'distance_km'?", "pointer": "/channels/x/column",
        "errors": [{"pointer": "/channels/x/column", "detail": "unknown column ..."}],
        "instance": "/v1/chart", "suggestions": ["distance_km"]}]})


class BatchChartAnswer(ChartAnswer):
    """One chart's answer in a batch: the answer of the chart asked alone with the batch's
    `where`, its own and the other charts' brushes, plus its `id` and `brushes`."""

    id: str | None = Field(None, description="the chart's id, when it has one")
    brushes: list[str] = Field(description="ids of the charts whose brush filtered this "
                               "chart, in chart order (never its own)")
    stable: bool = Field(False, description="true when the chart's data-driven bin layouts "
                         "and top-N membership came from the rows before the brushes (the "
                         "batch's where and its own; `stable` of the chart), so its bins may "
                         "extend beyond the brushed rows; its counts always follow them")

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "id": "distance",
        **ChartAnswer.model_config["json_schema_extra"]["examples"][0],  # type: ignore[index]
        "brushes": ["vehicles"], "stable": True}]})


class BatchAnswer(_Open):
    source: str
    results: list[BatchChartAnswer | ProblemDetail] = Field(
        description="one per chart, in request order: its answer or its problem (pointer "
                    "into the batch body: /charts/<i>/..., /where/<k>/... for the batch's "
                    "where, /charts/<j>/brush/<k>/... for another chart's brush)")

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "source": "deliveries", "results": [
            {"id": "vehicles", "type": "/problems/unknown-column", "title": "Unknown column",
             "status": 422, "detail": "unknown column 'nope' in source 'deliveries'",
             "pointer": "/charts/0/brush/0/column", "brushes": ["distance"],
             "stable": True}]}]})


class SqlAnswer(_Open):
    dialect: str
    sql: list[str] = Field(description="the extents statement (if any), then the main one")
    bins: dict[str, BinLayout]
    timing_ms: dict[str, float]

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "dialect": "postgres", "sql": ["SELECT ... GROUP BY ..."], "bins": {},
        "timing_ms": {"plan": 0.6}}]})


class SourceSummary(_Open):
    name: str
    engine: str
    table: str


class SourcesAnswer(_Open):
    sources: list[SourceSummary]

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "sources": [{"name": "deliveries", "engine": "duckdb", "table": "deliveries"}]}]})


class SourceColumn(_Open):
    name: str
    type: str = Field(description="the engine's own type name")
    kind: str = Field(description="integer | double | decimal | string | boolean | "
                      "timestamp | timestamptz | date | other")


class ComputedColumn(SourceColumn):
    expr: str = Field(description="the SQL expression of [sources.X.columns]; the type is the "
                      "one the engine answers for it")


class DimensionColumn(SourceColumn):
    dimension: str = Field(description="the dimension it comes from; requested by its name")


class SourceDimension(_Open):
    name: str
    table: str
    fact_column: str
    key: str
    unique: bool = Field(description="false: the key has a value on several rows, and "
                         "requests that use the dimension are refused (422)")


class SourceMeasure(_Open):
    name: str = Field(description='use as {"measure": name} on a measure channel')
    expression: str = Field(description="the aggregate expression of the config")
    kind: str | None = Field(description="the kind of its answer (integer | double | decimal "
                             "| ...); null when it does not fit the source (see problem)")
    problem: str | None = Field(None, description="why the measure cannot be used on this "
                                "source (a config mistake), if it cannot")


class SourceDetail(_Open):
    name: str
    engine: str
    table: str
    columns: list[SourceColumn] = Field(description="the table's own columns")
    computed: list[ComputedColumn] = Field(default_factory=list)
    dimensions: list[SourceDimension] = Field(default_factory=list)
    dimension_columns: list[DimensionColumn] = Field(default_factory=list)
    measures: list[SourceMeasure] = Field(default_factory=list, description="named measures "
                                          "(config [sources.NAME.measures])")
    row_count: int

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "name": "deliveries", "engine": "duckdb", "table": "deliveries",
        "columns": [{"name": "fee", "type": "DECIMAL(10,2)", "kind": "decimal"}],
        "computed": [{"name": "fee_per_km", "expr": "fee / NULLIF(distance_km, 0)",
                      "type": "DOUBLE", "kind": "double"}],
        "dimensions": [{"name": "depots", "table": "depots", "fact_column": "depot",
                        "key": "depot", "unique": True}],
        "dimension_columns": [{"name": "depots.city", "dimension": "depots",
                               "type": "VARCHAR", "kind": "string"}],
        "measures": [{"name": "revenue", "expression": "sum(fee)", "kind": "decimal"}],
        "row_count": 2000000}]})


class Health(_Open):
    status: Literal["ok"]

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{"status": "ok"}]})


class Readiness(_Open):
    ready: bool
    sources: dict[str, dict[str, Any]]

    model_config = ConfigDict(extra="allow", json_schema_extra={"examples": [{
        "ready": True, "sources": {"deliveries": {"ready": True, "engine": "duckdb",
                                                  "row_count": 2000000, "columns": 14,
                                                  "check_ms": 0.8}}}]})


def problem_responses(*codes: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries for problem answers (problem+json)."""
    desc = {400: "Malformed request", 401: "No or bad API key (when keys are configured)",
            403: "The API key is not granted this source", 404: "Unknown source",
            406: "The Accept header names no format this route answers in",
            409: "A newer request with the same session replaced this one (its statements "
                 "were cancelled; problem type superseded)",
            413: "Body too large",
            415: "The body is not sent as application/json",
            422: "The request cannot be planned (the pointer names the field)",
            502: "The engine rejected the statement sluice generated",
            503: "The source's engine is unavailable, or busy (Retry-After)",
            504: "The statement ran past the source's statement_timeout_ms"}
    schema = {"$ref": "#/components/schemas/ProblemDetail"}
    return {c: {"description": desc[c], "content": {PROBLEM_JSON: {"schema": schema}}}
            for c in (codes or tuple(c for c in desc if c != 409))}  # 409: session routes


def ok(model: type[BaseModel], description: str, **more: Any) -> dict[int | str, dict[str, Any]]:
    return {200: {"model": model, "description": description, **more}}


CHART_FORMATS = {
    ARROW_STREAM: {"schema": {"type": "string", "format": "binary",
                              "description": "Arrow IPC stream; the JSON answer's metadata in "
                              "the schema key `sluice`, channel and role per field"}},
    CSV: {"schema": {"type": "string"}, "example": "x_lo,x_hi,count\r\n0,5,10\r\n5,10,12\r\n"},
    PARQUET: {"schema": {"type": "string", "format": "binary"}},
}
