"""Exports (CSV, Parquet), content negotiation and response compression.

Readers and references outside the project: Python's ``csv`` module and ``pandas.read_csv``
(RFC 4180), ``pyarrow.parquet`` and ``polars.read_parquet``, the ``gzip`` (RFC 1952),
``brotli`` (RFC 7932) and ``zstandard`` (RFC 8878) libraries; RFC 9110 sections 12.5.1 and
12.5.3 for the Accept / Accept-Encoding rules. The data is the project's own demo
(app/demo.py, 200,000 rows) so the 10,000-row answer is the one README measures.
"""

from __future__ import annotations

import csv
import decimal
import gzip
import io
import json
import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

ARROW = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"
SMALL = {"source": "deliveries", "channels": {
    "x": {"column": "delivered_at", "trunc": "quarter", "tz": "Europe/Berlin"},
    "color": {"column": "rating"},
    "y": {"agg": "count"}, "size": {"agg": "min", "column": "fee"},
    "opacity": {"agg": "avg", "column": "distance_km"}, "shape": {"agg": "max", "column": "on_time"}}}
#: 5,000 postcodes x on time yes/no/unknown, cut at 10,000 rows: the answer README measures
BIG = {"source": "deliveries", "limit": 10000, "channels": {
    "x": {"column": "postcode"}, "color": {"column": "on_time"},
    "y": {"agg": "count"}, "size": {"agg": "sum", "column": "fee"},
    "opacity": {"agg": "avg", "column": "distance_km"}}}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from fastapi.testclient import TestClient

    from app.demo import build_demo
    from app.main import create_app
    from app.settings import parse_settings

    root = tmp_path_factory.mktemp("exports")
    db = root / "demo.duckdb"
    build_demo(db, rows=200_000, progress=False)
    app = create_app(parse_settings({"sources": {"deliveries": {
        "engine": "duckdb", "path": str(db), "table": "deliveries"}},
        "server": {"request_log": False}}, "<exports>"))
    with TestClient(app) as c:
        yield c


def post(client, body, accept=None, encoding="identity"):
    headers = {"accept-encoding": encoding}
    if accept is not None:
        headers["accept"] = accept
    return client.post("/v1/chart", json=body, headers=headers)


def raw(client, body, accept, encoding):
    """The bytes on the wire (httpx would decode them), and the response headers."""
    headers = {"accept": accept, "accept-encoding": encoding}
    with client.stream("POST", "/v1/chart", json=body, headers=headers) as r:
        assert r.status_code == 200, r.read()
        return b"".join(r.iter_raw()), r.headers


# ---- content negotiation (RFC 9110 section 12.5.1) ----------------------------------------

@pytest.mark.parametrize("accept,want", [
    (None, "application/json"),
    ("*/*", "application/json"),
    ("application/json, text/plain, */*", "application/json"),  # a common client default
    ("text/csv", "text/csv"),
    ("text/*", "text/csv"),
    ("text/csv;q=0.4, application/json;q=0.8", "application/json"),
    ("text/*;q=0.3, text/csv;q=0.7, */*;q=0.5", "text/csv"),  # the specific range wins
    ("application/json;q=0, */*", ARROW),  # json refused: the next in the server's order
    (f"{PARQUET}", PARQUET),
    (f"{ARROW};q=0.9, {PARQUET}", PARQUET),
])
def test_accept_picks_the_format(client, accept, want):
    r = post(client, SMALL, accept)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].split(";")[0] == want
    assert "Accept" in r.headers.get("vary", "")


@pytest.mark.parametrize("accept", ["text/html", "application/xml", "text/csv;q=0",
                                    "image/*, application/pdf"])
def test_unsupported_accept_is_406_problem(client, accept):
    r = post(client, SMALL, accept)
    assert r.status_code == 406  # RFC 9110 section 15.5.7
    assert r.headers["content-type"] == "application/problem+json"  # RFC 9457
    p = r.json()
    assert p["type"] == "/problems/not-acceptable" and p["status"] == 406
    assert set(p["supported"]) == {"application/json", ARROW, "text/csv", PARQUET}


