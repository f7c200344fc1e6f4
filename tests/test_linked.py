"""Linked charts in one ``/v1/batch``: brushing and linking (Becker & Cleveland, "Brushing
scatterplots", Technometrics 29(2), 1987): every chart is filtered by the batch's ``where``
and by every OTHER chart's ``brush``, never by its own.

References outside the project, per chart and per engine (DuckDB, PostgreSQL, MariaDB,
SQLite, ClickHouse; the rows of tests/engine_fixtures.py, loaded into each):

(a) the same chart sent alone to ``/v1/chart`` with the composed ``where`` (the engine runs
    that request on its own; the whole answer must be the same: data, bins, stats, domains);
(b) pandas on the fixture rows, filtered in pandas by the shared ``where`` and the other
    charts' brushes (SQL's three-valued logic: a NULL in a compared column does not match):
    counts per 5-wide bin as ``numpy.histogram`` counts them (last bin closed), counts and
    sums per UTC month, top-4 categories by count (ties by value) with the rest folded into
    "(other)" and NULL kept apart (the rule DEVELOPERS.md states), mean per group.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]

SHARED = [{"column": "n", "gte": -40}]
X_BRUSH = [{"column": "x", "gte": -10, "lt": 15}]
TS_BRUSH = [{"column": "ts", "gte": "2026-03-01T00:00:00Z", "lt": "2026-07-01T00:00:00Z"}]
CAT_BRUSH = [{"column": "cat", "in": ["alpha", "beta", "Zürich"]}]


def linked_batch(source: str) -> dict:
    return {"source": source, "tz": "UTC", "where": copy.deepcopy(SHARED), "charts": [
        {"id": "x", "channels": {"x": {"column": "x", "bin": {"width": 5, "origin": 0}},
                                 "y": {"agg": "count"}}, "brush": copy.deepcopy(X_BRUSH)},
        {"id": "month", "channels": {"x": {"column": "ts", "trunc": "month"},
                                     "y": {"agg": "count"}, "size": {"agg": "sum", "column": "n"}},
         "brush": copy.deepcopy(TS_BRUSH)},
        {"id": "cat", "channels": {"x": {"column": "cat", "top": 4}, "y": {"agg": "count"}},
         "brush": copy.deepcopy(CAT_BRUSH)},
        {"id": "grp", "channels": {"x": {"column": "grp"}, "y": {"agg": "avg", "column": "x"}}},
    ]}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("linked")
    sources = fx.five_engines(root)
    app = create_app(parse_settings({"sources": sources, "cache": fx.STEADY_CACHE},
                                    "<linked charts>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def fixture_frame() -> pd.DataFrame:
    """The fixture rows in pandas, nullable number types, ``ts`` as UTC instants."""
    df = pd.DataFrame(fx.make_rows())
    return df.assign(n=df["n"].astype("Int64"), x=df["x"].astype("Float64"),
                     ts=pd.to_datetime(df["ts"], utc=True))


@pytest.fixture(scope="module")
def frame():
    return fixture_frame()


def _mask(df: pd.DataFrame, which: set[str]) -> pd.Series:
    """The rows the shared where and the brushes in ``which`` keep (NULL never matches)."""
    m = (df["n"] >= -40).fillna(False)
    if "x" in which:
        m &= ((df["x"] >= -10) & (df["x"] < 15)).fillna(False)
    if "month" in which:
        m &= (df["ts"] >= pd.Timestamp("2026-03-01", tz="UTC")) & \
             (df["ts"] < pd.Timestamp("2026-07-01", tz="UTC"))
    if "cat" in which:
        m &= df["cat"].isin(["alpha", "beta", "Zürich"])
    return m.astype(bool)


def _null(v):
    return None if v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v)) else v


def check_x(got: dict, sub: pd.DataFrame, layout: pd.DataFrame | None = None) -> None:
    """``layout``: the rows the bin range comes from (default ``sub``, the counted rows)."""
    vals = sub["x"].dropna().to_numpy(dtype=float)
    span = (sub if layout is None else layout)["x"].dropna().to_numpy(dtype=float)
    lo, hi = math.floor(span.min() / 5) * 5, math.ceil(span.max() / 5) * 5
    edges = np.arange(lo, hi + 5, 5.0)[: int((hi - lo) / 5) + 1]
    counts, _ = np.histogram(vals, bins=edges)  # reference: numpy.histogram, last bin closed
    want = {(float(a), float(a + 5)): int(c) for a, c in zip(edges[:-1], counts) if c}
    want[(None, None)] = int(sub["x"].isna().sum())
    data = got["data"]
    assert dict(zip(zip(data["x_lo"], data["x_hi"]), data["count"])) == want
    assert got["bins"]["x"]["start"] == lo and got["bins"]["x"]["stop"] == hi


def check_month(got: dict, sub: pd.DataFrame) -> None:
    ts = sub["ts"].dt.tz_convert(None).dt.to_period("M").dt.start_time
    g = sub.assign(m=ts).groupby("m", dropna=False)
    want = {_null(k): (int(c), _null(s)) for (k, c), s in
            zip(g.size().items(), g["n"].sum(min_count=1))}
    data = got["data"]
    keys = [None if v is None else pd.Timestamp(v).tz_convert(None) for v in data["ts"]]
    got_map = {k: (c, s) for k, c, s in zip(keys, data["count"], data["sum_n"])}
    want = {(None if k is pd.NaT else k): (c, None if s is None else int(s))
            for k, (c, s) in want.items()}
    assert got_map == want


def check_cat(got: dict, sub: pd.DataFrame, layout: pd.DataFrame | None = None) -> None:
    """``layout``: the rows the top 4 are ranked on (default ``sub``, the counted rows)."""
    ranked = sorted((sub if layout is None else layout)["cat"].value_counts(dropna=True).items(),
                    key=lambda kv: (-kv[1], kv[0]))
    top = [k for k, _ in ranked[:4]]
    counts = sub["cat"].value_counts(dropna=True)
    want = {k: int(counts[k]) for k in top if k in counts.index}
    rest = int(counts[[k for k in counts.index if k not in top]].sum())
    if rest:
        want["(other)"] = rest
    if sub["cat"].isna().any():
        want[None] = int(sub["cat"].isna().sum())
    assert dict(zip(got["data"]["cat"], got["data"]["count"])) == want


def check_grp(got: dict, sub: pd.DataFrame) -> None:
    means = sub.groupby(sub["grp"].rename("g"), dropna=False)["x"].mean()
    want = {_null(k): _null(v) for k, v in means.items()}
    got_map = dict(zip(got["data"]["grp"], got["data"]["avg_x"]))
    assert set(got_map) == set(want)
    for k, v in want.items():
        assert (got_map[k] is None and v is None) or math.isclose(got_map[k], v, rel_tol=1e-9), k


CHECKS = {"x": check_x, "month": check_month, "cat": check_cat, "grp": check_grp}
BRUSHED = {"x", "month", "cat"}


def check(name: str, got: dict, sub: pd.DataFrame, layout: pd.DataFrame | None) -> None:
    if name in ("x", "cat"):  # the data-driven layouts: bin range, top-N membership
        CHECKS[name](got, sub, layout)
    else:
        CHECKS[name](got, sub)


def _answer(res: dict) -> dict:
    return {k: v for k, v in res.items()
            if k not in ("cache", "timing_ms", "id", "brushes", "stable")}


def _composed(body: dict, i: int) -> dict:
    """Chart i sent alone: the batch's where, its own, the other charts' brushes in order;
    with ``stable`` (default true) and brushes, the shared and its own filters decide the
    layouts (``layout_filters``)."""
    chart = body["charts"][i]
    where = body.get("where", []) + chart.get("where", [])
    own = len(where)
    for j, other in enumerate(body["charts"]):
        if j != i:
            where += other.get("brush", [])
    alone = {k: v for k, v in chart.items() if k not in ("id", "brush", "where", "stable")}
    if chart.get("stable", True) and len(where) > own:
        alone["layout_filters"] = own
    return {"source": body["source"], "tz": body["tz"], **alone, "where": where}


@pytest.mark.parametrize("engine", ENGINES)
def test_linked_batch_matches_charts_alone_and_pandas(client, frame, engine):
    body = linked_batch(engine)
    r = client.post("/v1/batch", json=body)
    assert r.status_code == 200, r.text
    results = r.json()["results"]
    assert [res["id"] for res in results] == ["x", "month", "cat", "grp"]
    for i, res in enumerate(results):
        assert "status" not in res, res
        me = res["id"]
        assert res["brushes"] == [c for c in ("x", "month", "cat") if c != me]
        assert res["stable"] is True
        # (a) the chart alone with the composed where: the same answer (from the cache)
        alone = client.post("/v1/chart", json=_composed(body, i))
        assert alone.status_code == 200, alone.text
        assert alone.json()["cache"] == "hit"
        assert _answer(alone.json()) == _answer(res)
        # (b) pandas on the rows the shared where and the OTHER charts' brushes keep; the
        # bin range and the top 4 from the rows of the shared where (stable bins)
        sub = frame[_mask(frame, BRUSHED - {me})]
        assert res["stats"]["matched_rows"] == len(sub)
        check(me, res, sub, frame[_mask(frame, set())])
    # the brushes filter: the unbrushed chart sees fewer rows than the shared where keeps
    assert results[3]["stats"]["matched_rows"] < int(_mask(frame, set()).sum())


def test_own_brush_is_not_applied(client, frame):
    """A batch of one brushed chart answers the whole distribution (reference: pandas on
    the rows of the shared where only), and says it applied no brush."""
    body = linked_batch("duckdb")
    body["charts"] = body["charts"][:1]
    res = client.post("/v1/batch", json=body).json()["results"][0]
    assert res["brushes"] == [] and res["id"] == "x"
    sub = frame[_mask(frame, set())]
    assert res["stats"]["matched_rows"] == len(sub)
    check_x(res, sub)


def test_batch_without_brushes_is_a_plain_batch(client, frame):
    """No ids, no brushes: each answer is the chart's own (as /v1/chart answers it)."""
    charts = [{"channels": c["channels"]} for c in linked_batch("sqlite")["charts"]]
    r = client.post("/v1/batch", json={"source": "sqlite", "tz": "UTC", "charts": charts})
    assert r.status_code == 200, r.text
    for chart, res, name in zip(charts, r.json()["results"], CHECKS):
        assert res["brushes"] == [] and "id" not in res
        alone = client.post("/v1/chart", json={"source": "sqlite", "tz": "UTC", **chart}).json()
        assert _answer(alone) == _answer(res)
        sub = frame[pd.Series(True, index=frame.index)]
        CHECKS[name](res, sub)  # pandas on every row


