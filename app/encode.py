"""Arrow result -> response payloads.

JSON is columnar (``{"data": {"col": [...]}}``) and encoded with orjson. Timestamps become
RFC 3339 strings (``Z`` for UTC, else the offset of the key's ``tz``), decimals become JSON
numbers written with their exact decimal digits (``3.76``, never ``3.7600000000000002``:
orjson writes the text as a raw number fragment), non-finite floats become ``null``.
Arrow IPC keeps the conformed types (``app.engines.arrow.output_types``: integer widths,
decimal128, zoned timestamps), carries the same metadata as JSON in the schema metadata key
``sluice`` and each column's ``channel`` and ``role`` in its field metadata.
"""

from __future__ import annotations

import datetime as dt
import decimal
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc

ARROW_STREAM = "application/vnd.apache.arrow.stream"


def type_name(t: pa.DataType) -> str:
    if pa.types.is_boolean(t):
        return "boolean"
    if pa.types.is_integer(t):
        return "integer"
    if pa.types.is_floating(t):
        return "double"
    if pa.types.is_decimal(t):
        return "decimal"
    if pa.types.is_timestamp(t):
        return "timestamp"
    if pa.types.is_date(t):
        return "date"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return "string"
    if pa.types.is_null(t):
        return "null"
    return str(t)


def normalize_column(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    """Representation-only clean-up after ``conform``: one string type."""
    t = arr.type
    if pa.types.is_string_view(t) or pa.types.is_large_string(t):
        return arr.cast(pa.string())
    if pa.types.is_timestamp(t) and t.tz is None:
        return arr.cast(pa.timestamp(t.unit, tz="UTC"))  # naive values are read as UTC
    return arr


def timestamps_to_text(arr: pa.ChunkedArray, tz: str | None) -> list[str | None]:
    """RFC 3339 text in ``tz`` (default: the zone of the Arrow type, else UTC)."""
    zone = tz or arr.type.tz or "UTC"
    unit = arr.type.unit
    shown = arr.cast(pa.timestamp(unit, tz=zone))
    if len(shown) and unit != "s":
        sub = pc.max(pc.subsecond(shown)).as_py()
        if not sub:
            shown = shown.cast(pa.timestamp("s", tz=zone), safe=False)
    if zone == "UTC":  # numpy formats ~15x faster than pc.strftime (190 ms -> 13 ms, 17.5k values)
        import numpy as np

        naive = shown.cast(pa.timestamp(shown.type.unit)).combine_chunks()
        text_np = np.char.add(np.datetime_as_string(naive.to_numpy(zero_copy_only=False),
                                                    unit=shown.type.unit), "Z").tolist()
        if naive.null_count:
            return [None if m else t for t, m in
                    zip(text_np, naive.is_null().to_numpy(zero_copy_only=False).tolist())]
        return text_np
    text = pc.strftime(shown, format="%Y-%m-%dT%H:%M:%S%z")
    text = pc.replace_substring_regex(text, pattern=r"([+-]\d\d)(\d\d)$", replacement=r"\1:\2")
    if zone == "UTC":
        text = pc.replace_substring_regex(text, pattern=r"\+00:00$", replacement="Z")
    return text.to_pylist()


def instant_text(v: dt.datetime | None, tz: str | None) -> str | None:
    if v is None:
        return None
    arr = pa.chunked_array([pa.array([v], pa.timestamp("us", tz="UTC"))])
    return timestamps_to_text(arr, tz)[0]


def column_values(arr: pa.ChunkedArray, tz: str | None = None) -> list[Any]:
    t = arr.type
    if pa.types.is_timestamp(t):
        return timestamps_to_text(arr, tz)
    if pa.types.is_date(t):
        return pc.strftime(arr.cast(pa.timestamp("s")), format="%Y-%m-%d").to_pylist()
    return arr.to_pylist()


def wire_values(arr: pa.ChunkedArray, tz: str | None = None) -> Any:
    """``column_values`` for the JSON body: a decimal column becomes one raw JSON array of
    its exact digits, formatted by Arrow (no Python ``Decimal`` per value: 10x faster)."""
    if pa.types.is_decimal(arr.type) and arr.type.scale >= 0:
        text = pc.fill_null(arr.cast(pa.string()), "null").to_pylist()
        return orjson.Fragment(("[" + ",".join(text) + "]").encode())
    return column_values(arr, tz)


def domain(arr: pa.ChunkedArray, tz: str | None = None) -> list[Any] | None:
    t = arr.type
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_timestamp(t) \
            or pa.types.is_date(t) or pa.types.is_decimal(t):
        if pa.types.is_floating(t):
            arr = pc.filter(arr, pc.is_finite(arr))
        mm = pc.min_max(arr)
        lo, hi = mm["min"], mm["max"]
        if not lo.is_valid:
            return None
        if pa.types.is_timestamp(t):
            return [instant_text(lo.as_py(), tz or t.tz), instant_text(hi.as_py(), tz or t.tz)]
        if pa.types.is_date(t):
            return [lo.as_py().isoformat(), hi.as_py().isoformat()]
        return [lo.as_py(), hi.as_py()]
    if pa.types.is_string(t) or pa.types.is_boolean(t):
        seen: dict[Any, None] = {}
        for v in arr.to_pylist():
            seen.setdefault(v, None)
        return list(seen)
    return None


def decimal_number(d: decimal.Decimal) -> Any:
    """A decimal as a JSON number with exactly its digits (``null`` for NaN/infinity)."""
    if not d.is_finite():
        return None
    return orjson.Fragment(str(d).encode())  # str() of a finite Decimal is a JSON number


def _default(o: Any) -> Any:
    if isinstance(o, decimal.Decimal):
        return decimal_number(o)
    if isinstance(o, dt.datetime):
        return instant_text(o, None)
    if isinstance(o, dt.date):
        return o.isoformat()
    raise TypeError(f"cannot encode {type(o).__name__}")


def dumps(payload: Any) -> bytes:
    return orjson.dumps(payload, default=_default, option=orjson.OPT_SERIALIZE_NUMPY)


def arrow_schema(table: pa.Table, meta: dict[str, Any]) -> pa.Schema:
    """The table's schema with the answer's metadata (key ``sluice``) and, per field, the
    column's ``channel`` and ``role`` (so a reader needs no lookup to bind marks)."""
    described = {c["name"]: c for c in meta.get("columns", [])}
    fields = []
    for f in table.schema:
        c = described.get(f.name)
        if c is not None:
            f = f.with_metadata({k: str(c[k]) for k in ("channel", "role") if c.get(k)})
        fields.append(f)
    return pa.schema(fields, metadata={"sluice": dumps(meta)})


def _fixed_width(t: pa.DataType) -> bool:
    return (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)
            or pa.types.is_temporal(t))


