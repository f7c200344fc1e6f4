"""Arrow and JSON fidelity on every live engine, read by independent clients.

One small table -- a SMALLINT ``rating``, a DECIMAL(10,2) ``fee`` (values such as 0.10 + 0.20
whose double sum is not 0.30, and 12345678.91 whose double has no exact cents), instants at
Berlin quarter boundaries -- is loaded into DuckDB, PostgreSQL, MariaDB, SQLite and ClickHouse
(chdb; run in a subprocess because chdb allows one data folder per process). Spark is left
out here: a JVM start costs half a minute of a shared core; its decimals and widths come
through ``toArrow`` and the same ``conform`` step.

Each engine's answer (HTTP, through the real app) is read by

* pyarrow (schema types, field metadata),
* polars (``read_ipc_stream``: dtypes, exact decimals, the Berlin wall clock),
* the JavaScript Arrow library in Node (tests/js/decode_arrow.mjs: what a browser gets),
* the JSON answer parsed with ``parse_float=Decimal`` (the exact digits on the wire).

References: Python's ``decimal`` (exact min/max/sum of the inserted values), ``statistics``
for the mean, ``zoneinfo`` for the quarter starts in Europe/Berlin, and each engine's own
declared column types (SMALLINT -> 16-bit integers).
"""

from __future__ import annotations

import datetime as dt
import decimal
import json
import os
import shutil
import sqlite3
import statistics
import subprocess
import sys
import zoneinfo
from collections import defaultdict
from pathlib import Path

import pyarrow as pa
import pytest

REPO = Path(__file__).resolve().parents[1]
JS = Path(__file__).with_name("js")
ARROW = "application/vnd.apache.arrow.stream"
BERLIN = zoneinfo.ZoneInfo("Europe/Berlin")
UTC = dt.timezone.utc
D = decimal.Decimal
ENGINES = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse"]


def _worker() -> str:
    return os.environ.get("PYTEST_XDIST_WORKER", "main")


def make_rows() -> list[dict]:
    fees = [D("3.76"), D("0.10"), D("0.20"), D("12345678.91"), D("-4.05"), D("19.99"),
            D("0.01"), D("7.00"), D("2.67"), D("1.15")]
    instants = [dt.datetime(2025, 12, 31, 23, 30, tzinfo=UTC),   # 2026-01-01 00:30 Berlin: Q1
                dt.datetime(2026, 3, 31, 21, 59, tzinfo=UTC),    # 23:59 CEST: still Q1
                dt.datetime(2026, 3, 31, 22, 30, tzinfo=UTC),    # 2026-04-01 00:30 CEST: Q2
                dt.datetime(2026, 9, 30, 22, 0, tzinfo=UTC),     # 2026-10-01 00:00 CEST: Q4
                dt.datetime(2026, 12, 31, 22, 59, tzinfo=UTC),   # 23:59 CET: Q4
                dt.datetime(2026, 6, 15, 12, 0, tzinfo=UTC)]
    ratings = [1, 2, 3, 300, -7, 2, 3]
    rows = []
    for i in range(42):
        rows.append({"id": i, "rating": ratings[i % len(ratings)], "fee": fees[i % len(fees)],
                     "ts": instants[i % len(instants)] + dt.timedelta(seconds=i)})
    rows.append({"id": 99, "rating": None, "fee": None, "ts": None})
    return rows


# ---- loaders (each returns the source's config) ---------------------------------------------

