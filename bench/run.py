"""`make bench`: sluice against the limit (hand-written SQL) and two naive paths.

Per case, interleaved within one round (so machine noise hits every path alike):

  (a) limit          the best hand-written DuckDB SQL for the same rows, run in-process
  (b) service        sluice end-to-end over HTTP against a real uvicorn on 127.0.0.1
                     (``Cache-Control: no-cache``: the result cache is bypassed)
  (b') service_sql   the statements the service ran for that request (its ``sql``), run
                     in-process like (a): what of (b) - (a) is SQL, what is the service
  (c1) naive_inproc  fetch the needed raw columns in-process (Arrow -> pandas), aggregate there
  (c2) naive_http    ship the needed raw columns as JSON from a plain rows endpoint that this
                     script starts (not part of the product), aggregate in the client; on a
                     row sample of BENCH_NAIVE_HTTP_ROWS rows, extrapolated linearly to all rows

Medians of BENCH_RUNS (default 5) rounds. Brush cases (``vary`` in bench/cases.py) send a
new filter value on every request. Also: cached answers over HTTP; planning time as the
service reports it (``timing_ms.plan``, p50 of BENCH_PLAN_REQUESTS uncached requests to an
in-process app on a BENCH_PLAN_ROWS-row copy: planning does not depend on the row count);
statements per request (cold and warm); ``first_request``: fresh processes (import, start-up,
first plan; bench/first_request.py). Writes bench/results.json and prints a table.

Only public entry points are used (HTTP, ``create_app``, ``load_settings``, ``build_demo``;
see bench/runner.py), and tests/test_bench_smoke.py runs every case on 20,000 rows in
``make test``, so a refactor cannot break the bench silently.

Environment: BENCH_ROWS (default 10,000,000), BENCH_RUNS (5), BENCH_NAIVE_HTTP_ROWS (1,000,000),
BENCH_CASES (comma list of case names and/or ``first_request``; default all), BENCH_PORT (8765),
BENCH_SKIP_NAIVE=1, BENCH_PLAN_ROWS (20,000), BENCH_PLAN_REQUESTS (200), BENCH_FIRST_RUNS (5),
BENCH_MULTI_STEPS (4: brush steps per round of ``dashboard`` / ``linked``).

Issue 12's multi-chart cases (bench/dashboard.py; ``measure_multi``): ``dashboard`` (six
charts, one moving shared window, one /v1/batch vs the six hand-written statements one after
another), ``linked`` (four charts, four moving brushes, vs the four statements each filtered
by the other charts' brushes; p50/p95 over the brush steps), ``drag`` (20 moves of one
``session`` 20 ms apart: time to the last answer vs the last request alone).
"""

from __future__ import annotations

import datetime as dt
import json
import os
import platform
import socket
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import duckdb
import httpx
import orjson

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import cases as suite_mod  # noqa: E402
import dashboard as multi_mod  # noqa: E402  (issue 12: dashboard, linked, drag)
import runner  # noqa: E402

ROWS = int(os.environ.get("BENCH_ROWS", "10000000"))
RUNS = max(5, int(os.environ.get("BENCH_RUNS", "5")))
NAIVE_HTTP_ROWS = int(os.environ.get("BENCH_NAIVE_HTTP_ROWS", "1000000"))
PORT = int(os.environ.get("BENCH_PORT", "8765"))
ROWS_PORT = PORT + 1
PLAN_ROWS = int(os.environ.get("BENCH_PLAN_ROWS", "20000"))
PLAN_REQUESTS = int(os.environ.get("BENCH_PLAN_REQUESTS", "200"))
FIRST_RUNS = int(os.environ.get("BENCH_FIRST_RUNS", "5"))
MULTI_STEPS = int(os.environ.get("BENCH_MULTI_STEPS", "4"))
DATA = HERE / "data"
PY = sys.executable


def log(msg: str) -> None:
    sys.stderr.write(msg + "\n")
    sys.stderr.flush()


def progress(label: str, done: int, total: int) -> None:
    width = 30
    frac = done / total if total else 1.0
    bar = "#" * int(round(frac * width)) + "." * (width - int(round(frac * width)))
    sys.stderr.write(f"\r{label:<28s} [{bar}] {done}/{total}")
    if done >= total:
        sys.stderr.write("\n")
    sys.stderr.flush()


