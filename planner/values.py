"""Values of a request: column names, time zones, instants, literals, bound parameters.

The leaf checks every stage shares (``planner.bind``, ``planner.where``,
``planner.filter_sql``): a column name resolved against the ``SourceSchema`` (unknown names
get the nearest valid ones), a time zone name checked against the IANA database, an ISO
8601 text read as an aware instant, a JSON value made the dialect's typed sqlglot literal
-- each a ``PlanError`` with the request's JSON pointer when it does not fit. And the bound
parameter machinery: which values become parameter slots, the slot markers in the SQL text
and the driver value of each slot. In: request values, ``ColumnInfo``, ``Dialect``; out:
sqlglot expressions and plain Python values. Pure (no I/O).
"""

from __future__ import annotations

import contextvars
import datetime as dt
import functools
import math
import re
import zoneinfo
from typing import Any

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.errors import PlanError, nearest
from planner.schema import ColumnInfo, SourceSchema


def _resolve(name: str, schema: SourceSchema, ptr: str) -> ColumnInfo:
    col = schema.column(name)
    if col is None:
        sugg = nearest(name, schema.columns)
        hint = f"; did you mean {', '.join(repr(s) for s in sugg)}?" if sugg else ""
        raise PlanError(ptr, f"unknown column {name!r} in source {schema.name!r}{hint}",
                        slug="unknown-column", title="Unknown column", suggestions=sugg)
    return col


#: names zoneinfo can open that are not canonical IANA zones (build artefacts, the host's own
#: zone, and the posix/ right/ copies of the database)
_NOT_ZONES = frozenset({"Factory", "localtime", "posixrules"})


@functools.lru_cache(maxsize=1)
def time_zone_names() -> frozenset[str]:
    """The IANA time zone names sluice accepts: ``zoneinfo.available_timezones()`` without
    ``Factory``, ``localtime``, ``posixrules`` and the ``posix/`` / ``right/`` trees."""
    return frozenset(z for z in zoneinfo.available_timezones()
                     if z not in _NOT_ZONES and not z.startswith(("posix/", "right/")))


def _check_tz(tz: str | None, ptr: str, default: str = "UTC") -> str:
    if tz is None:
        return default
    if tz in time_zone_names():
        return tz
    sugg = nearest(tz, sorted(time_zone_names()))
    hint = f"; did you mean {', '.join(repr(s) for s in sugg)}?" if sugg else ""
    raise PlanError(ptr, f"{tz!r} is not an IANA time zone name (use one such as "
                    f"'Europe/Berlin' or 'UTC'){hint}", slug="bad-time-zone",
                    suggestions=sugg)


#: The zone in which offset-less instants of ``where`` / ``filter_sql`` are read while a
#: request is compiled (the request's ``tz``; set by ``_compile_where``).
_READ_TZ: contextvars.ContextVar[str] = contextvars.ContextVar("sluice_read_tz", default="UTC")


def _parse_instant(value: Any, ptr: str, tz: str | None = None) -> dt.datetime:
    """An ISO 8601 date or timestamp as an aware instant. Text without an offset is a
    wall-clock time in ``tz`` (default: the request's zone, see ``_READ_TZ``); a wall-clock
    time that occurs twice or never (DST changes) reads with fold=0, i.e. the offset in force
    before the change (zoneinfo's rule). Instants outside years 1..9999 in UTC are refused.
    The result keeps the zone it was written in (its date is the date a DATE column compares
    with); dialects convert it to UTC for timestamps."""
    if not isinstance(value, str):
        raise PlanError(ptr, f"expected an ISO 8601 timestamp string, got {value!r}",
                        slug="type-mismatch")
    text = value.strip()
    if text.endswith("Z") or text.endswith("z"):
        text = text[:-1] + "+00:00"
    try:
        if len(text) == 10:
            t = dt.datetime.combine(dt.date.fromisoformat(text), dt.time())
        else:
            t = dt.datetime.fromisoformat(text)
    except ValueError:
        raise PlanError(ptr, f"{value!r} is not an ISO 8601 date or timestamp "
                        "(e.g. '2026-01-01' or '2026-01-01T08:00:00Z')",
                        slug="bad-value") from None
    zone = tz if tz is not None else _READ_TZ.get()
    if t.tzinfo is None:
        t = t.replace(tzinfo=dt.timezone.utc if zone == "UTC" else zoneinfo.ZoneInfo(zone))
    try:
        t.astimezone(dt.timezone.utc)  # the dialects compare instants in UTC
        return t  # in the zone it was written in: a date column compares with its date
    except (OverflowError, ValueError):
        raise PlanError(ptr, f"{value!r} is outside the instants sluice can compare (years 1 to "
                        "9999 in UTC)", slug="out-of-range") from None


