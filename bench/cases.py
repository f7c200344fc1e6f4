"""The benchmark suite: one chart request per case, with

* ``hand``   -- the best hand-written DuckDB SQL for the same rows (the limit), as a function
               of the bin layout the service reported (a person writing the SQL by hand knows
               the extents of the data too);
* ``cols``   -- the raw columns the naive paths fetch (and an optional WHERE);
* ``naive``  -- how the naive client aggregates those columns in pandas (None: the case has
               no naive path);
* ``vary``   -- for a case whose filter changes on every request (a user dragging a brush):
               the ``where`` of request number i, every i a new value; ``hand`` then takes
               ``(meta, i)``.

The hand-written SQL returns the same columns, in the same order, as the service's ``data``
so the bench can check (a) == (b) for every case (bench/runner.py, tests/test_bench_smoke.py).
Cases name only request fields and table columns: no sluice module is imported here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

SRC = "deliveries"
WALK = "walk"


@dataclass
class Case:
    name: str
    title: str
    request: dict[str, Any]
    hand: Callable[[dict[str, Any]], str]
    cols: list[str]
    naive: Callable[[pd.DataFrame, dict[str, Any]], pd.DataFrame] | None
    where_sql: str = ""
    table: str = "deliveries"
    params: dict[str, Any] = field(default_factory=dict)
    vary: Callable[[int], list[dict[str, Any]]] | None = None

    def body(self, i: int = 0) -> dict[str, Any]:
        """The chart request number ``i`` (the same request for a case without ``vary``)."""
        if self.vary is None:
            return self.request
        return {**self.request, "where": self.vary(i)}

    def sql(self, meta: dict[str, Any], i: int = 0) -> str:
        """The hand-written SQL for request number ``i``, given the layout it reported."""
        return self.hand(meta, i) if self.vary is not None else self.hand(meta)


def _bin(meta: dict[str, Any], ch: str) -> tuple[float, float, int]:
    b = meta["bins"][ch]
    return float(b["start"]), float(b["width"]), int(b["count"])


def _bin_sql(col: str, start: float, width: float, count: int, stop: float) -> str:
    """floor((v - start) / width), the value on the closed upper edge in the last bin."""
    return (f"CASE WHEN {col} >= {stop!r} THEN {count - 1} "
            f"ELSE floor(({col} - {start!r}) / {width!r}) END")


# ---- 1. histogram --------------------------------------------------------------------
def _hist_hand(meta):
    s, w, n = _bin(meta, "x")
    stop = s + n * w
    return f"""
WITH g AS (SELECT {_bin_sql('distance_km', s, w, n, stop)} AS k, count(*) AS n
           FROM deliveries GROUP BY k)
SELECT {s!r} + k * {w!r} AS x_lo, {s!r} + (k + 1) * {w!r} AS x_hi, n AS count
FROM g ORDER BY k NULLS LAST"""


def _hist_naive(df, meta):
    s, w, n = _bin(meta, "x")
    v = df["distance_km"].to_numpy(dtype=float, na_value=np.nan)
    v = v[~np.isnan(v)]
    counts, edges = np.histogram(v, bins=n, range=(s, s + n * w))
    out = pd.DataFrame({"x_lo": edges[:-1], "x_hi": edges[1:], "count": counts})
    return out[out["count"] > 0]


# ---- 2. hourly time series -----------------------------------------------------------
def _hourly_hand(meta):
    return """
WITH g AS (SELECT epoch_us(delivered_at) // 3600000000 AS k, count(*) AS n,
                  avg(distance_km) AS a FROM deliveries GROUP BY k)
SELECT make_timestamptz(k * 3600000000) AS delivered_at, n AS count, a AS avg_distance_km
FROM g ORDER BY k"""


def _hourly_naive(df, meta):
    t = pd.to_datetime(df["delivered_at"], utc=True).dt.floor("h")
    g = df.assign(h=t).groupby("h").agg(count=("h", "size"), avg_distance_km=("distance_km", "mean"))
    return g.reset_index()


# ---- 3. top-N categories -------------------------------------------------------------
def _top_hand(meta):
    return """
WITH g AS (SELECT courier_id AS v, count(*) AS n FROM deliveries GROUP BY v),
r AS (SELECT v, n, row_number() OVER (ORDER BY n DESC, v ASC) AS r FROM g),
f AS (SELECT CASE WHEN r <= 20 THEN v ELSE '(other)' END AS courier_id, sum(n) AS count
      FROM r GROUP BY 1)
