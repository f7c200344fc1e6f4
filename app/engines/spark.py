"""Spark SQL engine: pyspark in local mode (one SparkSession per process) or a Spark Connect
server (``dsn = "sc://host:15002"``, any Spark Connect URL: ``/;token=...;use_ssl=true``).

The source is a catalog table (``table = "db.name"``) or, with ``path``, a Parquet file or
folder registered as a temporary view named ``table`` (over Spark Connect the *server* reads
the path, so it must be one the server can see). Read-only: the engine only ever runs one
query statement (``_check_read_only``: parsed with sqlglot, a single SELECT / set
operation / VALUES with no DDL, DML or command anywhere in it; anything else is refused
before it reaches Spark) and never writes; Spark itself has no read-only session, so give
the service storage credentials that can only read. The session time zone is UTC (the SQL
relies on it). Options: ``master`` (default ``local[2]``), ``shuffle_partitions`` (default
2), ``statement_timeout_ms`` and, under ``[sources.NAME.options]``, ``java_options`` for the
local driver JVM, a ``spark_conf`` table of Spark settings (the test suite turns adaptive
execution and whole-stage code generation off: they cost more than they save on small local
data) and, for Spark Connect, ``connect_retries`` (default 2) and ``cancel_grace_ms``
(default 5000, see below).

Statement timeouts (``app.limits`` fires ``canceller()`` from a timer thread): every
statement carries its own tag (Spark Connect: ``addTag`` / ``interruptTag``, which the
server turns into a cancel of that operation's jobs; local mode: a job group and
``cancelJobGroup``), so only the late statement is stopped. Over Spark Connect the call runs
on a worker thread: when a cancel is not answered within ``cancel_grace_ms`` (the server is
frozen or gone) the statement is abandoned and the source answers 503, and the session is
rebuilt on the next request (a restarted server has new session ids and no temporary
views). gRPC retries are cut to ``connect_retries`` short attempts so a dead server is a 503
within about a second, not after pyspark's default ten-minute retry budget.
"""

from __future__ import annotations

import os
import threading
import time
import uuid
import warnings
from concurrent.futures import ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from pathlib import Path
from typing import Any, Callable

import pyarrow as pa
import sqlglot
from sqlglot import exp

from app import deadline
from app.engines.base import EngineBase, EngineError, EngineUnavailable
from app.settings import SourceConfig

_SESSION: Any = None
_SESSION_LOCK = threading.Lock()

#: statement kinds that may reach Spark: queries only
_QUERY_ROOTS = (exp.Select, exp.Union, exp.Intersect, exp.Except, exp.Values, exp.Subquery)
#: nodes that write, define or change anything (DDL, DML, commands, SET, CACHE, ...)
_WRITE_NODES = tuple(getattr(exp, n) for n in (
    "Insert", "Update", "Delete", "Merge", "Create", "Drop", "Alter", "AlterColumn", "Command",
    "Set", "Cache", "Uncache", "Refresh", "Use", "Copy", "LoadData", "Transaction", "Commit",
    "Rollback", "TruncateTable", "Describe", "Pragma", "Analyze")
    if hasattr(exp, n))

#: words in a client error that mean the server is gone, frozen or restarted (503)
_DOWN_WORDS = ("unavailable", "failed to connect", "connection refused", "session_changed",
               "session_closed", "session not found", "deadline exceeded", "socket closed",
               "connection reset", "invalid_handle", "has restarted", "goaway", "rst_stream",
               "channel closed", "cannot connect", "retriesexceeded", "retries_exceeded")


def _check_read_only(source: str, sql: str) -> None:
    """One query statement, nothing that writes or changes state anywhere in it."""
    try:
        trees = [t for t in sqlglot.parse(sql, read="spark") if t is not None]
    except sqlglot.errors.ParseError:
        trees = []
    if len(trees) != 1 or not isinstance(trees[0], _QUERY_ROOTS) \
            or any(isinstance(n, _WRITE_NODES) for n in trees[0].walk()):
        raise EngineError(source, "the spark engine runs single query (SELECT) statements only")


