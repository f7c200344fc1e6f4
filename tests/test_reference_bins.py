"""Numeric histograms against outside references: numpy.histogram / histogram_bin_edges and an
independent implementation of Heckbert's nice numbers written from the paper.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from testmods import load as _load  # tests/ helper modules (tests/testmods.py)

# ---------------------------------------------------------------------------------------------
# Reference nice numbers: Paul S. Heckbert, "Nice Numbers for Graph Labels", Graphics Gems
# (Academic Press, 1990), pp. 61-63.  Written here from the paper's pseudo-code (from memory):
#
#   nicenum(x, round): exp = floor(log10 x); f = x / 10^exp
#       round:     nf = 1 if f < 1.5, 2 if f < 3, 5 if f < 7, else 10
#       not round: nf = 1 if f <= 1, 2 if f <= 2, 5 if f <= 5, else 10
#       return nf * 10^exp
#   loose_label(min, max, nticks):
#       range = nicenum(max - min, false)
#       d = nicenum(range / (nticks - 1), true)
#       graphmin = floor(min / d) * d ; graphmax = ceil(max / d) * d
#
# A histogram with a target of N bins has N + 1 edges, i.e. nticks = N + 1, so the bin width
# is d = nicenum(nicenum(max - min, false) / N, true) and the bins run from graphmin to
# graphmax (which may give a few more or fewer bins than N: the target is only a target).
# ---------------------------------------------------------------------------------------------


def nicenum(x: float, round_: bool) -> float:
    expv = math.floor(math.log10(x))
    f = x / 10.0**expv
    if round_:
        nf = 1 if f < 1.5 else 2 if f < 3 else 5 if f < 7 else 10
    else:
        nf = 1 if f <= 1 else 2 if f <= 2 else 5 if f <= 5 else 10
    return nf * 10.0**expv


def nice_reference(lo: float, hi: float, n: int):
    """`bins: N` as README states it, computed exactly with fractions: among the widths
    d = {1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8} x 10^k (Heckbert's nice numbers widened to two
    digits, as README states), bins on the multiples of d (each edge the
    double nearest to the decimal k*d) covering [lo, hi], the width whose bin count is the
    largest one <= N (ties: the finer width; none <= N: the fewest bins)."""
    from fractions import Fraction

    span = hi - lo
    e0 = math.floor(math.log10(span / n)) - 2
    best = fewest = None
    for e in range(e0, math.floor(math.log10(max(span, abs(lo), abs(hi)))) + 2):
        for m in ("1", "1.2", "1.5", "2", "2.5", "3", "4", "5", "6", "8"):
            d = Fraction(m) * Fraction(10) ** e
            first = math.floor(Fraction(lo) / d)
            while float(first * d) > lo:
                first -= 1
            while float((first + 1) * d) <= lo:
                first += 1
            last = math.ceil(Fraction(hi) / d)
            while float((last - 1) * d) >= hi:
                last -= 1
            while float(last * d) < hi:
                last += 1
            count = max(1, last - first)
            cand = (count, float(d), float(first * d))
            if count <= n and (best is None or count > best[0]):
                best = cand
            if fewest is None or count < fewest[0]:
                fewest = cand
    count, d, start = best or fewest
    return start, start + count * d, d, count


def heckbert_bins(lo: float, hi: float, n: int):
    """Heckbert's loose labelling (the paper's worked example; no longer sluice's count rule)."""
    d = nicenum(nicenum(hi - lo, False) / n, True)
    start = math.floor(lo / d) * d
    stop = math.ceil(hi / d) * d
    return start, stop, d, int(round((stop - start) / d))


def test_reference_nicenum_worked_example():
    # Heckbert's worked example (from memory): loose labelling of the data range 105..543 with
    # 5 ticks gives labels 100, 200, ..., 600 (step 100).
    start, stop, d, count = heckbert_bins(105, 543, 4)
    assert (start, stop, d) == (100, 600, 100)  # reference: Heckbert 1990 worked example (from memory)
    assert count == 5
    assert nicenum(438, False) == 500 and nicenum(125, True) == 100  # reference: Heckbert's rules


