"""Deterministic demo data: a fictional parcel-delivery network, built inside DuckDB.

``make serve`` and ``sluice demo`` call :func:`build_demo` so the service has something to
serve with no set-up. Every name in the data (depots, couriers, postcodes) is invented.

Why it is built this way:

* **Deterministic.** Every pseudo-random number is DuckDB's 64-bit ``hash`` of one integer
  key built from (seed, parcel_id, stream k), mapped to a uniform in (0, 1). Nothing depends
  on ``random()``, ``setseed``, thread scheduling or chunk boundaries, so the same
  ``rows``/``seed`` give the same table on every run and with any thread count (for a given
  DuckDB version, whose ``hash`` is the only thing the output depends on). A row's values
  depend only on its parcel_id and the seed, so a smaller build is a prefix of a larger one.
* **Fast.** No Python row loops: each ``INSERT ... SELECT`` computes one chunk of about 1/20
  of the rows (the chunks exist so a progress bar can be drawn). Measured on 2 cores:
  2 million rows in ~1.7 s, 100 million rows in ~75 s (2 GB file, ~2.2 GB peak memory).
* **Interesting to chart.** Columns are correlated a little: the vehicle shapes distance,
  weight and fee; depots serve a home region and have their own couriers; delays grow with
  distance, winter, afternoon peaks and trucks; ratings fall with delay. Deliveries follow a
  daily rhythm in local (Central European) wall-clock time and are stored as UTC
  ``TIMESTAMPTZ``, so the UTC hour-of-day profile shifts by one hour across the European
  daylight-saving changes -- useful for checking ``tz`` handling.
* **Safe to rebuild.** The file is written to a temporary name in the target directory,
  checkpointed (no ``.wal`` left behind), closed and then moved over ``out`` with
  ``os.replace``.
"""

from __future__ import annotations

import datetime as _dt
import os
import pathlib
import sys
import time
import uuid

import duckdb

__all__ = ["build_demo", "TABLE", "DEPOTS", "REGIONS", "VEHICLES", "MODEL", "DEPOT_SITES",
           "TEAMS", "MEASURES"]

TABLE = "deliveries"

#: the demo source's named measures ([sources.deliveries.measures] of the built-in config;
#: planner/measure_sql.py): usable as {"measure": "revenue"} on any measure channel
MEASURES: dict[str, str] = {
    "revenue": "sum(fee)",
    # unknown delays (on_time NULL) stay out of the share, as in {"agg": "share"}
    "on_time_share": "avg(CASE WHEN on_time THEN 1.0 WHEN NOT on_time THEN 0.0 END)",
    "late_parcels": "count(CASE WHEN delay_min > 15 THEN 1 END)",
    "revenue_per_km": "sum(fee) / sum(distance_km)",
}

