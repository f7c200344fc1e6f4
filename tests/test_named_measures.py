"""Named measures (config ``[sources.X.measures]``, ``{"measure": name}``; planner/measure_sql.py).

Reference outside the project: pandas on the fixture rows of tests/engine_fixtures.py, loaded
into DuckDB, PostgreSQL, MariaDB, SQLite, ClickHouse (chdb) and Spark (one case):
``groupby(...)`` with the aggregate written out in pandas (sum, mean of an indicator, count
of a condition, max, ratios of sums), top-N by ``sort_values`` with the rest summed into
"(other)".
"""

from __future__ import annotations

import decimal
import json
import math

import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]
MEASURES = {
    "total_amount": "sum(amount)",  # one aggregate over a column
    "flag_share": "avg(CASE WHEN flag THEN 1.0 WHEN NOT flag THEN 0.0 END)",  # over a CASE
    "big_n": "count(CASE WHEN n > 10 THEN 1 END)",
    "max_twice_n": "max(n * 2)",
    "x_per_row": "sum(x) / count(*)",  # composites
    "amount_per_n": "sum(amount) / sum(abs(n))",
    "k_per_row": "approx_count_distinct(k) / count(*)",  # an estimate inside a composite
}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("named")
    sources = fx.five_engines(root)
    for s in sources.values():
        s["measures"] = dict(MEASURES)
    app = create_app(parse_settings({"sources": sources}, "<named measures>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def frame():
    return pd.DataFrame(fx.make_rows())


def _chart(client, body: dict) -> dict:
    r = client.post("/v1/chart", json=body)
    assert r.status_code == 200, r.text
    return json.loads(r.text, parse_float=decimal.Decimal)


def _close(got, want, tol=1e-9) -> bool:
    if want is None or (isinstance(want, float) and math.isnan(want)):
        return got is None
    return got is not None and math.isclose(float(got), float(want), rel_tol=tol, abs_tol=tol)


def _reference(df: pd.DataFrame) -> dict:
    """Per grp (NULL kept apart), every measure written out in pandas."""
    out = {}
    for grp, sub in df.assign(grp=df["grp"].fillna("<NULL>")).groupby("grp"):
        amounts = [a for a in sub["amount"] if a is not None]
        flags = sub["flag"].dropna()
        n = sub["n"].dropna()
        x = sub["x"].dropna()
        abs_n = float(n.abs().sum()) if len(n) else None
        out[None if grp == "<NULL>" else grp] = {
            "total_amount": sum(amounts, decimal.Decimal(0)) if amounts else None,
            "flag_share": float(flags.astype(float).mean()) if len(flags) else None,
            "big_n": int((n > 10).sum()),
            "max_twice_n": int(n.max()) * 2 if len(n) else None,
            "x_per_row": float(x.sum()) / len(sub) if len(x) else None,
            "amount_per_n": (float(sum(amounts)) / abs_n if amounts and abs_n else None),
        }
    return out


@pytest.mark.parametrize("engine", ENGINES)
def test_named_measures_equal_pandas(client, frame, engine):
    channels = {"x": {"column": "grp"}}
    for ch, m in zip(("y", "color", "size", "shape", "opacity"), list(MEASURES)[:5]):
        channels[ch] = {"measure": m}
    channels["by"] = [{"measure": "amount_per_n"}]
    data = _chart(client, {"source": engine, "channels": channels})["data"]
    want = _reference(frame)  # reference: pandas groupby, each aggregate written out
    assert sorted(data["grp"], key=str) == sorted(want, key=str)
    for i, grp in enumerate(data["grp"]):
        w = want[grp]
        assert data["total_amount"][i] == w["total_amount"], grp  # exact decimals
        assert data["max_twice_n"][i] == w["max_twice_n"], grp
        for m in ("flag_share", "x_per_row", "amount_per_n"):
            assert _close(data[m][i], w[m]), (grp, m, data[m][i], w[m])
        assert data["big_n"][i] == w["big_n"], grp


@pytest.mark.parametrize("engine", ENGINES)
def test_max_of_an_expression_keeps_integers(client, frame, engine):
    data = _chart(client, {"source": engine, "channels": {
        "x": {"column": "grp"}, "y": {"measure": "max_twice_n"}}})["data"]
    want = _reference(frame)
    assert {g: v for g, v in zip(data["grp"], data["max_twice_n"])} == \
        {g: w["max_twice_n"] for g, w in want.items()}  # reference: pandas max * 2


@pytest.mark.parametrize("engine", ENGINES)
def test_single_aggregate_measure_ranks_and_folds_like_the_builtin(client, frame, engine):
    data = _chart(client, {"source": engine, "channels": {
        "x": {"column": "cat", "top": 3}, "y": {"measure": "total_amount"}}})["data"]
    sums = {}
    for cat, sub in frame[frame["cat"].notna()].groupby("cat"):
        sums[cat] = sum((a for a in sub["amount"] if a is not None), decimal.Decimal(0))
    ranked = sorted(sums.items(), key=lambda kv: (-kv[1], kv[0]))  # reference: pandas + sort
    want = dict(ranked[:3])
    want["(other)"] = sum((v for _, v in ranked[3:]), decimal.Decimal(0))
    want[None] = sum((a for a in frame[frame["cat"].isna()]["amount"] if a is not None),
                     decimal.Decimal(0))
    assert dict(zip(data["cat"], data["total_amount"])) == want


def test_single_aggregate_measure_stacks_and_runs_along_x(client, frame):
    body = {"source": "duckdb", "stack": "sum", "channels": {
        "x": {"column": "grp"}, "color": {"column": "flag"}, "y": {"measure": "big_n"}}}
    data = _chart(client, body)["data"]
    assert "big_n_base" in data and "big_n_top" in data
    d = frame.assign(big=(frame["n"] > 10).fillna(False))
    piles = d.groupby(d["grp"].fillna("<NULL>"))["big"].sum()  # reference: pandas
    tops = {}
    for g, t in zip(data["grp"], data["big_n_top"]):
        tops[g if g is not None else "<NULL>"] = max(tops.get(g or "<NULL>", 0), t)
    assert tops == {k: float(v) for k, v in piles.items()}
    run = _chart(client, {"source": "duckdb", "channels": {
        "x": {"column": "grp"}, "y": {"measure": "big_n", "then": "cumulative"}}})["data"]
    order = sorted(k for k in piles.index if k != "<NULL>")
    want = dict(zip(order, piles[order].cumsum()))  # reference: pandas cumsum
    assert {g: v for g, v in zip(run["grp"], run["big_n_cumulative"]) if g} == want


@pytest.mark.parametrize("body,ptr,slug", [
    ({"channels": {"x": {"column": "grp"}, "y": {"measure": "total_amont"}}},
     "/channels/y/measure", "unknown-measure"),
    ({"channels": {"x": {"column": "cat", "top": 3}, "y": {"measure": "x_per_row"}}},
     "/channels/x/top", "invalid-request"),
    ({"stack": "sum", "channels": {"x": {"column": "grp"}, "color": {"column": "flag"},
                                   "y": {"measure": "x_per_row"}}},
     "/channels/y/measure", "invalid-request"),
    ({"channels": {"x": {"column": "grp"}, "y": {"measure": "total_amount", "agg": "sum"}}},
     "/channels/y", "invalid-request"),
])
def test_measure_problems_are_422_with_pointers(client, body, ptr, slug):
    r = client.post("/v1/chart", json={"source": "duckdb", **body})
    assert r.status_code == 422, r.text
    p = r.json()
    assert p["pointer"].startswith(ptr) and p["type"].endswith(slug), p
    if slug == "unknown-measure":
        assert p["suggestions"] == ["total_amount"]


def test_source_lists_its_measures_with_kinds(client):
    got = client.get("/v1/sources/postgres").json()["measures"]
    kinds = {m["name"]: m["kind"] for m in got}
    # reference: the fixture's declared column types (amount numeric(12,2), n integer)
    assert kinds == {"total_amount": "decimal", "flag_share": "double", "big_n": "integer",
                     "max_twice_n": "integer", "x_per_row": "double", "amount_per_n": "double",
                     "k_per_row": "double"}
    assert {m["name"]: m["expression"] for m in got} == MEASURES


@pytest.mark.parametrize("name,text,words", [
    ("revenue", "fee", "outside an aggregate"),
    ("revenue", "sum(sum(fee))", "inside an aggregate"),
    ("revenue", "read_csv('x')", "not allowed"),
    ("revenue", "sum(fee) > 1", "must be a number"),
    ("revenue", 3, "must be a string"),
    ("1st", "sum(fee)", "not a measure name"),
    ("revenue", "sum(fee", "cannot read"),
])
def test_config_errors_name_the_key(tmp_path, name, text, words):
    from app.settings import ConfigError, parse_settings

    src = {"engine": "duckdb", "path": str(tmp_path / "x.duckdb"), "table": "t",
           "measures": {name: text}}
    with pytest.raises(ConfigError) as e:
        parse_settings({"sources": {"deliveries": src}}, "<test>")
    assert e.value.key == f"sources.deliveries.measures.{name}"
    assert words in str(e.value), str(e.value)


def test_spark_one_case(tmp_path_factory, frame):
    """The grouped case on Spark (a local JVM: slow, one case)."""
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("named_spark")
    table = fx.arrow_table(fx.make_rows())
    source = {**fx.load_spark(root, table), "statement_timeout_ms": 240_000,
              "measures": dict(MEASURES)}
    app = create_app(parse_settings({"sources": {"spark": source}}, "<named spark>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        data = _chart(c, {"source": "spark", "channels": {
            "x": {"column": "grp"}, "y": {"measure": "total_amount"},
            "color": {"measure": "flag_share"}, "size": {"measure": "amount_per_n"}}})["data"]
    want = _reference(frame)  # reference: pandas
    for i, grp in enumerate(data["grp"]):
        assert data["total_amount"][i] == want[grp]["total_amount"]
        assert _close(data["flag_share"][i], want[grp]["flag_share"])
        assert _close(data["amount_per_n"][i], want[grp]["amount_per_n"])


def test_a_composite_with_an_estimate_says_approximate(client, frame):
    got = _chart(client, {"source": "duckdb", "channels": {
        "x": {"column": "grp"}, "y": {"measure": "k_per_row"}}})
    assert got["approximate"] is True
    want = frame.groupby(frame["grp"].fillna("<NULL>")).apply(  # reference: pandas nunique
        lambda t: t["k"].nunique() / len(t)).to_dict()
    for g, v in zip(got["data"]["grp"], got["data"]["k_per_row"]):
        assert math.isclose(v, want[g if g is not None else "<NULL>"], rel_tol=0.05), g


def test_measure_over_a_computed_column(tmp_path, frame):
    """A named measure may read a computed column ([sources.X.columns]): the relation then
    provides it (planner/source.py). Reference: pandas on the same rows."""
    from app.main import create_app
    from app.settings import parse_settings

    src = {**fx.load_duckdb(tmp_path, fx.arrow_table(fx.make_rows())),
           "columns": {"n_abs": "abs(n)"}, "measures": {"big_abs": "sum(CASE WHEN n_abs > 25 "
                                                                    "THEN n_abs END)"}}
    app = create_app(parse_settings({"sources": {"duckdb": src}}, "<computed measure>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        data = _chart(c, {"source": "duckdb", "channels": {
            "x": {"column": "grp"}, "y": {"measure": "big_abs"}}})["data"]
    d = frame.assign(a=frame["n"].abs())
    want = {}
    for g, sub in d.groupby(d["grp"].fillna("<NULL>")):  # reference: pandas
        big = sub["a"][sub["a"] > 25]
        want[None if g == "<NULL>" else g] = int(big.sum()) if len(big) else None
    assert dict(zip(data["grp"], data["big_abs"])) == want


@pytest.mark.parametrize("engine", ["duckdb", "postgres"])
def test_named_measures_in_a_shared_batch_statement(client, frame, engine):
    """Two charts under one filter share a statement where the engine allows it
    (planner/emit_sets.py); single-aggregate named measures are aggregates like any there.
    Reference: pandas; a filter that keeps every row keeps the answers uncached."""
    charts = [{"channels": {"x": {"column": "grp"}, "y": {"measure": "flag_share"}}},
              {"channels": {"x": {"column": "grp"}, "y": {"measure": "big_n"},
                            "color": {"measure": "x_per_row"}}}]
    r = client.post("/v1/batch", json={"source": engine, "charts": charts,
                                       "where": [{"column": "id", "gte": 0}]})
    assert r.status_code == 200, r.text
    res = r.json()["results"]
    want = _reference(frame)
    for g, v in zip(res[0]["data"]["grp"], res[0]["data"]["flag_share"]):
        assert _close(v, want[g]["flag_share"]), g
    for g, v, w in zip(res[1]["data"]["grp"], res[1]["data"]["big_n"], res[1]["data"]["x_per_row"]):
        assert v == want[g]["big_n"] and _close(w, want[g]["x_per_row"]), g
