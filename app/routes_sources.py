"""``GET /v1/sources``, ``/v1/sources/{name}`` and ``/v1/sources/{name}/columns/{column}``:
the sources a key may read, one source's columns and row count, and a column profile for
filter widgets.

A column profile's statement comes from ``planner.profile`` (one per profile); it runs here through the
service's limiter (statement timeout, ``max_concurrent``) and the answer is kept in the
result cache by (source, column, top) and the source's data version, like a chart answer
(and, like it, by the API key's row condition: only the rows the key may read are profiled).
Access follows ``GET /v1/sources/{name}``: 403 for a source the key does not grant (before
existence), 404 for an unknown source or column with the nearest names.
"""

from __future__ import annotations

import time
from typing import Any

import orjson
import pyarrow as pa
from fastapi import APIRouter, Query, Request
from pydantic import BaseModel, Field
from starlette.responses import Response

from app import answers, auth, observability
from app.answers import JSONResponse
from app.cache import Entry, open_json, stamp_json
from app.catalog import UnknownSource
from app.encode import column_values, normalize_column
from app.engines.arrow import conform_column, declared_type
from app.problems import PROBLEM_JSON, Problem
from app.routes_charts import answer_timing, cached, may_reuse
from planner import profile as prof
from planner.dialects import get_dialect
from planner.errors import PlanError, nearest
from planner.measure_sql import answer_kind, compile_measure

router = APIRouter(tags=["sources"])

Scalar = bool | int | float | str | None


class TopValue(BaseModel):
    value: Scalar = Field(description="A value of the column (never NULL: see null_count)")
    count: int = Field(description="Rows holding this value")


class TopValues(BaseModel):
    limit: int = Field(description="At most this many values were asked for (`top`)")
    values: list[TopValue] = Field(description="Most frequent first; ties by value ascending")
    complete: bool = Field(description="True when every distinct non-NULL value is listed")
    other_rows: int = Field(description="Non-NULL rows whose value is not listed")


class Distinct(BaseModel):
    approximate: bool
    method: str = Field(description="How distinct_count was computed, e.g. `exact (GROUP BY)`, "
                        "`hyperloglog`, `exact (COUNT DISTINCT)`")
    relative_standard_error: float | None = None


class ColumnProfile(BaseModel):
    source: str
    column: str
    kind: str = Field(description="integer | double | decimal | string | boolean | timestamp | "
                      "timestamptz | date")
    type: str = Field(description="The engine's own type name")
    row_count: int
    null_count: int
    min: Scalar = Field(None, description="Smallest non-NULL value (timestamps RFC 3339 UTC, "
                        "dates ISO 8601, text in the column's collation); absent for booleans")
    max: Scalar = None
    distinct_count: int = Field(description="Distinct non-NULL values (see `distinct`)")
    distinct: Distinct
    top_values: TopValues | None = Field(description="Most frequent values (text and boolean "
                                         "columns by default; `top` asks for them on any column)")
    cut_text: bool | None = Field(None, description="true when a text value, min or max "
                                  "was longer than 1000 characters and is cut to them")
    sql: str
    dialect: str
    cache: str = Field(description="hit | miss")
    timing_ms: dict[str, float]


@router.get("/v1/sources", response_model=None,
            responses={**answers.ok(answers.SourcesAnswer, "The sources the key may read"),
                       **answers.problem_responses(401)})
def sources(request: Request) -> Response:
    """Configured sources (only those the API key grants)."""
    catalog = request.app.state.catalog
    out = []
    for name in auth.filter_names(catalog.names()):  # only the sources the key grants
        cfg = catalog.config(name)
        out.append({"name": name, "engine": cfg.engine, "table": cfg.table})
    return JSONResponse({"sources": out})


@router.get("/v1/sources/{name}", response_model=None,
            responses={**answers.ok(answers.SourceDetail, "Columns, kinds and row count"),
                       **answers.problem_responses(401, 403, 404, 503)})
def source(name: str, request: Request) -> Response:
    """A source's introspected columns (engine type and kind), its computed columns (with
    their expression) and dimension columns ([[sources.X.dimensions]]), and its row count."""
    st = request.app.state
    cfg = _config(st.catalog, name, ptr="")  # its 404 carries pointer "" (a column's: none)
    with st.service.limiter.deadline(name):  # a frozen warehouse answers on time
        entry = st.service.entry(name)  # row_count: the rows this key may read
    schema = entry.schema
    col = lambda c: {"name": c.name, "type": c.sql_type, "kind": c.kind}  # noqa: E731
    dims = [{"name": d.name, "table": ".".join(d.table), "fact_column": d.fact_column,
             "key": d.key, "unique": d.duplicate is None} for d in schema.dimensions]
    dim_cols = [{**col(schema.columns[d.column_name(c)]), "dimension": d.name}
                for d in schema.dimensions for c in d.columns]
    computed = [{**col(schema.columns[n]), "expr": text} for n, text in schema.computed.items()]
    return JSONResponse({"name": name, "engine": cfg.engine, "table": cfg.table,
                         "columns": [col(c) for c in schema.physical().columns.values()],
                         "computed": computed, "dimensions": dims,
                         "dimension_columns": dim_cols,
                         "measures": _measures(entry.schema, st.catalog.engine(name).dialect),
                         "row_count": entry.row_count})


def _measures(schema, dialect_name: str) -> list[dict]:
    """The source's named measures, each checked against its schema (planner/measure_sql.py)."""
    out = []
    for mname, text in schema.measures.items():
        try:
            nm = compile_measure(mname, text, schema, get_dialect(dialect_name))
            out.append({"name": mname, "expression": text, "kind": answer_kind(nm)})
        except PlanError as e:
            out.append({"name": mname, "expression": text, "kind": None, "problem": e.detail})
    return out



