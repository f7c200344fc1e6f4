"""Cross-engine matrix: every feature of a chart request, on every live engine, must give
DuckDB's answer on the same rows — or be refused with the 422 the capability table promises.

Outside references: DuckDB's answer on the identical fixture rows (tests/engine_fixtures.py,
generated deterministically in Python and loaded into each engine), and each engine itself
(its own date, percentile and variance functions run the SQL). The code path is the real
service: ``app.service.ChartService`` over a ``Settings`` with one source per engine.

Comparison: columns (name, role, type), rows in the order returned (the order is fully
determined by the request: sort terms, then every key ascending, NULLs last), floats within
1e-9 relative, and the response's stats, bins and domains. approx_count_distinct is compared
with the exact count distinct within 6% (DuckDB's sketch and the engines' sketches differ;
engines without one answer exactly).
"""

from __future__ import annotations

import math

import pytest

from planner.dialects import get_dialect
from planner.errors import PlanError
from planner.model import ChartRequest


from testmods import load as _load  # noqa: E402 - one loader for tests/ helpers


fx = _load("engine_fixtures")

ENGINES = ["postgres", "mysql", "sqlite", "clickhouse", "spark"]
#: engines with one test per (engine, case); Spark runs every case in ONE test so that only
#: one pytest-xdist worker starts a JVM (one SparkSession for the whole test session)
PER_CASE = [e for e in ENGINES if e != "spark"]
BERLIN, NEW_YORK = "Europe/Berlin", "America/New_York"
DST_WEEK = [{"column": "ts", "gte": "2026-10-22T00:00:00Z", "lt": "2026-10-29T00:00:00Z"}]


def key(column, **kw):
    return {"column": column, **kw}


def agg(name, column=None, **kw):
    d = {"agg": name, **kw}
    if column is not None:
        d["column"] = column
    return d


COUNT = agg("count")