@pytest.mark.parametrize("engine", ["duckdb", "postgres", "mysql", "sqlite"])  # bound values
def test_moved_brush_reuses_the_plans(client, frame, engine):
    """Dragging the range brushes (new bound values) plans nothing new: the service's plan
    cache holds as many prepared plans as before; the answers follow the moved brushes
    (reference: pandas). A new category set of the same padded length (planner/values.py
    ``list_form``: a short list is one parameter per value, padded to a power of two) plans
    nothing new either."""
    client.post("/v1/batch", json=linked_batch(engine))
    plans = client.app.state.service._plans._prepared
    before = len(plans)
    body = linked_batch(engine)
    body["charts"][0]["brush"] = [{"column": "x", "gte": 0, "lt": 30}]
    body["charts"][1]["brush"] = [{"column": "ts", "gte": "2026-05-01T00:00:00Z",
                                   "lt": "2026-09-15T12:00:00Z"}]
    res = client.post("/v1/batch", json=body).json()["results"]
    assert len(plans) == before
    m = (frame["n"] >= -40).fillna(False) & ((frame["x"] >= 0) & (frame["x"] < 30)).fillna(False)
    m &= (frame["ts"] >= pd.Timestamp("2026-05-01", tz="UTC")) & \
         (frame["ts"] < pd.Timestamp("2026-09-15T12:00", tz="UTC"))
    m &= frame["cat"].isin(["alpha", "beta", "Zürich"])
    sub = frame[m.astype(bool)]
    assert res[3]["stats"]["matched_rows"] == len(sub)
    check_grp(res[3], sub)

    cats = ["gamma", "東京", "naïve", "Alpha"]  # 3 values -> 4: the same padded length
    body["charts"][2]["brush"] = [{"column": "cat", "in": cats}]
    res = client.post("/v1/batch", json=body).json()["results"]
    assert len(plans) == before
    assert all("?" in q for q in res[3]["sql"][-1:])
    m2 = (frame["n"] >= -40).fillna(False) & ((frame["x"] >= 0) & (frame["x"] < 30)).fillna(False)
    m2 &= (frame["ts"] >= pd.Timestamp("2026-05-01", tz="UTC")) & \
          (frame["ts"] < pd.Timestamp("2026-09-15T12:00", tz="UTC"))
    m2 &= frame["cat"].isin(cats)
    sub = frame[m2.astype(bool)]
    assert res[3]["stats"]["matched_rows"] == len(sub) > 0
    check_grp(res[3], sub)


