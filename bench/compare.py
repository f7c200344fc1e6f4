"""Two checkouts side by side: the same cases against a server from each, requests interleaved.

    python bench/compare.py OTHER_CHECKOUT [case,case,...]    (default: hourly,top_n,stacked,histogram)

On a machine shared with other work, two bench/run.py runs minutes apart can differ by 2-3x
in speed, which hides a change of a few milliseconds. Here one uvicorn per checkout (the
other one and this one, on ports BENCH_PORT and BENCH_PORT + 1) answers the same request in
the same moment: per round the hand-written SQL (the limit, on this process's own read-only
connection), then each server, the order flipped every round. Prints per case the medians
of COMPARE_REQUESTS rounds (default 25): the limit, each server's time and its ratio to the
limit (paired: the median of the per-round ratios), and each server's ``timing_ms`` split.
Uses bench/run.py's data (BENCH_ROWS, built by ``make bench`` or run.py) and, like it,
only the HTTP contract; each answer is checked against the limit first (runner.check_case).
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
from pathlib import Path

import httpx
import orjson

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import cases as suite_mod  # noqa: E402
import run as bench  # noqa: E402
import runner  # noqa: E402

REQUESTS = int(os.environ.get("COMPARE_REQUESTS", "25"))


def main() -> int:
    if len(sys.argv) < 2:
        raise SystemExit(__doc__)
    trees = {"other": Path(sys.argv[1]).resolve(), "this": HERE.parent}
    names = (sys.argv[2] if len(sys.argv) > 2 else "hourly,top_n,stacked,histogram").split(",")
    suite = {c.name: c for c in suite_mod.suite()}
    db, walk = bench.build_data()
    cfg = bench.write_config(db, walk)
    procs: dict[str, subprocess.Popen] = {}
    clients: dict[str, httpx.Client] = {}
    try:
        for i, (label, root) in enumerate(trees.items()):
            port = bench.PORT + i
            bench.port_free(port)
            procs[label] = subprocess.Popen(
                [sys.executable, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1",
                 "--port", str(port), "--log-level", "warning", "--no-access-log"],
                cwd=str(root), env=dict(os.environ, SLUICE_CONFIG=str(cfg)),
                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            bench.wait_port(port, procs[label])
            clients[label] = httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=600)
        con = {"deliveries": runner.reference_connection(db), "walk": runner.reference_connection(walk)}
        for name in names:
            case = suite[name]
            for label, client in clients.items():
                chk = runner.check_case(case, client, con[case.table])
                if not chk.ok:
                    raise SystemExit(f"{name} ({label}): {chk.error or chk.diff}")
            meta = chk.meta
            body = orjson.dumps(case.body(0))
            ms: dict[str, list[float]] = {"limit": [], **{k: [] for k in clients}}
            split: dict[str, list[dict[str, float]]] = {k: [] for k in clients}
            for rnd in range(REQUESTS):
                order = ["limit", *clients]
                for path in order if rnd % 2 else order[::-1]:
                    if path == "limit":
                        took, _ = runner.timed(lambda: con[case.table].sql(case.sql(meta)).to_arrow_table())
                    else:
                        took, r = runner.timed(lambda: runner.post_chart(clients[path], body))
                    ms[path].append(took)
                    if path != "limit":
                        assert r.status_code == 200, r.text[:300]
                        split[path].append(r.json()["timing_ms"])
            line = [f"{name}: limit {statistics.median(ms['limit']):.1f} ms"]
            for label in clients:
                t = ms[label]
                paired = statistics.median(a / b for a, b in zip(t, ms["limit"]))
                parts = {k: round(statistics.median(s[k] for s in split[label]), 2)
                         for k in split[label][0]}
                line.append(f"{label} {statistics.median(t):.1f} ms "
                            f"({statistics.median(t) / statistics.median(ms['limit']):.3f}x, "
                            f"paired {paired:.3f}x) timing_ms {parts}")
            print(" | ".join(line), flush=True)
    finally:
        for client in clients.values():
            client.close()
        for proc in procs.values():
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
