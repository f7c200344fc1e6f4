"""Benchmarks cannot rot: every bench case (bench/cases.py) runs here on a 20,000-row copy
of the bench data through the bench's own case runner (bench/runner.py), and the service's
answer must equal the hand-written DuckDB SQL for the same rows -- the (a) == (b) sanity
check `make bench` performs before timing. A refactor that breaks a case, the runner or
the public entry points the bench uses (HTTP, create_app, load_settings, build_demo)
fails `make test`, not the next benchmark run.
"""

from __future__ import annotations

import math
import shutil
import sys
from pathlib import Path

import orjson
import pyarrow as pa
import pytest

BENCH = Path(__file__).resolve().parent.parent / "bench"
sys.path.insert(0, str(BENCH))

import cases as bench_cases  # noqa: E402  (bench/cases.py)
import dashboard as bench_multi  # noqa: E402  (bench/dashboard.py: issue 12's multi-chart cases)
import floor as bench_floor  # noqa: E402  (bench/floor.py)
import plan_profile  # noqa: E402  (bench/plan_profile.py)
import run as bench_run  # noqa: E402  (bench/run.py: data builders)
import runner  # noqa: E402  (bench/runner.py: the case runner)

ROWS = 20_000
SUITE = {c.name: c for c in bench_cases.suite()}


@pytest.fixture(scope="module")
def bench_env(tmp_path_factory):
    from app.demo import build_demo

    root = tmp_path_factory.mktemp("bench_smoke")
    db, walk = root / "deliveries.duckdb", root / "walk.duckdb"
    build_demo(db, ROWS, progress=False)
    bench_run.build_walk(walk, ROWS)
    cfg = root / "bench.toml"
    cfg.write_text(f'[sources.deliveries]\nengine = "duckdb"\npath = "{db}"\ntable = "deliveries"\n\n'
                   f'[sources.walk]\nengine = "duckdb"\npath = "{walk}"\ntable = "walk"\n\n'
                   "[server]\nmax_limit = 100000\nrequest_log = false\n")
    # The hand-written SQL runs on copies: one process may not open a DuckDB file twice
    # with different configurations (the service's connection is locked read-only).
    ref = {}
    for name, path in (("deliveries", db), ("walk", walk)):
        copy = root / f"ref_{path.name}"
        shutil.copy(path, copy)
        ref[name] = runner.reference_connection(copy)
    return {"config": cfg, "ref": ref}


@pytest.fixture(scope="module")
def bench_client(bench_env):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    with TestClient(create_app(load_settings(bench_env["config"]))) as c:
        yield c


def test_suite_has_the_brush_cases():
    # issue 11: a brush case, the same chart with a new filter range on every request
    for name in ("brush_bins", "brush_width"):
        case = SUITE[name]
        wheres = [str(case.body(i)["where"]) for i in range(50)]
        assert len(set(wheres)) == 50, "every request must carry a new filter value"


@pytest.mark.parametrize("name", list(SUITE))
def test_case_answer_equals_hand_written_sql(name, bench_env, bench_client):
    case = SUITE[name]
    con = bench_env["ref"][case.table]
    for i in ([0, 1, 2] if case.vary is not None else [0]):
        chk = runner.check_case(case, bench_client, con, i=i)
        assert chk.error is None, chk.error
        # reference: the hand-written SQL of bench/cases.py, run by DuckDB itself on the
        # same rows (what `make bench` calls the limit), compared column by column
        assert chk.diff is None, f"{name}[{i}]: {chk.diff}\n{chk.hand_sql}"
        assert chk.rows > 0  # an empty answer on both sides would prove nothing
        assert chk.meta["stats"]["statements"] >= 1
        assert isinstance(chk.meta["timing_ms"]["plan"], (int, float))
    if case.naive is not None:  # the naive path of `make bench` still runs on these columns
        cols = ", ".join(f'"{c}"' for c in case.cols)
        where = f" WHERE {case.where_sql}" if case.where_sql else ""
        df = con.sql(f"SELECT {cols} FROM {case.table}{where}").to_arrow_table().to_pandas()
        assert len(case.naive(df, chk.meta)) > 0


MULTI = {m.name: m for m in bench_multi.suite()}