CASES: dict[str, dict] = {
    # --- aggregates -------------------------------------------------------------------
    "count_by_cat": {"channels": {"x": key("cat"), "y": COUNT}},
    "count_distinct": {"channels": {"x": key("grp"), "y": agg("count_distinct", "k"),
                                    "size": agg("count_distinct", "cat")}},
    "approx_count_distinct": {"channels": {"x": key("grp"), "y": agg("approx_count_distinct", "k")}},
    "sums": {"channels": {"x": key("cat"), "y": agg("sum", "n"), "size": agg("sum", "amount"),
                          "opacity": agg("sum", "x")}},
    "avg": {"channels": {"x": key("flag"), "y": agg("avg", "n"), "size": agg("avg", "amount"),
                         "opacity": agg("avg", "x")}},
    "min_max": {"channels": {"x": key("grp"), "y": agg("min", "x"), "size": agg("max", "ts"),
                             "opacity": agg("min", "cat"), "shape": agg("max", "amount")}},
    "median": {"channels": {"x": key("grp"), "y": agg("median", "x"), "size": agg("median", "n")}},
    "quantile": {"channels": {"x": key("flag"), "y": agg("quantile", "x", q=0.9),
                              "size": agg("quantile", "amount", q=0.25)}},
    "variance": {"channels": {"x": key("grp"), "y": agg("stddev_samp", "x"),
                              "size": agg("stddev_pop", "x"), "opacity": agg("var_samp", "n"),
                              "shape": agg("var_pop", "amount")}},
    "no_keys": {"channels": {"y": COUNT, "size": agg("sum", "n")}},
    # --- numeric bins -------------------------------------------------------------------
    "bin_nice": {"channels": {"x": key("x", bin={"bins": 20}), "y": COUNT}},
    "bin_width_origin": {"channels": {"x": key("x", bin={"width": 7.5, "origin": 1}), "y": COUNT}},
    "bin_sturges": {"channels": {"x": key("x", bin={"rule": "sturges"}), "y": COUNT}},
    "bin_scott": {"channels": {"x": key("x", bin={"rule": "scott"}), "y": COUNT}},
    "bin_fd": {"channels": {"x": key("x", bin={"rule": "fd"}), "y": COUNT}},
    "bin_sqrt": {"channels": {"x": key("n", bin={"rule": "sqrt"}), "y": COUNT}},
    "bin_limits": {"channels": {"x": key("x", bin={"bins": 10, "limits": [-20, 30]}),
                                "y": agg("avg", "n")}},
    "bin_int_empty_zero": {"channels": {"x": key("n", bin={"width": 10, "limits": [-60, 60]}),
                                        "y": COUNT, "color": key("grp")},
                           "empty_bins": "zero", "where": [{"column": "n", "gt": 0}]},
    "bin_decimal": {"channels": {"x": key("amount", bin={"bins": 15}), "y": agg("sum", "amount")}},
    "bin_2d": {"channels": {"x": key("x", bin={"bins": 8}), "y": key("n", bin={"bins": 5}),
                            "color": COUNT}},
    # --- time bins, trunc, extract ------------------------------------------------------
    "tbin_year_utc": {"channels": {"x": key("ts", bin={"bins": 20}), "y": COUNT}},
    "tbin_year_berlin": {"channels": {"x": key("ts", bin={"bins": 12}, tz=BERLIN), "y": COUNT}},
    "tbin_limits_null": {"channels": {"x": key("ts", bin={"bins": 10, "limits": [
        "2026-03-27T00:00:00Z", "2026-04-01T00:00:00Z"]}), "y": agg("sum", "x")},
        "empty_bins": "null"},
    "tbin_days_newyork": {"channels": {"x": key("tsn", bin={"bins": 30, "limits": [
        "2026-10-28T00:00:00Z", "2026-11-04T00:00:00Z"]}, tz=NEW_YORK), "y": COUNT},
        "empty_bins": "zero"},
    "trunc_day_berlin": {"channels": {"x": key("ts", trunc="day", tz=BERLIN), "y": COUNT},
                         "where": DST_WEEK},
    "trunc_week_newyork": {"channels": {"x": key("ts", trunc="week", tz=NEW_YORK), "y": COUNT}},
    "trunc_hour_berlin_fallback": {"channels": {"x": key("tsn", trunc="hour", tz=BERLIN), "y": COUNT},
                                   "where": [{"column": "ts", "gte": "2026-10-24T20:00:00Z",
                                              "lt": "2026-10-25T06:00:00Z"}]},
    "trunc_month_quarter_year": {"channels": {"x": key("ts", trunc="month"), "color": key("ts", trunc="quarter"),
                                              "by": [key("ts", trunc="year")], "y": COUNT}},
    "trunc_week_naive_utc": {"channels": {"x": key("tsn", trunc="week"), "y": agg("max", "tsn")}},
    "trunc_minute_second": {"channels": {"x": key("ts", trunc="minute"), "color": key("ts", trunc="second"),
                                         "y": COUNT},
                            "where": [{"column": "ts", "gte": "2026-03-29T00:00:00Z",
                                       "lt": "2026-03-29T06:00:00Z"}]},
    "extract_week_parts_berlin": {"channels": {"x": key("ts", extract="isodow", tz=BERLIN),
                                               "color": key("ts", extract="dow", tz=BERLIN),
                                               "by": [key("ts", extract="week", tz=BERLIN),
                                                      key("ts", extract="isoyear", tz=BERLIN)],
                                               "y": COUNT}},
    "extract_calendar_utc": {"channels": {"x": key("ts", extract="month"),
                                          "color": key("ts", extract="quarter"),
                                          "by": [key("ts", extract="year"), key("ts", extract="doy")],
                                          "y": COUNT}},
    "extract_clock_newyork": {"channels": {"x": key("tsn", extract="hour", tz=NEW_YORK),
                                           "color": key("ts", extract="day", tz=NEW_YORK),
                                           "by": [key("ts", extract="minute"), key("ts", extract="second")],
                                           "y": COUNT}, "where": DST_WEEK},
    "date_column": {"channels": {"x": key("day", trunc="week"), "color": key("day", extract="isodow"),
                                 "y": agg("max", "day"), "size": agg("min", "day")},
                    "where": [{"column": "day", "gte": "2026-03-01", "lt": "2026-05-01"}]},
    "date_bins_tz": {"channels": {"x": key("day", bin={"bins": 12}, tz=NEW_YORK), "y": COUNT,
                                  "color": key("day", trunc="month", tz=BERLIN)}},
    # --- where ---------------------------------------------------------------------------
    "where_compare": {"channels": {"x": key("grp"), "y": COUNT},
                      "where": [{"column": "n", "gte": -10, "lt": 25, "ne": 3},
                                {"column": "x", "gt": -5.5, "lte": 40},
                                {"column": "amount", "gte": 100.25}]},
    "where_text_case_sensitive": {"channels": {"x": key("cat"), "y": COUNT},
                                  "where": [{"any": [{"column": "cat", "eq": "alpha"},
                                                     {"column": "cat", "contains": "Al"},
                                                     {"column": "cat", "starts_with": "Zü"},
                                                     {"column": "cat", "contains": "東"}]}]},
    "where_in_not_in_null": {"channels": {"x": key("cat"), "color": key("flag"), "y": COUNT},
                             "where": [{"column": "cat", "not_in": ["beta", "naïve"]},
                                       {"column": "grp", "in": ["north", "east"]},
                                       {"column": "flag", "is_null": False},
                                       {"column": "k", "is_null": False}]},
    "where_any_not": {"channels": {"x": key("grp"), "y": agg("sum", "n")},
                      "where": [{"any": [{"column": "cat", "starts_with": "a"},
                                         {"not": {"column": "n", "lt": 0}},
                                         {"column": "x", "is_null": True}]},
                                {"not": {"any": [{"column": "flag", "eq": True},
                                                 {"column": "grp", "eq": "south"}]}}]},
    "where_time_and_empty_in": {"channels": {"x": key("grp"), "y": COUNT},
                                "where": [{"column": "ts", "gte": "2026-03-08T06:59:59.5Z",
                                           "lt": "2026-03-29T01:00:00.250Z"},
                                          {"column": "tsn", "lte": "2026-06-01"},
                                          {"column": "cat", "not_in": []}]},
    "where_no_rows": {"channels": {"x": key("x", bin={"bins": 10, "limits": [0, 10]}), "y": COUNT},
                      "where": [{"column": "n", "gt": 1000}]},
    # --- top, stack, facets, sort, limit --------------------------------------------------
    "top_by_count": {"channels": {"x": key("k", top=5), "y": COUNT}},
    "top_by_sum_label": {"channels": {"x": key("cat", top=3, other_label="rest"),
                                      "y": agg("sum", "x")}},
    "top_color_in_histogram": {"channels": {"x": key("x", bin={"bins": 6}),
                                            "color": key("cat", top=2), "y": COUNT}},
    "stack_sum": {"channels": {"x": key("x", bin={"bins": 8}), "color": key("cat"), "y": COUNT},
                  "stack": "sum"},
    "stack_fraction": {"channels": {"x": key("grp"), "color": key("flag"), "y": agg("sum", "x")},
                       "stack": "fraction"},
    "stack_centered_horizontal": {"channels": {"y": key("ts", trunc="month", tz=BERLIN),
                                               "color": key("grp"), "x": agg("avg", "amount")},
                                  "stack": "centered"},
    "facets_max_groups": {"channels": {"x": key("cat"), "y": COUNT},
                          "facet": {"row": key("grp"), "col": key("flag"), "max_groups": 3},
                          "sort": [{"channel": "y", "desc": True}]},
    "sort_limit_truncated": {"channels": {"x": key("k"), "y": agg("sum", "n")},
                             "sort": [{"channel": "y", "desc": True}], "limit": 7},
    "sort_key_desc_limit": {"channels": {"x": key("k"), "y": COUNT},
                            "sort": [{"channel": "x", "desc": True}], "limit": 12},
    "high_cardinality": {"channels": {"x": key("k"), "color": key("flag"), "y": agg("max", "x")}},
    # --- share (planner/aggregates.py; against pandas below: check_share_pandas) ------------
    "share_by_group": {"channels": {"x": key("grp"), "color": key("cat"), "y": agg("share", "flag")}},
    "share_top_other": {"channels": {"x": key("cat", top=3), "y": agg("share", "flag"),
                                     "size": agg("share", condition="n > 0"), "opacity": COUNT}},
    # share first, median too: top ranks the source rows (_top_cte), no fold
    "share_top_ranked": {"channels": {"x": key("cat", top=3), "y": agg("share", "flag"),
                                      "size": agg("median", "x")}},
    "share_condition_nulls": {"channels": {"x": key("grp"),
                                           "y": agg("share", condition="x > 10 AND n < 20")}},
}