def _literal(d: Dialect, col: ColumnInfo, value: Any, ptr: str) -> exp.Expression:
    if col.is_number:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise PlanError(ptr, f"{col.name!r} is a number column; {value!r} is not a number",
                            slug="type-mismatch")
        if isinstance(value, float) and not math.isfinite(value):
            raise PlanError(ptr, "numbers must be finite", slug="bad-value")
        return d.number(value)
    if col.kind == "string":
        if not isinstance(value, str):
            raise PlanError(ptr, f"{col.name!r} is a text column; compare it with a string, "
                            f"not {value!r}", slug="type-mismatch")
        if "\x00" in value:
            raise PlanError(ptr, "strings may not contain NUL characters", slug="bad-value")
        return d.text_literal(value)
    if col.kind == "boolean":
        if not isinstance(value, bool):
            raise PlanError(ptr, f"{col.name!r} is a boolean column; use true or false",
                            slug="type-mismatch")
        return d.boolean(value)
    if col.is_temporal:
        return d.timestamp_literal(_parse_instant(value, ptr), col.kind)
    raise PlanError(ptr, f"column {col.name!r} of type {col.sql_type} cannot be filtered",
                    slug="type-mismatch")



# ---- bound parameters for long IN lists ------------------------------------------------
#
# A 5,000-value ``in`` list written as literals costs ~0.3 s of sqlglot building, copying and
# rendering per request and makes every request's SQL text (and cached plan) different. As
# bound parameters the text depends only on the request's shape, so one cached plan serves
# every list, and the values go to the driver as data:
#
#   list  (DuckDB, PostgreSQL): ``col IN (SELECT <literal form of u> FROM UNNEST(<one list
#         parameter>) AS p(u))``; ``x IN (subquery)`` and ``x IN (v1, ..., vn)`` are the same
#         predicate in SQL (ISO 9075 8.4 <in predicate>: both are ``x = ANY (...)``), NULLs
#         included, so not_in stays NOT IN;
#   json  (SQLite, no arrays): ``col IN (SELECT <literal form of value> FROM json_each(?))``
#         with the values as one JSON array (SQLite's JSON1 functions, built in since 3.38);
#   each  (MariaDB/MySQL, no arrays; every dialect's lists shorter than PARAM_MIN_VALUES):
#         one parameter per value, escaped by the driver; the list is padded to a power of
#         two by repeating its last value (``x IN (a, b, b)`` is ``x IN (a, b)``), so few SQL
#         texts exist per request shape. A short list is exactly the literal list with each
#         literal a parameter, so the engine plans it as it would the literals (DuckDB, 10M
#         rows, two short lists in a linked chart's filter: 78.4 ms as literals, 78.2 as
#         parameters, 78.3 as UNNEST lists); a new category set of a brush reuses the plan.
#
# Single comparison values (eq..gte, contains, starts_with) become one parameter each, in
# the same literal form (``_scalar_bindable``): a brushed chart (a new window per request)
# reuses one plan.
#
# "<literal form of u>" is the dialect's own literal for the column kind with the literal
# replaced by the parameter (e.g. MySQL's CAST(... AS BINARY) for text, the timestamp casts),
# so a value compares exactly as its literal would (tests/test_hostile_inputs.py checks
# both forms give the same answer on every engine). Number lists mixing ints and floats
# or holding integers beyond 64-bit signed stay literals. Slots appear in the rendered
# text as NUL-delimited markers (request text can never contain NUL: planner.model.Text),
# replaced by ``bind_sql``.

#: lists at least this long use the dialect's list form (``param_form[0]``), shorter ones
#: one parameter per value ("each")
PARAM_MIN_VALUES = 16


#: a slot marker in rendered SQL: NUL <slot> NUL, or NUL <slot>.<j> NUL for value j of a list
_SLOT = re.compile(r"\x00(\d+)(?:\.(\d+))?\x00")


def _marker(slot: int, j: int | None = None) -> exp.Expression:
    return exp.Var(this=f"\x00{slot}\x00" if j is None else f"\x00{slot}.{j}\x00")


def _leaf(e: exp.Expression) -> exp.Expression:
    """The literal inside a dialect's literal form (a number's sign included)."""
    if isinstance(e, (exp.Literal, exp.Boolean)) or (isinstance(e, exp.Neg)
                                                     and isinstance(e.this, exp.Literal)):
        return e
    for node in e.walk():
        if isinstance(node, exp.Boolean) or (isinstance(node, exp.Literal) and node.is_string):
            return node
    raise AssertionError(f"no literal in {e!r}")


def _put(template: exp.Expression, e: exp.Expression) -> exp.Expression:
    """``template`` (a literal form, or a predicate holding one) with its literal replaced
    by ``e`` (a parameter marker or column)."""
    t = template.copy()
    leaf = _leaf(t)
    if leaf is t:
        return e
    leaf.replace(e)
    return t