@pytest.mark.parametrize("name", list(MULTI))
def test_multi_case_answers_equal_hand_written_sql(name, bench_env, bench_client):
    # issue 12: every chart of the batch (dashboard, linked) or the drag's chart equals its
    # hand-written statement of bench/dashboard.py, run by DuckDB itself on the same rows
    case = MULTI[name]
    con = bench_env["ref"]["deliveries"]
    want = {"dashboard": 6, "linked": 4, "drag": 1}[name]
    for i in (0, 1, 7, 24):  # linked 24: a width/origin bin whose stop is the maximum
        metas, stmts, diff = bench_multi.check(case, bench_client, con, i=i)
        assert diff is None, f"{name}[{i}]: {diff}\n{stmts}"
        assert len(metas) == len(stmts) == want
        assert all(len(next(iter(m["data"].values()))) > 0 for m in metas)


def test_multi_cases_move_their_filters():
    # a new shared window / new brushes / new drag position on every step: no step is
    # answered from anything keyed by the previous step's values
    for name, case in MULTI.items():
        bodies = [orjson.dumps(case.body(i)) for i in range(30)]
        assert len(set(bodies)) == 30, name


def test_linked_hand_sql_excludes_own_brush(bench_env, bench_client):
    # Becker & Cleveland 1987 linking: chart k is filtered by the other charts' brushes,
    # never its own. Reference: pandas on the raw rows -- the vehicle chart (index 2)
    # counts every vehicle that passes the distance, weight and depot brushes.
    case = MULTI["linked"]
    con = bench_env["ref"]["deliveries"]
    i = 5
    r, metas = bench_multi.batch(bench_client, case.body(i))
    assert r.status_code == 200, r.text
    assert metas[2]["brushes"] == ["c0", "c1", "c3"]
    df = con.sql("SELECT distance_km, weight_kg, vehicle, depot FROM deliveries").df()
    b = {f["column"]: f for c in case.body(i)["charts"] for f in c["brush"]}
    m = ((df.distance_km >= b["distance_km"]["gte"]) & (df.distance_km < b["distance_km"]["lt"])
         & (df.weight_kg >= b["weight_kg"]["gte"]) & (df.weight_kg < b["weight_kg"]["lt"])
         & df.depot.isin(b["depot"]["in"]))
    want = df[m].groupby("vehicle").size().to_dict()
    got = dict(zip(metas[2]["data"]["vehicle"], metas[2]["data"]["count"]))
    assert got == want and len(got) > len(b["vehicle"]["in"])  # its own brush is not applied


def test_drag_runs_one_session_to_its_last_answer(bench_env, bench_client):
    # the drag of `make bench`, untimed: every move answers 200 or 409 superseded (README
    # `session`), the newest arrival 200 (the final move unless two arrived swapped), and
    # the last answered move equals its hand-written statement (DuckDB)
    case = MULTI["drag"]
    res = bench_multi.drag(lambda: bench_client, case, start=300, moves=6, gap_ms=5.0,
                           session="smoke-drag")
    assert set(res["codes"]) <= {200, 409} and 200 in res["codes"]
    assert res["last"].status_code == 200 and 300 <= res["last_index"] <= 305
    last = res["last"].json()
    hand = bench_env["ref"]["deliveries"].sql(
        case.hand([last], res["last_index"])[0]).to_arrow_table()
    assert bench_multi.same_rows(last, hand) is None


def test_multi_p95_is_numpys_linear_quantile():
    # the p95 of the brush steps: numpy's default (linear) quantile as the reference
    import numpy as np

    xs = list(np.random.default_rng(12).gamma(2.0, 30.0, size=37))
    for q in (0.5, 0.95, 1.0):
        assert math.isclose(bench_multi.pct(xs, q), float(np.quantile(xs, q)), rel_tol=1e-12)


def test_brush_width_counts_match_numpy(bench_env, bench_client):
    # The brush_width hand SQL is plain floor((v - origin) / width); check the service's
    # counts against numpy's floor on the same filtered rows as well (numpy as the reference).
    import numpy as np

    case = SUITE["brush_width"]
    con = bench_env["ref"]["deliveries"]
    for i in (5, 6):
        r = runner.post_chart(bench_client, case.body(i))
        assert r.status_code == 200, r.text
        data = r.json()["data"]
        lo, hi = bench_cases._brush_window(i)
        v = con.execute("SELECT distance_km FROM deliveries WHERE delivered_at >= ?::TIMESTAMPTZ "
                        "AND delivered_at < ?::TIMESTAMPTZ AND distance_km IS NOT NULL",
                        [lo, hi]).fetchnumpy()["distance_km"]
        k, n = np.unique(np.floor((v - bench_cases._BRUSH_O) / bench_cases._BRUSH_W),
                         return_counts=True)
        got = {x: c for x, c in zip(data["x_lo"], data["count"]) if x is not None}
        want = {bench_cases._BRUSH_O + kk * bench_cases._BRUSH_W: int(nn) for kk, nn in zip(k, n)}
        assert got == want


