"""Emit: the key expressions of the main statement, computed per source row.

``_key_expr`` is a key's internal grouping value (plain, trunc, extract, numeric bin index,
time bin start; ``_trunc_micros`` / ``_micro_bin``: an integer bin number for fixed-length
trunc units), ``_outside_expr`` the 1 / 0 flag of a row outside explicit limits,
``_key_outputs`` the output columns computed back from the grouping value. The plan-time
proofs ``_plain_floor_is_exact`` / ``_integer_floor_is_exact`` decide whether a numeric bin
index may skip its floating-point guard. In: a laid-out ``Key``; out: sqlglot expressions.
Pure (``planner.tzdb`` reads the time zone database).
"""

from __future__ import annotations

import datetime as dt
import functools
import math
import zoneinfo

from sqlglot import exp

from planner import bins as binning
from planner import tzdb
from planner.dialects.base import Dialect
from planner.emit_sql import _ref
from planner.layout import _time_bin_start
from planner.plan import Key
from planner.schema import ColumnInfo


def _outside_expr(d: Dialect, k: Key) -> exp.Expression | None:
    """1 when the row's value lies outside the key's explicit limits, else 0 (NULL -> 0)."""
    ref = d.column(k.col.name, "s")
    if k.nlimits is not None:
        lo, hi = k.nlimits
        v = d.double(d.number_cell(ref))
        cond = exp.or_(exp.LT(this=v, expression=d.real(lo)),
                       exp.GT(this=v.copy(), expression=d.real(hi)))
        if d.nonfinite(k.col.kind):  # inf / NaN are not outside: they go to the NULL bin
            cond = exp.and_(d.finite(v.copy()), exp.Paren(this=cond))
    elif k.tlimits is not None:
        lo_l = d.timestamp_literal(k.tlimits[0], k.col.kind)
        hi_l = d.timestamp_literal(k.tlimits[1], k.col.kind)
        cond = exp.or_(exp.LT(this=ref, expression=lo_l), exp.GT(this=ref.copy(), expression=hi_l))
        ok = None if k.col.in_range else d.instant_range(ref.copy(), k.col.kind)
        if ok is not None:  # 'infinity' / year 12000 are not outside: they go to the NULL bin
            cond = exp.and_(ok, exp.Paren(this=cond))
    else:
        return None
    return exp.Case(ifs=[exp.If(this=cond, true=exp.Literal.number(1))],
                    default=exp.Literal.number(0))


def _instant_in_range(d: Dialect, col: ColumnInfo, ref: exp.Expression) -> exp.Expression:
    """A temporal column as a time key (or min/max) sees it: instants outside years 1..9999
    (UTC), such as 'infinity' or year 12000, and cells outside the engine's storage
    convention are NULL (their own NULL group, never in a layout, never a min/max). A column
    the catalog proved to hold none of them (``ColumnInfo.in_range``) is read as it is."""
    ok = None if col.in_range else d.instant_range(ref, col.kind)
    if ok is None:
        return ref
    return exp.Case(ifs=[exp.If(this=ok, true=ref.copy())])


def _key_expr(d: Dialect, k: Key) -> exp.Expression:
    """The internal grouping value of a key, computed per source row."""
    unit_us = _trunc_micros(d, k)
    if unit_us is not None:
        return _micro_bin(d, k, unit_us)
    ref = d.column(k.col.name, "s")
    if k.col.is_temporal:  # plain, trunc, extract and time bins alike
        ref = _instant_in_range(d, k.col, ref)
    if k.mode == "plain":  # a top key folds in _top_key_expr / _fold_top
        return d.group_number(ref) if k.col.kind == "double" else ref
    if k.mode == "trunc":
        return _trunc_in_range(d, k, ref, _trunc_key(d, k.spec.trunc, ref, k.col.kind, k.tz))
    if k.mode == "extract":
        return d.extract(k.spec.extract, d.to_local(ref, k.col.kind, k.tz))
    if k.mode == "nbin":
        ref = d.number_cell(ref)
        idx = _nbin_index(d, k, d.double(ref))
        if d.nonfinite(k.col.kind) and not k.finite:  # inf / NaN: the NULL bin (pandas.cut)
            return exp.Case(ifs=[exp.If(this=d.finite(d.double(ref.copy())), true=idx)])
        return idx
    if k.mode == "tbin":
        step = k.tstep
        assert step is not None
        if step.is_fixed:
            s = d.real(step.seconds)
            key = exp.Mul(this=d.floor(exp.Div(this=d.epoch(ref, k.col.kind), expression=s)),
                          expression=s.copy())
        else:
            key = d.trunc(step.unit, d.to_local(ref, k.col.kind, k.tz))
        if k.tclosed is None:
            return key
        # closed last bin: a value equal to the stop (the only kept value whose bin starts
        # there) goes into the last bin
        last = _time_bin_start(k, k.tcount - 1)
        if step.is_fixed:
            stop_key, last_key = d.real(k.tclosed.timestamp()), d.real(last)
        else:
            stop_local = k.tclosed.astimezone(zoneinfo.ZoneInfo(k.tz)).replace(tzinfo=None)
            stop_key, last_key = d.local_literal(stop_local), d.local_literal(last)
        return exp.Case(ifs=[exp.If(this=exp.GTE(this=key, expression=stop_key),
                                    true=last_key)], default=key.copy())
    raise AssertionError(k.mode)


