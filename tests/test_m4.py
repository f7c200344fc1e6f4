"""M4 line reduction (planner/m4.py) against its published claim.

Reference: Jugel, Jerzak, Hackenbroich, Markl, "M4: A Visualization-Oriented Time Series Data
Aggregation", PVLDB 7(10), 2014 -- keeping the first, last, min and max point of every pixel
column makes a line chart W pixels wide rasterise to exactly the pixels of the raw series.
The check below draws both series into a W x H bitmap with our own Bresenham line rasteriser
(J. E. Bresenham, "Algorithm for computer control of a digital plotter", IBM Systems Journal
4(1), 1965; integer form for all octants) and asserts identical pixels.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from app.main import create_app
from app.settings import load_settings

H = 60


def bresenham(x0: int, y0: int, x1: int, y1: int, out: set[tuple[int, int]]) -> None:
    dx, dy = abs(x1 - x0), -abs(y1 - y0)
    sx, sy = (1 if x0 < x1 else -1), (1 if y0 < y1 else -1)
    err = dx + dy
    while True:
        out.add((x0, y0))
        if x0 == x1 and y0 == y1:
            return
        e2 = 2 * err
        if e2 >= dy:
            err += dy
            x0 += sx
        if e2 <= dx:
            err += dx
            y0 += sy


def raster(xs: np.ndarray, ys: np.ndarray, w: int, x_min: float, x_max: float,
           y_min: float, y_max: float) -> set[tuple[int, int]]:
    """Pixels of the polyline through (xs, ys) (sorted by x). Pixel column as the service
    maps it: floor((x - x_min) * W / (x_max - x_min)), W - 1 at x_max."""
    px = np.floor((xs - x_min) * float(w) / (x_max - x_min))
    px = np.where(xs >= x_max, w - 1, px).astype(int)
    py = np.floor((ys - y_min) * (H - 1) / (y_max - y_min)).astype(int)
    pts: set[tuple[int, int]] = set()
    for i in range(len(px)):
        if i == 0:
            pts.add((px[0], py[0]))
        else:
            bresenham(px[i - 1], py[i - 1], px[i], py[i], pts)
    return pts


def _series() -> dict[str, tuple[np.ndarray, np.ndarray, str]]:
    rng = np.random.default_rng(20140701)
    out = {}
    n = 20000
    out["walk"] = (np.arange(n, dtype=float), np.cumsum(rng.normal(size=n)), "num")
    x = np.sort(rng.uniform(0, 1, 5000))
    y = np.zeros(len(x))
    spikes = rng.choice(len(x), 40, replace=False)
    y[spikes] = rng.choice([-50.0, 50.0], 40) * rng.uniform(0.2, 1.0, 40)
    out["spikes"] = (x, y, "num")
    n = 12000
    y = np.cumsum(rng.normal(size=n))
    y[rng.uniform(size=n) < 0.1] = np.nan  # NULL values are not points of the line
    xs = np.arange(n, dtype=float)
    out["nulls_time"] = (xs, y, "time")
    out["few"] = (np.array([0.0, 1, 2, 5, 9, 10, 40, 41, 99, 100]),
                  np.array([3.0, -1, 4, 1, -5, 9, 2, 6, -5, 3]), "num")
    return out


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    root = tmp_path_factory.mktemp("m4")
    db = root / "m4.duckdb"
    con = duckdb.connect(str(db))
    con.execute("SET TimeZone = 'UTC'")
    cfg = []
    for name, (x, y, kind) in _series().items():
        if kind == "time":
            t = pd.to_datetime(x + dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc).timestamp(),
                               unit="s", utc=True)
            t = t.where(np.arange(len(x)) != 5)  # a NULL x too
            df = pd.DataFrame({"x": t, "y": y})
        else:
            df = pd.DataFrame({"x": x, "y": y})
        con.register("df", df)
        con.execute(f"CREATE TABLE {name} AS SELECT * FROM df")  # NaN -> NULL below
        con.execute(f"UPDATE {name} SET y = NULL WHERE isnan(y)")
        con.unregister("df")
        cfg.append(f'[sources.{name}]\nengine = "duckdb"\npath = "{db}"\ntable = "{name}"\n')
    con.execute("CHECKPOINT")
    con.close()
    (root / "sluice.toml").write_text("\n".join(cfg))
    with TestClient(create_app(load_settings(root / "sluice.toml"))) as c:
        yield c


def _epoch(values: list[str]) -> np.ndarray:
    return np.array([dt.datetime.fromisoformat(v.replace("Z", "+00:00")).timestamp() for v in values])


@pytest.mark.parametrize("name,width", [("walk", 50), ("walk", 333), ("spikes", 37),
                                        ("nulls_time", 64), ("few", 100), ("few", 3)])
def test_reduced_series_rasterises_to_the_same_pixels(client, name, width):
    x, y, kind = _series()[name]
    if kind == "time":
        keep = ~np.isnan(y)
        keep[5] = False  # the NULL x
    else:
        keep = ~np.isnan(y)
    rx, ry = x[keep], y[keep]
    if kind == "time":
        rx = rx + dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc).timestamp()
    r = client.post("/v1/chart", json={
        "source": name, "channels": {"x": {"column": "x"}, "y": {"column": "y"}},
        "reduce": {"method": "m4", "width_px": width}})
    assert r.status_code == 200, r.text
    body = r.json()
    red = body["reduced"]
    assert red["method"] == "m4" and red["width_px"] == width
    assert red["input_rows"] == len(rx)
    assert body["stats"]["result_rows"] <= 4 * width
    assert body["stats"]["result_rows"] <= len(rx)
    gx = body["data"]["x"]
    gx = _epoch(gx) if kind == "time" else np.array(gx, dtype=float)
    gy = np.array(body["data"]["y"], dtype=float)
    assert np.all(np.diff(gx) >= 0), "points come ordered by x"
    assert red["x_min"] == rx.min() and red["x_max"] == rx.max()
    assert gy.min() == ry.min() and gy.max() == ry.max()
    args = (width, red["x_min"], red["x_max"], ry.min(), ry.max())
    assert raster(gx, gy, *args) == raster(rx, ry, *args)  # reference: M4 (Jugel et al. 2014)


def test_reduction_is_small_and_says_so(client):
    r = client.post("/v1/chart", json={
        "source": "walk", "channels": {"x": {"column": "x"}, "y": {"column": "y"}},
        "reduce": {"method": "m4", "width_px": 10}}).json()
    assert r["stats"]["result_rows"] <= 40
    assert r["stats"]["matched_rows"] == 20000
    assert [c["name"] for c in r["columns"]] == ["x", "y"]


@pytest.mark.parametrize("body,ptr", [
    ({"channels": {"x": {"column": "x"}, "y": {"agg": "count"}}}, "/channels/y/agg"),
    ({"channels": {"x": {"column": "x", "bin": {"bins": 10}}, "y": {"column": "y"}}}, "/channels/x/bin"),
    ({"channels": {"x": {"column": "x"}, "y": {"column": "y"}, "color": {"column": "y"}}}, "/channels/color"),
    ({"channels": {"x": {"column": "x"}}}, "/reduce"),
])
def test_bad_shapes_are_refused_with_a_pointer(client, body, ptr):
    req = {"source": "walk", "reduce": {"method": "m4", "width_px": 100}, **body}
    r = client.post("/v1/chart", json=req)
    assert r.status_code == 422, r.text
    assert r.json()["pointer"] == ptr
