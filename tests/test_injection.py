"""Hostile input: an injection corpus tried in every string position of a chart request, on
DuckDB and on PostgreSQL, plus the ``filter_sql`` allow-list.

Rule checked (DESIGN "Rules of the house"): identifiers only come from the catalog and values
only become typed literals, so every payload either gets a 4xx problem+json with a JSON
Pointer, or is matched as a plain literal: a ``where`` comparison with the payload matches
exactly the rows whose value equals the payload text (computed here in Python; for this
corpus that is 0 rows). No answer is ever 5xx, and a canary table in each engine is unchanged
afterwards. The corpus covers quote breaking, comments, stacked statements, UNION, file and
system functions, ATTACH / COPY / PRAGMA / SET / INSTALL / LOAD, unicode look-alikes, very
long strings and NUL bytes (see ``PAYLOADS``).
"""

from __future__ import annotations

import os

import pytest


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402


# =====================================================================================
# the corpus
# =====================================================================================

def _corpus() -> list[str]:
    quote_breaking = [
        "'", "''", "'''", '"', '""', "`", "\\", "\\'", "\\\"", "';", "'--", "' --", "'#",
        "' OR '1'='1", "' OR '1'='1' --", "' OR 1=1 --", "' OR 1=1#", "' OR 1=1/*",
        "\" OR \"\"=\"", "\" OR 1=1 --", "') OR ('a'='a", "')) OR (('a'='a", "' OR ''='",
        "1' OR '1'='1", "1 OR 1=1", "1) OR (1=1", "North Yard' OR 'x'='x",
        "North Yard'--", "North Yard\" --", "' AND 1=0 UNION SELECT 1 --", "x' AND sleep(5)--",
        "' OR pg_sleep(5) IS NULL --", "'||'", "' || '", "'+'", "admin'--",
        "' OR 'a' LIKE '%", "%' OR 1=1 --", "%", "_", "%%", "\\%", "[", "]", "^", "$",
        "$$", "$$; DROP TABLE canary; $$", "$tag$ x $tag$", "E'\\x27'", "U&'\\0027'",
        "e'\\'' OR 1=1 --", "''; --", "'; --", "\\'; DROP TABLE canary; --",
    ]
    comments = [
        "/*", "*/", "/**/", "--", "#", "-- comment", "/* comment */", "x'/**/OR/**/'1'='1",
        "North Yard'/*", "*/ OR 1=1 /*", "/*! OR 1=1 */", "--\nOR 1=1", "#\nOR 1=1",
    ]
    stacked = [
        "; DROP TABLE canary", "'; DROP TABLE canary; --", "\"; DROP TABLE canary; --",
        "'); DROP TABLE canary; --", "'; DELETE FROM canary; --", "'; UPDATE canary SET v='pwned'; --",
        "'; INSERT INTO canary VALUES (666, 'pwned'); --", "'; CREATE TABLE pwned (i int); --",
        "'; TRUNCATE canary; --", "'; ALTER TABLE canary RENAME TO gone; --",
        "1; SELECT 1", "North Yard'; SELECT * FROM canary; --", "'; COMMIT; DROP TABLE canary; --",
        "'; BEGIN; DELETE FROM canary; COMMIT; --",
    ]
    union = [
        "' UNION SELECT * FROM canary --", "' UNION ALL SELECT NULL, NULL --",
        "' UNION SELECT v, i FROM canary --", "' UNION SELECT version(), 1 --",
        "1 UNION SELECT 1", "x' UNION SELECT table_name FROM information_schema.tables --",
        "' UNION SELECT usename FROM pg_user --", "') UNION (SELECT 1) --",
        "' INTERSECT SELECT 1 --", "' EXCEPT SELECT 1 --",
    ]
    functions = [
        "read_csv('/etc/passwd')", "' || (SELECT * FROM read_csv('/etc/passwd')) || '",
        "read_text('/etc/hostname')", "read_parquet('/tmp/x.parquet')", "glob('/*')",
        "'; SELECT * FROM '/etc/passwd'; --", "pg_read_file('/etc/passwd')",
        "'; SELECT pg_read_file('/etc/passwd'); --", "pg_ls_dir('.')", "lo_import('/etc/passwd')",
        "system('id')", "'; SELECT system('id'); --", "getenv('HOME')", "current_setting('data_directory')",
        "version()", "pg_sleep(10)", "'; SELECT pg_sleep(10); --", "dblink('host=x', 'select 1')",
        "'; COPY (SELECT 1) TO PROGRAM 'id'; --", "query('SELECT 1')", "query_table('canary')",
        "json_extract('{}', '$')", "current_user", "session_user", "now()",
    ]
    commands = [
        "ATTACH '/tmp/pwn.duckdb' AS pwn", "'; ATTACH ':memory:' AS m; --", "DETACH canary",
        "COPY canary TO '/tmp/pwn.csv'", "'; COPY canary TO '/tmp/pwn.csv'; --",
        "'; COPY canary FROM '/etc/passwd'; --", "PRAGMA database_list", "'; PRAGMA show_tables; --",
        "'; PRAGMA enable_external_access; --", "SET enable_external_access = true",
        "'; SET default_transaction_read_only = off; --", "'; RESET ALL; --",
        "'; SET SESSION CHARACTERISTICS AS TRANSACTION READ WRITE; --", "INSTALL httpfs",
        "'; INSTALL httpfs; LOAD httpfs; --", "LOAD '/tmp/evil.so'", "'; LOAD 'evil'; --",
        "CALL pragma_version()", "EXPORT DATABASE '/tmp/pwn'", "'; CHECKPOINT; --", "'; VACUUM; --",
        "'; CREATE MACRO pwn(a) AS a; --", "'; CREATE OR REPLACE FUNCTION pwn() RETURNS int AS 'select 1' LANGUAGE sql; --",
        "'; GRANT ALL ON canary TO PUBLIC; --", "'; DO $$ BEGIN PERFORM 1; END $$; --",
        "'; LISTEN x; NOTIFY x; --", "'; PREPARE p AS SELECT 1; EXECUTE p; --",
    ]
    lookalikes = [
        "\u02bc OR 1=1 --", "\uff07 OR 1=1 --", "\u2018 OR \u20191\u2019=\u20191",
        "\u2019; DROP TABLE canary; --", "\uff1b DROP TABLE canary", "\uff02 OR 1=1",
        "North\u00a0Yard", "North Yard\u200b", "\u202eNorth Yard", "\ufeffNorth Yard",
        "\u041dorth Yard", "Nort\u0570 Yard", "\uff2eorth \uff39ard", "N\u0308orth Yard",
        "d\u0435pot", "\uff44\uff45\uff50\uff4f\uff54", "\u2028OR 1=1", "\u0000\u2019",
        "\U0001f4a3'; DROP TABLE canary; --", "\u00bfQu\u00e9?", "\u6771\u4eac", "\u03a9",
        "\ud7ff", "\ue000", "\u0085", "\u200d\u200d",
    ]
    long = [
        "A" * 300, "A" * 5000, "'" * 2000, "' OR 1=1 -- " * 400, "(" * 3000,
        "NOT " * 2000 + "true", "x" * 70_000, ("'; DROP TABLE canary; --" * 40)[:1000],
    ]
    nul = [
        "\x00", "abc\x00", "\x00' OR 1=1 --", "North Yard\x00", "\x00; DROP TABLE canary",
        "'\x00'", "\x00" * 100, "a\x00b\x00c",
    ]
    control = ["\n", "\r\n", "\t", "\x1b[31m", "\x7f", "\x08", "line1\nline2", "\r", "\x0b\x0c"]
    misc = [
        "NULL", "null", "None", "true", "false", "1e309", "-1e309", "NaN", "Infinity", "-0",
        "0x41", "1 AND 1=1", "?", "$1", ":name", "%s", "{0}", "{{7*7}}", "${jndi:ldap://x/a}",
        "<script>alert(1)</script>", "../../etc/passwd", "C:\\Windows\\win.ini", "file:///etc/passwd",
        "http://169.254.169.254/latest/meta-data/", "\"depot\"", "s.depot", "main.canary",
        "information_schema.tables", "pg_catalog.pg_user", "*", "depot, (SELECT 1)",
        "canary", "deliveries", "_sluice_n", "\"_sluice_n\"", "{\"a\": 1}", "[1, 2]",
    ]
    out: list[str] = []
    for group in (quote_breaking, comments, stacked, union, functions, commands, lookalikes,
                  long, nul, control, misc):
        for p in group:
            if p not in out:
                out.append(p)
    return out


