"""app.demo: the demo DuckDB file is deterministic, well-typed and chart-worthy."""

from __future__ import annotations

import datetime as dt
import pathlib

import duckdb
import pytest

from app.demo import build_demo

ROWS = 200_000

EXPECTED_TYPES = {
    "parcel_id": "BIGINT",
    "delivered_at": "TIMESTAMP WITH TIME ZONE",
    "depot": "VARCHAR",
    "region": "VARCHAR",
    "vehicle": "VARCHAR",
    "courier_id": "VARCHAR",
    "postcode": "VARCHAR",
    "distance_km": "DOUBLE",
    "weight_kg": "DOUBLE",
    "fee": "DECIMAL(10,2)",
    "delay_min": "INTEGER",
    "on_time": "BOOLEAN",
    "signature_required": "BOOLEAN",
    "rating": "SMALLINT",
}

# One ordered fingerprint of every column of every row.
FINGERPRINT = """
SELECT count(*), md5(string_agg(
    concat_ws('|', parcel_id, epoch_us(delivered_at), depot, region, vehicle, courier_id,
              postcode, distance_km, weight_kg, fee, delay_min, on_time, signature_required,
              rating, (distance_km IS NULL), (weight_kg IS NULL), (delay_min IS NULL),
              (rating IS NULL)),
    '\n' ORDER BY parcel_id))
FROM deliveries
"""


def _open(path: pathlib.Path) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect(str(path), read_only=True)
    con.execute("SET TimeZone = 'UTC'")
    return con


def _fingerprint(path: pathlib.Path) -> tuple:
    con = _open(path)
    try:
        return con.execute(FINGERPRINT).fetchone()
    finally:
        con.close()


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> pathlib.Path:
    out = tmp_path_factory.mktemp("demo") / "demo.duckdb"
    info = build_demo(out, rows=ROWS, progress=False)
    assert info["path"] == str(out)
    assert info["rows"] == ROWS
    assert info["seconds"] >= 0
    return out


@pytest.fixture()
def con(demo):
    c = _open(demo)
    yield c
    c.close()


def test_file_is_complete_and_read_only_openable(demo):
    assert demo.exists()
    assert not pathlib.Path(str(demo) + ".wal").exists()
    assert [p.name for p in demo.parent.iterdir()] == [demo.name]  # no temp files left
    con = _open(demo)
    assert con.execute("SELECT count(*) FROM deliveries").fetchone() == (ROWS,)
    with pytest.raises(duckdb.Error):
        con.execute("DELETE FROM deliveries")
    con.close()


def test_same_content_on_every_build_and_thread_count(tmp_path):
    a, b = tmp_path / "a.duckdb", tmp_path / "b.duckdb"
    build_demo(a, rows=50_000, progress=False)
    build_demo(b, rows=50_000, progress=False, threads=1)
    fa = _fingerprint(a)
    assert fa[0] == 50_000
    assert fa == _fingerprint(b)
    # another seed gives other data
    build_demo(b, rows=50_000, progress=False, seed=8)
    assert _fingerprint(b) != fa


def test_rebuild_replaces_existing_file(tmp_path):
    out = tmp_path / "demo.duckdb"
    out.write_bytes(b"not a database")
    pathlib.Path(str(out) + ".wal").write_bytes(b"stale wal")
    build_demo(out, rows=1_000, progress=False)
    assert not pathlib.Path(str(out) + ".wal").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["demo.duckdb"]
    con = _open(out)
    assert con.execute("SELECT count(*), min(parcel_id), max(parcel_id) FROM deliveries").fetchone() == (1_000, 1, 1_000)
    con.close()


def test_smaller_build_is_a_prefix(tmp_path, con):
    small = tmp_path / "small.duckdb"
    build_demo(small, rows=3_000, progress=False)
    want = con.execute("SELECT * FROM deliveries WHERE parcel_id <= 3000 ORDER BY parcel_id").fetchall()
    s = _open(small)
    assert s.execute("SELECT * FROM deliveries ORDER BY parcel_id").fetchall() == want
    s.close()


def test_progress_line(tmp_path, capsys):
    build_demo(tmp_path / "p.duckdb", rows=500_000, progress=True)
    err = capsys.readouterr().err
    assert err.endswith("\n") and err.count("\n") == 1
    assert "\r" in err
    last = err.rstrip("\n").split("\r")[-1]
    assert last.startswith("building demo  [")
    assert "100%" in last and "500,000/500,000 rows" in last


def test_rejects_bad_rows(tmp_path):
    for bad in (0, -5, 1.5, True):
        with pytest.raises(ValueError):
            build_demo(tmp_path / "x.duckdb", rows=bad, progress=False)
    assert list(tmp_path.iterdir()) == []


