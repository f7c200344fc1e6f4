"""Row-level access (``[[keys]] rows``, app/auth.py; ANDed in ``planner.source.relation``): a
key with a row condition sees only those rows, in every answer it can cause.

References outside the project:

(a) per engine (DuckDB, PostgreSQL, MariaDB, SQLite, ClickHouse via chdb; Spark one case):
    pandas on the rows of tests/engine_fixtures.py filtered in pandas by the same condition
    (groupby counts and sums, value counts, numpy.histogram over the answer's own bin edges,
    row counts);
(b) a Hypothesis property on DuckDB: random requests (keys, bins, trunc, top, measures,
    ``where`` with any/not, ``filter_sql`` written to reach around the condition, sort,
    empty_bins, limit, M4, batches with brushes, profiles, ``/v1/sql``) under a key with
    ``region = 'north'`` answer exactly what the same request answers over a DuckDB table
    that holds only the north rows (built with DuckDB's own ``WHERE``), with caching on and
    the unrestricted key asking the same request first; the SQL ``/v1/sql`` shows, run by
    DuckDB on the full table, returns what the pre-filtered source's SQL returns on the
    north-only table;
(c) config errors for bad conditions name the config key; a condition that does not fit
    the columns answers 503 for that key (never the unfiltered rows);
(d) the answer cache (local and shared Redis) and the plan cache keep keys apart.
"""

from __future__ import annotations

import copy
import math
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow.ipc as pa_ipc
import pytest
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import test_fuzz_fixture as ff  # noqa: E402 - pytest puts tests/ on sys.path
from testmods import load

fx = load("engine_fixtures")

ROWS_KEY = "k-rows-0123456789abcdef0123"
ALL_KEY = "k-all-fedcba9876543210fedcba"

# the engines' fixture rows: a condition with AND, OR, LIKE (case-sensitive) and NULLs around
COND = "grp = 'north' AND (cat LIKE 'a%' OR n > 20)"
ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]


def _hdr(key: str) -> dict:
    return {"X-API-Key": key}


def _keys(sources: list[str], cond: str) -> list[dict]:
    from app.auth import sha256_hex

    return [{"name": "restricted", "hash": f"sha256:{sha256_hex(ROWS_KEY)}", "sources": sources,
             "rows": {s: cond for s in sources}},
            {"name": "everything", "hash": f"sha256:{sha256_hex(ALL_KEY)}", "sources": ["*"]}]


def _engine_frame() -> pd.DataFrame:
    df = pd.DataFrame(fx.make_rows())
    return df.assign(n=df["n"].astype("Int64"), x=df["x"].astype("Float64"))


def _engine_mask(df: pd.DataFrame) -> pd.Series:
    """COND in pandas: a row passes when the condition is TRUE (a NULL comparison is not)."""
    like = df["cat"].map(lambda v: isinstance(v, str) and v.startswith("a"))
    return ((df["grp"] == "north").fillna(False)
            & (like | (df["n"] > 20).fillna(False).astype(bool)))


@pytest.fixture(scope="module")
def engines(tmp_path_factory):
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("rows_engines")
    sources = fx.five_engines(root)
    st_ = parse_settings({"sources": sources, "keys": _keys(ENGINES, COND),
                          "server": {"request_log": False}}, "<row access engines>")
    with TestClient(create_app(st_), raise_server_exceptions=False) as c:
        yield c


def _ok(r) -> dict:
    assert r.status_code == 200, r.text
    return r.json()