#: Depot name, home region index, share of parcels. Names are invented.
DEPOTS: list[tuple[str, int, float]] = [
    ("North Yard", 0, 0.22),
    ("Harbour", 3, 0.18),
    ("Quillmoor", 1, 0.15),
    ("Emberfield", 2, 0.13),
    ("Tallow Cross", 0, 0.11),
    ("Brackenvale", 2, 0.09),
    ("Fennick Point", 1, 0.07),
    ("Glimmerbank", 3, 0.05),
]
#: The depots dimension table: depot, city, opened_on (invented towns; two depots share a city).
DEPOT_SITES: list[tuple[str, str, str]] = [
    ("North Yard", "Norrhaven", "2016-04-01"),
    ("Harbour", "Saltmere", "2014-09-15"),
    ("Quillmoor", "Quillmoor", "2019-03-01"),
    ("Emberfield", "Emberfield", "2018-06-11"),
    ("Tallow Cross", "Norrhaven", "2021-02-22"),
    ("Brackenvale", "Bracken", "2020-10-05"),
    ("Fennick Point", "Fennick", "2023-05-08"),
    ("Glimmerbank", "Saltmere", "2024-01-15"),
]
#: The couriers dimension table: courier_id -> team (round robin). The last
#: ``CONTRACTORS`` couriers are contractors outside the roster: their parcels have no match
#: in ``couriers`` (team is NULL through the LEFT JOIN).
TEAMS: list[str] = ["Kestrel", "Otter", "Heron", "Badger", "Lynx", "Marten"]
CONTRACTORS = 20
#: The demo's source model (DESIGN.md "Source model"): the config the built-in demo source
#: carries (app/settings.py) and the README shows.
MODEL: dict = {
    "columns": {
        "fee_per_km": "fee / NULLIF(distance_km, 0)",
        "delivery_hour": "extract(hour from delivered_at)",
        "lateness": ("CASE WHEN delay_min IS NULL THEN 'unknown' WHEN delay_min <= 0 THEN "
                     "'early' WHEN delay_min <= 15 THEN 'up to 15 min' ELSE 'over 15 min' END"),
        "heavy": "weight_kg >= 20",
    },
    "dimensions": [
        {"table": "depots", "fact_column": "depot", "key": "depot",
         "columns": ["city", "opened_on"]},
        {"table": "couriers", "fact_column": "courier_id", "key": "courier_id",
         "columns": ["team"]},
    ],
    "measures": MEASURES,
}
REGIONS: list[str] = ["North", "South", "East", "West"]
#: Region multiplier on distances (East is the sparse, rural one).
_REGION_DISTANCE = [1.0, 0.9, 1.3, 1.1]

#: name, median km, log-sd km, median kg, log-sd kg, max kg, base surcharge
VEHICLES: list[tuple[str, float, float, float, float, float, float]] = [
    ("bike", 2.2, 0.55, 1.2, 0.7, 15.0, 0.0),
    ("cargo bike", 3.0, 0.50, 5.5, 0.6, 80.0, 0.5),
    ("van", 9.5, 0.75, 3.8, 0.9, 400.0, 1.0),
    ("truck", 38.0, 0.65, 45.0, 0.8, 3000.0, 12.0),
    ("drone", 3.2, 0.35, 0.7, 0.4, 2.5, 4.5),
]
#: Vehicle shares: the default and per-depot overrides (Harbour flies drones, North Yard
#: runs trucks, Quillmoor is a cycling town).
_VEHICLE_SHARES_DEFAULT = [0.17, 0.13, 0.47, 0.17, 0.06]
_VEHICLE_SHARES_BY_DEPOT = {
    "North Yard": [0.10, 0.08, 0.47, 0.31, 0.04],
    "Harbour": [0.14, 0.12, 0.44, 0.12, 0.18],
    "Quillmoor": [0.33, 0.24, 0.33, 0.08, 0.02],
}

COURIERS_PER_DEPOT = 375  # 8 depots -> 3000 couriers
POSTCODES_PER_REGION = 1250  # 4 regions -> 5000 postcodes

_START = _dt.datetime(2025, 1, 1, tzinfo=_dt.timezone.utc)
_DAYS = 730  # 2025-01-01 .. 2026-12-31
_CHUNKS = 20
_ROW_GROUP = 122_880  # DuckDB's default row_group_size

_COLUMNS: list[tuple[str, str, str]] = [
    ("parcel_id", "BIGINT NOT NULL", "unique parcel number, 1..N"),
    ("delivered_at", "TIMESTAMPTZ NOT NULL", "delivery time (UTC); daily rhythm follows CET/CEST wall-clock time"),
    ("depot", "VARCHAR NOT NULL", "dispatching depot (8, skewed)"),
    ("region", "VARCHAR NOT NULL", "delivery region: North, South, East, West"),
    ("vehicle", "VARCHAR NOT NULL", "bike, cargo bike, van, truck, drone"),
    ("courier_id", "VARCHAR NOT NULL", "courier, C-0001 .. C-3000 (each belongs to one depot)"),
    ("postcode", "VARCHAR NOT NULL", "invented postcode PD-nnnn (5000, grouped by region)"),
    ("distance_km", "DOUBLE", "route distance in km (right-skewed; ~1% unknown)"),
    ("weight_kg", "DOUBLE", "parcel weight in kg (~0.5% unknown)"),
    ("fee", "DECIMAL(10,2) NOT NULL", "price charged"),
    ("delay_min", "INTEGER", "minutes late (negative = early; ~3% NULL = not yet known)"),
    ("on_time", "BOOLEAN", "delay_min <= 15 (NULL when delay_min is NULL)"),
    ("signature_required", "BOOLEAN NOT NULL", "recipient had to sign"),
    ("rating", "SMALLINT", "customer rating 1..5 (~40% NULL = not rated)"),
]