SELECT courier_id, count FROM f ORDER BY count DESC NULLS LAST, courier_id ASC NULLS LAST"""


def _top_naive(df, meta):
    vc = df["courier_id"].value_counts()
    vc = vc.sort_values(ascending=False, kind="stable")
    top = vc.iloc[:20]
    other = vc.iloc[20:].sum()
    out = pd.concat([top, pd.Series({"(other)": other})])
    return out.rename("count").reset_index()


# ---- 4. 2-D binned heat map ----------------------------------------------------------
def _heat_hand(meta):
    sx, wx, nx = _bin(meta, "x")
    sy, wy, ny = _bin(meta, "y")
    return f"""
WITH g AS (SELECT {_bin_sql('distance_km', sx, wx, nx, sx + nx * wx)} AS kx,
                  {_bin_sql('weight_kg', sy, wy, ny, sy + ny * wy)} AS ky, count(*) AS n
           FROM deliveries GROUP BY kx, ky)
SELECT {sx!r} + kx * {wx!r} AS x_lo, {sx!r} + (kx + 1) * {wx!r} AS x_hi,
       {sy!r} + ky * {wy!r} AS y_lo, {sy!r} + (ky + 1) * {wy!r} AS y_hi, n AS count
FROM g ORDER BY kx NULLS LAST, ky NULLS LAST"""


def _heat_naive(df, meta):
    sx, wx, nx = _bin(meta, "x")
    sy, wy, ny = _bin(meta, "y")
    d = df.dropna()
    h, xe, ye = np.histogram2d(d["distance_km"].to_numpy(float), d["weight_kg"].to_numpy(float),
                               bins=[nx, ny], range=[[sx, sx + nx * wx], [sy, sy + ny * wy]])
    ix, iy = np.nonzero(h)
    return pd.DataFrame({"x_lo": xe[ix], "y_lo": ye[iy], "count": h[ix, iy]})


# ---- 5. stacked bars -----------------------------------------------------------------
def _stack_hand(meta):
    return """
WITH g AS (SELECT depot, vehicle, count(*) AS n FROM deliveries GROUP BY depot, vehicle)
SELECT depot, n AS count, vehicle,
       sum(n) OVER (PARTITION BY depot ORDER BY vehicle NULLS FIRST ROWS UNBOUNDED PRECEDING) - n
           AS count_base,
       sum(n) OVER (PARTITION BY depot ORDER BY vehicle NULLS FIRST ROWS UNBOUNDED PRECEDING)
           AS count_top
FROM g ORDER BY depot, vehicle"""


def _stack_naive(df, meta):
    g = df.groupby(["depot", "vehicle"]).size().rename("count").reset_index()
    g["count_top"] = g.groupby("depot")["count"].cumsum()
    g["count_base"] = g["count_top"] - g["count"]
    return g


# ---- 6. facets -----------------------------------------------------------------------
def _facet_hand(meta):
    s, w, n = _bin(meta, "x")
    return f"""
WITH g AS (SELECT {_bin_sql('delay_min', s, w, n, s + n * w)} AS k, region, vehicle, count(*) AS n
           FROM deliveries GROUP BY ALL)
SELECT {s!r} + k * {w!r} AS x_lo, {s!r} + (k + 1) * {w!r} AS x_hi, n AS count,
       region, vehicle
FROM g ORDER BY k NULLS LAST, region, vehicle"""


def _facet_naive(df, meta):
    s, w, n = _bin(meta, "x")
    v = df["delay_min"].to_numpy(dtype=float, na_value=np.nan)
    k = np.minimum(np.floor((v - s) / w), n - 1)
    return df.assign(k=k).groupby(["k", "region", "vehicle"], dropna=False).size().reset_index()


# ---- 7. quantiles --------------------------------------------------------------------
def _quant_hand(meta):
    return """
SELECT vehicle, quantile_cont(delay_min, 0.9) AS p90_delay_min,
       quantile_cont(distance_km, 0.5) AS median_distance_km
FROM deliveries GROUP BY vehicle ORDER BY vehicle"""


def _quant_naive(df, meta):
    g = df.groupby("vehicle")
    return pd.DataFrame({"p90_delay_min": g["delay_min"].quantile(0.9),
                         "median_distance_km": g["distance_km"].median()}).reset_index()


# ---- 8. count distinct ---------------------------------------------------------------
def _distinct_hand(meta):
    return """
SELECT depot, count(DISTINCT postcode) AS count_distinct_postcode
FROM deliveries GROUP BY depot ORDER BY depot"""


def _distinct_naive(df, meta):
    return df.groupby("depot")["postcode"].nunique().reset_index()


# ---- 9. filtered histogram (where -> the extents statement scans) ----------------------
_WHERE = "vehicle = 'van' AND delivered_at >= TIMESTAMPTZ '2026-01-01 00:00:00+00'"


def _filtered_hand(meta):
    s, w, n = _bin(meta, "x")
    stop = s + n * w
    return f"""