def _check_engine(c: TestClient, source: str, df: pd.DataFrame) -> None:
    keep = df[_engine_mask(df)]
    assert 30 < len(keep) < len(df) // 4  # the condition selects a real, small part
    # grouped chart: count and sum per category (reference: pandas groupby, NULL its own group)
    body = {"source": source, "channels": {"x": {"column": "cat"}, "y": {"agg": "count"},
                                           "size": {"agg": "sum", "column": "n", "name": "total"}},
            "filter_sql": "1 = 1 OR grp <> 'north'"}  # the request's own OR cannot widen it
    got = _ok(c.post("/v1/chart", json=body, headers=_hdr(ROWS_KEY)))
    ref = keep.groupby("cat", dropna=False).agg(count=("id", "size"),
                                                total=("n", lambda s: s.sum(min_count=1)))
    want = {(None if pd.isna(k) else k): (int(r["count"]), None if pd.isna(r["total"])
                                          else int(r["total"])) for k, r in ref.iterrows()}
    d = got["data"]
    have = {k: (n, None if s is None else int(s)) for k, n, s in zip(d["cat"], d["count"], d["total"])}
    assert have == want
    assert got["stats"]["source_rows"] == len(keep) and got["stats"]["matched_rows"] == len(keep)
    # data-driven bins (an extents statement): counts as numpy.histogram counts them over
    # the answer's own edges (last bin closed), range within the kept rows'
    h = _ok(c.post("/v1/chart", json={"source": source, "channels": {
        "x": {"column": "x", "bin": {"bins": 8}}, "y": {"agg": "count"}}}, headers=_hdr(ROWS_KEY)))
    xs = keep["x"].dropna().astype(float).to_numpy()
    b = h["bins"]["x"]
    assert b["start"] <= xs.min() and b["stop"] >= xs.max()
    edges = np.linspace(b["start"], b["stop"], b["count"] + 1)
    counts, _ = np.histogram(xs, bins=edges)
    have = dict(zip(h["data"]["x_lo"], h["data"]["count"]))
    assert [have.get(float(e), 0) for e in edges[:-1]] == counts.tolist()
    # row count and profile (reference: len, pandas value_counts)
    detail = _ok(c.get(f"/v1/sources/{source}", headers=_hdr(ROWS_KEY)))
    assert detail["row_count"] == len(keep)
    full = _ok(c.get(f"/v1/sources/{source}", headers=_hdr(ALL_KEY)))
    assert full["row_count"] == len(df)
    prof = _ok(c.get(f"/v1/sources/{source}/columns/cat?top=20", headers=_hdr(ROWS_KEY)))
    assert prof["row_count"] == len(keep) and prof["null_count"] == int(keep["cat"].isna().sum())
    vc = keep["cat"].value_counts()
    assert {v["value"]: v["count"] for v in prof["top_values"]["values"]} == vc.to_dict()
    # the plan-only SQL carries the condition (its LIKE and the north literal)
    sql = _ok(c.post("/v1/sql", json=body, headers=_hdr(ROWS_KEY)))["sql"]
    assert all("north" in s for s in sql)


@pytest.mark.parametrize("engine", ENGINES)
def test_row_condition_equals_pandas_on_every_engine(engines, engine):
    _check_engine(engines, engine, _engine_frame())


def test_row_condition_on_spark(tmp_path_factory):
    """One small case on Spark (a local JVM): counts per group under the key's condition."""
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("rows_spark")
    rows = fx.make_rows()
    src = fx.load_spark(root, fx.arrow_table(rows))
    src["statement_timeout_ms"] = 180_000  # the first request starts the JVM
    st_ = parse_settings({"sources": {"spark": src}, "keys": _keys(["spark"], COND),
                          "server": {"request_log": False}}, "<row access spark>")
    df = _engine_frame()
    keep = df[_engine_mask(df)]
    with TestClient(create_app(st_), raise_server_exceptions=False) as c:
        got = _ok(c.post("/v1/chart", json={"source": "spark", "channels": {
            "x": {"column": "cat"}, "y": {"agg": "count"}}, "filter_sql": "true OR 1 = 1"},
            headers=_hdr(ROWS_KEY)))
        want = keep["cat"].value_counts(dropna=False)  # reference: pandas value_counts
        assert dict(zip(got["data"]["cat"], got["data"]["count"])) == {
            (None if pd.isna(k) else k): int(v) for k, v in want.items()}
        assert got["stats"]["source_rows"] == len(keep)


# ---- (b) the property: the key's answers equal answers over a table of only its rows -----

