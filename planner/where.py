"""The ``where`` stage: a request's filters -> one sqlglot condition (+ parameter slots).

``_compile_where`` turns ``where`` (predicates, ``any``, ``not``) and ``filter_sql``
(through ``planner.filter_sql``'s allow-list) into the condition the emit stage puts in
every statement, reading offset-less instants in the request's zone. With slots, long
``in`` lists and single comparison values become bound-parameter markers; ``param_shape``
is the request with exactly those values abstracted (equal shapes, equal SQL text),
``bind_values`` the slots' values in order, ``bind_sql`` / ``display_sql`` the text for
the driver / for the answer. In: ``ChartRequest``, ``SourceSchema``, ``Dialect``; out:
``exp.Expression``, JSON-able shapes, value lists, text. Pure (no I/O).
"""

from __future__ import annotations

import json
import re
from typing import Any

from sqlglot import exp

from planner.dialects.base import Dialect
from planner.errors import PlanError, pointer
from planner.filter_sql import compile_filter_sql
from planner.model import AnyOf, ChartRequest, NotOf, Predicate
from planner.schema import SourceSchema
from planner.values import (_READ_TZ, _SLOT, _bindable, _check_tz, _literal, _marker,
                            _padded, _param_in, _param_values, _put, _resolve, list_form,
                            _scalar_bindable, _scalar_value)


_COMPARE = {"eq": exp.EQ, "ne": exp.NEQ, "lt": exp.LT, "lte": exp.LTE, "gt": exp.GT,
            "gte": exp.GTE}
#: operators whose one value may be a bound parameter (``_scalar_bindable``)
_SCALAR_OPS = frozenset(_COMPARE) | {"contains", "starts_with"}


def _compile_filter(f: Any, path: tuple, schema: SourceSchema, d: Dialect,
                    slots: list[Any] | None = None) -> exp.Expression:
    """``slots``: when a list, long in/not_in lists and bindable comparison values become
    parameter slots appended to it (their values: ``bind_values``); None writes every value
    as a literal."""
    if isinstance(f, AnyOf):
        parts = [_compile_filter(g, path + ("any", j), schema, d, slots)
                 for j, g in enumerate(f.any)]
        return exp.Paren(this=exp.or_(*parts)) if len(parts) > 1 else parts[0]
    if isinstance(f, NotOf):
        return exp.Not(this=exp.Paren(this=_compile_filter(f.not_, path + ("not",), schema, d,
                                                           slots)))
    assert isinstance(f, Predicate)
    col = _resolve(f.column, schema, pointer(*path, "column"))
    ref = d.column(col.name, "s")
    terms: list[exp.Expression] = []
    for op, value in f.operators():
        ptr = pointer(*path, op)
        if op in _COMPARE:
            lit = _literal(d, col, value, ptr)
            if slots is not None and _scalar_bindable(d, col, value):
                lit = _put(lit, _marker(len(slots)))
                slots.append(None)
            terms.append(_COMPARE[op](this=ref.copy(), expression=lit))
        elif op in ("in", "not_in"):
            if not value:
                terms.append(exp.false() if op == "in" else exp.true())
                continue
            # a set of doubles holds 0.0 once: -0.0 is looked up as 0.0 (Dialect.group_number)
            member = d.group_number(ref.copy()) if col.kind == "double" else ref.copy()
            raw = _param_values(d, col, value, pointer(*path, op)) if slots is not None else None
            if raw is not None:
                node = _param_in(d, col, member, value[0], pointer(*path, op, 0), len(slots), raw)
                slots.append(None)
                terms.append(node if op == "in" else exp.Not(this=node))
                continue
            lits = [_literal(d, col, v + 0.0 if isinstance(v, float) else v,
                              pointer(*path, op, j)) for j, v in enumerate(value)]
            node = exp.In(this=member, expressions=lits)
            terms.append(node if op == "in" else exp.Not(this=node))
        elif op == "is_null":
            isnull = exp.Is(this=ref.copy(), expression=exp.Null())
            terms.append(isnull if value else exp.Not(this=isnull))
        elif op in ("contains", "starts_with"):
            if col.kind != "string":
                raise PlanError(ptr, f"{op} needs a text column; {col.name!r} is {col.kind}",
                                slug="type-mismatch")
            _literal(d, col, value, ptr)
            fn = d.contains if op == "contains" else d.starts_with
            node = fn(ref.copy(), value)
            if slots is not None and _scalar_bindable(d, col, value):
                node = _put(node, _marker(len(slots)))  # (starts_with: its length is in the shape)
                slots.append(None)
            terms.append(node)
    return exp.Paren(this=exp.and_(*terms)) if len(terms) > 1 else terms[0]


