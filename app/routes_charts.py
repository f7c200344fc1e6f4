"""``POST /v1/chart``, ``/v1/batch`` and ``/v1/sql``: charts, over the app's service.

Every route reads the service, catalog and result cache from ``request.app.state`` (set by
``app.main.create_app``). A JSON answer is cached as its encoded bytes; an Arrow, CSV or
Parquet answer as its table and metadata, encoded per answer (``cache`` and ``timing_ms``
are then true for each one).
"""

from __future__ import annotations

import time
from typing import Any, Callable

from fastapi import APIRouter, Query, Request
from starlette.responses import Response

from app import answers, auth, batch_sets, formats, observability, sessions
from app.answers import JSONResponse
from app.cache import Entry, canonical, open_json, source_version, stamp_json
from app.encode import ARROW_STREAM, arrow_stream, dumps
from app.engines import EngineError
from app.handlers import engine_problem
from app.problems import Problem, from_plan_error
from planner import linked
from planner.dialects import DIALECTS
from planner.errors import PlanError
from planner.model import BatchRequest, ChartRequest

router = APIRouter(tags=["charts"])


def _ms_since(t: float) -> float:
    return round((time.perf_counter() - t) * 1000.0, 3)


@router.post("/v1/chart", response_model=None,
             responses={**answers.ok(answers.ChartAnswer, "The chart's mark-ready table: JSON "
                                     "by default; Arrow IPC stream, CSV or Parquet by Accept",
                                     content=answers.CHART_FORMATS),
                        **answers.problem_responses(), **answers.problem_responses(409)})
def chart(req: ChartRequest, request: Request) -> Response:
    """Run a chart request and return the mark-ready table. The format follows
    ``Accept`` (app/formats.py): ``application/json`` (default),
    ``application/vnd.apache.arrow.stream``, ``text/csv`` or
    ``application/vnd.apache.parquet``; anything else is a 406 problem."""
    t_in = time.perf_counter()
    st = request.app.state
    fmt = formats.choose(request.headers.get("accept"))
    st.service.check_source(req.source)  # auth before any cached answer
    if req.session is not None:
        _claim(req.session)
        # without it, answers and plans are shared across sessions (cache key)
        req = req.model_copy(update={"session": None})
    lookup = may_reuse(request)
    if fmt == formats.JSON:
        return Response(json_answer(st, req, lookup, t_in), media_type="application/json",
                        headers={"Vary": "Accept"})

    def run() -> Entry:  # kept as (table, meta): the metadata is re-stamped per answer
        result = st.service.run(req)
        observability.record_chart(req.source, result.meta, result.timing)
        return ArrowEntry(result.table, dict(result.meta), dict(result.timing))

    entry, state = cached(st, req.source, canonical(req), "arrow", run, lookup)
    meta = dict(entry.meta)
    meta["cache"] = state
    meta["timing_ms"] = answer_timing(entry, state, t_in)
    if fmt == ARROW_STREAM:
        body = arrow_stream(entry.table, meta)
    elif fmt == formats.CSV:
        body = formats.csv_body(entry.table, {})  # zones: the Arrow timestamp types
    else:
        body = formats.parquet_body(entry.table, meta)
    return Response(body, media_type=formats.MEDIA_TYPES[fmt],
                    headers={"Vary": "Accept", **formats.table_headers(meta)})


@router.post("/v1/batch", response_model=None,
             responses={**answers.ok(answers.BatchAnswer, "One answer or problem per chart"),
                        **answers.problem_responses(), **answers.problem_responses(409)})
def batch(req: BatchRequest, request: Request) -> Response:
    """Several charts on one source. Chart i is answered as the chart request whose
    ``where`` is the batch's ``where``, its own and every other chart's ``brush``
    (``planner.linked``): its answer (cached like /v1/chart), or its problem document
    (pointer into the batch body); each result also has its ``id``, ``brushes`` (the ids
    of the charts whose brush filtered it) and ``stable`` (its layouts came from the rows
    before those brushes). The batch itself answers 200."""
    st = request.app.state
    st.service.check_source(req.source)
    lookup = may_reuse(request)
    linked.check_ids(req)  # 422 at /charts/<i>/id
    _claim(req.session, *(c.session or req.session for c in req.charts))  # each chart's own
    links = [linked.compose(req, i) for i in range(len(req.charts))]
    # charts under one composed filter: one statement (app/batch_sets.py), run on first use
    shared = batch_sets.shared_runs(st.service, {
        i: link.request for i, (chart, link) in enumerate(zip(req.charts, links))
        if chart.source is None or chart.source == req.source})
    results = []
    for i, chart in enumerate(req.charts):
        link = links[i]
        ends = (b"{" if chart.id is None else b'{"id":' + dumps(chart.id) + b",",
                b',"brushes":' + dumps(link.brushes) + b',"stable":'
                + (b"true" if link.stable else b"false") + b"}")
        if chart.source is not None and chart.source != req.source:
            results.append(_member(ends, dumps(Problem(
                422, "invalid-request", "Chart names another source",
                f"a batch runs on one source ({req.source!r})", f"/charts/{i}/source").body())))
            continue
        try:
            results.append(_member(ends, json_answer(st, link.request, lookup, time.perf_counter(),
                                                     shared.get(i))))
        except sessions.Stopped:
            raise  # superseded or the client left: the whole batch answers the problem
        except (PlanError, Problem, EngineError) as e:
            # this chart's own problem (422, 403, 503, 504, ...); the others still answer
            prob = (from_plan_error(e) if isinstance(e, PlanError)
                    else engine_problem(e) if isinstance(e, EngineError) else e)
            prob.ptr = link.batch_pointer(prob.ptr)
            results.append(_member(ends, dumps(prob.body())))
    work = sessions.current()
    if work is not None:
        work.check(req.source)  # stopped meanwhile (later charts may have been cache hits)
    # the answers are already encoded (and may come from the cache): splice the bytes
    head = dumps({"source": req.source})[:-1] + b',"results":['
    return Response(head + b",".join(results) + b"]}", media_type="application/json")


