"""The bind stage: request + source schema + dialect -> the checked ``Plan``.

Every name is resolved against the schema (unknown names get the nearest valid ones),
every option is checked once, against the column's kind and the dialect's capabilities,
with the request's JSON pointer; ``where`` becomes one sqlglot condition
(``planner.where``); output names are assigned (unique ignoring case, within the dialect's
identifier limits). An M4 reduction is checked by ``planner.m4.check``. In:
``ChartRequest``, ``SourceSchema``, ``Dialect``; out: a ``Plan`` without statements (its
bin layouts open: ``planner.layout``; its SQL: ``planner.emit_*`` via ``planner.compile``).
Pure (no I/O).
"""

from __future__ import annotations

import dataclasses
import math
import sys
from typing import Any

from sqlglot import exp

from planner import aggregates, m4, measure_sql, names, window
from planner.dialects.base import Dialect
from planner.errors import PlanError, Unsupported, pointer
from planner.filter_sql import compile_filter_sql
from planner.model import Channel, ChartRequest
from planner.names import INTERNAL
from planner.plan import Key, Measure, OutputColumn, Plan
from planner.expr_sql import compile_typed
from planner.schema import ColumnInfo, SourceSchema
from planner.source import using
from planner.values import _check_tz, _parse_instant, _resolve
from planner.where import _compile_where


def bind(request: ChartRequest, schema: SourceSchema, dialect: Dialect,
         params: bool = False) -> Plan:
    """The checked plan of ``request`` over ``schema`` for ``dialect`` (no statements yet).
    ``params``: long ``in`` / ``not_in`` lists and comparison values become bound
    parameters (see ``Capabilities.param_form``) instead of literals, so the SQL text does not
    depend on their values."""
    keys: list[Key] = []
    measures: list[Measure] = []
    request_tz = _check_tz(request.tz, pointer("tz"))
    schema = with_exprs(request, schema, dialect)
    for path, channel, ch in request.keyed_channels():
        if ch.is_measure and channel in ("row", "col"):
            raise PlanError(pointer(*path, "agg"), f"facet {channel} must be a key (a column), "
                            "not a measure (agg)")
        try:
            if ch.measure is not None:  # a named measure of the source's config
                measures.append(measure_sql.bind_named(len(measures), path, channel, ch,
                                                       schema, dialect, request_tz))
            elif ch.is_measure:
                measures.append(_check_measure(len(measures), path, channel, ch, schema,
                                               dialect, request_tz))
            else:
                keys.append(_check_key(len(keys), path, channel, ch, schema, dialect,
                                       request_tz))
        except PlanError as e:  # an expr's messages say its text and point at it
            if ch.expr is not None:
                e.detail = e.detail.replace(names.expr_column(ch.expr), ch.expr)
                if e.pointer == pointer(*path, "column"):
                    e.pointer = pointer(*path, "expr")
            raise
    slots: list[Any] | None = [] if params and dialect.caps.param_form is not None else None
    where, layout_where = _compile_where(request, schema, dialect, slots)
    stack_index, approximate = _check_options(request, dialect, keys, measures)
    named_keys, named_measures, columns = _assign_names(keys, measures, stack_index)
    stack = named_measures[stack_index] if stack_index is not None else None
    _check_name_lengths(dialect, named_keys, named_measures, stack, columns)
    schema = using(schema, _used(keys, measures, where))
    plan = Plan(request, schema, dialect, tuple(named_keys), tuple(named_measures), where,
                columns=tuple(columns), approximate=approximate, stack_measure=stack,
                slots=len(slots or ()), layout_where=layout_where)
    if request.reduce is not None:  # M4 line reduction: planner/m4.py
        m4.check(plan)
    return plan


def with_exprs(request: ChartRequest, schema: SourceSchema, d: Dialect) -> SourceSchema:
    """``schema`` with the request's ``{"expr": ...}`` terms as columns named by their text.
    The service puts them there first, typed by the engine (app/catalog.py); a term it did
    not is typed here by the allow-list's own reading."""
    new = {}
    for path, _, ch in request.keyed_channels():
        # (an expr already there, or {"expr": "fee"}: the column itself)
        if ch.expr is not None and ch.expr not in schema.columns and ch.expr not in new:
            _, (kind, type_name) = compile_typed(ch.expr, schema, d, pointer(*path, "expr"))
            new[ch.expr] = ColumnInfo(names.expr_column(ch.expr), kind, type_name)
    if not new:
        return schema
    return dataclasses.replace(schema, columns={**schema.columns, **new},
                               exprs={**schema.exprs, **{c.name: t for t, c in new.items()}})


