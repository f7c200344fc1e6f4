"""Measures over the grouped table (``then``: fraction / cumulative / change; planner/window.py).

Reference outside the project: pandas on the fixture rows of tests/engine_fixtures.py
(loaded into DuckDB, PostgreSQL, MariaDB, SQLite, ClickHouse via chdb, and Spark for one
case): ``groupby(...).size()`` / ``sum``, then per partition ``transform('sum')`` for a
fraction, ``cumsum`` for cumulative and ``diff`` for change, in the axis key's order with the
NULL axis group left out of cumulative / change (the rule planner/window.py states).
"""

from __future__ import annotations

import decimal
import json
import math

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]
NULL = "<NULL>"  # pandas stand-in for a NULL key


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("window")
    sources = fx.five_engines(root)
    app = create_app(parse_settings({"sources": sources}, "<window measures>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def frame():
    df = pd.DataFrame(fx.make_rows())
    return df.assign(n=df["n"].astype("Float64"), x=df["x"].astype("Float64"),
                     ts=pd.to_datetime(df["ts"], utc=True))


def _chart(client, body: dict) -> dict:
    r = client.post("/v1/chart", json=body)
    assert r.status_code == 200, r.text
    return json.loads(r.text, parse_float=decimal.Decimal)


def _close(got, want, tol: float = 1e-9) -> bool:
    if want is None or (isinstance(want, float) and math.isnan(want)) or want is pd.NA:
        return got is None
    if got is None:
        return False
    return math.isclose(float(got), float(want), rel_tol=tol, abs_tol=tol)


def _keyed(data: dict, keys: list[str]) -> list[tuple]:
    return [tuple(NULL if v is None else v for v in t) for t in zip(*[data[k] for k in keys])]


# ---- case A: plain integer x, color partitions -------------------------------------------

def body_a(source: str) -> dict:
    return {"source": source, "channels": {
        "x": {"column": "n"}, "color": {"column": "grp"},
        "y": {"agg": "count", "then": "cumulative"},
        "size": {"agg": "sum", "column": "x", "then": "change"},
        "shape": {"agg": "count", "then": "fraction", "within": "axis", "name": "in_x"},
        "opacity": {"agg": "count", "then": "fraction"}}}


def check_a(got: dict, df: pd.DataFrame) -> None:
    d = df.assign(n=df["n"].map(lambda v: NULL if pd.isna(v) else int(v)),
                  grp=df["grp"].fillna(NULL))
    g = d.groupby(["n", "grp"], sort=False).agg(
        cnt=("id", "size"), sx=("x", lambda s: s.sum(min_count=1))).reset_index()
    g["cum"] = _along_int(g, ["grp"], "cnt", "cumulative")
    g["chg"] = _along_int(g, ["grp"], "sx", "change")
    g["in_x"] = g["cnt"] / g.groupby("n")["cnt"].transform("sum")  # reference: pandas
    g["frac"] = g["cnt"] / g["cnt"].sum()
    data = got["data"]
    assert set(data) >= {"n", "grp", "count_cumulative", "sum_x_change", "in_x",
                         "count_fraction"}
    keys = _keyed(data, ["n", "grp"])
    assert sorted(keys, key=str) == sorted(zip(g["n"], g["grp"]), key=str)
    want = {(r.n, r.grp): r for r in g.itertuples()}
    for i, k in enumerate(keys):
        w = want[k]
        assert _close(data["count_cumulative"][i], w.cum), (k, data["count_cumulative"][i], w.cum)
        assert _close(data["sum_x_change"][i], w.chg, 1e-7), (k, data["sum_x_change"][i], w.chg)
        assert _close(data["in_x"][i], w.in_x), k
        assert _close(data["count_fraction"][i], w.frac), k


def _along_int(g: pd.DataFrame, part: list[str], col: str, how: str) -> pd.Series:
    on = g[g["n"] != NULL].assign(_o=lambda t: t["n"].astype(int)).sort_values("_o")
    vals = on[col].astype("Float64")
    grouped = vals.groupby([on[p] for p in part], sort=False)
    out = grouped.cumsum() if how == "cumulative" else grouped.diff()  # reference: pandas
    return out.where(vals.notna()).reindex(g.index)


# ---- case B: months along x, a facet partitions, a decimal running sum -------------------

def body_b(source: str) -> dict:
    return {"source": source, "tz": "UTC", "channels": {
        "x": {"column": "ts", "trunc": "month"},
        "y": {"agg": "sum", "column": "amount", "then": "cumulative"},
        "size": {"agg": "count", "then": "fraction", "within": "facet"},
        "opacity": {"agg": "count", "then": "change"}},
        "facet": {"row": {"column": "grp"}}}


def check_b(got: dict, df: pd.DataFrame) -> None:
    month = df["ts"].dt.tz_convert(None).dt.to_period("M").dt.start_time
    d = df.assign(m=month.map(lambda v: NULL if pd.isna(v) else v), grp=df["grp"].fillna(NULL))
    rows = []
    for (m, grp), sub in d.groupby(["m", "grp"]):
        amounts = [a for a in sub["amount"] if a is not None]
        rows.append({"m": m, "grp": grp, "cnt": len(sub),
                     "amt": sum(amounts, decimal.Decimal(0)) if amounts else None})
    g = pd.DataFrame(rows)
    g["frac"] = g["cnt"] / g.groupby("grp")["cnt"].transform("sum")  # reference: pandas
    on = g[g["m"] != NULL].assign(_o=lambda t: pd.to_datetime(t["m"])).sort_values("_o")
    cum, chg = {}, {}
    for grp, sub in on.groupby("grp", sort=False):  # reference: running sum / diff in order
        total, prev = decimal.Decimal(0), None
        for r in sub.itertuples():
            total += r.amt if r.amt is not None else 0
            cum[(r.m, grp)] = total if r.amt is not None else None
            chg[(r.m, grp)] = None if prev is None else r.cnt - prev
            prev = r.cnt
    data = got["data"]
    ms = [NULL if v is None else pd.Timestamp(v).tz_convert(None) for v in data["ts"]]
    grps = [NULL if v is None else v for v in data["grp"]]
    assert sorted(zip(ms, grps), key=str) == sorted(zip(g["m"], g["grp"]), key=str)
    frac = {(r.m, r.grp): r.frac for r in g.itertuples()}
    for i, k in enumerate(zip(ms, grps)):
        assert data["sum_amount_cumulative"][i] == cum.get(k), k  # exact decimals
        assert data["count_change"][i] == chg.get(k), k
        assert _close(data["count_fraction"][i], frac[k]), k


# ---- case C: empty_bins zero -- empty bins carry the running total -----------------------

def body_c(source: str) -> dict:
    return {"source": source, "empty_bins": "zero", "channels": {
        "x": {"column": "x", "bin": {"width": 1, "origin": 0, "limits": [50, 70]}},
        "y": {"agg": "count", "then": "cumulative"},
        "size": {"agg": "count", "then": "change"}}}


def check_c(got: dict, df: pd.DataFrame) -> None:
    vals = df["x"].dropna().to_numpy(dtype=float)
    vals = vals[(vals >= 50) & (vals <= 70)]
    counts, _ = np.histogram(vals, bins=np.arange(50, 71, 1.0))  # reference: numpy, last closed
    assert (counts == 0).any(), "the case needs empty bins"
    data = got["data"]
    real = [i for i, lo in enumerate(data["x_lo"]) if lo is not None]
    assert [data["x_lo"][i] for i in real] == list(np.arange(50, 70, 1.0))
    assert [data["count_cumulative"][i] for i in real] == list(np.cumsum(counts))
    want_chg = [None] + list(np.diff(counts))  # reference: numpy diff
    assert [data["count_change"][i] for i in real] == want_chg
    for i, lo in enumerate(data["x_lo"]):  # the NULL-x group has no place on the axis
        if lo is None:
            assert data["count_cumulative"][i] is None and data["count_change"][i] is None


# ---- case D: top-N with "(other)": the other group takes part in the fraction -----------

def body_d(source: str) -> dict:
    return {"source": source, "channels": {
        "x": {"column": "cat", "top": 3}, "y": {"agg": "count", "then": "fraction"}}}


def check_d(got: dict, df: pd.DataFrame) -> None:
    counts = df["cat"].value_counts(dropna=True)
    ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    want = {k: int(v) for k, v in ranked[:3]}
    want["(other)"] = sum(int(v) for _, v in ranked[3:])
    want[None] = int(df["cat"].isna().sum())
    total = sum(want.values())
    got_map = dict(zip(got["data"]["cat"], got["data"]["count_fraction"]))
    assert set(got_map) == set(want)
    for k, v in want.items():
        assert _close(got_map[k], v / total), k  # reference: pandas value_counts / total


CASES = {"a": (body_a, check_a), "b": (body_b, check_b), "c": (body_c, check_c),
         "d": (body_d, check_d)}


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("case", sorted(CASES))
def test_window_measures_equal_pandas(client, frame, engine, case):
    body, check = CASES[case]
    check(_chart(client, body(engine)), frame)


def test_sort_by_a_window_measure_sorts_its_values(client, frame):
    body = body_d("duckdb")
    body["sort"] = [{"channel": "y", "desc": True}]
    vals = _chart(client, body)["data"]["count_fraction"]
    assert vals == sorted(vals, reverse=True)  # reference: Python's sorted


def test_stack_piles_the_window_values(client, frame):
    body = {"source": "duckdb", "stack": "sum", "channels": {
        "x": {"column": "ts", "trunc": "quarter"}, "color": {"column": "grp"},
        "y": {"agg": "count", "then": "cumulative"}}}
    data = _chart(client, body)["data"]
    tops = pd.DataFrame({"x": data["ts"], "top": data["count_cumulative_top"],
                         "v": data["count_cumulative"]})
    # reference: pandas -- the pile's top at each x is the sum of the values there
    piles = tops.groupby("x", dropna=False).agg(top=("top", "max"), v=("v", "sum"))
    for r in piles.itertuples():
        assert _close(r.top, r.v), r


@pytest.mark.parametrize("channels,extra,ptr", [
    ({"x": {"column": "grp"}, "y": {"agg": "min", "column": "ts", "then": "cumulative"}}, {},
     "/channels/y/then"),
    ({"color": {"column": "grp"}, "y": {"agg": "count", "then": "change"}}, {},
     "/channels/y/then"),
    ({"x": {"column": "grp"}, "y": {"agg": "count", "then": "fraction", "within": "facet"}}, {},
     "/channels/y/within"),
    ({"color": {"column": "grp"}, "y": {"agg": "count", "then": "fraction", "within": "axis"}},
     {}, "/channels/y/within"),
    ({"x": {"column": "grp", "then": "change"}, "y": {"agg": "count"}}, {}, "/channels/x"),
    ({"x": {"column": "grp"}, "y": {"agg": "count", "within": "all"}}, {}, "/channels/y"),
])
def test_meaningless_window_measures_are_422_with_pointers(client, channels, extra, ptr):
    r = client.post("/v1/chart", json={"source": "duckdb", "channels": channels, **extra})
    assert r.status_code == 422, r.text
    assert r.json()["pointer"].startswith(ptr), r.json()


def test_spark_one_case(tmp_path_factory, frame):
    """Case A on Spark (a local JVM: slow, one case)."""
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("window_spark")
    table = fx.arrow_table(fx.make_rows())
    source = {**fx.load_spark(root, table), "statement_timeout_ms": 240_000}  # JVM start-up
    app = create_app(parse_settings({"sources": {"spark": source}}, "<window spark>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        check_a(_chart(c, body_a("spark")), frame)


@pytest.mark.parametrize("engine", ENGINES)
def test_window_measures_in_a_shared_batch_statement(client, frame, engine):
    """Charts of one batch under one filter may share a GROUPING SETS statement
    (planner/emit_sets.py); their then measures run per chart there too. Reference: pandas
    (cases a and b); a filter that keeps every row (id is never NULL) keeps them uncached."""
    where = [{"column": "id", "gte": 0}]
    charts = [{"id": "a", "channels": body_a(engine)["channels"]},
              {"id": "b", "channels": body_b(engine)["channels"],
               "facet": body_b(engine)["facet"]}]
    r = client.post("/v1/batch", json={"source": engine, "tz": "UTC", "where": where,
                                       "charts": charts})
    assert r.status_code == 200, r.text
    res = json.loads(r.text, parse_float=decimal.Decimal)["results"]
    check_a(res[0], frame)
    check_b(res[1], frame)
    if engine == "duckdb":  # DuckDB shares one statement (caps.grouping_sets)
        from planner import names

        assert res[0]["sql"][-1] == res[1]["sql"][-1] and names.cte("spine") in res[0]["sql"][-1]