def _config(catalog: Any, name: str, ptr: str | None = None) -> Any:
    """The source's config: 403 for a source the key does not grant, before 404 for an
    unknown one (names cannot be probed), with the nearest granted names."""
    auth.require(name, None)
    try:
        return catalog.config(name)
    except UnknownSource as e:
        raise Problem(404, "unknown-source", "Unknown source", f"unknown source {name!r}", ptr,
                      suggestions=nearest(name, auth.filter_names(e.known))) from None


def _problems() -> dict[int | str, dict[str, Any]]:
    desc = {401: "No or bad API key (when keys are configured)",
            403: "The API key is not granted this source",
            404: "Unknown source or column (suggestions name the nearest)",
            422: "Bad `top`, or a column type that cannot be profiled",
            503: "The source's engine is unavailable, or busy (Retry-After)",
            504: "The statement ran past the source's statement_timeout_ms"}
    return {code: {"description": d, "content": {PROBLEM_JSON: {}}} for code, d in desc.items()}


@router.get("/v1/sources/{name}/columns/{column}", response_model=ColumnProfile,
            responses=_problems())
def column_profile(name: str, column: str, request: Request,
                   top: int | None = Query(None, ge=0, le=prof.MAX_TOP, description=(
                       "How many most frequent values to return (0: none). Default: "
                       f"{prof.DEFAULT_TOP} for text and boolean columns, 0 otherwise."))
                   ) -> Response:
    """Profile one column for a filter widget: kind, NULL count, min/max, distinct count
    (exact when the column is grouped for its frequent values, otherwise the engine's
    approximate count, with the method) and the most frequent values with their counts."""
    t_in = time.perf_counter()
    st = request.app.state
    catalog, service = st.catalog, st.service
    _config(catalog, name)  # 403, then 404
    observability.note_source(name)
    engine = catalog.engine(name)
    entry = service.entry(name)  # with the key's row condition (app.auth)
    try:
        col = prof.resolve(entry.schema, column)
        top = prof.default_top(col) if top is None else top

        def run() -> Entry:
            plan = prof.plan_profile(entry.schema, col.name, get_dialect(engine.dialect), top)
            with service.limiter.admit(name):
                t0 = time.perf_counter()
                raw = service.limiter.guard(name, engine).execute(plan.sql)
                ms = round((time.perf_counter() - t0) * 1000.0, 3)
            observability.record_chart(name, {}, {"execute": ms})  # engine seconds metric
            body = open_json({"source": name, "column": col.name} | shape(plan, raw))
            return Entry(body, "application/json", {"execute": ms})

        got, state = cached(st, name, orjson.dumps(("profile", name, col.name, top)),
                            "profile", run, may_reuse(request))
        return Response(stamp_json(got.body, state, answer_timing(got, state, t_in)),
                        media_type="application/json")
    except PlanError as e:  # no request body: no pointer, the path names the column
        raise Problem(e.status, e.slug, e.title, e.detail, suggestions=e.suggestions) from None


def _value(arr: pa.ChunkedArray, plan: prof.ProfilePlan, i: int = 0) -> Any:
    """Value ``i`` of a result column, typed by the column's declared type and written as in
    a chart answer (the same conform + JSON path); a decimal becomes the double nearest to it."""
    target = declared_type(plan.column, get_dialect(plan.dialect).sqlglot or None)
    one = conform_column(arr.slice(i, 1), target)
    if pa.types.is_decimal(one.type):
        v = one[0].as_py()
        return None if v is None else float(v)
    return column_values(normalize_column(one))[0]


def shape(plan: prof.ProfilePlan, raw: pa.Table) -> dict[str, Any]:
    kind = plan.column.kind

    def num(name: str, i: int = 0) -> int:
        return int(raw.column(name)[i].as_py() or 0) if raw.num_rows else 0

    out: dict[str, Any] = {"kind": kind, "type": plan.column.sql_type}
    if plan.top == 0:
        rows = num(prof.ROWS)
        out.update(row_count=rows, null_count=rows - num(prof.NON_NULL))
    else:
        out.update(row_count=num(prof.ROWS), null_count=num(prof.NULLS))
    if plan.has_range and raw.num_rows:
        out["min"] = _value(raw.column(prof.LO), plan)
        out["max"] = _value(raw.column(prof.HI), plan)
    else:
        out["min"] = out["max"] = None
    out["distinct_count"] = num(prof.DISTINCT)
    out["distinct"] = {"approximate": plan.approximate, "method": plan.distinct_method,
                       "relative_standard_error": plan.distinct_error}
    if plan.top == 0:
        out["top_values"] = None
    else:
        values = []
        vals = raw.column(prof.VALUE)
        counts = raw.column(prof.COUNT)
        for i in range(raw.num_rows):
            v = _value(vals, plan, i)
            if v is not None:
                values.append({"value": v, "count": int(counts[i].as_py())})
        listed = sum(x["count"] for x in values)
        out["top_values"] = {"limit": plan.top, "values": values,
                             "complete": len(values) == out["distinct_count"],
                             "other_rows": out["row_count"] - out["null_count"] - listed}
    if prof.CUT in raw.column_names and any(raw.column(prof.CUT).to_pylist()):
        out["cut_text"] = True  # some value, min or max was cut to 1000 characters
    out.update(sql=plan.sql, dialect=plan.dialect)
    return out