PAYLOADS = _corpus()


def test_corpus_is_large_and_varied():
    assert len(PAYLOADS) >= 200, len(PAYLOADS)
    assert any("\x00" in p for p in PAYLOADS) and any(len(p) > 10_000 for p in PAYLOADS)
    assert any(ord(c) > 0x2000 for p in PAYLOADS for c in p)


# =====================================================================================
# engines under test
# =====================================================================================

BASE = {"channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}


@pytest.fixture(scope="module")
def df():
    return fx.frame()


@pytest.fixture(scope="module")
def duck_client(tmp_path_factory, df):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    root = tmp_path_factory.mktemp("injection")
    db = root / "hostile.duckdb"
    fx.build_duckdb(db, df)
    cfg = root / "sluice.toml"
    cfg.write_text(fx.config(db) + "[server]\nrequest_log = false\n")
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        c.sluice_source = "deliveries"
        c.sluice_db = db
        yield c


@pytest.fixture(scope="module")
def pg_client(tmp_path_factory, df):
    why = fx.postgres_up()
    if why is not None:
        pytest.skip(f"PostgreSQL is not reachable on 127.0.0.1:5432: {why}")
    try:
        from app.engines import postgres  # noqa: F401
    except ImportError:
        pytest.skip("app/engines/postgres.py is not there (issue 3)")
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    table, canary = fx.build_postgres(df)
    root = tmp_path_factory.mktemp("injection_pg")
    cfg = root / "sluice.toml"
    cfg.write_text(f'[sources.deliveries]\nengine = "postgres"\ndsn = "{fx.PG_DSN}"\n'
                   f'table = "{table}"\n[server]\nrequest_log = false\n')
    try:
        with TestClient(create_app(load_settings(cfg, environ={})),
                        raise_server_exceptions=False) as c:
            c.sluice_source = "deliveries"
            c.sluice_canary = canary
            yield c
    finally:
        fx.drop_postgres()


def _canary_rows_duckdb(client) -> list[tuple]:
    # through the app's own engine: DuckDB shares one database instance per file and process
    eng = client.app.state.catalog.engine(client.sluice_source)
    return [(r["i"], r["v"]) for r in eng.execute("SELECT i, v FROM canary ORDER BY i").to_pylist()]


def _canary_rows_pg(canary: str) -> list[tuple]:
    import psycopg

    with psycopg.connect(fx.PG_DSN, connect_timeout=3) as con:
        return [tuple(r) for r in con.execute(f'SELECT i, v FROM "{canary}" ORDER BY i').fetchall()]


# =====================================================================================
# positions
# =====================================================================================

def _set(body: dict, path: tuple, value) -> dict:
    import copy

    out = copy.deepcopy(body)
    node = out
    for p in path[:-1]:
        node = node[p]
    node[path[-1]] = value
    return out


def _expected_eq(df, column: str, payload: str) -> int:
    return int((df[column] == payload).sum())


#: (position id, body builder, what a 200 must satisfy: None or a check function)
def _positions(source: str):
    base = {"source": source, **BASE}
    top = {"source": source, "channels": {"x": {"column": "depot", "top": 2}, "y": {"agg": "count"}}}
    ts = {"source": source, "channels": {"x": {"column": "delivered_at", "trunc": "month"},
                                         "y": {"agg": "count"}}}
    return [
        ("source", lambda p: _set(base, ("source",), p), "4xx"),
        ("key_column", lambda p: _set(base, ("channels", "x", "column"), p), "4xx"),
        ("measure_column", lambda p: _set(base, ("channels", "y"), {"agg": "count_distinct", "column": p}), "4xx"),
        ("where_column", lambda p: _set(base, ("where",), [{"column": p, "eq": "x"}]), "4xx"),
        ("where_eq", lambda p: _set(base, ("where",), [{"column": "depot", "eq": p}]), "eq"),
        ("where_in", lambda p: _set(base, ("where",), [{"column": "depot", "in": [p, "Nowhere"]}]), "eq"),
        ("where_not_in", lambda p: _set(base, ("where",), [{"column": "vehicle", "not_in": [p]}]), "not_in"),
        ("where_contains", lambda p: _set(base, ("where",), [{"column": "depot", "contains": p}]), "contains"),
        ("where_starts_with", lambda p: _set(base, ("where",), [{"column": "region", "starts_with": p}]), "starts_with"),
        ("where_time", lambda p: _set(base, ("where",), [{"column": "delivered_at", "gte": p}]), "4xx"),
        ("sort", lambda p: _set(base, ("sort",), [{"channel": p}]), "4xx"),
        ("other_label", lambda p: _set(top, ("channels", "x", "other_label"), p), "label"),
        ("name", lambda p: _set(base, ("channels", "y", "name"), p), "name"),
        ("tz", lambda p: _set(ts, ("channels", "x", "tz"), p), "4xx"),
        ("trunc", lambda p: _set(ts, ("channels", "x", "trunc"), p), "4xx"),
        ("filter_sql", lambda p: _set(base, ("filter_sql",), p), "filter"),
        ("filter_sql_in_literal", lambda p: _set(base, ("filter_sql",), f"depot = '{p}'"), "filter"),
        # share's condition passes the same allow-list (planner/aggregates.py, compile_filter_sql)
        ("share_condition", lambda p: _set(base, ("channels", "y"), {"agg": "share", "condition": p}),
         "share"),
    ]


POSITION_IDS = [p[0] for p in _positions("x")]


def _check(resp, kind: str, payload: str, df, where: str) -> None:
    status = resp.status_code
    assert status < 500, f"{where}: {status} {resp.text[:500]}"
    if status >= 400:
        assert resp.headers["content-type"].startswith("application/problem+json"), where
        prob = resp.json()
        assert prob["status"] == status and "detail" in prob, where
        if status == 422:
            assert isinstance(prob.get("pointer"), str) and prob["pointer"].startswith("/"), (where, prob)
        return
    assert kind != "4xx", f"{where}: payload accepted (200) where only a 4xx is right: {resp.text[:300]}"
    out = resp.json()
    stats = out["stats"]
    matched = stats["matched_rows"]
    if kind == "eq":
        assert matched == _expected_eq(df, "depot", payload), where
    elif kind == "not_in":
        assert matched == int((df["vehicle"].notna() & (df["vehicle"] != payload)).sum()), where
    elif kind == "contains":
        assert matched == int(df["depot"].map(lambda v: v is not None and payload in v).sum()), where
    elif kind == "starts_with":
        assert matched == int(df["region"].map(lambda v: v is not None and v.startswith(payload)).sum()), where
    elif kind == "label":
        labels = out["data"]["depot"]
        assert payload in labels, (where, labels)  # the fold label comes back verbatim
        assert matched == len(df), where
    elif kind == "name":
        # verbatim, or with the channel prefixed when it would clash (DEVELOPERS: names)
        got = [c["name"] for c in out["columns"]]
        assert (payload in got and payload in out["data"]) or f"y_{payload}" in got, (where, got)
        assert matched == len(df), where
    elif kind == "filter":
        assert 0 <= matched <= len(df), where
    elif kind == "share":  # a condition measures, never filters: every row is matched
        assert matched == len(df), where
        assert all(v is None or 0.0 <= v <= 1.0 for v in out["data"]["share"]), where


def _run_corpus(client, position: str, df) -> dict[int, int]:
    build, kind = next((b, k) for pid, b, k in _positions(client.sluice_source) if pid == position)
    seen: dict[int, int] = {}
    for i, payload in enumerate(PAYLOADS):
        if position == "source" and payload == client.sluice_source:
            continue  # the one payload that IS a configured source
        body = build(payload)
        resp = client.post("/v1/chart", json=body)
        seen[resp.status_code] = seen.get(resp.status_code, 0) + 1
        _check(resp, kind, payload, df, f"{position} payload #{i} {payload[:60]!r}")
    return seen


@pytest.mark.parametrize("position", POSITION_IDS)
def test_duckdb_corpus(duck_client, df, position):
    before = _canary_rows_duckdb(duck_client)
    seen = _run_corpus(duck_client, position, df)
    assert not [s for s in seen if s >= 500], seen
    assert _canary_rows_duckdb(duck_client) == before == fx.CANARY
    r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE})
    assert r.status_code == 200 and r.json()["stats"]["source_rows"] == len(df)


