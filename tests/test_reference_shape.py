"""Result shaping: top + "(other)", stacking, empty bins, facets, sort/limit/truncation,
output metadata, Arrow output, the other read endpoints, and one run through real uvicorn.
Expected values come from pandas / numpy on the same rows.
"""

from __future__ import annotations

import math
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

REPO = Path(__file__).resolve().parents[1]


def _k(v):
    if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA:
        return None
    return v


def _size(df, keys):
    """{key tuple: row count}, NULL keys kept. reference: pandas groupby(dropna=False).size()"""
    out = {}
    for k, g in df.groupby(keys, dropna=False):
        k = k if isinstance(k, tuple) else (k,)
        out[tuple(_k(v) for v in k)] = len(g)
    return out


def _nulls_first(v):
    return (v is not None, v if v is not None else "")


# ---------------------------------------------------------------------------------------------
# top N + "(other)"
# ---------------------------------------------------------------------------------------------


def test_top_by_count_folds_rest_into_other(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat", "top": 3}, "y": {"agg": "count"}}})
    got = {r["cat"]: r["count"] for r in api.rows(resp)}
    vc = ref.t["cat"].value_counts(dropna=True)  # reference: pandas value_counts (descending)
    top = list(vc.index[:3])
    want = {k: int(vc[k]) for k in top}
    want["(other)"] = int(vc.iloc[3:].sum())
    want[None] = int(ref.t["cat"].isna().sum())  # NULL is its own group, not counted against N
    assert got == want
    assert sum(got.values()) == len(ref.t) == resp["stats"]["matched_rows"]  # reference: pandas len
    # domains of a text key: distinct values in result order
    assert [v for v in resp["domains"]["cat"] if v is not None] == [r["cat"] for r in api.rows(resp) if r["cat"] is not None]


def test_top_by_sum_with_filter_and_label(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "cat", "top": 2, "other_label": "rest"}, "y": {"agg": "sum", "column": "w"}},
            "where": [{"column": "grp2", "eq": "north"}],
        }
    )
    sel = ref.t[ref.t["grp2"] == "north"]
    sums = sel.groupby("cat", dropna=True)["w"].sum().sort_values(ascending=False)  # reference: pandas groupby sum
    want = {k: float(sums[k]) for k in sums.index[:2]}
    want["rest"] = float(sums.iloc[2:].sum())
    want[None] = float(sel.loc[sel["cat"].isna(), "w"].sum())
    got = {r["cat"]: r["sum_w"] for r in api.rows(resp)}
    assert set(got) == set(want)
    for k in want:
        assert api.close(got[k], want[k], rel=1e-9), (k, got[k], want[k])  # reference: pandas groupby sum
    assert api.close(sum(got.values()), sel["w"].sum(), rel=1e-9)  # top + other == filtered total
    assert resp["stats"]["matched_rows"] == len(sel)


def test_top_on_color_ranked_over_all_rows(api, ref):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "color": {"column": "cat", "top": 2}, "y": {"agg": "count"}}})
    vc = ref.t["cat"].value_counts(dropna=True)
    top = set(vc.index[:2])  # ranked over all matched rows, not per x
    folded = ref.t.assign(cat=[c if (c is None or c in top) else "(other)" for c in ref.t["cat"]])
    want = _size(folded, ["grp2", "cat"])  # reference: pandas groupby on the folded column
    got = {(r["grp2"], r["cat"]): r["count"] for r in api.rows(resp)}
    assert got == want


# ---------------------------------------------------------------------------------------------
# stack
# ---------------------------------------------------------------------------------------------


def _stack_reference(values: dict, pile_of, order_of):
    """values: {key tuple: measure}. Cumulative sums within each pile, ordered by the remaining
    keys ascending with NULLs first. reference: pandas-style cumulative sum (plain Python)."""
    piles = {}
    for k, v in values.items():
        piles.setdefault(pile_of(k), []).append(k)
    out = {}
    for p, keys in piles.items():
        keys.sort(key=order_of)
        total = sum(values[k] for k in keys)
        cum = 0.0
        for k in keys:
            cum += values[k]
            out[k] = (cum - values[k], cum, total)
    return out