def _xs(rows, ch="x"):
    return [(r[f"{ch}_lo"], r[f"{ch}_hi"], r["count"]) for r in rows]


def _check_bins_meta(b, start, stop, width, count, method):
    assert math.isclose(b["width"], width, rel_tol=1e-9), (b, width)
    assert math.isclose(b["start"], start, rel_tol=1e-9, abs_tol=width * 1e-9), (b, start)
    assert math.isclose(b["stop"], stop, rel_tol=1e-9, abs_tol=width * 1e-9), (b, stop)
    assert b["count"] == count, (b, count)
    assert b["method"] == method


def _histogram_rows_match(rows, edges, counts_np, ch="x"):
    """Non-NULL bin rows must be exactly numpy's non-empty bins (default empty_bins: omit)."""
    width = edges[1] - edges[0]
    got = {}
    for s, e, c in _xs([r for r in rows if r[f"{ch}_lo"] is not None], ch):
        k = int(round((s - edges[0]) / width))
        assert 0 <= k < len(edges) - 1, f"bin start {s} outside edges {edges[0]}..{edges[-1]}"
        assert math.isclose(s, edges[k], rel_tol=1e-9, abs_tol=width * 1e-9), (s, edges[k])
        assert math.isclose(e, edges[k + 1], rel_tol=1e-9, abs_tol=width * 1e-9), (e, edges[k + 1])
        assert k not in got, f"bin {k} appears twice"
        got[k] = c
    want = {k: int(c) for k, c in enumerate(counts_np) if c}
    assert got == want  # reference: numpy.histogram


# ---------------------------------------------------------------------------------------------
# {"bins": N} -> Heckbert nice width, limits from the data
# ---------------------------------------------------------------------------------------------


def test_bins_heckbert_worked_example_range(api, ref):
    # ranges.a spans exactly 105..543. Heckbert's loose labelling with 4 intervals gives
    # 100..600 step 100 = 5 bins, more than the 4 asked for; the count rule (closest to N
    # without exceeding it, README, over the two-digit nice widths) takes 150: 0..600, 4 bins.
    assert heckbert_bins(105, 543, 4)[3] == 5  # reference: Heckbert 1990 worked example (from memory)
    assert nice_reference(105, 543, 4) == (0, 600, 150, 4)  # reference: the README rule, exact
    resp = api.chart({"source": "ranges", "channels": {"x": {"column": "a", "bin": {"bins": 4}}, "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], 0, 600, 150, 4, "nice")
    edges = np.arange(0, 601, 150, dtype=float)
    counts, _ = np.histogram(ref.ranges["a"].to_numpy(), bins=edges)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram


NICE_CASES = [("a", 10), ("a", 20), ("b", 10), ("b", 7), ("c", 20), ("c", 3), ("d", 10), ("d", 25), ("e", 12)]


@pytest.mark.parametrize("column,n", NICE_CASES, ids=[f"{c}-{n}" for c, n in NICE_CASES])
def test_bins_nice_width_follows_heckbert(api, ref, column, n):
    vals = ref.ranges[column].to_numpy()
    lo, hi = float(vals.min()), float(vals.max())
    start, stop, d, count = nice_reference(lo, hi, n)  # reference: Heckbert 1990 widths, README count rule (exact, above)
    resp = api.chart(
        {"source": "ranges", "channels": {"x": {"column": column, "bin": {"bins": n}}, "y": {"agg": "count"}}}
    )
    _check_bins_meta(resp["bins"]["x"], start, stop, d, count, "nice")
    edges = start + d * np.arange(count + 1)
    counts, _ = np.histogram(vals, bins=edges)
    assert counts.sum() == len(vals)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram with the same edges
    assert resp["domains"]["x"] == pytest.approx([start, stop], rel=1e-9, abs=d * 1e-9)


def test_bins_default_is_20_target(api, ref):
    vals = ref.t["x"].dropna().to_numpy()
    start, stop, d, count = nice_reference(float(vals.min()), float(vals.max()), 20)  # reference: Heckbert widths, README rule
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {}}, "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], start, stop, d, count, "nice")


def test_bins_nice_on_column_with_nulls(api, ref):
    vals = ref.t["x"].dropna().to_numpy()
    start, stop, d, count = nice_reference(float(vals.min()), float(vals.max()), 15)  # reference: Heckbert widths, README rule
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"bins": 15}}, "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], start, stop, d, count, "nice")
    edges = start + d * np.arange(count + 1)
    counts, _ = np.histogram(vals, bins=edges)
    rows = api.rows(resp)
    _histogram_rows_match(rows, edges, counts)  # reference: numpy.histogram
    null_rows = [r for r in rows if r["x_lo"] is None]
    # DEVELOPERS: a NULL key is its own group; its bin keys are both null
    assert len(null_rows) == 1 and null_rows[0]["x_hi"] is None
    assert null_rows[0]["count"] == int(ref.t["x"].isna().sum())  # reference: pandas isna
    assert rows[-1]["x_lo"] is None  # NULLs last