def _member(ends: tuple[bytes, bytes], body: bytes) -> bytes:
    """One result of a batch: the encoded answer or problem ``body`` (an object) between
    ``ends`` (its ``id`` first, its ``brushes`` and ``stable`` last)."""
    return ends[0] + body[1:-1] + ends[1]


@router.post("/v1/sql", response_model=None,
             responses={**answers.ok(answers.SqlAnswer, "The SQL for the dialect"),
                        **answers.problem_responses()})
def plan_sql(req: ChartRequest, request: Request,
             dialect: str | None = Query(None, description="Target dialect; default: the "
                                         "source's own engine. One of: " + ", ".join(sorted(DIALECTS)))
             ) -> Response:
    """Plan only: the SQL sluice would run, for ``dialect``."""
    observability.note_source(req.source)
    return JSONResponse(request.app.state.service.plan_sql(req, dialect))


def _claim(*names: str | None) -> None:
    """Claim each named session for this request's work (app.sessions): older requests of
    it stop."""
    work = sessions.current()
    if work is not None:
        for name in dict.fromkeys(names):
            work.claim(name)


def cached(st: Any, source: str, ident: bytes, fmt: str, run: Callable[[], Entry],
           lookup: bool) -> tuple[Entry, str]:
    """The cached answer for ``ident`` (a request's canonical bytes) in ``fmt`` on
    ``source``, by the source's data version and the API key's row condition on it
    (single-flight), or ``run()``'s. Chart, batch and column-profile answers all come
    through here."""
    cache = st.cache
    if not cache.enabled:
        return run(), "miss"
    with st.service.limiter.deadline(source):  # the data version is asked on time too
        version = source_version(st.catalog.config(source).engine, st.catalog.engine(source),
                                 cache.ttl_s)
        # keys with different row conditions never share an answer (app.auth rows)
        key = cache.key(ident, version, fmt, auth.rows_for(source))
        return cache.compute(key, source, run, lookup=lookup)


def may_reuse(request: Request) -> bool:
    """False when the client asks to recompute (``Cache-Control: no-cache``)."""
    return "no-cache" not in request.headers.get("cache-control", "").lower()


def answer_timing(entry: Entry, state: str, t_in: float) -> dict[str, float]:
    """``timing_ms`` of an answer: the run's own on a miss, the lookup's time on a hit."""
    return entry.timing if state == "miss" else {"lookup": _ms_since(t_in)}


def json_answer(st: Any, req: ChartRequest, lookup: bool, t_in: float,
                compute: Callable[[], Any] | None = None) -> bytes:
    """The JSON answer bytes, from the cache when it has them (chart and batch routes).
    ``compute``: how a miss gets the ``ChartResult`` (a batch's shared statement), else
    ``service.run``."""
    def run() -> Entry:
        result = compute() if compute is not None else st.service.run(req)
        observability.record_chart(req.source, result.meta, result.timing)
        t0 = time.perf_counter()
        payload = st.service.to_json(result, wire=True)  # decimals: exact digits, vectorised
        payload.pop("cache", None)
        payload.pop("timing_ms", None)
        body = open_json(payload)
        timing = dict(result.timing)
        timing["encode"] = _ms_since(t0)
        return Entry(body, "application/json", timing)

    entry, state = cached(st, req.source, canonical(req), "json", run, lookup)
    return stamp_json(entry.body, state, answer_timing(entry, state, t_in))


class ArrowEntry(Entry):
    """A cached Arrow answer: the table and its metadata, encoded per answer (cheap for the
    few hundred rows of a chart) so ``cache`` and ``timing_ms`` are true for each one."""

    def __init__(self, table: Any, meta: dict[str, Any], timing: dict[str, float]) -> None:
        super().__init__(b"", ARROW_STREAM, timing)
        self.table = table
        self.meta = meta

    @property
    def nbytes(self) -> int:
        return int(self.table.nbytes) + len(dumps(self.meta)) + 128