@pytest.mark.parametrize("measure,name", [({"agg": "count"}, "count"), ({"agg": "sum", "column": "w"}, "sum_w")])
def test_stack_sum_is_cumulative_within_pile(api, ref, measure, name):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "color": {"column": "cat"}, "y": measure}, "stack": "sum"})
    rows = api.rows(resp)
    if name == "count":
        vals = {k: float(v) for k, v in _size(ref.t, ["grp2", "cat"]).items()}
    else:
        vals = {(a, _k(b)): float(g["w"].sum()) for (a, b), g in ref.t.groupby(["grp2", "cat"], dropna=False)}
    exp = _stack_reference(vals, lambda k: k[0], lambda k: _nulls_first(k[1]))
    assert len(rows) == len(exp)
    for r in rows:
        s, e, _ = exp[(r["grp2"], r["cat"])]
        assert api.close(r[f"{name}_top"], e, rel=1e-9), (r, e)  # reference: cumulative sum, color ascending, NULLs first
        assert api.close(r[f"{name}_base"], s, rel=1e-9, abs_=1e-9), (r, s)
        assert api.close(r[f"{name}_top"] - r[f"{name}_base"], r[name], rel=1e-9)  # start = end - value
    assert api.column(resp, f"{name}_base")["role"] == "stack_base"
    assert api.column(resp, f"{name}_top")["role"] == "stack_top"


def test_stack_fraction_ends_at_one(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "color": {"column": "flag"}, "y": {"agg": "count"}}, "stack": "fraction"})
    vals = {k: float(v) for k, v in _size(ref.t, ["cat", "flag"]).items()}
    exp = _stack_reference(vals, lambda k: k[0], lambda k: _nulls_first(k[1]))
    piles_max = {}
    for r in api.rows(resp):
        s, e, tot = exp[(r["cat"], r["flag"])]
        assert api.close(r["count_top"], e / tot, rel=1e-9), r  # reference: cumulative share of the pile total
        assert api.close(r["count_base"], s / tot, rel=1e-9, abs_=1e-12), r
        piles_max[r["cat"]] = max(piles_max.get(r["cat"], 0), r["count_top"])
    for p, m in piles_max.items():
        assert api.close(m, 1.0, rel=1e-12), (p, m)  # each pile scaled to 1


def test_stack_centered_is_symmetric(api, ref):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "color": {"column": "cat"}, "y": {"agg": "sum", "column": "w"}}, "stack": "centered"})
    vals = {(a, _k(b)): float(g["w"].sum()) for (a, b), g in ref.t.groupby(["grp2", "cat"], dropna=False)}
    exp = _stack_reference(vals, lambda k: k[0], lambda k: _nulls_first(k[1]))
    lo, hi = {}, {}
    for r in api.rows(resp):
        s, e, tot = exp[(r["grp2"], r["cat"])]
        assert api.close(r["sum_w_base"], s - tot / 2, rel=1e-9), r  # reference: cumulative sum minus half the pile total
        assert api.close(r["sum_w_top"], e - tot / 2, rel=1e-9), r
        lo[r["grp2"]] = min(lo.get(r["grp2"], math.inf), r["sum_w_base"])
        hi[r["grp2"]] = max(hi.get(r["grp2"], -math.inf), r["sum_w_top"])
    for p in lo:
        assert api.close(lo[p], -hi[p], rel=1e-9), (p, lo[p], hi[p])  # symmetric around 0


def test_stack_horizontal_measure_on_x(api, ref):
    # DEVELOPERS: stack on x when x is the measure and y a key; pile = same y
    resp = api.chart({"channels": {"y": {"column": "grp2"}, "x": {"agg": "count"}, "color": {"column": "flag"}}, "stack": "sum"})
    vals = {k: float(v) for k, v in _size(ref.t, ["grp2", "flag"]).items()}
    exp = _stack_reference(vals, lambda k: k[0], lambda k: _nulls_first(k[1]))
    for r in api.rows(resp):
        s, e, _ = exp[(r["grp2"], r["flag"])]
        assert (r["count_base"], r["count_top"]) == (s, e)  # reference: cumulative sum