WITH g AS (SELECT {_bin_sql('weight_kg', s, w, n, stop)} AS k, count(*) AS n
           FROM deliveries WHERE {_WHERE} GROUP BY k)
SELECT {s!r} + k * {w!r} AS x_lo, {s!r} + (k + 1) * {w!r} AS x_hi, n AS count
FROM g ORDER BY k NULLS LAST"""


def _filtered_naive(df, meta):
    s, w, n = _bin(meta, "x")
    v = df["weight_kg"].to_numpy(dtype=float, na_value=np.nan)
    v = v[~np.isnan(v)]
    counts, edges = np.histogram(v, bins=n, range=(s, s + n * w))
    return pd.DataFrame({"x_lo": edges[:-1], "count": counts})


# ---- 10. M4 line reduction -----------------------------------------------------------
def _m4_hand(meta):
    """M4 (Jugel et al. 2014) as a person would write it for DuckDB: per pixel column the
    points holding the min, max, first and last value, in one scan (arg_min / arg_max)."""
    r = meta["reduced"]
    lo, hi, w = float(r["x_min"]), float(r["x_max"]), int(r["width_px"])
    return f"""
WITH p AS (SELECT t, v, least(floor((epoch(t) - {lo!r}) * {w} / {hi - lo!r}), {w - 1}) AS px
           FROM walk WHERE t IS NOT NULL AND v IS NOT NULL),
a AS (SELECT px, arg_min(t, v) AS t1, min(v) AS v1, arg_max(t, v) AS t2, max(v) AS v2,
             min(t) AS t3, arg_min(v, t) AS v3, max(t) AS t4, arg_max(v, t) AS v4
      FROM p GROUP BY px)
SELECT DISTINCT t, v FROM (SELECT t1 AS t, v1 AS v FROM a UNION ALL SELECT t2, v2 FROM a
                           UNION ALL SELECT t3, v3 FROM a UNION ALL SELECT t4, v4 FROM a)
ORDER BY t, v"""


def _m4_naive(df, meta):
    r = meta["reduced"]
    w = int(r["width_px"])
    d = df.dropna()
    x = pd.to_datetime(d["t"], utc=True).astype("int64") / 1e9
    lo, hi = x.min(), x.max()
    px = np.minimum(np.floor((x - lo) * w / (hi - lo)), w - 1)
    g = d.assign(px=px.to_numpy()).groupby("px")["v"]
    return pd.DataFrame({"min": g.min(), "max": g.max(), "first": g.first(), "last": g.last()})


# ---- 11./12. brushing: the same histogram, a new time window on every request ----------
# A user drags a brush over a time axis: every request has a new delivered_at window, so
# neither the result cache (off: no-cache) nor anything keyed by the filter's values helps.
# Request i's window starts 61*i seconds after 2025-03-01 and lasts 120 days plus i % 7
# hours: every i gives a new pair of values.
_BRUSH_T0 = 1740787200  # 2025-03-01T00:00:00Z


def _brush_window(i: int) -> tuple[str, str]:
    import datetime as dt

    lo = dt.datetime.fromtimestamp(_BRUSH_T0 + 61 * i, dt.timezone.utc)
    hi = lo + dt.timedelta(days=120, hours=i % 7)
    return lo.strftime("%Y-%m-%dT%H:%M:%SZ"), hi.strftime("%Y-%m-%dT%H:%M:%SZ")


def _brush_where(i: int) -> list[dict[str, Any]]:
    lo, hi = _brush_window(i)
    return [{"column": "delivered_at", "gte": lo, "lt": hi}]


def _brush_where_sql(i: int) -> str:
    lo, hi = _brush_window(i)
    return (f"delivered_at >= TIMESTAMPTZ '{lo[:-1]}+00' "
            f"AND delivered_at < TIMESTAMPTZ '{hi[:-1]}+00'")


def _brush_bins_hand(meta, i):
    """Data-driven bins: the person knows the layout (from the answer), one statement."""
    s, w, n = _bin(meta, "x")
    stop = s + n * w
    return f"""
WITH g AS (SELECT {_bin_sql('distance_km', s, w, n, stop)} AS k, count(*) AS n
           FROM deliveries WHERE {_brush_where_sql(i)} GROUP BY k)
SELECT {s!r} + k * {w!r} AS x_lo, {s!r} + (k + 1) * {w!r} AS x_hi, n AS count
FROM g ORDER BY k NULLS LAST"""


_BRUSH_W, _BRUSH_O = 2.5, 0.0


def _brush_width_hand(meta, i):
    """width/origin bins, value range unknown: plain floor((v - origin) / width)."""
    w, o = _BRUSH_W, _BRUSH_O
    return f"""
