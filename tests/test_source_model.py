"""The source model: computed columns, request ``expr`` terms and dimension tables.

References outside the project: pandas on the rows of tests/engine_fixtures.py (the same rows
loaded into every engine), joined to the dimension rows with ``DataFrame.merge(how="left")``
and grouped with ``DataFrame.groupby(dropna=False)``; the kinds of computed columns against
the engine's own typing (asserted per engine). Engines: DuckDB, PostgreSQL, MariaDB, SQLite,
ClickHouse (chdb); Spark in one small case (slow to start: ``test_spark_small``).

The dimension ``grps`` (key ``grp``) lists "north" and "south" only: facts of "east" and facts
whose grp is NULL have no match, so their dimension columns are NULL (LEFT JOIN). ``grps_dup``
lists "north" twice: every request that uses it is refused (fan-out), at start-up the source
still serves.
"""

from __future__ import annotations

import math
import sqlite3

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from testmods import load

fx = load("engine_fixtures")

ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]

DIM_ROWS = [("north", "North Ring", 3), ("south", "South Loop", 5), ("west", "West End", 7)]
DUP_ROWS = [("north", "A"), ("north", "B"), ("south", "C")]

COMPUTED = {
    "x_per_n": "x / NULLIF(n, 0)",
    "band": "CASE WHEN x >= 10 THEN 'high' WHEN x >= 0 THEN 'mid' ELSE 'low' END",
    "n_whole": "CAST(n AS BIGINT) * 2",
    "cat_up": "upper(coalesce(cat, '?'))",
}
#: kind of each computed column, the same on every engine
KINDS = {"x_per_n": "double", "band": "string", "n_whole": "integer", "cat_up": "string"}


def _model(cfg: dict, dim_table: str, dup_table: str) -> dict:
    return {**cfg, "columns": COMPUTED, "dimensions": [
        {"table": dim_table, "fact_column": "grp", "key": "grp", "columns": ["label", "weight"],
         "name": "grps"},
        {"table": dup_table, "fact_column": "grp", "key": "grp", "columns": ["tag"],
         "name": "grps_dup"}]}