#: positions refused before any SQL exists are engine-independent: DuckDB covers them
ENGINE_POSITIONS = [p for p in POSITION_IDS
                    if p not in ("source", "key_column", "measure_column", "where_column",
                                 "where_time", "sort", "tz", "trunc")]


@pytest.mark.parametrize("position", ENGINE_POSITIONS)
def test_postgres_corpus(pg_client, df, position):
    before = _canary_rows_pg(pg_client.sluice_canary)
    seen = _run_corpus(pg_client, position, df)
    assert not [s for s in seen if s >= 500], seen
    assert _canary_rows_pg(pg_client.sluice_canary) == before == fx.CANARY
    r = pg_client.post("/v1/chart", json={"source": "deliveries", **BASE})
    assert r.status_code == 200 and r.json()["stats"]["source_rows"] == len(df)


def test_duckdb_file_untouched_by_the_corpus(duck_client):
    st = os.stat(duck_client.sluice_db)
    for payload in PAYLOADS[:40]:
        duck_client.post("/v1/chart", json={"source": "deliveries", **BASE, "filter_sql": payload})
    st2 = os.stat(duck_client.sluice_db)
    assert (st.st_size, st.st_mtime_ns) == (st2.st_size, st2.st_mtime_ns)


def test_sql_route_is_as_strict(duck_client):
    """/v1/sql plans the same request: a payload can only ever appear as a quoted literal."""
    for payload in PAYLOADS[:80]:
        body = {"source": "deliveries", **BASE, "where": [{"column": "depot", "eq": payload}]}
        r = duck_client.post("/v1/sql", json=body)
        assert r.status_code < 500
        if r.status_code == 200:
            import sqlglot

            for sql in r.json()["sql"]:
                parsed = sqlglot.parse(sql, read="duckdb")
                assert len(parsed) == 1  # one statement, whatever the payload
                lits = [lit.this for lit in parsed[0].find_all(sqlglot.exp.Literal) if lit.is_string]
                assert payload in lits