def _used(keys: list[Key], measures: list[Measure], where: Any) -> dict[str, str]:
    """The columns a plan reads, each with the pointer of its first use (for the relation:
    which computed and dimension columns it must provide, planner/source.py)."""
    used: dict[str, str] = {}
    for it in [*keys, *measures]:
        if it.col is not None:
            used.setdefault(it.col.name, pointer(*it.path, "expr" if it.spec.expr else "column"))
        if isinstance(it, Measure) and it.condition is not None:
            for c in it.condition.find_all(exp.Column):
                used.setdefault(c.name, pointer(*it.path, "condition"))
        if isinstance(it, Measure):  # a named measure's scalar inputs (planner/measure_sql.py)
            for e in [it.input_expr, *(p.input for p in it.parts)]:
                for c in e.find_all(exp.Column) if e is not None else ():
                    used.setdefault(c.name, pointer(*it.path, "measure"))
    for c in where.find_all(exp.Column) if where is not None else ():
        used.setdefault(c.name, pointer("where"))
    return used


def _check_measure(i: int, path, channel: str, ch: Channel, schema: SourceSchema,
                   d: Dialect, request_tz: str = "UTC") -> Measure:
    entry = aggregates.get(ch.agg)  # what the aggregate accepts: planner/aggregates.py
    col = None
    if ch.column is not None:
        col = _resolve(ch.column, schema, pointer(*path, "column"))
        if not entry.accepts(col.kind):
            detail = entry.mismatch.format(agg=ch.agg, column=col.name, kind=col.kind)
            if col.kind == "boolean":  # the aggregate that does take one
                detail += "; the fraction of true rows is {\"agg\": \"share\"}"
            raise PlanError(pointer(*path, "agg"), detail,
                            slug="type-mismatch", title="Aggregate does not fit the column type")
    if ch.tz is not None:
        raise PlanError(pointer(*path, "tz"), "tz applies to temporal keys, not to a measure")
    if entry.feature and not d.supports(entry.feature):
        raise Unsupported(pointer(*path, "agg"), d.name, f"{ch.agg}")
    condition = None
    if ch.condition is not None:  # the allow-list of filter_sql, pointed at this field
        try:
            condition = compile_filter_sql(ch.condition, schema, d, tz=request_tz)
        except PlanError as e:
            raise PlanError(pointer(*path, "condition"),
                            e.detail.replace("filter_sql", "condition"), slug=e.slug,
                            title="condition is not allowed", status=e.status,
                            suggestions=e.suggestions) from None
    return Measure(i, path, channel, ch, col, condition=condition)