def _load_dims(engine: str, cfg: dict) -> dict:
    """The two dimension tables beside the fact table, in the fact table's database."""
    w = fx.worker()
    if engine == "duckdb":
        import duckdb

        con = duckdb.connect(cfg["path"])
        con.execute("CREATE TABLE grps (grp VARCHAR, label VARCHAR, weight INTEGER)")
        con.executemany("INSERT INTO grps VALUES (?, ?, ?)", DIM_ROWS)
        con.execute("CREATE TABLE grps_dup (grp VARCHAR, tag VARCHAR)")
        con.executemany("INSERT INTO grps_dup VALUES (?, ?)", DUP_ROWS)
        con.close()
        return _model(cfg, "grps", "grps_dup")
    if engine == "sqlite":
        con = sqlite3.connect(cfg["path"])
        con.execute("CREATE TABLE grps (grp TEXT, label TEXT, weight INTEGER)")
        con.executemany("INSERT INTO grps VALUES (?, ?, ?)", DIM_ROWS)
        con.execute("CREATE TABLE grps_dup (grp TEXT, tag TEXT)")
        con.executemany("INSERT INTO grps_dup VALUES (?, ?)", DUP_ROWS)
        con.commit()
        con.close()
        return _model(cfg, "grps", "grps_dup")
    if engine == "postgres":
        import psycopg

        schema = f"sluice_test_{w}"
        with psycopg.connect(fx.PG_DSN, autocommit=True) as conn:
            conn.execute(f'CREATE TABLE "{schema}".grps (grp text COLLATE "C", label text, '
                         "weight integer)")
            conn.cursor().executemany(f'INSERT INTO "{schema}".grps VALUES (%s, %s, %s)', DIM_ROWS)
            conn.execute(f'CREATE TABLE "{schema}".grps_dup (grp text COLLATE "C", tag text)')
            conn.cursor().executemany(f'INSERT INTO "{schema}".grps_dup VALUES (%s, %s)', DUP_ROWS)
        return _model(cfg, f"{schema}.grps", f"{schema}.grps_dup")
    if engine == "mysql":
        import pymysql

        conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                               charset="utf8mb4", autocommit=True)
        with conn.cursor() as cur:
            for t in (f"sluice_grps_{w}", f"sluice_grpsdup_{w}"):
                cur.execute(f"DROP TABLE IF EXISTS `{t}`")
            cur.execute(f"CREATE TABLE `sluice_grps_{w}` (grp VARCHAR(16), label VARCHAR(32), "
                        "weight INT) CHARACTER SET utf8mb4 COLLATE utf8mb4_nopad_bin")
            cur.executemany(f"INSERT INTO `sluice_grps_{w}` VALUES (%s, %s, %s)", DIM_ROWS)
            cur.execute(f"CREATE TABLE `sluice_grpsdup_{w}` (grp VARCHAR(16), tag VARCHAR(8)) "
                        "CHARACTER SET utf8mb4 COLLATE utf8mb4_nopad_bin")
            cur.executemany(f"INSERT INTO `sluice_grpsdup_{w}` VALUES (%s, %s)", DUP_ROWS)
        conn.close()
        return _model(cfg, f"test.sluice_grps_{w}", f"test.sluice_grpsdup_{w}")
    if engine == "clickhouse":
        from chdb import session as chs

        s = chs.Session(cfg["path"])
        s.query("DROP TABLE IF EXISTS sluice_test.grps")
        s.query("DROP TABLE IF EXISTS sluice_test.grps_dup")
        s.query("CREATE TABLE sluice_test.grps (grp String, label String, weight Int32) "
                "ENGINE = MergeTree ORDER BY grp")
        s.query("INSERT INTO sluice_test.grps VALUES " +
                ", ".join(f"('{g}', '{lbl}', {wt})" for g, lbl, wt in DIM_ROWS))
        s.query("CREATE TABLE sluice_test.grps_dup (grp String, tag String) "
                "ENGINE = MergeTree ORDER BY grp")
        s.query("INSERT INTO sluice_test.grps_dup VALUES " +
                ", ".join(f"('{g}', '{t}')" for g, t in DUP_ROWS))
        s.close()
        return _model(cfg, "sluice_test.grps", "sluice_test.grps_dup")
    raise AssertionError(engine)


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("model")
    sources = fx.five_engines(root)
    sources = {name: _load_dims(name, cfg) for name, cfg in sources.items()}
    app = create_app(parse_settings({"sources": sources}, "<source model>"))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def frame():
    """Reference: pandas, the fact rows LEFT-joined to the dimension rows (merge how=left)."""
    df = pd.DataFrame(fx.make_rows())
    df = df.assign(n=df["n"].astype("Int64"), x=df["x"].astype("Float64"))
    dims = pd.DataFrame(DIM_ROWS, columns=["grp", "grps.label", "grps.weight"])
    out = df.merge(dims, on="grp", how="left")
    assert len(out) == len(df)  # many-to-one: the reference itself does not fan out
    return out


def _post(client, engine: str, body: dict, path: str = "/v1/chart"):
    return client.post(path, json={"source": engine, **body})


def _rows(resp) -> pd.DataFrame:
    assert resp.status_code == 200, resp.text[:1500]
    return pd.DataFrame(resp.json()["data"])


def _key(v):
    return "<NULL>" if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA else v


def _as_dict(keys, values) -> dict:
    return {_key(k): (None if v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v))
                      else float(v)) for k, v in zip(keys, values)}


def _same(got: dict, want: dict) -> None:
    assert set(got) == set(want), (sorted(map(str, got)), sorted(map(str, want)))
    for k in want:
        a, b = got[k], want[k]
        assert (a is None) == (b is None) and (a is None or math.isclose(a, b, rel_tol=1e-9,
                                                                         abs_tol=1e-9)), (k, a, b)


# --- computed columns ---------------------------------------------------------------