# =====================================================================================
# filter_sql: what the allow-list accepts and how it answers
# =====================================================================================

ACCEPTED = [
    ("fee > 10 AND depot IN ('North Yard')", lambda d: (d.fee > 10) & (d.depot == "North Yard")),
    ("fee > 10 and depot in ('North Yard', 'Harbour')", lambda d: (d.fee > 10) & d.depot.isin(["North Yard", "Harbour"])),
    ("NOT express", lambda d: ~d.express),
    ("express = true OR weight BETWEEN 10 AND 20", lambda d: d.express | d.weight.between(10, 20)),
    ("depot IS NULL", lambda d: d.depot.isna()),
    ("depot IS NOT NULL AND region <> 'north'", lambda d: d.depot.notna() & (d.region != "north")),
    ("lower(depot) LIKE 'north%'", lambda d: d.depot.fillna("").str.lower().str.startswith("north")),
    ("upper(vehicle) = 'VAN'", lambda d: d.vehicle == "van"),
    ("length(region) = 4", lambda d: d.region.str.len() == 4),
    ("abs(fee - 10) < 2", lambda d: (d.fee - 10).abs() < 2),
    ("round(distance_km, 0) = 10", lambda d: d.distance_km.round(0) == 10),
    ("weight % 7 = 0", lambda d: d.weight % 7 == 0),
    ("fee / weight > 1", lambda d: d.fee / d.weight > 1),
    ("fee * 2 + 1 >= 30", lambda d: d.fee * 2 + 1 >= 30),
    ("-fee < -20", lambda d: -d.fee < -20),
    ("coalesce(depot, 'none') = 'none'", lambda d: d.depot.isna()),
    ("delivered_at >= '2026-03-01' AND delivered_at < DATE '2026-04-01'",
     lambda d: (d.delivered_at >= "2026-03-01") & (d.delivered_at < "2026-04-01")),
    ("\"depot\" = 'Harbour'", lambda d: d.depot == "Harbour"),
    ("DEPOT = 'Harbour'", lambda d: d.depot == "Harbour"),
    ("depot = 'it''s'", lambda d: d.depot == "it's"),
    ("vehicle ILIKE 'CARGO%'", lambda d: d.vehicle.str.lower().str.startswith("cargo")),
    ("((fee > 5) AND (fee < 6)) OR weight = 1", lambda d: ((d.fee > 5) & (d.fee < 6)) | (d.weight == 1)),
    ("fee / 0 IS NULL", lambda d: d.fee == d.fee),
    ("floor(fee) = 3 OR ceil(fee) = 9", lambda d: (d.fee // 1 == 3) | (-(-d.fee // 1) == 9)),
    ("trim(' Harbour ') = depot", lambda d: d.depot == "Harbour"),
    ("@fee > 20", lambda d: d.fee.abs() > 20),  # DuckDB's @ is abs(): allow-listed
]

REFUSED = [
    "fee > 10; DROP TABLE canary", "fee > 10 -- comment", "fee > 10 /* c */",
    "fee > (SELECT max(i) FROM canary)", "depot IN (SELECT v FROM canary)",
    "EXISTS (SELECT 1)", "read_csv('/etc/passwd') IS NULL", "pg_read_file('/etc/passwd') = ''",
    "getenv('HOME') = ''", "system('id') = 0", "version() = ''", "now() > delivered_at",
    "CAST(fee AS VARCHAR) = '1'", "fee::VARCHAR = '1'", "canary.i = 1", "s.fee > 1",
    "main.deliveries.fee > 1", "nope > 1", "depot = 1", "fee = 'ten'", "fee", "'text'", "1",
    "fee > $1", "fee > ?", "fee > :x", "CASE WHEN fee > 1 THEN true END",
    "row_number() OVER () > 1", "fee > 1 garbage", "SELECT 1", "DROP TABLE canary",
    "ATTACH 'x' AS y", "PRAGMA database_list", "SET x = 1", "depot = 'a\x00'", "",
    "   ", "(" * 60 + "true" + ")" * 60, "fee IN ()", "depot LIKE 1", "express > true",
    "delivered_at > 'yesterday'", "fee > 1e999", "round(fee, 99) > 1", "lower(fee) = 'x'",
    "depot ~ 'a'", "depot SIMILAR TO 'a'", "fee ^ 2 > 1", "depot || 'x' = 'y'",
    "fee > 1 UNION SELECT 1", "x'41' = depot", "E'\\x41' = depot", "fee > 1 AND",
    "COLLATE depot", "depot COLLATE \"C\" = 'x'", "[1,2] = [1,2]", "{'a': 1} IS NULL",
    "depot->>'a' = 'b'", "fee BETWEEN SYMMETRIC 2 AND 1",
]


def test_filter_sql_accepted_matches_pandas(duck_client, df):
    for text, mask in ACCEPTED:
        r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE, "filter_sql": text})
        assert r.status_code == 200, (text, r.text[:400])
        want = int(mask(df).fillna(False).astype(bool).sum())
        assert r.json()["stats"]["matched_rows"] == want, text


