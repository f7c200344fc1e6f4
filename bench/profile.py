"""Profile the request path with pyinstrument (``pip install pyinstrument``; not a dependency).

    python bench/profile.py [case]      (default: histogram; data from bench/run.py)

Three profiles, printed as pyinstrument text trees:
  1. a cache hit through the whole ASGI app (FastAPI validation, middleware, lookup, stamp);
  2. an uncached answer (Cache-Control: no-cache) -- mostly the engine;
  3. the service's own Python around the engine: plan (cached), shape, JSON encode.
"""

from __future__ import annotations

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import orjson  # noqa: E402
from pyinstrument import Profiler  # noqa: E402

import cases  # noqa: E402
import run as bench  # noqa: E402


def main() -> None:
    name = sys.argv[1] if len(sys.argv) > 1 else "histogram"
    case = next(c for c in cases.suite() if c.name == name)
    db, walk = bench.build_data()
    cfg = bench.write_config(db, walk)

    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings
    from planner.model import ChartRequest

    app = create_app(load_settings(cfg))
    body = orjson.dumps(case.request)
    h = {"content-type": "application/json"}
    with TestClient(app) as client:
        client.post("/v1/chart", content=body, headers=h)
        p = Profiler(interval=0.0001)
        p.start()
        for _ in range(2000):
            client.post("/v1/chart", content=body, headers=h)
        p.stop()
        print("=== 1. cache hit x2000 through the ASGI app (TestClient) ===")
        print(p.output_text(unicode=False, color=False, show_all=False))

        p = Profiler(interval=0.0005)
        p.start()
        for _ in range(5):
            client.post("/v1/chart", content=body, headers=dict(h, **{"cache-control": "no-cache"}))
        p.stop()
        print("=== 2. uncached answer x5 ===")
        print(p.output_text(unicode=False, color=False, show_all=False))

    service = app.state.service
    req = ChartRequest.model_validate(case.request)
    result = service.run(req)
    raw = service.catalog.engine(req.source).execute(result.meta["sql"][-1])
    from app.cache import open_json

    p = Profiler(interval=0.0001)
    p.start()
    for _ in range(300):
        service._plan(req, cached=True)
        service._shape(result.plan, result.entry, raw, None, result.meta["sql"])
        open_json(service.to_json(result))
    p.stop()
    print("=== 3. plan (cached) + shape + JSON encode x300, engine excluded ===")
    print(p.output_text(unicode=False, color=False, show_all=False))


if __name__ == "__main__":
    main()