# --- bins, time limits, empty bins, request tz (issues 9.1-9.6, 10.10; engineer "bins") -----
# The same answer as DuckDB on every engine; DuckDB itself is checked against numpy / pandas /
# zoneinfo in tests/test_reference_bins.py and tests/test_reference_time.py.
CASES.update({
    "bins9_rule_limits_sturges": {"channels": {"x": key("x", bin={"rule": "sturges", "limits": [-20, 30]}),
                                               "y": COUNT}},
    "bins9_rule_limits_sqrt_int": {"channels": {"x": key("n", bin={"rule": "sqrt", "limits": [-10, 40]}),
                                                "y": COUNT}},
    "bins9_nice_close_to_n": {"channels": {"x": key("x", bin={"bins": 30}), "y": COUNT}},
    "bins9_width_from_data": {"channels": {"x": key("x", bin={"width": 2.5, "origin": 0.5}), "y": COUNT}},
    # day edges: rows on the upper limit go into the closed last bin, no bin past the limits
    "bins9_tbin_days_closed": {"channels": {"x": key("day", bin={"bins": 40, "limits": [
        "2026-03-01", "2026-03-31"]}), "y": COUNT}, "empty_bins": "zero"},
    "bins9_tbin_hours_closed_tz": {"channels": {"x": key("ts", bin={"bins": 30, "limits": [
        "2026-03-28T20:00:00", "2026-03-29T20:00:00"]}), "y": COUNT}, "empty_bins": "null",
        "tz": BERLIN},
    "bins9_tbin_months_dense": {"channels": {"x": key("tsn", bin={"bins": 12, "limits": [
        "2026-01-01T00:00:00", "2027-01-01T00:00:00"]}, tz=NEW_YORK), "y": agg("sum", "n")},
        "empty_bins": "zero"},
    # a NULL bin only where the data has one (grp has NULLs, x has NULLs)
    "bins9_empty_nulls_by_group": {"channels": {"x": key("x", bin={"width": 10, "origin": 0,
                                                                    "limits": [-50, 50]}),
                                                "color": key("grp"), "y": COUNT},
                                   "empty_bins": "zero"},
    # zero fills number measures only: an empty bin has no earliest day or largest text
    "bins9_empty_zero_non_numbers": {"channels": {"x": key("x", bin={"width": 10, "limits": [-100, 100]}),
                                                  "y": agg("min", "day"), "size": agg("max", "cat"),
                                                  "color": agg("max", "flag"), "opacity": agg("min", "ts"),
                                                  "shape": agg("max", "n")},
                                     "empty_bins": "zero"},
    "bins9_empty_2d": {"channels": {"x": key("x", bin={"bins": 5, "limits": [-30, 30]}),
                                    "y": key("n", bin={"bins": 4, "limits": [-40, 40]}), "color": COUNT},
                       "empty_bins": "null"},
    # 2,000 bins from the SQL series of every engine (10,000 plan in < 50 ms,
    # tests/test_bins_planning.py; MariaDB's window stage over them grows quadratically)
    "bins9_dense_2k": {"channels": {"x": key("x", bin={"width": 0.05, "limits": [-50, 50]}),
                                    "y": COUNT}, "empty_bins": "zero"},
    "bins9_request_tz_months": {"channels": {"x": key("ts", trunc="month"), "y": COUNT},
                                "tz": "Europe/London",
                                "where": [{"column": "ts", "gte": "2026-01-01", "lt": "2026-07-01"}]},
    "bins9_request_tz_filter_sql": {"channels": {"x": key("grp"), "y": COUNT}, "tz": NEW_YORK,
                                    "filter_sql": "tsn >= TIMESTAMP '2026-03-08 01:30:00' AND "
                                                  "ts < '2026-03-09' AND day <= DATE '2026-03-08'"},
})