def spark_session(master: str = "local[2]", shuffle_partitions: int = 2,
                  java_options: str | None = None, conf: dict[str, Any] | None = None):
    """The process's one local SparkSession, created on first use: the first local Spark
    source's settings (master, JVM options, conf) are the ones that count."""
    global _SESSION
    with _SESSION_LOCK:
        if _SESSION is None:
            from pyspark.sql import SparkSession

            b = (SparkSession.builder.appName("sluice").master(master)
                 .config("spark.ui.enabled", "false")
                 .config("spark.ui.showConsoleProgress", "false")
                 .config("spark.sql.shuffle.partitions", str(shuffle_partitions))
                 .config("spark.default.parallelism", str(shuffle_partitions))
                 .config("spark.driver.memory", "1g")
                 .config("spark.sql.execution.arrow.pyspark.enabled", "true"))
            if java_options:  # e.g. "-XX:TieredStopAtLevel=1" for short-lived local JVMs
                b = b.config("spark.driver.extraJavaOptions", java_options)
            for k, v in (conf or {}).items():
                b = b.config(str(k), _conf_value(v))
            b = b.config("spark.sql.session.timeZone", "UTC")
            _SESSION = b.getOrCreate()
            _SESSION.sparkContext.setLogLevel("ERROR")
        return _SESSION


def _conf_value(v: Any) -> str:
    return str(v).lower() if isinstance(v, bool) else str(v)


def connect_session(url: str, retries: int = 2, conf: dict[str, Any] | None = None):
    """A new Spark Connect session on ``url`` (one per source; a restarted server needs a
    new one). gRPC retries are short: a dead server must become a 503 quickly."""
    from pyspark.sql.connect.client.retries import DefaultPolicy
    from pyspark.sql.connect.session import SparkSession as RemoteSession

    had_flag = "SPARK_CONNECT_MODE_ENABLED" in os.environ
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)  # pyspark's pandas-version notice
        try:
            spark = RemoteSession.builder.remote(url).create()
        finally:
            # pyspark marks the whole process as "Connect only"; a local-mode source in the
            # same process must keep working, and the Connect session does not need the mark
            if not had_flag:
                os.environ.pop("SPARK_CONNECT_MODE_ENABLED", None)
    spark._client.set_retry_policies([DefaultPolicy(
        max_retries=max(0, int(retries)), initial_backoff=100, backoff_multiplier=2.0,
        max_backoff=400, jitter=50, min_jitter_threshold=10_000, max_server_retry_delay=1000)])
    for k, v in {**(conf or {}), "spark.sql.session.timeZone": "UTC"}.items():
        spark.conf.set(str(k), _conf_value(v))
    return spark