NORTH = "region = 'north'"


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    """One app, caching on: ``deliveries`` (all rows) read by the restricted key and by the
    unrestricted one, and ``north`` (a DuckDB file holding only the north rows, filtered by
    DuckDB) read by the unrestricted key."""
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("rows_pair")
    full, north = root / "full.duckdb", root / "north.duckdb"
    df = ff.build_duckdb(full)
    con = duckdb.connect(str(north))
    con.execute(f"ATTACH '{full}' AS f (READ_ONLY)")
    con.execute("CREATE TABLE deliveries AS SELECT * FROM f.deliveries WHERE region = 'north' "
                "ORDER BY id")
    con.close()
    sources = {"deliveries": {"engine": "duckdb", "path": str(full), "table": "deliveries"},
               "north": {"engine": "duckdb", "path": str(north), "table": "deliveries"}}
    keys = _keys(["deliveries"], NORTH)
    st_ = parse_settings({"sources": sources, "keys": keys, "server": {"request_log": False}},
                         "<row access pair>")
    refs = []
    for f in (full, north):  # copies for the test's own DuckDB connections
        refs.append(root / f"ref_{f.name}")
        shutil.copyfile(f, refs[-1])
    with TestClient(create_app(st_), raise_server_exceptions=False) as c, \
            duckdb.connect(str(refs[0]), read_only=True) as con_full, \
            duckdb.connect(str(refs[1]), read_only=True) as con_north:
        yield c, df, con_full, con_north


CATS = ["depot", "vehicle", "region", "express"]
NUMS = ["fee", "distance_km", "weight"]
SNEAKY = ["1 = 1 OR 1 = 1", "region = 'south') OR (1 = 1", "fee > 0 -- OR 1 = 1",
          "fee > 0 /* */ OR 1 = 1", "region <> 'north' OR region = 'north'", "true",
          "region = 'south'", "NOT (region = 'north')", "fee > 10 OR region IS NULL",
          "(1 = 1) OR (region = 'east'); SELECT 1", "region IN ('east', 'west', 'north')"]


def _key_channel(draw) -> dict:
    kind = draw(st.sampled_from(["cat", "num", "time"]))
    if kind == "cat":
        ch = {"column": draw(st.sampled_from(CATS))}
        if draw(st.booleans()):
            ch["top"] = draw(st.integers(1, 4))
        return ch
    if kind == "num":
        col = draw(st.sampled_from(NUMS))
        b = draw(st.sampled_from([{"bins": draw(st.integers(1, 12))},
                                  {"width": draw(st.sampled_from([2.5, 5, 10]))},
                                  {"rule": draw(st.sampled_from(["sturges", "scott",
                                                                 "freedman_diaconis"]))},
                                  {"bins": 6, "limits": [0, 30]}]))
        return {"column": col, "bin": b}
    if draw(st.booleans()):
        return {"column": "delivered_at", "trunc": draw(st.sampled_from(["month", "week", "day"]))}
    return {"column": "delivered_at", "bin": {"bins": draw(st.integers(2, 10))}}


def _measure(draw) -> dict:
    agg = draw(st.sampled_from(["count", "sum", "avg", "min", "max", "median", "count_distinct",
                                "stddev_pop", "share"]))
    if agg in ("count", "share"):
        return {"agg": agg}
    col = draw(st.sampled_from(NUMS + (["depot"] if agg == "count_distinct" else [])))
    return {"agg": agg, "column": col}


@st.composite
def predicates(draw):
    col = draw(st.sampled_from(["region", "depot", "fee", "weight", "express", "delivered_at"]))
    if col in ("region", "depot"):
        vals = ff.REGIONS if col == "region" else ff.DEPOTS
        op = draw(st.sampled_from(["eq", "ne", "in", "not_in", "is_null", "starts_with"]))
        if op in ("in", "not_in"):
            return {"column": col, op: draw(st.lists(st.sampled_from(vals), min_size=1, max_size=3))}
        if op == "is_null":
            return {"column": col, "is_null": draw(st.booleans())}
        if op == "starts_with":
            return {"column": col, op: draw(st.sampled_from(["n", "s", "No", "H"]))}
        return {"column": col, op: draw(st.sampled_from(vals))}
    if col == "express":
        return {"column": col, "eq": draw(st.booleans())}
    if col == "delivered_at":
        return {"column": col, draw(st.sampled_from(["gte", "lt"])):
                draw(st.sampled_from(["2026-02-01T00:00:00Z", "2026-04-15", "2026-06-01T12:00:00"]))}
    return {"column": col, draw(st.sampled_from(["lt", "gte", "ne"])): draw(st.integers(1, 40))}


