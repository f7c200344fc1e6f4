"""Issue 12's multi-chart bench cases: several charts per user action, sent as one request.

* ``dashboard`` -- six charts under one shared ``where`` (a delivered_at window that moves on
  every request), one ``POST /v1/batch``; the limit is the six hand-written statements run
  one after another on the bench's own connection.
* ``linked``   -- four charts, each with its own brush (``/v1/batch`` with per-chart ``id`` /
  ``brush``, README "Linked charts", planner/linked.py), every brush moving on every step;
  the limit is the four hand-written statements, each chart filtered by the OTHER charts'
  brushes (Becker & Cleveland 1987). p50/p95 over the brush steps.
* ``drag``     -- cancellation: ``DRAG_MOVES`` moves of one brushed histogram sharing one
  ``session``, sent ``DRAG_GAP_MS`` apart, each on its own connection (README ``session``: a
  newer request of the session answers the older one 409 superseded); time from the first
  send to the last move's answer, against that last request alone.

Like bench/cases.py, the hand-written SQL returns the columns of the service's ``data`` in
the same order, so every chart's answer is compared with it (``check``; tests/test_bench_smoke.py
runs all three on a small table). Only request fields, table columns and HTTP are used.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Any, Callable

import orjson
import pyarrow as pa

import cases as single  # bench/cases.py: the brush window and the bin SQL
import runner

SRC = "deliveries"
DRAG_MOVES = 20
DRAG_GAP_MS = 20.0


# ---- the charts ------------------------------------------------------------------------
def _hist_w(col: str, w: float) -> dict[str, Any]:
    return {"channels": {"x": {"column": col, "bin": {"width": w, "origin": 0.0}}, "y": {"agg": "count"}}}


def _hist_n(col: str, n: int) -> dict[str, Any]:
    return {"channels": {"x": {"column": col, "bin": {"bins": n}}, "y": {"agg": "count"}}}


def _hist_n_sql(col: str, b: dict[str, Any], where: str) -> str:
    """The layout the service answered (``bins``; a person writing SQL by hand knows the
    extents too): floor((v - start) / width), the value on the closed upper edge (the
    stop, e.g. a width/origin layout whose maximum is a whole multiple of the width) in
    the last bin."""
    s, w, n = float(b["start"]), float(b["width"]), int(b["count"])
    return f"""
WITH g AS (SELECT {single._bin_sql(col, s, w, n, s + n * w)} AS k, count(*) AS n
           FROM deliveries WHERE {where} GROUP BY k)
SELECT {s!r} + k * {w!r} AS x_lo, {s!r} + (k + 1) * {w!r} AS x_hi, n AS count
FROM g ORDER BY k NULLS LAST"""


def _cat(col: str, agg: str = "count", of: str | None = None) -> dict[str, Any]:
    y = {"agg": agg} if of is None else {"agg": agg, "column": of}
    return {"channels": {"x": {"column": col}, "y": y}}


def _cat_sql(col: str, where: str, agg: str = "count", of: str | None = None) -> str:
    name, expr = ("count", "count(*)") if of is None else (f"{agg}_{of}", f"{agg}({of})")
    return f"""