def _float64(d: Dialect, col: ColumnInfo) -> bool:
    """A column of 64-bit doubles: a number literal (DECIMAL on DuckDB, NUMERIC on PostgreSQL,
    DECIMAL on MariaDB) compared with it is converted to the nearest double -- the very double
    a bound float is -- so both compare alike. Against integer, decimal or 32-bit float columns
    a decimal literal compares exactly (or in single precision) and a bound double would not.
    SQLite stores every REAL as an 8-byte double."""
    return col.kind == "double" and (d.caps.float64_reals
                                     or col.sql_type.strip().lower() in _FLOAT64_TYPES)


_FLOAT64_TYPES = frozenset({"double", "double precision", "float8", "float64"})


def _scalar_bindable(d: Dialect, col: ColumnInfo | None, value: Any) -> bool:
    """Whether one comparison value (eq..gte, contains, starts_with) is bound as a parameter
    (decided from the value and the column's kind alone, so that ``param_shape`` and
    ``prepare`` always agree). Values of the wrong JSON type stay literals (and fail there)."""
    if d.caps.param_form is None or col is None:
        return False
    if col.is_number:
        if isinstance(value, bool):
            return False
        if isinstance(value, int):
            return -2 ** 63 <= value < 2 ** 63
        return isinstance(value, float) and math.isfinite(value) and _float64(d, col)
    if col.kind == "string" or col.is_temporal:
        return isinstance(value, str) and "\x00" not in value
    if col.kind == "boolean":
        return isinstance(value, bool)
    return False


def _scalar_value(d: Dialect, col: ColumnInfo, value: Any, ptr: str) -> Any:
    """The driver value of a bound comparison value: what its literal denotes (the
    dialect's timestamp text for instants, read in the request's zone), checked like it."""
    if col.is_temporal:
        return _instant_value(d, col, value, ptr, _READ_TZ.get())
    return value


@functools.lru_cache(maxsize=4096)
def _instant_value(d: Dialect, col: ColumnInfo, value: str, ptr: str, tz: str) -> Any:
    """(``_scalar_value`` of an instant; ``tz``: the zone it is read in, part of the key)"""
    return _leaf(_literal(d, col, value, ptr)).this


def _param_values(d: Dialect, col: ColumnInfo, values: list[Any], ptr: str) -> list[Any] | None:
    """The driver values of a long in/not_in list (each what its literal denotes), or None
    when the list stays literals. Checks every value as ``_literal`` would (same pointers)."""
    if d.caps.param_form is None or not _bindable(values):
        return None
    if col.is_number:
        for j, v in enumerate(values):
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                _literal(d, col, v, f"{ptr}/{j}")  # raises the type mismatch
        return list(values)
    if col.kind == "string":
        for j, v in enumerate(values):
            if not isinstance(v, str) or "\x00" in v:
                _literal(d, col, v, f"{ptr}/{j}")
        return list(values)
    if col.kind == "boolean":
        for j, v in enumerate(values):
            if not isinstance(v, bool):
                _literal(d, col, v, f"{ptr}/{j}")
        return list(values)
    if col.is_temporal:
        return [_leaf(_literal(d, col, v, f"{ptr}/{j}")).this for j, v in enumerate(values)]
    return None


def _bindable(values: list[Any]) -> bool:
    """Whether a list is bound as parameters (decided from the values alone, so that
    ``param_shape`` and ``prepare`` always agree): not empty, one JSON type, integers
    within 64-bit signed, floats finite."""
    if not values:
        return False
    kinds = {type(v) for v in values}
    if len(kinds) != 1:
        return False
    if int in kinds:
        return all(-2 ** 63 <= v < 2 ** 63 for v in values)
    if float in kinds:
        return all(math.isfinite(v) for v in values)
    return True


def list_form(d: Dialect, n: int) -> str:
    """How a bound list of ``n`` values is written: the dialect's list form, or one
    parameter per value ("each") for a short list."""
    return d.caps.param_form[0] if n >= PARAM_MIN_VALUES else "each"


def _param_in(d: Dialect, col: ColumnInfo, ref: exp.Expression, first: Any, ptr: str,
              slot: int, raw: list[Any]) -> exp.In:
    form = list_form(d, len(raw))
    template = _literal(d, col, first, ptr)

    def put(e: exp.Expression) -> exp.Expression:
        return _put(template, e)

    if form == "each":
        return exp.In(this=ref, expressions=[put(_marker(slot, j)) for j in range(_padded(len(raw)))])
    if form == "json":
        sel = exp.select(put(exp.column("value", quoted=True))).from_(
            exp.Anonymous(this="json_each", expressions=[_marker(slot)]))
        return exp.In(this=ref, query=exp.Subquery(this=sel))
    arg = _marker(slot)
    arg = d.param_array(arg, type(raw[0]))
    unnest = exp.Unnest(expressions=[arg], alias=exp.TableAlias(
        this=exp.to_identifier("p", quoted=True), columns=[exp.to_identifier("u", quoted=True)]))
    sel = exp.select(put(exp.column("u", quoted=True))).from_(unnest)
    return exp.In(this=ref, query=exp.Subquery(this=sel))


def _padded(n: int) -> int:
    return 1 << max(0, n - 1).bit_length()
