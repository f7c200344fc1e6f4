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


#: seconds per timestamp unit, and the fraction digits RFC 3339 text shows for it
_PER_SECOND = {"s": 1, "ms": 1_000, "us": 1_000_000, "ns": 1_000_000_000}
_FRACTION_DIGITS = {"s": 0, "ms": 3, "us": 6, "ns": 9}
#: the instants with a four-digit year (0001-01-01T00:00:00Z .. 9999-12-31T23:59:59Z), seconds
_TEXT_SECONDS = (-62_135_596_800, 253_402_300_799)


def _civil_from_days(days: Any) -> tuple[Any, Any, Any]:
    """(year, month, day) of day counts since 1970-01-01 (a numpy array or scalar), the
    proleptic Gregorian calendar: Hinnant's ``civil_from_days`` ("chrono-Compatible
    Low-Level Date Algorithms", https://howardhinnant.github.io/date_algorithms.html)."""
    z = days + 719_468
    era = z // 146_097
    doe = z - era * 146_097
    yoe = (doe - doe // 1_460 + doe // 36_524 - doe // 146_096) // 365
    doy = doe - (365 * yoe + yoe // 4 - yoe // 100)
    mp = (5 * doy + 2) // 153
    day = doy - (153 * mp + 2) // 5 + 1
    month = np.where(mp < 10, mp + 3, mp - 9)
    return yoe + era * 400 + (month <= 2), month, day


def _utc_text_matrix(arr: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray | None] | None:
    """The RFC 3339 UTC text of a timestamp column as one ASCII row per value (an
    ``(n, width)`` uint8 matrix, ``YYYY-MM-DDTHH:MM:SS[.f]Z``) and its validity (None: no
    nulls), computed with integer arithmetic on the whole column (~10x faster than
    ``numpy.datetime_as_string``, which formats value by value). Fraction digits as the
    unit's, and only when some value has a fraction (as ``timestamps_to_text`` writes).
    None when a year falls outside 0001..9999 (the caller then formats value by value).
    The civil date of a day count: ``_civil_from_days``."""
    unit = arr.type.unit
    flat = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    ticks = flat.view(pa.int64())
    valid = None
    if flat.null_count:
        valid = flat.is_valid().to_numpy(zero_copy_only=False)
        ticks = pc.fill_null(ticks, 0)
    v = ticks.to_numpy(zero_copy_only=False)
    per = _PER_SECOND[unit]
    secs = v // per if per > 1 else v
    if len(v) and (secs.min() < _TEXT_SECONDS[0] or secs.max() > _TEXT_SECONDS[1]):
        return None
    frac = v - secs * per if per > 1 else None
    digits = _FRACTION_DIGITS[unit] if frac is not None and frac.any() else 0
    days = secs // 86_400
    sod = (secs - days * 86_400).astype(np.int32)
    # int32 from here: every day count of 0001..9999 fits
    year, month, day = _civil_from_days(days.astype(np.int32))
    width = 20 + (digits + 1 if digits else 0)
    out = np.empty((len(v), width), np.uint8)

    def put(col: int, n: int, value: np.ndarray) -> None:
        """``n`` decimal digits of ``value`` (int32, 0 <= value < 10**n) from column ``col``
        (``value - 10 * (value // 10)``: numpy's ``%`` is several times slower)."""
        for i in range(col + n - 1, col - 1, -1):
            high = value // 10
            out[:, i] = value - high * 10 + 48
            value = high

    put(0, 4, year)
    put(5, 2, month)
    put(8, 2, day)
    hour = sod // 3_600
    minute = (sod - hour * 3_600) // 60
    put(11, 2, hour)
    put(14, 2, minute)
    put(17, 2, sod - hour * 3_600 - minute * 60)
    out[:, 4] = out[:, 7] = ord("-")
    out[:, 10] = ord("T")
    out[:, 13] = out[:, 16] = ord(":")
    if digits:
        out[:, 19] = ord(".")
        put(20, digits, frac.astype(np.int32))
    out[:, width - 1] = ord("Z")
    return out, valid


def _wall_text(seconds: int) -> str:
    """``YYYY-MM-DDTHH:MM:SS`` of a wall clock ``seconds`` after 1970-01-01T00:00, any year
    (a year-1 instant west of UTC reads as a local time in year 0, which Python's datetime
    cannot hold), the year always four digits (strftime writes year 1 as "1")."""
    days, rest = divmod(seconds, 86400)
    year, month, day = (int(x) for x in _civil_from_days(np.int64(days)))
    h, rest = divmod(rest, 3600)
    return f"{year:04d}-{month:02d}-{day:02d}T{h:02d}:{rest // 60:02d}:{rest % 60:02d}"


def timestamps_to_text(arr: pa.ChunkedArray, tz: str | None) -> list[str | None]:
    """RFC 3339 text in ``tz`` (default: the zone of the Arrow type, else UTC)."""
    zone = tz or arr.type.tz or "UTC"
    unit = arr.type.unit
    if zone == "UTC":
        fast = _utc_text_matrix(arr)
        if fast is not None:
            text, valid = fast
            out = text.view(f"S{text.shape[1]}").ravel().astype(f"U{text.shape[1]}").tolist()
            if valid is not None:
                return [t if m else None for t, m in zip(out, valid.tolist())]
            return out
    shown = arr.cast(pa.timestamp(unit, tz=zone))
    if len(shown) and unit != "s":
        sub = pc.max(pc.subsecond(shown)).as_py()
        if not sub:
            shown = shown.cast(pa.timestamp("s", tz=zone), safe=False)
    if zone == "UTC":  # years outside 0001..9999: numpy writes them value by value
        naive = shown.cast(pa.timestamp(shown.type.unit)).combine_chunks()
        text_np = np.char.add(np.datetime_as_string(naive.to_numpy(zero_copy_only=False),
                                                    unit=shown.type.unit), "Z").tolist()
        if naive.null_count:
            return [None if m else t for t, m in
                    zip(text_np, naive.is_null().to_numpy(zero_copy_only=False).tolist())]
        return text_np
    text = pc.strftime(shown, format="%Y-%m-%dT%H:%M:%S%z")
    text = pc.replace_substring_regex(text, pattern=r"([+-]\d\d)(\d\d)$", replacement=r"\1:\2")
    out = text.to_pylist()
    # RFC 3339 offsets are hours and minutes; a local mean time offset has seconds too
    # (Berlin +00:53:28 before 1893), which %z cuts, so that text would name an instant 28 s
    # off. There the offset is cut to whole minutes and the wall clock shifted with it: the
    # text names the same instant (README "Time zones").
    # (nulls filled: with a null, to_numpy would give float64, which cannot hold every
    # nanosecond tick -- the recomputed text would then name another instant)
    wall = pc.fill_null(pc.local_timestamp(shown).cast(pa.int64()), 0).to_numpy(zero_copy_only=False)
    utc = pc.fill_null(shown.cast(pa.int64()), 0).to_numpy(zero_copy_only=False)
    per_s = _PER_SECOND[shown.type.unit]
    off = wall - utc
    odd = np.flatnonzero((off % (60 * per_s)) != 0)
    if len(odd):
        digits = _FRACTION_DIGITS[shown.type.unit]
        for i in odd.tolist():
            if out[i] is None:
                continue
            minutes = int(np.trunc(off[i] / (60 * per_s)))  # toward zero, as %z cuts
            secs, frac = divmod(int(utc[i]), per_s)
            sign, m = ("-", -minutes) if minutes < 0 else ("+", minutes)
            out[i] = (_wall_text(secs + 60 * minutes) + (f".{frac:0{digits}d}" if digits else "")
                      + f"{sign}{m // 60:02d}:{m % 60:02d}")
    return out


def _utc_text_fragment(arr: pa.ChunkedArray) -> orjson.Fragment | None:
    """``orjson.dumps(timestamps_to_text(arr, "UTC"))`` as a ready JSON array, byte for
    byte, without a Python string per value (None: see ``_utc_text_matrix``)."""
    fast = _utc_text_matrix(arr)
    if fast is None:
        return None
    text, valid = fast
    n, width = text.shape
    if not n:
        return orjson.Fragment(b"[]")
    quoted = np.empty((n, width + 3), np.uint8)  # "text",
    quoted[:, 0] = quoted[:, width + 1] = ord('"')
    quoted[:, 1:width + 1] = text
    quoted[:, width + 2] = ord(",")
    if valid is None:
        return orjson.Fragment(b"[" + quoted.tobytes()[:-1] + b"]")
    items = quoted[:, :width + 2].view(f"S{width + 2}").ravel().tolist()
    return orjson.Fragment(b"[" + b",".join(t if m else b"null" for t, m in
                                            zip(items, valid.tolist())) + b"]")


def instant_text(v: dt.datetime | None, tz: str | None) -> str | None:
    """One instant's text, as ``timestamps_to_text`` writes it in a microsecond column (a
    naive datetime is UTC). In UTC a ``datetime``'s own ISO text is the same (four-digit
    year, the fraction only when there is one) without building an array."""
    if v is None:
        return None
    if type(v) is dt.datetime and (tz or "UTC") == "UTC":
        u = v.replace(tzinfo=dt.timezone.utc) if v.tzinfo is None else v.astimezone(dt.timezone.utc)
        return u.isoformat()[:-6] + "Z"  # (drops "+00:00")
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
    """``column_values`` for the JSON body, the same bytes once encoded (``dumps``), without
    a Python object per value where it can: a decimal column becomes one raw JSON array of
    its exact digits, formatted by Arrow (no Python ``Decimal`` per value: 10x faster); UTC
    timestamps one raw array of their text (``_utc_text_fragment``); integers, booleans
    without nulls and float64 a numpy array (orjson writes numpy's int64/float64/bool as it
    writes Python's int/float/bool; a NaN or a null float is ``null`` either way; not
    float32: its Python float has more digits)."""
    t = arr.type
    if pa.types.is_decimal(t) and t.scale >= 0:
        text = pc.fill_null(arr.cast(pa.string()), "null").to_pylist()
        return orjson.Fragment(("[" + ",".join(text) + "]").encode())
    if pa.types.is_timestamp(t) and (tz or t.tz or "UTC") == "UTC":
        fragment = _utc_text_fragment(arr)
        if fragment is not None:
            return fragment
    if pa.types.is_float64(t) or ((pa.types.is_integer(t) or pa.types.is_boolean(t))
                                  and arr.null_count == 0):
        return arr.to_numpy()
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
        if pa.types.is_timestamp(t):  # (as an array: as_py() fails on a local year 10000)
            ends = pa.chunked_array([pa.array([lo.value, hi.value], pa.timestamp(t.unit, "UTC"))])
            return timestamps_to_text(ends, tz or t.tz)
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
