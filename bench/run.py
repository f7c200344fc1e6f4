"""`make bench`: sluice against the limit (hand-written SQL) and two naive paths.

Per case, interleaved within one round (so machine noise hits every path alike):

  (a) limit          the best hand-written DuckDB SQL for the same rows, run in-process
  (b) service        sluice end-to-end over HTTP against a real uvicorn on 127.0.0.1
                     (``Cache-Control: no-cache``: the result cache is bypassed)
  (c1) naive_inproc  fetch the needed raw columns in-process (Arrow -> pandas), aggregate there
  (c2) naive_http    ship the needed raw columns as JSON from a plain rows endpoint that this
                     script starts (not part of the product), aggregate in the client; on a
                     row sample of BENCH_NAIVE_HTTP_ROWS rows, extrapolated linearly to all rows

Medians of BENCH_RUNS (default 5) rounds. Also: cached answers over HTTP, planning time in
process, statements per request (cold and warm). Writes bench/results.json and prints a table.

Environment: BENCH_ROWS (default 10,000,000), BENCH_RUNS (5), BENCH_NAIVE_HTTP_ROWS (1,000,000),
BENCH_CASES (comma list, default all), BENCH_PORT (8765), BENCH_SKIP_NAIVE=1.
"""

from __future__ import annotations

import datetime as dt
import json
import math
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
import pyarrow as pa

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import cases as suite_mod  # noqa: E402

ROWS = int(os.environ.get("BENCH_ROWS", "10000000"))
RUNS = max(5, int(os.environ.get("BENCH_RUNS", "5")))
NAIVE_HTTP_ROWS = int(os.environ.get("BENCH_NAIVE_HTTP_ROWS", "1000000"))
PORT = int(os.environ.get("BENCH_PORT", "8765"))
ROWS_PORT = PORT + 1
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
        tmp = walk.with_suffix(".tmp")
        if tmp.exists():
            tmp.unlink()
        con = duckdb.connect(str(tmp))
        # A deterministic random walk with spikes, one point per second, ~2% NULL values.
        con.execute("SET TimeZone = 'UTC'")
        con.execute(f"""
            CREATE TABLE walk AS
            WITH s AS (SELECT range AS i,
                         ((hash(range * 3 + 1) >> 11)::DOUBLE / 9007199254740992.0) AS u1,
                         ((hash(range * 3 + 2) >> 11)::DOUBLE / 9007199254740992.0) AS u2
                       FROM range({ROWS})),
            d AS (SELECT i, u2, (u1 - 0.5) + CASE WHEN u2 < 0.0005 THEN (u2 * 4000 - 1) * 40 ELSE 0 END
                         AS step FROM s)
            SELECT TIMESTAMPTZ '2026-01-01 00:00:00+00' + to_seconds(i) AS t,
                   CASE WHEN u2 > 0.98 THEN NULL
                        ELSE sum(step) OVER (ORDER BY i ROWS UNBOUNDED PRECEDING) END AS v
            FROM d ORDER BY i""")
        con.execute("CHECKPOINT")
        con.close()
        os.replace(tmp, walk)
    return db, walk


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
def timed(fn) -> tuple[float, Any]:
    t0 = time.perf_counter()
    out = fn()
    return (time.perf_counter() - t0) * 1000.0, out


def compare(service: pa.Table, hand: pa.Table) -> str | None:
    """None when the service's Arrow answer equals the hand-written SQL's rows."""
    if service.num_rows != hand.num_rows:
        return f"rows {service.num_rows} != {hand.num_rows}"
    if service.column_names != hand.column_names:
        return f"columns {service.column_names} != {hand.column_names}"
    for name in service.column_names:
        a, b = service.column(name), hand.column(name)
        if pa.types.is_timestamp(a.type) or pa.types.is_timestamp(b.type):
            a = a.cast(pa.timestamp("us", tz="UTC"))
            b = b.cast(pa.timestamp("us", tz="UTC"))
        la, lb = a.to_pylist(), b.to_pylist()
        for i, (x, y) in enumerate(zip(la, lb)):
            if isinstance(x, float) or isinstance(y, float):
                if x is None or y is None:
                    if x is not y:
                        return f"{name}[{i}]: {x!r} != {y!r}"
                elif not math.isclose(float(x), float(y), rel_tol=1e-9, abs_tol=1e-9):
                    return f"{name}[{i}]: {x!r} != {y!r}"
            elif x != y:
                return f"{name}[{i}]: {x!r} != {y!r}"
    return None


