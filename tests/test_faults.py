"""Faults: a warehouse that is down at start-up or goes down mid-run answers 503 problem+json
naming the source, and the service recovers by itself when it comes back; a missing or
corrupt DuckDB file is a clear 503 naming the file; shutdown (SIGTERM) drains a slow request
already running.

PostgreSQL here is a THROWAWAY cluster this test creates (initdb + pg_ctl on a free loopback
port in a temporary folder, run as the ``postgres`` OS user when the tests run as root); the
machine's shared server on 5432 is never touched.
"""

from __future__ import annotations

import contextlib
import glob
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
BODY = {"channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# =====================================================================================
# a throwaway PostgreSQL cluster
# =====================================================================================

class Cluster:
    def __init__(self, root: Path) -> None:
        bins = sorted(glob.glob("/usr/lib/postgresql/*/bin"))
        if not bins or not os.path.exists(os.path.join(bins[-1], "initdb")):
            pytest.skip("PostgreSQL server binaries (initdb, pg_ctl) are not installed")
        self.bin = bins[-1]
        self.root = root
        self.data = root / "data"
        self.port = _free_port()
        self.as_user: list[str] = []
        if os.geteuid() == 0:  # initdb refuses root: run the cluster as the postgres user
            if shutil.which("runuser") is None:
                pytest.skip("running as root without runuser: cannot start a throwaway cluster")
            self.as_user = ["runuser", "-u", "postgres", "--"]
            shutil.chown(root, "postgres")
            os.chmod(root, 0o700)
        self._run("initdb", "-D", str(self.data), "-A", "trust", "-U", "postgres", "--no-sync")

    def _run(self, tool: str, *args: str, check: bool = True) -> subprocess.CompletedProcess:
        return subprocess.run(self.as_user + [os.path.join(self.bin, tool), *args],
                              capture_output=True, text=True, check=check, timeout=120)

    @property
    def dsn(self) -> str:
        return f"postgresql://postgres@127.0.0.1:{self.port}/postgres"

    def start(self) -> None:
        self._run("pg_ctl", "-D", str(self.data), "-w", "-t", "60", "-l", str(self.root / "log"),
                  "-o", f"-p {self.port} -k {self.root} -c listen_addresses=127.0.0.1 -c fsync=off",
                  "start")

    def stop(self) -> None:
        self._run("pg_ctl", "-D", str(self.data), "-w", "-t", "60", "-m", "fast", "stop", check=False)


@pytest.fixture(scope="module")
def cluster():
    try:
        import psycopg  # noqa: F401
        from app.engines import postgres  # noqa: F401
    except ImportError as e:
        pytest.skip(f"postgres engine not available: {e}")
    import tempfile

    # (not under pytest's tmp dirs: those are root-only, the cluster runs as postgres)
    root = Path(tempfile.mkdtemp(prefix="sluice-pgfault-"))
    try:
        c = Cluster(root)
    except BaseException:
        shutil.rmtree(root, ignore_errors=True)
        raise
    c.start()
    try:
        import psycopg

        df = fx.frame()
        with psycopg.connect(c.dsn, autocommit=True) as con:
            con.execute("CREATE TABLE deliveries (id bigint, depot text)")
            with con.cursor() as cur:
                with cur.copy("COPY deliveries FROM STDIN") as cp:
                    for r in df.itertuples(index=False):
                        cp.write_row((int(r.id), r.depot))
        yield c
    finally:
        c.stop()
        shutil.rmtree(root, ignore_errors=True)


def _pg_client(cluster, tmp_path):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.warehouse]\nengine = "postgres"\ndsn = "{cluster.dsn}"\n'
                   'table = "deliveries"\nconnect_timeout_s = 2\n'
                   "[server]\nrequest_log = false\n[cache]\nenabled = false\n")
    return TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False)


def _chart(c):
    return c.post("/v1/chart", json={"source": "warehouse", **BODY})


def _assert_unavailable(r, source):
    assert r.status_code == 503, (r.status_code, r.text[:400])
    assert r.headers["content-type"].startswith("application/problem+json")
    p = r.json()
    assert p.get("source") == source and source in p["detail"], p
    assert "retry-after" in r.headers


def _until_ok(c, seconds=30.0):
    deadline = time.monotonic() + seconds
    r = None
    while time.monotonic() < deadline:
        r = _chart(c)
        if r.status_code == 200:
            return r
        assert r.status_code == 503, (r.status_code, r.text[:300])  # never a 500 meanwhile
        time.sleep(0.3)
    raise AssertionError(f"no recovery within {seconds} s: {r.status_code if r else None}")


