"""Profile the request path with pyinstrument (``pip install pyinstrument``; not a dependency).

    python bench/profile.py [case]      (default: histogram; data from bench/run.py)

Profiles the service's own Python around the engine -- plan (cached), shape, JSON encode --
as a pyinstrument text tree. (The HTTP layer runs route code in a worker thread that
pyinstrument does not follow; bench/run.py measures it end to end instead: a cached answer
vs /healthz.)
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
    with TestClient(app) as client:  # warm the catalog, the plan and the extents
        client.post("/v1/chart", content=body, headers=h)

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
    print("=== plan (cached) + shape + JSON encode x300, engine excluded ===")
    print(p.output_text(unicode=False, color=False, show_all=False))


if __name__ == "__main__":
    main()