def zero_null_slots(arr: pa.Array) -> pa.Array:
    """The array with every null slot's value bytes set to zero.

    The Arrow format leaves a null slot's value undefined, and engines leave whatever was in
    memory there (DuckDB: the neighbouring group's key, a NaN, a pointer). A client that reads
    the value buffer directly (``Vector.toArray()`` in the JavaScript library, ``numpy`` views)
    would see those bytes as numbers, and the same answer would differ byte for byte between
    runs. Zeros make the bytes deterministic and harmless."""
    t = arr.type
    if arr.null_count == 0 or not _fixed_width(t) or arr.buffers()[1] is None:
        return arr
    width = t.bit_width // 8
    n = len(arr)
    values = np.frombuffer(arr.buffers()[1], dtype=np.uint8)[
        arr.offset * width:(arr.offset + n) * width].reshape(n, width).copy()
    valid = arr.is_valid().to_numpy(zero_copy_only=False)
    values[~valid] = 0
    bitmap = pa.array(valid, type=pa.bool_()).buffers()[1]
    return pa.Array.from_buffers(t, n, [bitmap, pa.py_buffer(values)], null_count=arr.null_count)


def arrow_stream(table: pa.Table, meta: dict[str, Any]) -> bytes:
    schema = arrow_schema(table, meta)
    # one record batch: answers are small, and clients then see a single chunk per column
    table = table.cast(schema).combine_chunks()
    batch = pa.record_batch([zero_null_slots(c.combine_chunks()) for c in table.columns],
                            schema=schema)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, schema) as writer:
        writer.write_batch(batch)
    return sink.getvalue().to_pybytes()