def test_stack_pile_is_per_facet_cell(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "grp2"}, "color": {"column": "flag"}, "y": {"agg": "count"}},
            "facet": {"row": {"column": "cat"}},
            "stack": "sum",
            "where": [{"column": "cat", "in": ["alpha", "beta"]}],
        }
    )
    vals = {k: float(v) for k, v in _size(ref.t[ref.t["cat"].isin(["alpha", "beta"])], ["cat", "grp2", "flag"]).items()}
    exp = _stack_reference(vals, lambda k: (k[0], k[1]), lambda k: _nulls_first(k[2]))
    rows = api.rows(resp)
    assert len(rows) == len(exp)
    for r in rows:
        s, e, _ = exp[(r["cat"], r["grp2"], r["flag"])]
        assert (r["count_base"], r["count_top"]) == (s, e)  # reference: cumulative sum per (facet, x) pile


# ---------------------------------------------------------------------------------------------
# empty_bins
# ---------------------------------------------------------------------------------------------


def test_empty_bins_zero_emits_every_bin(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "x", "bin": {"width": 5, "origin": 0, "limits": [-100, 200]}}, "y": {"agg": "count"}},
            "empty_bins": "zero",
        }
    )
    edges = np.arange(-100, 201, 5, dtype=float)
    vals = ref.t["x"].dropna().to_numpy()
    counts, _ = np.histogram(vals, bins=edges)  # reference: numpy.histogram (empty bins are 0 there too)
    rows = [r for r in api.rows(resp) if r["x_lo"] is not None]
    assert [r["x_lo"] for r in rows] == pytest.approx(list(edges[:-1]))
    assert [r["x_hi"] for r in rows] == pytest.approx(list(edges[1:]))
    assert [r["count"] for r in rows] == [int(c) for c in counts]
    assert resp["bins"]["x"]["count"] == 60


def test_empty_bins_keep_the_null_group(api, ref):
    """empty_bins must not lose the NULL-key group (found by the preview-page browser test)."""
    resp = api.chart(
        {
            "channels": {"x": {"column": "x", "bin": {"width": 10, "origin": 0, "limits": [-100, 200]}},
                         "y": {"agg": "count"}},
            "empty_bins": "zero",
        }
    )
    rows = api.rows(resp)
    nulls = [r for r in rows if r["x_lo"] is None]
    # reference: pandas isna() count of the same column
    assert len(nulls) == 1 and nulls[0]["count"] == int(ref.t["x"].isna().sum())
    # every row is in some group: the counts add up to the matched rows (pandas len)
    assert sum(r["count"] for r in rows) + resp["stats"]["outside_limits"]["x"] == len(ref.t)
    assert resp["stats"]["matched_rows"] == len(ref.t)


def test_empty_bins_zero_per_other_key(api, ref):
    resp = api.chart(
        {
            "channels": {
                "x": {"column": "x", "bin": {"width": 10, "origin": 0, "limits": [0, 100]}},
                "color": {"column": "flag"},
                "y": {"agg": "count"},
            },
            "empty_bins": "zero",
            "where": [{"column": "x", "is_null": False}],
        }
    )
    edges = np.arange(0, 101, 10, dtype=float)
    rows = api.rows(resp)
    by_flag = {}
    for r in rows:
        by_flag.setdefault(r["flag"], []).append(r)
    assert set(by_flag) == {True, False, None}  # every flag value occurring in the data
    for f, rs in by_flag.items():
        mask = ref.t["flag"].isna() if f is None else (ref.t["flag"] == f)
        vals = ref.t.loc[mask, "x"].dropna().to_numpy()
        counts, _ = np.histogram(vals, bins=edges)  # reference: numpy.histogram
        rs = sorted(rs, key=lambda r: r["x_lo"])
        assert len(rs) == 10
        assert [r["count"] for r in rs] == [int(c) for c in counts]