def features(body: dict) -> set[str]:
    """Capability-table features a request needs (independent of the dialect code)."""
    out: set[str] = set()
    req = ChartRequest.model_validate({"source": "s", **body})
    for _, _, ch in req.keyed_channels():
        if ch.agg in ("median", "quantile"):
            out.add(ch.agg)
        if ch.agg in ("stddev_samp", "stddev_pop", "var_samp", "var_pop"):
            out.add("stddev")
        if ch.bin is not None and ch.bin.rule == "scott":
            out.add("stddev")
        if ch.bin is not None and ch.bin.rule == "fd":
            out.add("quantile")
        if ch.tz not in (None, "UTC"):
            out.add("tz")
        if ch.tz is None and req.tz not in (None, "UTC") and (ch.trunc or ch.extract or ch.bin) \
                and ch.column in ("ts", "tsn", "day"):  # the request's zone on a temporal key
            out.add("tz")
        if ch.trunc == "week":
            out.add("trunc_week")
        if ch.extract is not None:
            out.add("extract")
        if ch.top is not None:
            out.add("window")
    if req.stack or (req.facet and req.facet.max_groups):
        out.add("window")
    return out


# --- fixtures ---------------------------------------------------------------------------

def chdb_http_shim(path: str) -> str:
    """A local HTTP endpoint speaking ClickHouse's HTTP interface, answered by the real
    ClickHouse engine (the chdb session on ``path``): the body is the query, the answer its
    ``ArrowStream`` bytes or the engine's error text with status 500. It checks that the
    client asks for read-only execution, a time limit and Arrow output."""
    import threading
    from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
    from urllib.parse import parse_qs, urlparse

    lock = threading.Lock()

    class Handler(BaseHTTPRequestHandler):
        def log_message(self, *args):  # quiet
            pass

        def do_POST(self):
            from app.engines.clickhouse import ChdbEngine
            from app.settings import SourceConfig

            params = {k: v[0] for k, v in parse_qs(urlparse(self.path).query).items()}
            sql = self.rfile.read(int(self.headers.get("Content-Length", 0))).decode("utf-8")
            if params.get("readonly") != "2" or params.get("default_format") != "ArrowStream" \
                    or "max_execution_time" not in params:
                self.send_response(400)
                self.end_headers()
                self.wfile.write(b"shim: expected readonly=2, default_format=ArrowStream")
                return
            with lock:
                sess = ChdbEngine._sessions.get(path)
                if sess is None:
                    ChdbEngine(SourceConfig(name="shim", engine="clickhouse", table="t", path=path))
                    sess = ChdbEngine._sessions[path]
                try:
                    body = sess.query(sql, "ArrowStream").bytes()
                    status = 200
                except Exception as e:  # noqa: BLE001 - the engine's error text, like ClickHouse
                    body, status = str(e).encode("utf-8"), 500
            self.send_response(status)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return f"http://127.0.0.1:{server.server_address[1]}/"


@pytest.fixture(scope="session")
def engine_sources(tmp_path_factory):
    root = tmp_path_factory.mktemp("engines")
    rows = fx.make_rows()
    table = fx.arrow_table(rows)
    chdb = fx.load_chdb(root, table)
    return {
        "duckdb": fx.load_duckdb(root, table),
        "postgres": fx.load_postgres(rows),
        "mysql": fx.load_mysql(rows),
        "sqlite": fx.load_sqlite(root, rows),
        "clickhouse": chdb,
        "clickhouse_http": {"engine": "clickhouse", "dsn": chdb_http_shim(chdb["path"]),
                            "table": chdb["table"], "statement_timeout_ms": 20000},
        "spark": fx.load_spark(root, table),
    }


@pytest.fixture(scope="session")
def service(engine_sources):
    """One ChartService over every engine; ONE SparkSession (local[2], 2 shuffle partitions,
    no UI) for the whole test session."""
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    settings = parse_settings({"sources": engine_sources}, "<engine matrix>")
    catalog = Catalog(settings)
    yield ChartService(catalog)
    catalog.close()


_DUCK: dict[str, dict] = {}