# --- stable bins while brushing (BatchChart.stable) --------------------------------------

#: brush steps on n (a chart of its own): at -5..5 and 30..41 the top 4 of the brushed rows
#: differ from the top 4 under the shared where (pandas on the fixture rows)
N_STEPS = [(-40, 0), (-5, 5), (10, 20), (30, 41)]


def stable_batch(source: str, lo: int, hi: int, stable: bool = True) -> dict:
    charts = [
        {"id": "hist", "channels": {"x": {"column": "x", "bin": {"rule": "fd"}},
                                    "y": {"agg": "count"}}},
        {"id": "cat", "channels": {"x": {"column": "cat", "top": 4}, "y": {"agg": "count"}}},
        {"id": "day", "channels": {"x": {"column": "ts", "bin": {"bins": 12}},
                                   "y": {"agg": "count"}}},
        {"id": "n", "channels": {"x": {"column": "grp"}, "y": {"agg": "count"}},
         "brush": [{"column": "n", "gte": lo, "lt": hi}]}]
    if not stable:
        for c in charts:
            c["stable"] = False
    return {"source": source, "tz": "UTC", "where": copy.deepcopy(SHARED), "charts": charts}


def check_fd(got: dict, sub: pd.DataFrame, layout: pd.DataFrame) -> np.ndarray:
    """Freedman-Diaconis edges of ``layout``'s x (numpy.histogram_bin_edges, the reference
    of tests/test_reference_bins.py), ``sub``'s counts in them (numpy.histogram)."""
    edges = np.histogram_bin_edges(layout["x"].dropna().to_numpy(dtype=float), bins="fd")
    counts, _ = np.histogram(sub["x"].dropna().to_numpy(dtype=float), bins=edges)
    b = got["bins"]["x"]
    assert b["count"] == len(edges) - 1 and b["method"] == "fd"
    assert math.isclose(b["start"], edges[0], rel_tol=1e-9)
    assert math.isclose(b["stop"], edges[-1], rel_tol=1e-9)
    data = got["data"]
    have = {}
    for lo, c in zip(data["x_lo"], data["count"]):
        if lo is not None:
            have[int(np.argmin(np.abs(edges[:-1] - lo)))] = c
    assert have == {k: int(c) for k, c in enumerate(counts) if c}
    return edges


