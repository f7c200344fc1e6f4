"""Spark SQL engine: pyspark in local mode (one SparkSession per process) or a Spark Connect
server (``dsn = "sc://host:15002"``).

The source is a catalog table (``table = "db.name"``) or, with ``path``, a Parquet file or
folder registered as a temporary view named ``table``. Read-only: the engine only ever runs
single SELECT / WITH statements (anything else is refused before it reaches Spark) and
never writes. The session time zone is UTC (the SQL relies on it). Options: ``master``
(default ``local[2]``), ``shuffle_partitions`` (default 2), ``statement_timeout_ms`` and,
under ``[sources.NAME.options]``, ``java_options`` for the local driver JVM and a
``spark_conf`` table of Spark settings (the test suite turns adaptive execution and
whole-stage code generation off: they cost more than they save on small local data).
"""

from __future__ import annotations

import os
import re
import threading
from pathlib import Path
from typing import Any

import pyarrow as pa

from app.engines.base import EngineBase, EngineError, EngineUnavailable
from app.settings import SourceConfig

_SESSION: Any = None
_SESSION_LOCK = threading.Lock()
_READ = re.compile(r"^\s*(SELECT|WITH)\b", re.IGNORECASE)


def spark_session(master: str = "local[2]", shuffle_partitions: int = 2, remote: str | None = None,
                  java_options: str | None = None, conf: dict[str, Any] | None = None):
    """The process's one SparkSession, created on first use: the first Spark source's
    settings (master, remote, JVM options, conf) are the ones that count."""
    global _SESSION
    with _SESSION_LOCK:
        if _SESSION is None:
            from pyspark.sql import SparkSession

            b = SparkSession.builder.appName("sluice")
            if remote:
                b = b.remote(remote)
            else:
                b = (b.master(master)
                     .config("spark.ui.enabled", "false")
                     .config("spark.ui.showConsoleProgress", "false")
                     .config("spark.sql.shuffle.partitions", str(shuffle_partitions))
                     .config("spark.default.parallelism", str(shuffle_partitions))
                     .config("spark.driver.memory", "1g")
                     .config("spark.sql.execution.arrow.pyspark.enabled", "true"))
                if java_options:  # e.g. "-XX:TieredStopAtLevel=1" for short-lived local JVMs
                    b = b.config("spark.driver.extraJavaOptions", java_options)
            for k, v in (conf or {}).items():
                b = b.config(str(k), str(v).lower() if isinstance(v, bool) else str(v))
            b = b.config("spark.sql.session.timeZone", "UTC")
            _SESSION = b.getOrCreate()
            if not remote:
                _SESSION.sparkContext.setLogLevel("ERROR")
        return _SESSION


class SparkEngine(EngineBase):
    dialect = "spark"

    def __init__(self, cfg: SourceConfig) -> None:
        self.cfg = cfg
        try:
            import pyspark  # noqa: F401
        except ImportError:
            raise EngineUnavailable(cfg.name, "the spark engine needs pyspark "
                                    "(pip install 'sluice-charts[engines]') and Java 17") from None
        remote = cfg.dsn if cfg.dsn and cfg.dsn.startswith("sc://") else None
        try:
            self.spark = spark_session(str(cfg.options.get("master", "local[2]")),
                                       int(cfg.options.get("shuffle_partitions", 2)), remote,
                                       cfg.options.get("java_options"),
                                       cfg.options.get("spark_conf"))
            self.spark.conf.set("spark.sql.session.timeZone", "UTC")
        except Exception as e:  # noqa: BLE001 - Java gateway / connect errors
            raise EngineUnavailable(cfg.name, f"cannot start Spark: {e}") from None
        self._timeout_s = int(cfg.options.get("statement_timeout_ms", 30_000)) / 1000.0
        self.path = Path(cfg.path) if cfg.path else None
        if self.path is not None:
            if not self.path.exists():
                raise EngineUnavailable(cfg.name, f"Parquet data {self.path} does not exist")
            try:
                self.spark.read.parquet(str(self.path)).createOrReplaceTempView(cfg.table)
            except Exception as e:  # noqa: BLE001
                raise EngineUnavailable(cfg.name, f"cannot read {self.path}: {e}") from None

    def _df(self, sql: str):
        if not _READ.match(sql) or ";" in sql.rstrip().rstrip(";"):
            raise EngineError(self.cfg.name, "the spark engine runs single SELECT statements only")
        return self.spark.sql(sql)

    def execute(self, sql: str) -> pa.Table:
        timer = None
        sc = None if self.cfg.dsn else self.spark.sparkContext
        if sc is not None:  # statement time limit: cancel this thread's job group
            group = f"sluice-{threading.get_ident()}-{id(sql)}"
            sc.setJobGroup(group, "sluice chart", interruptOnCancel=True)
            timer = threading.Timer(self._timeout_s, sc.cancelJobGroup, args=(group,))
            timer.daemon = True
            timer.start()
        try:
            df = self._df(sql)
            return df.toArrow()
        except EngineError:
            raise
        except Exception as e:  # noqa: BLE001 - AnalysisException, Py4JJavaError, ...
            text = str(e).strip()
            msg = text.splitlines()[0] if text else type(e).__name__
            if "cancel" in text.lower() and timer is not None and not timer.is_alive():
                msg = f"statement exceeded {self._timeout_s:g} s and was cancelled"
            raise EngineError(self.cfg.name, f"Spark: {msg}") from None
        finally:
            if timer is not None:
                timer.cancel()


    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        try:
            schema = self.spark.table(".".join(f"`{p}`" for p in table)).schema
        except Exception:  # noqa: BLE001 - table not found
            return []
        return [(f.name, f.dataType.simpleString()) for f in schema.fields]

    def data_version(self) -> str:
        if self.path is None:
            return "catalog"
        files = [self.path] if self.path.is_file() else sorted(self.path.rglob("*.parquet"))
        parts = []
        for f in files:
            st = os.stat(f)
            parts.append(f"{st.st_size}:{st.st_mtime_ns}")
        return "|".join(parts)

    def close(self) -> None:
        pass  # the SparkSession is shared by the process