def test_bins_constant_column_does_not_fail(api, ref):
    # Degenerate range (all values 7.0): the contract does not say which bin; a user expects a
    # histogram whose bins hold every row, not an error.
    resp = api.chart({"source": "ranges", "channels": {"x": {"column": "k", "bin": {"bins": 10}}, "y": {"agg": "count"}}})
    rows = api.rows(resp)
    assert sum(r["count"] for r in rows) == len(ref.ranges)
    for r in rows:
        assert r["x_lo"] <= 7.0 <= r["x_hi"]


# ---------------------------------------------------------------------------------------------
# {"width": h, "origin": x0} -> numpy.histogram with the same edges
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("width,origin", [(5.0, 0.0), (2.5, 0.5), (7.0, -3.0), (10.0, 1000.0), (0.75, 0.1)])
def test_width_origin_matches_numpy(api, ref, width, origin):
    vals = ref.t["x"].dropna().to_numpy()
    # bins are origin + k*width covering the data (limits from the data)
    kmin = math.floor((vals.min() - origin) / width)
    kmax = math.floor((vals.max() - origin) / width)  # max is not on an edge for this data
    assert not math.isclose((vals.max() - origin) / width, round((vals.max() - origin) / width))
    edges = origin + width * np.arange(kmin, kmax + 2)
    resp = api.chart(
        {"channels": {"x": {"column": "x", "bin": {"width": width, "origin": origin}}, "y": {"agg": "count"}}}
    )
    _check_bins_meta(resp["bins"]["x"], edges[0], edges[-1], width, len(edges) - 1, "width")
    counts, _ = np.histogram(vals, bins=edges)
    assert counts.sum() == len(vals)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram with the same edges


def test_width_without_origin_aligns_to_zero(api, ref):
    # Textbook default origin x0 = 0 (a user expects edges at multiples of the width).
    vals = ref.t["x"].dropna().to_numpy()
    width = 4.0
    edges = width * np.arange(math.floor(vals.min() / width), math.floor(vals.max() / width) + 2)
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"width": width}}, "y": {"agg": "count"}}})
    counts, _ = np.histogram(vals, bins=edges)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram


# ---------------------------------------------------------------------------------------------
# explicit limits: outside rows counted, upper limit closed (numpy convention)
# ---------------------------------------------------------------------------------------------