@pytest.mark.parametrize("engine", ENGINES)
def test_stable_bins_while_the_brush_moves(client, frame, engine):
    """Four positions of a brush on another chart: each chart's data-driven layout (the
    Freedman-Diaconis edges, the top 4, the nice time bins) stays the layout of the rows
    under the shared where while its counts follow the brush. References: numpy
    (histogram_bin_edges 'fd', histogram) and pandas on the fixture rows; the time layout
    is the engine's own for the chart alone under the shared where; each answer equals the
    chart alone with ``layout_filters`` (the engine again). The extents statement runs for
    the first position only: it reads no brush (``stats.statements``)."""
    layout = frame[_mask(frame, set())]
    unbrushed = client.post("/v1/chart", json={
        "source": engine, "tz": "UTC", "where": SHARED,
        "channels": stable_batch(engine, 0, 1)["charts"][2]["channels"]}).json()
    moved_fd = moved_top = False
    for lo, hi in N_STEPS:
        body = stable_batch(engine, lo, hi)
        res = client.post("/v1/batch", json=body).json()["results"]
        sub = layout[((layout["n"] >= lo) & (layout["n"] < hi)).fillna(False)]
        for i in range(3):
            assert "status" not in res[i], res[i]
            assert res[i]["brushes"] == ["n"] and res[i]["stable"] is True
            assert res[i]["stats"]["matched_rows"] == len(sub)
            alone = client.post("/v1/chart", json=_composed(body, i)).json()
            assert _answer(alone) == _answer(res[i])
        if (lo, hi) != N_STEPS[0]:  # the extents row of the unbrushed rows is reused
            assert res[0]["stats"]["statements"] == res[2]["stats"]["statements"] == 1
        edges = check_fd(res[0], sub, layout)
        own = np.histogram_bin_edges(sub["x"].dropna().to_numpy(dtype=float), bins="fd")
        moved_fd |= len(own) != len(edges) or not np.allclose(own, edges)
        check_cat(res[1], sub, layout)
        moved_top |= _top4(sub) != _top4(layout)
        assert res[2]["bins"] == unbrushed["bins"]
        day = res[2]["data"]
        ts = sub["ts"].dropna()
        stop = pd.Timestamp(unbrushed["bins"]["x"]["stop"])
        for a, b, c in zip(day["x_lo"], day["x_hi"], day["count"]):
            if a is None:  # the NULL bin
                assert c == int(sub["ts"].isna().sum())
                continue
            a, b = pd.Timestamp(a), pd.Timestamp(b)
            assert c == int(((ts >= a) & ((ts < b) | ((b == stop) & (ts == b)))).sum())
        assert sum(day["count"]) == len(sub)
        assert res[3]["stable"] is False and res[3]["brushes"] == []  # nothing brushes it
    assert moved_fd and moved_top  # the brushed rows alone would have moved both layouts


