"""A small deterministic "deliveries" table (and a canary table) for the hostile-input,
fuzzing, property, limits, auth and fault tests. No tests here; the other files load this
module by path (``load()``) so it works with or without ``tests/`` being a package.

The same rows exist as a pandas DataFrame (the reference the property tests compare with),
in a DuckDB file, and, on request, as PostgreSQL tables with per-process names.
"""

from __future__ import annotations

import datetime as dt
import importlib.util
import os
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

SEED = 4_2026
N = 1200
DEPOTS = ["North Yard", "Harbour", "Airport", "Old Town", "Riverside"]
VEHICLES = ["van", "bike", "truck", "cargo bike"]
REGIONS = ["north", "south", "east", "west"]
CANARY = [(1, "canary-one"), (2, "canary-two"), (3, "canary-three")]


def frame() -> pd.DataFrame:
    rng = np.random.default_rng(SEED)
    depot = [DEPOTS[i] for i in rng.integers(0, len(DEPOTS), N)]
    depot_null = rng.random(N) < 0.04
    start = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)
    secs = rng.integers(0, 180 * 86400, N)
    df = pd.DataFrame({
        "id": np.arange(N, dtype="int64"),
        "depot": pd.Series([None if depot_null[i] else depot[i] for i in range(N)], dtype=object),
        "vehicle": pd.Series([VEHICLES[i] for i in rng.integers(0, len(VEHICLES), N)], dtype=object),
        "region": pd.Series([REGIONS[i] for i in rng.integers(0, len(REGIONS), N)], dtype=object),
        "fee": np.round(rng.gamma(2.0, 6.0, N), 2),
        "distance_km": np.round(rng.uniform(0.5, 80.0, N), 3),
        "weight": rng.integers(1, 60, N).astype("int64"),
        "express": rng.random(N) < 0.3,
        "delivered_at": [start + dt.timedelta(seconds=int(s)) for s in secs],
    })
    return df


def arrow_table(df: pd.DataFrame) -> pa.Table:
    return pa.table({
        "id": pa.array(df["id"], pa.int64()),
        "depot": pa.array(df["depot"].tolist(), pa.string()),
        "vehicle": pa.array(df["vehicle"].tolist(), pa.string()),
        "region": pa.array(df["region"].tolist(), pa.string()),
        "fee": pa.array(df["fee"], pa.float64()),
        "distance_km": pa.array(df["distance_km"], pa.float64()),
        "weight": pa.array(df["weight"], pa.int64()),
        "express": pa.array(df["express"], pa.bool_()),
        "delivered_at": pa.array(df["delivered_at"].tolist(), pa.timestamp("us", tz="UTC")),
    })


def build_duckdb(path: Path, df: pd.DataFrame | None = None) -> pd.DataFrame:
    df = frame() if df is None else df
    tmp = Path(str(path) + ".tmp")
    if tmp.exists():
        tmp.unlink()
    con = duckdb.connect(str(tmp))
    t = arrow_table(df)  # noqa: F841 - read by DuckDB's replacement scan
    con.execute("CREATE TABLE deliveries AS SELECT * FROM t")
    con.execute("CREATE TABLE canary (i INTEGER, v VARCHAR)")
    con.executemany("INSERT INTO canary VALUES (?, ?)", CANARY)
    con.close()
    os.replace(tmp, path)
    return df


def config(path: Path, extra: str = "", name: str = "deliveries") -> str:
    return (f'[sources.{name}]\nengine = "duckdb"\npath = "{path}"\ntable = "deliveries"\n' + extra)


PG_DSN = "postgresql://postgres@127.0.0.1:5432/test"


def pg_names() -> tuple[str, str]:
    """Per-process table names (xdist workers share the one PostgreSQL)."""
    tag = f"{os.getpid()}"
    return f"sluice_h_deliveries_{tag}", f"sluice_h_canary_{tag}"


def build_postgres(df: pd.DataFrame, dsn: str = PG_DSN) -> tuple[str, str]:
    import psycopg

    table, canary = pg_names()
    with psycopg.connect(dsn, autocommit=True, connect_timeout=3) as con:
        con.execute(f'DROP TABLE IF EXISTS "{table}", "{canary}"')
        con.execute(f'CREATE TABLE "{table}" (id bigint, depot text, vehicle text, region text, '
                    "fee double precision, distance_km double precision, weight bigint, "
                    "express boolean, delivered_at timestamptz)")
        with con.cursor() as cur:
            with cur.copy(f'COPY "{table}" FROM STDIN') as cp:
                for r in df.itertuples(index=False):
                    cp.write_row((int(r.id), r.depot, r.vehicle, r.region, float(r.fee),
                                  float(r.distance_km), int(r.weight), bool(r.express),
                                  r.delivered_at))
        con.execute(f'CREATE TABLE "{canary}" (i int, v text)')
        with con.cursor() as cur:
            cur.executemany(f'INSERT INTO "{canary}" VALUES (%s, %s)', CANARY)
        con.execute(f'ANALYZE "{table}"')
    return table, canary


def drop_postgres(dsn: str = PG_DSN) -> None:
    import psycopg

    table, canary = pg_names()
    with psycopg.connect(dsn, autocommit=True, connect_timeout=3) as con:
        con.execute(f'DROP TABLE IF EXISTS "{table}", "{canary}"')


def postgres_up(dsn: str = PG_DSN) -> str | None:
    """None when PostgreSQL answers, else the reason."""
    try:
        import psycopg

        psycopg.connect(dsn, connect_timeout=3).close()
        return None
    except Exception as e:  # noqa: BLE001
        return str(e)


def load():
    """This module, loaded by file path (shared by the test files)."""
    name = "sluice_test_fuzz_fixture"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, Path(__file__))
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod
