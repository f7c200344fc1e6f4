"""The naive path's server (benchmark only, NOT part of sluice): a plain rows endpoint.

``GET /rows?table=T&cols=a,b&limit=N&where=CASE`` answers the raw columns of the first N
matching rows as JSON (``{"data": {"a": [...]}, "rows": n, "matched": total}``), the way a
hand-rolled "give me the data" endpoint would: Arrow -> Python objects -> orjson (timestamps
become RFC 3339 strings). ``matched`` lets the client extrapolate a sample to all rows.
"""

from __future__ import annotations

import os

import duckdb
import orjson
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import Response
from starlette.routing import Route

import cases

_CON = {"deliveries": duckdb.connect(os.environ["BENCH_DB"], read_only=True),
        "walk": duckdb.connect(os.environ["BENCH_WALK"], read_only=True)}
for _c in _CON.values():
    _c.execute("SET TimeZone = 'UTC'")
_WHERE = {c.name: c.where_sql for c in cases.suite() if c.where_sql}
_COUNTS: dict[tuple[str, str], int] = {}


def rows(request: Request) -> Response:
    q = request.query_params
    table = q["table"]
    if table not in _CON:
        return Response("unknown table", status_code=404)
    cur = _CON[table].cursor()
    cols = [c for c in q["cols"].split(",") if c]
    where = _WHERE.get(q.get("where", ""), "")
    where_sql = f" WHERE {where}" if where else ""
    limit = int(q.get("limit", "0")) or None
    key = (table, where)
    if key not in _COUNTS:
        _COUNTS[key] = cur.sql(f"SELECT count(*) FROM {table}{where_sql}").fetchall()[0][0]
    sql = f"SELECT {', '.join(chr(34) + c + chr(34) for c in cols)} FROM {table}{where_sql}"
    if limit:
        sql += f" LIMIT {limit}"
    t = cur.sql(sql).to_arrow_table()
    data = {name: t.column(name).to_pylist() for name in t.column_names}
    body = orjson.dumps({"data": data, "rows": t.num_rows, "matched": _COUNTS[key]})
    return Response(body, media_type="application/json")


app = Starlette(routes=[Route("/rows", rows)])