def load(engine: str, root: Path, rows: list[dict]) -> dict:
    if engine == "duckdb":
        import duckdb

        path = root / "fid.duckdb"
        con = duckdb.connect(str(path))
        con.execute("CREATE TABLE t (id INTEGER, rating SMALLINT, fee DECIMAL(10,2), ts TIMESTAMPTZ)")
        con.executemany("INSERT INTO t VALUES (?, ?, ?, ?)",
                        [(r["id"], r["rating"], r["fee"], r["ts"]) for r in rows])
        con.close()
        return {"engine": "duckdb", "path": str(path), "table": "t"}
    if engine == "postgres":
        import psycopg

        dsn = "postgresql://postgres@127.0.0.1:5432/test"
        schema = f"sluice_fid_{_worker()}"
        with psycopg.connect(dsn, autocommit=True) as conn:
            conn.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
            conn.execute(f'CREATE SCHEMA "{schema}"')
            conn.execute(f'CREATE TABLE "{schema}".t (id integer, rating smallint, '
                         'fee numeric(10,2), ts timestamptz)')
            with conn.cursor() as cur:
                cur.executemany(f'INSERT INTO "{schema}".t VALUES (%s, %s, %s, %s)',
                                [(r["id"], r["rating"], r["fee"], r["ts"]) for r in rows])
        return {"engine": "postgres", "dsn": dsn, "table": f"{schema}.t"}
    if engine == "mysql":
        import pymysql
        from testmods import load as load_helper  # tests/ is on sys.path (pytest rootdir)

        load_helper("engine_fixtures").ensure_mysql_time_zones()  # CONVERT_TZ needs them
        name = f"sluice_fid_{_worker()}"
        conn = pymysql.connect(host="127.0.0.1", user="root", password="", database="test",
                               autocommit=True)
        with conn.cursor() as cur:
            cur.execute(f"DROP TABLE IF EXISTS `{name}`")
            cur.execute(f"CREATE TABLE `{name}` (id INT, rating SMALLINT, fee DECIMAL(10,2), "
                        "ts DATETIME(3))")  # naive UTC (the planner's MySQL convention)
            cur.executemany(f"INSERT INTO `{name}` VALUES (%s, %s, %s, %s)",
                            [(r["id"], r["rating"], r["fee"],
                              r["ts"].replace(tzinfo=None) if r["ts"] else None) for r in rows])
        conn.close()
        return {"engine": "mysql", "dsn": "mysql://root@127.0.0.1:3306/test",
                "table": f"test.{name}"}
    if engine == "sqlite":
        path = root / "fid.sqlite"
        conn = sqlite3.connect(path)
        # NUMERIC affinity: SQLite stores the decimals as doubles (its documented behaviour)
        conn.execute("CREATE TABLE t (id INTEGER, rating SMALLINT, fee DECIMAL(10,2), ts TIMESTAMP)")
        conn.executemany("INSERT INTO t VALUES (?, ?, ?, ?)", [
            (r["id"], r["rating"], None if r["fee"] is None else str(r["fee"]),
             None if r["ts"] is None else r["ts"].strftime("%Y-%m-%d %H:%M:%S.000"))
            for r in rows])
        conn.commit()
        conn.close()
        return {"engine": "sqlite", "path": str(path), "table": "t"}
    if engine == "clickhouse":
        from chdb import session as chs

        folder = root / "chdb"
        s = chs.Session(str(folder))
        s.query("CREATE DATABASE IF NOT EXISTS fid")
        s.query("CREATE TABLE fid.t (id Int32, rating Nullable(Int16), fee Nullable(Decimal(10, 2)), "
                "ts Nullable(DateTime64(3, 'UTC'))) ENGINE = MergeTree ORDER BY id")
        values = ", ".join(
            f"({r['id']}, {'NULL' if r['rating'] is None else r['rating']}, "
            f"{'NULL' if r['fee'] is None else repr(str(r['fee']))}, "
            f"{'NULL' if r['ts'] is None else repr(r['ts'].strftime('%Y-%m-%d %H:%M:%S'))})"
            for r in rows)
        s.query(f"INSERT INTO fid.t VALUES {values}")
        s.close()
        return {"engine": "clickhouse", "path": str(folder), "table": "fid.t"}
    raise AssertionError(engine)


REQUESTS = {
    "by_rating": {"x": {"column": "rating"}, "y": {"agg": "count"},
                  "size": {"agg": "min", "column": "fee"}, "color": {"agg": "max", "column": "fee"},
                  "opacity": {"agg": "sum", "column": "fee"}, "shape": {"agg": "avg", "column": "fee"}},
    "by_fee": {"x": {"column": "fee"}, "y": {"agg": "max", "column": "rating"}},
    "quarters": {"x": {"column": "ts", "trunc": "quarter", "tz": "Europe/Berlin"},
                 "y": {"agg": "count"}},
}
#: engines without time zone conversion (the capability table) chart the quarters in UTC
NO_TZ = {"sqlite"}