@pytest.mark.parametrize("engine", ENGINES)
def test_computed_key_and_kinds(client, frame, engine):
    """A computed text key (CASE) with a count and a sum; reference: pandas groupby."""
    info = client.get(f"/v1/sources/{engine}").json()
    kinds = {c["name"]: c["kind"] for c in info["computed"]}
    assert kinds == KINDS, info["computed"]
    assert {c["name"]: c["kind"] for c in info["dimension_columns"]} == {
        "grps.label": "string", "grps.weight": "integer", "grps_dup.tag": "string"}
    got = _rows(_post(client, engine, {"channels": {"x": {"column": "band"},
                                                    "y": {"agg": "sum", "column": "n"}}}))
    x = frame["x"].to_numpy(dtype=float, na_value=np.nan)
    band = np.where(False,  # SQL CASE: a NULL x fails every WHEN and takes the ELSE
                    None, np.where(x >= 10, "high", np.where(x >= 0, "mid", "low")))
    want = frame.assign(band=band).groupby("band", dropna=False)["n"].sum(min_count=1)
    _same(_as_dict(got["band"], got["sum_n"]), _as_dict(want.index, want.values))


@pytest.mark.parametrize("engine", ENGINES)
def test_computed_bins_where_sort_top(client, frame, engine):
    """A binned computed number, a computed column in where, a computed text key with top and
    sort; reference: numpy.histogram / pandas groupby + nlargest."""
    r = _post(client, engine, {
        "channels": {"x": {"column": "x_per_n", "bin": {"width": 5, "origin": 0}},
                     "y": {"agg": "count"}},
        "where": [{"column": "x_per_n", "gte": -20, "lt": 20}]})
    got = _rows(r)
    v = (frame["x"].to_numpy(dtype=float, na_value=np.nan)
         / frame["n"].to_numpy(dtype=float, na_value=np.nan))
    v = pd.Series(np.where(frame["n"].fillna(1).to_numpy() == 0, np.nan, v))
    v = v[(v >= -20) & (v < 20)]
    counts, edges = np.histogram(v, bins=np.arange(-20, 25, 5))
    want = {float(lo): float(c) for lo, c in zip(edges[:-1], counts) if c}
    _same(_as_dict(got["x_lo"], got["count"]), want)

    r = _post(client, engine, {
        "channels": {"x": {"column": "cat_up", "top": 3}, "y": {"agg": "count"}},
        "where": [{"column": "n_whole", "gt": 0}],
        "sort": [{"channel": "y", "desc": True}]})
    got = _rows(r)
    sub = frame[(frame["n"] * 2 > 0).fillna(False)]
    up = sub["cat"].fillna("?").str.upper()
    counts = up.value_counts()
    counts = counts.sort_values(ascending=False, kind="stable")
    top = counts.sort_index().sort_values(ascending=False, kind="stable").head(3)
    want = dict(top.astype(float))
    rest = float(counts.sum() - top.sum())
    if rest:
        want["(other)"] = rest
    _same(_as_dict(got["cat_up"], got["count"]), want)
    assert list(got["count"]) == sorted(got["count"], reverse=True)


@pytest.mark.parametrize("engine", ENGINES)
def test_request_expr_key_and_measure(client, frame, engine):
    """{"expr": ...} on a key (over a dimension column) and inside a measure; reference:
    pandas merge(how=left) + groupby."""
    r = _post(client, engine, {"channels": {
        "x": {"expr": "coalesce(grps.label, 'none')"},
        "y": {"agg": "sum", "expr": "n * 2 + 1", "name": "total"}}})
    got = _rows(r)
    key = frame["grps.label"].fillna("none")
    want = frame.assign(key=key, v=frame["n"] * 2 + 1).groupby("key")["v"].sum(min_count=1)
    _same(_as_dict(got["coalesce(grps.label, 'none')"], got["total"]),
          _as_dict(want.index, want.values))