def test_columns_and_types(con):
    described = {name: typ for name, typ, *_ in con.execute("DESCRIBE deliveries").fetchall()}
    assert described == EXPECTED_TYPES
    tables = {r[0] for r in con.execute("SELECT table_name FROM duckdb_tables()").fetchall()}
    assert tables == {"deliveries", "depots", "couriers"}


def test_demo_model_served(demo):
    """The built-in demo config's model (app.demo.MODEL) on the demo file: kinds from the
    engine, and revenue by depot city / parcels by courier team equal pandas merge(how=left)
    + groupby over the file's own tables (reference: pandas)."""
    import pandas as pd
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    app = create_app(load_settings(environ={"SLUICE_DEMO_PATH": str(demo)}))
    con = _open(demo)
    facts = con.execute("SELECT depot, courier_id, fee FROM deliveries").df()
    depots = con.execute("SELECT * FROM depots").df()
    couriers = con.execute("SELECT * FROM couriers").df()
    con.close()
    with TestClient(app) as c:
        info = c.get("/v1/sources/deliveries").json()
        assert {x["name"]: x["kind"] for x in info["computed"]} == {
            "fee_per_km": "double", "delivery_hour": "integer", "lateness": "string",
            "heavy": "boolean"}
        assert {x["name"]: x["kind"] for x in info["dimension_columns"]} == {
            "depots.city": "string", "depots.opened_on": "date", "couriers.team": "string"}
        assert all(d["unique"] for d in info["dimensions"])
        r = c.post("/v1/chart", json={"source": "deliveries", "channels": {
            "x": {"column": "depots.city"}, "y": {"agg": "sum", "column": "fee"}}}).json()
        got = dict(zip(r["data"]["depots.city"], r["data"]["sum_fee"]))
        want = facts.merge(depots, on="depot", how="left").groupby("city")["fee"].sum()
        assert set(got) == set(want.index)
        assert all(abs(float(got[k]) - float(want[k])) < 1e-6 for k in want.index)
        r = c.post("/v1/chart", json={"source": "deliveries", "channels": {
            "x": {"column": "couriers.team"}, "y": {"agg": "count"}}}).json()
        got = dict(zip(r["data"]["couriers.team"], r["data"]["count"]))
        joined = facts.merge(couriers, on="courier_id", how="left")
        want = joined["team"].fillna("<NULL>").value_counts()
        assert {("<NULL>" if k is None else k): v for k, v in got.items()} == dict(want)
        assert "<NULL>" in want  # the contractors: facts without a match keep their rows


def test_ids_unique_and_dense(con):
    assert con.execute(
        "SELECT count(*), count(DISTINCT parcel_id), min(parcel_id), max(parcel_id) FROM deliveries"
    ).fetchone() == (ROWS, ROWS, 1, ROWS)


def test_nulls_where_promised(con):
    frac = dict(
        zip(
            ["distance_km", "weight_kg", "delay_min", "rating", "on_time"],
            con.execute(
                """SELECT avg((distance_km IS NULL)::INT), avg((weight_kg IS NULL)::INT),
                          avg((delay_min IS NULL)::INT), avg((rating IS NULL)::INT),
                          avg((on_time IS NULL)::INT)
                   FROM deliveries"""
            ).fetchone(),
        )
    )
    assert 0.005 < frac["distance_km"] < 0.02
    assert 0.002 < frac["weight_kg"] < 0.01
    assert 0.02 < frac["delay_min"] < 0.045
    assert 0.35 < frac["rating"] < 0.45
    assert frac["on_time"] == frac["delay_min"]
    nulls = con.execute(
        """SELECT count(*) FROM deliveries WHERE parcel_id IS NULL OR delivered_at IS NULL
           OR depot IS NULL OR region IS NULL OR vehicle IS NULL OR courier_id IS NULL
           OR postcode IS NULL OR fee IS NULL OR signature_required IS NULL"""
    ).fetchone()[0]
    assert nulls == 0


def test_value_ranges(con):
    row = con.execute(
        """SELECT min(distance_km), min(weight_kg), min(fee), min(delay_min), max(delay_min),
                  min(rating), max(rating),
                  count(DISTINCT on_time), count(DISTINCT signature_required),
                  count(*) FILTER (WHERE on_time IS DISTINCT FROM (delay_min <= 15))
           FROM deliveries"""
    ).fetchone()
    min_km, min_kg, min_fee, min_delay, max_delay, min_rating, max_rating, n_on, n_sig, bad = row
    assert min_km > 0 and min_kg > 0 and min_fee > 0
    assert min_delay < 0 < max_delay  # early and late deliveries
    assert (min_rating, max_rating) == (1, 5)
    assert n_on == 2 and n_sig == 2  # both true and false
    assert bad == 0
    # right-skewed distance: mean well above median
    mean, median = con.execute("SELECT avg(distance_km), median(distance_km) FROM deliveries").fetchone()
    assert mean > 1.2 * median


