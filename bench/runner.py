"""The bench's case runner, shared by bench/run.py (real uvicorn, BENCH_ROWS rows) and
tests/test_bench_smoke.py (in-process app, a small table), so a case that no longer runs
fails ``make test``.

It talks to sluice only through its public, stable entry points: the HTTP contract
(``POST /v1/chart`` with JSON or Arrow answers, ``timing_ms``, ``stats``, ``bins``), the app
factory ``app.main.create_app`` / ``uvicorn app.main:app``, ``app.settings.load_settings``
and ``app.demo.build_demo``. No planner, cache or engine internals: those are refactored
freely and must not break the bench silently.

``client`` below is anything with httpx's ``post(url, content=, headers=)``: an
``httpx.Client`` on a real server, or FastAPI's ``TestClient``.
"""

from __future__ import annotations

import json
import math
import os
import statistics
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import orjson
import pyarrow as pa

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
ARROW_STREAM = "application/vnd.apache.arrow.stream"
NO_CACHE = {"content-type": "application/json", "cache-control": "no-cache"}


def reference_connection(path: Path | str) -> duckdb.DuckDBPyConnection:
    """The bench's own read-only DuckDB connection for the hand-written SQL (UTC)."""
    con = duckdb.connect(str(path), read_only=True)
    con.execute("SET TimeZone = 'UTC'")
    return con


def post_chart(client: Any, body: dict[str, Any] | bytes, arrow: bool = False,
               cache: bool = False, path: str = "/v1/chart") -> Any:
    """POST ``body`` to ``path`` (result cache bypassed unless ``cache``; Arrow if ``arrow``)."""
    content = body if isinstance(body, bytes) else orjson.dumps(body)
    headers = dict(NO_CACHE)
    if cache:
        headers.pop("cache-control")
    if arrow:
        headers["accept"] = ARROW_STREAM
    return client.post(path, content=content, headers=headers)


def compare(service: pa.Table, hand: pa.Table) -> str | None:
    """None when the service's Arrow answer equals the hand-written SQL's rows (same columns,
    same order; floats to 1e-9 relative, timestamps as UTC microseconds)."""
    if service.num_rows != hand.num_rows:
        return f"rows {service.num_rows} != {hand.num_rows}"
    if service.column_names != hand.column_names:
        return f"columns {service.column_names} != {hand.column_names}"
    for name in service.column_names:
        a, b = service.column(name), hand.column(name)
        if pa.types.is_timestamp(a.type) or pa.types.is_timestamp(b.type):
            a = a.cast(pa.timestamp("us", tz="UTC"))
            b = b.cast(pa.timestamp("us", tz="UTC"))
        if a.type == b.type and a.equals(b):
            continue
        if pa.types.is_floating(a.type) and pa.types.is_floating(b.type):
            x, y = a.to_numpy(zero_copy_only=False), b.to_numpy(zero_copy_only=False)
            same = np.isclose(x, y, rtol=1e-9, atol=1e-9) | (np.isnan(x) & np.isnan(y))
            if same.all() and (a.null_count == b.null_count == 0):
                continue
        for i, (x, y) in enumerate(zip(a.to_pylist(), b.to_pylist())):
            if isinstance(x, float) or isinstance(y, float):
                if x is None or y is None:
                    if x is not y:
                        return f"{name}[{i}]: {x!r} != {y!r}"
                elif not math.isclose(float(x), float(y), rel_tol=1e-9, abs_tol=1e-9):
                    return f"{name}[{i}]: {x!r} != {y!r}"
            elif x != y:
                return f"{name}[{i}]: {x!r} != {y!r}"
    return None


@dataclass
class Checked:
    """One case's untimed first answer and its (a) == (b) check."""

    case: Any
    meta: dict[str, Any]          # the JSON answer (columns, data, bins, stats, sql, timing_ms)
    hand_sql: str
    rows: int
    diff: str | None              # None: the service's answer equals the hand-written SQL's
    error: str | None = None      # the service did not answer 200

    @property
    def ok(self) -> bool:
        return self.error is None and self.diff is None


def check_case(case: Any, client: Any, con: duckdb.DuckDBPyConnection, i: int = 0) -> Checked:
    """Ask the service for request ``i`` of ``case`` (JSON for the layout, Arrow for the
    table, result cache bypassed) and compare with the hand-written SQL on ``con``."""
    body = case.body(i)
    r = post_chart(client, body)
    if r.status_code != 200:
        return Checked(case, {}, "", 0, None, f"{r.status_code}: {r.text[:300]}")
    meta = r.json()
    ra = post_chart(client, body, arrow=True)
    if ra.status_code != 200:
        return Checked(case, meta, "", 0, None, f"arrow {ra.status_code}: {ra.text[:300]}")
    svc = pa.ipc.open_stream(ra.content).read_all()
    hand_sql = case.sql(meta, i)
    hand = con.sql(hand_sql).to_arrow_table()
    return Checked(case, meta, hand_sql, svc.num_rows, compare(svc, hand))


def plan_times(case: Any, client: Any, n: int, start: int = 0) -> list[float]:
    """``timing_ms.plan`` as the service reports it for ``n`` uncached requests: request
    number start..start+n-1 (a new filter value each for a case with ``vary``)."""
    out = []
    for i in range(start, start + n):
        r = post_chart(client, case.body(i))
        if r.status_code != 200:
            raise RuntimeError(f"{case.name}: {r.status_code}: {r.text[:300]}")
        out.append(float(r.json()["timing_ms"]["plan"]))
    return out


def p50(xs: list[float]) -> float:
    return statistics.median(xs) if xs else float("nan")


# ---- first request of a fresh process ------------------------------------------------------
FIRST_REQUEST_SCRIPT = HERE / "first_request.py"


def first_request(config: Path | str, case: Any, runs: int = 3, steady: int = 10,
                  timeout: float = 300.0) -> dict[str, Any]:
    """Start ``runs`` fresh Python processes (bench/first_request.py): each imports the app,
    runs its start-up (lifespan) and sends requests 0, 1, ... 1 + steady of ``case`` (a new
    filter value each for a case with ``vary``). Returns the per-run measurements, their
    medians and minima (the least disturbed run on a shared machine)."""
    env = dict(os.environ, SLUICE_CONFIG=str(config),
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    samples = []
    for _ in range(runs):
        out = subprocess.run([sys.executable, str(FIRST_REQUEST_SCRIPT)], cwd=str(ROOT), env=env,
                             input=json.dumps({"bodies": [case.body(i) for i in range(2 + steady)]}),
                             capture_output=True, text=True,
                             timeout=timeout)
        if out.returncode != 0:
            raise RuntimeError(f"first_request.py failed ({out.returncode}): {out.stderr[-2000:]}")
        samples.append(json.loads(out.stdout.strip().splitlines()[-1]))
    keys = [k for k, v in samples[0].items() if isinstance(v, (int, float))]
    return {"runs": samples, "p50": {k: round(p50([s[k] for s in samples]), 3) for k in keys},
            "min": {k: round(min(s[k] for s in samples), 3) for k in keys}}


def timed(fn) -> tuple[float, Any]:
    t0 = time.perf_counter()
    out = fn()
    return (time.perf_counter() - t0) * 1000.0, out