def test_warehouse_down_at_startup_then_up(cluster, tmp_path):
    cluster.stop()
    try:
        with _pg_client(cluster, tmp_path) as c:  # the service starts without its warehouse
            assert c.get("/healthz").status_code == 200
            _assert_unavailable(_chart(c), "warehouse")
            assert c.get("/readyz").status_code == 503
            cluster.start()
            r = _until_ok(c)
            assert r.json()["stats"]["source_rows"] == fx.N
            assert c.get("/readyz").status_code == 200
    finally:
        cluster.start() if not _port_open(cluster.port) else None


def test_warehouse_down_mid_run_then_back(cluster, tmp_path):
    with _pg_client(cluster, tmp_path) as c:
        assert _chart(c).status_code == 200
        cluster.stop()
        try:
            for _ in range(3):  # every answer while it is down: 503 naming the source
                _assert_unavailable(_chart(c), "warehouse")
            assert c.get("/healthz").status_code == 200  # the service itself stays up
        finally:
            cluster.start()
        r = _until_ok(c)
        assert r.json()["data"]["count"] and sum(r.json()["data"]["count"]) == fx.N


# =====================================================================================
# a frozen warehouse (SIGSTOP: what a network black hole looks like to the client)
# =====================================================================================

def _cluster_pids(cluster) -> list[int]:
    """The postmaster (first line of postmaster.pid) and every process it forked."""
    pid = int((cluster.data / "postmaster.pid").read_text().split()[0])
    out = [pid]
    for p in os.listdir("/proc"):
        if p.isdigit():
            try:
                stat = Path(f"/proc/{p}/stat").read_text()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == pid:  # field 4: ppid (proc(5))
                out.append(int(p))
    return out


@contextlib.contextmanager
def _frozen(cluster):
    pids = _cluster_pids(cluster)
    for p in pids:
        os.kill(p, signal.SIGSTOP)
    try:
        yield
    finally:
        for p in pids:
            try:
                os.kill(p, signal.SIGCONT)
            except ProcessLookupError:
                pass


FROZEN_TIMEOUT_MS = 1500
SLACK_S = 1.5  # scheduling on 2 shared cores + the engine's GRACE_S (0.5 s)


def _frozen_config(cluster, tmp_path, timeout_ms=FROZEN_TIMEOUT_MS) -> Path:
    cfg = tmp_path / "frozen.toml"
    cfg.write_text(f'[sources.warehouse]\nengine = "postgres"\ndsn = "{cluster.dsn}"\n'
                   f'table = "deliveries"\nconnect_timeout_s = 2\nstatement_timeout_ms = {timeout_ms}\n'
                   "[server]\nrequest_log = false\nready_timeout_s = 1.0\n[cache]\nenabled = false\n")
    return cfg


def test_frozen_warehouse_answers_on_time_and_recovers(cluster, tmp_path):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = _frozen_config(cluster, tmp_path)
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        assert _chart(c).status_code == 200  # warm: the pool holds a live connection
        with _frozen(cluster):
            timings = {}
            for what, call in (("chart", lambda: _chart(c)),
                               ("chart again", lambda: _chart(c)),
                               ("source", lambda: c.get("/v1/sources/warehouse")),
                               ("readyz", lambda: c.get("/readyz")),
                               ("healthz", lambda: c.get("/healthz"))):
                t0 = time.monotonic()
                r = call()
                timings[what] = (r.status_code, round(time.monotonic() - t0, 2))
                if what == "healthz":
                    assert r.status_code == 200
                    continue
                assert r.status_code in (503, 504), (what, r.status_code, r.text[:300])
                assert r.headers["content-type"].startswith("application/problem+json") or what == "readyz"
            print(f"frozen PostgreSQL, statement_timeout_ms {FROZEN_TIMEOUT_MS}: {timings}")
            budget = FROZEN_TIMEOUT_MS / 1000.0 + SLACK_S
            assert all(timings[w][1] < budget for w in ("chart", "chart again", "source")), timings
            assert timings["readyz"][1] < 1.0 + SLACK_S, timings
            assert timings["healthz"][1] < 0.5, timings
        r = _until_ok(c)  # SIGCONT: the pool replaces the dropped connections by itself
        assert sum(r.json()["data"]["count"]) == fx.N