@pytest.mark.parametrize("engine", ENGINES)
def test_expr_answer_types_are_the_same_on_every_engine(client, frame, engine):
    """Engines type arithmetic their own way (DuckDB kept ``amount * 100`` a DECIMAL,
    PostgreSQL an unsized numeric, MariaDB made ``ceil(amount)`` a BIGINT, ClickHouse's
    ``length`` is a UInt64, which was refused as a key); the answer's types are the
    allow-list's on all of them. Values: pandas (``str.len`` counts characters, as SQL's
    character length does)."""
    r = _post(client, engine, {"channels": {
        "x": {"expr": "length(cat)"}, "y": {"agg": "min", "expr": "amount"},
        "size": {"agg": "max", "expr": "ceil(amount)"},
        "color": {"agg": "min", "expr": "amount * 100"}, "opacity": {"agg": "sum", "expr": "n"}}})
    assert r.status_code == 200, r.text
    types = {c["name"]: c["type"] for c in r.json()["columns"]}
    assert types == {"length(cat)": "integer", "min_amount": "decimal",
                     "max_ceil(amount)": "double", "min_amount * 100": "double",
                     "sum_n": "integer"}
    got = _rows(r)
    amount = frame["amount"].map(lambda v: None if v is None else float(v)).astype("Float64")
    ref = frame.assign(L=frame["cat"].str.len().astype("Int64"), a=amount)
    g = ref.groupby("L", dropna=False)
    assert _as_dict(got["length(cat)"], got["max_ceil(amount)"]) == _as_dict(
        g["a"].max().index, np.ceil(g["a"].max()))
    assert _as_dict(got["length(cat)"], got["min_amount * 100"]) == _as_dict(
        g["a"].min().index, (g["a"].min() * 100).round(6))
    assert _as_dict(got["length(cat)"], got["sum_n"]) == _as_dict(g["n"].sum().index,
                                                                  g["n"].sum())


@pytest.mark.parametrize("engine", ENGINES)
def test_expr_extract_epoch_and_fields(client, frame, engine):
    """``extract(epoch from t)``: seconds since 1970 with their fraction (before: a 500 on
    MariaDB, SQLite and ClickHouse, and PostgreSQL cut the fraction off); the other fields are
    whole numbers, typed ``integer``. Reference: Python ``datetime.timestamp()`` and
    ``.hour`` of the UTC instants."""
    r = _post(client, engine, {"channels": {
        "x": {"expr": "extract(hour from ts)"}, "y": {"agg": "max", "expr": "extract(epoch from ts)"},
        "size": {"agg": "min", "expr": "extract(second from tsn)"}}})
    assert r.status_code == 200, r.text
    types = {c["name"]: c["type"] for c in r.json()["columns"]}
    assert types == {"extract(hour from ts)": "integer", "max_extract(epoch from ts)": "double",
                     "min_extract(second from tsn)": "integer"}
    got = _rows(r)
    epochs: dict = {}
    seconds: dict = {}
    for row in fx.make_rows():
        h = "<NULL>" if row["ts"] is None else row["ts"].hour
        epochs.setdefault(h, []).append(None if row["ts"] is None else row["ts"].timestamp())
        seconds.setdefault(h, []).append(None if row["tsn"] is None else row["tsn"].second)
    want_epoch = {h: max((v for v in vs if v is not None), default=None) for h, vs in epochs.items()}
    want_second = {h: min((v for v in vs if v is not None), default=None)
                   for h, vs in seconds.items()}
    assert _as_dict(got["extract(hour from ts)"], got["max_extract(epoch from ts)"]) == want_epoch
    assert _as_dict(got["extract(hour from ts)"], got["min_extract(second from tsn)"]) == {
        k: None if v is None else float(v) for k, v in want_second.items()}
    assert any(v % 1 for v in want_epoch.values() if v is not None)  # fractions are there