def test_plan_times_are_the_services_own(bench_client):
    samples = runner.plan_times(SUITE["brush_bins"], bench_client, 3, start=500)
    assert len(samples) == 3 and all(math.isfinite(x) and x >= 0 for x in samples)


def test_first_request_case_runs_in_a_fresh_process(bench_env):
    case = SUITE["brush_bins"]
    out = runner.first_request(bench_env["config"], case, runs=1, steady=2)
    run0 = out["runs"][0]
    assert run0["status"] == [200] * 4
    for key in ("import_ms", "startup_ms", "first_plan_ms", "second_plan_ms", "steady_plan_ms"):
        assert math.isfinite(out["p50"][key]) and out["p50"][key] >= 0
    # the fresh process answers request 0 as the hand-written SQL does (DuckDB reference)
    hand = bench_env["ref"]["deliveries"].sql(case.sql({"bins": run0["bins"]}, 0)).to_arrow_table()
    got = pa.table({k: run0["data"][k] for k in hand.column_names})
    assert runner.compare(got.cast(hand.schema), hand) is None



def test_floor_variants_answer_as_hand_written_sql(bench_env):
    # bench/floor.py: the service's width/origin statement, with the guard and without, and
    # the hand-written grouped counts; reference: the hand-written plain floor((v - o) / w)
    # run by DuckDB (the data's values have two decimals, width 2.5: no value is within an
    # ulp of an edge, so guarded and plain floors must agree)
    qs = bench_floor.variants(bench_floor.service_sql(bench_env["config"]))
    res = bench_floor.measure(bench_env["ref"]["deliveries"], qs, runs=1)
    assert res["equal_to_hand_plain"] == {k: True for k in qs}
    assert all(v > 0 for v in res["median_ms"].values())


def test_floor_candidates_are_exact(bench_env):
    # bench/floor.py candidates for a width the plain floor is not proved for (0.1); reference:
    # numpy -- the bin of v is the i with edge_i <= v < edge_(i+1), edges start + i * width
    # in float64 (searchsorted), the last bin closed and values below the first edge in bin 0
    import numpy as np

    con = bench_env["ref"]["deliveries"]
    qs = bench_floor.candidates(con)
    res = bench_floor.measure(con, qs, runs=1)
    assert res["cand_equal"]["cand_value_clamp"] and res["cand_equal"]["cand_bool_clamp"]
    v = np.array([r[0] for r in con.sql(f"SELECT {bench_floor.COLUMN} FROM deliveries WHERE "
                                        f"{bench_floor.COLUMN} IS NOT NULL").fetchall()], float)
    w = bench_floor.CANDIDATE_WIDTH
    first = math.floor((v.min() - bench_floor.ORIGIN) / w)
    start = bench_floor.ORIGIN + first * w
    count = max(1, math.ceil((v.max() - bench_floor.ORIGIN) / w) - first)
    edges = start + np.arange(count + 1, dtype=float) * w
    idx = np.clip(np.searchsorted(edges, v, side="right") - 1, 0, count - 1)
    k, n = np.unique(idx, return_counts=True)
    got = [(r["k"], r["n"]) for r in con.sql(qs["cand_value_clamp"]).to_arrow_table().to_pylist()
           if r["k"] is not None]
    assert got == [(float(a), int(b)) for a, b in zip(k, n)]


def test_plan_profile_runs(bench_env):
    res = plan_profile.profile(bench_env["config"], ["brush_width"], n=3, top=10)["brush_width"]
    assert res["requests"] == 3 and math.isfinite(res["plan_ms_p50"])
    # the profile is rolled up by module (a new filter value reuses the cached plan, so
    # sqlglot appears only when a new bin layout is rendered: tests/test_plan_reuse.py)
    assert "app/service.py" in res["by_module_ms_per_request"]