def _check_key(i: int, path, channel: str, ch: Channel, schema: SourceSchema,
               d: Dialect, request_tz: str = "UTC") -> Key:
    assert ch.column is not None
    col = _resolve(ch.column, schema, pointer(*path, "column"))
    if col.kind == "other":
        raise PlanError(pointer(*path, "column"),
                        f"column {col.name!r} has type {col.sql_type}, which sluice cannot "
                        "group by", slug="type-mismatch")
    # a key's own tz, else the request's (the dashboard's zone), else UTC
    tz = _check_tz(ch.tz, pointer(*path, "tz"), request_tz)
    if ch.tz is not None and not col.is_temporal:
        raise PlanError(pointer(*path, "tz"), f"tz applies to timestamps; {col.name!r} is {col.kind}",
                        slug="type-mismatch")
    if not col.is_temporal:
        tz = "UTC"
    uses_zone = ch.trunc is not None or ch.extract is not None or ch.bin is not None
    if col.is_temporal and (uses_zone or ch.tz is not None) and tz != "UTC" \
            and not d.supports("tz"):
        raise Unsupported(pointer(*path, "tz") if ch.tz is not None else pointer("tz"),
                          d.name, "time zone conversion")
    if ch.top is not None and col.kind != "string":
        raise PlanError(pointer(*path, "top"),
                        f"top keeps the largest text categories; {col.name!r} is {col.kind}",
                        slug="type-mismatch")
    if ch.top is not None and not d.supports("window"):
        raise Unsupported(pointer(*path, "top"), d.name, "top (needs window functions)")
    if ch.trunc is not None:
        if not col.is_temporal:
            raise PlanError(pointer(*path, "trunc"),
                            f"trunc needs a timestamp or date column; {col.name!r} is {col.kind}",
                            slug="type-mismatch", title="Option does not fit the column type")
        if ch.trunc == "week" and not d.supports("trunc_week"):
            raise Unsupported(pointer(*path, "trunc"), d.name, "ISO week truncation")
        return Key(i, path, channel, ch, col, "trunc", tz)
    if ch.extract is not None:
        if not col.is_temporal:
            raise PlanError(pointer(*path, "extract"),
                            f"extract needs a timestamp or date column; {col.name!r} is {col.kind}",
                            slug="type-mismatch", title="Option does not fit the column type")
        if not d.supports("extract"):
            raise Unsupported(pointer(*path, "extract"), d.name, "date part extraction")
        return Key(i, path, channel, ch, col, "extract", tz)
    if ch.bin is not None:
        b = ch.bin
        bp = pointer(*path, "bin")
        if col.is_number:
            need = {"scott": "stddev", "fd": "quantile"}.get(b.rule or "")
            if need and not d.supports(need):
                what = "standard deviation" if need == "stddev" else "exact quantiles"
                raise Unsupported(pointer(*path, "bin", "rule"), d.name,
                                  f"bin rule {b.rule} (needs {what})")
            nlimits = None
            if b.limits is not None:
                lo, hi = b.limits
                if isinstance(lo, str) or isinstance(hi, str):
                    raise PlanError(pointer(*path, "bin", "limits"),
                                    f"limits on the number column {col.name!r} must be numbers",
                                    slug="type-mismatch")
                if not (math.isfinite(lo) and math.isfinite(hi) and math.isfinite(hi - lo)) \
                        or not lo < hi:
                    raise PlanError(pointer(*path, "bin", "limits"),
                                    "limits must be finite numbers [lo, hi] with lo < hi")
                if not (hi - lo >= sys.float_info.min
                        and hi - lo >= 64 * math.ulp(max(abs(lo), abs(hi)))):
                    # e.g. [0, 5e-324]: no two distinct bin edges fit between them
                    raise PlanError(pointer(*path, "bin", "limits"),
                                    f"limits [{lo!r}, {hi!r}] are too close together to hold "
                                    "distinct bin edges", slug="bad-layout")
                nlimits = (float(lo), float(hi))
            return Key(i, path, channel, ch, col, "nbin", tz, nlimits=nlimits)
        if col.is_temporal:
            if b.width is not None or b.rule is not None:
                what = "width" if b.width is not None else "rule"
                raise PlanError(pointer(*path, "bin", what),
                                f"{what} bins numbers; on the timestamp {col.name!r} use "
                                "bins (a calendar step is chosen) or trunc", slug="type-mismatch")
            tlimits = None
            if b.limits is not None:
                # offset-less limits are wall-clock times of the key's zone
                lo_t = _parse_instant(b.limits[0], pointer(*path, "bin", "limits", 0), tz)
                hi_t = _parse_instant(b.limits[1], pointer(*path, "bin", "limits", 1), tz)
                if not lo_t < hi_t:
                    raise PlanError(pointer(*path, "bin", "limits"), "limits need lo < hi")
                tlimits = (lo_t, hi_t)
            return Key(i, path, channel, ch, col, "tbin", tz, tlimits=tlimits)
        raise PlanError(bp, f"bin needs a number or timestamp column; {col.name!r} is "
                        f"{col.kind} (text and booleans group as categories without bin)",
                        slug="type-mismatch", title="Option does not fit the column type")
    return Key(i, path, channel, ch, col, "plain", tz)