def answer(service, engine: str, body: dict) -> dict:
    req = ChartRequest.model_validate({"source": engine, **body})
    result = service.run(req)
    out = service.to_json(result)
    out.pop("timing_ms", None)
    return out


def duck(service, case: str) -> dict:
    if case not in _DUCK:
        _DUCK[case] = answer(service, "duckdb", CASES[case])
    return _DUCK[case]


# --- comparison ---------------------------------------------------------------------------

def _same(a, b, rel: float) -> bool:
    if a is None or b is None:
        return a is None and b is None
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        if isinstance(a, float) and math.isnan(a):
            return isinstance(b, float) and math.isnan(b)
        return math.isclose(a, b, rel_tol=rel, abs_tol=1e-9)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y, rel) for x, y in zip(a, b))
    return a == b


def assert_same_answer(got: dict, want: dict, body: dict, engine: str) -> None:
    cols = [(c["name"], c["role"], c["type"]) for c in got["columns"]]
    want_cols = [(c["name"], c["role"], c["type"]) for c in want["columns"]]
    assert cols == want_cols, f"{engine}: columns differ\n got  {cols}\n want {want_cols}"
    approx: set[str] = set()
    req = ChartRequest.model_validate({"source": "s", **body})
    for _, _, ch in req.keyed_channels():
        if ch.agg == "approx_count_distinct":
            approx.add(f"approx_count_distinct_{ch.column}")
    names = [c["name"] for c in got["columns"]]
    n_got = len(got["data"][names[0]]) if names else 0
    n_want = len(want["data"][names[0]]) if names else 0
    assert n_got == n_want, f"{engine}: {n_got} rows, DuckDB {n_want}"
    for name in names:
        if name in approx:
            continue
        g, w = got["data"][name], want["data"][name]
        bad = [i for i, (a, b) in enumerate(zip(g, w)) if not _same(a, b, 1e-9)]
        assert not bad, (f"{engine}: column {name!r} differs at rows {bad[:5]}: "
                         f"got {[g[i] for i in bad[:5]]}, DuckDB {[w[i] for i in bad[:5]]}")
    for key_ in ("source_rows", "matched_rows", "result_rows", "groups", "truncated",
                 "outside_limits"):
        assert got["stats"].get(key_) == want["stats"].get(key_), \
            f"{engine}: stats.{key_} {got['stats'].get(key_)} != DuckDB {want['stats'].get(key_)}"
    assert _same(got["bins"], want["bins"], 1e-9) or got["bins"] == want["bins"], \
        f"{engine}: bins {got['bins']} != DuckDB {want['bins']}"
    for dname, dom in want["domains"].items():
        if dname in approx:
            continue
        assert _same(got["domains"].get(dname), dom, 1e-9), \
            f"{engine}: domains.{dname} {got['domains'].get(dname)} != DuckDB {dom}"
    assert got.get("approximate", False) == want.get("approximate", False)


# --- the matrix -----------------------------------------------------------------------------

def check_case(service, engine: str, case: str) -> None:
    """``engine`` is the source name (the engine kind, clickhouse_http, spark_connect)."""
    body = CASES[case]
    dialect = get_dialect(service.catalog.config(engine).engine)
    refused = sorted(f for f in features(body) if not dialect.supports(f))
    if refused:
        # The capability table promises a 422 "not supported on <dialect>: <feature>".
        with pytest.raises(PlanError) as err:
            answer(service, engine, body)
        assert err.value.status == 422, err.value.detail
        assert err.value.detail.startswith(f"not supported on {dialect.name}: "), err.value.detail
        assert err.value.slug == "unsupported"
        return
    want = duck(service, case)
    got = answer(service, engine, body)
    assert got["dialect"] == dialect.name
    assert_same_answer(got, want, body, engine)


# first in the file: the slowest test starts first on its worker
def test_spark_matches_duckdb_every_case(service):
    """Every case on Spark (pyspark local[2]); all failures are listed, not just the first."""
    failures = []
    try:
        check_approx(service, "spark")
        check_read_only(service, "spark")
    except AssertionError as e:
        failures.append(f"approx_count_distinct vs exact / read-only: {e}")
    try:
        check_share_pandas(service, "spark")
    except AssertionError as e:
        failures.append(f"share vs pandas: {e}")
    for case in CASES:
        try:
            check_case(service, "spark", case)
        except Exception as e:  # noqa: BLE001 - collected and reported together
            failures.append(f"{case}: {type(e).__name__}: {str(e)[:600]}")
    assert not failures, f"{len(failures)} of {len(CASES)} cases differ on spark:\n" + "\n".join(failures)


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("engine", PER_CASE)
def test_engine_matches_duckdb(service, engine: str, case: str):
    check_case(service, engine, case)


# --- share against pandas, on every engine ---------------------------------------------------

def _frame():
    """The fixture rows as pandas nullable columns (flag: boolean, n: Int64, x: Float64)."""
    import pandas as pd

    df = pd.DataFrame(fx.make_rows())
    return df.assign(flag=df["flag"].astype("boolean"), n=df["n"].astype("Int64"),
                     x=df["x"].astype("Float64"))


def _nullable(v):
    import pandas as pd

    return None if v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v)) else v