def test_limits_outside_and_closed_last_bin(api, ref):
    vals = ref.edges["v"].dropna().to_numpy()
    resp = api.chart(
        {
            "source": "edges",
            "channels": {"x": {"column": "v", "bin": {"width": 10, "origin": 0, "limits": [0, 100]}}, "y": {"agg": "count"}},
        }
    )
    edges = np.arange(0, 101, 10, dtype=float)
    counts, _ = np.histogram(vals, bins=edges)  # numpy ignores values outside [0, 100]
    rows = api.rows(resp)
    _histogram_rows_match(rows, edges, counts)  # reference: numpy.histogram
    last = [r for r in rows if r["x_lo"] == 90]
    assert last and last[0]["count"] == 3  # 99.9, 100, 100: value == upper limit in last bin (numpy convention)
    outside = int(((vals < 0) | (vals > 100)).sum())
    assert outside == 2
    assert resp["stats"]["outside_limits"]["x"] == outside  # reference: numpy mask outside [lo, hi]
    # NULLs are never "outside": they are their own group
    nulls = [r for r in rows if r["x_lo"] is None]
    assert len(nulls) == 1 and nulls[0]["count"] == int(ref.edges["v"].isna().sum())
    _check_bins_meta(resp["bins"]["x"], 0, 100, 10, 10, "width")
    assert resp["domains"]["x"] == [0, 100]


def test_limits_with_nice_bins_on_main_table(api, ref):
    vals = ref.t["x"].dropna().to_numpy()
    resp = api.chart(
        {"channels": {"x": {"column": "x", "bin": {"width": 5, "origin": 0, "limits": [30, 70]}}, "y": {"agg": "count"}}}
    )
    edges = np.arange(30, 71, 5, dtype=float)
    counts, _ = np.histogram(vals, bins=edges)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram
    assert resp["stats"]["outside_limits"]["x"] == int(((vals < 30) | (vals > 70)).sum())  # reference: numpy mask
    assert resp["stats"]["matched_rows"] == len(ref.t)


# ---------------------------------------------------------------------------------------------
# rules: sturges / scott / fd / sqrt == numpy.histogram_bin_edges
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("rule", ["sturges", "scott", "fd", "sqrt"])
@pytest.mark.parametrize("source,column", [("fixture", "x"), ("fixture", "w"), ("ranges", "d"), ("fixture", "n")])
def test_rule_matches_numpy(api, ref, rule, source, column):
    frame = ref.t if source == "fixture" else ref.ranges
    vals = frame[column].dropna().to_numpy(dtype=float)
    edges = np.histogram_bin_edges(vals, bins=rule)  # reference: numpy.histogram_bin_edges
    counts, _ = np.histogram(vals, bins=rule)  # reference: numpy.histogram(bins=rule)
    resp = api.chart({"source": source, "channels": {"x": {"column": column, "bin": {"rule": rule}}, "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], edges[0], edges[-1], edges[1] - edges[0], len(edges) - 1, rule)
    _histogram_rows_match(api.rows(resp), edges, counts)


@pytest.mark.parametrize("rule", ["sturges", "fd"])
def test_rule_with_limits_matches_numpy_range(api, ref, rule):
    # numpy computes the rule on the values inside `range` only.
    vals = ref.t["x"].dropna().to_numpy()
    edges = np.histogram_bin_edges(vals, bins=rule, range=(20.0, 80.0))  # reference: numpy.histogram_bin_edges(range=)
    counts, _ = np.histogram(vals, bins=rule, range=(20.0, 80.0))
    resp = api.chart(
        {"channels": {"x": {"column": "x", "bin": {"rule": rule, "limits": [20, 80]}}, "y": {"agg": "count"}}}
    )
    _check_bins_meta(resp["bins"]["x"], 20.0, 80.0, edges[1] - edges[0], len(edges) - 1, rule)
    _histogram_rows_match(api.rows(resp), edges, counts)
    assert resp["stats"]["outside_limits"]["x"] == int(((vals < 20) | (vals > 80)).sum())


def test_histogram_columns_metadata(api):
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"bins": 10}}, "y": {"agg": "count"}}})
    s, e = api.column(resp, "x_lo"), api.column(resp, "x_hi")
    assert (s["role"], s["channel"], s["type"]) == ("bin_lo", "x", "double")
    assert (e["role"], e["channel"], e["type"]) == ("bin_hi", "x", "double")
    counts = [c for c in resp["data"]["count"] if c is not None]
    assert resp["domains"]["count"] == [min(counts), max(counts)]