def _check_options(req: ChartRequest, d: Dialect, keys: list[Key], measures: list[Measure]
                   ) -> tuple[int | None, tuple[str, ...]]:
    """Checks the request's options against its keys and measures; returns the position of
    the stacked measure (or None) and the internal names of approximate measures."""
    present = {k.channel for k in keys} | {m.channel for m in measures}
    stack_measure = None
    for i, s in enumerate(req.sort):
        if s.channel not in present:
            raise PlanError(pointer("sort", i, "channel"),
                            f"sort names channel {s.channel!r}, which the request does not use "
                            f"(it uses {', '.join(sorted(present))})")
    if req.stack is not None:
        if not d.supports("window"):
            raise Unsupported(pointer("stack"), d.name, "stack (needs window functions)")
        ch = req.channels
        if ch.y is not None and ch.y.is_measure:
            stack_measure = next(m for m in measures if m.channel == "y")
        elif ch.x is not None and ch.x.is_measure:
            stack_measure = next(m for m in measures if m.channel == "x")
        else:
            raise PlanError(pointer("stack"), "stack needs a measure (agg) on y or on x")
        m = stack_measure
        if m.composite:
            raise PlanError(pointer(*m.path, "measure"),
                            f"stack cannot pile {m.describe()}: it combines several aggregates "
                            "(a pile of ratios means nothing); stack a measure that is one "
                            "sum or count, or drop stack")
        if not m.aggregate.stacks:
            raise PlanError(pointer(*m.path, "agg"),
                            f"stack cannot pile {m.spec.agg} values (a pile of them means "
                            f"nothing): stack a count, sum or other additive measure on "
                            f"{m.channel}, or drop stack")
    window.check(d, keys, measures)  # then: measures over the grouped table
    composite = next((m for m in measures if m.composite), None)
    top = next((k for k in keys if k.spec.top is not None), None)
    if composite is not None and top is not None:
        raise PlanError(pointer(*top.path, "top"),
                        f"top folds the other groups into {top.spec.other_label!r}, and "
                        f"{composite.describe()} combines several aggregates, which do not fold "
                        "exactly from per-group values: use a measure that is one aggregate "
                        "(sum, count, avg, min, max) with top, or drop top")
    if req.facet is not None and req.facet.max_groups is not None and not d.supports("window"):
        raise Unsupported(pointer("facet", "max_groups"), d.name, "max_groups (window functions)")
    if req.empty_bins != "omit" and not any(k.binned for k in keys):
        raise PlanError(pointer("empty_bins"), "empty_bins needs a binned key (a channel with bin)")
    if req.empty_bins != "omit":
        for k in keys:
            if k.binned and k.spec.bin is not None and k.spec.bin.width is not None \
                    and k.spec.bin.limits is None:
                raise PlanError(pointer(*k.path, "bin", "limits"),
                                "empty_bins with a fixed width needs limits (the bins to emit)")
    approximate = tuple(m.internal for m in measures if m.aggregate.approximate)
    return (measures.index(stack_measure) if stack_measure is not None else None), approximate