def test_empty_bins_null_fills_measures_with_null(api, ref):
    resp = api.chart(
        {
            "source": "edges",
            "channels": {"x": {"column": "v", "bin": {"width": 10, "origin": 0, "limits": [0, 100]}}, "y": {"agg": "count"}},
            "empty_bins": "null",
        }
    )
    vals = ref.edges["v"].dropna().to_numpy()
    counts, _ = np.histogram(vals, bins=np.arange(0, 101, 10, dtype=float))  # reference: numpy.histogram
    rows = [r for r in api.rows(resp) if r["x_lo"] is not None]
    assert len(rows) == 10
    assert [r["count"] for r in rows] == [int(c) if c else None for c in counts]


def test_empty_bins_zero_leaves_non_number_measures_null(api, ref):
    """``zero`` fills number measures with 0; an empty bin's earliest time, largest text or
    boolean is NULL (before: a 502 on DuckDB and PostgreSQL, "CASE types date and integer
    cannot be matched", and 0 / "0" / false on MariaDB and ClickHouse)."""
    resp = api.chart({"channels": {
        "x": {"column": "x", "bin": {"width": 10, "origin": 0, "limits": [-100, 200]}},
        "y": {"agg": "max", "column": "n"}, "size": {"agg": "min", "column": "ts"},
        "color": {"agg": "max", "column": "cat"}, "opacity": {"agg": "max", "column": "flag"}},
        "empty_bins": "zero", "where": [{"column": "x", "is_null": False}]})
    df = ref.t.dropna(subset=["x"])
    df = df[(df["x"] >= -100) & (df["x"] <= 200)]
    edges = np.arange(-100, 201, 10, dtype=float)
    # reference: pandas groupby over numpy.digitize bins (the last bin closed, as numpy.histogram)
    idx = np.minimum(np.digitize(df["x"].to_numpy(), edges) - 1, len(edges) - 2)
    groups = df.groupby(idx)
    rows = api.rows(resp)
    assert len(rows) == len(edges) - 1
    for i, r in enumerate(rows):
        assert r["x_lo"] == edges[i]
        if i not in groups.groups:
            assert (r["max_n"], r["min_ts"], r["max_cat"], r["max_flag"]) == (0, None, None, None)
            continue
        g = groups.get_group(i)
        assert r["max_n"] == int(g["n"].max())
        assert pd.Timestamp(r["min_ts"]) == g["ts"].min()
        assert r["max_cat"] == g["cat"].dropna().max()
        assert r["max_flag"] == bool(g["flag"].dropna().max())
    assert any(i not in groups.groups for i in range(len(edges) - 1))


def test_empty_bins_zero_with_nice_bins_covers_bins_meta(api, ref):
    resp = api.chart(
        {"source": "ranges", "channels": {"x": {"column": "a", "bin": {"bins": 40}}, "y": {"agg": "count"}}, "empty_bins": "zero"}
    )
    b = resp["bins"]["x"]
    edges = b["start"] + b["width"] * np.arange(b["count"] + 1)
    counts, _ = np.histogram(ref.ranges["a"].to_numpy(), bins=edges)  # reference: numpy.histogram
    rows = api.rows(resp)
    assert len(rows) == b["count"]
    assert [r["count"] for r in rows] == [int(c) for c in counts]


# ---------------------------------------------------------------------------------------------
# facets, by, sort, limit, truncation
# ---------------------------------------------------------------------------------------------


