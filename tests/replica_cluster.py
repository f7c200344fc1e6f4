"""Several sluice replicas on loopback ports (subprocesses of uvicorn, one config), a
throwaway Redis, and the helpers the replica tests and ``bench/replicas.py`` share.

The replicas are real processes: ``python -m uvicorn app.main:app`` with ``SLUICE_CONFIG``
pointing at one TOML file, each on its own free 127.0.0.1 port. Engine executions are read
from each replica's ``/metrics``: ``sluice_engine_duration_seconds_count{source=...}`` counts
the charts that ran on the engine (cache hits, local or shared, do not).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.3)
        return s.connect_ex(("127.0.0.1", port)) == 0


def make_duckdb(path: Path, rows: int) -> None:
    """A deterministic table ``t(id, k, x, grp)``: k has 5000 values, x 100,000 (hash-spread)."""
    import duckdb

    con = duckdb.connect(str(path))
    con.execute(f"""CREATE TABLE t AS SELECT i AS id, CAST(hash(i) % 5000 AS INTEGER) AS k,
        CAST(hash(i * 7 + 1) % 100000 AS DOUBLE) / 100.0 AS x,
        ['north', 'south', 'east', 'west'][(i % 4) + 1] AS grp FROM range({int(rows)}) r(i)""")
    con.close()


def write_config(path: Path, db: Path, redis_url: str | None, **cache: object) -> Path:
    lines = ["[sources.s]", 'engine = "duckdb"', f'path = "{db}"', 'table = "t"',
             "[sources.s.options]", "threads = 1", "", "[cache]", "enabled = true"]
    if redis_url:
        lines.append(f'url = "{redis_url}"')
    for k, v in cache.items():
        lines.append(f"{k} = {v}")
    path.write_text("\n".join(lines) + "\n")
    return path


class Replicas:
    def __init__(self, config: Path, n: int, root: Path) -> None:
        self.config, self.root = config, root
        self.ports = [free_port() for _ in range(n)]
        self.procs: list[subprocess.Popen | None] = [None] * n

    def start(self, wait_s: float = 60.0) -> "Replicas":
        env = dict(os.environ, SLUICE_CONFIG=str(self.config),
                   PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        for i, port in enumerate(self.ports):
            log = open(self.root / f"replica{i}.log", "ab")
            self.procs[i] = subprocess.Popen(
                [sys.executable, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1",
                 "--port", str(port), "--workers", "1"],
                stdout=log, stderr=subprocess.STDOUT, env=env, cwd=self.root)
            log.close()
        deadline = time.monotonic() + wait_s
        for i, port in enumerate(self.ports):
            while True:
                if self.procs[i].poll() is not None:
                    raise RuntimeError(f"replica {i} exited: {self.log(i)[-2000:]}")
                try:
                    if get(port, "/healthz")[0] == 200:
                        break
                except OSError:
                    pass
                if time.monotonic() > deadline:
                    raise RuntimeError(f"replica {i} did not start: {self.log(i)[-2000:]}")
                time.sleep(0.2)
        return self

    def log(self, i: int) -> str:
        return (self.root / f"replica{i}.log").read_text(errors="replace")

    def kill(self, i: int) -> None:
        p = self.procs[i]
        if p is not None and p.poll() is None:
            p.send_signal(signal.SIGKILL)
            p.wait(timeout=10)
        self.procs[i] = None

    def stop(self) -> None:
        for i, p in enumerate(self.procs):
            if p is not None and p.poll() is None:
                p.send_signal(signal.SIGTERM)
        for i, p in enumerate(self.procs):
            if p is not None:
                try:
                    p.wait(timeout=15)
                except subprocess.TimeoutExpired:
                    self.kill(i)
        self.procs = [None] * len(self.procs)

    def alive(self) -> list[int]:
        return [i for i, p in enumerate(self.procs) if p is not None and p.poll() is None]

    def executions(self, source: str = "s") -> int:
        """Charts that ran on the engine, summed over the live replicas."""
        return sum(metric(p, "sluice_engine_duration_seconds_count", source=source)
                   for i, p in enumerate(self.ports) if i in self.alive())

    def events(self, event: str) -> int:
        return sum(metric(p, "sluice_cache_events_total", event=event)
                   for i, p in enumerate(self.ports) if i in self.alive())


def get(port: int, path: str, timeout: float = 10.0) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=timeout) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.read()


def post(port: int, body: dict, timeout: float = 60.0) -> tuple[int, dict]:
    req = urllib.request.Request(f"http://127.0.0.1:{port}/v1/chart", data=json.dumps(body).encode(),
                                 headers={"Content-Type": "application/json"})
    try:
        with urllib.request.urlopen(req, timeout=timeout) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as e:
        return e.code, json.loads(e.read() or b"{}")


def metric(port: int, name: str, **labels: str) -> int:
    """Sum of the samples of ``name`` whose labels include ``labels`` (Prometheus text)."""
    status, text = get(port, "/metrics")
    total = 0.0
    for line in text.decode().splitlines():
        if not line.startswith(name):
            continue
        m = re.match(r"^(\w+)(\{[^}]*\})?\s+(\S+)$", line)
        if not m or m.group(1) != name:
            continue
        got = dict(re.findall(r'(\w+)="([^"]*)"', m.group(2) or ""))
        if all(got.get(k) == v for k, v in labels.items()):
            total += float(m.group(3))
    return int(total)


class RedisServer:
    """A throwaway redis-server on a free loopback port (no persistence), ours to stop."""

    def __init__(self, root: Path, port: int | None = None) -> None:
        self.root, self.port = root, port or free_port()
        self.proc: subprocess.Popen | None = None

    @staticmethod
    def binary() -> str | None:
        return shutil.which("redis-server")

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> "RedisServer":
        self.proc = subprocess.Popen(
            [self.binary(), "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
             "--appendonly", "no", "--maxmemory", "64mb", "--maxmemory-policy", "allkeys-lru",
             "--dir", str(self.root)],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 10
        while not port_open(self.port):
            if time.monotonic() > deadline or self.proc.poll() is not None:
                raise RuntimeError("redis-server did not start")
            time.sleep(0.05)
        return self

    def freeze(self) -> None:
        """SIGSTOP: the port still accepts connections, nothing answers (a "slow" Redis)."""
        if self.proc is not None:
            self.proc.send_signal(signal.SIGSTOP)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(timeout=10)
        self.proc = None
