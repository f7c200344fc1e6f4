"""`make load`: a bounded load run against a real uvicorn on 127.0.0.1.

Starts the service on the benchmark data (bench/run.py builds it; BENCH_ROWS rows), then runs
Debian's ``wrk`` (4.1) with ``bench/load.lua``: LOAD_CLIENTS connections (default 32) for
LOAD_SECONDS (default 60), each POSTing the bench suite's chart requests round-robin -- a
dashboard's worth of charts, answered from the result cache after the first time.
A second, shorter phase (LOAD_UNCACHED_SECONDS, default 20; 0 skips it) sends the same
requests with ``Cache-Control: no-cache`` so every request scans the 10M rows; for it the
config lets requests queue for an engine slot (``[limits] queue_wait_ms = 120000``) rather
than be shed with 503 at once.

Reports requests/s, p50, p99 and errors (non-2xx + socket errors) per phase, and writes
bench/load.json.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import run as bench  # noqa: E402  (data build, config, server start)
import cases  # noqa: E402

CLIENTS = int(os.environ.get("LOAD_CLIENTS", "32"))
SECONDS = int(os.environ.get("LOAD_SECONDS", "60"))
UNCACHED = int(os.environ.get("LOAD_UNCACHED_SECONDS", "20"))


def _ms(text: str) -> float:
    m = re.fullmatch(r"([\d.]+)(us|ms|s|m)", text.strip())
    if not m:
        return float("nan")
    v, unit = float(m.group(1)), m.group(2)
    return v / 1000.0 if unit == "us" else v if unit == "ms" else v * 1000.0 if unit == "s" else v * 60000.0


def parse(out: str) -> dict:
    res: dict = {}
    for pct in ("50", "99"):
        m = re.search(rf"^\s+{pct}(?:\.000)?%\s+(\S+)", out, re.M)
        res[f"p{pct}_ms"] = _ms(m.group(1)) if m else None
    m = re.search(r"Requests/sec:\s+([\d.]+)", out)
    res["requests_per_s"] = float(m.group(1)) if m else None
    m = re.search(r"(\d+) requests in", out)
    res["requests"] = int(m.group(1)) if m else None
    errors = 0
    m = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", out)
    if m:
        errors += int(m.group(1))
    m = re.search(r"Socket errors: connect (\d+), read (\d+), write (\d+), timeout (\d+)", out)
    if m:
        errors += sum(int(x) for x in m.groups())
    res["errors"] = errors
    return res


def wrk(seconds: int, no_cache: bool) -> dict:
    env = dict(os.environ, SLUICE_LOAD_BODIES=str(HERE / "data" / "load_bodies.json"),
               SLUICE_LOAD_NOCACHE="1" if no_cache else "0")
    cmd = ["wrk", "-t", "2", "-c", str(CLIENTS), "-d", f"{seconds}s", "--timeout", "30s",
           "--latency", "-s", str(HERE / "load.lua"), f"http://127.0.0.1:{bench.PORT}/v1/chart"]
    sys.stderr.write(f"wrk: {CLIENTS} connections, {seconds} s, {'no-cache' if no_cache else 'cache'}\n")
    out = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True).stdout
    sys.stderr.write(out)
    return parse(out)


def main() -> int:
    if shutil.which("wrk") is None:
        raise SystemExit("wrk is not installed: apt-get install wrk")
    db, walk = bench.build_data()
    cfg = bench.write_config(db, walk)
    # Uncached requests queue for an engine slot ([limits] max_concurrent, default 8 per
    # source) instead of being shed with 503 at once: a dashboard would rather wait.
    load_cfg = HERE / "data" / "load.toml"
    load_cfg.write_text(cfg.read_text() + "\n[limits]\nqueue_wait_ms = 120000\n")
    cfg = load_cfg
    bodies = [c.body(0) for c in cases.suite()]
    (HERE / "data" / "load_bodies.json").write_text(json.dumps(bodies))
    bench.port_free(bench.PORT)
    svc = bench.start_service(cfg)
    try:
        import httpx

        with httpx.Client(base_url=f"http://127.0.0.1:{bench.PORT}", timeout=600) as c:
            for b in bodies:  # warm: catalog, plans, extents (the cached phase measures hits)
                c.post("/v1/chart", json=b).raise_for_status()
        phases = {"cached": wrk(SECONDS, False)}
        if UNCACHED > 0:
            phases["uncached"] = wrk(UNCACHED, True)
    finally:
        svc.terminate()
        try:
            svc.wait(10)
        except subprocess.TimeoutExpired:
            svc.kill()
    out = {"clients": CLIENTS, "seconds": SECONDS, "uncached_seconds": UNCACHED,
           "rows": bench.ROWS, "tool": "wrk 4.1 (Debian) + bench/load.lua", "phases": phases}
    (HERE / "load.json").write_text(json.dumps(out, indent=2))
    print(json.dumps(out, indent=2))
    return 0 if all(p["errors"] == 0 for p in phases.values()) else 1


if __name__ == "__main__":
    raise SystemExit(main())