def _nbin_index(d: Dialect, k: Key, v: exp.Expression) -> exp.Expression:
    """Bin number of the DOUBLE value ``v`` in the key's numeric layout."""
    b = k.nbins
    assert b is not None
    start, width = d.real(b.start), d.real(b.width)
    if k.checked:  # the plain floor, its groups verified after execution (checkable)
        q = v.copy() if b.start == 0.0 else exp.Paren(this=exp.Sub(this=v.copy(),
                                                                   expression=start.copy()))
        idx = d.floor(exp.Div(this=q, expression=width.copy()))
        if b.count is None:
            return idx
        return exp.Case(ifs=[  # the closed last bin, and values below a snapped start
            exp.If(this=exp.GTE(this=v.copy(), expression=d.real(
                b.start + float(b.count) * b.width)), true=d.number(b.count - 1)),
            exp.If(this=exp.LT(this=v.copy(), expression=start.copy()),
                   true=exp.Literal.number(0))], default=idx)
    unguarded = _unguarded_index(d, k)
    if unguarded is not None:
        fast, closed = unguarded
        # floor((v - start) / width) already puts every value of the range where the
        # guarded form below would (proved at plan time, see _plain_floor_is_exact);
        # the guard doubled the cost of a 10M-row histogram.
        q = v.copy() if b.start == 0.0 else exp.Paren(this=exp.Sub(this=v.copy(),
                                                                   expression=start.copy()))
        idx = d.floor(exp.Div(this=q, expression=width.copy()))
        if closed:  # the closed last bin: values on the upper edge go into the last bin
            idx = exp.Case(ifs=[exp.If(this=exp.GTE(this=v.copy(), expression=d.real(fast)),
                                       true=d.number(b.count - 1))], default=idx)
        return idx

    def edge(i: exp.Expression) -> exp.Expression:
        return exp.Add(this=start.copy(), expression=exp.Mul(this=exp.Paren(this=i),
                                                              expression=width.copy()))

    i0 = d.floor(exp.Div(this=exp.Paren(this=exp.Sub(this=v.copy(), expression=start.copy())),
                         expression=width.copy()))
    # floating-point guard: move by one bin when the quotient fell on the wrong side of
    # an edge, so every value obeys edge_i <= v < edge_(i+1) exactly.
    idx = exp.Add(this=i0, expression=exp.Paren(this=exp.Case(ifs=[
        exp.If(this=exp.GTE(this=v.copy(), expression=edge(exp.Add(
            this=i0.copy(), expression=exp.Literal.number(1)))), true=exp.Literal.number(1)),
        exp.If(this=exp.LT(this=v.copy(), expression=edge(i0.copy())),
               true=exp.Neg(this=exp.Literal.number(1)))],
        default=exp.Literal.number(0))))
    if b.count is not None:
        # closed last bin: values from the upper edge on go into the last bin; values below
        # the first edge (a start snapped above the data's min) into the first. Tested on v
        # against the edges, not on the guarded index: the index appears once (the clamp
        # on the index repeated it three times; bench/floor.py: 2M rows, 5-7x -> 3.4x plain)
        # and, as the index is exact, idx > count - 1 <=> v >= edge_count, idx < 0 <=> v < start.
        idx = exp.Case(ifs=[exp.If(this=exp.GTE(this=v.copy(), expression=d.real(
                                       b.start + float(b.count) * b.width)),
                                   true=d.number(b.count - 1)),
                            exp.If(this=exp.LT(this=v.copy(), expression=start.copy()),
                                   true=exp.Literal.number(0))],
                       default=idx)
    return idx


