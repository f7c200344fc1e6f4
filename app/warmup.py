"""Start-up warm-up: the first request of a fresh process plans as fast as the next ones.

sqlglot and the planner pay one-time costs on first use (dialect generator tables, lazily
built class-level caches, first calls through each construct). Without a warm-up the first
chart request of a process paid them (35-140 ms of planning, bench ``first_request``).

``warm_up(service)`` encodes a tiny answer of every column family (``_warm_answers``), then
plans one representative request per configured engine kind, through
the same public path as ``POST /v1/sql`` (``ChartService.plan_sql``), on the columns the
catalog introspects for the first source of that kind. Only the catalog's own statements
run (describe + row count, which the first request would run anyway): the requests use
bins with limits and explicit widths, so no extents statement is needed. Start-up never
fails because of it: a source that is down is skipped, and the whole warm-up is bounded by
``budget_s`` (it goes on in a daemon thread past that; a request never waits for it).
Last, every source an API key has a row condition on is introspected, so a condition that
does not fit its columns is logged at start-up (``[[keys]] rows``, app.catalog).
"""

from __future__ import annotations

import logging
import threading
import time
from typing import Any

log = logging.getLogger("sluice")


def _requests(source: str, columns: list[Any]) -> list[dict[str, Any]]:
    """Representative chart requests on ``source``'s own columns: a binned histogram with a
    time range and a category filter, a truncated time series with an average, and a
    width/origin histogram grouped by a category. Every layout has limits, so no extents
    statement runs at start-up."""
    num = next((c.name for c in columns if c.is_number), None)
    tim = next((c.name for c in columns if c.is_temporal), None)
    cat = next((c.name for c in columns if c.kind == "string"), None)
    where: list[dict[str, Any]] = []
    if tim is not None:
        where.append({"column": tim, "gte": "2000-01-01T00:00:00Z", "lt": "2100-01-01T00:00:00Z"})
    if cat is not None:
        where.append({"column": cat, "in": ["a", "b"]})
    out: list[dict[str, Any]] = []
    if num is not None:
        out.append({"source": source, "where": where,
                    "channels": {"x": {"column": num, "bin": {"bins": 20, "limits": [0, 100]}},
                                 "y": {"agg": "count"}}})
        by = {"color": {"column": cat}} if cat is not None else {}
        out.append({"source": source, "where": where[:1],
                    "channels": {"x": {"column": num, "bin": {"width": 5, "origin": 0,
                                                                  "limits": [0, 100]}},
                                 "y": {"agg": "count"}, **by}})
    if tim is not None:
        measure = {"agg": "avg", "column": num} if num is not None else {"agg": "count"}
        out.append({"source": source, "where": where[1:],
                    "channels": {"x": {"column": tim, "trunc": "day"}, "y": measure}})
    if not out and cat is not None:
        out.append({"source": source, "channels": {"x": {"column": cat}, "y": {"agg": "count"}}})
    return out


def _warm_answers() -> None:
    """Encode a tiny answer of every column family once: the first tz-aware timestamp
    pyarrow handles imports pandas when it is installed (~300 ms, measured on the demo:
    the first answer's ``timing_ms.shape`` was 311 ms, the next 1.9 ms), and the compute
    kernels and encoders load on first use."""
    import datetime as dt
    import decimal

    import pyarrow as pa

    from app import encode

    cols = [pa.chunked_array([pa.array([dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc), None],
                                       pa.timestamp("us", tz="UTC"))]),
            pa.chunked_array([pa.array([1.5, float("nan"), None])]),
            pa.chunked_array([pa.array([1, None], pa.int64())]),
            pa.chunked_array([pa.array([decimal.Decimal("1.25"), None], pa.decimal128(10, 2))]),
            pa.chunked_array([pa.array(["a", None])]),
            pa.chunked_array([pa.array([dt.date(2026, 1, 1), None], pa.date32())])]
    for tz in ("UTC", "Europe/Berlin"):
        encode.dumps({"data": [encode.wire_values(encode.normalize_column(c), tz) for c in cols],
                      "domains": [encode.domain(c, tz) for c in cols]})


def _warm(service: Any, report: dict[str, float]) -> None:
    from planner.model import ChartRequest

    try:
        _warm_answers()
        # the IANA zone names a request's tz is checked against: read from the system's
        # zone files once (~14 ms, the first zoned request's plan before)
        from planner.values import time_zone_names
        time_zone_names()
    except Exception as e:  # noqa: BLE001 - a warm-up never stops start-up
        log.debug("warm-up of the encoders and zone names: %s", e)

    catalog = service.catalog
    seen: set[str] = set()
    for name in catalog.names():
        kind = catalog.config(name).engine
        if kind in seen:
            continue
        t0 = time.perf_counter()
        planned = 0
        try:
            entry = catalog.entry(name)  # introspection the first request would do anyway
            for body in _requests(name, list(entry.schema.columns.values())):
                try:
                    service.plan_sql(ChartRequest.model_validate(body), None)
                    planned += 1
                except Exception as e:  # a column the planner refuses: warm with the rest
                    log.debug("warm-up: %s: %s", name, e)
        except Exception as e:  # the source is down or refuses: serve anyway
            log.warning("warm-up skipped source %r: %s", name, e)
            continue
        if planned:  # else the next source of this kind gets its turn
            seen.add(kind)
            report[kind] = round((time.perf_counter() - t0) * 1000.0, 3)
    _check_row_conditions(catalog)


def _check_row_conditions(catalog: Any) -> None:
    """Introspect every source an API key has a row condition on: the catalog checks each
    condition against the columns found and logs those that do not fit (app.catalog)."""
    keys = getattr(getattr(catalog, "settings", None), "keys", None) or []
    for name in dict.fromkeys(src for k in keys for src, _ in k.rows):
        try:
            catalog.entry(name)
        except Exception as e:  # noqa: BLE001 - down now: checked when it is first read
            log.warning("row conditions on source %r not checked yet: %s", name, e)


def warm_up(service: Any, budget_s: float = 5.0) -> dict[str, float]:
    """Warm the planner for every configured engine kind; returns ms per kind warmed
    within ``budget_s``. Never raises."""
    report: dict[str, float] = {}
    t = threading.Thread(target=_warm, args=(service, report), name="sluice-warm-up", daemon=True)
    t.start()
    t.join(budget_s)
    if t.is_alive():
        log.warning("warm-up still running after %.1f s; serving meanwhile", budget_s)
    return dict(report)