def _eu_dst_bounds(year: int) -> tuple[int, int]:
    """EU summer time: last Sunday of March 01:00 UTC to last Sunday of October 01:00 UTC."""

    def last_sunday(month: int) -> _dt.datetime:
        d = _dt.datetime(year, month, 31, 1, tzinfo=_dt.timezone.utc)
        return d - _dt.timedelta(days=(d.weekday() + 1) % 7)

    return int(last_sunday(3).timestamp()), int(last_sunday(10).timestamp())


def _cumulative(shares: list[float]) -> list[float]:
    total = sum(shares)
    out, acc = [], 0.0
    for s in shares[:-1]:
        acc += s / total
        out.append(round(acc, 6))
    return out


def _pick(u: str, shares: list[float]) -> str:
    """SQL CASE mapping the uniform ``u`` to an index 0..len(shares)-1 with those shares."""
    cum = _cumulative(shares)
    whens = " ".join(f"WHEN {u} < {c!r} THEN {i}" for i, c in enumerate(cum))
    return f"(CASE {whens} ELSE {len(shares) - 1} END)"


def _lit(values: list) -> str:
    return "[" + ", ".join(repr(v) if not isinstance(v, str) else "'" + v.replace("'", "''") + "'" for v in values) + "]"


def _insert_sql() -> str:
    """INSERT ... SELECT for parcel ids [$lo, $lo + $n). ``_u(i, k)`` is the k-th uniform of row i.

    Row numbers come from the temp table ``_ids`` (0 .. chunk size - 1) rather than straight
    from ``range()``: a table scan is split across threads by row group, so the expressions
    and the (order-preserving) batch insert run in parallel; ``range()`` is a single-threaded
    source and would keep the whole pipeline on one core.
    """
    start = int(_START.timestamp())
    (s25, e25), (s26, e26) = _eu_dst_bounds(2025), _eu_dst_bounds(2026)
    depot_names = [d[0] for d in DEPOTS]
    depot_home = [d[1] for d in DEPOTS]
    depot_idx = _pick("u_depot", [d[2] for d in DEPOTS])
    vehicle_case = " ".join(
        f"WHEN depot_i = {i} THEN {_pick('u_vehicle', _VEHICLE_SHARES_BY_DEPOT[name])}"
        for i, name in enumerate(depot_names)
        if name in _VEHICLE_SHARES_BY_DEPOT
    )
    vehicle_idx = f"(CASE {vehicle_case} ELSE {_pick('u_vehicle', _VEHICLE_SHARES_DEFAULT)} END)"
    v = lambda col: _lit([row[col] for row in VEHICLES])  # noqa: E731
    names, km_med, km_sd, kg_med, kg_sd, kg_max, surcharge = (v(c) for c in range(7))
    return f"""
INSERT INTO {TABLE}
WITH u AS (
    SELECT
        i AS parcel_id,
        _u(i, 1) AS u_day, _u(i, 2) AS u_weekday, _u(i, 3) AS u_season, _u(i, 4) AS u_hmix,
        _u(i, 5) AS u_h1, _u(i, 6) AS u_h2, _u(i, 7) AS u_depot, _u(i, 8) AS u_region,
        _u(i, 9) AS u_vehicle, _u(i, 10) AS u_courier, _u(i, 11) AS u_post,
        _u(i, 12) AS u_n1, _u(i, 13) AS u_n2, _u(i, 14) AS u_n3, _u(i, 15) AS u_n4,
        _u(i, 16) AS u_km_null, _u(i, 17) AS u_kg_null, _u(i, 18) AS u_heavy,
        _u(i, 19) AS u_heavy_size, _u(i, 20) AS u_delay_null, _u(i, 21) AS u_sign,
        _u(i, 22) AS u_rating_null
    FROM (SELECT j + $lo AS i FROM _ids WHERE j < $n)
),
shape AS (
    SELECT *,
        -- day 0..729, growing volume over time; 7% drawn into the Nov 15 - Dec 23 peak season
        CASE WHEN u_season < 0.07
             THEN (CASE WHEN u_season < 0.028 THEN 318 ELSE 683 END) + floor(u_day * 39)::INTEGER
             ELSE least(floor({_DAYS} * pow(u_day, 0.85))::INTEGER, {_DAYS - 1}) END AS day0,
        -- local seconds of day: 88% in a working-day hump 07:30-20:30, the rest round the clock
        CASE WHEN u_hmix < 0.88
             THEN floor((7.5 + 13 * (u_h1 + u_h2) / 2) * 3600)::INTEGER
             ELSE floor(u_h1 * 86400)::INTEGER END AS local_sec,
        {depot_idx} AS depot_i,
        -- two standard normals each from Box-Muller
        sqrt(-2 * ln(u_n1)) * cos(2 * pi() * u_n2) AS z1,
        sqrt(-2 * ln(u_n1)) * sin(2 * pi() * u_n2) AS z2,
        sqrt(-2 * ln(u_n3)) * cos(2 * pi() * u_n4) AS z3,
        sqrt(-2 * ln(u_n3)) * sin(2 * pi() * u_n4) AS z4
    FROM u
),
cal AS (
    SELECT *,
        -- weekday effect: 2025-01-01 is a Wednesday; many Sunday parcels move to Monday,
        -- some Saturday parcels to Friday
        CASE WHEN (day0 + 2) % 7 = 6 AND u_weekday < 0.60 THEN day0 + 1
             WHEN (day0 + 2) % 7 = 5 AND u_weekday < 0.35 THEN day0 - 1
             ELSE day0 END AS day_i,
        {vehicle_idx} AS vehicle_i,
        CASE WHEN u_region < 0.88 THEN {_lit(depot_home)}[depot_i + 1]
             ELSE least(floor((u_region - 0.88) / 0.12 * 4)::INTEGER, 3) END AS region_i
    FROM shape
),
clock AS (
    SELECT *,
        {start} + day_i * 86400 + local_sec AS local_epoch,
        -- CET (UTC+1) in winter, CEST (UTC+2) in EU summer time
        local_epoch - 3600 AS cet_epoch,
        CASE WHEN (cet_epoch >= {s25} AND cet_epoch < {e25}) OR (cet_epoch >= {s26} AND cet_epoch < {e26})
             THEN local_epoch - 7200 ELSE cet_epoch END AS utc0,
        -- the first hour of 2025-01-01 local time is still 2024 in UTC: move it one hour on
        CASE WHEN utc0 < {start} THEN utc0 + 3600 ELSE utc0 END AS utc_epoch,
        local_sec // 3600 AS local_hour,
        (day_i < 59 OR (day_i >= 334 AND day_i < 424) OR day_i >= 699) AS winter
    FROM cal
),
measure AS (
    SELECT *,
        CASE WHEN u_km_null >= 0.01 THEN greatest(0.05, round(least(
            {km_med}[vehicle_i + 1] * {_lit(_REGION_DISTANCE)}[region_i + 1]
                * exp({km_sd}[vehicle_i + 1] * z1), 900.0), 2)) END AS km,
        CASE WHEN u_kg_null >= 0.005 THEN greatest(0.05, round(least(
            {kg_med}[vehicle_i + 1] * exp({kg_sd}[vehicle_i + 1] * (0.3 * z1 + 0.954 * z2)),
            {kg_max}[vehicle_i + 1]), 2)) END AS kg,
        -- share of badly late parcels
        0.05 + CASE WHEN vehicle_i = 3 THEN 0.04 ELSE 0 END + CASE WHEN winter THEN 0.04 ELSE 0 END
             + CASE WHEN local_hour BETWEEN 16 AND 19 THEN 0.03 ELSE 0 END AS p_heavy
    FROM clock
),
late AS (
    SELECT *,
        u_sign < 0.10 + CASE WHEN kg >= 20 THEN 0.30 ELSE 0 END
                      + CASE WHEN vehicle_i = 2 THEN 0.05 ELSE 0 END AS sign,
        CASE WHEN u_delay_null >= 0.03 THEN round(
            -4 + 9 * z3 + 0.04 * coalesce(km, 10)
            + CASE WHEN winter THEN 3 ELSE 0 END
            + CASE WHEN u_heavy < p_heavy THEN -ln(u_heavy_size) * 35 ELSE 0 END)::INTEGER END AS delay
    FROM measure
)
SELECT
    parcel_id,
    to_timestamp(utc_epoch) AS delivered_at,
    {_lit(depot_names)}[depot_i + 1] AS depot,
    {_lit(REGIONS)}[region_i + 1] AS region,
    {names}[vehicle_i + 1] AS vehicle,
    'C-' || lpad((depot_i * {COURIERS_PER_DEPOT} + floor({COURIERS_PER_DEPOT} * pow(u_courier, 1.4))::INTEGER + 1)::VARCHAR, 4, '0') AS courier_id,
    'PD-' || (1000 + region_i * 2000 + floor({POSTCODES_PER_REGION} * pow(u_post, 1.3))::INTEGER)::VARCHAR AS postcode,
    km AS distance_km,
    kg AS weight_kg,
    round(3.20 + 0.42 * coalesce(km, {km_med}[vehicle_i + 1]) + 0.28 * coalesce(kg, {kg_med}[vehicle_i + 1])
          + {surcharge}[vehicle_i + 1] + CASE WHEN sign THEN 1.50 ELSE 0 END, 2)::DECIMAL(10, 2) AS fee,
    delay AS delay_min,
    delay <= 15 AS on_time,
    sign AS signature_required,
    CASE WHEN delay IS NOT NULL AND u_rating_null >= 0.38
         THEN greatest(1, least(5, round(4.5 - 0.04 * greatest(delay, 0) + 0.9 * z4)))::SMALLINT END AS rating
FROM late
"""


