"""Rows -> Arrow, and Arrow results -> the types the plan promises.

Engines without a native Arrow path (psycopg, pymysql, sqlite3) build tables column by column
from Python values with an optional type hint from the driver. ``conform`` then makes every
engine's answer typed like DuckDB's, using the kinds the plan knows for each output column:

* MySQL/MariaDB and SQLite return booleans as 0/1 -> ``bool``;
* SQLite returns timestamps as text (the storage convention in ``planner.dialects.sqlite``:
  UTC ``YYYY-MM-DD HH:MM:SS[.SSS]``) -> ``timestamp[us, UTC]``;
* decimals stay exact decimals (decimal128 with the column's precision and scale; SQLite's
  doubles are rounded to the declared scale), integers keep the declared width;
* naive timestamps are UTC instants (DESIGN: a naive TIMESTAMP is read as UTC), typed with
  the zone of their key (``key_zone``) so a reader shows the wall clock of that zone.
"""

from __future__ import annotations

import datetime as dt
import decimal
from collections.abc import Sequence
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

UTC_US = pa.timestamp("us", tz="UTC")


def _decimal_array(values: list[Any]) -> pa.Array:
    """Decimals as Arrow decimals (exact; pyarrow infers the precision and scale of the
    values); ``conform`` later casts them to the type the plan promises. Values no decimal
    type holds (NaN, infinities, more than 76 digits) fall back to float64."""
    try:
        return pa.array(values)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, OverflowError,
            TypeError):  # (pyarrow 22 raises TypeError for Decimal('Infinity'))
        return pa.array([None if v is None else float(v) for v in values], pa.float64())


def column_array(values: list[Any], hint: pa.DataType | None = None) -> pa.Array:
    """One result column from Python values; ``hint`` is the driver's type when known."""
    if hint is not None and not pa.types.is_decimal(hint):
        try:
            if pa.types.is_timestamp(hint):
                return _timestamps(values, hint)
            if pa.types.is_boolean(hint):
                return pa.array([None if v is None else bool(v) for v in values], pa.bool_())
            return pa.array(values, hint)
        except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError, OverflowError):
            pass
    if any(isinstance(v, decimal.Decimal) for v in values):
        return _decimal_array(values)
    if any(isinstance(v, dt.datetime) for v in values):
        return _timestamps(values, UTC_US)
    if any(isinstance(v, (bytes, bytearray, memoryview)) for v in values):
        try:
            return pa.array([None if v is None else bytes(v).decode("utf-8") for v in values],
                            pa.string())
        except UnicodeDecodeError:
            return pa.array([None if v is None else bytes(v) for v in values], pa.binary())
    try:
        return pa.array(values)
    except OverflowError:  # integers past int64 (BIGINT UNSIGNED): exact decimals
        return _decimal_array([None if v is None else decimal.Decimal(v) for v in values])
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return pa.array([None if v is None else str(v) for v in values], pa.string())


def _timestamps(values: list[Any], hint: pa.DataType) -> pa.Array:
    """Instants as ``timestamp[us, UTC]``. A driver hands a value it cannot read as a
    datetime over as text (pymysql: MariaDB's zero date ``0000-00-00 00:00:00``): read as
    text timestamps are, NULL when it is none."""
    out = []
    for v in values:
        if isinstance(v, dt.datetime):
            v = v.replace(tzinfo=dt.timezone.utc) if v.tzinfo is None else v.astimezone(dt.timezone.utc)
        elif v is not None:
            v = _text_instant(v)
        out.append(v)
    return pa.array(out, UTC_US)


def rows_to_table(names: Sequence[str], rows: Sequence[Sequence[Any]],
                  hints: Sequence[pa.DataType | None] | None = None) -> pa.Table:
    cols = list(zip(*rows)) if rows else [() for _ in names]
    hints = list(hints) if hints is not None else [None] * len(names)
    arrays = [column_array(list(c), h) for c, h in zip(cols, hints)]
    return pa.Table.from_arrays(arrays, names=list(names))


# --- conforming results to the plan ---------------------------------------------------