@pytest.mark.parametrize("engine", ENGINES)
def test_dimension_key_and_measure(client, frame, engine):
    """A dimension column as a key (facts without a match: NULL key) and a measure over a
    dimension column; reference: pandas merge(how=left) + groupby(dropna=False)."""
    got = _rows(_post(client, engine, {"channels": {
        "x": {"column": "grps.label"}, "y": {"agg": "count"},
        "size": {"agg": "sum", "column": "grps.weight"}}}))
    want = frame.groupby("grps.label", dropna=False).agg(
        count=("id", "size"), w=("grps.weight", lambda s: s.sum(min_count=1)))
    assert "<NULL>" in {_key(k) for k in want.index}  # east and NULL grp: no match
    _same(_as_dict(got["grps.label"], got["count"]), _as_dict(want.index, want["count"]))
    _same(_as_dict(got["grps.label"], got["sum_grps.weight"]), _as_dict(want.index, want["w"]))

    got = _rows(_post(client, engine, {"channels": {
        "x": {"column": "grp"}, "y": {"agg": "avg", "column": "grps.weight"}}}))
    want = frame.groupby("grp", dropna=False)["grps.weight"].mean()
    _same(_as_dict(got["grp"], got["avg_grps.weight"]), _as_dict(want.index, want.values))


# --- refusals -------------------------------------------------------------------------

@pytest.mark.parametrize("engine", ["duckdb", "clickhouse"])
def test_fan_out_refused(client, engine):
    for body, ptr in [
        ({"channels": {"x": {"column": "grps_dup.tag"}, "y": {"agg": "count"}}},
         "/channels/x/column"),
        ({"channels": {"x": {"column": "grp"}, "y": {"agg": "count"}},
          "where": [{"column": "grps_dup.tag", "eq": "A"}]}, "/where"),
        ({"channels": {"x": {"expr": "lower(grps_dup.tag)"}, "y": {"agg": "count"}}},
         "/channels/x/expr"),
    ]:
        r = _post(client, engine, body)
        assert r.status_code == 422, r.text
        p = r.json()
        assert p["pointer"] == ptr and "grps_dup" in p["detail"] and "'north'" in p["detail"], p


@pytest.mark.parametrize("engine", ["duckdb", "sqlite"])
def test_unknown_names(client, engine):
    r = _post(client, engine, {"channels": {"x": {"column": "grps.lable"}, "y": {"agg": "count"}}})
    assert r.status_code == 422 and r.json()["pointer"] == "/channels/x/column"
    assert "grps.label" in r.json()["suggestions"]
    r = _post(client, engine, {"channels": {"x": {"expr": "upper(grps.lable)"},
                                            "y": {"agg": "count"}}})
    assert r.status_code == 422 and r.json()["pointer"] == "/channels/x/expr", r.text
    assert "grps.label" in r.json()["suggestions"]
    r = _post(client, engine, {"channels": {"x": {"expr": "read_csv('/etc/passwd')"},
                                            "y": {"agg": "count"}}})
    assert r.status_code == 422 and r.json()["pointer"] == "/channels/x/expr", r.text
    r = _post(client, engine, {"channels": {"x": {"column": "x_per_km"}, "y": {"agg": "count"}}})
    assert r.status_code == 422 and "x_per_n" in r.json()["suggestions"]


def test_plain_requests_read_the_plain_table(client):
    """Nothing of the model used: the statement reads the table itself (no join)."""
    r = client.post("/v1/sql?dialect=duckdb", json={
        "source": "duckdb", "channels": {"x": {"column": "grp"}, "y": {"agg": "count"}}})
    assert r.status_code == 200
    sql = " ".join(r.json()["sql"])
    assert "JOIN" not in sql and 'FROM "t" AS "s"' in sql
    r = client.post("/v1/sql?dialect=duckdb", json={
        "source": "duckdb", "channels": {"x": {"column": "grps.label"}, "y": {"agg": "count"}}})
    sql = " ".join(r.json()["sql"])
    assert sql.count("LEFT JOIN") == 1 and "grps_dup" not in sql


def test_profile_of_computed_and_dimension_columns(client, frame):
    """Profiles read the model columns too; reference: pandas isna / nunique."""
    p = client.get("/v1/sources/duckdb/columns/grps.label").json()
    assert p["null_count"] == int(frame["grps.label"].isna().sum())
    p = client.get("/v1/sources/duckdb/columns/x_per_n").json()
    assert p["null_count"] == int((frame["x"].isna() | frame["n"].isna() | (frame["n"] == 0))
                                  .fillna(True).sum())