def zone_of(engine: str) -> str:
    return "UTC" if engine in NO_TZ else "Europe/Berlin"



def collect(engine: str, root: Path) -> dict[str, bytes]:
    """Load the rows, serve them through the real app, and keep each answer's bytes."""
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import parse_settings

    cfg = load(engine, root, make_rows())
    app = create_app(parse_settings({"sources": {"fid": cfg}, "cache": {"enabled": False}},
                                    "<fidelity>"))
    out = {}
    with TestClient(app) as client:
        for name, channels in REQUESTS.items():
            if name == "quarters" and engine in NO_TZ:
                channels = {**channels, "x": {"column": "ts", "trunc": "quarter"}}
            body = {"source": "fid", "channels": channels}
            for fmt, accept in (("arrow", ARROW), ("json", "application/json")):
                r = client.post("/v1/chart", json=body, headers={"accept": accept})
                assert r.status_code == 200, (engine, name, r.text)
                out[f"{name}.{fmt}"] = r.content
    return out


@pytest.fixture(scope="module", params=ENGINES)
def answers(request, tmp_path_factory):
    engine = request.param
    root = tmp_path_factory.mktemp(f"fid_{engine}")
    try:
        if engine == "clickhouse":  # chdb: one data folder per process -> its own process
            env = dict(os.environ, PYTHONPATH=str(REPO))
            subprocess.run([sys.executable, __file__, engine, str(root)], check=True, env=env,
                           cwd=REPO, timeout=300)
            got = {p.name: p.read_bytes() for p in (root / "out").iterdir()}
        else:
            got = collect(engine, root)
    except Exception as e:  # noqa: BLE001 - a server that is not running is a skip, as elsewhere
        if engine in ("postgres", "mysql") and "connect" in str(e).lower():
            pytest.skip(f"{engine} is not reachable: {e}")
        raise
    return engine, got


# ---- references ---------------------------------------------------------------------------