def test_facet_row_and_col(api, ref):
    resp = api.chart(
        {"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}, "facet": {"row": {"column": "grp2"}, "col": {"column": "flag"}}}
    )
    got = {(r["grp2"], r["flag"], r["cat"]): r["count"] for r in api.rows(resp)}
    assert got == _size(ref.t, ["grp2", "flag", "cat"])  # reference: pandas groupby(dropna=False).size()
    assert api.column(resp, "grp2")["channel"] == "row"
    assert api.column(resp, "flag")["channel"] == "col"
    assert api.column(resp, "flag")["type"] == "boolean"
    assert resp["stats"]["truncated"] is False


def test_facet_max_groups_keeps_top_per_cell(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "cat"}, "y": {"agg": "count"}},
            "facet": {"row": {"column": "grp2"}, "max_groups": 2},
            "sort": [{"channel": "y", "desc": True}],
        }
    )
    rows = api.rows(resp)
    full = _size(ref.t, ["grp2", "cat"])
    for g in ["north", "south", "east"]:
        kept = sorted((r["count"] for r in rows if r["grp2"] == g), reverse=True)
        best = sorted((v for (a, _), v in full.items() if a == g), reverse=True)[:2]
        assert kept == best  # reference: pandas groupby size, 2 largest per facet cell
    for r in rows:
        assert full[(r["grp2"], r["cat"])] == r["count"]
    assert resp["stats"]["truncated"] is True


def test_by_keys(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}, "by": [{"column": "grp2"}]}})
    got = {(r["cat"], r["grp2"]): r["count"] for r in api.rows(resp)}
    assert got == _size(ref.t, ["cat", "grp2"])  # reference: pandas groupby
    assert api.column(resp, "grp2")["channel"] == "by"


def test_sort_measure_desc(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}, "sort": [{"channel": "y", "desc": True}]})
    counts = resp["data"]["count"]
    want = sorted(ref.t["cat"].value_counts(dropna=False).tolist(), reverse=True)  # reference: pandas value_counts
    assert counts == want
    assert resp["data"]["cat"][0] == "alpha"


def test_sort_key_desc_then_measure(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "grp2"}, "color": {"column": "flag"}, "y": {"agg": "count"}},
            "sort": [{"channel": "x", "desc": True}, {"channel": "y"}],
        }
    )
    rows = api.rows(resp)
    xs = [r["grp2"] for r in rows]
    assert xs == sorted(xs, reverse=True)  # reference: Python sorted
    for g in set(xs):
        cs = [r["count"] for r in rows if r["grp2"] == g]
        assert cs == sorted(cs)


def test_default_order_keys_ascending_nulls_last(api, ref):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "color": {"column": "flag"}, "y": {"agg": "count"}}})
    keys = [(r["grp2"], r["flag"]) for r in api.rows(resp)]
    assert keys == sorted(keys, key=lambda k: (k[0], k[1] is None, k[1] if k[1] is not None else False))


def test_limit_truncates_and_counts_all_groups(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}, "limit": 3})
    n_groups = ref.t["cat"].nunique(dropna=False)  # reference: pandas nunique(dropna=False)
    st = resp["stats"]
    assert st["result_rows"] == 3 and len(resp["data"]["count"]) == 3
    assert st["truncated"] is True
    assert st["groups"] == n_groups == 9
    # without sort the first rows by key ascending are kept
    assert resp["data"]["cat"] == sorted(k for k in ref.t["cat"].dropna().unique())[:3]


def test_limit_with_sort_keeps_largest(api, ref):
    resp = api.chart(
        {"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}, "sort": [{"channel": "y", "desc": True}], "limit": 2}
    )
    assert resp["data"]["cat"] == ["alpha", "beta"]  # reference: pandas value_counts
    assert resp["data"]["count"] == [610, 480]
    assert resp["stats"]["truncated"] is True


def test_limit_not_reached(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}, "limit": 9})
    assert resp["stats"]["truncated"] is False
    assert resp["stats"]["groups"] == 9 == resp["stats"]["result_rows"]


# ---------------------------------------------------------------------------------------------
# other outputs and endpoints
# ---------------------------------------------------------------------------------------------


def test_arrow_stream_matches_json(api):
    import pyarrow as pa

    body = {"source": "fixture", "channels": {"x": {"column": "cat"}, "y": {"agg": "avg", "column": "x"}}}
    js = api.chart(body)
    r = api.client.post("/v1/chart", json=body, headers={"Accept": "application/vnd.apache.arrow.stream"})
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("application/vnd.apache.arrow.stream")
    tbl = pa.ipc.open_stream(r.content).read_all()  # reference: Arrow IPC streaming format (pyarrow)
    assert tbl.column("cat").to_pylist() == js["data"]["cat"]
    for a, b in zip(tbl.column("avg_x").to_pylist(), js["data"]["avg_x"]):
        assert api.close(a, b, rel=1e-15)