# ---- CSV ---------------------------------------------------------------------------------

def test_csv_matches_json_read_by_csv_module_and_pandas(client):
    pd = pytest.importorskip("pandas")
    js = json.loads(post(client, SMALL).content, parse_float=decimal.Decimal)
    r = post(client, SMALL, "text/csv")
    assert r.headers["content-type"].startswith("text/csv")
    assert r.headers["x-sluice-truncated"] == "false"
    text = r.content.decode("utf-8")
    assert "\r\n" in text  # RFC 4180: CRLF line breaks
    rows = list(csv.reader(io.StringIO(text)))
    names = [c["name"] for c in js["columns"]]
    assert rows[0] == names
    assert len(rows) - 1 == js["stats"]["result_rows"]

    def as_text(v):
        if v is None:
            return ""
        if isinstance(v, bool):
            return "true" if v else "false"
        return str(v)

    for i, row in enumerate(rows[1:]):
        assert row == [as_text(js["data"][n][i]) for n in names]  # decimals: the same digits
    df = pd.read_csv(io.BytesIO(r.content), dtype={"min_fee": str})
    ts = pd.to_datetime(df["delivered_at"], utc=True)
    want = pd.to_datetime(pd.Series(js["data"]["delivered_at"]), utc=True)
    assert (ts == want).all()
    assert df["min_fee"].tolist() == [str(v) for v in js["data"]["min_fee"]]
    assert df["count"].tolist() == js["data"]["count"]


def test_csv_says_when_the_answer_is_cut(client):
    r = post(client, {**BIG, "limit": 100}, "text/csv")
    assert r.headers["x-sluice-truncated"] == "true"
    assert len(list(csv.reader(io.StringIO(r.text)))) == 101


# ---- Parquet -----------------------------------------------------------------------------

def test_parquet_keeps_types_metadata_and_values(client):
    arrow = pa.ipc.open_stream(post(client, SMALL, ARROW).content).read_all()
    r = post(client, SMALL, PARQUET)
    assert r.content[:4] == b"PAR1" and r.content[-4:] == b"PAR1"  # Parquet file magic
    t = pq.read_table(io.BytesIO(r.content))
    assert t.schema.field("rating").type == pa.int16()  # demo: rating SMALLINT
    assert t.schema.field("min_fee").type == pa.decimal128(10, 2)  # demo: fee DECIMAL(10,2)
    assert t.schema.field("delivered_at").type == pa.timestamp("us", tz="Europe/Berlin")
    assert t.schema.field("count").type == pa.int64()
    assert t.schema.field("min_fee").metadata == {b"channel": b"size", b"role": b"measure"}
    meta = json.loads(t.schema.metadata[b"sluice"])
    assert meta["stats"]["result_rows"] == t.num_rows
    assert t.to_pylist() == arrow.to_pylist()
    pl = pytest.importorskip("polars")
    df = pl.read_parquet(io.BytesIO(r.content))
    assert df.schema["rating"] == pl.Int16
    assert df.schema["min_fee"] == pl.Decimal(10, 2)
    assert df.schema["delivered_at"] == pl.Datetime("us", "Europe/Berlin")
    assert df["delivered_at"].dt.strftime("%Y-%m-%d %H:%M").to_list()[0].endswith("-01 00:00")


# ---- compression (RFC 9110 section 12.5.3) ------------------------------------------------

def _decompress(coding: str, data: bytes) -> bytes:
    if coding == "gzip":
        return gzip.decompress(data)
    if coding == "br":
        import brotli

        return brotli.decompress(data)
    if coding == "zstd":
        import zstandard

        return zstandard.ZstdDecompressor().decompress(data)
    raise AssertionError(coding)