def _chunk_rows(rows: int) -> int:
    """Rows per INSERT: about rows / 20, rounded up to whole DuckDB row groups.

    At least two row groups, so each INSERT splits across threads (a single row group is
    one task); 2 million rows -> 9 chunks, 100 million -> 20.
    """
    groups = max(2, -(-rows // (_CHUNKS * _ROW_GROUP)))
    return groups * _ROW_GROUP


def _progress(done: int, total: int, width: int = 30) -> None:
    frac = done / total if total else 1.0
    filled = int(round(frac * width))
    bar = "#" * filled + "." * (width - filled)
    sys.stderr.write(f"\rbuilding demo  [{bar}] {frac * 100:3.0f}%  {done:,}/{total:,} rows")
    sys.stderr.flush()


def _remove(path: pathlib.Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


def _dimension_tables(con: duckdb.DuckDBPyConnection) -> None:
    """``depots`` (one row per depot) and ``couriers`` (the roster, without the contractors)."""
    con.execute("CREATE TABLE depots (depot VARCHAR PRIMARY KEY, city VARCHAR NOT NULL, "
                "opened_on DATE NOT NULL)")
    con.executemany("INSERT INTO depots VALUES (?, ?, CAST(? AS DATE))", DEPOT_SITES)
    con.execute("COMMENT ON TABLE depots IS 'Depots of the fictional network (invented towns)'")
    total = len(DEPOTS) * COURIERS_PER_DEPOT - CONTRACTORS
    con.execute(
        "CREATE TABLE couriers AS SELECT 'C-' || lpad(i::VARCHAR, 4, '0') AS courier_id, "
        f"{_lit(TEAMS)}[(i - 1) % {len(TEAMS)} + 1] AS team FROM range(1, {total + 1}) t(i)")
    con.execute("COMMENT ON TABLE couriers IS 'Courier roster (contractors are not listed)'")


def build_demo(
    out: str | pathlib.Path,
    rows: int = 2_000_000,
    progress: bool = True,
    seed: int = 7,
    *,
    threads: int | None = None,
) -> dict:
    """Build the demo DuckDB file at ``out`` with table ``deliveries`` of ``rows`` rows.

    Replaces an existing file atomically. ``threads`` defaults to the CPUs this process may
    use; the content does not depend on it. Returns ``{"path", "rows", "seconds"}``.
    """
    if isinstance(rows, bool) or not isinstance(rows, int) or rows < 1:
        raise ValueError(f"rows must be a positive integer, got {rows!r}")
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise ValueError(f"seed must be an integer, got {seed!r}")
    if rows >= 1 << 36:
        raise ValueError("rows must be below 2**36")
    seed = seed % (1 << 20)  # the key space: seed (20 bits) | parcel id (36) | stream (6)
    if threads is None:
        try:
            threads = len(os.sched_getaffinity(0))
        except AttributeError:  # not on Linux
            threads = os.cpu_count() or 1
    threads = max(1, int(threads))

    t0 = time.perf_counter()
    out = pathlib.Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.tmp")
    tmp_wal = tmp.with_name(tmp.name + ".wal")
    try:
        con = duckdb.connect(str(tmp))
        try:
            con.execute(f"PRAGMA threads={threads}")
            con.execute("SET TimeZone = 'UTC'")
            con.execute("SET enable_progress_bar = false")  # we draw our own
            # One 64-bit key per (seed, row, stream k < 64), one hash each: DuckDB's integer
            # hash is a murmur-style finalizer, so neighbouring keys give independent-looking
            # uniforms. (Its multi-argument form only XORs the argument hashes, which makes
            # the streams of one row strongly correlated -- do not use hash(i, k).)
            con.execute(
                "CREATE TEMP MACRO _u(i, k) AS "
                f"((hash(i * 64 + k + {seed << 42}) >> 11)::DOUBLE + 0.5) / 9007199254740992.0"
            )
            cols = ",\n    ".join(f"{name} {typ}" for name, typ, _ in _COLUMNS)
            con.execute(f"CREATE TABLE {TABLE} (\n    {cols}\n)")
            con.execute(
                f"COMMENT ON TABLE {TABLE} IS "
                "'Fictional parcel-delivery network (sluice demo data; all names invented)'"
            )
            for name, _, doc in _COLUMNS:
                con.execute(f"COMMENT ON COLUMN {TABLE}.{name} IS '{doc}'")

            sql = _insert_sql()
            # ~10-20 chunks, each a whole number of row groups so every batch fills its own
            bounds = list(range(1, rows + 1, _chunk_rows(rows))) + [rows + 1]
            con.execute(
                "CREATE TEMP TABLE _ids AS SELECT range AS j FROM range($n)",
                {"n": max(hi - lo for lo, hi in zip(bounds, bounds[1:]))},
            )
            if progress:
                _progress(0, rows)
            for lo, hi in zip(bounds, bounds[1:]):
                con.execute(sql, {"lo": lo, "n": hi - lo})
                if progress:
                    _progress(hi - 1, rows)
            con.execute("DROP TABLE _ids")
            _dimension_tables(con)
            con.execute("CHECKPOINT")
        finally:
            con.close()
        if progress:
            sys.stderr.write("\n")
            sys.stderr.flush()
        _remove(tmp_wal)  # CHECKPOINT + close leave none; never ship a stray one
        # A WAL beside the old file would be replayed onto the new one: drop it first.
        _remove(out.with_name(out.name + ".wal"))
        os.replace(tmp, out)
    except BaseException:
        _remove(tmp)
        _remove(tmp_wal)
        raise
    return {"path": str(out), "rows": rows, "seconds": round(time.perf_counter() - t0, 3)}


if __name__ == "__main__":  # python -m app.demo [OUT] [ROWS]
    args = sys.argv[1:]
    print(build_demo(args[0] if args else "data/demo.duckdb", int(args[1]) if len(args) > 1 else 2_000_000))