def test_filter_sql_is_anded_with_where(duck_client, df):
    r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE, "filter_sql": "fee > 10",
                                            "where": [{"column": "region", "eq": "north"}]})
    assert r.status_code == 200
    assert r.json()["stats"]["matched_rows"] == int(((df.fee > 10) & (df.region == "north")).sum())


@pytest.mark.parametrize("text", REFUSED)
def test_share_condition_refused_with_its_pointer(duck_client, text):
    body = {"source": "deliveries", **BASE}
    body["channels"] = {**BASE["channels"], "y": {"agg": "share", "condition": text}}
    r = duck_client.post("/v1/chart", json=body)
    assert 400 <= r.status_code < 500, (text, r.status_code, r.text[:300])
    assert r.json()["pointer"] == "/channels/y/condition", r.json()


@pytest.mark.parametrize("text", REFUSED)
def test_filter_sql_refused_with_pointer_and_quote(duck_client, text):
    r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE, "filter_sql": text})
    assert r.status_code == 422, (text, r.status_code, r.text[:300])
    assert r.headers["content-type"].startswith("application/problem+json")
    p = r.json()
    assert p["pointer"] == "/filter_sql", p
    if text.strip() and "\x00" not in text and len(text) < 100:
        # the detail quotes the offending text (or the part of it at fault)
        assert "'" in p["detail"] or '"' in p["detail"] or "(" in p["detail"], p["detail"]