def _by_key(truth, keys) -> dict:
    """{group key: share} of a nullable boolean Series. reference: pandas
    ``SeriesGroupBy.mean()`` of a nullable boolean (skipna: NA rows leave numerator and
    denominator; an all-NA group is NA), groupby(dropna=False) so NULL is its own group."""
    means = truth.groupby(keys.rename("key"), dropna=False).mean()
    return {_nullable(k): _nullable(v) for k, v in means.items()}


def _got(resp: dict, key_name: str, measure: str) -> dict:
    return {k: v for k, v in zip(resp["data"][key_name], resp["data"][measure])}


def _assert_shares(got: dict, want: dict, what: str) -> None:
    assert set(got) == set(want), f"{what}: groups {sorted(map(str, got))} != pandas {sorted(map(str, want))}"
    for k, w in want.items():
        g = got[k]
        if w is None:
            assert g is None, f"{what}[{k!r}]: got {g!r}, pandas NA"
        else:
            assert g is not None and 0.0 <= g <= 1.0 and math.isclose(g, float(w), rel_tol=1e-12), \
                f"{what}[{k!r}]: got {g!r}, pandas {w!r}"


def check_share_pandas(service, engine: str) -> None:
    df = _frame()
    # 1. a boolean column by a high-cardinality key: many single-row groups, some all-NULL
    resp = answer(service, engine, {"channels": {"x": key("k"), "y": agg("share", "flag")},
                                    "limit": 5000})
    want = _by_key(df["flag"], df["k"])
    assert sum(v is None for v in want.values()) >= 10  # all-NULL groups are present
    _assert_shares(_got(resp, "k", "share_flag"), want, "share of flag by k")
    col = next(c for c in resp["columns"] if c["name"] == "share_flag")
    assert (col["role"], col["type"]) == ("measure", "double")
    # 2. a condition whose value is NULL where x or n is (SQL three-valued AND = pandas'
    #    Kleene logic of nullable booleans)
    resp = answer(service, engine, {"channels": {"x": key("grp"), "y": {
        "agg": "share", "condition": "x > 10 AND n < 20", "name": "s"}}})
    _assert_shares(_got(resp, "grp", "s"), _by_key((df["x"] > 10) & (df["n"] < 20), df["grp"]),
                   "share of x > 10 AND n < 20 by grp")
    # 3. top 3 by share, the rest folded into (other): the share of the union of its rows
    #    (true rows / non-NULL rows), not an average of the groups' shares
    resp = answer(service, engine, {"channels": {"x": key("cat", top=3), "y": agg("share", "flag")}})
    per_cat = _by_key(df["flag"], df["cat"])
    ranked = sorted((k for k in per_cat if k is not None and per_cat[k] is not None),
                    key=lambda k: (-per_cat[k], k))  # share descending, ties by value ascending
    kept = set(ranked[:3])
    folded = df["cat"].where(df["cat"].isin(kept) | df["cat"].isna(), "(other)")
    want = _by_key(df["flag"], folded)
    assert "(other)" in want and want["(other)"] != sum(
        per_cat[k] for k in ranked[3:]) / len(ranked[3:])  # the fold is not a mean of shares
    _assert_shares(_got(resp, "cat", "share_flag"), want, "share of flag, top 3 of cat")


@pytest.mark.parametrize("engine", ["duckdb"] + PER_CASE)
def test_share_matches_pandas(service, engine):
    check_share_pandas(service, engine)


WRITES = {
    "postgres": "CREATE TABLE {schema}.sluice_write_probe (a int)",
    "mysql": "CREATE TABLE sluice_write_probe (a INT)",
    "sqlite": "CREATE TABLE sluice_write_probe (a INTEGER)",
    "clickhouse": "CREATE TABLE sluice_test.sluice_write_probe (a Int32) ENGINE = Memory",
    "clickhouse_http": "INSERT INTO sluice_test.t (id) VALUES (1)",
    "spark": "CREATE TABLE sluice_write_probe (a INT)",
}


def check_read_only(service, engine: str) -> None:
    """Every source is opened read-only: a write statement fails inside the engine (or, for
    Spark, is refused before it reaches Spark), and the row count is unchanged."""
    from app.engines import EngineError

    eng = service.catalog.engine(engine)
    table = service.catalog.config(engine).table
    before = service.catalog.entry(engine).row_count
    with pytest.raises(EngineError):
        eng.execute(WRITES[engine].format(schema=table.split(".")[0]))
    assert eng.fetch_row(f"SELECT COUNT(*) AS n FROM {table}")["n"] == before


@pytest.mark.parametrize("engine", [e for e in WRITES if e != "spark"])
def test_engine_is_read_only(service, engine: str):
    check_read_only(service, engine)


def test_mysql_session_itself_is_read_only(service):
    """Below the engine's SELECT-only guard, the MariaDB session refuses writes too."""
    import pymysql

    eng = service.catalog.engine("mysql")
    conn = eng._conn()  # the engine's own session (SET SESSION TRANSACTION READ ONLY)
    with conn.cursor() as cur, pytest.raises(pymysql.err.OperationalError, match="READ ONLY"):
        cur.execute("CREATE TABLE sluice_write_probe (a INT)")