def _unguarded_index(d: Dialect, k: Key) -> tuple[float, bool] | None:
    """How a laid-out numeric key's bin index is written: None (the guarded form), else
    ``(top, closed)`` -- the plain floor, with a closed last bin for values from ``top`` on
    when ``closed`` (``_plain_floor_is_exact``; on integer columns, ``_integer_floor_is_exact``).
    The main statement's numeric bin index depends on the layout and this alone
    (``planner.compile.layout_key``)."""
    b = k.nbins
    assert b is not None
    fast = _plain_floor_is_exact(b, k.vrange)
    if fast is not None:
        return fast, bool(fast)
    if k.col.kind == "integer" and d.caps.whole_integer_cells \
            and _integer_floor_is_exact(b, k.vrange):
        return b.start + float(b.count) * b.width, True
    return None


def _nbin_edges(d: Dialect, k: Key, v: exp.Expression) -> tuple[exp.Expression, exp.Expression]:
    """The bin start and end of numeric bin number ``v`` (the answer's ``_lo`` / ``_hi``)."""
    b = k.nbins
    assert b is not None
    lo = exp.Add(this=d.real(b.start), expression=exp.Mul(this=v, expression=d.real(b.width)))
    hi = exp.Add(this=d.real(b.start), expression=exp.Mul(
        this=exp.Paren(this=exp.Add(this=v.copy(), expression=exp.Literal.number(1))),
        expression=d.real(b.width)))
    return lo, hi


SUB_DAY_UNITS = ("hour", "minute", "second")


def _plain_floor_is_exact(b: binning.NumericBins, vrange: tuple[float, float] | None
                          ) -> float | None:
    """Whether the unguarded bin index ``floor((v - start) / width)`` (IEEE double arithmetic,
    as the engine computes it) equals the guarded one -- ``i`` with
    ``start + i*width <= v < start + (i+1)*width`` -- for every double ``v`` in ``vrange``.

    The index is monotone in ``v``, so it is right on all of ``[edge_i, edge_(i+1))`` as soon
    as it is right at ``edge_i`` and at the double just below ``edge_(i+1)``; 2 checks per bin.
    Returns None (use the guarded form), 0.0 (plain floor is exact on the whole range) or the
    upper edge ``edge_count`` when values equal to it occur and must go to the last bin.
    """
    if b.count is None or vrange is None:
        return None
    lo, hi = vrange
    # (the per-bin checks depend on the layout alone: cached across a brush's new ranges)
    if not lo >= b.start or not _exact_layout(b.start, b.width, b.count):
        return None
    top = b.start + float(b.count) * b.width
    if hi < top:
        return 0.0
    return top  # values in [edge_count, hi] go to the last bin, as the guarded form clamps


@functools.lru_cache(maxsize=4096)
def _exact_layout(start: float, width: float, count: int) -> bool:
    def idx(v: float) -> int:
        return math.floor((v - start) / width)

    def edge(i: int) -> float:
        return start + float(i) * width

    if not (math.isfinite(start) and math.isfinite(width) and width > 0):
        return False
    for i in range(count):
        e0, e1 = edge(i), edge(i + 1)
        if not e1 > e0 or idx(e0) != i or idx(math.nextafter(e1, -math.inf)) != i:
            return False
    return True


#: Fixed-length ``trunc`` units in microseconds (the ISO week starts on a Monday).
_UNIT_MICROS = {"week": 604_800_000_000, "day": 86_400_000_000, "hour": 3_600_000_000,
                "minute": 60_000_000, "second": 1_000_000}
#: Microseconds from 0001-01-01T00:00:00Z -- the first instant a time key shows, a Monday
#: (proleptic Gregorian), a whole number of every unit above -- to 1970-01-01T00:00:00Z.
_YEAR1_MICROS = tzdb.YEAR1_MICROS
#: Microseconds from 1970-01-01T00:00:00Z to 9999-12-31T23:59:59.999999Z, the last one shown.
_YEAR9999_MICROS = 253_402_300_799_999_999