def test_histogram_of_integer_column_with_width(api, ref):
    vals = ref.t["n"].dropna().to_numpy(dtype=float)
    resp = api.chart({"channels": {"x": {"column": "n", "bin": {"width": 10, "origin": 0}}, "y": {"agg": "count"}}})
    # data max is 50, which is an edge: with limits from the data the last bin is [50, 60)
    # or the closed [40, 50]; either way numpy.histogram on the response's own edges must agree.
    b = resp["bins"]["x"]
    edges = b["start"] + b["width"] * np.arange(b["count"] + 1)
    assert b["start"] <= vals.min() and vals.max() <= b["stop"]
    counts, _ = np.histogram(vals, bins=edges)
    assert counts.sum() == len(vals)
    _histogram_rows_match(api.rows(resp), edges, counts)  # reference: numpy.histogram


# ---------------------------------------------------------------------------------------------
# issue 9.1: every rule, with and without limits == numpy.histogram_bin_edges(a, rule, range)
# numpy (numpy/lib/_histograms_impl.py, _get_bin_edges): the rule's width comes from the values
# inside the range (a[(a >= lo) & (a <= hi)]), the count is ceil((hi - lo) / width), integer
# data get a width of at least 1, and the edges are linspace(lo, hi, count + 1).
# ---------------------------------------------------------------------------------------------

RULE_LIMITS = [(20.0, 80.0), (-100.0, 200.0), (0.0, 10.0), (-3.0, 47.5)]