HTTP_CASES = ["count_by_cat", "quantile", "bin_fd", "tbin_year_berlin", "trunc_week_newyork",
              "where_text_case_sensitive", "top_by_sum_label", "stack_fraction",
              "facets_max_groups", "where_no_rows", "min_max"]


@pytest.mark.parametrize("case", HTTP_CASES)
def test_clickhouse_over_http_matches_duckdb(service, case: str):
    """The ClickHouse HTTP client (urllib, FORMAT ArrowStream) against ClickHouse's engine."""
    check_case(service, "clickhouse_http", case)


def test_clickhouse_http_errors_are_engine_errors(service):
    from app.engines import EngineError

    eng = service.catalog.engine("clickhouse_http")
    with pytest.raises(EngineError) as err:
        eng.execute("SELECT no_such_column FROM sluice_test.t")
    assert "no_such_column" in err.value.message


def test_duckdb_reference_is_not_trivial(service):
    """Guard against comparing empty answers: the reference has rows for every case that
    is meant to match rows."""
    for case in CASES:
        out = duck(service, case)
        n = out["stats"]["result_rows"]
        if case == "where_no_rows":
            assert n == 0 and out["stats"]["matched_rows"] == 0
        else:
            assert n > 0, case


def check_approx(service, engine: str) -> None:
    """approx_count_distinct within 6% of the exact count (engines without a sketch answer
    exactly); the answer says it is approximate."""
    exact = answer(service, "duckdb", {"channels": {"x": key("grp"),
                                                    "y": agg("count_distinct", "k")}})
    want = exact["data"]["count_distinct_k"]
    got = answer(service, engine, CASES["approx_count_distinct"])
    assert got.get("approximate") is True, engine
    assert got["approximation"]["method"]
    values = got["data"]["approx_count_distinct_k"]
    assert len(values) == len(want)
    for g, w in zip(values, want):
        assert abs(g - w) <= 0.06 * w, f"{engine}: {g} vs exact {w}"
        if get_dialect(service.catalog.config(engine).engine).caps.approx_distinct[1] == 0.0:  # answered exactly
            assert g == w, f"{engine}: {g} vs exact {w}"


@pytest.mark.parametrize("engine", ["duckdb"] + PER_CASE)
def test_approx_count_distinct_close_to_exact(service, engine):
    check_approx(service, engine)


@pytest.mark.parametrize("engine,sleep", [("postgres", "SELECT pg_sleep(3)"),
                                          ("mysql", "SELECT SLEEP(3) AS s")])
def test_server_statement_time_limit(engine_sources, engine: str, sleep: str):
    """``statement_timeout_ms`` is enforced by the server itself (PostgreSQL
    statement_timeout, MariaDB max_statement_time), and the message is the one app.limits
    recognises as a timeout (504)."""
    import time

    from app.engines import EngineError, open_engine
    from app.limits import server_timeout
    from app.settings import SourceConfig

    src = dict(engine_sources[engine])
    cfg = SourceConfig(name=engine, engine=engine, table=src["table"], dsn=src["dsn"],
                       options={"statement_timeout_ms": 300})
    eng = open_engine(cfg)
    try:
        t0 = time.monotonic()
        with pytest.raises(EngineError) as err:
            eng.execute(sleep)
        assert time.monotonic() - t0 < 2.5
        assert server_timeout(err.value.message), err.value.message
    finally:
        eng.close()


@pytest.mark.parametrize("engine", ["postgres", "mysql", "sqlite"])
def test_canceller_stops_a_running_statement(service, engine: str):
    """The canceller app.limits fires from a timer thread stops the calling thread's
    statement."""
    import threading
    import time

    from app.engines import EngineError

    eng = service.catalog.engine(engine)
    slow = {"postgres": "SELECT pg_sleep(3)", "mysql": "SELECT SLEEP(3) AS s",
            "sqlite": "WITH RECURSIVE c(i) AS (SELECT 1 UNION ALL SELECT i + 1 FROM c "
                      "WHERE i < 100000000) SELECT COUNT(*) FROM c"}[engine]
    cancel = eng.canceller()
    timer = threading.Timer(0.3, cancel)
    timer.start()
    t0 = time.monotonic()
    with pytest.raises(EngineError):
        eng.execute(slow)
    timer.cancel()
    assert time.monotonic() - t0 < 2.5


def test_plan_for_another_dialect_runs_extents_natively(service):
    """/v1/sql?dialect=postgres on a SQLite source: the bin extents run on SQLite (which has
    no time zones) and the PostgreSQL statement shows the same bin layout as planning for
    PostgreSQL's own source."""
    body = {"channels": {"x": key("ts", bin={"bins": 12}, tz=BERLIN), "y": COUNT,
                         "color": key("x", bin={"rule": "sturges"})}}
    via_sqlite = service.plan_sql(ChartRequest.model_validate({"source": "sqlite", **body}), "postgres")
    native = service.plan_sql(ChartRequest.model_validate({"source": "postgres", **body}), "postgres")
    assert via_sqlite["dialect"] == "postgres"
    assert via_sqlite["bins"] == native["bins"]
    main = via_sqlite["sql"][-1]
    assert "AT TIME ZONE 'Europe/Berlin'" in main
    import sqlglot

    sqlglot.parse_one(main, read="postgres")