def _text_instant(v: Any) -> dt.datetime | None:
    """A text timestamp (``YYYY-MM-DD HH:MM:SS[.ffffff]``, naive = UTC) as a UTC datetime;
    None for a cell outside that form."""
    try:
        t = dt.datetime.fromisoformat(str(v).strip().replace("T", " ").rstrip("Z"))
    except (ValueError, OverflowError):
        return None
    return t.replace(tzinfo=dt.timezone.utc) if t.tzinfo is None else t.astimezone(dt.timezone.utc)


def _parse_text_timestamps(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    values = [None if v is None else _text_instant(v) for v in arr.to_pylist()]
    return pa.chunked_array([pa.array(values, UTC_US)], UTC_US)


#: declared integer types -> the Arrow width that holds every value of the type
_INT_WIDTHS = {
    "TINYINT": pa.int8(), "UTINYINT": pa.uint8(), "SMALLINT": pa.int16(),
    "USMALLINT": pa.uint16(), "MEDIUMINT": pa.int32(), "UMEDIUMINT": pa.uint32(),
    "INT": pa.int32(), "UINT": pa.uint32(), "BIGINT": pa.int64(), "UBIGINT": pa.uint64(),
}
#: ClickHouse's DecimalN(S) spell the precision in the type name, the scale as the parameter
_DECIMAL_N = {"DECIMAL32": 9, "DECIMAL64": 18, "DECIMAL128": 38, "DECIMAL256": 76}
#: a decimal whose precision and scale the catalog does not state (PostgreSQL ``numeric``):
#: the scale is read from the values
FREE_DECIMAL = pa.decimal128(38, 0)


def _decimal(precision: int, scale: int) -> pa.DataType:
    if precision <= 38:
        return pa.decimal128(precision, scale)
    return pa.decimal256(min(precision, 76), scale)


def declared_type(col: Any, dialect: str | None = None) -> pa.DataType:
    """The Arrow type of a source column's values, from the catalog's type name: integers
    keep their width (SMALLINT -> int16), decimals their precision and scale, timestamps
    are instants (UTC until a zone is applied)."""
    kind = col.kind
    if kind in ("integer", "decimal"):
        from sqlglot import exp

        try:
            text = col.sql_type
            for wrapper in ("Nullable(", "LowCardinality("):  # ClickHouse wrappers
                while text.startswith(wrapper) and text.endswith(")"):
                    text = text[len(wrapper):-1]
            built = exp.DataType.build(text, dialect=dialect) if text else None
        except Exception:  # noqa: BLE001 - unknown spellings: the widest type of the kind
            built = None
        name = built.this.name if built is not None else ""
        if kind == "integer":
            return _INT_WIDTHS.get(name, pa.int64())
        params = [int(e.name) for e in (built.expressions if built is not None else [])
                  if e.name.isdigit()]
        if name in _DECIMAL_N and len(params) == 1:
            return _decimal(_DECIMAL_N[name], params[0])
        if len(params) == 2 and 0 <= params[1] <= params[0]:
            return _decimal(params[0], params[1])
        if len(params) == 1:  # DECIMAL(p): scale 0 (SQL standard)
            return _decimal(params[0], 0)
        return FREE_DECIMAL
    return {"double": pa.float64(), "boolean": pa.bool_(), "string": pa.string(),
            "date": pa.date32(), "timestamp": UTC_US, "timestamptz": UTC_US}.get(kind, pa.null())


def key_zone(plan: Any, key: Any) -> str:
    """The zone a temporal key's values are shown in (Arrow timestamp type, JSON offsets):
    the key's own ``tz``, else the request's, else UTC."""
    return key.spec.tz or request_zone(plan)


def request_zone(plan: Any) -> str:
    """The request's zone (a top-level ``tz``, where the request model has one), else UTC:
    the zone of temporal measures (min/max of a timestamp)."""
    return getattr(plan.request, "tz", None) or "UTC"


def _free_decimal(arr: pa.ChunkedArray) -> pa.DataType:
    """Precision and scale that hold every value of a decimal or float column exactly."""
    if pa.types.is_decimal(arr.type):
        return _decimal(38 if arr.type.precision <= 38 else 76, arr.type.scale)
    scale = 0
    for v in arr.to_pylist():
        if v is not None:
            e = decimal.Decimal(repr(v) if isinstance(v, float) else str(v)).as_tuple().exponent
            if isinstance(e, int):
                scale = max(scale, -e)
    return _decimal(38, min(scale, 38))


def _to_decimal(arr: pa.ChunkedArray, target: pa.DataType) -> pa.ChunkedArray:
    """Engine values -> ``target`` decimal, exactly. Engines that store decimals as doubles
    (SQLite: NUMERIC affinity) give the shortest text of the double, rounded half-even to
    the declared scale: exact while the engine's own float error stays below half a unit of
    the last place. A value the target cannot hold keeps the engine's type."""
    t = arr.type
    if target == FREE_DECIMAL:
        target = _free_decimal(arr)
    if pa.types.is_decimal(t) or pa.types.is_integer(t) or pa.types.is_null(t):
        try:
            return arr.cast(target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass  # e.g. a scale the target would cut: round through Python below
    if pa.types.is_decimal(t) or pa.types.is_integer(t) or pa.types.is_floating(t) \
            or pa.types.is_string(t) or pa.types.is_large_string(t):
        quantum = decimal.Decimal(1).scaleb(-target.scale)
        out = []
        for v in arr.to_pylist():
            if v is None:
                out.append(None)
                continue
            d = decimal.Decimal(repr(v) if isinstance(v, float) else str(v))
            if not d.is_finite():
                return arr
            out.append(d.quantize(quantum, rounding=decimal.ROUND_HALF_EVEN,
                                  context=decimal.Context(prec=80)))
        try:
            return pa.chunked_array([pa.array(out, target)], target)
        except (pa.ArrowInvalid, OverflowError):
            return arr
    return arr


def _to_integer(arr: pa.ChunkedArray, target: pa.DataType) -> pa.ChunkedArray:
    """Engine integers (any width, doubles or decimals holding whole numbers) -> ``target``;
    a value wider than the declared type (SQLite keeps every INTEGER in 64 bits) widens to
    int64, and a whole number past int64 (a sum over HUGEINT) stays an exact decimal."""
    for candidate in (target, pa.int64()):
        try:
            return arr.cast(candidate)  # safe cast: fails on overflow and on a fraction
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            continue
    if pa.types.is_decimal(arr.type):
        return arr
    # (a UInt64 past int64: exact as a decimal; a double cast refuses it past 2^53)
    return arr.cast(pa.decimal128(20, 0)) if pa.types.is_integer(arr.type) else arr


def conform_column(arr: pa.ChunkedArray, target: pa.DataType | None) -> pa.ChunkedArray:
    """Cast one result column to the Arrow type its plan promises, where the engine's own
    type differs only in representation (never in value)."""
    t = arr.type
    if target is None:
        if pa.types.is_string_view(t) or pa.types.is_large_string(t):
            return arr.cast(pa.string())
        return arr
    if t == target:
        return arr
    if pa.types.is_boolean(target):
        if pa.types.is_integer(t):
            return pc.not_equal(arr, 0)
        if pa.types.is_null(t):
            return arr.cast(pa.bool_())
        return arr
    if pa.types.is_timestamp(target):
        if pa.types.is_null(t):  # no rows, or only NULLs, from a driver without types
            return arr.cast(target)
        if pa.types.is_string(t) or pa.types.is_large_string(t):
            arr = _parse_text_timestamps(arr)
        elif pa.types.is_date(t):
            arr = arr.cast(pa.timestamp("us")).cast(UTC_US)
        elif pa.types.is_timestamp(t) and t.tz is None:  # naive values are UTC instants
            arr = arr.cast(pa.timestamp(t.unit, tz="UTC"))
        elif not (pa.types.is_timestamp(t) or pa.types.is_null(t)):
            return arr
        # one representation: microseconds (like DuckDB), in the zone of the key
        return arr.cast(pa.timestamp("us" if arr.type.unit in ("s", "ms", "us") else "ns",
                                     tz=target.tz))
    if pa.types.is_date(target):
        if pa.types.is_string(t) or pa.types.is_large_string(t):
            # a cell outside the storage convention (not YYYY-MM-DD) reads as NULL
            return pc.strptime(arr, format="%Y-%m-%d", unit="s",
                               error_is_null=True).cast(pa.date32())
        if pa.types.is_timestamp(t) or pa.types.is_null(t) or pa.types.is_date(t):
            return arr.cast(pa.date32())
        return arr
    if pa.types.is_integer(target):
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t) \
                or pa.types.is_null(t) or pa.types.is_boolean(t):
            return _to_integer(arr, target)
        return arr
    if pa.types.is_decimal(target):
        return _to_decimal(arr, target)
    if pa.types.is_floating(target):
        if pa.types.is_null(t) or pa.types.is_integer(t) or pa.types.is_decimal(t) \
                or pa.types.is_floating(t):
            return arr.cast(pa.float64())
        return arr
    if pa.types.is_string(target):
        if pa.types.is_null(t) or pa.types.is_string_view(t) or pa.types.is_large_string(t):
            return arr.cast(pa.string())
    return arr


def _sum_type(col_type: pa.DataType) -> pa.DataType:
    """SUM keeps the scale of its decimal argument (SQL standard) in the widest precision;
    a sum of integers is int64."""
    if pa.types.is_decimal(col_type):
        return _decimal(38 if col_type.precision <= 38 else 76, col_type.scale) \
            if col_type != FREE_DECIMAL else FREE_DECIMAL
    if pa.types.is_integer(col_type):
        return pa.int64()
    return pa.float64()


def _with_zone(t: pa.DataType, zone: str) -> pa.DataType:
    return pa.timestamp("us", tz=zone) if pa.types.is_timestamp(t) else t


#: the kind of a named measure's scalar input (planner/filter_sql.py kinds) -> answer type
#: of its sum / min / max (null: the engine's own type is kept)
_INPUT_KIND = {"integer": pa.int64(), "number": pa.float64(), "string": pa.string(),
               "boolean": pa.bool_()}


def output_types(plan: Any) -> dict[str, pa.DataType]:
    """The Arrow type of every user-visible output column of a finished plan (the same on
    every engine):

    * keys and ``min``/``max`` keep the source column's type: integer width, decimal
      precision and scale, dates; timestamps are instants typed with the key's zone;
    * bin edges, stack extents and ``avg``/``median``/``quantile``/deviations/``share`` are
      float64 (each aggregate's ``output`` in planner/aggregates.py);
    * counts are int64; ``sum`` is int64 over integers, decimal128(38, s) over decimals;
    * ``extract`` fields are int32; a ``top`` key is text (it holds the other-label);
    * ``then``: fraction is float64; cumulative and change keep int64 / wide decimals of
      integer / decimal measures, else float64.
    """
    dialect = getattr(plan.dialect, "sqlglot", None) or None
    out: dict[str, pa.DataType] = {}
    for k in plan.keys:
        zone = key_zone(plan, k)
        if k.mode == "nbin":
            types = [pa.float64()] * len(k.names)
        elif k.mode in ("tbin", "trunc"):
            types = [pa.timestamp("us", tz=zone)] * len(k.names)
        elif k.mode == "extract":
            types = [pa.int32()]
        elif k.spec.top is not None:
            types = [pa.string()]
        else:
            types = [_with_zone(declared_type(k.col, dialect), zone)]
        out.update(zip(k.names, types))
    for m in plan.measures:
        output = m.aggregate.output  # the registry's answer type (planner/aggregates.py)
        if output == "integer":
            out[m.name] = pa.int64()
        elif output == "input" and m.col is not None:
            out[m.name] = _with_zone(declared_type(m.col, dialect), request_zone(plan))
        elif output == "sum" and m.col is not None:
            out[m.name] = _sum_type(declared_type(m.col, dialect))
        elif output in ("sum", "input") and m.input_kind is not None:  # a named measure's
            out[m.name] = _INPUT_KIND.get(m.input_kind, pa.null())    # scalar input
        else:
            out[m.name] = pa.float64()
        then = m.spec.then  # a measure over the grouped table (planner/window.py)
        if then == "fraction":
            out[m.name] = pa.float64()
        elif then is not None:  # cumulative / change: an integer stays whole, a decimal exact
            t = out[m.name]
            out[m.name] = _sum_type(t) if pa.types.is_integer(t) or pa.types.is_decimal(t) \
                else pa.float64()
    for c in plan.columns:
        if c.role in ("stack_base", "stack_top"):
            out[c.name] = pa.float64()
    return {n: t for n, t in out.items() if not pa.types.is_null(t)}


def conform(table: pa.Table, plan: Any) -> pa.Table:
    types = output_types(plan)
    cols = [conform_column(table.column(n), types.get(n)) for n in table.column_names]
    return pa.table(dict(zip(table.column_names, cols)))