SELECT {col}, {expr} AS {name} FROM deliveries WHERE {where}
GROUP BY {col} ORDER BY {col} NULLS LAST"""


def _and(*parts: str) -> str:
    return " AND ".join(p for p in parts if p) or "TRUE"


# ---- the multi-chart cases ---------------------------------------------------------------
@dataclass
class Multi:
    """A case answered by one batch (``dashboard``, ``linked``) or by a drag of requests."""

    name: str
    title: str
    kind: str                                            # "batch" or "drag"
    body: Callable[[int], dict[str, Any]]                # batch body / chart body number i
    hand: Callable[[list[dict[str, Any]], int], list[str]]  # per chart: its statement


def _dash_charts() -> list[tuple[dict[str, Any], Callable[[dict[str, Any], str], str]]]:
    return [
        (_hist_w("distance_km", 2.5), lambda m, w: _hist_n_sql("distance_km", m["bins"]["x"], w)),
        (_hist_n("weight_kg", 30), lambda m, w: _hist_n_sql("weight_kg", m["bins"]["x"], w)),
        (_cat("vehicle"), lambda m, w: _cat_sql("vehicle", w)),
        (_cat("depot"), lambda m, w: _cat_sql("depot", w)),
        (_cat("region", "avg", "delay_min"), lambda m, w: _cat_sql("region", w, "avg", "delay_min")),
        (_cat("vehicle", "sum", "weight_kg"), lambda m, w: _cat_sql("vehicle", w, "sum", "weight_kg")),
    ]


def _dash_body(i: int) -> dict[str, Any]:
    return {"source": SRC, "where": single._brush_where(i),
            "charts": [{"id": f"c{k}", **c} for k, (c, _) in enumerate(_dash_charts())]}


def _dash_hand(metas: list[dict[str, Any]], i: int) -> list[str]:
    w = single._brush_where_sql(i)
    return [h(m, w) for m, (_, h) in zip(metas, _dash_charts())]


# linked: four charts, four brushes; step i moves every brush
_VEHICLES = [["van"], ["van", "bike"], ["bike", "truck"], ["truck", "cargo bike", "van"]]
_DEPOTS = ["Brackenvale", "Emberfield", "Fennick Point", "Glimmerbank", "Harbour",
           "North Yard", "Quillmoor", "Tallow Cross"]


def _linked_brushes(i: int) -> list[tuple[list[dict[str, Any]], str]]:
    dlo, wlo = 1.0 + 0.25 * (i % 37), 0.5 + 0.1 * (i % 41)
    dhi, whi = dlo + 8.0 + 0.5 * (i % 5), wlo + 6.0 + 0.25 * (i % 3)
    veh = _VEHICLES[i % len(_VEHICLES)]
    dep = [_DEPOTS[(i + j) % len(_DEPOTS)] for j in range(3 + i % 3)]
    vsql = ", ".join(f"'{v}'" for v in veh)
    dsql = ", ".join(f"'{v}'" for v in dep)
    return [
        ([{"column": "distance_km", "gte": dlo, "lt": dhi}],
         f"distance_km >= {dlo!r} AND distance_km < {dhi!r}"),
        ([{"column": "weight_kg", "gte": wlo, "lt": whi}],
         f"weight_kg >= {wlo!r} AND weight_kg < {whi!r}"),
        ([{"column": "vehicle", "in": veh}], f"vehicle IN ({vsql})"),
        ([{"column": "depot", "in": dep}], f"depot IN ({dsql})"),
    ]


def _linked_charts():
    return [
        (_hist_w("distance_km", 2.5), lambda m, w: _hist_n_sql("distance_km", m["bins"]["x"], w)),
        (_hist_w("weight_kg", 1.0), lambda m, w: _hist_n_sql("weight_kg", m["bins"]["x"], w)),
        (_cat("vehicle"), lambda m, w: _cat_sql("vehicle", w)),
        (_cat("depot"), lambda m, w: _cat_sql("depot", w)),
    ]


def _linked_body(i: int) -> dict[str, Any]:
    brushes = _linked_brushes(i)
    charts = []
    for k, ((c, _), (b, _)) in enumerate(zip(_linked_charts(), brushes)):
        charts.append({"id": f"c{k}", **c, "brush": b})
    return {"source": SRC, "charts": charts}


def _linked_hand(metas: list[dict[str, Any]], i: int) -> list[str]:
    brushes = _linked_brushes(i)
    out = []
    for k, (m, (_, h)) in enumerate(zip(metas, _linked_charts())):
        out.append(h(m, _and(*(sql for j, (_, sql) in enumerate(brushes) if j != k))))
    return out


def _drag_body(i: int) -> dict[str, Any]:
    return {"source": SRC, **_hist_n("distance_km", 40), "where": single._brush_where(i)}


def _drag_hand(metas: list[dict[str, Any]], i: int) -> list[str]:
    return [_hist_n_sql("distance_km", metas[0]["bins"]["x"], single._brush_where_sql(i))]


def suite() -> list[Multi]:
    return [
        Multi("dashboard", "six charts, one shared time window moving per request (one batch)",
              "batch", _dash_body, _dash_hand),
        Multi("linked", "four linked charts, each with its own brush, all brushes moving",
              "batch", _linked_body, _linked_hand),
        Multi("drag", f"{DRAG_MOVES} moves of one session {DRAG_GAP_MS:.0f} ms apart "
              "(brushed 40-bin histogram)", "drag", _drag_body, _drag_hand),
    ]


# ---- running them ----------------------------------------------------------------------
def post(client: Any, path: str, body: dict[str, Any] | bytes) -> Any:
    return runner.post_chart(client, body, path=path)  # JSON, result cache bypassed


def batch(client: Any, body: dict[str, Any] | bytes) -> tuple[Any, list[dict[str, Any]]]:
    """POST /v1/batch; the answers (each a chart answer with ``id``) in chart order."""
    r = post(client, "/v1/batch", body)
    return r, (r.json()["results"] if r.status_code == 200 else [])


def same_rows(answer: dict[str, Any], hand: pa.Table) -> str | None:
    """None when a JSON chart answer's ``data`` equals the hand-written statement's rows."""
    if "data" not in answer:
        return f"no data: {str(answer)[:300]}"
    data = answer["data"]
    if list(data) != hand.column_names:
        return f"columns {list(data)} != {hand.column_names}"
    try:
        got = pa.table({k: data[k] for k in hand.column_names}).cast(hand.schema)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
        return f"cannot read the answer as the hand-written types: {e}"
    return runner.compare(got, hand)


def drag(client_factory: Callable[[], Any], case: Multi, start: int,
         moves: int = DRAG_MOVES, gap_ms: float = DRAG_GAP_MS,
         session: str = "bench-drag") -> dict[str, Any]:
    """Send ``moves`` chart requests (numbers start..start+moves-1) of one ``session``,
    ``gap_ms`` apart, each from its own thread and client; wait for every answer.

    Each client connects first (GET /healthz) and move k starts only once move k-1 is about
    to send, so the moves leave in order; on a loaded machine two may still arrive swapped,
    and then the newest ARRIVAL wins (the final move answers 409): ``last`` is the answered
    move with the highest number, ``reordered`` says whether that is not the final one."""
    out: list[Any] = [None] * moves
    done_at: list[float] = [0.0] * moves
    sent_at: list[float] = [0.0] * moves
    bodies = [orjson.dumps({**case.body(start + k), "session": session}) for k in range(moves)]
    clients = [client_factory() for _ in range(moves)]
    for c in clients:
        c.get("/healthz")
    ready = [threading.Event() for _ in range(moves)]

    def send(k: int) -> None:
        sent_at[k] = time.perf_counter()
        ready[k].set()
        out[k] = post(clients[k], "/v1/chart", bodies[k])
        done_at[k] = time.perf_counter()

    t0 = time.perf_counter()
    threads = []
    for k in range(moves):
        if k:
            ready[k - 1].wait()
        delay = t0 + k * gap_ms / 1000.0 - time.perf_counter()
        if delay > 0:
            time.sleep(delay)
        th = threading.Thread(target=send, args=(k,))
        th.start()
        threads.append(th)
    for th in threads:
        th.join()
    codes = [r.status_code for r in out]
    answered = [k for k in range(moves) if codes[k] == 200]
    k_last = answered[-1] if answered else moves - 1
    return {"codes": codes, "superseded": codes.count(409),
            "first_send_to_last_ms": (max(done_at) - t0) * 1000.0,
            "last_move_ms": (max(done_at) - sent_at[-1]) * 1000.0,
            "last": out[k_last], "last_index": start + k_last, "reordered": k_last != moves - 1,
            "clients": clients}  # the caller closes the clients


def check(case: Multi, client: Any, con: Any, i: int = 0) -> tuple[list[dict[str, Any]], list[str], str | None]:
    """The service's answers to request ``i`` of ``case`` (result cache bypassed), the
    hand-written statements, and None when every chart equals its statement's rows."""
    if case.kind == "batch":
        r, metas = batch(client, case.body(i))
    else:
        r = post(client, "/v1/chart", case.body(i))
        metas = [r.json()] if r.status_code == 200 else []
    if r.status_code != 200:
        return [], [], f"{r.status_code}: {r.text[:300]}"
    for k, m in enumerate(metas):
        if "data" not in m:
            return metas, [], f"chart {k}: {str(m)[:300]}"
    stmts = case.hand(metas, i)
    for k, (m, q) in enumerate(zip(metas, stmts)):
        diff = same_rows(m, con.sql(q).to_arrow_table())
        if diff is not None:
            return metas, stmts, f"chart {k}: {diff}"
    return metas, stmts, None


def pct(xs: list[float], q: float) -> float:
    """The q-quantile (linear, as numpy's default) of xs."""
    if not xs:
        return float("nan")
    s = sorted(xs)
    pos = (len(s) - 1) * q
    lo = int(pos)
    hi = min(lo + 1, len(s) - 1)
    return s[lo] + (s[hi] - s[lo]) * (pos - lo)

