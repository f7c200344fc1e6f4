"""One fresh process's first request (run by bench/runner.py ``first_request``; not alone).

Reads ``{"bodies": [first, second, ...]}`` on stdin, imports the app for ``SLUICE_CONFIG``,
runs its start-up (lifespan, through FastAPI's TestClient) and posts the bodies in order
(the same chart with a new filter value each), result cache bypassed. Prints one JSON line:
import_ms (imports + ``create_app``), startup_ms (lifespan), first_plan_ms, second_plan_ms
and steady_plan_ms (p50 of the rest) -- ``timing_ms.plan`` as the service reports it --,
first_wall_ms, the status codes and the first answer's ``data`` and ``bins``.
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
        rest = [client.post("/v1/chart", content=json.dumps(b), headers=headers)
                for b in bodies[1:]]
    a1 = r1.json() if r1.status_code == 200 else {}
    plans = [r.json()["timing_ms"]["plan"] if r.status_code == 200 else float("nan") for r in rest]
    steady = sorted(plans[1:])
    print(json.dumps({
        "import_ms": round((t1 - t0) * 1000.0, 3),
        "startup_ms": round((t2 - t1) * 1000.0, 3),
        "first_plan_ms": a1.get("timing_ms", {}).get("plan", float("nan")),
        "first_wall_ms": round((t3 - t2) * 1000.0, 3),
        "second_plan_ms": plans[0],
        "steady_plan_ms": steady[len(steady) // 2] if steady else float("nan"),
        "status": [r1.status_code] + [r.status_code for r in rest],
        "data": a1.get("data"),
        "bins": a1.get("bins"),
    }))
    return 0 if all(r.status_code == 200 for r in [r1] + rest) else 1


if __name__ == "__main__":
    raise SystemExit(main())