def test_categories(con):
    depots = dict(con.execute("SELECT depot, count(*) FROM deliveries GROUP BY depot").fetchall())
    assert len(depots) == 8
    assert "North Yard" in depots and "Harbour" in depots
    assert max(depots.values()) > 3 * min(depots.values())  # skewed
    regions = {r[0] for r in con.execute("SELECT DISTINCT region FROM deliveries").fetchall()}
    assert regions == {"North", "South", "East", "West"}
    vehicles = dict(con.execute("SELECT vehicle, count(*) FROM deliveries GROUP BY vehicle").fetchall())
    assert set(vehicles) == {"bike", "cargo bike", "van", "truck", "drone"}
    assert vehicles["van"] > 3 * vehicles["drone"]
    n_couriers, n_postcodes, bad_courier, bad_postcode = con.execute(
        """SELECT count(DISTINCT courier_id), count(DISTINCT postcode),
                  count(*) FILTER (WHERE NOT regexp_full_match(courier_id, 'C-[0-9]{4}')),
                  count(*) FILTER (WHERE NOT regexp_full_match(postcode, 'PD-[0-9]{4}'))
           FROM deliveries"""
    ).fetchone()
    assert 1_000 < n_couriers <= 3_000
    assert 4_000 < n_postcodes <= 5_000
    assert bad_courier == 0 and bad_postcode == 0


def test_correlations(con):
    med = dict(con.execute("SELECT vehicle, median(distance_km) FROM deliveries GROUP BY vehicle").fetchall())
    assert med["truck"] > med["van"] > med["bike"]
    fee = dict(con.execute("SELECT vehicle, avg(fee) FROM deliveries GROUP BY vehicle").fetchall())
    assert fee["truck"] > fee["van"] > fee["bike"]
    late_rating, early_rating = con.execute(
        """SELECT avg(rating) FILTER (WHERE delay_min > 30), avg(rating) FILTER (WHERE delay_min <= 0)
           FROM deliveries"""
    ).fetchone()
    assert late_rating < early_rating


def test_time_range_rhythm_and_dst(con):
    lo, hi = con.execute("SELECT min(delivered_at), max(delivered_at) FROM deliveries").fetchone()
    utc = dt.timezone.utc
    assert dt.datetime(2025, 1, 1, tzinfo=utc) <= lo < dt.datetime(2025, 1, 3, tzinfo=utc)
    assert dt.datetime(2026, 12, 29, tzinfo=utc) < hi < dt.datetime(2027, 1, 1, tzinfo=utc)
    # rows on both sides of every European daylight-saving change in the range
    for change in ("2025-03-30 01:00", "2025-10-26 01:00", "2026-03-29 01:00", "2026-10-25 01:00"):
        before, after = con.execute(
            f"""SELECT count(*) FILTER (WHERE delivered_at < TIMESTAMPTZ '{change}+00'),
                       count(*) FILTER (WHERE delivered_at >= TIMESTAMPTZ '{change}+00')
                FROM deliveries
                WHERE delivered_at >= TIMESTAMPTZ '{change}+00' - INTERVAL 7 DAY
                  AND delivered_at < TIMESTAMPTZ '{change}+00' + INTERVAL 7 DAY"""
        ).fetchone()
        assert before > 0 and after > 0, change
    # daily rhythm: most deliveries in 08:00-20:00 local time
    daytime = con.execute(
        """SELECT avg((hour(delivered_at AT TIME ZONE 'Europe/Berlin') BETWEEN 8 AND 19)::INT)
           FROM deliveries"""
    ).fetchone()[0]
    assert daytime > 0.75
    # the rhythm follows local wall-clock time, so in UTC the whole day profile sits about
    # an hour earlier in summer (CEST, UTC+2) than in winter (CET, UTC+1)
    winter, summer = con.execute(
        """SELECT avg(epoch(delivered_at) % 86400 / 3600) FILTER (WHERE month(delivered_at) IN (1, 2)),
                  avg(epoch(delivered_at) % 86400 / 3600) FILTER (WHERE month(delivered_at) IN (6, 7))
           FROM deliveries"""
    ).fetchone()
    assert 0.7 < winter - summer < 1.1
    # weekday effect: fewer deliveries on Sundays than on Mondays
    by_dow = dict(con.execute("SELECT isodow(delivered_at), count(*) FROM deliveries GROUP BY 1").fetchall())
    assert by_dow[7] < 0.5 * by_dow[1]
