"""Replicas bench: do several sluice replicas with the shared Redis cache run each distinct
chart once, and what does it cost in latency?

    python bench/replicas.py                       # BENCH_REPLICA_ROWS=2000000, 32 clients
    BENCH_REPLICA_ROWS=500000 BENCH_CLIENTS=16 python bench/replicas.py --json out.json

Three layouts, each started fresh (new processes, empty caches, a fresh throwaway
redis-server on a free loopback port — the machine's shared Redis is not used):

* ``3 replicas + Redis`` — three uvicorn processes, ``[cache] url`` set, clients spread
  round robin over them;
* ``3 replicas, local caches`` — the same three without ``url`` (what sharing saves);
* ``1 replica`` — one process with its local cache only.

Workload: a mixed dashboard — ``DASHBOARDS`` dashboards of ``len(PANELS)`` charts each (count,
sum, average, median, distinct count, a histogram), every dashboard with its own filter. Each
of ``BENCH_CLIENTS`` client threads opens ``BENCH_VIEWS`` dashboards in a seeded random order
and requests their charts one after another (a browser's panels, sequential per client), so
the same charts arrive at different replicas at nearly the same time.

Reported: requests, distinct requests, engine executions (summed
``sluice_engine_duration_seconds_count`` over the replicas' /metrics) per distinct request
(goal 1.0), client-side latency p50 / p99 (nearest-rank, common practice), wall time and
requests per second. Bounded: a fixed number of requests to 127.0.0.1 only.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
import replica_cluster as rc  # noqa: E402

ROWS = int(os.environ.get("BENCH_REPLICA_ROWS", 2_000_000))
CLIENTS = int(os.environ.get("BENCH_CLIENTS", 32))
VIEWS = int(os.environ.get("BENCH_VIEWS", 6))
DASHBOARDS = int(os.environ.get("BENCH_DASHBOARDS", 8))
SEED = 20261203

PANELS = [
    {"channels": {"x": {"column": "grp"}, "y": {"agg": "count"}}},
    {"channels": {"x": {"column": "grp"}, "y": {"agg": "sum", "column": "x"}}},
    {"channels": {"x": {"column": "k", "bin": {"bins": 25}}, "y": {"agg": "avg", "column": "x"}}},
    {"channels": {"x": {"column": "grp"}, "y": {"agg": "median", "column": "x"}}},
    {"channels": {"x": {"column": "grp"}, "y": {"agg": "count_distinct", "column": "k"}}},
    {"channels": {"x": {"column": "x", "bin": {"bins": 40}}, "y": {"agg": "count"}}},
]


def dashboard(d: int) -> list[dict]:
    where = [{"column": "k", "lt": 5000 - 400 * d}]
    return [{"source": "s", **p, "where": where} for p in PANELS]


def quantile(sorted_ms: list[float], q: float) -> float:
    """Nearest-rank quantile (common practice for latency percentiles)."""
    if not sorted_ms:
        return float("nan")
    i = max(0, min(len(sorted_ms) - 1, int(-(-q * len(sorted_ms) // 1)) - 1))
    return sorted_ms[i]


def workload() -> list[list[dict]]:
    rnd = random.Random(SEED)
    return [[c for d in [rnd.randrange(DASHBOARDS) for _ in range(VIEWS)] for c in dashboard(d)]
            for _ in range(CLIENTS)]


def run_layout(name: str, root: Path, db: Path, replicas: int, shared: bool) -> dict:
    redis = rc.RedisServer(root).start() if shared else None
    cfg = rc.write_config(root / f"{name.replace(' ', '_')}.toml", db,
                          redis.url if redis else None, lock_ms=5000, wait_ms=30000)
    reps = rc.Replicas(cfg, replicas, root).start()
    try:
        plans = workload()
        lat: list[float] = []
        errors: dict[int, int] = {}
        lock = threading.Lock()
        barrier = threading.Barrier(len(plans))

        def client(i: int, plan: list[dict]) -> None:
            barrier.wait()
            for n, body in enumerate(plan):
                port = reps.ports[(i + n) % len(reps.ports)]
                t0 = time.perf_counter()
                status, _ = rc.post(port, body, timeout=120)
                ms = (time.perf_counter() - t0) * 1000.0
                with lock:
                    lat.append(ms)
                    if status != 200:
                        errors[status] = errors.get(status, 0) + 1

        t0 = time.perf_counter()
        threads = [threading.Thread(target=client, args=(i, p)) for i, p in enumerate(plans)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        wall = time.perf_counter() - t0
        distinct = len({json.dumps(b, sort_keys=True) for p in plans for b in p})
        execs = reps.executions()
        lat.sort()
        return {"layout": name, "replicas": replicas, "shared": shared, "clients": len(plans),
                "requests": len(lat), "errors": sum(errors.values()),
                "error_statuses": {str(k): v for k, v in sorted(errors.items())}, "distinct": distinct,
                "executions": execs, "executions_per_distinct": round(execs / distinct, 3),
                "p50_ms": round(quantile(lat, 0.50), 1), "p99_ms": round(quantile(lat, 0.99), 1),
                "wall_s": round(wall, 2), "rps": round(len(lat) / wall, 1),
                "shared_waits": reps.events("shared_wait") if shared else 0}
    finally:
        reps.stop()
        if redis:
            redis.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", help="write the results here as JSON")
    args = ap.parse_args()
    if rc.RedisServer.binary() is None:
        sys.exit("redis-server is not installed (apt-get install redis-server)")
    with tempfile.TemporaryDirectory(prefix="sluice-replicas-") as tmp:
        root = Path(tmp)
        db = root / "bench.duckdb"
        rc.make_duckdb(db, ROWS)
        out = [run_layout("3 replicas + Redis", root, db, 3, True),
               run_layout("3 replicas, local caches", root, db, 3, False),
               run_layout("1 replica", root, db, 1, False)]
    print(f"rows {ROWS:,}, {CLIENTS} clients x {VIEWS} dashboards x {len(PANELS)} charts")
    print("| layout | requests | distinct | executions | per distinct | p50 ms | p99 ms | wall s | req/s | errors |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in out:
        print(f"| {r['layout']} | {r['requests']} | {r['distinct']} | {r['executions']} | "
              f"{r['executions_per_distinct']:.3f} | {r['p50_ms']} | {r['p99_ms']} | "
              f"{r['wall_s']} | {r['rps']} | {r['errors']} {r['error_statuses'] or ''} |")
    if args.json:
        Path(args.json).write_text(json.dumps({"rows": ROWS, "results": out}, indent=2))


if __name__ == "__main__":
    main()