WITH g AS (SELECT floor((distance_km - {o!r}) / {w!r}) AS k, count(*) AS n
           FROM deliveries WHERE {_brush_where_sql(i)} GROUP BY k)
SELECT {o!r} + k * {w!r} AS x_lo, {o!r} + (k + 1) * {w!r} AS x_hi, n AS count
FROM g ORDER BY k NULLS LAST"""


def suite() -> list[Case]:
    return [
        Case("histogram", "histogram, 40 nice bins",
             {"source": SRC, "channels": {"x": {"column": "distance_km", "bin": {"bins": 40}},
                                          "y": {"agg": "count"}}},
             _hist_hand, ["distance_km"], _hist_naive),
        Case("hourly", "hourly time series, count + avg",
             {"source": SRC, "channels": {"x": {"column": "delivered_at", "trunc": "hour"},
                                          "y": {"agg": "count"},
                                          "size": {"agg": "avg", "column": "distance_km"}},
              "limit": 20000},
             _hourly_hand, ["delivered_at", "distance_km"], _hourly_naive),
        Case("top_n", "top 20 couriers + (other)",
             {"source": SRC, "channels": {"x": {"column": "courier_id", "top": 20},
                                          "y": {"agg": "count"}},
              "sort": [{"channel": "y", "desc": True}]},
             _top_hand, ["courier_id"], _top_naive),
        Case("heatmap", "2-D binned heat map 50 x 50",
             {"source": SRC, "channels": {"x": {"column": "distance_km", "bin": {"bins": 50}},
                                          "y": {"column": "weight_kg", "bin": {"bins": 50}},
                                          "color": {"agg": "count"}}},
             _heat_hand, ["distance_km", "weight_kg"], _heat_naive),
        Case("stacked", "stacked bars depot x vehicle",
             {"source": SRC, "channels": {"x": {"column": "depot"}, "y": {"agg": "count"},
                                          "color": {"column": "vehicle"}},
              "stack": "sum"},
             _stack_hand, ["depot", "vehicle"], _stack_naive),
        Case("facets", "delay histogram faceted region x vehicle",
             {"source": SRC, "channels": {"x": {"column": "delay_min", "bin": {"bins": 30}},
                                          "y": {"agg": "count"}},
              "facet": {"row": {"column": "region"}, "col": {"column": "vehicle"}}},
             _facet_hand, ["delay_min", "region", "vehicle"], _facet_naive),
        Case("quantiles", "p90 delay + median distance per vehicle",
             {"source": SRC, "channels": {"x": {"column": "vehicle"},
                                          "y": {"agg": "quantile", "q": 0.9, "column": "delay_min"},
                                          "size": {"agg": "median", "column": "distance_km"}}},
             _quant_hand, ["vehicle", "delay_min", "distance_km"], _quant_naive),
        Case("count_distinct", "distinct postcodes per depot",
             {"source": SRC, "channels": {"x": {"column": "depot"},
                                          "y": {"agg": "count_distinct", "column": "postcode"}}},
             _distinct_hand, ["depot", "postcode"], _distinct_naive),
        Case("filtered_hist", "filtered histogram (vans, 2026), 30 bins",
             {"source": SRC, "channels": {"x": {"column": "weight_kg", "bin": {"bins": 30}},
                                          "y": {"agg": "count"}},
              "where": [{"column": "vehicle", "eq": "van"},
                        {"column": "delivered_at", "gte": "2026-01-01T00:00:00Z"}]},
             _filtered_hand, ["weight_kg"], _filtered_naive, where_sql=_WHERE),
        Case("m4", "M4 line reduction, 1000 px",
             {"source": WALK, "channels": {"x": {"column": "t"}, "y": {"column": "v"}},
              "reduce": {"method": "m4", "width_px": 1000}},
             _m4_hand, ["t", "v"], _m4_naive, table="walk"),
        Case("brush_bins", "brushed histogram, 40 nice bins, new time window per request",
             {"source": SRC, "channels": {"x": {"column": "distance_km", "bin": {"bins": 40}},
                                          "y": {"agg": "count"}}},
             _brush_bins_hand, ["distance_km"], None, vary=_brush_where),
        Case("brush_width", "brushed histogram, width 2.5 origin 0, new time window per request",
             {"source": SRC, "channels": {"x": {"column": "distance_km",
                                                "bin": {"width": _BRUSH_W, "origin": _BRUSH_O}},
                                          "y": {"agg": "count"}}},
             _brush_width_hand, ["distance_km"], None, vary=_brush_where),
    ]