def test_sigterm_is_bounded_with_a_frozen_warehouse(cluster, tmp_path):
    """A chart blocked on a frozen warehouse (its own deadline 60 s away) does not hold the
    shutdown: past shutdown_timeout_s the request is cut (503) and the process exits."""
    cfg = _frozen_config(cluster, tmp_path, timeout_ms=60_000)
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", "--config", str(cfg),
                             "--port", str(port), "--shutdown-timeout-s", "1"],
                            cwd=Path(__file__).resolve().parents[1], env=dict(os.environ),
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}/v1/chart"
    body = json.dumps({"source": "warehouse", **BODY}).encode()

    def post():
        req = urllib.request.Request(url, data=body, headers={"content-type": "application/json"})
        try:
            with urllib.request.urlopen(req, timeout=90) as resp:
                return resp.status
        except urllib.error.HTTPError as e:
            return e.code
        except Exception as e:  # noqa: BLE001 - recorded, asserted below
            return repr(e)

    try:
        deadline = time.monotonic() + 60
        while not _port_open(port):
            assert proc.poll() is None, proc.stdout.read().decode()[-2000:]
            assert time.monotonic() < deadline, "sluice serve did not start"
            time.sleep(0.2)
        assert post() == 200
        result = {}
        with _frozen(cluster):
            t = threading.Thread(target=lambda: result.update(status=post()))
            t.start()
            time.sleep(0.7)
            assert "status" not in result  # blocked on the frozen server
            t0 = time.monotonic()
            proc.send_signal(signal.SIGTERM)
            code = proc.wait(30)
            took = time.monotonic() - t0
            t.join(30)
        print(f"SIGTERM with a frozen warehouse: exited after {took:.2f} s, the cut request "
              f"answered {result.get('status')}")
        assert code in (0, -signal.SIGTERM), proc.stdout.read().decode()[-2000:]
        assert took < 1.0 + 4.0, took  # shutdown_timeout_s + closing the engines + slack
        assert result.get("status") == 503, result
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)


def _port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.5)
        return s.connect_ex(("127.0.0.1", port)) == 0


# =====================================================================================
# DuckDB files
# =====================================================================================

def _duck_client(tmp_path, path: Path):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    cfg = tmp_path / "sluice.toml"
    cfg.write_text(fx.config(path) + "[server]\nrequest_log = false\n")
    return TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False)


def test_missing_duckdb_file_is_a_clear_503_and_recovers(tmp_path):
    path = tmp_path / "later.duckdb"
    with _duck_client(tmp_path, path) as c:
        r = _chart_duck(c)
        _assert_unavailable(r, "deliveries")
        assert str(path) in r.json()["detail"] and "does not exist" in r.json()["detail"]
        assert c.get("/readyz").status_code == 503
        fx.build_duckdb(path)  # the file appears: the next request works
        assert _chart_duck(c).status_code == 200


@pytest.mark.parametrize("content", [b"", b"not a database at all" * 100, b"\x00" * 8192,
                                     b"DUCK" + os.urandom(20000)])
def test_corrupt_duckdb_file_is_a_clear_503(tmp_path, content):
    path = tmp_path / "corrupt.duckdb"
    path.write_bytes(content)
    with _duck_client(tmp_path, path) as c:
        r = _chart_duck(c)
        _assert_unavailable(r, "deliveries")
        assert str(path) in r.json()["detail"]
        assert c.get("/healthz").status_code == 200


def _chart_duck(c):
    return c.post("/v1/chart", json={"source": "deliveries", **BODY})


# =====================================================================================
# graceful shutdown
# =====================================================================================

def test_sigterm_drains_a_slow_request(tmp_path):
    import duckdb

    db = tmp_path / "slow.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE n AS SELECT range AS i FROM range(5000)")  # seconds of work
    con.execute("CREATE VIEW slow AS SELECT (x.i * 7 + y.i) % 1000 AS a, x.i * y.i AS b FROM n x, n y")
    con.close()
    cfg = tmp_path / "sluice.toml"
    cfg.write_text(f'[sources.slow]\nengine = "duckdb"\npath = "{db}"\ntable = "slow"\nthreads = 1\n'
                   "statement_timeout_ms = 120000\n[server]\nrequest_log = false\n"
                   "[cache]\nenabled = false\n")
    port = _free_port()
    env = {**os.environ, "SLUICE_CONFIG": str(cfg)}
    proc = subprocess.Popen([sys.executable, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1",
                             "--port", str(port)], cwd=Path(__file__).resolve().parents[1], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 60
        while not _port_open(port):
            assert proc.poll() is None, proc.stdout.read().decode()[-2000:]
            assert time.monotonic() < deadline, "uvicorn did not start"
            time.sleep(0.2)
        result: dict = {}

        def slow():
            body = json.dumps({"source": "slow", "channels": {"x": {"column": "a"},
                                                              "y": {"agg": "count_distinct", "column": "b"}}})
            req = urllib.request.Request(f"http://127.0.0.1:{port}/v1/chart", data=body.encode(),
                                         headers={"content-type": "application/json"})
            t0 = time.monotonic()
            try:
                with urllib.request.urlopen(req, timeout=120) as resp:
                    result["status"] = resp.status
                    result["body"] = json.loads(resp.read())
            except Exception as e:  # noqa: BLE001 - recorded, asserted below
                result["error"] = repr(e)
            result["seconds"] = time.monotonic() - t0

        t = threading.Thread(target=slow)
        t.start()
        time.sleep(0.7)  # the request is in flight (the query takes seconds)
        assert "status" not in result and "error" not in result, result
        proc.send_signal(signal.SIGTERM)
        t.join(150)
        assert result.get("status") == 200, result
        assert len(result["body"]["data"]["a"]) == 1000
        # then the server exits by itself (recent uvicorn re-raises the signal it handled,
        # so the status is SIGTERM's, -15, after the graceful shutdown)
        assert proc.wait(60) in (0, -signal.SIGTERM)
        out = proc.stdout.read().decode()
        assert "Finished server process" in out or "Shutting down" in out, out[-1500:]
        assert not _port_open(port)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)