def test_sql_endpoint_plans_without_running(api):
    r = api.post({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}}, path="/v1/sql")
    assert r.status_code == 200, r.text
    out = r.json()
    assert isinstance(out["sql"], list) and out["sql"] and all(isinstance(s, str) for s in out["sql"])
    assert "data" not in out


def test_sources_endpoints(api, ref):
    r = api.client.get("/v1/sources")
    assert r.status_code == 200
    text = r.text
    for name in ["fixture", "ranges", "edges", "numacc1", "numacc4"]:
        assert f'"{name}"' in text
    r = api.client.get("/v1/sources/fixture")
    assert r.status_code == 200
    text = r.text
    for col in ref.t.columns:
        assert f'"{col}"' in text
    assert str(len(ref.t)) in text  # row count


def test_stats_and_sql_in_chart_response(api, ref):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "y": {"agg": "count"}}, "where": [{"column": "w", "lt": 5}]})
    st = resp["stats"]
    assert st["source_rows"] == len(ref.t)
    assert st["matched_rows"] == int((ref.t["w"] < 5).sum())  # reference: pandas mask
    assert st["result_rows"] == 3 and st["groups"] == 3 and st["truncated"] is False
    assert resp["dialect"] == "duckdb"
    assert isinstance(resp["sql"], list) and resp["sql"]


def test_several_sources_in_one_duckdb_file(combined_config_path, ref):
    # A config naming several tables of one DuckDB file as separate sources (the natural way to
    # serve a warehouse file) must serve each of them.
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    app = create_app(load_settings(combined_config_path))
    with TestClient(app, raise_server_exceptions=False) as c:
        for source, want in [("fixture", len(ref.t)), ("ranges", len(ref.ranges)), ("edges", len(ref.edges)),
                             ("numacc2", 1001), ("fixture", len(ref.t))]:
            r = c.post("/v1/chart", json={"source": source, "channels": {"y": {"agg": "count"}}})
            assert r.status_code == 200, f"{source}: {r.status_code} {r.text[:500]}"
            assert r.json()["data"]["count"] == [want]  # reference: row counts of the generated tables


# ---------------------------------------------------------------------------------------------
# end to end through real uvicorn on 127.0.0.1
# ---------------------------------------------------------------------------------------------


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_end_to_end_uvicorn(config_path, ref, tmp_path):
    import httpx

    port = _free_port()
    env = dict(os.environ, SLUICE_CONFIG=str(config_path))
    log = open(tmp_path / "uvicorn.log", "wb")
    proc = subprocess.Popen(
        [sys.executable, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1", "--port", str(port)],
        cwd=REPO, env=env, stdout=log, stderr=subprocess.STDOUT,
    )
    try:
        base = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + 20
        while True:
            assert proc.poll() is None, "uvicorn exited: " + (tmp_path / "uvicorn.log").read_text()[-2000:]
            try:
                if httpx.get(base + "/healthz", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            assert time.monotonic() < deadline, "no /healthz within 20 s"
            time.sleep(0.1)
        r = httpx.post(
            base + "/v1/chart",
            json={"source": "fixture", "channels": {"x": {"column": "grp2"}, "y": {"agg": "sum", "column": "n"}}},
            timeout=10,
        )
        assert r.status_code == 200, r.text
        out = r.json()
        got = dict(zip(out["data"]["grp2"], out["data"]["sum_n"]))
        want = {k: int(g["n"].sum()) for k, g in ref.t.groupby("grp2")}  # reference: pandas groupby sum
        assert got == want
        r = httpx.post(base + "/v1/chart", content=b"{not json", headers={"content-type": "application/json"}, timeout=10)
        assert 400 <= r.status_code < 500
        assert r.headers["content-type"].startswith("application/problem+json")
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)
        log.close()