def main() -> int:
    wanted = [c for c in os.environ.get("BENCH_CASES", "").split(",") if c]
    skip_naive = os.environ.get("BENCH_SKIP_NAIVE") == "1"
    cases = [c for c in suite_mod.suite() if not wanted or c.name in wanted]
    db, walk = build_data()
    cfg = write_config(db, walk)
    threads = os.cpu_count() or 1
    log(f"rows={ROWS:,} runs={RUNS} naive_http_rows={NAIVE_HTTP_ROWS:,} cpus={threads}")

    svc = rows_srv = None
    try:
        svc = start_service(cfg)
        if not skip_naive:
            port_free(ROWS_PORT)
            rows_srv = start_rows_server(db, walk)
        return _measure(cases, cfg, svc, rows_srv, skip_naive)
    finally:
        for proc in (svc, rows_srv):
            if proc is not None and proc.poll() is None:
                proc.terminate()
                try:
                    proc.wait(10)
                except subprocess.TimeoutExpired:
                    proc.kill()


def _measure(cases, cfg, svc, rows_srv, skip_naive) -> int:
    # The in-process paths share the DuckDB instance of an in-process ChartService (used for
    # the planning timings): DuckDB allows one configuration per file per process.
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import load_settings
    from planner.model import ChartRequest

    service = ChartService(Catalog(load_settings(cfg)))
    con = {name: service.catalog.engine(name)._con.cursor() for name in ("deliveries", "walk")}
    for c in con.values():
        try:
            c.execute("SET TimeZone = 'UTC'")
        except duckdb.Error:  # the engine already set UTC and locked its configuration
            pass
    http = httpx.Client(base_url=f"http://127.0.0.1:{PORT}", timeout=600)
    rows_http = httpx.Client(base_url=f"http://127.0.0.1:{ROWS_PORT}", timeout=600)
    results: dict[str, Any] = {}
    try:
        # ---- untimed: first answer (bin layout, statements cold), sanity (a) == (b) ----
        prepared = []
        for case in cases:
            body = orjson.dumps(case.request)
            r = http.post("/v1/chart", content=body, headers={
                "content-type": "application/json", "cache-control": "no-cache"})
            if r.status_code != 200:
                log(f"{case.name}: service answered {r.status_code}: {r.text[:300]}")
                results[case.name] = {"error": f"{r.status_code}: {r.text[:300]}"}
                continue
            meta = r.json()
            cold_statements = meta["stats"].get("statements")
            ra = http.post("/v1/chart", content=body, headers={
                "content-type": "application/json", "cache-control": "no-cache",
                "accept": "application/vnd.apache.arrow.stream"})
            svc_arrow = pa.ipc.open_stream(ra.content).read_all()
            hand_sql = case.hand(meta)
            hand_tbl = con[case.table].sql(hand_sql).to_arrow_table()
            diff = compare(svc_arrow, hand_tbl)
            log(f"{case.name}: sanity (a)==(b): {'OK' if diff is None else 'MISMATCH ' + diff}"
                f"  ({svc_arrow.num_rows} rows)")
            prepared.append((case, body, meta, hand_sql, cold_statements, diff))

        # ---- planning time in process (the service's own planner, warm) ----
        plan_ms: dict[str, float] = {}
        for case, *_ in prepared:
            req = ChartRequest.model_validate(case.request)
            cache = getattr(service, "_plans", None)
            samples = []
            for i in range(200):
                t0 = time.perf_counter()
                if cache is not None:  # the service's planning path: request -> SQL text
                    from planner.compile import PARAM_FORMS, bind_sql, bind_values

                    template, entry, engine = service._plan(req, cached=True)
                    d = template.plan.dialect
                    values = bind_values(req, entry.schema, d) if template.plan.slots else []
                    ext = template.extents_sql
                    row = None
                    if ext is not None:
                        sql, args = bind_sql(ext, values, PARAM_FORMS.get(d.name, ("", "qmark"))[1])
                        row = cache.extents_row(entry, ext, args)
                        if row is None:
                            row = engine.fetch_row(sql, args) if args else engine.fetch_row(sql)
                            cache.remember_extents(entry, ext, args, row)
                    cache.finished(template, entry, row)
                else:  # before the planning cache existed: prepare + finish + render
                    plan, entry, engine = service._plan(req)
                    row = None
                    if plan.extents is not None:
                        if i == 0:
                            plan_ms.setdefault("_rows", {})[case.name] = engine.fetch_row(plan.extents_sql)
                        row = plan_ms["_rows"][case.name]
                        _ = plan.extents_sql
                    plan.finish(row)
                    _ = plan.main_sql
                samples.append((time.perf_counter() - t0) * 1000.0)
            plan_ms[case.name] = statistics.median(samples[20:])
        plan_ms.pop("_rows", None)

        # ---- timed rounds ----
        paths = ["limit", "service"] + ([] if skip_naive else ["naive_inproc", "naive_http"])
        times = {c.name: {p: [] for p in paths} for c, *_ in prepared}
        sizes: dict[str, dict[str, Any]] = {c.name: {} for c, *_ in prepared}
        total = RUNS * len(prepared)
        done = 0
        progress("timed rounds", 0, total)
        for rnd in range(RUNS):
            for case, body, meta, hand_sql, _, _ in prepared:
                c = con[case.table]

                def call():
                    return http.post("/v1/chart", content=body, headers={
                        "content-type": "application/json", "cache-control": "no-cache"})
                if rnd % 2:  # alternate which of (a) and (b) goes first
                    ms_s, resp = timed(call)
                    ms, _ = timed(lambda: c.sql(hand_sql).to_arrow_table())
                else:
                    ms, _ = timed(lambda: c.sql(hand_sql).to_arrow_table())
                    ms_s, resp = timed(call)
                times[case.name]["limit"].append(ms)
                ms = ms_s
                assert resp.status_code == 200, resp.text[:300]
                times[case.name]["service"].append(ms)
                sizes[case.name]["response_bytes"] = len(resp.content)
                answer = resp.json()
                sizes[case.name]["statements"] = answer["stats"].get("statements")
                sizes[case.name].setdefault("plan_http", []).append(
                    answer.get("timing_ms", {}).get("plan", float("nan")))

                if not skip_naive:
                    cols = ", ".join(f'"{x}"' for x in case.cols)
                    where = f" WHERE {case.where_sql}" if case.where_sql else ""

                    def naive_inproc():
                        df = c.sql(f"SELECT {cols} FROM {case.table}{where}").to_arrow_table().to_pandas()
                        return case.naive(df, meta)
                    ms, _ = timed(naive_inproc)
                    times[case.name]["naive_inproc"].append(ms)

                    def naive_http():
                        r = rows_http.get("/rows", params={"table": case.table, "cols": ",".join(case.cols),
                                                           "limit": NAIVE_HTTP_ROWS,
                                                           "where": case.name if case.where_sql else ""})
                        payload = orjson.loads(r.content)
                        import pandas as pd
                        df = pd.DataFrame(payload["data"])
                        case.naive(df, meta)
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
        for case, body, *_ in prepared:
            http.post("/v1/chart", content=body, headers={"content-type": "application/json"})
            samples = []
            for _ in range(50):
                ms, r = timed(lambda: http.post("/v1/chart", content=body,
                                                headers={"content-type": "application/json"}))
                samples.append(ms)
            cached[case.name] = statistics.median(samples)
            cached[case.name + ":state"] = r.json().get("cache")

        for case, body, meta, hand_sql, cold_statements, diff in prepared:
            t = {p: statistics.median(v) for p, v in times[case.name].items()}
            row: dict[str, Any] = {
                "title": case.title,
                "limit_ms": round(t["limit"], 2),
                "service_ms": round(t["service"], 2),
                "plan_ms": round(plan_ms[case.name], 4),
                "plan_ms_in_service": round(statistics.median(sizes[case.name]["plan_http"]), 3),
                "cached_ms": round(cached[case.name], 3),
                "cached_state": cached[case.name + ":state"],
                "response_bytes": sizes[case.name].get("response_bytes"),
                "statements_cold": cold_statements,
                "statements": sizes[case.name].get("statements"),
                "service_over_limit": round(t["service"] / t["limit"], 3),
                # noise-robust companions: the median of the per-round ratios (a and b run
                # back to back) and the ratio of the fastest runs
                "service_over_limit_paired": round(statistics.median(
                    s / l for s, l in zip(times[case.name]["service"], times[case.name]["limit"])), 3),
                "service_over_limit_best": round(min(times[case.name]["service"])
                                                 / min(times[case.name]["limit"]), 3),
                "sanity_equal": diff is None,
                "sanity_detail": diff,
                "runs": RUNS,
                "samples_ms": {p: [round(x, 2) for x in v] for p, v in times[case.name].items()},
            }
            if not skip_naive:
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
    finally:
        http.close()
        rows_http.close()

    ok = [r for r in results.values() if "service_ms" in r]
    summary = {
        "median_service_over_limit": round(statistics.median(r["service_over_limit"] for r in ok), 3) if ok else None,
        "median_service_over_limit_paired": round(statistics.median(r["service_over_limit_paired"] for r in ok), 3) if ok else None,
        "median_service_over_limit_best": round(statistics.median(r["service_over_limit_best"] for r in ok), 3) if ok else None,
        "median_plan_ms": round(statistics.median(r["plan_ms"] for r in ok), 4) if ok else None,
        "median_cached_ms": round(statistics.median(r["cached_ms"] for r in ok), 3) if ok else None,
    }
    if ok and not skip_naive:
        summary["min_naive_inproc_over_service"] = min(r["naive_inproc_over_service"] for r in ok)
        summary["min_naive_http_over_service"] = min(r["naive_http_over_service"] for r in ok)
        summary["max_response_over_raw_pct"] = max(r["response_over_raw_pct"] for r in ok)
    out = {
        "date": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "machine": {"cpus": os.cpu_count(), "memory_gib": round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30, 1),
                    "platform": platform.platform(), "python": platform.python_version(),
                    "duckdb": duckdb.__version__},
        "rows": ROWS, "runs": RUNS, "naive_http_sample_rows": NAIVE_HTTP_ROWS,
        "summary": summary, "cases": results,
    }
    (HERE / "results.json").write_text(json.dumps(out, indent=2))
    print_table(out)
    return 0


def print_table(out: dict[str, Any]) -> None:
    hdr = ("case", "limit", "service", "svc/lim", "naive_in", "in/svc", "naive_http", "http/svc",
           "plan", "cached", "resp B", "resp/raw %", "stmts", "a==b")
    print(" | ".join(hdr))
    for name, r in out["cases"].items():
        if "service_ms" not in r:
            print(f"{name} | ERROR {r.get('error')}")
            continue
        print(" | ".join(str(x) for x in (
            name, r["limit_ms"], r["service_ms"], r["service_over_limit"],
            r.get("naive_inproc_ms", "-"), r.get("naive_inproc_over_service", "-"),
            r.get("naive_http_ms", "-"), r.get("naive_http_over_service", "-"),
            r["plan_ms"], r["cached_ms"], r["response_bytes"], r.get("response_over_raw_pct", "-"),
            f"{r['statements_cold']}/{r['statements']}", "yes" if r["sanity_equal"] else "NO")))
    print("summary:", json.dumps(out["summary"]))


if __name__ == "__main__":
    raise SystemExit(main())
