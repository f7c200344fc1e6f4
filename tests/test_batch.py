"""POST /v1/batch: several charts on one source, each answered as /v1/chart would.

Reference: pandas on the same rows (tests/refdata.py) for the counts and sums.
"""

from __future__ import annotations

import math


def test_batch_answers_each_chart_against_pandas(client, ref):
    t = ref.t
    body = {
        "source": "fixture",
        "charts": [
            {"channels": {"x": {"column": "grp2"}, "y": {"agg": "count"}}},
            {"channels": {"x": {"column": "cat"}, "y": {"agg": "sum", "column": "n"}},
             "where": [{"column": "flag", "eq": True}]},
            {"channels": {"x": {"column": "no_such_column"}}},
        ],
    }
    r = client.post("/v1/batch", json=body)
    assert r.status_code == 200, r.text
    res = r.json()["results"]
    assert len(res) == 3

    # reference: pandas groupby(dropna=False).size()
    want = t.groupby("grp2", dropna=False).size()
    got = dict(zip(res[0]["data"]["grp2"], res[0]["data"]["count"]))
    assert got == {k: int(v) for k, v in want.items()}

    # reference: pandas sum over rows where flag is True (NULL flag does not match, as in SQL)
    sub = t[t["flag"] == True]  # noqa: E712 - pandas boolean mask
    want_sum = sub.groupby("cat", dropna=False)["n"].sum(min_count=1)
    got_sum = dict(zip(res[1]["data"]["cat"], res[1]["data"]["sum_n"]))
    for k, v in want_sum.items():
        key = None if (isinstance(k, float) and math.isnan(k)) else k
        assert got_sum[key] == (None if v != v else int(v))
    assert res[1]["stats"]["matched_rows"] == len(sub)

    # a chart the planner refuses becomes that chart's problem, pointer under /charts/2
    assert res[2]["status"] == 422
    assert res[2]["pointer"] == "/charts/2/channels/x/column"


def test_batch_schema_error_points_into_the_chart(client):
    r = client.post("/v1/batch", json={"source": "fixture",
                                       "charts": [{"channels": {"x": {"column": "cat", "bin": {"bins": 0}}}}]})
    assert r.status_code == 422
    assert r.headers["content-type"].startswith("application/problem+json")
    assert r.json()["pointer"] == "/charts/0/channels/x/bin/bins"


def test_batch_unknown_source_is_404(client):
    r = client.post("/v1/batch", json={"source": "nope", "charts": [{"channels": {"x": {"column": "cat"}}}]})
    assert r.status_code == 404
    assert r.json()["pointer"] == "/source"


def test_batch_charts_share_the_result_cache(client):
    """A chart answered once (alone or in a batch) is a cache hit the next time, with the
    same data; the reference is the first, computed answer."""
    chart = {"channels": {"x": {"column": "label"}, "y": {"agg": "avg", "column": "w"}},
             "where": [{"column": "grp2", "ne": "zzz-not-there"}]}
    first = client.post("/v1/chart", json={"source": "fixture", **chart}).json()
    r = client.post("/v1/batch", json={"source": "fixture", "charts": [chart, chart]})
    assert r.status_code == 200
    res = r.json()["results"]
    assert [x["cache"] for x in res] == ["hit", "hit"]
    assert res[0]["data"] == first["data"] and res[0]["stats"] == first["stats"]


def test_batch_with_no_cache_recomputes_every_chart(client, ref):
    """``Cache-Control: no-cache`` on a batch recomputes each chart as it does for
    /v1/chart (README "Answers are cached"); the answer equals pandas either way."""
    charts = [{"channels": {"x": {"column": "grp2"}, "y": {"agg": "count"}},
               "where": [{"column": "cat", "ne": "no-cache-probe"}]},
              {"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}},
               "where": [{"column": "cat", "ne": "no-cache-probe"}]}]
    body = {"source": "fixture", "charts": charts}
    client.post("/v1/batch", json=body)  # now cached
    again = client.post("/v1/batch", json=body).json()["results"]
    assert [x["cache"] for x in again] == ["hit", "hit"]
    fresh = client.post("/v1/batch", json=body, headers={"Cache-Control": "no-cache"}).json()["results"]
    assert [x["cache"] for x in fresh] == ["miss", "miss"]
    assert all("execute" in x["timing_ms"] for x in fresh)
    sub = ref.t[ref.t["cat"] != "no-cache-probe"]  # reference: pandas (NULL cat: ne is unknown)
    sub = sub[sub["cat"].notna()]
    want = sub.groupby("grp2", dropna=False).size()
    got = dict(zip(fresh[0]["data"]["grp2"], fresh[0]["data"]["count"]))
    assert got == {(None if isinstance(k, float) and math.isnan(k) else k): int(v)
                   for k, v in want.items()}