def _top4(rows: pd.DataFrame) -> list[str]:
    return [k for k, _ in sorted(rows["cat"].value_counts().items(),
                                 key=lambda kv: (-kv[1], kv[0]))[:4]]


@pytest.mark.parametrize("engine", ["duckdb", "postgres"])
def test_stable_false_lays_out_from_every_filter(client, frame, engine):
    """``stable: false``: layouts from the brushed rows, as the chart asked alone without
    ``layout_filters`` (references: numpy on those rows, pandas's top 4, the engine)."""
    lo, hi = N_STEPS[1]
    body = stable_batch(engine, lo, hi, stable=False)
    res = client.post("/v1/batch", json=body).json()["results"]
    layout = frame[_mask(frame, set())]
    sub = layout[((layout["n"] >= lo) & (layout["n"] < hi)).fillna(False)]
    check_fd(res[0], sub, sub)
    check_cat(res[1], sub, sub)
    for i in range(3):
        assert res[i]["stable"] is False
        alone = _composed(body, i)
        assert "layout_filters" not in alone
        assert _answer(client.post("/v1/chart", json=alone).json()) == _answer(res[i])


def test_layout_filters_problems(client):
    """A chart of a batch cannot set ``layout_filters`` (``stable`` does); a chart request's
    count cannot pass its filters; ``stable`` is a boolean."""
    body = stable_batch("duckdb", 0, 10)
    body["charts"][1]["layout_filters"] = 0
    r = _post(client, body)
    assert r.status_code == 422 and r.json()["pointer"] == "/charts/1/layout_filters"
    body = stable_batch("duckdb", 0, 10)
    body["charts"][2]["stable"] = "yes"
    r = _post(client, body)
    assert r.status_code == 422 and r.json()["pointer"] == "/charts/2/stable"
    chart = {"source": "duckdb", "where": SHARED, "layout_filters": 2,
             "channels": {"x": {"column": "x", "bin": {"bins": 10}}, "y": {"agg": "count"}}}
    r = client.post("/v1/chart", json=chart)
    assert r.status_code == 422 and r.json()["pointer"] == "/layout_filters", r.text
    r = client.post("/v1/chart", json=dict(chart, layout_filters=-1))
    assert r.status_code == 422 and r.json()["pointer"] == "/layout_filters", r.text


# --- problems: 422 with pointers into the batch body --------------------------------------

def _post(client, body):
    return client.post("/v1/batch", json=body)


def test_duplicate_id_is_422_at_the_second(client):
    body = linked_batch("duckdb")
    body["charts"][2]["id"] = "x"
    r = _post(client, body)
    assert r.status_code == 422
    assert r.headers["content-type"].startswith("application/problem+json")
    assert r.json()["pointer"] == "/charts/2/id"


@pytest.mark.parametrize("bad", ["", "a b", "x" * 65, "día", 7])
def test_bad_id_is_422(client, bad):
    body = linked_batch("duckdb")
    body["charts"][1]["id"] = bad
    r = _post(client, body)
    assert r.status_code == 422, r.text
    assert r.json()["pointer"] == "/charts/1/id"