def _trunc_micros(d: Dialect, k: Key) -> int | None:
    """The unit in microseconds when a ``trunc`` key groups by an integer (a fixed-length
    unit in UTC, or a sub-day unit in a zone whose offsets are whole units from some instant
    on: ``planner.tzdb.whole_offsets_from``; on a dialect with integer epoch microseconds), else None."""
    if k.mode != "trunc" or k.spec.trunc not in _UNIT_MICROS:
        return None
    if k.tz != "UTC" and (k.spec.trunc not in SUB_DAY_UNITS
                          or tzdb.whole_offsets_from(k.tz, _UNIT_MICROS[k.spec.trunc]) is None):
        return None
    if d.epoch_micros(d.column(k.col.name), k.col.kind) is None:
        return None
    return _UNIT_MICROS[k.spec.trunc]


def _micro_bin(d: Dialect, k: Key, unit_us: int) -> exp.Expression:
    """``trunc`` of a fixed-length unit in UTC as the bin number since 0001-01-01T00:00:00Z:
    ``(us + c) // unit`` on integer epoch microseconds ``us``, ``c`` = _YEAR1_MICROS. Every
    instant shown has ``us + c >= 0``, so the integer quotient is the floor (engines round
    it toward zero) and instants before 1970 land in the right bin; no float is involved,
    and the bins are date_trunc's in UTC because ``c`` is a whole number of every unit (the
    week: 0001-01-01 is a Monday). Instants outside years 1..9999 are NULL, as
    _instant_in_range makes them for every other time key. _key_outputs turns the few
    grouped bin numbers back into instants (``bin * unit - c``)."""
    us = d.epoch_micros(d.column(k.col.name, "s"), k.col.kind)
    assert us is not None
    idx = d.int_div(exp.Paren(this=exp.Add(this=us, expression=d.number(_YEAR1_MICROS))),
                    d.number(unit_us))
    if k.tz != "UTC":
        # a zone: the bin start in epoch microseconds; from the instant on which the zone's
        # offsets are whole units the UTC floor, before it the wall-clock form
        since = tzdb.whole_offsets_from(k.tz, unit_us)
        assert since is not None
        start = exp.Sub(this=exp.Mul(this=idx, expression=d.number(unit_us)),
                        expression=d.number(_YEAR1_MICROS))
        fast = exp.If(this=exp.Between(this=us.copy(), low=d.number(since),
                                       high=d.number(_YEAR9999_MICROS)), true=start)
        if since <= -_YEAR1_MICROS:
            return exp.Case(ifs=[fast])
        ref = _instant_in_range(d, k.col, d.column(k.col.name, "s"))
        slow = d.epoch_micros(_trunc_key(d, k.spec.trunc, ref, k.col.kind, k.tz), "timestamptz")
        if d.caps.wide_instants:  # a bin starting before year 1 (a zone's LMT offset): NULL
            slow = exp.Case(ifs=[exp.If(this=exp.Between(
                this=slow, low=d.number(-_YEAR1_MICROS), high=d.number(_YEAR9999_MICROS)),
                true=slow.copy())])
        return exp.Case(ifs=[fast], default=slow)
    if not d.caps.wide_instants or k.col.in_range:
        return idx
    ok = exp.Between(this=us.copy(), low=d.number(-_YEAR1_MICROS), high=d.number(_YEAR9999_MICROS))
    return exp.Case(ifs=[exp.If(this=ok, true=idx)])


def _integer_floor_is_exact(b: binning.NumericBins, vrange: tuple[float, float] | None) -> bool:
    """Like _plain_floor_is_exact, for a column whose values are whole numbers (as DOUBLE):
    only whole-number doubles must land right, so each bin is checked at the first and the
    last whole number in it (the index is monotone in ``v``). A double just below an edge,
    which makes the check fail for every layout whose top edge is 0, is no such value: a
    histogram of an integer column gets the unguarded index (with the closed last bin's
    CASE, whatever the range's maximum, so the statement depends on the layout alone)."""
    if b.count is None or vrange is None or not vrange[0] >= b.start:
        return False
    return _exact_integer_layout(b.start, b.width, b.count)


@functools.lru_cache(maxsize=4096)
def _exact_integer_layout(start: float, width: float, count: int) -> bool:
    if not (math.isfinite(start) and math.isfinite(width) and width > 0):
        return False
    for i in range(count):
        e0, e1 = start + float(i) * width, start + float(i + 1) * width
        if not e1 > e0:
            return False
        first, last = float(math.ceil(e0)), float(math.floor(math.nextafter(e1, -math.inf)))
        if first > last:  # no whole number in this bin
            continue
        if math.floor((first - start) / width) != i or math.floor((last - start) / width) != i:
            return False
    return True


