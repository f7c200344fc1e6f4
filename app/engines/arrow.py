"""Rows -> Arrow, and Arrow results -> the types the plan promises.

Engines without a native Arrow path (psycopg, pymysql, sqlite3) build tables column by column
from Python values with an optional type hint from the driver. ``conform`` then makes every
engine's answer typed like DuckDB's, using the kinds the plan knows for each output column:

* MySQL/MariaDB and SQLite return booleans as 0/1 -> ``bool``;
* SQLite returns timestamps as text (the storage convention in ``planner.dialects.sqlite``:
  UTC ``YYYY-MM-DD HH:MM:SS[.SSS]``) -> ``timestamp[us, UTC]``;
* untyped decimals (PostgreSQL ``numeric`` from SUM, MySQL DECIMAL sums) -> int64 when the
  plan promises an integer, float64 otherwise;
* naive timestamps are UTC instants (DESIGN: a naive TIMESTAMP is read as UTC).
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
    """Decimals without a declared scale: int64 when every value is a whole number written
    without a fraction (SUM of integers), float64 otherwise."""
    whole = all(v is None or (isinstance(v, decimal.Decimal) and v.is_finite()
                              and v.as_tuple().exponent >= 0) for v in values)
    if whole:
        try:
            return pa.array([None if v is None else int(v) for v in values], pa.int64())
        except (OverflowError, pa.ArrowInvalid):
            pass
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
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return pa.array([None if v is None else str(v) for v in values], pa.string())


def _timestamps(values: list[Any], hint: pa.DataType) -> pa.Array:
    out = []
    for v in values:
        if isinstance(v, dt.datetime):
            v = v.replace(tzinfo=dt.timezone.utc) if v.tzinfo is None else v.astimezone(dt.timezone.utc)
        out.append(v)
    return pa.array(out, UTC_US)


def rows_to_table(names: Sequence[str], rows: Sequence[Sequence[Any]],
                  hints: Sequence[pa.DataType | None] | None = None) -> pa.Table:
    cols = list(zip(*rows)) if rows else [() for _ in names]
    hints = list(hints) if hints is not None else [None] * len(names)
    arrays = [column_array(list(c), h) for c, h in zip(cols, hints)]
    return pa.Table.from_arrays(arrays, names=list(names))


# --- conforming results to the plan ---------------------------------------------------

def _parse_text_timestamps(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    values = []
    for v in arr.to_pylist():
        if v is None:
            values.append(None)
            continue
        try:
            text = str(v).strip().replace("T", " ").rstrip("Z")
            t = dt.datetime.fromisoformat(text)
            values.append(t.replace(tzinfo=dt.timezone.utc) if t.tzinfo is None
                          else t.astimezone(dt.timezone.utc))
        except (ValueError, OverflowError):  # a cell outside the storage convention: NULL
            values.append(None)
    return pa.chunked_array([pa.array(values, UTC_US)])


def conform_column(arr: pa.ChunkedArray, kind: str | None) -> pa.ChunkedArray:
    """Cast one result column to the type its plan kind promises, where the engine's own
    type differs only in representation (never in value)."""
    if kind is None:
        return arr
    t = arr.type
    if kind == "boolean" and (pa.types.is_integer(t) or pa.types.is_null(t)):
        return pc.not_equal(arr, 0) if not pa.types.is_null(t) else arr.cast(pa.bool_())
    if kind in ("timestamp", "timestamptz"):
        if pa.types.is_string(t) or pa.types.is_large_string(t):
            return _parse_text_timestamps(arr)
        if pa.types.is_null(t):
            return arr.cast(UTC_US)
        if pa.types.is_timestamp(t) and (t.tz not in (None, "UTC") or t.unit in ("s", "ms")):
            # one representation: microseconds (like DuckDB), UTC (naive values are UTC)
            return arr.cast(pa.timestamp("us" if t.unit in ("s", "ms") else t.unit, tz="UTC"))
        if pa.types.is_date(t):
            return arr.cast(pa.timestamp("us")).cast(UTC_US)
    if kind == "date" and (pa.types.is_string(t) or pa.types.is_large_string(t)):
        # a cell outside the storage convention (not YYYY-MM-DD) reads as NULL
        return pc.strptime(arr, format="%Y-%m-%d", unit="s", error_is_null=True).cast(pa.date32())
    if kind == "integer":
        if pa.types.is_null(t):
            return arr.cast(pa.int64())
        if pa.types.is_floating(t) or pa.types.is_decimal(t):
            try:
                return arr.cast(pa.int64())  # safe cast: fails on a fraction
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                return arr
    if kind == "double":
        if pa.types.is_null(t) or pa.types.is_integer(t) or pa.types.is_decimal(t):
            return arr.cast(pa.float64())
    if kind == "string" and pa.types.is_null(t):
        return arr.cast(pa.string())
    return arr


def output_kinds(plan: Any) -> dict[str, str]:
    """Kind of every user-visible output column of a finished plan."""
    out: dict[str, str] = {}
    for k in plan.keys:
        if k.mode == "nbin":
            kinds = ["double"] * len(k.names)
        elif k.mode in ("tbin", "trunc"):
            kinds = ["timestamptz"] * len(k.names)
        elif k.mode == "extract":
            kinds = ["integer"]
        elif k.spec.top is not None:
            kinds = ["string"]
        else:
            kinds = [k.col.kind]
        out.update(zip(k.names, kinds))
    for m in plan.measures:
        agg = m.spec.agg
        if agg in ("count", "count_distinct", "approx_count_distinct"):
            out[m.name] = "integer"
        elif agg in ("sum", "min", "max") and m.col is not None:
            out[m.name] = m.col.kind
        else:
            out[m.name] = "double"
    for c in plan.columns:
        if c.role in ("stack_base", "stack_top"):
            out[c.name] = "double"
    return out


def conform(table: pa.Table, plan: Any) -> pa.Table:
    kinds = output_kinds(plan)
    cols = [conform_column(table.column(n), kinds.get(n)) for n in table.column_names]
    return pa.table(dict(zip(table.column_names, cols)))
