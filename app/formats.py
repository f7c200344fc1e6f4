"""Answer formats of ``POST /v1/chart``: content negotiation and the table encoders.

The client picks the format with ``Accept`` (RFC 9110 section 12.5.1: media ranges with
q-values; the most preferred supported type wins, ties go to the order of ``FORMATS``):

* ``application/json`` (default, also for ``*/*`` or no ``Accept``) -- the columnar answer;
* ``application/vnd.apache.arrow.stream`` -- Arrow IPC stream (``app.encode.arrow_stream``);
* ``text/csv`` -- RFC 4180 with a header row; values written as in JSON (timestamps RFC 3339
  with the key's offset, decimals with their exact digits, NULL as an empty field);
* ``application/vnd.apache.parquet`` -- one Parquet file with the Arrow types and the same
  metadata as the Arrow stream (schema key ``sluice``, ``channel``/``role`` per field).

An ``Accept`` that admits none of them is a 406 problem listing ``supported``. CSV has no
place for the answer's metadata, so the table formats also carry ``X-Sluice-Truncated`` and
``X-Sluice-Approximate`` headers: a cut or approximate answer says so in every format.
"""

from __future__ import annotations

import csv
import io
import math
from typing import Any

import pyarrow as pa

from app.encode import ARROW_STREAM, arrow_schema, column_values
from app.problems import Problem

JSON = "application/json"
CSV = "text/csv"
PARQUET = "application/vnd.apache.parquet"
FORMATS = (JSON, ARROW_STREAM, CSV, PARQUET)  # preference order on equal q
MEDIA_TYPES = {JSON: JSON, ARROW_STREAM: ARROW_STREAM,
               CSV: "text/csv; charset=utf-8; header=present", PARQUET: PARQUET}


def _ranges(accept: str) -> list[tuple[str, float]]:
    out = []
    for part in accept.split(","):
        items = [p.strip() for p in part.split(";")]
        media = items[0].lower()
        if not media:
            continue
        q = 1.0
        for param in items[1:]:
            name, _, value = param.partition("=")
            if name.strip().lower() == "q":
                try:
                    q = float(value)
                except ValueError:
                    q = 0.0
                if not 0.0 <= q <= 1.0 or math.isnan(q):
                    q = 0.0
        out.append((media, q))
    return out


def _quality(fmt: str, ranges: list[tuple[str, float]]) -> float:
    """q of the most specific range matching ``fmt`` (RFC 9110: specific beats wildcard)."""
    kind = fmt.split("/")[0]
    best, specificity = -1.0, -1
    for media, q in ranges:
        if media == fmt:
            s = 2
        elif media == f"{kind}/*":
            s = 1
        elif media == "*/*":
            s = 0
        else:
            continue
        if s > specificity:
            best, specificity = q, s
    return best


def choose(accept: str | None) -> str:
    """The format to answer in, or a 406 problem when the client accepts none of ours."""
    if not accept or not accept.strip():
        return JSON
    ranges = _ranges(accept)
    if not ranges:
        return JSON
    scored = [(q, -i, fmt) for i, fmt in enumerate(FORMATS)
              if (q := _quality(fmt, ranges)) > 0]
    if not scored:
        raise Problem(406, "not-acceptable", "Not acceptable",
                      f"Accept {accept[:200]!r} names no format this route answers in; use "
                      f"one of {', '.join(FORMATS)}", supported=list(FORMATS))
    return max(scored)[2]


def _cell(v: Any) -> Any:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    return v  # int, str, Decimal (str() keeps its digits)


def csv_body(table: pa.Table, zones: dict[str, str]) -> bytes:
    """RFC 4180 CSV (CRLF line ends, quotes where needed) with a header row."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(table.column_names)
    cols = [column_values(table.column(n), zones.get(n)) for n in table.column_names]
    for row in zip(*cols):
        w.writerow([_cell(v) for v in row])
    return buf.getvalue().encode("utf-8")


def parquet_body(table: pa.Table, meta: dict[str, Any]) -> bytes:
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    schema = arrow_schema(table, meta)
    pq.write_table(table.cast(schema), sink, compression="zstd", store_schema=True)
    return sink.getvalue().to_pybytes()


def table_headers(meta: dict[str, Any]) -> dict[str, str]:
    """What a consumer of a bare table must not miss: truncation, approximation and cut
    text."""
    out = {"X-Sluice-Truncated": "true" if meta.get("stats", {}).get("truncated") else "false"}
    if meta.get("approximate"):
        out["X-Sluice-Approximate"] = "true"
    cut = meta.get("stats", {}).get("cut_text")
    if cut:  # text values cut to 1000 characters (planner.model.MAX_TEXT_CHARS)
        out["X-Sluice-Cut-Text"] = ", ".join(cut)
    return out