@pytest.mark.parametrize("rule", ["sturges", "sqrt", "scott", "fd"])
@pytest.mark.parametrize("limits", RULE_LIMITS, ids=[f"{a:g}..{b:g}" for a, b in RULE_LIMITS])
@pytest.mark.parametrize("column", ["x", "n"])
def test_rule_with_limits_every_rule_matches_numpy(api, ref, rule, limits, column):
    series = ref.t[column].dropna()  # NULLs: numpy never sees them; sluice's NULL bin
    vals = series.to_numpy(dtype=np.int64 if column == "n" else float)  # integer column: int array
    lo, hi = limits
    edges = np.histogram_bin_edges(vals, bins=rule, range=(lo, hi))  # reference: numpy.histogram_bin_edges(range=)
    counts, _ = np.histogram(vals, bins=edges)  # reference: numpy.histogram
    resp = api.chart({"channels": {"x": {"column": column, "bin": {"rule": rule, "limits": [lo, hi]}},
                                   "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], lo, hi, edges[1] - edges[0], len(edges) - 1, rule)
    rows = api.rows(resp)
    _histogram_rows_match(rows, edges, counts)
    assert resp["stats"]["outside_limits"]["x"] == int(((vals < lo) | (vals > hi)).sum())  # reference: numpy mask
    nulls = [r["count"] for r in rows if r["x_lo"] is None]
    assert nulls == [int(ref.t[column].isna().sum())]  # reference: pandas isna


@pytest.mark.parametrize("rule", ["sturges", "sqrt", "scott", "fd"])
def test_rule_on_integer_column_matches_numpy_int_array(api, ref, rule):
    vals = ref.t["n"].dropna().to_numpy(dtype=np.int64)  # numpy clamps the width of integer data to >= 1
    edges = np.histogram_bin_edges(vals, bins=rule)  # reference: numpy.histogram_bin_edges
    resp = api.chart({"channels": {"x": {"column": "n", "bin": {"rule": rule}}, "y": {"agg": "count"}}})
    _check_bins_meta(resp["bins"]["x"], edges[0], edges[-1], edges[1] - edges[0], len(edges) - 1, rule)


# ---------------------------------------------------------------------------------------------
# issue 9.5: bins: N -> the nice width whose count is closest to N without exceeding it
# ---------------------------------------------------------------------------------------------

def _layouts():
    rng = np.random.default_rng(20261203)
    out = [(105.0, 543.0), (0.0, 21.0), (-1.0, 1.0), (0.3, 0.7), (1e-6, 3.7e-6), (2.5e9, 2.9e9),
           (-40.0, 40.0), (17.2, 17.9), (0.0, 1e6)]
    for _ in range(120):
        lo = float(rng.uniform(-1e4, 1e4))
        out.append((lo, lo + float(10 ** rng.uniform(-3, 5))))
    return out


def test_nice_bin_count_is_closest_to_target_without_exceeding():
    from planner.bins import nice_bins

    for lo, hi in _layouts():
        for n in (1, 2, 3, 5, 7, 10, 12, 20, 30, 50, 100, 500):
            b = nice_bins(lo, hi, n)
            start, stop, d, count = nice_reference(lo, hi, n)  # reference: README rule, exact fractions
            assert (b.count, b.width) == (count, d), (lo, hi, n, b)
            assert math.isclose(b.start, start, rel_tol=1e-12, abs_tol=d * 1e-9)
            assert b.start <= lo and b.stop >= hi  # the bins cover the data
            if n >= 2:
                assert b.count <= n
            if n >= 5:  # the promise: close to N (within [0.7 N, N])
                assert b.count >= 0.7 * n, (lo, hi, n, b.count)


# ---------------------------------------------------------------------------------------------
# issue 9.4 / 10.5: layouts that cannot bin anything are a 422 naming the field
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("bin_,ptr", [
    ({"width": 1e-300, "origin": 1e300}, "/channels/x/bin/width"),
    ({"width": 1e-300, "origin": 1e300, "limits": [0, 100]}, "/channels/x/bin/width"),
    ({"bins": 20, "limits": [0, 5e-324]}, "/channels/x/bin/limits"),
    ({"rule": "sturges", "limits": [1.0, 1.0000000000000002]}, "/channels/x/bin/limits"),
    ({"width": 1e-9, "limits": [0, 100]}, "/channels/x/bin/width"),
])
def test_layouts_that_bin_nothing_are_422(api, bin_, ptr):
    r = api.post({"channels": {"x": {"column": "x", "bin": bin_}, "y": {"agg": "count"}}})
    assert r.status_code == 422, r.text  # RFC 9457 problem, never a 5xx or an empty 200
    body = r.json()
    assert r.headers["content-type"].startswith("application/problem+json")
    assert body["pointer"] == ptr, body  # RFC 6901 pointer to the field


def test_subnormal_data_span_answers_one_bin(api, ref):
    # data-driven layouts never refuse legal data: a span too narrow to split is one bin
    # holding every value (numpy's zero-range rule: [v - 0.5, v + 0.5])
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"bins": 10}}, "y": {"agg": "count"}},
                      "where": [{"column": "x", "gte": 0, "lte": 5e-324}]})
    vals = ref.t["x"].dropna().to_numpy()
    want = int(((vals >= 0) & (vals <= 5e-324)).sum())  # reference: numpy mask
    assert sum(r["count"] for r in api.rows(resp)) == want