@pytest.mark.parametrize("header,want", [
    ("gzip", "gzip"), ("br", "br"), ("zstd", "zstd"),
    ("gzip, deflate, br, zstd", "zstd"),       # a browser's list: the server's preference
    ("gzip;q=1, br;q=0.5", "gzip"),
    ("*", "zstd"), ("br;q=0, *;q=0.1", "zstd"),
    ("identity", None), ("deflate", None), ("gzip;q=0", None),
])
def test_accept_encoding(client, header, want):
    identity, _ = raw(client, SMALL, "application/json", "identity")
    body, headers = raw(client, SMALL, "application/json", header)
    assert headers.get("content-encoding") == want
    assert "Accept-Encoding" in headers.get("vary", "")
    assert int(headers["content-length"]) == len(body)
    got = body if want is None else _decompress(want, body)
    # the answers differ only in timing_ms and cache (a hit after the first)
    a, b = json.loads(got), json.loads(identity)
    for d in (a, b):
        d.pop("timing_ms")
        d.pop("cache")
    assert a == b


@pytest.mark.parametrize("body,levels", [
    (SMALL, {"gzip": 6, "br": 5, "zstd": 3}),   # under 32 KiB: the middle levels
    (BIG, {"gzip": 1, "br": 3, "zstd": 3}),     # 408 KB: the fast ones (app/compression.py)
])
def test_compression_level_follows_the_body_size(client, body, levels):
    """The bytes sent equal what the reference library (CPython's gzip, Google's brotli,
    python-zstandard) makes of the decoded answer at the level documented for its size."""
    import brotli
    import zstandard

    make = {"gzip": lambda b, lvl: gzip.compress(b, compresslevel=lvl, mtime=0),
            "br": lambda b, lvl: brotli.compress(b, quality=lvl),
            "zstd": lambda b, lvl: zstandard.ZstdCompressor(level=lvl).compress(b)}
    for coding, lvl in levels.items():
        sent, headers = raw(client, body, "application/json", coding)
        assert headers["content-encoding"] == coding
        plain = _decompress(coding, sent)
        assert (len(plain) >= 32 * 1024) == (body is BIG)
        assert sent == make[coding](plain, lvl), coding


def test_parquet_is_not_compressed_twice(client):
    _, headers = raw(client, BIG, PARQUET, "gzip, br, zstd")
    assert "content-encoding" not in headers


def test_bytes_saved_on_a_10000_row_answer(client):
    """The numbers README quotes: each format of the same 10,000-row answer, uncompressed
    and as each coding sends it. Compression must save most of a JSON answer (common
    practice: text answers shrink several-fold)."""
    sizes: dict[str, dict[str, int]] = {}
    for name, accept in (("JSON", "application/json"), ("CSV", "text/csv"), ("Arrow", ARROW),
                         ("Parquet", PARQUET)):
        plain, headers = raw(client, BIG, accept, "identity")
        if name == "JSON":
            assert json.loads(plain)["stats"]["result_rows"] == 10000
        sizes[name] = {"identity": len(plain)}
        for coding in ("gzip", "br", "zstd"):
            body, headers = raw(client, BIG, accept, coding)
            if headers.get("content-encoding") == coding:
                assert _decompress(coding, body)[:64] == plain[:64]
                sizes[name][coding] = len(body)
    report = "\n".join(f"{n}: " + ", ".join(f"{k} {v:,}" for k, v in s.items())
                       for n, s in sizes.items())
    print("\n" + report)
    if os.environ.get("SLUICE_COMPRESSION_REPORT"):
        with open(os.environ["SLUICE_COMPRESSION_REPORT"], "w") as f:
            f.write(report + "\n")
    for coding in ("gzip", "br", "zstd"):
        assert sizes["JSON"][coding] < sizes["JSON"]["identity"] / 3, sizes
        assert sizes["CSV"][coding] < sizes["CSV"]["identity"] / 2, sizes
