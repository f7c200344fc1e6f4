"""Brushing: a request that differs from an earlier one only in its filter values reuses the
cached plan (issue 11 item 5). The values are bound parameters of the cached statements
(planner.values ``_scalar_bindable``, planner.where ``bind_values``), and the finished main
statement is keyed by the bin layout the extents row gives (``planner.compile.layout_key``),
not by the row.

Reuse is shown by counting calls of ``prepare`` and of SQL rendering (no timing); answers
are checked against numpy.histogram over the rows the window keeps (counted in Python) and
the extents row against Python's min/max of those rows.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from planner.dialects.base import Dialect
from planner.errors import PlanError
from planner.model import ChartRequest
from testmods import load as _load  # tests/ helper modules (tests/testmods.py)

N = 4000
T0 = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)


def _rows() -> list[tuple[dt.datetime, float, int]]:
    # one row a minute; v runs over [0.5, 99.4] in a scrambled order, so every window of a
    # few hundred minutes has a slightly different min and max but the same nice layout
    return [(T0 + dt.timedelta(minutes=i), 0.5 + ((i * 37) % 990) / 10.0, i % 11 - 5)
            for i in range(N)]


ROWS = _rows()


@pytest.fixture(scope="module")
def service(tmp_path_factory):
    def build(con) -> dict[str, str]:
        con.execute("CREATE TABLE t (ts TIMESTAMPTZ, v DOUBLE, n INTEGER)")
        con.executemany("INSERT INTO t VALUES (?, ?, ?)", ROWS)
        return {"t": "t"}

    yield from _load("duckdb_service").duckdb_service(
        tmp_path_factory.mktemp("reuse") / "t.duckdb", build, "<reuse>")


def _window(i: int) -> tuple[dt.datetime, dt.datetime]:
    lo = T0 + dt.timedelta(minutes=300 + 41 * i)
    return lo, lo + dt.timedelta(minutes=150 + i)


def _request(i: int, bin_spec: dict) -> ChartRequest:
    lo, hi = _window(i)
    return ChartRequest.model_validate({
        "source": "t", "channels": {"x": {"column": "v", "bin": bin_spec}, "y": {"agg": "count"}},
        "where": [{"column": "ts", "gte": lo.isoformat(), "lt": hi.isoformat()},
                  {"column": "n", "ne": i % 3}]})


def _kept(i: int) -> list[float]:
    lo, hi = _window(i)
    return [v for t, v, n in ROWS if lo <= t < hi and n != i % 3]


@pytest.fixture()
def counted(monkeypatch):
    """Calls of app.service's ``prepare``, of the bind stage (``planner.bind.bind`` as
    ``planner.compile.prepare`` calls it) and of ``Dialect.render`` (every SQL text)."""
    import app.service as service_mod
    import planner.compile as compile_mod

    calls = {"prepare": 0, "bind": 0, "render": 0}
    real_prepare, real_bind, real_render = service_mod.prepare, compile_mod.bind, Dialect.render

    def prepare(*a, **k):
        calls["prepare"] += 1
        return real_prepare(*a, **k)

    def bind(*a, **k):
        calls["bind"] += 1
        return real_bind(*a, **k)

    def render(self, node):
        calls["render"] += 1
        return real_render(self, node)

    monkeypatch.setattr(service_mod, "prepare", prepare)
    monkeypatch.setattr(compile_mod, "bind", bind)
    monkeypatch.setattr(Dialect, "render", render)
    return calls


@pytest.mark.parametrize("bin_spec", [{"bins": 20}, {"width": 2.5, "origin": 0.5}])
def test_new_filter_values_reuse_the_plan(service, counted, bin_spec):
    # windows of their own per bin spec: both layouts read the same extents statement, whose
    # cached answer would otherwise carry over from the other case
    base = 0 if "bins" in bin_spec else 20
    zeroth = service.run(_request(base, bin_spec))
    assert counted["prepare"] >= 1 and counted["render"] >= 1  # the first one plans
    assert len(zeroth.meta["sql"]) == 2  # the extents statement, then the grouped one
    # the next filter is laid out from the last extents row, in one statement that carries
    # its own row (planner.emit_main.carriable); the layout repeats, so its answer stands
    first = service.run(_request(base + 1, bin_spec))
    assert len(first.meta["sql"]) == 1
    counted["prepare"] = counted["bind"] = counted["render"] = 0
    extents = set()
    for i in range(base + 2, base + 13):
        res = service.run(_request(i, bin_spec))
        kept = _kept(i)
        # reference: numpy.histogram over the answer's edges of the rows Python keeps
        b = res.meta["bins"]["x"]
        edges = [b["start"] + j * b["width"] for j in range(b["count"] + 1)]
        want, _ = np.histogram(kept, bins=edges)
        got = dict(zip(res.table.column("x_lo").to_pylist(), res.table.column("count").to_pylist()))
        assert [got.get(e, 0) for e in edges[:-1]] == want.tolist()
        assert res.meta["stats"]["matched_rows"] == len(kept)
        assert res.meta["sql"] == first.meta["sql"]  # one statement, one text, values bound
        assert b == first.meta["bins"]["x"]  # the layout repeats ...
        extents.add((min(kept), max(kept)))
    assert len(extents) > 5  # ... over extents rows that do not
    # neither a new plan nor any new SQL text for any of the new values
    assert counted == {"prepare": 0, "bind": 0, "render": 0}


def test_a_new_bin_layout_renders_again(service, counted):
    service.run(_request(0, {"bins": 20}))
    counted["prepare"] = counted["bind"] = counted["render"] = 0
    # a window over 5 rows only: another extents row and another nice layout
    lo = T0 + dt.timedelta(minutes=2)
    req = ChartRequest.model_validate({
        "source": "t", "channels": {"x": {"column": "v", "bin": {"bins": 20}}, "y": {"agg": "count"}},
        "where": [{"column": "ts", "gte": lo.isoformat(), "lt": (lo + dt.timedelta(minutes=5)).isoformat()},
                  {"column": "n", "ne": 0}]})
    res = service.run(req)
    kept = [v for t, v, n in ROWS if lo <= t < lo + dt.timedelta(minutes=5) and n != 0]
    assert res.meta["stats"]["matched_rows"] == len(kept)
    assert res.meta["bins"]["x"]["width"] < 2.5  # narrower data: a finer nice width
    # the same request shape: the shared bound plan is laid out anew (no second bind), and
    # only the main statement is rendered
    assert counted == {"prepare": 0, "bind": 0, "render": 1}


@pytest.mark.parametrize("where,ptr", [
    ([{"column": "ts", "gte": "yesterday", "lt": "2026-01-02T00:00:00Z"}, {"column": "n", "ne": 1}],
     "/where/0/gte"),
    ([{"column": "ts", "gte": "2026-01-01T00:00:00Z", "lt": "10000-01-01"}, {"column": "n", "ne": 1}],
     "/where/0/lt"),
])
def test_bad_values_of_a_cached_shape_keep_their_pointer(service, where, ptr):
    service.run(_request(0, {"bins": 20}))  # the shape is cached with good values
    req = ChartRequest.model_validate({"source": "t", "channels": {
        "x": {"column": "v", "bin": {"bins": 20}}, "y": {"agg": "count"}}, "where": where})
    with pytest.raises(PlanError) as e:
        service.run(req)
    assert e.value.pointer == ptr


def test_inf_and_nan_under_a_new_filter_end_the_guessing(tmp_path):
    """A new filter value whose rows hold inf or NaN: the carrying statement (laid out from
    the last finite row) shows them in its plain max, so the chart is laid out from the
    guarded extents, and the shape stops guessing until a finite row is laid out again.
    Reference: numpy.histogram over the finite values of the rows the filter keeps, and
    the same request in a service with empty caches."""
    from app.service import ChartService

    finite = [round((i * 7.31) % 53.0 - 3.0, 3) for i in range(200)]
    rows = [(v, i % 10) for i, v in enumerate(finite)] + [
        (float("inf"), 9), (float("-inf"), 9), (float("nan"), 9)]

    def build(con) -> dict[str, str]:
        con.execute("CREATE TABLE t (v DOUBLE, g INTEGER)")
        con.executemany("INSERT INTO t VALUES (?, ?)", rows)
        return {"t": "t"}

    gen = _load("duckdb_service").duckdb_service(tmp_path / "inf.duckdb", build, "<inf>")
    service = next(gen)
    try:
        def ask(svc, g: int):
            return svc.to_json(svc.run(ChartRequest.model_validate({
                "source": "t", "where": [{"column": "g", "lte": g}],
                "channels": {"x": {"column": "v", "bin": {"bins": 10}}, "y": {"agg": "count"}}})))

        # (g bound, statements): first of its shape; a guess that holds; inf / NaN come in
        # (the guess, the plain extents, the guarded extents, the main); no guess any more
        for g, statements in [(7, 2), (8, 1), (9, 4), (10, 3)]:
            got = ask(service, g)
            alone = ask(ChartService(service.catalog), g)  # reference: empty caches
            assert (got["bins"], got["data"]) == (alone["bins"], alone["data"])
            assert got["stats"]["statements"] == statements, (g, got["sql"])
            kept = [v for v, k in rows if k <= g and np.isfinite(v)]
            b = got["bins"]["x"]
            edges = [b["start"] + j * b["width"] for j in range(b["count"] + 1)]
            counts, _ = np.histogram(kept, bins=edges)  # reference: numpy.histogram
            shown = [c for lo, c in zip(got["data"]["x_lo"], got["data"]["count"]) if lo is not None]
            assert shown == [int(c) for c in counts if c]
    finally:
        gen.close()