# ---------------------------------------------------------------------------------------------
# issue 9.3: empty_bins with a key beside the bin fills the layout's bins only; a NULL bin
# appears only where the data has one (reference: pandas groupby over pd.cut categories)
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("fill", ["zero", "null"])
def test_empty_bins_with_a_group_adds_no_null_bins(api, ref, fill):
    df = ref.t[["x", "cat"]].copy()
    assert df["x"].isna().any() and df["cat"].isna().any()
    # one group without NULL x values: a NULL-bin row for it would be invented
    lone = sorted(df["cat"].dropna().unique())[0]
    where = [{"any": [{"column": "cat", "ne": lone}, {"column": "cat", "is_null": True},
                      {"column": "x", "is_null": False}]}]
    df = df[(df["cat"] != lone) | df["cat"].isna() | df["x"].notna()]
    keep = df["x"].isna() | ((df["x"] >= 0) & (df["x"] <= 100))  # rows outside the limits drop out
    df = df[keep]
    assert not df[(df["cat"] == lone) & df["x"].isna()].shape[0]
    edges = np.arange(0, 101, 10, dtype=float)
    bins = pd.cut(df["x"], edges, right=False, include_lowest=True)
    bins = bins.where(df["x"] != 100, pd.Interval(90.0, 100.0, closed="left"))  # closed last bin (numpy)
    full = df.groupby([bins, df["cat"]], observed=False, dropna=False).size()  # reference: pandas
    # the bins of the layout for every group; NULL-bin rows only where observed (size > 0)
    want = {(None if pd.isna(b) else b.left, None if pd.isna(c) else c): int(n)
            for (b, c), n in full.items() if not pd.isna(b) or n > 0}
    resp = api.chart({"channels": {"x": {"column": "x", "bin": {"width": 10, "origin": 0, "limits": [0, 100]}},
                                   "color": {"column": "cat"}, "y": {"agg": "count"}}, "empty_bins": fill,
                      "where": where})
    got = {(r["x_lo"], r["cat"]): r["count"] for r in api.rows(resp)}
    if fill == "null":  # added rows carry null measures (DEVELOPERS: empty_bins)
        want = {k: (n if n > 0 else None) for k, n in want.items()}
    assert set(got) == set(want)  # no invented NULL-bin rows (reference: pandas)
    assert got == want  # reference: pandas groupby sizes
    assert (None, lone) not in got and any(k[1] == lone for k in got)


# ---------------------------------------------------------------------------------------------
# integer columns: every whole number on and next to the edges of layouts whose unguarded
# index is checked at whole numbers only (planner/emit_keys.py, _integer_floor_is_exact)
# ---------------------------------------------------------------------------------------------

INT_RANGES = [(-57, 0), (-46, 371), (-8, 0), (-1, 0), (-3, 50), (0, 999), (-1000, -1)]


@pytest.fixture(scope="module")
def int_service(tmp_path_factory):
    def build(con) -> dict[str, str]:
        tables = {}
        for j, (lo, hi) in enumerate(INT_RANGES):
            con.execute(f"CREATE TABLE t{j} (v INTEGER, b BIGINT)")
            rows = [(v, v) for v in range(lo, hi + 1)] + [(hi, hi), (lo, lo), (None, None)]
            con.executemany(f"INSERT INTO t{j} VALUES (?, ?)", rows)
            tables[f"ints{j}"] = f"t{j}"
        return tables

    yield from _load("duckdb_service").duckdb_service(
        tmp_path_factory.mktemp("int_bins") / "ints.duckdb", build, "<integer bins>")


@pytest.mark.parametrize("n", [4, 8, 20, 30])
@pytest.mark.parametrize("j", range(len(INT_RANGES)), ids=[f"{a}..{b}" for a, b in INT_RANGES])
def test_integer_column_bins_match_numpy_on_every_edge(api, int_service, j, n):
    from planner.model import ChartRequest

    lo, hi = INT_RANGES[j]
    vals = np.array(list(range(lo, hi + 1)) + [hi, lo], dtype=np.int64)
    for column in ("v", "b"):
        for bin_ in [{"bins": n}] + ([{"bins": n, "limits": [lo + 1, hi - 1]}] if hi - lo > 2 else []):
            svc = int_service
            out = svc.to_json(svc.run(ChartRequest.model_validate(
                {"source": f"ints{j}", "channels": {"x": {"column": column, "bin": bin_},
                                                    "y": {"agg": "count"}}})))
            rows = api.rows(out)  # tests/conftest.py Api: also checks columns[] against data
            b = out["bins"]["x"]
            edges = np.array([b["start"] + i * b["width"] for i in range(b["count"] + 1)])
            a, z = bin_.get("limits", (lo, hi))
            kept = vals[(vals >= a) & (vals <= z)]  # values outside the limits are in no bin
            counts, _ = np.histogram(kept, bins=edges)  # reference: numpy.histogram, last bin closed
            _histogram_rows_match(rows, edges, counts)
            inside = kept[(kept >= edges[0]) & (kept <= edges[-1])]
            assert sum(r["count"] for r in rows if r["x_lo"] is not None) == len(inside) == len(kept)