# =====================================================================================
# MariaDB behind a network black hole (a loopback proxy that stops forwarding)
# =====================================================================================

class FreezableProxy:
    """TCP proxy 127.0.0.1:<port> -> ``upstream``; ``frozen`` holds every byte in both
    directions (connections stay open, nothing arrives: a black hole, not a refusal)."""

    def __init__(self, upstream: tuple[str, int]) -> None:
        self.upstream = upstream
        self.frozen = threading.Event()
        self.sock = socket.socket()
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(64)
        self.port = self.sock.getsockname()[1]
        self.closed = False
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while not self.closed:
            try:
                client, _ = self.sock.accept()
            except OSError:
                return
            try:
                server = socket.create_connection(self.upstream, timeout=5)
                server.settimeout(None)
            except OSError:
                client.close()
                continue
            for a, b in ((client, server), (server, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    def _pump(self, src: socket.socket, dst: socket.socket) -> None:
        try:
            while True:
                data = src.recv(65536)
                if not data:
                    break
                while self.frozen.is_set() and not self.closed:
                    time.sleep(0.05)
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                try:
                    s.close()
                except OSError:
                    pass

    def close(self) -> None:
        self.closed = True
        self.sock.close()


def test_mariadb_behind_a_black_hole_answers_on_time_and_recovers(tmp_path):
    pymysql = pytest.importorskip("pymysql")
    try:
        con = pymysql.connect(host="127.0.0.1", port=3306, user="root", password="",
                              database="test", connect_timeout=3)
    except pymysql.Error as e:
        pytest.skip(f"MariaDB is not reachable on 127.0.0.1:3306: {e}")
    table = "sluice_freeze_" + "".join(ch if ch.isalnum() else "_" for ch in
                                        os.environ.get("PYTEST_XDIST_WORKER", "main")) + f"_{os.getpid()}"
    df = fx.frame()
    with con.cursor() as cur:
        cur.execute(f"DROP TABLE IF EXISTS {table}")
        cur.execute(f"CREATE TABLE {table} (id BIGINT, depot VARCHAR(32))")
        cur.executemany(f"INSERT INTO {table} VALUES (%s, %s)",
                        [(int(r.id), r.depot) for r in df.itertuples(index=False)])
    con.commit()
    proxy = FreezableProxy(("127.0.0.1", 3306))
    try:
        from fastapi.testclient import TestClient

        from app.main import create_app
        from app.settings import load_settings

        cfg = tmp_path / "my.toml"
        cfg.write_text(f'[sources.warehouse]\nengine = "mysql"\n'
                       f'dsn = "mysql://root@127.0.0.1:{proxy.port}/test"\ntable = "test.{table}"\n'
                       f"connect_timeout_s = 2\nstatement_timeout_ms = {FROZEN_TIMEOUT_MS}\n"
                       "[server]\nrequest_log = false\nready_timeout_s = 1.0\n[cache]\nenabled = false\n")
        with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
            r = _chart(c)
            assert r.status_code == 200, r.text
            # reference: pandas value_counts of the rows inserted above
            assert sum(r.json()["data"]["count"]) == fx.N
            proxy.frozen.set()
            timings = {}
            for what, call in (("chart", lambda: _chart(c)), ("chart again", lambda: _chart(c)),
                               ("source", lambda: c.get("/v1/sources/warehouse")),
                               ("readyz", lambda: c.get("/readyz"))):
                t0 = time.monotonic()
                r = call()
                timings[what] = (r.status_code, round(time.monotonic() - t0, 2))
                assert r.status_code in (503, 504), (what, r.status_code, r.text[:300])
            print(f"MariaDB behind a black hole, statement_timeout_ms {FROZEN_TIMEOUT_MS}: {timings}")
            budget = FROZEN_TIMEOUT_MS / 1000.0 + SLACK_S
            assert all(timings[w][1] < budget for w in ("chart", "chart again", "source")), timings
            assert timings["readyz"][1] < 1.0 + SLACK_S, timings
            proxy.frozen.clear()
            r = _until_ok(c)
            assert sum(r.json()["data"]["count"]) == fx.N
    finally:
        proxy.close()
        with con.cursor() as cur:
            cur.execute(f"DROP TABLE IF EXISTS {table}")
        con.close()