# ---- data ------------------------------------------------------------------------------
def build_data() -> tuple[Path, Path]:
    from app.demo import build_demo

    DATA.mkdir(parents=True, exist_ok=True)
    db = DATA / f"deliveries_{ROWS}.duckdb"
    if not db.exists():
        log(f"building {ROWS:,} demo rows -> {db}")
        build_demo(db, ROWS, progress=True)
    walk = DATA / f"walk_{ROWS}.duckdb"
    if not walk.exists():
        log(f"building a {ROWS:,}-point random walk -> {walk}")
        build_walk(walk, ROWS)
    return db, walk


def build_walk(walk: Path, rows: int) -> None:
    """A deterministic random walk with spikes, one point per second, ~2% NULL values."""
    tmp = walk.with_suffix(".tmp")
    if tmp.exists():
        tmp.unlink()
    con = duckdb.connect(str(tmp))
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"""
        CREATE TABLE walk AS
        WITH s AS (SELECT range AS i,
                     ((hash(range * 3 + 1) >> 11)::DOUBLE / 9007199254740992.0) AS u1,
                     ((hash(range * 3 + 2) >> 11)::DOUBLE / 9007199254740992.0) AS u2
                   FROM range({int(rows)})),
        d AS (SELECT i, u2, (u1 - 0.5) + CASE WHEN u2 < 0.0005 THEN (u2 * 4000 - 1) * 40 ELSE 0 END
                     AS step FROM s)
        SELECT TIMESTAMPTZ '2026-01-01 00:00:00+00' + to_seconds(i) AS t,
               CASE WHEN u2 > 0.98 THEN NULL
                    ELSE sum(step) OVER (ORDER BY i ROWS UNBOUNDED PRECEDING) END AS v
        FROM d ORDER BY i""")
    con.execute("CHECKPOINT")
    con.close()
    os.replace(tmp, walk)


def write_config(db: Path, walk: Path) -> Path:
    cfg = DATA / "bench.toml"
    cfg.write_text(f"""[sources.deliveries]
engine = "duckdb"
path = "{db}"
table = "deliveries"

[sources.walk]
engine = "duckdb"
path = "{walk}"
table = "walk"

[server]
max_limit = 100000
""")
    from app.settings import ConfigError, load_settings

    text = cfg.read_text()
    cfg.write_text(text + "\n[cache]\nenabled = true\nmax_bytes = 67108864\n")
    try:
        load_settings(cfg)
    except ConfigError:  # a build without the result cache's settings
        cfg.write_text(text)
    return cfg


# ---- servers ---------------------------------------------------------------------------
def wait_port(port: int, proc: subprocess.Popen, timeout: float = 60.0) -> None:
    t0 = time.time()
    while time.time() - t0 < timeout:
        if proc.poll() is not None:
            raise SystemExit(f"server on port {port} exited with {proc.returncode}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.1)
    raise SystemExit(f"server on port {port} did not start")


def port_free(port: int) -> None:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.2):
            raise SystemExit(f"port {port} is in use: stop that server or set BENCH_PORT")
    except OSError:
        pass


def start_service(cfg: Path) -> subprocess.Popen:
    port_free(PORT)
    env = dict(os.environ, SLUICE_CONFIG=str(cfg))
    # The service logs one line per request: keep them out of the progress display.
    logf = open(DATA / "service.log", "ab")
    proc = subprocess.Popen([PY, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1",
                             "--port", str(PORT), "--log-level", "warning", "--no-access-log"],
                            cwd=str(ROOT), env=env, stdout=logf, stderr=logf)
    wait_port(PORT, proc)
    return proc


def start_rows_server(db: Path, walk: Path) -> subprocess.Popen:
    env = dict(os.environ, BENCH_DB=str(db), BENCH_WALK=str(walk))
    proc = subprocess.Popen([PY, "-m", "uvicorn", "rows_server:app", "--host", "127.0.0.1",
                             "--port", str(ROWS_PORT), "--log-level", "warning", "--no-access-log"],
                            cwd=str(HERE), env=env)
    wait_port(ROWS_PORT, proc)
    return proc


# ---- the paths -------------------------------------------------------------------------
timed = runner.timed


