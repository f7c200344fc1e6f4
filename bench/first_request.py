"""One fresh process's first request (run by bench/runner.py ``first_request``; not alone).

Reads ``{"bodies": [first, second]}`` on stdin, imports the app for ``SLUICE_CONFIG``, runs
its start-up (lifespan, through FastAPI's TestClient) and posts ``first`` and then
``second`` (the same chart with a new filter value), result cache bypassed. Prints one JSON
line: import_ms (imports + ``create_app``), startup_ms (lifespan), first_plan_ms and
second_plan_ms (``timing_ms.plan`` as the service reports it), first_wall_ms, the status
codes and the first answer's ``data`` and ``bins``.
"""

from __future__ import annotations

import json
import sys
import time


def main() -> int:
    bodies = json.loads(sys.stdin.read())["bodies"]
    t0 = time.perf_counter()
    from fastapi.testclient import TestClient

    import app.main  # builds the app for SLUICE_CONFIG at import (uvicorn app.main:app)

    t1 = time.perf_counter()
    headers = {"content-type": "application/json", "cache-control": "no-cache"}
    with TestClient(app.main.app) as client:  # runs the lifespan (start-up) on entry
        t2 = time.perf_counter()
        r1 = client.post("/v1/chart", content=json.dumps(bodies[0]), headers=headers)
        t3 = time.perf_counter()
        r2 = client.post("/v1/chart", content=json.dumps(bodies[1]), headers=headers)
    a1 = r1.json() if r1.status_code == 200 else {}
    a2 = r2.json() if r2.status_code == 200 else {}
    print(json.dumps({
        "import_ms": round((t1 - t0) * 1000.0, 3),
        "startup_ms": round((t2 - t1) * 1000.0, 3),
        "first_plan_ms": a1.get("timing_ms", {}).get("plan", float("nan")),
        "first_wall_ms": round((t3 - t2) * 1000.0, 3),
        "second_plan_ms": a2.get("timing_ms", {}).get("plan", float("nan")),
        "status": [r1.status_code, r2.status_code],
        "data": a1.get("data"),
        "bins": a1.get("bins"),
    }))
    return 0 if r1.status_code == r2.status_code == 200 else 1


if __name__ == "__main__":
    raise SystemExit(main())