def _filters(draw, n: int = 3) -> list:
    out = []
    for _ in range(draw(st.integers(0, n))):
        f = draw(predicates())
        shape = draw(st.sampled_from(["plain", "any", "not"]))
        if shape == "any":
            f = {"any": [f, draw(predicates())]}
        elif shape == "not":
            f = {"not": f}
        out.append(f)
    return out


@st.composite
def chart_bodies(draw) -> dict:
    if draw(st.integers(0, 9)) == 0:  # an M4 line
        body: dict = {"reduce": {"method": "m4", "width_px": draw(st.integers(3, 40))},
                      "channels": {"x": {"column": "delivered_at"},
                                   "y": {"column": draw(st.sampled_from(NUMS))}}}
    else:
        chans = {"x": _key_channel(draw), "y": _measure(draw)}
        if draw(st.booleans()):
            chans["color"] = {"column": draw(st.sampled_from(CATS))}
        if draw(st.integers(0, 4)) == 0:
            chans["by"] = [{"column": draw(st.sampled_from(CATS))}]
        body = {"channels": chans}
        if "color" in chans and draw(st.booleans()):
            body["stack"] = draw(st.sampled_from(["sum", "fraction", "centered"]))
        if draw(st.integers(0, 4)) == 0:
            body["facet"] = {"row": {"column": draw(st.sampled_from(CATS))}}
        if draw(st.booleans()):
            body["sort"] = [{"channel": draw(st.sampled_from(sorted(chans))),
                             "desc": draw(st.booleans())}]
        if draw(st.booleans()):
            body["empty_bins"] = draw(st.sampled_from(["zero", "null"]))
    body["where"] = _filters(draw)
    if draw(st.booleans()):
        body["filter_sql"] = draw(st.sampled_from(SNEAKY))
    if draw(st.booleans()):
        body["limit"] = draw(st.integers(1, 50))
    if draw(st.booleans()):
        body["tz"] = draw(st.sampled_from(["UTC", "Europe/Berlin", "America/New_York"]))
    return body