def test_spark_small(tmp_path):
    """Spark SQL (local mode), one small case: a dimension key (unmatched facts: NULL), a
    computed measure and a computed key's kind; reference: pandas merge(how=left) + groupby.
    The dimension tables are temporary views of the engine's own session (a path source
    registers its fact table the same way)."""
    pytest.importorskip("pyspark")
    from app.main import create_app
    from app.settings import parse_settings

    rows = fx.make_rows()[:400]
    cfg = fx.load_spark(tmp_path, fx.arrow_table(rows))
    cfg = {**cfg, "columns": {"x_per_n": COMPUTED["x_per_n"], "band": COMPUTED["band"]},
           "dimensions": [{"table": "grps", "fact_column": "grp", "key": "grp",
                           "columns": ["label", "weight"]}]}
    app = create_app(parse_settings({"sources": {"spark": cfg}}, "<source model: spark>"))
    with TestClient(app, raise_server_exceptions=False) as client:
        spark = app.state.catalog.engine("spark")._session()
        spark.createDataFrame(DIM_ROWS, "grp string, label string, weight int") \
            .createOrReplaceTempView("grps")
        info = client.get("/v1/sources/spark").json()
        assert {c["name"]: c["kind"] for c in info["computed"]} == {"x_per_n": "double",
                                                                   "band": "string"}
        got = _rows(_post(client, "spark", {"channels": {
            "x": {"column": "grps.label"}, "y": {"agg": "sum", "column": "x_per_n"}}}))
    df = pd.DataFrame(rows)
    df = df.assign(v=df["x"].astype("Float64") / df["n"].astype("Float64").replace(0, pd.NA))
    df = df.merge(pd.DataFrame(DIM_ROWS, columns=["grp", "label", "weight"]), on="grp",
                  how="left")
    want = df.groupby("label", dropna=False)["v"].sum(min_count=1)
    _same(_as_dict(got["grps.label"], got["sum_x_per_n"]), _as_dict(want.index, want.values))


@pytest.mark.parametrize("engine", ENGINES)
def test_long_expr_with_name(client, frame, engine):
    """An expr longer than the names engines keep (PostgreSQL 63 bytes, MariaDB 256
    characters for a column alias); reference: pandas groupby."""
    key = "CASE WHEN n IS NULL THEN 'no n' WHEN n >= 0 THEN 'zero or more' ELSE 'below zero' END"
    total = " + ".join(["coalesce(n, 0)"] * 25)
    assert len(total) > 256 and len(key) > 64
    got = _rows(_post(client, engine, {"channels": {
        "x": {"expr": key, "name": "n_sign"}, "y": {"agg": "count"},
        "size": {"agg": "sum", "expr": total, "name": "total"}}}))
    n = frame["n"]
    sign = np.where(n.isna(), "no n", np.where(n.fillna(0) >= 0, "zero or more", "below zero"))
    ref = pd.DataFrame({"k": sign, "v": n.fillna(0) * 25}).groupby("k")["v"].agg(["size", "sum"])
    _same(_as_dict(got["n_sign"], got["count"]), _as_dict(ref.index, ref["size"]))
    _same(_as_dict(got["n_sign"], got["total"]), _as_dict(ref.index, ref["sum"]))


@pytest.mark.parametrize("engine", ["duckdb", "mysql"])
def test_filter_sql_reads_model_columns(client, frame, engine):
    """filter_sql names dimension (depots.city) and computed columns; reference: pandas."""
    got = _rows(_post(client, engine, {
        "channels": {"x": {"column": "grp"}, "y": {"agg": "count"}},
        "filter_sql": "grps.weight >= 5 OR band = 'high'"}))
    x = frame["x"].to_numpy(dtype=float, na_value=np.nan)
    keep = (frame["grps.weight"] >= 5).fillna(False).to_numpy() | (x >= 10)
    want = frame[keep].groupby("grp", dropna=False).size()
    _same(_as_dict(got["grp"], got["count"]), _as_dict(want.index, want.values))
