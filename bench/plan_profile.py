"""Where the planning time of a new filter value goes (cProfile, stdlib; no dependency).

    python bench/plan_profile.py [case ...]     (default: brush_bins brush_width)

Sends PROFILE_REQUESTS (default 200) requests of each case through ``ChartService.run``
(the public entry point every route uses) on a small table (BENCH_PLAN_ROWS rows, built
by bench/run.py), each request with a new filter value, the result cache not involved.
Prints the p50 of the service's own ``timing["plan"]``, the profile rolled up by module
(tottime: time spent in that module's own code), the engine's share, and the top
functions by own time and by cumulative time. ``profile()`` returns the same as a dict
(tests/test_bench_smoke.py runs it on a few requests).
"""

from __future__ import annotations

import cProfile
import os
import pstats
import statistics
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import cases  # noqa: E402

REQUESTS = int(os.environ.get("PROFILE_REQUESTS", "200"))


def _module(filename: str, func: str) -> str:
    """A short label for where a function lives: sqlglot/<path>, planner/<path>, ..."""
    if filename == "~":  # a built-in: name it by what it is a method of
        for lib in ("duckdb", "pyarrow", "pydantic", "orjson", "_thread", "lock"):
            if lib in func:
                return "threads (waiting for the engine's worker)" if lib in ("_thread", "lock") else lib
        return "builtins"
    parts = Path(filename).parts
    if "site-packages" in parts:
        rest = parts[parts.index("site-packages") + 1:]
        return "/".join(rest[:3]) if rest[0] == "sqlglot" else rest[0]
    for lib in ("planner", "app"):
        if lib in parts:
            i = len(parts) - 1 - parts[::-1].index(lib)
            return "/".join(parts[i:])
    return "python/" + "/".join(parts[-2:])


def profile(config: Path | str, names: list[str], n: int = REQUESTS, start: int = 20_000,
            top: int = 25) -> dict[str, Any]:
    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import load_settings
    from planner.model import ChartRequest

    service = ChartService(Catalog(load_settings(config)))
    suite = {c.name: c for c in cases.suite()}
    out: dict[str, Any] = {}
    for name in names:
        case = suite[name]
        service.run(ChartRequest.model_validate(case.body(start - 1)))  # first-use costs aside
        reqs = [ChartRequest.model_validate(case.body(i)) for i in range(start, start + n)]
        prof = cProfile.Profile()
        plan, total = [], []
        prof.enable()
        for req in reqs:
            res = service.run(req)
            plan.append(res.timing["plan"])
            total.append(sum(res.timing.values()))
        prof.disable()
        st = pstats.Stats(prof)
        whole = sum(v[2] for v in st.stats.values())  # total own time, s
        by_mod: dict[str, float] = {}
        rows = []
        for (fn, line, func), (cc, nc, tt, ct, _callers) in st.stats.items():
            mod = _module(fn, func)
            by_mod[mod] = by_mod.get(mod, 0.0) + tt
            rows.append((tt, ct, nc, f"{mod}:{line}({func})"))
        per = 1000.0 / n
        out[name] = {
            "requests": n,
            "plan_ms_p50": round(statistics.median(plan), 3),
            "service_ms_p50": round(statistics.median(total), 3),
            "profiled_ms_per_request": round(whole * per, 3),
            "by_module_ms_per_request": {k: round(v * per, 4) for k, v in
                                         sorted(by_mod.items(), key=lambda kv: -kv[1])[:top]},
            "top_own": [(round(tt * per, 4), nc // n, f) for tt, ct, nc, f in
                        sorted(rows, key=lambda r: -r[0])[:top]],
            "top_cumulative": [(round(ct * per, 4), nc // n, f) for tt, ct, nc, f in
                               sorted(rows, key=lambda r: -r[1])[:top]
                               if f.startswith(("planner", "sqlglot", "app"))],
        }
    return out


def print_report(res: dict[str, Any]) -> None:
    for name, r in res.items():
        print(f"=== {name}: {r['requests']} requests, each a new filter value ===")
        print(f"plan p50 {r['plan_ms_p50']} ms (the service's timing); whole run() p50 "
              f"{r['service_ms_p50']} ms; profiled {r['profiled_ms_per_request']} ms/request "
              "(cProfile overhead included)")
        print("own time by module, ms per request:")
        for k, v in r["by_module_ms_per_request"].items():
            print(f"  {v:8.4f}  {k}")
        print("top functions by own time (ms/request, calls/request):")
        for ms, calls, f in r["top_own"]:
            print(f"  {ms:8.4f} {calls:6d}  {f}")
        print("top planner/sqlglot/app functions by cumulative time:")
        for ms, calls, f in r["top_cumulative"]:
            print(f"  {ms:8.4f} {calls:6d}  {f}")


def main() -> None:
    import run as bench

    names = sys.argv[1:] or ["brush_bins", "brush_width"]
    print_report(profile(bench.plan_data(), names))


if __name__ == "__main__":
    main()