def param_shape(req: ChartRequest, d: Dialect, schema: SourceSchema | None = None) -> Any:
    """The request as plain JSON with every list that ``prepare(..., params=True)`` may bind
    replaced by its padded length and every bound comparison value (``_scalar_bindable``,
    which needs the ``schema``'s column kinds) by its JSON type: equal shapes render the
    same SQL text."""
    doc = req.model_dump(mode="json", by_alias=True, exclude_none=True)
    if d.caps.param_form is None:
        return doc

    def walk(f: Any) -> None:
        if "any" in f:
            for g in f["any"]:
                walk(g)
        elif "not" in f:
            walk(f["not"])
        else:
            for op in ("in", "not_in"):
                v = f.get(op)
                if v is not None and _bindable(v):
                    f[op] = ["\x00", list_form(d, len(v)), _padded(len(v)),
                             sorted({type(x).__name__ for x in v})]
            col = schema.column(f["column"]) if schema is not None else None
            for op in _SCALAR_OPS:
                v = f.get(op)
                if v is not None and _scalar_bindable(d, col, v):
                    # starts_with writes the prefix's length (characters; MariaDB: bytes)
                    f[op] = ["\x00", type(v).__name__] + (
                        [len(v), len(v.encode("utf-8"))] if op == "starts_with" else [])

    for f in doc.get("where", []):
        walk(f)
    return doc


def bind_values(req: ChartRequest, schema: SourceSchema, d: Dialect) -> list[Any]:
    """The value of every parameter slot of ``prepare(req, schema, d, params=True)``, in slot
    order (the same walk as ``_compile_filter``), checked like literals."""
    if d.caps.param_form is None:
        return []
    out: list[Any] = []

    def bind(f: Predicate, path: tuple) -> None:
        col = None
        for op, value in f.operators():
            if op in _SCALAR_OPS:
                col = col or _resolve(f.column, schema, pointer(*path, "column"))
                if _scalar_bindable(d, col, value):
                    out.append(_scalar_value(d, col, value, pointer(*path, op)))
                continue
            if op not in ("in", "not_in") or not value:
                continue
            col = col or _resolve(f.column, schema, pointer(*path, "column"))
            raw = _param_values(d, col, value, pointer(*path, op))
            if raw is None:
                continue
            form = list_form(d, len(raw))
            if form == "each":
                raw = raw + [raw[-1]] * (_padded(len(raw)) - len(raw))
            elif form == "json":
                raw = json.dumps(raw, ensure_ascii=False)
            out.append(raw)

    token = _READ_TZ.set(_check_tz(req.tz, pointer("tz")))  # as _compile_where reads them
    try:
        for path, f in req.predicates():
            bind(f, path)
    finally:
        _READ_TZ.reset(token)
    return out


def bind_sql(sql: str, values: list[Any], style: str) -> tuple[str, list[Any]]:
    """SQL text with slot markers -> (text for the driver, its parameters in order).
    ``qmark``: ``?``; ``format``: ``%s`` with every literal ``%`` doubled (psycopg and
    pymysql read ``%`` as the start of a placeholder)."""
    args: list[Any] = []

    def sub(m: re.Match) -> str:
        v = values[int(m.group(1))]
        args.append(v if m.group(2) is None else v[int(m.group(2))])
        return "?" if style == "qmark" else "%s"

    if not values or "\x00" not in sql:
        return sql, []
    if style == "format":
        sql = sql.replace("%", "%%")
    return _SLOT.sub(sub, sql), args


def param_style(d: Dialect) -> str:
    """The placeholder style ``bind_sql`` writes for ``d``'s driver (``qmark`` without one)."""
    return d.caps.param_form[1] if d.caps.param_form else "qmark"


def display_sql(sql: str) -> str:
    """SQL with slot markers shown as ``?`` (the ``sql`` member of an answer)."""
    return _SLOT.sub("?", sql)


def _compile_where(req: ChartRequest, schema: SourceSchema, d: Dialect,
                   slots: list[Any] | None = None
                   ) -> tuple[exp.Expression | None, exp.Expression | None]:
    """(the condition of every filter, the condition that decides data-driven layouts: None
    unless ``req.split_layout``). The layout condition is the first ``layout_filters``
    filters of ``where`` and ``filter_sql``; its slot markers are a prefix of the full
    condition's, so ``bind_values`` serves the statements of both."""
    # offset-less instants in where and filter_sql are read in the request's zone
    token = _READ_TZ.set(_check_tz(req.tz, pointer("tz")))
    try:
        parts = [_compile_filter(f, ("where", i), schema, d, slots)
                 for i, f in enumerate(req.where)]
        extra = []
        if req.filter_sql is not None:  # allow-listed SQL text, rebuilt from the catalog
            extra.append(compile_filter_sql(req.filter_sql, schema, d, tz=_READ_TZ.get()))
    finally:
        _READ_TZ.reset(token)
    n = len(parts) if req.layout_filters is None else req.layout_filters
    if n > len(parts):
        raise PlanError(pointer("layout_filters"), f"layout_filters is {n} but where has "
                        f"{len(parts)} filters")
    where = _conjunction(parts + extra)
    return where, (_conjunction(parts[:n] + extra) if req.split_layout else None)


def _conjunction(parts: list[exp.Expression]) -> exp.Expression | None:
    if not parts:
        return None
    return exp.and_(*parts) if len(parts) > 1 else parts[0]