def test_brush_needs_an_id(client):
    body = linked_batch("duckdb")
    del body["charts"][1]["id"]
    r = _post(client, body)
    assert r.status_code == 422
    assert r.json()["pointer"] == "/charts/1/id"


def test_brush_on_unknown_column_points_into_the_brush(client):
    body = linked_batch("duckdb")
    body["charts"][1]["brush"] = [{"column": "tss", "gte": "2026-03-01T00:00:00Z"}]
    r = _post(client, body)
    assert r.status_code == 200, r.text
    res = r.json()["results"]
    # the brushed chart itself does not use its brush: it answers
    assert "status" not in res[1] and res[1]["id"] == "month"
    for k in (0, 2, 3):  # every other chart is filtered by it: its problem points there
        assert res[k]["status"] == 422 and res[k]["type"] == "/problems/unknown-column"
        assert res[k]["pointer"] == "/charts/1/brush/0/column"
        assert res[k]["errors"][0]["pointer"] == "/charts/1/brush/0/column"
        assert "ts" in res[k]["suggestions"]
        assert "month" in res[k]["brushes"]


def test_bad_value_inside_a_brush_points_into_the_brush(client):
    body = linked_batch("duckdb")
    # text that is no number, compared with a number column: the planner's 422
    body["charts"][0]["brush"] = [{"column": "n", "gte": 1},
                                  {"any": [{"column": "x", "eq": 1}, {"column": "x", "lt": "abc"}]}]
    res = _post(client, body).json()["results"]
    assert "status" not in res[0]
    for k in (1, 2, 3):
        assert res[k]["status"] == 422, res[k]
        assert res[k]["pointer"] == "/charts/0/brush/1/any/1/lt"


def test_schema_error_inside_a_brush_or_the_shared_where(client):
    body = linked_batch("duckdb")
    body["charts"][2]["brush"] = [{"column": "x", "lt": [1, 2]}]
    r = _post(client, body)
    assert r.status_code == 422
    assert r.json()["pointer"] == "/charts/2/brush/0/lt"
    body = linked_batch("duckdb")
    body["where"] = [{"column": "n", "gte": {"no": 1}}]
    r = _post(client, body)
    assert r.status_code == 422
    assert r.json()["pointer"] == "/where/0/gte"


def test_bad_value_in_the_shared_where_points_there(client):
    body = linked_batch("duckdb")
    body["where"] = [{"column": "n", "gte": -40}, {"column": "ts", "gte": "not a time"}]
    res = _post(client, body).json()["results"]
    for k in range(4):  # every chart is filtered by it
        assert res[k]["status"] == 422
        assert res[k]["pointer"] == "/where/1/gte"


def test_bad_dashboard_tz_points_at_the_batch_tz(client):
    """The batch's ``tz`` is every chart's (the ones naming none): a bad zone is a problem
    at ``/tz``; a chart's own bad zone stays under its own pointer."""
    body = linked_batch("duckdb")
    body["tz"] = "Mars/Olympus_Mons"
    body["charts"][3]["tz"] = "Nowhere/Else"
    res = _post(client, body).json()["results"]
    assert [r["pointer"] for r in res] == ["/tz", "/tz", "/tz", "/charts/3/tz"]
    assert {r["type"] for r in res} == {"/problems/bad-time-zone"}


def test_composed_where_obeys_max_filters_with_a_batch_pointer(client):
    """[limits] max_filters (default 256, app/limits.py) caps the COMPOSED where: chart 2
    gets 1 + 200 + 100 predicates, and the 257th is brush filter 55 of chart 1; charts 0
    and 1 (101 and 201 predicates) still answer."""
    body = linked_batch("duckdb")
    body["charts"][0]["brush"] = [{"column": "n", "gte": -100 - k} for k in range(200)]
    body["charts"][1]["brush"] = [{"column": "x", "gte": -1000.5 - k} for k in range(100)]
    body["charts"][2].pop("brush")
    res = _post(client, body).json()["results"]
    assert "status" not in res[0] and "status" not in res[1]
    for k in (2, 3):
        assert res[k]["type"] == "/problems/limit-exceeded"
        assert res[k]["pointer"] == "/charts/1/brush/55"
