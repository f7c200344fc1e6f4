"""A Spark Connect server for the tests, started from the installed pyspark.

pyspark ships the server (``sbin/start-connect-server.sh`` and ``jars/spark-connect_*.jar``);
``--wait`` keeps it in the foreground, so the process group this module starts is the
server: SIGSTOP freezes it, SIGKILL kills it, and ``start()`` again brings it back on the
same port. Every listener is bound to 127.0.0.1 (gRPC, driver RPC, block manager; no UI).
Local master with two cores, small shuffles, UTC.
"""

from __future__ import annotations

import glob
import os
import signal
import socket
import subprocess
import time
from pathlib import Path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def pyspark_home() -> Path:
    import pyspark

    return Path(pyspark.__file__).parent


class ConnectServer:
    def __init__(self, root: Path, port: int | None = None) -> None:
        self.root = Path(root)
        self.port = port or free_port()
        self.proc: subprocess.Popen | None = None
        self.log = self.root / "connect-server.log"
        home = pyspark_home()
        self.script = home / "sbin" / "start-connect-server.sh"
        jars = sorted(glob.glob(str(home / "jars" / "spark-connect_*.jar")))
        self.jar = jars[-1] if jars else None

    @property
    def url(self) -> str:
        return f"sc://127.0.0.1:{self.port}"

    def available(self) -> str | None:
        """Why the server cannot start here, or None."""
        if not self.script.exists():
            return f"{self.script} is missing (pyspark without the Connect server)"
        if self.jar is None:
            return "pyspark ships no spark-connect jar"
        if not any(os.access(os.path.join(p, "java"), os.X_OK)
                   for p in os.environ.get("PATH", "").split(os.pathsep)) \
                and not os.environ.get("JAVA_HOME"):
            return "no java on PATH"
        return None

    def start(self, wait_s: float = 120.0) -> None:
        conf = {
            "spark.connect.grpc.binding.address": "127.0.0.1",
            "spark.connect.grpc.binding.port": str(self.port),
            "spark.driver.host": "127.0.0.1",
            "spark.driver.bindAddress": "127.0.0.1",
            "spark.ui.enabled": "false",
            "spark.sql.shuffle.partitions": "2",
            "spark.default.parallelism": "2",
            "spark.sql.session.timeZone": "UTC",
            "spark.sql.adaptive.enabled": "false",
            "spark.sql.codegen.wholeStage": "false",
            "spark.driver.memory": "1g",
            "spark.driver.extraJavaOptions": "-XX:TieredStopAtLevel=1 -XX:+UseSerialGC",
            "spark.sql.warehouse.dir": str(self.root / "warehouse"),
        }
        args = [str(self.script), "--wait", "--master", "local[2]", "--jars", self.jar]
        for k, v in conf.items():
            args += ["--conf", f"{k}={v}"]
        env = dict(os.environ, SPARK_LOG_DIR=str(self.root / "log"),
                   SPARK_PID_DIR=str(self.root / "pid"), SPARK_IDENT_STRING="sluice-test",
                   SPARK_LOCAL_IP="127.0.0.1")
        env.pop("SPARK_CONNECT_MODE_ENABLED", None)
        env.pop("SPARK_REMOTE", None)
        log = open(self.log, "ab")
        self.proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, env=env,
                                     cwd=self.root, start_new_session=True)
        log.close()
        deadline = time.monotonic() + wait_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"Spark Connect server exited: {self.tail()}")
            if "Spark Connect server started" in self.log.read_text(errors="replace") \
                    and self._port_open():
                return
            time.sleep(0.5)
        self.kill()
        raise RuntimeError(f"Spark Connect server did not start in {wait_s} s: {self.tail()}")

    def _port_open(self) -> bool:
        with socket.socket() as s:
            s.settimeout(0.5)
            return s.connect_ex(("127.0.0.1", self.port)) == 0

    def tail(self, n: int = 15) -> str:
        try:
            return "\n".join(self.log.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return ""

    def _signal(self, sig: int) -> None:
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, sig)  # our own process group (start_new_session)

    def freeze(self) -> None:
        self._signal(signal.SIGSTOP)

    def thaw(self) -> None:
        self._signal(signal.SIGCONT)

    def kill(self) -> None:
        if self.proc is None:
            return
        self._signal(signal.SIGCONT)
        self._signal(signal.SIGKILL)
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            pass
        self.proc = None
        deadline = time.monotonic() + 10
        while self._port_open() and time.monotonic() < deadline:
            time.sleep(0.2)

    def stop(self) -> None:
        if self.proc is None:
            return
        self._signal(signal.SIGCONT)
        self._signal(signal.SIGTERM)
        try:
            self.proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            pass
        self.kill()
