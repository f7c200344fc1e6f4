"""Aggregates, quantiles, NIST StRD accuracy and `where` filters, checked against outside
references (pandas, numpy, NIST certified values, SQL three-valued logic).

Every expected value is computed here from the pandas copy of the fixture rows (see
refdata.py), never from the code under test.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest


def _key(v):
    """pandas NaN/None group keys -> None (JSON null)."""
    if v is None:
        return None
    if isinstance(v, float) and math.isnan(v):
        return None
    if v is pd.NA:
        return None
    return v


def _groups(df: pd.DataFrame, key: str):
    """(key, sub-frame) pairs with NULL as its own group. reference: pandas groupby(dropna=False)"""
    return [(_key(k[0] if isinstance(k, tuple) else k), g) for k, g in df.groupby([key], dropna=False)]


def _sorted_keys_nulls_last(keys):
    return sorted(k for k in keys if k is not None) + [None] * sum(k is None for k in keys)


# ---------------------------------------------------------------------------------------------
# 1. every aggregate, grouped by a text key, NULL key as its own group, NULL values ignored
# ---------------------------------------------------------------------------------------------


def _pct(values, q):
    # reference: numpy.percentile(method="linear") = Hyndman & Fan (1996) type 7
    v = values[~np.isnan(values)]
    return float(np.percentile(v, q * 100.0, method="linear")) if len(v) else None


def _nonnull_float(s: pd.Series) -> np.ndarray:
    return s.astype("Float64").to_numpy(dtype=float, na_value=np.nan)


# (agg, column, extra, output name, reference function over the group's sub-frame)
AGG_CASES = [
    ("count", None, {}, "count", lambda g: len(g)),  # reference: pandas groupby size
    ("count", "x", {}, "count_x", lambda g: int(g["x"].count())),  # pandas count (non-NULL)
    ("count", "n", {}, "count_n", lambda g: int(g["n"].count())),
    ("count_distinct", "n", {}, "count_distinct_n", lambda g: int(g["n"].nunique())),  # pandas nunique
    ("count_distinct", "grp2", {}, "count_distinct_grp2", lambda g: int(g["grp2"].nunique())),
    ("sum", "x", {}, "sum_x", lambda g: float(g["x"].sum(min_count=1))),  # pandas sum
    ("sum", "n", {}, "sum_n", lambda g: int(g["n"].sum())),  # pandas sum (exact integers)
    ("avg", "x", {}, "avg_x", lambda g: float(g["x"].mean())),  # pandas mean
    ("avg", "n", {}, "avg_n", lambda g: float(g["n"].mean())),
    ("min", "x", {}, "min_x", lambda g: float(g["x"].min())),  # pandas min
    ("max", "x", {}, "max_x", lambda g: float(g["x"].max())),  # pandas max
    ("min", "n", {}, "min_n", lambda g: int(g["n"].min())),
    ("max", "n", {}, "max_n", lambda g: int(g["n"].max())),
    ("median", "x", {}, "median_x", lambda g: _pct(_nonnull_float(g["x"]), 0.5)),  # numpy.percentile
    ("median", "n", {}, "median_n", lambda g: _pct(_nonnull_float(g["n"]), 0.5)),
    ("quantile", "x", {"q": 0.1}, "p10_x", lambda g: _pct(_nonnull_float(g["x"]), 0.1)),
    ("quantile", "x", {"q": 0.9}, "p90_x", lambda g: _pct(_nonnull_float(g["x"]), 0.9)),
    ("quantile", "n", {"q": 0.9}, "p90_n", lambda g: _pct(_nonnull_float(g["n"]), 0.9)),
    ("stddev_samp", "x", {}, "stddev_samp_x", lambda g: float(g["x"].std(ddof=1))),  # pandas std
    ("stddev_pop", "x", {}, "stddev_pop_x", lambda g: float(g["x"].std(ddof=0))),
    ("var_samp", "x", {}, "var_samp_x", lambda g: float(g["x"].var(ddof=1))),  # pandas var
    ("var_pop", "x", {}, "var_pop_x", lambda g: float(g["x"].var(ddof=0))),
    ("var_samp", "n", {}, "var_samp_n", lambda g: float(g["n"].astype(float).var(ddof=1))),
]


@pytest.mark.parametrize(
    "agg,column,extra,name,fn", AGG_CASES, ids=[c[3] for c in AGG_CASES]
)
def test_agg_by_text_key_matches_pandas(api, ref, agg, column, extra, name, fn):
    measure = {"agg": agg, **extra}
    if column is not None:
        measure["column"] = column
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": measure}})
    rows = api.rows(resp)

    expected = {k: fn(g) for k, g in _groups(ref.t, "cat")}
    got = {r["cat"]: r[name] for r in rows}

    # NULL key is its own group; every group present once. reference: pandas groupby(dropna=False)
    assert len(rows) == len(got), "duplicate group keys in result"
    assert set(got) == set(expected)
    for k, want in expected.items():
        assert api.close(got[k], want, rel=1e-9), f"{name} for cat={k!r}: got {got[k]!r}, want {want!r}"  # reference: pandas groupby / numpy.percentile
        if isinstance(want, int):
            assert float(got[k]).is_integer()

    col = api.column(resp, name)
    assert col["role"] == "measure" and col["channel"] == "y"
    # DESIGN: results are exact unless the response says otherwise
    assert not api.is_marked_approximate(resp), "an exact aggregate was marked approximate"

    # DEVELOPERS: without sort, rows come ordered by the keys ascending with NULLs last
    assert [r["cat"] for r in rows] == _sorted_keys_nulls_last(list(got))  # reference: Python sorted (code point order)
    assert resp["stats"]["matched_rows"] == len(ref.t)  # reference: pandas len
    assert resp["stats"]["source_rows"] == len(ref.t)
    assert resp["stats"]["result_rows"] == len(rows)


def test_count_measure_type_is_integer(api):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "count"}}})
    assert api.column(resp, "count")["type"] == "integer"
    assert api.column(resp, "cat")["type"] == "string"
    assert api.column(resp, "cat")["role"] == "key"
    assert all(isinstance(v, int) for v in resp["data"]["count"])


def test_several_measures_in_one_request(api, ref):
    resp = api.chart(
        {
            "channels": {
                "x": {"column": "grp2"},
                "y": {"agg": "sum", "column": "w"},
                "size": {"agg": "avg", "column": "x"},
                "opacity": {"agg": "count"},
                "color": {"agg": "quantile", "column": "w", "q": 0.25, "name": "w_q1"},
            }
        }
    )
    rows = {r["grp2"]: r for r in api.rows(resp)}
    for k, g in ref.t.groupby("grp2"):
        r = rows[k]
        assert api.close(r["sum_w"], g["w"].sum())  # reference: pandas sum
        assert api.close(r["avg_x"], g["x"].mean())  # reference: pandas mean
        assert r["count"] == len(g)  # reference: pandas size
        assert api.close(r["w_q1"], np.percentile(g["w"], 25, method="linear"))  # reference: numpy.percentile
    assert api.column(resp, "sum_w")["channel"] == "y"
    assert api.column(resp, "avg_x")["channel"] == "size"
    assert api.column(resp, "w_q1")["channel"] == "color"


def test_measures_without_keys_give_one_row(api, ref):
    resp = api.chart({"channels": {"y": {"agg": "count"}, "x": {"agg": "sum", "column": "n"}}})
    rows = api.rows(resp)
    assert len(rows) == 1
    assert rows[0]["count"] == len(ref.t)  # reference: pandas len
    assert rows[0]["sum_n"] == int(ref.t["n"].sum())  # reference: pandas sum


def test_approx_count_distinct(api, ref):
    resp = api.chart({"channels": {"x": {"column": "cat"}, "y": {"agg": "approx_count_distinct", "column": "n"}}})
    got = {r["cat"]: r["approx_count_distinct_n"] for r in api.rows(resp)}
    exact = {k: int(g["n"].nunique()) for k, g in _groups(ref.t, "cat")}  # reference: pandas nunique
    assert set(got) == set(exact)
    differs = False
    for k, want in exact.items():
        assert abs(got[k] - want) <= 0.05 * want + 1, f"cat={k!r}: {got[k]} vs exact {want}"  # HyperLogLog-size error
        differs |= got[k] != want
    if differs:
        # DESIGN: "results must be exact unless the response says otherwise"
        assert api.is_marked_approximate(resp), "approximate counts differ from exact but response not marked approximate"


def test_approx_count_distinct_is_marked_approximate(api):
    # A user asking for approx_count_distinct expects the response to say it is approximate
    # (DESIGN: `"approximate": true` with the method and error bounds).
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "y": {"agg": "approx_count_distinct", "column": "x"}}})
    assert api.is_marked_approximate(resp)


# ---------------------------------------------------------------------------------------------
# 3. median / quantiles = numpy.percentile(method="linear") (Hyndman & Fan 1996, type 7)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("q", [0.0, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99, 1.0])
def test_quantile_matches_numpy_linear(api, ref, q):
    resp = api.chart(
        {"channels": {"x": {"column": "grp2"}, "y": {"agg": "quantile", "column": "x", "q": q, "name": "qv"}}}
    )
    got = {r["grp2"]: r["qv"] for r in api.rows(resp)}
    for k, g in ref.t.groupby("grp2"):
        v = g["x"].dropna().to_numpy()
        want = float(np.percentile(v, q * 100, method="linear"))
        assert api.close(got[k], want, rel=1e-9), (k, q, got[k], want)  # reference: numpy.percentile(method="linear")


def test_quantiles_beside_the_stats_windows_match_numpy(api, ref):
    """Quantile and median per group with the stats windows over the groups: on DuckDB the
    grouped CTE is computed AS MATERIALIZED (``caps.materialize_order_statistics``), a count
    beside them is not an order statistic."""
    resp = api.chart({"channels": {"x": {"column": "grp2"},
                                   "y": {"agg": "quantile", "column": "n", "q": 0.9, "name": "p90"},
                                   "size": {"agg": "median", "column": "x"},
                                   "color": {"agg": "count"}}})
    assert "AS MATERIALIZED" in resp["sql"][-1]
    got = {r["grp2"]: r for r in api.rows(resp)}
    assert set(got) == {_key(k) for k, _ in _groups(ref.t, "grp2")}
    for k, g in _groups(ref.t, "grp2"):
        n, x = (v[~np.isnan(v)] for v in (_nonnull_float(g["n"]), _nonnull_float(g["x"])))
        # reference: numpy.percentile(method="linear") (Hyndman & Fan type 7), pandas len
        assert api.close(got[k]["p90"], float(np.percentile(n, 90, method="linear")) if len(n) else None)
        assert api.close(got[k]["median_x"], float(np.percentile(x, 50, method="linear")) if len(x) else None)
        assert got[k]["count"] == len(g)
    assert resp["stats"]["matched_rows"] == len(ref.t) and resp["stats"]["groups"] == len(got)
    plain = api.chart({"channels": {"x": {"column": "grp2"}, "y": {"agg": "count"}}})
    assert "MATERIALIZED" not in plain["sql"][-1]


def test_median_equals_numpy_percentile_50_small_even_group(api, ref):
    # edges table: 11 non-NULL values (odd) -> middle value; also check with a filter giving an
    # even count so the type-7 interpolation is exercised.
    vals = ref.edges["v"].dropna().to_numpy()
    resp = api.chart({"source": "edges", "channels": {"y": {"agg": "median", "column": "v"}}})
    assert api.close(api.rows(resp)[0]["median_v"], np.percentile(vals, 50, method="linear"))  # reference: numpy.percentile
    resp = api.chart(
        {"source": "edges", "channels": {"y": {"agg": "median", "column": "v"}}, "where": [{"column": "v", "lt": 100}]}
    )
    v2 = vals[vals < 100]
    assert len(v2) % 2 == 0
    assert api.close(api.rows(resp)[0]["median_v"], np.percentile(v2, 50, method="linear"))  # reference: numpy.percentile


# ---------------------------------------------------------------------------------------------
# 4. NIST StRD univariate NumAcc1..NumAcc4: certified mean and standard deviation
# ---------------------------------------------------------------------------------------------

# Certified values (from memory of the NIST StRD univariate summary pages; they also follow
# exactly from the data: e.g. NumAcc2 = 1.2 plus 500 pairs (1.1, 1.3): mean 1.2, sum of squared
# deviations 1000 * 0.01 = 10, sample variance 10 / 1000 = 0.01).
NIST = {
    "numacc1": (10000002.0, 1.0),
    "numacc2": (1.2, 0.1),
    "numacc3": (1000000.2, 0.1),
    "numacc4": (10000000.2, 0.1),
}
# Tolerances for the standard deviation against the certified value.  The data are decimal;
# the engine stores doubles, and rounding 10000000.1 to a double moves each deviation by up to
# half an ulp at 1e7 (~9.3e-10), which shifts the exact SD of the *stored* values from 0.1 by
# ~5.6e-9 relative for NumAcc4 (3.5e-10 for NumAcc3). So 1e-9 for NumAcc1-3, 1e-8 for NumAcc4;
# in addition every SD is checked to 1e-9 against the exact (rational) SD of the stored doubles.
SD_TOL = {"numacc1": 1e-9, "numacc2": 1e-9, "numacc3": 1e-9, "numacc4": 1e-8}


def _exact_stats(values):
    fr = [Fraction(v) for v in values]
    n = len(fr)
    mean = sum(fr) / n
    ss = sum((v - mean) ** 2 for v in fr)
    return float(mean), ss / (n - 1), ss / n


@pytest.mark.parametrize("source", list(NIST))
def test_nist_strd_numacc(api, ref, source):
    resp = api.chart(
        {
            "source": source,
            "channels": {
                "y": {"agg": "stddev_samp", "column": "y"},
                "x": {"agg": "avg", "column": "y"},
                "size": {"agg": "var_samp", "column": "y"},
                "opacity": {"agg": "stddev_pop", "column": "y"},
            },
        }
    )
    rows = api.rows(resp)
    assert len(rows) == 1
    r = rows[0]
    cert_mean, cert_sd = NIST[source]
    n = len(ref.numacc[source])
    assert resp["stats"]["source_rows"] == n

    assert api.close(r["avg_y"], cert_mean, rel=1e-12), (r["avg_y"], cert_mean)  # reference: NIST StRD certified mean
    assert api.close(r["stddev_samp_y"], cert_sd, rel=SD_TOL[source]), (r["stddev_samp_y"], cert_sd)  # reference: NIST StRD certified SD
    assert api.close(r["var_samp_y"], cert_sd**2, rel=2 * SD_TOL[source]), (r["var_samp_y"], cert_sd**2)  # reference: NIST certified SD squared

    _, var_s, var_p = _exact_stats(ref.numacc[source])
    assert api.close(r["stddev_samp_y"], math.sqrt(var_s), rel=1e-9)  # reference: exact rational arithmetic (fractions)
    assert api.close(r["var_samp_y"], float(var_s), rel=1e-9)  # reference: exact rational arithmetic
    assert api.close(r["stddev_pop_y"], math.sqrt(var_p), rel=1e-9)  # reference: exact rational arithmetic


# ---------------------------------------------------------------------------------------------
# 7. `where`: every operator, matched_rows vs the equivalent pandas boolean mask
#    (SQL three-valued logic: a comparison with NULL never matches)
# ---------------------------------------------------------------------------------------------


def _m(s: pd.Series) -> np.ndarray:
    """Nullable boolean Series -> numpy bool, NULL -> False (SQL WHERE keeps only TRUE)."""
    return s.astype("boolean").fillna(False).to_numpy(dtype=bool)


def _str(df, col):
    return df[col].astype(object)


WHERE_CASES = [
    ("eq_text", [{"column": "cat", "eq": "beta"}], lambda d: _m(d.cat == "beta")),
    ("eq_unicode", [{"column": "cat", "eq": "東京"}], lambda d: _m(d.cat == "東京")),
    ("eq_empty_string", [{"column": "cat", "eq": ""}], lambda d: _m(d.cat == "")),
    ("eq_int", [{"column": "n", "eq": 0}], lambda d: _m(d.n == 0)),
    ("eq_bool", [{"column": "flag", "eq": True}], lambda d: _m(d.flag == True)),  # noqa: E712
    ("ne_nonnull", [{"column": "grp2", "ne": "east"}], lambda d: _m(d.grp2 != "east")),
    # SQL: NULL <> 'beta' is NULL -> row not kept
    ("ne_nullable", [{"column": "cat", "ne": "beta"}], lambda d: _m((d.cat != "beta") & d.cat.notna())),
    ("lt_double", [{"column": "x", "lt": 40.5}], lambda d: _m(d.x < 40.5)),
    ("lte_int", [{"column": "n", "lte": -10}], lambda d: _m(d.n <= -10)),
    ("gt_double", [{"column": "w", "gt": 7.25}], lambda d: _m(d.w > 7.25)),
    ("gte_int", [{"column": "n", "gte": 25}], lambda d: _m(d.n >= 25)),
    ("half_open_interval", [{"column": "x", "gte": 30, "lt": 60}], lambda d: _m((d.x >= 30) & (d.x < 60))),
    ("in_text", [{"column": "cat", "in": ["alpha", "東京", "nope"]}], lambda d: _m(d.cat.isin(["alpha", "東京", "nope"]))),
    ("in_int", [{"column": "n", "in": [-3, 0, 7]}], lambda d: _m(d.n.isin([-3, 0, 7]))),
    # SQL: NULL NOT IN (...) is NULL -> row not kept
    ("not_in_text", [{"column": "cat", "not_in": ["alpha", "beta"]}], lambda d: _m(~d.cat.isin(["alpha", "beta"]) & d.cat.notna())),
    ("not_in_int", [{"column": "n", "not_in": [1, 2, 3]}], lambda d: _m(~d.n.isin([1, 2, 3]) & d.n.notna())),
    ("is_null_true", [{"column": "x", "is_null": True}], lambda d: d.x.isna().to_numpy()),
    ("is_null_false", [{"column": "flag", "is_null": False}], lambda d: d.flag.notna().to_numpy()),
    ("is_null_text", [{"column": "cat", "is_null": True}], lambda d: d.cat.isna().to_numpy()),
    # contains / starts_with are literal: % and _ are not wildcards
    ("contains_percent", [{"column": "label", "contains": "%"}], lambda d: _m(_str(d, "label").str.contains("%", regex=False))),
    ("contains_underscore", [{"column": "label", "contains": "_"}], lambda d: _m(_str(d, "label").str.contains("_", regex=False))),
    ("contains_quote", [{"column": "label", "contains": "'"}], lambda d: _m(_str(d, "label").str.contains("'", regex=False))),
    ("contains_unicode", [{"column": "cat", "contains": "ü"}], lambda d: _m(_str(d, "cat").str.contains("ü", regex=False))),
    ("starts_with", [{"column": "cat", "starts_with": "g"}], lambda d: _m(_str(d, "cat").str.startswith("g"))),
    ("starts_with_underscore", [{"column": "label", "starts_with": "a_"}], lambda d: _m(_str(d, "label").str.startswith("a_"))),
    ("starts_with_percent", [{"column": "label", "starts_with": "a%"}], lambda d: _m(_str(d, "label").str.startswith("a%"))),
    ("ts_range_offsets",
     [{"column": "ts", "gte": "2026-03-29T00:00:00+01:00", "lt": "2026-03-30T00:00:00+02:00"}],
     lambda d: _m((d.ts >= pd.Timestamp("2026-03-28T23:00:00Z")) & (d.ts < pd.Timestamp("2026-03-29T22:00:00Z")))),
    ("ts_gt_utc", [{"column": "ts", "gt": "2026-10-25T01:00:00Z"}], lambda d: _m(d.ts > pd.Timestamp("2026-10-25T01:00:00Z"))),
    ("two_predicates_and", [{"column": "cat", "eq": "alpha"}, {"column": "n", "gt": 0}],
     lambda d: _m((d.cat == "alpha") & (d.n > 0))),
    ("any", [{"any": [{"column": "cat", "eq": "alpha"}, {"column": "x", "gt": 80}]}],
     lambda d: _m((d.cat == "alpha")) | _m(d.x > 80)),
    ("not", [{"not": {"column": "grp2", "eq": "north"}}], lambda d: _m(d.grp2 != "north")),
    ("not_any", [{"not": {"any": [{"column": "grp2", "eq": "north"}, {"column": "w", "lt": 2}]}}],
     lambda d: _m(~((d.grp2 == "north") | (d.w < 2)))),
    ("any_with_not_and_is_null", [{"any": [{"column": "x", "is_null": True}, {"not": {"column": "w", "gte": 1}}]}],
     lambda d: d.x.isna().to_numpy() | _m(d.w < 1)),
    ("no_match", [{"column": "cat", "eq": "does not exist"}], lambda d: np.zeros(len(d), dtype=bool)),
]


@pytest.mark.parametrize("where,mask", [c[1:] for c in WHERE_CASES], ids=[c[0] for c in WHERE_CASES])
def test_where_operators_match_pandas_mask(api, ref, where, mask):
    resp = api.chart({"channels": {"x": {"column": "grp2"}, "y": {"agg": "count"}}, "where": where})
    want = int(mask(ref.t).sum())
    assert resp["stats"]["matched_rows"] == want  # reference: pandas boolean mask
    assert resp["stats"]["source_rows"] == len(ref.t)
    assert sum(resp["data"]["count"]) == want  # reference: pandas boolean mask
    sel = ref.t[mask(ref.t)]
    got = {r["grp2"]: r["count"] for r in api.rows(resp)}
    assert got == {k: len(g) for k, g in sel.groupby("grp2")}  # reference: pandas groupby on the masked frame


def test_single_row_groups_give_null_sample_deviation(api, ref):
    # SQL stddev_samp/var_samp of one value is NULL; DESIGN: non-finite floats are null in JSON
    resp = api.chart(
        {
            "channels": {
                "x": {"column": "id"},
                "y": {"agg": "stddev_samp", "column": "w"},
                "size": {"agg": "var_pop", "column": "w"},
            },
            "where": [{"column": "id", "lt": 4}],
        }
    )
    rows = api.rows(resp)
    assert [r["id"] for r in rows] == [0, 1, 2, 3]
    for r in rows:
        g = ref.t[ref.t["id"] == r["id"]]
        assert np.isnan(g["w"].std(ddof=1))  # reference: pandas std of one value is NaN
        assert r["stddev_samp_w"] is None
        assert r["var_pop_w"] == 0  # reference: pandas var(ddof=0) of one value is 0


@pytest.mark.parametrize("where", [[], [{"column": "x", "gt": 0}]], ids=["all", "filtered"])
def test_count_distinct_beside_count_matches_pandas(api, ref, where):
    """COUNT(DISTINCT n) with the row count and a count measure (DuckDB groups the distinct
    (key, value) pairs first: planner/emit_main.py _distinct_pairs), NULLs in key and value."""
    resp = api.chart({"channels": {"x": {"column": "cat"}, "color": {"column": "grp2"},
                                   "y": {"agg": "count_distinct", "column": "n"},
                                   "size": {"agg": "count"}}, "where": where})
    frame = ref.t if not where else ref.t[ref.t["x"].astype("Float64") > 0]
    want = {}
    for (c, g2), g in frame.groupby(["cat", "grp2"], dropna=False):  # reference: pandas groupby
        want[(_key(c), _key(g2))] = (int(g["n"].nunique()), len(g))  # pandas nunique / size
    got = {(r["cat"], r["grp2"]): (r["count_distinct_n"], r["count"]) for r in api.rows(resp)}
    assert got == want
    assert api.column(resp, "count")["type"] == api.column(resp, "count_distinct_n")["type"] == "integer"
    assert resp["stats"]["matched_rows"] == len(frame)  # reference: pandas len
    assert resp["stats"]["groups"] == len(want)


@pytest.mark.parametrize("empty_bins", ["omit", "zero"])
def test_count_distinct_by_bins_with_limits_matches_pandas(api, ref, empty_bins):
    """The same with a binned key whose limits leave rows outside (flags) and the empty-bins
    grid: outside rows are counted in stats, never in a bin."""
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"width": 10, "origin": 0, "limits": [-20, 20]}},
                                   "y": {"agg": "count_distinct", "column": "grp2"}},
                      "empty_bins": empty_bins})
    x = ref.t["x"].astype("Float64")
    inside = ref.t[(x >= -20) & (x <= 20)]
    k = np.minimum(np.floor(inside["x"].astype(float) / 10), 1)  # the closed last bin [10, 20]
    want = {float(b * 10): int(g["grp2"].nunique()) for b, g in inside.groupby(k)}  # pandas nunique
    if empty_bins == "zero":
        want = {float(lo): want.get(float(lo), 0) for lo in range(-20, 20, 10)}
    nulls = ref.t[x.isna()]
    got = {r["x_lo"]: r["count_distinct_grp2"] for r in api.rows(resp)}
    assert got.pop(None, None) == (int(nulls["grp2"].nunique()) if len(nulls) else None)
    assert got == want
    outside = int(((x < -20) | (x > 20)).fillna(False).sum())
    assert resp["stats"]["outside_limits"]["x"] == outside  # reference: pandas mask
    assert resp["stats"]["matched_rows"] == len(ref.t)