def reference() -> dict:
    rows = [r for r in make_rows()]
    by_rating = defaultdict(list)
    for r in rows:
        by_rating[r["rating"]].append(r["fee"])
    ref = {}
    for k, fees in by_rating.items():
        vals = [f for f in fees if f is not None]
        ref[k] = {"count": len(fees),
                  "min": min(vals) if vals else None, "max": max(vals) if vals else None,
                  "sum": sum(vals, D(0)) if vals else None,
                  "avg": statistics.fmean(float(v) for v in vals) if vals else None}
    by_fee = defaultdict(list)
    for r in rows:
        by_fee[r["fee"]].append(r["rating"])
    quarters: dict[str, dict] = {}
    for name in ("Europe/Berlin", "UTC"):
        zone = zoneinfo.ZoneInfo(name)
        counts: dict = defaultdict(int)
        for r in rows:
            if r["ts"] is None:
                counts[None] += 1
                continue
            local = r["ts"].astimezone(zone)
            counts[dt.datetime(local.year, 3 * ((local.month - 1) // 3) + 1, 1, tzinfo=zone)] += 1
        quarters[name] = dict(counts)
    return {"by_rating": ref,
            "by_fee": {k: max((v for v in vals if v is not None), default=None)
                       for k, vals in by_fee.items()},
            "quarters": quarters}


REF = reference()


def _key(v):  # NULL keys sort last in answers (DEVELOPERS.md: NULLs last)
    return (v is None, v)


# ---- the checks -----------------------------------------------------------------------------

def test_arrow_types_and_field_metadata(answers):
    """pyarrow: integer widths of the engine's declared types, decimal128(p, s), counts int64,
    avg float64, zoned timestamps; channel and role on every field."""
    engine, got = answers
    t = pa.ipc.open_stream(got["by_rating.arrow"]).read_all()
    assert t.schema.field("rating").type == pa.int16(), engine  # SMALLINT: 16 bits
    assert t.schema.field("count").type == pa.int64()
    for n in ("min_fee", "max_fee"):
        assert t.schema.field(n).type == pa.decimal128(10, 2), (engine, n)  # DECIMAL(10,2)
    # SQL standard: SUM keeps the scale of a decimal argument
    assert t.schema.field("sum_fee").type == pa.decimal128(38, 2)
    assert t.schema.field("avg_fee").type == pa.float64()
    meta = json.loads(t.schema.metadata[b"sluice"])
    for c in meta["columns"]:
        fm = t.schema.field(c["name"]).metadata
        assert fm[b"channel"].decode() == c["channel"] and fm[b"role"].decode() == c["role"]
    types = {c["name"]: c["type"] for c in meta["columns"]}
    assert types["avg_fee"] == "double" and types["min_fee"] == "decimal"
    f = pa.ipc.open_stream(got["by_fee.arrow"]).read_all()
    assert f.schema.field("fee").type == pa.decimal128(10, 2), engine  # a decimal key
    assert f.schema.field("max_rating").type == pa.int16()
    q = pa.ipc.open_stream(got["quarters.arrow"]).read_all()
    assert q.schema.field("ts").type == pa.timestamp("us", tz=zone_of(engine)), engine


def test_null_slots_hold_zero_bytes(answers):
    """The Arrow columnar format (arrow.apache.org/docs/format/Columnar.html, "Validity
    bitmaps") leaves the value of a null slot undefined; engines leave stale memory there
    (DuckDB: a neighbouring key, NaN). Answers zero those bytes, so a reader of the raw value
    buffer (JavaScript ``Vector.toArray()``, numpy views) never sees a stray number and the
    same answer has the same bytes."""
    engine, got = answers
    for name in ("by_rating.arrow", "by_fee.arrow", "quarters.arrow"):
        t = pa.ipc.open_stream(got[name]).read_all()
        for col in t.column_names:
            for a in t.column(col).chunks:
                if not a.null_count or a.type.num_buffers != 2 or pa.types.is_boolean(a.type):
                    continue
                w = a.type.bit_width // 8
                raw = a.buffers()[1].to_pybytes()
                for i in range(len(a)):
                    if not a[i].is_valid:
                        slot = raw[(a.offset + i) * w:(a.offset + i + 1) * w]
                        assert slot == bytes(w), (engine, name, col, i, slot.hex())


def test_values_are_exact_in_arrow_and_json(answers):
    """pyarrow values and the JSON digits equal Python's decimal arithmetic exactly."""
    engine, got = answers
    ref = REF["by_rating"]
    t = pa.ipc.open_stream(got["by_rating.arrow"]).read_all().to_pydict()
    js = json.loads(got["by_rating.json"], parse_float=D)
    assert t["rating"] == sorted(ref, key=_key) == js["data"]["rating"], engine
    for i, k in enumerate(t["rating"]):
        for agg in ("min", "max", "sum"):
            want = ref[k][agg]
            assert t[f"{agg}_fee"][i] == want, (engine, k, agg)
            got_json = js["data"][f"{agg}_fee"][i]
            assert got_json == want and (want is None or str(got_json) == str(want)), \
                (engine, k, agg, got_json)
        assert t["count"][i] == ref[k]["count"]
        if ref[k]["avg"] is not None:
            assert t["avg_fee"][i] == pytest.approx(ref[k]["avg"], rel=1e-12)
    assert b"0.30000000000000004" not in got["by_rating.json"]
    f = pa.ipc.open_stream(got["by_fee.arrow"]).read_all().to_pydict()
    assert f["fee"] == sorted(REF["by_fee"], key=_key)
    assert f["max_rating"] == [REF["by_fee"][k] for k in f["fee"]]


def test_polars_reads_widths_decimals_and_the_berlin_wall_clock(answers):
    pl = pytest.importorskip("polars")
    engine, got = answers
    df = pl.read_ipc_stream(got["by_rating.arrow"])
    assert df.schema["rating"] == pl.Int16 and df.schema["count"] == pl.Int64
    assert df.schema["min_fee"] == pl.Decimal(10, 2), (engine, df.schema)
    ref = REF["by_rating"]
    assert df["sum_fee"].to_list() == [ref[k]["sum"] for k in df["rating"].to_list()]
    q = pl.read_ipc_stream(got["quarters.arrow"])
    assert q.schema["ts"] == pl.Datetime("us", zone_of(engine)), (engine, q.schema)
    shown = q["ts"].dt.strftime("%Y-%m-%d %H:%M").to_list()
    ref_q = REF["quarters"][zone_of(engine)]
    want = sorted(ref_q, key=_key)
    assert shown == [None if w is None else w.strftime("%Y-%m-%d %H:%M") for w in want]
    if engine not in NO_TZ:  # the first Berlin quarter, not 2025-12-31 23:00
        assert shown[0] == "2026-01-01 00:00"
    assert q["count"].to_list() == [ref_q[w] for w in want]


def _node(path: Path) -> dict:
    node = shutil.which("node")
    if node is None:
        pytest.skip("node is not installed (make test installs Node's Arrow library via npm)")
    assert (JS / "node_modules" / "apache-arrow").exists(), "run `make node` (npm ci in tests/js)"
    out = subprocess.run([node, str(JS / "decode_arrow.mjs"), str(path)], capture_output=True,
                         text=True, timeout=60, cwd=JS)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


def test_javascript_arrow_reads_numbers_exact_decimals_and_zoned_times(answers, tmp_path):
    """The JavaScript Arrow library (apache-arrow, as in a browser): a SMALLINT key is a JS
    number (Math.max works), counts are 64-bit (BigInt, as documented), decimals keep their
    digits, and the quarter starts read 00:00 on the Berlin wall clock."""
    engine, got = answers
    p = tmp_path / "a.arrows"
    p.write_bytes(got["by_rating.arrow"])
    js = _node(p)
    fields = {f["name"]: f for f in js["fields"]}
    assert fields["rating"]["bitWidth"] == 16 and fields["rating"]["isSigned"] is True
    ratings = [r for r in js["columns"]["rating"]]
    assert all(r is None or isinstance(r, int) for r in ratings)  # a JS number, not BigInt
    assert js["math_max"]["rating"] == max(k for k in REF["by_rating"] if k is not None)
    assert fields["count"]["bitWidth"] == 64 and js["math_max"]["count"] == "TypeError"
    assert fields["min_fee"]["precision"] == 10 and fields["min_fee"]["scale"] == 2
    assert fields["sum_fee"]["metadata"] == {"channel": "opacity", "role": "measure"}
    for i, k in enumerate(ratings):
        for agg in ("min", "max", "sum"):
            want = REF["by_rating"][k][agg]
            assert js["columns"][f"{agg}_fee"][i] == (None if want is None else str(want)), \
                (engine, k, agg)
    p.write_bytes(got["quarters.arrow"])
    jq = _node(p)
    assert {f["name"]: f for f in jq["fields"]}["ts"]["timezone"] == zone_of(engine)
    want = sorted(REF["quarters"][zone_of(engine)], key=_key)
    walls = [None if v is None else v["wall"] for v in jq["columns"]["ts"]]
    assert walls == [None if w is None else w.strftime("%Y-%m-%d %H:%M:%S") for w in want]
    ms = [None if v is None else v["ms"] for v in jq["columns"]["ts"]]
    assert ms == [None if w is None else int(w.timestamp() * 1000) for w in want]


if __name__ == "__main__":  # the chdb engine, in a process of its own (see the docstring)
    engine_name, root_dir = sys.argv[1], Path(sys.argv[2])
    answers_out = collect(engine_name, root_dir)
    (root_dir / "out").mkdir()
    for fname, content in answers_out.items():
        (root_dir / "out" / fname).write_bytes(content)


@pytest.mark.parametrize("values", [[2 ** 64 - 1, 3, None], [2 ** 63, 2 ** 53 + 1]])
def test_unsigned_integers_past_int64_stay_exact(values):
    """An engine's UInt64 past int64 (ClickHouse, DuckDB UBIGINT) for an integer output:
    an exact decimal. Before, the fallback cast to float64, which pyarrow refuses past 2^53
    (ArrowInvalid: a 500). Reference: Python's integers."""
    from app.engines.arrow import conform_column

    out = conform_column(pa.chunked_array([pa.array(values, pa.uint64())]), pa.int64())
    assert out.to_pylist() == values