class SparkEngine(EngineBase):
    dialect = "spark"

    def __init__(self, cfg: SourceConfig) -> None:
        super().__init__(cfg)
        try:
            import pyspark  # noqa: F401
        except ImportError:
            raise EngineUnavailable(cfg.name, "the spark engine needs pyspark "
                                    "(pip install 'sluice-charts[engines]') and Java 17") from None
        self.remote = cfg.dsn if cfg.dsn and cfg.dsn.startswith("sc://") else None
        self._grace_s = int(cfg.options.get("cancel_grace_ms", 5000)) / 1000.0
        self.path = Path(cfg.path) if cfg.path else None
        self._local = threading.local()
        self._lock = threading.Lock()
        self._spark: Any = None
        self._pool: ThreadPoolExecutor | None = None
        if self.remote:
            self._pool = ThreadPoolExecutor(max_workers=int(cfg.options.get("max_concurrent", 8)) + 4,
                                            thread_name_prefix=f"spark-{cfg.name}")
        elif self.path is not None and not self.path.exists():
            raise EngineUnavailable(cfg.name, f"Parquet data {self.path} does not exist")
        self._session()  # open now: a server that is down is a 503 at the first request

    # ---- session ---------------------------------------------------------------------------
    def _session(self):
        spark = self._spark
        if spark is not None:
            return spark
        with self._lock:
            if self._spark is not None:
                return self._spark
            try:
                if self.remote:
                    spark = connect_session(self.remote, int(self.cfg.options.get("connect_retries", 2)),
                                            self.cfg.options.get("spark_conf"))
                else:
                    spark = spark_session(str(self.cfg.options.get("master", "local[2]")),
                                          int(self.cfg.options.get("shuffle_partitions", 2)),
                                          self.cfg.options.get("java_options"),
                                          self.cfg.options.get("spark_conf"))
                    spark.conf.set("spark.sql.session.timeZone", "UTC")
            except Exception as e:  # noqa: BLE001 - Java gateway / connect errors
                raise EngineUnavailable(self.cfg.name, f"cannot start Spark: {_first_line(e)}") from None
            if self.path is not None:
                try:
                    spark.read.parquet(str(self.path)).createOrReplaceTempView(self.cfg.table)
                except Exception as e:  # noqa: BLE001
                    if self.remote:
                        _stop_quietly(spark)
                    raise EngineUnavailable(self.cfg.name, f"cannot read {self.path}: "
                                            f"{_first_line(e)}") from None
            self._spark = spark
            return spark

    def _drop_session(self, spark: Any) -> None:
        """Forget a Connect session that failed on the wire: the next call builds a new one."""
        with self._lock:
            if self._spark is spark:
                self._spark = None
        threading.Thread(target=_stop_quietly, args=(spark,), daemon=True).start()

    @property
    def spark(self):
        return self._session()

    # ---- statements --------------------------------------------------------------------------
    def canceller(self) -> Callable[[], None]:
        """Stop the statement the calling thread runs next (its own tag / job group)."""
        tag = f"sluice-{uuid.uuid4().hex}"
        self._local.tag = tag
        if self.remote:
            spark = self._spark
            state = self._local.cancel = {"fired": threading.Event()}

            def interrupt() -> None:
                state["fired"].set()
                if spark is not None:  # may block on a frozen server: its own thread
                    threading.Thread(target=_quiet, args=(spark.interruptTag, tag), daemon=True).start()
            return interrupt
        sc = self.spark.sparkContext
        return lambda: sc.cancelJobGroup(tag)

    def check_read(self, sql: str) -> None:  # parsed, not matched: Spark has no read-only session
        _check_read_only(self.cfg.name, sql)

    def execute(self, sql: str) -> pa.Table:
        self.check_read(sql)
        tag = getattr(self._local, "tag", None)
        self._local.tag = None
        if self.remote:
            cancel = getattr(self._local, "cancel", None)
            self._local.cancel = None
            return self._remote(sql, tag, cancel)
        spark = self.spark
        sc = spark.sparkContext
        timer = None
        own = tag is None  # not guarded by app.limits: the engine's own time limit (0: none)
        if own:
            tag = f"sluice-{uuid.uuid4().hex}"
        sc.setJobGroup(tag, "sluice chart", interruptOnCancel=True)
        if own and self.timeout_s is not None:
            timer = deadline.after(self.timeout_s, sc.cancelJobGroup, tag)
        try:
            return spark.sql(sql).toArrow()
        except Exception as e:  # noqa: BLE001 - AnalysisException, Py4JJavaError, ...
            text = str(e).strip()
            msg = text.splitlines()[0] if text else type(e).__name__
            if "cancel" in text.lower() and timer is not None and timer.fired:
                raise self._timed_out() from None
            raise EngineError(self.cfg.name, f"Spark: {msg}") from None
        finally:
            if timer is not None:
                timer.cancel()

    def _remote(self, sql: str, tag: str | None, cancel: dict | None) -> pa.Table:
        spark = self._session()
        own_timer = None
        if tag is None:  # not guarded by app.limits: the engine's own time limit
            tag = f"sluice-{uuid.uuid4().hex}"
            cancel = {"fired": threading.Event()}
            ev = cancel["fired"]

            def fire() -> None:
                ev.set()
                _quiet(spark.interruptTag, tag)
            if self.timeout_s is not None:  # statement_timeout_ms = 0: no time limit
                own_timer = deadline.after(self.timeout_s, fire)

        def run() -> pa.Table:
            spark.addTag(tag)  # thread-local in the Connect client: this worker's calls only
            try:
                return _lazy_sql(spark, sql).toArrow()
            finally:
                spark.removeTag(tag)

        fut = self._pool.submit(run)
        try:
            fired = cancel["fired"] if cancel else threading.Event()
            give_up = None  # the cancel's deadline, once it has been sent
            while True:
                if give_up is None and fired.is_set():
                    give_up = time.monotonic() + self._grace_s
                wait = 0.05 if give_up is None else max(0.0, give_up - time.monotonic())
                try:
                    return fut.result(timeout=wait)
                except FutureTimeout:
                    if give_up is not None and time.monotonic() >= give_up:
                        # cancelled but no answer within the grace period: frozen or gone
                        self._drop_session(spark)
                        raise EngineUnavailable(
                            self.cfg.name, f"Spark Connect server did not answer a cancel within "
                            f"{self._grace_s:g} s (down or stalled)") from None
        except (EngineError, EngineUnavailable):
            raise
        except Exception as e:  # noqa: BLE001 - SparkConnectException, grpc errors, ...
            text = str(e).strip()
            msg = _first_line(e)
            if _is_down(e):
                self._drop_session(spark)
                raise EngineUnavailable(self.cfg.name, f"Spark Connect: {msg}") from None
            if "OPERATION_CANCELED" in text and own_timer is not None and cancel["fired"].is_set():
                raise self._timed_out() from None
            raise EngineError(self.cfg.name, f"Spark: {msg}") from None
        finally:
            if own_timer is not None:
                own_timer.cancel()

    def _timed_out(self) -> Exception:
        """The engine's own time limit (statements not guarded by app.limits, e.g. the
        catalog's row count) answers like app.limits' timeout: 504."""
        from app.limits import StatementTimeout

        return StatementTimeout(self.cfg.name, self.timeout_ms)

    def describe(self, table: tuple[str, ...]) -> list[tuple[str, str]]:
        spark = self._session()
        try:
            schema = spark.table(".".join(f"`{p}`" for p in table)).schema
        except Exception as e:  # noqa: BLE001 - table not found, or the server is gone
            if self.remote and _is_down(e):
                self._drop_session(spark)
                raise EngineUnavailable(self.cfg.name, f"Spark Connect: {_first_line(e)}") from None
            return []
        return [(f.name, f.dataType.simpleString()) for f in schema.fields]

    def data_version(self) -> str:
        if self.path is None or not self.path.exists():  # a catalog table or a server-side path
            return "catalog"
        files = [self.path] if self.path.is_file() else sorted(self.path.rglob("*.parquet"))
        parts = []
        for f in files:
            st = os.stat(f)
            parts.append(f"{st.st_size}:{st.st_mtime_ns}")
        return "|".join(parts)

    def close(self) -> None:
        if self.remote:  # the local SparkSession is shared by the process; Connect ones are ours
            spark, self._spark = self._spark, None
            if spark is not None:
                threading.Thread(target=_stop_quietly, args=(spark,), daemon=True).start()
            if self._pool is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)


