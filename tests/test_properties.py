"""Property tests for the planner through the service: random valid requests (keys, measures,
``where`` trees, ``filter_sql``) on the fixture table equal a pandas reference.

The reference applies SQL's three-valued logic with pandas' nullable "boolean" dtype (Kleene
AND / OR / NOT, as in SQL: a comparison with NULL is unknown, a row passes only when the
whole filter is true), and groups with ``dropna=False`` (a NULL key is its own group).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
KEYS = ["depot", "vehicle", "region", "express"]
DEPOTS = fx.DEPOTS + ["Nowhere"]


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    root = tmp_path_factory.mktemp("props")
    db = root / "p.duckdb"
    df = fx.build_duckdb(db)
    cfg = root / "sluice.toml"
    cfg.write_text(fx.config(db) + "[server]\nrequest_log = false\n")
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        yield c, df


# ---- three-valued reference --------------------------------------------------------------

def _tv(values, null) -> pd.Series:
    return pd.Series(pd.array([pd.NA if n else bool(v) for v, n in zip(values, null)], dtype="boolean"))


def _pred_mask(df: pd.DataFrame, p: dict) -> pd.Series:
    col = df[p["column"]]
    null = col.isna().to_numpy()
    out = pd.Series(pd.array([True] * len(df), dtype="boolean"))
    for op, v in p.items():
        if op == "column":
            continue
        if op == "is_null":
            out &= _tv(null if v else ~null, np.zeros(len(df), bool))
            continue
        vals = col.to_numpy(dtype=object)
        if op == "eq":
            m = [x == v for x in vals]
        elif op == "ne":
            m = [x != v for x in vals]
        elif op == "lt":
            m = [x is not None and x < v for x in vals]
        elif op == "lte":
            m = [x is not None and x <= v for x in vals]
        elif op == "gt":
            m = [x is not None and x > v for x in vals]
        elif op == "gte":
            m = [x is not None and x >= v for x in vals]
        elif op == "in":
            m = [x in v for x in vals]
        elif op == "not_in":
            m = [x not in v for x in vals]
        elif op == "contains":
            m = [x is not None and v in x for x in vals]
        elif op == "starts_with":
            m = [x is not None and x.startswith(v) for x in vals]
        else:
            raise AssertionError(op)
        out &= _tv(m, null)
    return out


def _mask(df: pd.DataFrame, f: dict) -> pd.Series:
    if "any" in f:
        out = pd.Series(pd.array([False] * len(df), dtype="boolean"))
        for g in f["any"]:
            out |= _mask(df, g)
        return out
    if "not" in f:
        return ~_mask(df, f["not"])
    return _pred_mask(df, f)


# ---- strategies ------------------------------------------------------------------------------

def predicates():
    return st.one_of(
        st.builds(lambda v: {"column": "depot", "eq": v}, st.sampled_from(DEPOTS)),
        st.builds(lambda v: {"column": "depot", "ne": v}, st.sampled_from(DEPOTS)),
        st.builds(lambda v: {"column": "depot", "in": v}, st.lists(st.sampled_from(DEPOTS), min_size=1, max_size=3)),
        st.builds(lambda v: {"column": "vehicle", "not_in": v}, st.lists(st.sampled_from(fx.VEHICLES), min_size=1, max_size=2)),
        st.builds(lambda lo, w: {"column": "fee", "gte": lo, "lt": lo + w},
                  st.integers(0, 30), st.integers(1, 20)),
        st.builds(lambda v: {"column": "weight", "gt": v}, st.integers(0, 60)),
        st.builds(lambda v: {"column": "distance_km", "lte": v}, st.floats(0, 80, allow_nan=False).map(lambda x: round(x, 2))),
        st.builds(lambda v: {"column": "express", "eq": v}, st.booleans()),
        st.builds(lambda v: {"column": "depot", "is_null": v}, st.booleans()),
        st.builds(lambda v: {"column": "region", "contains": v}, st.sampled_from(["or", "th", "e", "x"])),
        st.builds(lambda v: {"column": "region", "starts_with": v}, st.sampled_from(["n", "so", "w", "q"])),
    )


def filters():
    return st.recursive(predicates(), lambda inner: st.one_of(
        st.builds(lambda xs: {"any": xs}, st.lists(inner, min_size=1, max_size=3)),
        st.builds(lambda x: {"not": x}, inner)), max_leaves=5)


MEASURES = [("count", None), ("sum", "fee"), ("sum", "weight"), ("min", "weight"),
            ("max", "distance_km"), ("count", "depot")]


def _expected(df, mask, keys, agg, col):
    sub = df[mask.fillna(False).to_numpy(dtype=bool)]
    if not keys:
        groups = {(): sub}
    else:
        groups = {k if isinstance(k, tuple) else (k,): g
                  for k, g in sub.groupby(keys, dropna=False, sort=False)}
    out = {}
    for k, g in groups.items():
        k = tuple(None if (isinstance(x, float) and math.isnan(x)) or x is pd.NA else
                  (bool(x) if isinstance(x, (bool, np.bool_)) else x) for x in k)
        if agg == "count" and col is None:
            v = len(g)
        elif agg == "count":
            v = int(g[col].notna().sum())
        elif agg == "sum":
            v = float(g[col].sum())
        elif agg == "min":
            v = float(g[col].min())
        else:
            v = float(g[col].max())
        out[k] = v
    if keys == [] and len(sub) == 0 and agg != "count":
        out = {(): None}
    return out


@settings(max_examples=160, derandomize=True, deadline=None, database=None,
          suppress_health_check=list(HealthCheck))
@given(keys=st.lists(st.sampled_from(KEYS), min_size=1, max_size=2, unique=True),
       measure=st.sampled_from(MEASURES),
       where=st.lists(filters(), max_size=3))
def test_random_requests_equal_pandas(setup, keys, measure, where):
    client, df = setup
    agg, col = measure
    names = ["x", "color"]
    channels = {names[i]: {"column": k} for i, k in enumerate(keys)}
    channels["y"] = {"agg": agg, **({"column": col} if col else {})}
    r = client.post("/v1/chart", json={"source": "deliveries", "channels": channels, "where": where})
    assert r.status_code == 200, r.text[:500]
    out = r.json()
    mask = pd.Series(pd.array([True] * len(df), dtype="boolean"))
    for f in where:
        mask &= _mask(df, f)
    want = _expected(df, mask, keys, agg, col)
    assert out["stats"]["matched_rows"] == int(mask.fillna(False).sum())
    mname = next(c["name"] for c in out["columns"] if c["role"] == "measure")
    got = {}
    data = out["data"]
    for i in range(out["stats"]["result_rows"]):
        got[tuple(data[k][i] for k in keys)] = data[mname][i]
    assert set(got) == set(want), (sorted(map(str, got)), sorted(map(str, want)))
    for k, v in want.items():
        g = got[k]
        assert (g is None and v is None) or math.isclose(float(g), float(v), rel_tol=1e-9, abs_tol=1e-9), (k, g, v)


FILTER_SQL = [
    ("fee > {a}", lambda d, a, b: d.fee > a),
    ("fee BETWEEN {a} AND {a} + {b}", lambda d, a, b: d.fee.between(a, a + b)),
    ("weight % {b} = 0", lambda d, a, b: d.weight % b == 0),
    ("NOT express AND weight < {a}", lambda d, a, b: ~d.express & (d.weight < a)),
    ("depot IS NULL OR fee * {b} > {a}", lambda d, a, b: d.depot.isna() | (d.fee * b > a)),
    ("abs(fee - {a}) <= {b}", lambda d, a, b: (d.fee - a).abs() <= b),
]


@settings(max_examples=60, derandomize=True, deadline=None, database=None,
          suppress_health_check=list(HealthCheck))
@given(form=st.sampled_from(FILTER_SQL), a=st.integers(0, 40), b=st.integers(1, 9),
       key=st.sampled_from(KEYS))
def test_filter_sql_equals_pandas(setup, form, a, b, key):
    client, df = setup
    text, fn = form
    r = client.post("/v1/chart", json={"source": "deliveries",
                                       "channels": {"x": {"column": key}, "y": {"agg": "count"}},
                                       "filter_sql": text.format(a=a, b=b)})
    assert r.status_code == 200, r.text[:400]
    mask = fn(df, a, b).fillna(False).astype(bool)
    want = _expected(df, pd.Series(pd.array(mask.tolist(), dtype="boolean")), [key], "count", None)
    out = r.json()
    got = {(out["data"][key][i],): out["data"]["count"][i] for i in range(out["stats"]["result_rows"])}
    assert got == want