def plan_data() -> Path:
    """A small copy of the data (BENCH_PLAN_ROWS rows) for the planning timings: planning
    does not depend on the row count, and 200 requests per case on it take seconds."""
    from app.demo import build_demo

    DATA.mkdir(parents=True, exist_ok=True)
    db = DATA / f"plan_deliveries_{PLAN_ROWS}.duckdb"  # never a file the bench has open
    walk = DATA / f"plan_walk_{PLAN_ROWS}.duckdb"
    if not db.exists():
        log(f"building {PLAN_ROWS:,} demo rows for the planning timings -> {db}")
        build_demo(db, PLAN_ROWS, progress=False)
    if not walk.exists():
        build_walk(walk, PLAN_ROWS)
    cfg = DATA / "bench_plan.toml"
    cfg.write_text(f"""[sources.deliveries]
engine = "duckdb"
path = "{db}"
table = "deliveries"

[sources.walk]
engine = "duckdb"
path = "{walk}"
table = "walk"

[server]
request_log = false
""")
    return cfg


def measure_plan(cases) -> dict[str, float]:
    """Per case: p50 of ``timing_ms.plan`` over PLAN_REQUESTS uncached requests to an
    in-process app on the small table (a new filter value per request for brush cases;
    the same request otherwise, i.e. a plan-cache hit after the first)."""
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = plan_data()
    out: dict[str, float] = {}
    todo = list(cases)
    with TestClient(create_app(load_settings(cfg))) as client:
        for n, case in enumerate(todo):
            samples = runner.plan_times(case, client, PLAN_REQUESTS, start=10_000)
            out[case.name] = runner.p50(samples[min(20, len(samples) // 10):])
            progress("planning timings", n + 1, len(todo))
    return out


def main() -> int:
    wanted = [c for c in os.environ.get("BENCH_CASES", "").split(",") if c]
    skip_naive = os.environ.get("BENCH_SKIP_NAIVE") == "1"
    cases = [c for c in suite_mod.suite() if not wanted or c.name in wanted]
    multi = [m for m in multi_mod.suite() if not wanted or m.name in wanted]
    db, walk = build_data()
    cfg = write_config(db, walk)
    threads = os.cpu_count() or 1
    log(f"rows={ROWS:,} runs={RUNS} naive_http_rows={NAIVE_HTTP_ROWS:,} cpus={threads} "
        f"cases={','.join([c.name for c in cases] + [m.name for m in multi])}")
    first = None
    if not wanted or "first_request" in wanted:  # fresh processes, before our server starts
        log(f"first_request: {FIRST_RUNS} fresh processes (import, start-up, first plan)")
        first = runner.first_request(plan_data(), next(c for c in suite_mod.suite()
                                                       if c.name == "brush_bins"), runs=FIRST_RUNS)
        log(f"first_request p50: {json.dumps(first['p50'])}")
        log(f"first_request min: {json.dumps(first['min'])}")

    svc = rows_srv = None
    try:
        svc = start_service(cfg)
        if not skip_naive and any(c.naive is not None for c in cases):
            port_free(ROWS_PORT)
            rows_srv = start_rows_server(db, walk)
        return _measure(cases, cfg, db, walk, skip_naive, first, multi)
    finally:
        for proc in (svc, rows_srv):
            if proc is not None and proc.poll() is None:
                proc.terminate()
                try:
                    proc.wait(10)
                except subprocess.TimeoutExpired:
                    proc.kill()


def _measure(cases, cfg, db, walk, skip_naive, first, multi=()) -> int:
    # The hand-written SQL runs on the bench's own read-only connections (the service runs
    # in its own process, so the two never share a DuckDB instance or its configuration).
    con = {"deliveries": runner.reference_connection(db), "walk": runner.reference_connection(walk)}
    http = httpx.Client(base_url=f"http://127.0.0.1:{PORT}", timeout=600)
    rows_http = httpx.Client(base_url=f"http://127.0.0.1:{ROWS_PORT}", timeout=600)
    results: dict[str, Any] = {}
    try:
        # ---- untimed: first answer (bin layout, statements cold), sanity (a) == (b) ----
        prepared = []
        for case in cases:
            chk = runner.check_case(case, http, con[case.table], i=0)
            if chk.error is not None:
                log(f"{case.name}: service answered {chk.error}")
                results[case.name] = {"error": chk.error}
                continue
            log(f"{case.name}: sanity (a)==(b): {'OK' if chk.diff is None else 'MISMATCH ' + chk.diff}"
                f"  ({chk.rows} rows)")
            prepared.append(chk)

        # ---- planning time: the service's own timing_ms.plan, on a small table ----
        plan_ms = measure_plan([c.case for c in prepared]) if prepared else {}

        # ---- timed rounds ----
        paths = ["limit", "service", "service_sql"] + ([] if skip_naive else ["naive_inproc", "naive_http"])
        times = {c.case.name: {p: [] for p in paths} for c in prepared}
        sizes: dict[str, dict[str, Any]] = {c.case.name: {} for c in prepared}
        total = RUNS * len(prepared)
        done = 0
        progress("timed rounds", 0, total)
        for rnd in range(RUNS):
            for chk in prepared:
                case, c = chk.case, con[chk.case.table]
                i = 1 + rnd if case.vary is not None else 0  # brush: a new window per round
                body = orjson.dumps(case.body(i))
                last = sizes[case.name].get("last_meta", chk.meta)

                def call():
                    return runner.post_chart(http, body)

                def limit():
                    # brush, limit first: the layout of the last answer (same cost)
                    return c.sql(case.sql(last, i)).to_arrow_table()

                if rnd % 2:  # alternate which of (a) and (b) goes first
                    ms_s, resp = timed(call)
                    assert resp.status_code == 200, resp.text[:300]
                    last = resp.json()
                    ms, _ = timed(limit)
                else:
                    ms, _ = timed(limit)
                    ms_s, resp = timed(call)
                    assert resp.status_code == 200, resp.text[:300]
                times[case.name]["limit"].append(ms)
                times[case.name]["service"].append(ms_s)
                answer = resp.json()
                sizes[case.name]["last_meta"] = answer
                sizes[case.name]["response_bytes"] = len(resp.content)
                sizes[case.name]["statements"] = answer["stats"].get("statements")
                sizes[case.name].setdefault("plan_http", []).append(
                    answer.get("timing_ms", {}).get("plan", float("nan")))

                # the statements the service ran, on the bench's connection: ``sql`` shows
                # bound values as ``?``, so the same statements with literals come from
                # POST /v1/sql (its last ones: a warm request ran no extents statement)
                ran = answer["sql"]
                if any("?" in q for q in ran):
                    lit = http.post("/v1/sql", content=body,
                                    headers={"content-type": "application/json"})
                    assert lit.status_code == 200, lit.text[:300]
                    ran = lit.json()["sql"][-len(ran):]

                def service_sql():
                    for q in ran:
                        c.sql(q).to_arrow_table()
                ms, _ = timed(service_sql)
                times[case.name]["service_sql"].append(ms)

                if not skip_naive and case.naive is not None:
                    cols = ", ".join(f'"{x}"' for x in case.cols)
                    where = f" WHERE {case.where_sql}" if case.where_sql else ""

                    def naive_inproc():
                        df = c.sql(f"SELECT {cols} FROM {case.table}{where}").to_arrow_table().to_pandas()
                        return case.naive(df, chk.meta)
                    ms, _ = timed(naive_inproc)
                    times[case.name]["naive_inproc"].append(ms)

                    def naive_http():
                        r = rows_http.get("/rows", params={"table": case.table, "cols": ",".join(case.cols),
                                                           "limit": NAIVE_HTTP_ROWS,
                                                           "where": case.name if case.where_sql else ""})
                        payload = orjson.loads(r.content)
                        import pandas as pd
                        df = pd.DataFrame(payload["data"])
                        case.naive(df, chk.meta)
                        return len(r.content), payload["rows"], payload["matched"]
                    ms, (nbytes, nrows, matched) = timed(naive_http)
                    scale = matched / nrows if nrows else 1.0
                    times[case.name]["naive_http"].append(ms * scale)
                    sizes[case.name]["raw_bytes"] = int(nbytes * scale)
                    sizes[case.name]["naive_http_sample_rows"] = nrows
                    sizes[case.name]["matched_rows"] = matched
                done += 1
                progress("timed rounds", done, total)

        # ---- cached answers (no no-cache header) ----
        cached: dict[str, float] = {}
        for chk in prepared:
            body = orjson.dumps(chk.case.body(0))
            runner.post_chart(http, body, cache=True)
            samples = []
            for _ in range(50):
                ms, r = timed(lambda: runner.post_chart(http, body, cache=True))
                samples.append(ms)
            cached[chk.case.name] = statistics.median(samples)
            cached[chk.case.name + ":state"] = r.json().get("cache")

        for chk in prepared:
            case = chk.case
            t = {p: statistics.median(v) for p, v in times[case.name].items() if v}
            row: dict[str, Any] = {
                "title": case.title,
                "new_filter_per_request": case.vary is not None,
                "limit_ms": round(t["limit"], 2),
                "service_ms": round(t["service"], 2),
                "service_sql_ms": round(t["service_sql"], 2),
                "plan_ms": round(plan_ms.get(case.name, float("nan")), 4),
                "plan_ms_in_service": round(statistics.median(sizes[case.name]["plan_http"]), 3),
                "cached_ms": round(cached[case.name], 3),
                "cached_state": cached[case.name + ":state"],
                "response_bytes": sizes[case.name].get("response_bytes"),
                "statements_cold": chk.meta["stats"].get("statements"),
                "statements": sizes[case.name].get("statements"),
                "service_over_limit": round(t["service"] / t["limit"], 3),
                "service_sql_over_limit": round(t["service_sql"] / t["limit"], 3),
                # noise-robust companions: the median of the per-round ratios (a and b run
                # back to back) and the ratio of the fastest runs
                "service_over_limit_paired": round(statistics.median(
                    s / l for s, l in zip(times[case.name]["service"], times[case.name]["limit"])), 3),
                "service_over_limit_best": round(min(times[case.name]["service"])
                                                 / min(times[case.name]["limit"]), 3),
                "sanity_equal": chk.diff is None,
                "sanity_detail": chk.diff,
                "runs": RUNS,
                "samples_ms": {p: [round(x, 2) for x in v] for p, v in times[case.name].items() if v},
            }
            if not skip_naive and case.naive is not None:
                row.update({
                    "naive_inproc_ms": round(t["naive_inproc"], 2),
                    "naive_http_ms": round(t["naive_http"], 2),
                    "raw_bytes": sizes[case.name].get("raw_bytes"),
                    "naive_http_sample_rows": sizes[case.name].get("naive_http_sample_rows"),
                    "matched_rows": sizes[case.name].get("matched_rows"),
                    "naive_inproc_over_service": round(t["naive_inproc"] / t["service"], 2),
                    "naive_http_over_service": round(t["naive_http"] / t["service"], 2),
                    "response_over_raw_pct": round(100.0 * sizes[case.name]["response_bytes"]
                                                   / sizes[case.name]["raw_bytes"], 4),
                })
            results[case.name] = row
        for m in multi:
            results[m.name] = measure_multi(m, http, con["deliveries"])
    finally:
        http.close()
        rows_http.close()

    multi_res = {k: r for k, r in results.items() if "multi" in r}
    ok = [r for k, r in results.items() if "service_ms" in r and k not in multi_res]
    naive = [r for r in ok if "naive_inproc_ms" in r]
    summary = {
        "median_service_over_limit": round(statistics.median(r["service_over_limit"] for r in ok), 3) if ok else None,
        "median_service_over_limit_paired": round(statistics.median(r["service_over_limit_paired"] for r in ok), 3) if ok else None,
        "median_service_over_limit_best": round(statistics.median(r["service_over_limit_best"] for r in ok), 3) if ok else None,
        "median_plan_ms": round(statistics.median(r["plan_ms"] for r in ok), 4) if ok else None,
        "median_cached_ms": round(statistics.median(r["cached_ms"] for r in ok), 3) if ok else None,
        "brush_plan_ms_p50": {r_name: results[r_name]["plan_ms"] for r_name in results
                              if results[r_name].get("new_filter_per_request")},
        "all_sanity_equal": (all(r["sanity_equal"] for r in ok)
                             and all(r.get("sanity_equal") for r in multi_res.values())
                             and len(ok) + len(multi_res) == len(results)),
    }
    if naive:
        summary["min_naive_inproc_over_service"] = min(r["naive_inproc_over_service"] for r in naive)
        summary["min_naive_http_over_service"] = min(r["naive_http_over_service"] for r in naive)
        summary["max_response_over_raw_pct"] = max(r["response_over_raw_pct"] for r in naive)
    if first is not None:
        summary["first_request"] = first["p50"]
        results["first_request"] = {"title": "first request of a fresh process (brush_bins, "
                                             f"{PLAN_ROWS:,} rows)",
                                    "p50": first["p50"], "min": first["min"],
                                    "runs": [{k: v for k, v in r.items() if k not in ("data", "bins")}
                                             for r in first["runs"]]}
    out = {
        "date": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "machine": {"cpus": os.cpu_count(), "memory_gib": round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30, 1),
                    "platform": platform.platform(), "python": platform.python_version(),
                    "duckdb": duckdb.__version__, "load_avg_1m": round(os.getloadavg()[0], 2)},
        "rows": ROWS, "runs": RUNS, "naive_http_sample_rows": NAIVE_HTTP_ROWS,
        "plan_rows": PLAN_ROWS, "plan_requests": PLAN_REQUESTS,
        "summary": summary, "cases": results,
    }
    (HERE / "results.json").write_text(json.dumps(out, indent=2))
    print_table(out)
    return 0 if summary["all_sanity_equal"] else 1


# ---- issue 12: several charts per user action (bench/dashboard.py) ------------------------
def measure_multi(m, http: httpx.Client, con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
    """One multi-chart case: sanity (every chart's answer == its hand-written statement),
    then interleaved rounds, (a) and (b) alternating which goes first.

    batch (dashboard, linked): per round MULTI_STEPS steps, every step new filter/brush
    values; (a) the hand-written statements one after another, (b) one POST /v1/batch.
    drag: per round DRAG_MOVES requests of one session DRAG_GAP_MS apart, time from the
    first send to the last move's answer; against (b1) the last move's request alone and
    (a) its hand-written statement."""
    metas, _, diff = multi_mod.check(m, http, con, i=0)
    if not metas:
        log(f"{m.name}: service answered {diff}")
        return {"multi": m.kind, "title": m.title, "error": diff, "sanity_equal": False}
    log(f"{m.name}: sanity (a)==(b): {'OK' if diff is None else 'MISMATCH ' + diff}"
        f"  ({len(metas)} charts)")
    row: dict[str, Any] = {"multi": m.kind, "title": m.title, "charts": len(metas),
                           "sanity_equal": diff is None, "sanity_detail": diff, "runs": RUNS}
    last = metas
    if m.kind == "batch":
        t = {"limit": [], "service": []}
        bad = []
        total = RUNS * MULTI_STEPS
        for step in range(total):
            i = 1 + step
            body = orjson.dumps(m.body(i))

            def call():
                return multi_mod.batch(http, body)

            def limit():
                # the layout of the last answer (the same cost as this step's)
                return [con.sql(q).to_arrow_table() for q in m.hand(last, i)]

            if step % 2:
                ms_s, (resp, metas) = timed(call)
                ms, _ = timed(limit)
            else:
                ms, _ = timed(limit)
                ms_s, (resp, metas) = timed(call)
            assert resp.status_code == 200, resp.text[:300]
            if any("data" not in a for a in metas):
                bad.append(step)
            last = metas
            t["limit"].append(ms)
            t["service"].append(ms_s)
            progress(f"{m.name} steps", step + 1, total)
        _, _, d2 = multi_mod.check(m, http, con, i=total)  # the last step's values again
        row["sanity_equal_last_step"] = d2 is None
        if d2 is not None:
            row["sanity_detail"] = f"step {total}: {d2}"
        row["sanity_equal"] = row["sanity_equal"] and d2 is None and not bad
        # statements the batch ran: charts sharing one (app/batch_sets.py) list the same text
        row["statements"] = len({q for a in last for q in a.get("sql", [])})
        row["steps"] = total
    else:
        t = {"limit": [], "alone": [], "drag_span": [], "drag_last_move": []}
        codes: list[list[int]] = []
        reordered = 0  # drags whose final move arrived before an earlier one (answered 409)
        for rnd in range(RUNS):
            start = 1000 + 100 * rnd
            last_i = start + multi_mod.DRAG_MOVES - 1
            alone_body = orjson.dumps({**m.body(last_i), "session": f"bench-alone-{rnd}"})

            def do_drag():
                res = multi_mod.drag(lambda: httpx.Client(base_url=f"http://127.0.0.1:{PORT}",
                                                          timeout=600),
                                     m, start, session=f"bench-drag-{rnd}")
                for c in res.pop("clients"):
                    c.close()
                return res

            def alone():
                return multi_mod.post(http, "/v1/chart", alone_body)

            def limit():
                return [con.sql(q).to_arrow_table() for q in m.hand(last, last_i)]

            if rnd % 2:
                res = do_drag()
                ms_a, r_a = timed(alone)
                ms, _ = timed(limit)
            else:
                ms, _ = timed(limit)
                ms_a, r_a = timed(alone)
                res = do_drag()
            assert r_a.status_code == 200, r_a.text[:300]
            lastr = res["last"]
            assert lastr.status_code == 200, lastr.text[:300]
            last = [lastr.json()]
            reordered += res["reordered"]
            hand = con.sql(m.hand(last, res["last_index"])[0]).to_arrow_table()
            d2 = multi_mod.same_rows(last[0], hand)
            if d2 is not None:
                row["sanity_equal"] = False
                row["sanity_detail"] = f"drag round {rnd}, last answer: {d2}"
            codes.append(res["codes"])
            t["limit"].append(ms)
            t["alone"].append(ms_a)
            t["drag_span"].append(res["first_send_to_last_ms"])
            t["drag_last_move"].append(res["last_move_ms"])
            progress(f"{m.name} rounds", rnd + 1, RUNS)
        row["moves"] = multi_mod.DRAG_MOVES
        row["gap_ms"] = multi_mod.DRAG_GAP_MS
        row["superseded_per_drag"] = [c.count(409) for c in codes]
        row["answered_200_per_drag"] = [c.count(200) for c in codes]
        row["drags_final_move_superseded_by_reordering"] = reordered
        row["other_codes"] = sorted({x for c in codes for x in c if x not in (200, 409)})
    med = {k: statistics.median(v) for k, v in t.items()}
    for k, v in t.items():
        row[f"{k}_ms_p50"] = round(med[k], 2)
        row[f"{k}_ms_p95"] = round(multi_mod.pct(v, 0.95), 2)
    if m.kind == "batch":
        row["service_over_limit"] = round(med["service"] / med["limit"], 3)
        row["service_over_limit_paired"] = round(statistics.median(
            s / l for s, l in zip(t["service"], t["limit"])), 3)
    else:
        row["drag_span_over_alone"] = round(med["drag_span"] / med["alone"], 3)
        row["drag_span_over_alone_paired"] = round(statistics.median(
            d / a for d, a in zip(t["drag_span"], t["alone"])), 3)
        row["drag_last_move_over_alone"] = round(med["drag_last_move"] / med["alone"], 3)
        row["drag_last_move_over_alone_paired"] = round(statistics.median(
            d / a for d, a in zip(t["drag_last_move"], t["alone"])), 3)
        row["alone_over_limit"] = round(med["alone"] / med["limit"], 3)
    row["samples_ms"] = {k: [round(x, 2) for x in v] for k, v in t.items()}
    return row


def print_table(out: dict[str, Any]) -> None:
    hdr = ("case", "limit", "service", "svc/lim", "svc_sql/lim", "naive_in", "in/svc",
           "naive_http", "http/svc", "plan p50", "plan http", "cached", "resp B", "stmts", "a==b")
    print(" | ".join(hdr))
    for name, r in out["cases"].items():
        if name == "first_request":
            print(f"{name} | {json.dumps(r['p50'])}")
            continue
        if "multi" in r:
            print(f"{name} | " + json.dumps({k: v for k, v in r.items()
                                             if k not in ("title", "samples_ms", "multi")}))
            continue
        if "service_ms" not in r:
            print(f"{name} | ERROR {r.get('error')}")
            continue
        print(" | ".join(str(x) for x in (
            name, r["limit_ms"], r["service_ms"], r["service_over_limit"], r["service_sql_over_limit"],
            r.get("naive_inproc_ms", "-"), r.get("naive_inproc_over_service", "-"),
            r.get("naive_http_ms", "-"), r.get("naive_http_over_service", "-"),
            r["plan_ms"], r["plan_ms_in_service"], r["cached_ms"], r["response_bytes"],
            f"{r['statements_cold']}/{r['statements']}", "yes" if r["sanity_equal"] else "NO")))
    if any("multi" in r for r in out["cases"].values()):
        import report  # bench/report.py: the multi-chart cases' ratios side by side
        print(report.multi_table(out))
    print("summary:", json.dumps(out["summary"]))


if __name__ == "__main__":
    raise SystemExit(main())