def test_filter_sql_detail_quotes_offending_part(duck_client):
    r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE,
                                            "filter_sql": "fee > 1 AND read_csv('/etc/passwd') IS NULL"})
    assert r.status_code == 422 and "read_csv('/etc/passwd')" in r.json()["detail"].lower()
    r = duck_client.post("/v1/chart", json={"source": "deliveries", **BASE, "filter_sql": "depott = 'x'"})
    p = r.json()
    assert r.status_code == 422 and "'depott'" in p["detail"] and "depot" in p["suggestions"]


def test_filter_sql_in_json_schema(duck_client):
    schema = duck_client.get("/openapi.json").json()
    props = schema["components"]["schemas"]["ChartRequest"]["properties"]
    assert "filter_sql" in props and "allow-list" in props["filter_sql"]["description"]
    assert props["filter_sql"]["anyOf"][0]["maxLength"] == 4096


def test_filter_sql_postgres_matches_duckdb(pg_client, duck_client):
    for text, _ in ACCEPTED:
        body = {"source": "deliveries", **BASE, "filter_sql": text}
        a, b = duck_client.post("/v1/chart", json=body), pg_client.post("/v1/chart", json=body)
        assert a.status_code == b.status_code == 200, (text, b.text[:300])
        assert a.json()["stats"]["matched_rows"] == b.json()["stats"]["matched_rows"], text
        assert a.json()["data"] == b.json()["data"], text