def _same(a, b, path="") -> None:
    """Equal JSON, floats to 1e-9 relative (summation order)."""
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, (int, float)) and isinstance(b, (int, float)), (path, a, b)
        assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), (path, a, b)
    elif isinstance(a, dict):
        assert isinstance(b, dict) and set(a) == set(b), (path, sorted(a), sorted(b))
        for k in a:
            _same(a[k], b[k], f"{path}/{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), (path, a, b)
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{path}/{i}")
    else:
        assert a == b, (path, a, b)


_VOLATILE = ("sql", "timing_ms", "cache", "source")


def _strip(doc):
    if isinstance(doc, dict):
        return {k: _strip(v) for k, v in doc.items() if k not in _VOLATILE}
    if isinstance(doc, list):
        return [_strip(v) for v in doc]
    return doc


def _compare(r_rows, r_ref, seen: dict) -> None:
    assert r_rows.status_code == r_ref.status_code, (r_rows.text, r_ref.text)
    seen[r_rows.status_code] = seen.get(r_rows.status_code, 0) + 1
    if r_rows.status_code == 200:
        _same(_strip(r_rows.json()), _strip(r_ref.json()))
    else:  # the same mistake, at the same field
        assert r_rows.json().get("pointer") == r_ref.json().get("pointer")


SEEN: dict = {}
PROP = settings(max_examples=120, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


@PROP
@given(body=chart_bodies())
def test_no_chart_reaches_outside_the_row_condition(pair, body):
    c = pair[0]
    full = c.post("/v1/chart", json={"source": "deliveries", **body}, headers=_hdr(ALL_KEY))
    assert full.status_code < 500, full.text  # cached first: the key must not be served it
    got = c.post("/v1/chart", json={"source": "deliveries", **body}, headers=_hdr(ROWS_KEY))
    ref = c.post("/v1/chart", json={"source": "north", **body}, headers=_hdr(ALL_KEY))
    _compare(got, ref, SEEN)
    if got.status_code == 200:  # the Arrow answer (a cache entry of its own) too
        arrow = {"Accept": "application/vnd.apache.arrow.stream"}
        c.post("/v1/chart", json={"source": "deliveries", **body}, headers={**arrow, **_hdr(ALL_KEY)})
        a = c.post("/v1/chart", json={"source": "deliveries", **body},
                   headers={**arrow, **_hdr(ROWS_KEY)})
        b = c.post("/v1/chart", json={"source": "north", **body}, headers={**arrow, **_hdr(ALL_KEY)})
        ta, tb = (pa_ipc.open_stream(r.content).read_all() for r in (a, b))
        _same(ta.to_pydict(), tb.to_pydict())


@PROP
@given(charts=st.lists(chart_bodies(), min_size=1, max_size=3), shared=st.integers(0, 2),
       brushes=st.lists(st.integers(0, 2), max_size=3), data=st.data())
def test_no_batch_reaches_outside_the_row_condition(pair, charts, shared, brushes, data):
    c = pair[0]
    charts = [{"id": f"c{i}", **{k: v for k, v in ch.items() if k != "tz"}}
              for i, ch in enumerate(charts)]
    for i in brushes:
        if i < len(charts):
            charts[i]["brush"] = [data.draw(predicates())]
    body = {"where": [data.draw(predicates()) for _ in range(shared)], "charts": charts}
    c.post("/v1/batch", json={"source": "deliveries", **copy.deepcopy(body)}, headers=_hdr(ALL_KEY))
    got = c.post("/v1/batch", json={"source": "deliveries", **body}, headers=_hdr(ROWS_KEY))
    ref = c.post("/v1/batch", json={"source": "north", **body}, headers=_hdr(ALL_KEY))
    assert got.status_code == ref.status_code, (got.text, ref.text)
    SEEN["batch"] = SEEN.get("batch", 0) + (got.status_code == 200)
    if got.status_code != 200:
        return
    for a, b in zip(got.json()["results"], ref.json()["results"], strict=True):
        if "status" in a or "status" in b:  # a problem member
            assert a.get("status") == b.get("status") and a.get("pointer") == b.get("pointer")
        else:
            _same(_strip(a), _strip(b))


@PROP
@given(body=chart_bodies())
def test_plan_only_sql_carries_the_row_condition(pair, body):
    """The SQL /v1/sql shows for the key, run by DuckDB on the FULL table, returns what the
    pre-filtered source's SQL returns on the north-only table (reference: DuckDB itself)."""
    c, _, full, north = pair
    got = c.post("/v1/sql", json={"source": "deliveries", **body}, headers=_hdr(ROWS_KEY))
    ref = c.post("/v1/sql", json={"source": "north", **body}, headers=_hdr(ALL_KEY))
    assert got.status_code == ref.status_code, (got.text, ref.text)
    if got.status_code != 200:
        return
    other = c.post("/v1/sql?dialect=postgres", json={"source": "deliveries", **body},
                   headers=_hdr(ROWS_KEY))  # another target: the condition rebuilt there
    if other.status_code == 200:
        cond = 'WHERE ("s"."region" = \'north\')) AS "s"'
        assert all(cond in q for q in other.json()["sql"])
    mine, theirs = got.json()["sql"], ref.json()["sql"]
    assert len(mine) == len(theirs)
    for a, b in zip(mine, theirs):
        if "?" in a:  # (plan-only SQL writes values as literals; never expected)
            pytest.fail(f"unexpected parameter marker in {a}")
        ra, rb = full.execute(a).fetchall(), north.execute(b).fetchall()
        _same([list(map(_plain, r)) for r in ra], [list(map(_plain, r)) for r in rb])


def _plain(v):
    return float(v) if hasattr(v, "as_integer_ratio") and not isinstance(v, (int, bool)) else (
        v if isinstance(v, (int, float, str, bool, type(None))) else str(v))


@PROP
@given(col=st.sampled_from(CATS + NUMS + ["delivered_at", "id"]),
       top=st.one_of(st.none(), st.integers(0, 6)))
def test_profiles_and_counts_stay_inside(pair, col, top):
    c, df = pair[0], pair[1]
    q = "" if top is None else f"?top={top}"
    c.get(f"/v1/sources/deliveries/columns/{col}{q}", headers=_hdr(ALL_KEY))
    got = c.get(f"/v1/sources/deliveries/columns/{col}{q}", headers=_hdr(ROWS_KEY))
    ref = c.get(f"/v1/sources/north/columns/{col}{q}", headers=_hdr(ALL_KEY))
    _compare(got, ref, SEEN)
    keep = df[df["region"] == "north"]  # reference: pandas
    assert got.json()["row_count"] == len(keep)
    s = keep[col]
    if col in NUMS:
        assert math.isclose(got.json()["min"], float(s.min())) and math.isclose(
            got.json()["max"], float(s.max()))
    detail = c.get("/v1/sources/deliveries", headers=_hdr(ROWS_KEY)).json()
    assert detail["row_count"] == len(keep)
    assert c.get("/v1/sources/deliveries", headers=_hdr(ALL_KEY)).json()["row_count"] == len(df)


def test_the_property_saw_answers():
    """The properties above compared real answers, not only problems (runs after them)."""
    print(f"row-access property: answers by status {SEEN}")
    assert SEEN.get(200, 0) >= 60 and SEEN.get("batch", 0) >= 20, SEEN


# ---- (c) config errors -------------------------------------------------------------------

@pytest.mark.parametrize("rows, where, says", [
    ({"deliveries": "region = 'north' -- x"}, "keys.0.rows.deliveries", "comments"),
    ({"deliveries": "region = 'north'; DROP TABLE deliveries"}, "keys.0.rows.deliveries", ";"),
    ({"deliveries": ""}, "keys.0.rows.deliveries", "non-empty"),
    ({"deliveries": 3}, "keys.0.rows.deliveries", "non-empty"),
    ({"deliveries": "region = "}, "keys.0.rows.deliveries", "condition"),
    ({"elsewhere": "region = 'north'"}, "keys.0.rows.elsewhere", "unknown source"),
    ({"other": "region = 'north'"}, "keys.0.rows.other", "not in this key's sources"),
    ("region = 'north'", "keys.0.rows", "table of source name"),
    ({}, "keys.0.rows", "table of source name"),
])
def test_bad_row_conditions_are_config_errors(tmp_path, rows, where, says):
    from app.auth import sha256_hex
    from app.settings import ConfigError, parse_settings

    src = {"engine": "duckdb", "path": str(tmp_path / "x.duckdb"), "table": "deliveries"}
    with pytest.raises(ConfigError) as e:
        parse_settings({"sources": {"deliveries": src, "other": src}, "keys": [
            {"hash": f"sha256:{sha256_hex('k')}", "sources": ["deliveries"], "rows": rows}]},
            "sluice.toml")
    assert e.value.key == where and says in str(e.value), str(e.value)


def test_a_condition_that_does_not_fit_the_columns_answers_503(tmp_path, caplog):
    """Known only at introspection: logged at start-up; the key's requests answer 503
    row-condition-invalid (never the unfiltered rows); other keys are served."""
    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path / "a.duckdb"
    ff.build_duckdb(db)
    keys = _keys(["deliveries"], "regoin = 'north'")
    st_ = parse_settings({"sources": {"deliveries": {"engine": "duckdb", "path": str(db),
                                                     "table": "deliveries"}},
                          "keys": keys, "server": {"request_log": False}}, "<bad rows>")
    body = {"source": "deliveries", "channels": {"x": {"column": "region"}, "y": {"agg": "count"}}}
    with caplog.at_level("ERROR", logger="sluice"):
        with TestClient(create_app(st_), raise_server_exceptions=False) as c:
            assert any("keys.0.rows.deliveries" in r.getMessage() for r in caplog.records)
            for method, path, js in (("POST", "/v1/chart", body), ("POST", "/v1/sql", body),
                                     ("POST", "/v1/batch", {"source": "deliveries",
                                                            "charts": [body]}),
                                     ("GET", "/v1/sources/deliveries", None),
                                     ("GET", "/v1/sources/deliveries/columns/region", None)):
                r = c.request(method, path, json=js, headers=_hdr(ROWS_KEY))
                doc = r.json() if path != "/v1/batch" else r.json()["results"][0]
                assert doc.get("status") == 503 and doc["type"].endswith("row-condition-invalid"), r.text
                assert "regoin" in doc["detail"]
            assert c.post("/v1/chart", json=body, headers=_hdr(ALL_KEY)).status_code == 200


# ---- (d) caches keep keys apart ----------------------------------------------------------

def _two_conditions(db: Path) -> list[dict]:
    from app.auth import sha256_hex

    return [{"name": "north", "hash": f"sha256:{sha256_hex('k-north')}", "sources": ["deliveries"],
             "rows": {"deliveries": "region = 'north'"}},
            {"name": "south", "hash": f"sha256:{sha256_hex('k-south')}", "sources": ["deliveries"],
             "rows": {"deliveries": "region = 'south'"}}]


def test_two_conditions_identical_request_different_answers_cached(tmp_path):
    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path / "a.duckdb"
    df = ff.build_duckdb(db)
    st_ = parse_settings({"sources": {"deliveries": {"engine": "duckdb", "path": str(db),
                                                     "table": "deliveries"}},
                          "keys": _two_conditions(db), "server": {"request_log": False}}, "<2>")
    body = {"source": "deliveries", "channels": {"x": {"column": "fee", "bin": {"bins": 5}},
                                                 "y": {"agg": "count"}}}
    with TestClient(create_app(st_), raise_server_exceptions=False) as c:
        for _ in range(2):  # the second round: every answer from the cache, still apart
            for region in ("north", "south"):
                r = c.post("/v1/chart", json=body, headers=_hdr(f"k-{region}")).json()
                assert sum(r["data"]["count"]) == int((df["region"] == region).sum())  # pandas
                keep = df.loc[df["region"] == region, "fee"]
                assert r["bins"]["x"]["start"] <= keep.min() and r["bins"]["x"]["stop"] >= keep.max()
                p = c.get("/v1/sources/deliveries/columns/region",
                          headers=_hdr(f"k-{region}")).json()
                assert [v["value"] for v in p["top_values"]["values"]] == [region]
        assert r["cache"] == "hit" and p["cache"] == "hit"


def test_shared_redis_cache_keeps_conditions_apart(tmp_path):
    """Two replicas sharing the machine's Redis: the north key's answer, stored by replica 1,
    is served by replica 2 to the north key (a shared hit) and never to the south key."""
    rc = load("replica_cluster")
    if not rc.port_open(6379):
        pytest.skip("no Redis on 127.0.0.1:6379")
    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path / "a.duckdb"
    df = ff.build_duckdb(db)
    conf = {"sources": {"deliveries": {"engine": "duckdb", "path": str(db), "table": "deliveries"}},
            "keys": _two_conditions(db), "server": {"request_log": False},
            "cache": {"url": "redis://127.0.0.1:6379/0"}}
    body = {"source": "deliveries", "channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}
    with TestClient(create_app(parse_settings(copy.deepcopy(conf), "<r1>")),
                    raise_server_exceptions=False) as one, \
            TestClient(create_app(parse_settings(copy.deepcopy(conf), "<r2>")),
                       raise_server_exceptions=False) as two:
        a = one.post("/v1/chart", json=body, headers=_hdr("k-north")).json()
        b = two.post("/v1/chart", json=body, headers=_hdr("k-north")).json()
        s = two.post("/v1/chart", json=body, headers=_hdr("k-south")).json()
        assert a["cache"] == "miss" and b["cache"] == "hit" and a["data"] == b["data"]
        assert s["cache"] == "miss"
        for r, region in ((b, "north"), (s, "south")):  # reference: pandas value_counts
            want = df.loc[df["region"] == region, "depot"].value_counts(dropna=False)
            assert dict(zip(r["data"]["depot"], r["data"]["count"])) == {
                (None if pd.isna(k) else k): int(v) for k, v in want.items()}


def test_what_one_keys_rows_did_never_shows_in_anothers_answer(tmp_path):
    """The checked plain floor (app/service.py) remembers a bin that missed an edge; it must
    remember it per row condition: the south rows sit on the edges of 0.1-wide bins (the
    plain floor misses some, a second statement runs), the north rows nowhere near them.
    The north key's answer after the unrestricted key's must equal the answer over a table
    of only the north rows (reference: the same request on DuckDB over that table), and every
    row is in the bin lo <= v < hi it reports (reference: pandas.cut over the answer's edges)."""
    import math as m

    from app.main import create_app
    from app.settings import parse_settings

    edges = sorted({v for i in range(-200, 200) for e in [i * 0.1]
                    for v in (e, m.nextafter(e, -m.inf), m.nextafter(e, m.inf))})
    plain = [(i + 0.5) * 0.1 for i in range(-200, 200)]
    full, north = tmp_path / "full.duckdb", tmp_path / "north.duckdb"
    for path, rows in ((full, [("south", v) for v in edges] + [("north", v) for v in plain]),
                       (north, [("north", v) for v in plain])):
        con = duckdb.connect(str(path))
        con.execute("CREATE TABLE t (region VARCHAR, v DOUBLE)")
        con.executemany("INSERT INTO t VALUES (?, ?)", rows)
        con.close()
    sources = {"full": {"engine": "duckdb", "path": str(full), "table": "t"},
               "north": {"engine": "duckdb", "path": str(north), "table": "t"}}
    st_ = parse_settings({"sources": sources, "keys": _keys(["full"], NORTH),
                          "server": {"request_log": False}}, "<checked floor rows>")
    body = {"channels": {"x": {"column": "v", "bin": {"width": 0.1, "origin": 0}},
                         "y": {"agg": "count"}}}
    with TestClient(create_app(st_), raise_server_exceptions=False) as c:
        everyone = _ok(c.post("/v1/chart", json={"source": "full", **body}, headers=_hdr(ALL_KEY)))
        assert everyone["stats"]["statements"] >= 2  # the check failed on the south rows
        got = _ok(c.post("/v1/chart", json={"source": "full", **body}, headers=_hdr(ROWS_KEY)))
        ref = _ok(c.post("/v1/chart", json={"source": "north", **body}, headers=_hdr(ALL_KEY)))
        _same(_strip(got), _strip(ref))
        # the same statements too (the guarded form would show the south rows' edge miss)
        derived = '(SELECT * FROM "t" AS "s" WHERE ("s"."region" = \'north\')) AS "s"'
        assert all(derived in q for q in got["sql"])
        assert [q.replace(derived, '"t" AS "s"') for q in got["sql"]] == ref["sql"]
        lo = np.array(got["data"]["x_lo"])
        cut = pd.cut(pd.Series(plain), np.append(lo, got["data"]["x_hi"][-1]), right=False)
        assert cut.value_counts(sort=False).tolist() == got["data"]["count"]


def test_the_condition_reads_instants_in_utc_whatever_the_request_zone(tmp_path):
    """An offset-less instant in a key's condition is UTC: a request's ``tz`` (which moves
    the instants of its own filters) cannot move the key's boundary (reference: pandas)."""
    from app.main import create_app
    from app.settings import parse_settings

    db = tmp_path / "a.duckdb"
    df = ff.build_duckdb(db)
    cond = "delivered_at >= TIMESTAMP '2026-03-01 00:00:00'"
    st_ = parse_settings({"sources": {"deliveries": {"engine": "duckdb", "path": str(db),
                                                     "table": "deliveries"}},
                          "keys": _keys(["deliveries"], cond), "server": {"request_log": False}},
                         "<tz>")
    edge = pd.Timestamp("2026-03-01T00:00:00Z")
    want = int((df["delivered_at"] >= edge).sum())
    # rows within a day of the edge exist, so a zone shift of hours would change the count
    assert ((df["delivered_at"] - edge).abs() < pd.Timedelta(hours=12)).sum() > 0
    with TestClient(create_app(st_), raise_server_exceptions=False) as c:
        for tz in ("UTC", "Pacific/Kiritimati", "America/Los_Angeles"):
            r = _ok(c.post("/v1/chart", json={"source": "deliveries", "tz": tz, "channels": {
                "x": {"column": "region"}, "y": {"agg": "count"}}}, headers=_hdr(ROWS_KEY)))
            assert r["stats"]["source_rows"] == r["stats"]["matched_rows"] == want, tz
            p = _ok(c.get("/v1/sources/deliveries/columns/delivered_at", headers=_hdr(ROWS_KEY)))
            assert p["row_count"] == want
            assert pd.Timestamp(p["min"]) >= edge
        ready = c.get("/readyz", headers=_hdr(ROWS_KEY)).json()["sources"]["deliveries"]
        assert "row_count" not in ready  # the table's total is not this key's to see
        assert c.get("/readyz", headers=_hdr(ALL_KEY)).json()["sources"]["deliveries"][
            "row_count"] == len(df)