def _lazy_sql(spark: Any, sql: str):
    """A Connect DataFrame over the query without ``spark.sql``'s eager round trip (which
    analyses the statement once more before ``toArrow`` runs it): one RPC per statement.
    Only queries get here (``_check_read_only``)."""
    try:
        from pyspark.sql.connect.dataframe import DataFrame
        from pyspark.sql.connect.plan import SQL
    except ImportError:  # pragma: no cover - another pyspark layout
        return spark.sql(sql)
    return DataFrame(SQL(sql), spark)


def _is_down(e: BaseException) -> bool:
    """A client error that means the server is gone, frozen or restarted (not the query)."""
    text = f"{type(e).__name__} {e}".lower()
    return any(w in text for w in _DOWN_WORDS) or "grpc" in type(e).__module__


def _first_line(e: BaseException) -> str:
    text = str(e).strip()
    return text.splitlines()[0] if text else type(e).__name__


def _quiet(fn: Callable, *args: Any) -> None:
    try:
        fn(*args)
    except Exception:  # noqa: BLE001 - best effort (the server may be gone)
        pass


def _stop_quietly(spark: Any) -> None:
    """End a Connect session: cancel whatever it still runs on the server (a frozen server
    gets this when it resumes, so an abandoned statement does not keep its cores), release
    the server-side session, close the channel. Called on a daemon thread where it may
    block; every step is best effort (short retries: a dead server fails them fast)."""
    client = spark._client
    _quiet(client.interrupt_all)
    _quiet(client.release_session)
    _quiet(client.close)