#: inputs between these instants have their ``trunc`` bin (any unit up to a year, in any
#: zone: offsets stay under a day) inside years 1..9999
_TRUNC_SAFE = (dt.datetime(1, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(days=400),
               dt.datetime(9999, 12, 29, tzinfo=dt.timezone.utc))


def _trunc_in_range(d: Dialect, k: Key, ref: exp.Expression, key: exp.Expression
                    ) -> exp.Expression:
    """``key`` (a ``trunc`` grouping value of ``ref``), NULL when its bin starts outside
    years 1..9999 in UTC, like every other instant shown: in a zone, the local bin of a
    value in the first hours (or, trunc year, the first year) of year 1 can start before
    0001-01-01T00:00Z (Berlin's local midnight is 23:07 the day before). Only where the
    engine holds such instants (``caps.wide_instants``; elsewhere they cannot arise). The
    test of the bin's instant runs only for values near either end (one comparison of the
    column for the others)."""
    if k.tz == "UTC" or not d.caps.wide_instants:
        return key
    safe = exp.Between(this=ref.copy(), low=d.timestamp_literal(_TRUNC_SAFE[0], k.col.kind),
                       high=d.timestamp_literal(_TRUNC_SAFE[1], k.col.kind))
    start = key.copy() if k.spec.trunc in SUB_DAY_UNITS else d.from_local(key.copy(), k.tz)
    shown = d.instant_range(start, "timestamptz")  # (not None: wide_instants)
    return exp.Case(ifs=[exp.If(this=safe, true=key), exp.If(this=shown, true=key.copy())])


def _trunc_key(d: Dialect, unit: str, ref: exp.Expression, kind: str, tz: str) -> exp.Expression:
    """Grouping value of ``trunc``. Day and longer units truncate the wall-clock time in tz
    (a naive timestamp, turned back into an instant on output). Hour and shorter units
    subtract the wall-clock remainder from the instant instead, so the hour repeated when
    clocks fall back stays two groups and half-hour offsets truncate correctly."""
    local = d.to_local(ref, kind, tz)
    if unit not in SUB_DAY_UNITS:
        return d.trunc(unit, local)
    if tz == "UTC":  # no offsets, no repeated hours: truncate the wall clock (4x cheaper)
        return d.from_local(d.trunc(unit, local), tz)
    remainder = exp.Sub(this=d.epoch(local, "timestamp"),
                        expression=d.epoch(d.trunc(unit, local.copy()), "timestamp"))
    return d.from_epoch(exp.Sub(this=d.epoch(ref.copy(), kind), expression=exp.Paren(this=remainder)))


def _key_outputs(d: Dialect, k: Key) -> list[exp.Expression]:
    """Output columns of a key, computed from its internal grouping value."""
    v = _ref(k.internal)
    if k.mode == "nbin":
        lo, hi = _nbin_edges(d, k, v)
        return [exp.alias_(lo, k.names[0], quoted=True), exp.alias_(hi, k.names[1], quoted=True)]
    if k.mode == "tbin":
        step = k.tstep
        assert step is not None
        if step.is_fixed:
            lo = d.from_epoch(v)
            hi = d.from_epoch(exp.Add(this=v.copy(), expression=d.real(step.seconds)))
        else:
            lo = d.from_local(v, k.tz)
            hi = d.from_local(d.add_units(v.copy(), 1, step.unit), k.tz)
        return [exp.alias_(lo, k.names[0], quoted=True), exp.alias_(hi, k.names[1], quoted=True)]
    if k.mode == "trunc":
        unit_us = _trunc_micros(d, k)
        if unit_us is not None and k.tz != "UTC":  # the bin start in microseconds
            return [exp.alias_(d.from_epoch_micros(v), k.names[0], quoted=True)]
        if unit_us is not None:
            start = exp.Sub(this=exp.Mul(this=v, expression=d.number(unit_us)),
                            expression=d.number(_YEAR1_MICROS))
            return [exp.alias_(d.from_epoch_micros(start), k.names[0], quoted=True)]
        if k.spec.trunc in SUB_DAY_UNITS:
            return [exp.alias_(v, k.names[0], quoted=True)]
        return [exp.alias_(d.from_local(v, k.tz), k.names[0], quoted=True)]
    return [exp.alias_(v, k.names[0], quoted=True)]