def test_mysql_text_filters_compare_bytes_on_a_ci_collation(engine_sources):
    """On a case- and accent-insensitive MariaDB collation, every text filter still means
    what it means in DuckDB (reference: Python's own str comparisons on the same values)."""
    import pymysql

    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    values = ["alpha", "Alpha", "ALPHA", "Zurich", "Zürich", "a", "a ", "b"]
    name = f"sluice_ci_{fx.worker()}"
    conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                           charset="utf8mb4", autocommit=True)
    with conn.cursor() as cur:
        cur.execute(f"DROP TABLE IF EXISTS `{name}`")
        cur.execute(f"CREATE TABLE `{name}` (s VARCHAR(16)) CHARACTER SET utf8mb4 "
                    "COLLATE utf8mb4_general_ci")
        cur.executemany(f"INSERT INTO `{name}` VALUES (%s)", [(v,) for v in values])
    conn.close()
    svc = ChartService(Catalog(parse_settings({"sources": {"ci": {
        "engine": "mysql", "dsn": fx.MYSQL_DSN, "table": f"test.{name}"}}}, "<ci>")))
    checks = [
        ({"column": "s", "eq": "alpha"}, lambda v: v == "alpha"),
        ({"column": "s", "ne": "alpha"}, lambda v: v != "alpha"),
        ({"column": "s", "in": ["Zürich", "a"]}, lambda v: v in ("Zürich", "a")),
        ({"column": "s", "not_in": ["zurich"]}, lambda v: v != "zurich"),
        ({"column": "s", "lt": "a"}, lambda v: v < "a"),
        ({"column": "s", "contains": "LPH"}, lambda v: "LPH" in v),
        ({"column": "s", "starts_with": "Zu"}, lambda v: v.startswith("Zu")),
    ]
    try:
        for pred, fn in checks:
            req = ChartRequest.model_validate({"source": "ci", "channels": {"y": COUNT},
                                               "where": [pred]})
            got = svc.to_json(svc.run(req))["data"]["count"][0]
            assert got == sum(1 for v in values if fn(v)), pred
    finally:
        svc.catalog.close()


# --- issue 9 items 8-10 on Spark: the checks of tests/test_engines_semantics.py ----------------
# (filter_sql round / LIKE semantics, quantiles, deviations, NIST StRD, fd / scott rules, top on
# 4,000 keys against numpy / pandas / the hand-written references there), run here so that
# the JVM of test_spark_matches_duckdb_every_case serves them: one Spark per test session.

def test_spark_semantics(tmp_path_factory):
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings

    sem = _load("test_engines_semantics")
    data = sem.tables()
    root = tmp_path_factory.mktemp("semantics_spark")
    catalog = Catalog(parse_settings({"sources": sem.spark_sources(root, data)}, "<semantics spark>"))
    try:
        timings = sem.check_all(ChartService(catalog), "spark", data)
    finally:
        catalog.close()
    print("top on 4000 keys, spark: " + ", ".join(f"{a} {s:.2f} s" for a, s in timings.items()))


def test_spark_without_a_statement_timeout_sets_no_timer(tmp_path_factory, monkeypatch):
    """``statement_timeout_ms = 0`` means no time limit on Spark as on every other engine
    (README "Limits"): before, Spark armed its own cancel timer at 0 s for every statement
    not guarded by app.limits (catalog and row-count statements), racing the job. The
    answer is checked against pyarrow's group counts over the same rows."""
    import types

    import pyarrow as pa

    from app import deadline
    from app.catalog import Catalog
    from app.engines import spark as spark_engine
    from app.service import ChartService
    from app.settings import parse_settings

    armed: list[float] = []

    def after(seconds, *a):
        armed.append(seconds)
        return deadline.after(seconds, *a)

    # the Spark engine's own alarms only (app.limits arms its own through app.deadline)
    monkeypatch.setattr(spark_engine, "deadline", types.SimpleNamespace(after=after))
    root = tmp_path_factory.mktemp("spark_no_timeout")
    table = pa.table({"g": ["a", "b", "a", None, "a"], "v": [1, 2, 3, 4, 5]})
    src = fx.load_spark(root, table)
    src["table"] = "sluice_no_timeout"
    src["statement_timeout_ms"] = 0
    catalog = Catalog(parse_settings({"sources": {"spark_nt": src}}, "<spark no timeout>"))
    try:
        svc = ChartService(catalog)
        out = svc.to_json(svc.run(ChartRequest.model_validate(
            {"source": "spark_nt", "channels": {"x": {"column": "g"}, "y": {"agg": "count"}}})))
        catalog.engine("spark_nt").execute("SELECT COUNT(*) AS n FROM sluice_no_timeout")
    finally:
        catalog.close()
    assert armed == []  # no statement got a time limit
    got = dict(zip(out["data"]["g"], out["data"]["count"]))
    want = {r["g"]: r["n"] for r in table.group_by("g").aggregate([([], "count_all")])
            .rename_columns(["g", "n"]).to_pylist()}
    assert got == want
