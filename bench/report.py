"""Render bench/results.json (and bench/load.json) as the Markdown tables of RESULTS.md.

    python bench/report.py [results.json] [load.json]
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def fmt(v, nd=1):
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:,.{nd}f}"
    return f"{v:,}" if isinstance(v, int) else str(v)


def table(res: dict) -> str:
    lines = [
        "| case | limit ms | service ms | service/limit | paired | best | service SQL/limit | "
        "naive in-proc ms | naive/service | naive HTTP ms | naive HTTP/service | plan ms (p50) | "
        "plan ms over HTTP | cached ms (p50) | response B | statements cold/warm | (a)==(b) |",
        "|" + "---|" * 17,
    ]
    for name, r in res["cases"].items():
        if name == "first_request" or "multi" in r:
            continue
        if "service_ms" not in r:
            lines.append(f"| {name} | error: {r.get('error', '')[:60]} |" + " |" * 15)
            continue
        lines.append("| " + " | ".join([
            f"{name} ({r['title']})", fmt(r["limit_ms"]), fmt(r["service_ms"]),
            fmt(r["service_over_limit"], 3), fmt(r.get("service_over_limit_paired"), 3),
            fmt(r.get("service_over_limit_best"), 3), fmt(r.get("service_sql_over_limit"), 3),
            fmt(r.get("naive_inproc_ms")), fmt(r.get("naive_inproc_over_service"), 1),
            fmt(r.get("naive_http_ms")), fmt(r.get("naive_http_over_service"), 1),
            fmt(r["plan_ms"], 3), fmt(r.get("plan_ms_in_service"), 3), fmt(r["cached_ms"], 2),
            fmt(r["response_bytes"]), f"{r['statements_cold']}/{r['statements']}",
            "yes" if r["sanity_equal"] else "NO",
        ]) + " |")
    first = res["cases"].get("first_request")
    if first:
        lines += ["", f"first_request ({first['title']}, {len(first['runs'])} fresh processes):",
                  "", "| | " + " | ".join(first["p50"]) + " |", "|---|" + "---|" * len(first["p50"]),
                  "| p50 | " + " | ".join(fmt(v, 1) for v in first["p50"].values()) + " |"]
        if first.get("min"):
            lines.append("| min | " + " | ".join(fmt(v, 1) for v in first["min"].values()) + " |")
    return "\n".join(lines)


def multi_table(res: dict) -> str:
    """Issue 12's multi-chart cases (bench/dashboard.py): batch and drag, side by side."""
    batch = [(n, r) for n, r in res["cases"].items() if r.get("multi") == "batch"]
    drag = [(n, r) for n, r in res["cases"].items() if r.get("multi") == "drag"]
    lines = []
    if batch:
        lines += ["| case | charts | steps | limit p50 / p95 ms | batch p50 / p95 ms | batch/limit | "
                  "paired | statements | (a)==(b) |", "|" + "---|" * 9]
        for n, r in batch:
            if "service_ms_p50" not in r:
                lines.append(f"| {n} | error: {str(r.get('error'))[:60]} |" + " |" * 7)
                continue
            lines.append(f"| {n} ({r['title']}) | {r['charts']} | {r['steps']} | "
                         f"{fmt(r['limit_ms_p50'])} / {fmt(r['limit_ms_p95'])} | "
                         f"{fmt(r['service_ms_p50'])} / {fmt(r['service_ms_p95'])} | "
                         f"{fmt(r['service_over_limit'], 3)} | {fmt(r['service_over_limit_paired'], 3)} | "
                         f"{r['statements']} | {'yes' if r['sanity_equal'] else 'NO'} |")
    for n, r in drag:
        if "alone_ms_p50" not in r:
            lines += ["", f"{n}: error: {str(r.get('error'))[:200]}"]
            continue
        lines += ["", "| case | rounds | limit ms | alone ms | last move → answer ms | last move/alone "
                  "(paired) | first send → last answer ms | superseded (409) per drag | final move "
                  "superseded (arrived early) | (a)==(b) |",
                  "|" + "---|" * 10,
                  f"| {n} ({r['title']}) | {r['runs']} | {fmt(r['limit_ms_p50'])} | "
                  f"{fmt(r['alone_ms_p50'])} | {fmt(r['drag_last_move_ms_p50'])} | "
                  f"{fmt(r['drag_last_move_over_alone'], 3)} ({fmt(r['drag_last_move_over_alone_paired'], 3)}) | "
                  f"{fmt(r['drag_span_ms_p50'])} | {r['superseded_per_drag']} | "
                  f"{r.get('drags_final_move_superseded_by_reordering', '-')} | "
                  f"{'yes' if r['sanity_equal'] else 'NO'} |"]
    return "\n".join(lines)


def load_table(load: dict) -> str:
    lines = ["| phase | connections | seconds | requests | requests/s | p50 ms | p99 ms | errors |",
             "|---|---|---|---|---|---|---|---|"]
    for phase, p in load["phases"].items():
        secs = load["seconds"] if phase == "cached" else load.get("uncached_seconds")
        lines.append(f"| {phase} | {load['clients']} | {secs} | {fmt(p['requests'])} | "
                     f"{fmt(p['requests_per_s'])} | {fmt(p['p50_ms'], 2)} | {fmt(p['p99_ms'], 2)} | "
                     f"{p['errors']} |")
    return "\n".join(lines)


def main() -> None:
    res_path = Path(sys.argv[1]) if len(sys.argv) > 1 else HERE / "results.json"
    res = json.loads(res_path.read_text())
    print(f"date {res['date']}, rows {res['rows']:,}, runs {res['runs']}, machine {res['machine']}")
    print()
    print(table(res))
    if any("multi" in r for r in res["cases"].values()):
        print()
        print(multi_table(res))
    print()
    print("summary:", json.dumps(res["summary"]))
    load_path = Path(sys.argv[2]) if len(sys.argv) > 2 else HERE / "load.json"
    if load_path.exists():
        print()
        print(load_table(json.loads(load_path.read_text())))


if __name__ == "__main__":
    main()