def _assign_names(keys: list[Key], measures: list[Measure], stack_index: int | None
                  ) -> tuple[list[Key], list[Measure], list[OutputColumn]]:
    """Output names, unique IGNORING CASE: DuckDB, SQLite and MariaDB compare identifiers
    case-insensitively even when quoted (MariaDB with Unicode case folding: 'ǅ' = 'ǆ'), so
    'depot' and 'Depot' would be one column there. ``str.casefold`` (Unicode full case
    folding) without U+0307 COMBINING DOT ABOVE is at least as strict as each of them
    (measured on MariaDB 10/11: 'i' = 'İ', which casefolds to 'i' + U+0307; 'ß' != 's',
    'é' != 'e'); a clash gets ``<channel>_`` prefixed, then ``_2``, ``_3``, ...
    Returns the keys and measures with their names (copies, same order) and the output
    columns."""
    taken: set[str] = set()
    columns: list[OutputColumn] = []
    named: dict[tuple[str, int], Key | Measure] = {}

    def fold(name: str) -> str:
        return name.casefold().replace("\u0307", "")

    def free(name: str) -> bool:
        folded = fold(name)
        return folded not in taken and not folded.startswith(INTERNAL)

    def claim(want: str, channel: str) -> str:
        name = want
        if not free(name):
            name = f"{channel}_{want}"
        n = 2
        base = name
        while not free(name):
            name = f"{base}_{n}"
            n += 1
        taken.add(fold(name))
        return name

    # name in request order: x, y, color, size, shape, opacity, by[i], row, col
    for it in sorted(keys + measures, key=lambda x: _path_rank(x.path)):
        spec = it.spec
        label = it.label if isinstance(it, Key) else it.channel
        if isinstance(it, Measure):
            want = spec.name or it.named or _measure_name(spec)
            if spec.then is not None and not spec.name:
                want = f"{want}_{window.SUFFIX[spec.then]}"
            name = claim(want, label)
            named["m", it.index] = dataclasses.replace(it, name=name)
            columns.append(OutputColumn(name, it.channel, "measure", spec.column))
        elif it.binned:
            if spec.name:
                names = (claim(f"{spec.name}_lo", label), claim(f"{spec.name}_hi", label))
            else:
                names = (claim(f"{label}_lo", label), claim(f"{label}_hi", label))
            named["k", it.index] = dataclasses.replace(it, names=names)
            columns.append(OutputColumn(names[0], it.channel, "bin_lo", spec.column))
            columns.append(OutputColumn(names[1], it.channel, "bin_hi", spec.column))
        else:
            want = spec.name or (f"{spec.column}_{spec.extract}" if it.mode == "extract"
                                 else str(spec.column))
            name = claim(want, label)
            named["k", it.index] = dataclasses.replace(it, names=(name,))
            columns.append(OutputColumn(name, it.channel, "key", spec.column))
    named_keys = [named["k", k.index] for k in keys]
    named_measures = [named["m", m.index] for m in measures]
    if stack_index is not None:
        m = named_measures[stack_index]
        columns.append(OutputColumn(claim(f"{m.name}_base", m.channel), m.channel,
                                    "stack_base", m.spec.column))
        columns.append(OutputColumn(claim(f"{m.name}_top", m.channel), m.channel,
                                    "stack_top", m.spec.column))
    return named_keys, named_measures, columns


def _check_name_lengths(d: Dialect, keys: list[Key], measures: list[Measure],
                        stack_measure: Measure | None, columns: list[OutputColumn]) -> None:
    # dialect data: identifier caps (engines that cut longer names) and BMP-only identifiers
    # (MariaDB/MySQL: a name with U+10000 or above is error 1300 "Invalid utf8mb4 character")
    cap = d.caps.max_identifier_bytes
    if cap is None and not d.caps.identifiers_bmp_only:
        return
    stack = [c.name for c in columns if c.role in ("stack_base", "stack_top")]
    items = [(k.path, k.spec, list(k.names)) for k in keys]
    items += [(m.path, m.spec, [m.name] + (stack if m is stack_measure else []))
              for m in measures]
    for path, spec, names in items:
        for n in names:
            if d.caps.identifiers_bmp_only and any(ord(c) > 0xFFFF for c in n):
                raise PlanError(pointer(*path, "name" if spec.name else "column"),
                                f"output column name {n!r} has a character beyond U+FFFF; "
                                f"{d.name} identifiers cannot hold one (MariaDB/MySQL keep "
                                "names in utf8mb3): give the channel another name",
                                slug="bad-name")
            if cap is not None and len(n.encode("utf-8")) > cap:
                raise PlanError(pointer(*path, "name" if spec.name else "column"),
                                f"output column name {n!r} is longer than the {cap} bytes "
                                f"{d.name} keeps; give the channel a shorter name",
                                slug="name-too-long")


def _path_rank(path: tuple) -> tuple:
    order = {"x": 0, "y": 1, "color": 2, "size": 3, "shape": 4, "opacity": 5, "by": 6,
             "row": 7, "col": 8}
    return (order[path[1]], path[2] if len(path) > 2 else 0)


def _measure_name(ch: Channel) -> str:
    if ch.column is None:  # count(*), share of a condition
        return str(ch.agg)
    if ch.agg == "quantile":
        q = ch.q if ch.q is not None else 0.5
        pct = f"{q * 100:g}".replace(".", "_")
        return f"p{pct}_{ch.column}"
    return f"{ch.agg}_{ch.column}"
