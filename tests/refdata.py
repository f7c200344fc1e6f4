"""Deterministic reference data for the outside-reference test suite.

The same rows are loaded into a DuckDB file (the service under test reads it) and kept as
pandas DataFrames / plain Python lists (the tests compute expected answers from those with
pandas, numpy and the standard library, never with the code under test).

Nothing here is downloaded: every value is generated from a fixed seed or written out.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

UTC = dt.timezone.utc
SEED = 20260101

# Category counts are all different, so "top N by count" has no ties.  "" (empty string) is
# a real value, distinct from NULL (None).
CAT_COUNTS: dict[str | None, int] = {
    "alpha": 610,
    "beta": 480,
    "gamma": 395,
    "délta": 330,
    "東京": 270,
    "Zürich": 215,
    "": 60,
    "Ωmega": 140,
    None: 180,
}
N_ROWS = sum(CAT_COUNTS.values())  # 2680

LABELS = ["50% off", "a_b", "abc", "a%b", "plain", "Under_score", "it's", "naïve", None]
GRP2 = ["north", "south", "east"]

# DST changes in 2026 (reference: IANA tz database rules, from memory; the tests below never
# rely on these dates being exact -- they compute local times with zoneinfo -- the windows
# only make sure rows exist on both sides of each change).
DST_CHANGES_UTC = [
    dt.datetime(2026, 3, 8, 7, 0, tzinfo=UTC),  # America/New_York spring forward
    dt.datetime(2026, 3, 29, 1, 0, tzinfo=UTC),  # Europe/Berlin spring forward
    dt.datetime(2026, 10, 25, 1, 0, tzinfo=UTC),  # Europe/Berlin fall back
    dt.datetime(2026, 11, 1, 6, 0, tzinfo=UTC),  # America/New_York fall back
]


@dataclass
class RefData:
    t: pd.DataFrame
    ts: list  # aware UTC datetimes or None, same order as t
    tsn: list  # naive datetimes or None, same order as t
    ranges: pd.DataFrame
    edges: pd.DataFrame
    numacc: dict[str, list[float]] = field(default_factory=dict)


def _numacc(first: str, lo: str, hi: str, pairs: int) -> list[float]:
    # NIST StRD NumAcc2..4 layout (from memory): one centre value, then the two outer values
    # alternating, 1001 observations in all.  The certified mean and standard deviation do not
    # depend on the order of the pairs.
    values = [float(first)]
    for _ in range(pairs):
        values += [float(lo), float(hi)]
    return values


def numacc_sets() -> dict[str, list[float]]:
    """NIST StRD univariate NumAcc1..NumAcc4 (data from memory, see tests for certified values)."""
    return {
        "numacc1": [10000001.0, 10000003.0, 10000002.0],
        "numacc2": _numacc("1.2", "1.1", "1.3", 500),
        "numacc3": _numacc("1000000.2", "1000000.1", "1000000.3", 500),
        "numacc4": _numacc("10000000.2", "10000000.1", "10000000.3", 500),
    }


def _masked(rng: np.random.Generator, n: int, p: float) -> np.ndarray:
    return rng.random(n) < p


def build_t(rng: np.random.Generator):
    n = N_ROWS
    cat = [k for k, c in CAT_COUNTS.items() for _ in range(c)]
    perm = rng.permutation(n)
    cat = [cat[i] for i in perm]

    grp2 = [GRP2[i] for i in rng.integers(0, 3, n)]
    label = [LABELS[i] for i in rng.integers(0, len(LABELS), n)]

    n_int = rng.integers(-50, 51, n).astype("int64")
    n_null = _masked(rng, n, 0.05)

    x = rng.normal(50.0, 15.0, n)
    x_null = _masked(rng, n, 0.04)

    w = rng.uniform(0.0, 10.0, n)

    flag = rng.random(n) < 0.45
    flag_null = _masked(rng, n, 0.08)

    # Timestamps: half spread over a little more than the year 2026 (crosses the 2025/2026
    # and 2026/2027 year ends, ISO week 2026-W53), half in +-36 h windows around each DST
    # change.  Whole seconds only.
    base = dt.datetime(2025, 12, 20, tzinfo=UTC)
    span = int((dt.datetime(2027, 1, 10, tzinfo=UTC) - base).total_seconds())
    ts: list = []
    for i in range(n):
        if i % 2 == 0:
            ts.append(base + dt.timedelta(seconds=int(rng.integers(0, span))))
        else:
            centre = DST_CHANGES_UTC[int(rng.integers(0, len(DST_CHANGES_UTC)))]
            ts.append(centre + dt.timedelta(seconds=int(rng.integers(-36 * 3600, 36 * 3600))))
    ts_null = _masked(rng, n, 0.03)
    ts = [None if ts_null[i] else ts[i] for i in range(n)]

    nbase = dt.datetime(2026, 3, 1)
    tsn = [nbase + dt.timedelta(seconds=int(s)) for s in rng.integers(0, 60 * 86400, n)]
    tsn_null = _masked(rng, n, 0.03)
    tsn = [None if tsn_null[i] else tsn[i] for i in range(n)]

    arrow = pa.table(
        {
            "id": pa.array(np.arange(n, dtype="int64")),
            "cat": pa.array(cat, pa.string()),
            "grp2": pa.array(grp2, pa.string()),
            "label": pa.array(label, pa.string()),
            "n": pa.array(n_int, pa.int64(), mask=n_null),
            "x": pa.array(x, pa.float64(), mask=x_null),
            "w": pa.array(w, pa.float64()),
            "flag": pa.array(flag, pa.bool_(), mask=flag_null),
            "ts": pa.array(ts, pa.timestamp("us", tz="UTC")),
            "tsn": pa.array(tsn, pa.timestamp("us")),
        }
    )
    df = pd.DataFrame(
        {
            "id": np.arange(n, dtype="int64"),
            "cat": pd.Series(cat, dtype=object),
            "grp2": pd.Series(grp2, dtype=object),
            "label": pd.Series(label, dtype=object),
            "n": pd.array([None if n_null[i] else int(n_int[i]) for i in range(n)], dtype="Int64"),
            "x": np.where(x_null, np.nan, x),
            "w": w,
            "flag": pd.Series([None if flag_null[i] else bool(flag[i]) for i in range(n)], dtype=object),
            "ts": pd.to_datetime(pd.Series(ts, dtype=object), utc=True),
            "tsn": pd.to_datetime(pd.Series(tsn, dtype=object)),
        }
    )
    return arrow, df, ts, tsn


def build_ranges(rng: np.random.Generator):
    """Columns with very different ranges for the nice-number checks; each min/max is exact."""
    m = 200
    specs = {
        "a": (105.0, 543.0),  # Heckbert's worked example range
        "b": (0.0013, 0.0871),
        "c": (-3.7, 12.2),
        "d": (1.2e6, 9.7e6),
        "e": (-0.75, 0.31),
    }
    cols = {}
    for name, (lo, hi) in specs.items():
        v = rng.uniform(lo, hi, m)
        v[0], v[1] = lo, hi
        cols[name] = v
    cols["k"] = np.full(m, 7.0)  # constant column
    return pa.table({k: pa.array(v, pa.float64()) for k, v in cols.items()}), pd.DataFrame(cols)


EDGE_VALUES = [-5.0, 0.0, 0.0, 10.0, 19.999, 20.0, 55.5, 99.9, 100.0, 100.0, 105.0, None, None]


def build_edges():
    arr = pa.table({"v": pa.array(EDGE_VALUES, pa.float64())})
    df = pd.DataFrame({"v": [np.nan if v is None else v for v in EDGE_VALUES]})
    return arr, df


def _write_tables(path: Path, tables: dict) -> None:
    """tables: {name: (column DDL or None, pyarrow.Table)}; loaded through DuckDB from Arrow."""
    con = duckdb.connect(str(path))
    try:
        for name, (ddl, tbl) in tables.items():
            con.register("src", tbl)
            if ddl:
                con.execute(f"CREATE TABLE {name} ({ddl})")
                con.execute(f"INSERT INTO {name} SELECT {', '.join(tbl.column_names)} FROM src")
            else:
                con.execute(f"CREATE TABLE {name} AS SELECT * FROM src")
            con.unregister("src")
    finally:
        con.close()


T_DDL = (
    "id BIGINT, cat VARCHAR, grp2 VARCHAR, label VARCHAR, n BIGINT, x DOUBLE, "
    "w DOUBLE, flag BOOLEAN, ts TIMESTAMPTZ, tsn TIMESTAMP"
)

# source name -> table name; each source gets a DuckDB file of its own ("<source>.duckdb"),
# and "combined.duckdb" holds every table (for the several-sources-in-one-file check).
SOURCE_TABLES = {
    "fixture": "t",
    "ranges": "ranges",
    "edges": "edges",
    "numacc1": "numacc1",
    "numacc2": "numacc2",
    "numacc3": "numacc3",
    "numacc4": "numacc4",
}
SOURCES = list(SOURCE_TABLES)


def build_database(root: Path) -> RefData:
    rng = np.random.default_rng(SEED)
    t_arrow, t_df, ts, tsn = build_t(rng)
    r_arrow, r_df = build_ranges(rng)
    e_arrow, e_df = build_edges()
    numacc = numacc_sets()

    tables = {
        "t": (T_DDL, t_arrow),
        "ranges": (None, r_arrow),
        "edges": (None, e_arrow),
    }
    for name, values in numacc.items():
        tables[name] = ("y DOUBLE", pa.table({"y": pa.array(values, pa.float64())}))

    for source, table in SOURCE_TABLES.items():
        _write_tables(root / f"{source}.duckdb", {table: tables[table]})
    _write_tables(root / "combined.duckdb", tables)

    con = duckdb.connect(str(root / "fixture.duckdb"), read_only=True)
    try:  # sanity: what went in is what we keep
        assert con.execute("SELECT count(*) FROM t").fetchone()[0] == N_ROWS
        assert con.execute("SELECT count(*) FROM t WHERE ts IS NULL").fetchone()[0] == sum(v is None for v in ts)
        assert con.execute("SELECT count(*) FROM t WHERE x IS NULL").fetchone()[0] == int(t_df["x"].isna().sum())
    finally:
        con.close()

    return RefData(t=t_df, ts=ts, tsn=tsn, ranges=r_df, edges=e_df, numacc=numacc)


def write_config(path: Path, root: Path, combined: bool = False) -> None:
    lines = []
    for source, table in SOURCE_TABLES.items():
        db = root / ("combined.duckdb" if combined else f"{source}.duckdb")
        lines += [
            f"[sources.{source}]",
            'engine = "duckdb"',
            f'path = "{db.as_posix()}"',
            f'table = "{table}"',
            "",
        ]
    path.write_text("\n".join(lines), encoding="utf-8")