def test_filter_sql_planner_renders_only_catalog_identifiers():
    """Pure planner check, every dialect: the rebuilt tree names only catalog columns."""
    import sqlglot

    from planner.dialects import DIALECTS
    from planner.filter_sql import compile_filter_sql
    from planner.schema import ColumnInfo, SourceSchema

    schema = SourceSchema("d", ("d",), {c.name: c for c in [
        ColumnInfo("fee", "double", "DOUBLE"), ColumnInfo("depot", "string", "VARCHAR")]})
    text = "fee > 10 AND depot IN ('x''; DROP TABLE t; --') AND lower(depot) LIKE '%a%'"
    for name, d in DIALECTS.items():
        e = compile_filter_sql(text, schema, d)
        rendered = d.render(e)
        parsed = sqlglot.parse(rendered, read=d.sqlglot or None)
        assert len(parsed) == 1, (name, rendered)  # one expression, whatever the literal holds
        cols = {c.name for c in parsed[0].find_all(sqlglot.exp.Column)}
        assert cols == {"fee", "depot"}, (name, rendered)
        lits = [lit.this for lit in parsed[0].find_all(sqlglot.exp.Literal, sqlglot.exp.National)]
        assert any("x'; DROP TABLE t; --" in str(v) for v in lits), (name, rendered)
