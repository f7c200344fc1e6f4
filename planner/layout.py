"""The layout stage: an extents row -> every binned key's bin layout.

``lay_out(plan, row)`` fixes each binned key of a bound ``Plan`` from the statistics the
extents statement gathered (``planner.names.extents``: min, max, count, standard
deviation, quartiles) or from its explicit limits: numeric keys get Heckbert nice bins, a
numpy rule's bins or a fixed width's (``planner.bins``), time keys a calendar step with
its first bin and count. Layouts that place no value in a bin, or make more than
``MAX_BINS`` bins, are a 422 at the layout's JSON pointer. ``bins_meta`` is the ``bins``
member of the answer. In: a bound ``Plan`` (its keys) + the extents row (dict); out: a NEW
plan whose binned keys carry ``nbins`` / ``tstep`` / ``tstart`` / ``tcount`` / ``tclosed`` /
``vrange`` (copies made with ``dataclasses.replace``; the bound plan is left as it was).
The calendar helpers (``_trunc_local``, ``_add_local``, ...) are the Python twins of the
SQL the emit stage writes. Pure (no I/O).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import zoneinfo
from typing import Any

from planner import bins as binning
from planner import names
from planner.errors import PlanError, pointer
from planner.model import MAX_BINS
from planner.plan import Key, Plan


def lay_out(plan: Plan, row: dict[str, Any]) -> Plan:
    """A new plan: ``plan`` with every binned key laid out from the extents ``row``."""
    return dataclasses.replace(plan, keys=tuple(lay_out_key(k, row) for k in plan.keys))


def lay_out_key(k: Key, row: dict[str, Any]) -> Key:
    """The key with its bin layout from the extents ``row`` (other keys: unchanged)."""
    if k.mode == "nbin":
        return _layout_numeric(k, row)
    if k.mode == "tbin":
        return _layout_time(k, row)
    return k


def bins_meta(plan: Plan) -> dict[str, dict[str, Any]]:
    """``bins`` of the response: the layout of every binned key, by channel name."""
    out: dict[str, dict[str, Any]] = {}
    for k in plan.keys:
        label = k.label
        if k.mode == "nbin" and k.nbins is not None:
            b = k.nbins
            out[label] = {"start": b.start, "stop": b.stop, "width": b.width,
                          "count": b.count, "method": b.method}
        elif k.mode == "tbin" and k.tstep is not None:
            n = k.tcount or 0
            first = _time_bin_instant(k, _time_bin_start(k, 0)) if n else None
            last = _time_bin_instant(k, _time_bin_start(k, n)) if n else None
            out[label] = {"start": first, "stop": last, "step": k.tstep.iso,
                          "count": n, "method": "calendar"}
    return out


def _num(row: dict[str, Any], name: str) -> float | None:
    v = row.get(name)
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _layout_numeric(k: Key, row: dict[str, Any]) -> Key:
    """Fix a numeric key's bins: ``width`` (origin grid), ``rule`` (numpy's edges) or ``bins``
    (nice widths), over the limits or the data's finite min/max. Layouts whose edges are not
    distinct finite doubles, or that make more than MAX_BINS bins, are a 422."""
    b = k.spec.bin
    assert b is not None
    p = names.extents(k.index)
    method = "width" if b.width is not None else b.rule or "nice"
    field_ptr = pointer(*k.path, "bin", "width" if b.width is not None else
                        "rule" if b.rule is not None else "bins")
    if k.nlimits is not None:
        lo, hi = k.nlimits
    else:
        lo, hi = _num(row, p + "min"), _num(row, p + "max")
        if lo is None or hi is None:  # no finite values: a harmless placeholder layout
            start = b.origin or 0.0 if b.width is not None else 0.0
            return dataclasses.replace(k, nbins=binning.NumericBins(start, b.width or 1.0, 1,
                                                                    method))
    vrange = (lo, hi)
    try:
        if b.width is not None:
            o = b.origin or 0.0
            nb = binning.width_bins(b.width, o, lo, hi)
        elif b.rule is not None:
            n = int(row.get(p + "n") or 0)
            q1, q3 = _num(row, p + "q1"), _num(row, p + "q3")
            iqr = (q3 - q1) if q1 is not None and q3 is not None else None
            if k.nlimits is not None:  # numpy: the rule sees only the values inside the range
                dlo, dhi = _num(row, p + "min"), _num(row, p + "max")
                ptp = (dhi - dlo) if dlo is not None and dhi is not None else 0.0
            else:
                ptp = hi - lo
            nb = binning.rule_bins(b.rule, n, lo, hi, ptp, _num(row, p + "sd"), iqr,
                                   integer=k.col.kind == "integer")
        else:
            nb = binning.nice_bins(lo, hi, b.bins or 20)
        if nb.count is not None and nb.count > MAX_BINS:
            raise PlanError(field_ptr, f"this layout makes {nb.count} bins over "
                            f"[{lo:g}, {hi:g}]; at most {MAX_BINS}: use "
                            + ("a larger width" if b.width is not None else
                               "another rule or limits" if b.rule is not None else "fewer bins"),
                            slug="too-many-bins")
        return dataclasses.replace(k, nbins=binning.check_layout(nb), vrange=vrange)
    except binning.LayoutError as e:
        if k.nlimits is None and b.width is None and lo is not None:
            # data too narrow to split (e.g. 0 and 5e-324): numpy's zero-range layout
            zero = binning.rule_bins(b.rule or "sturges", 0, lo, lo)
            return dataclasses.replace(k, nbins=binning.NumericBins(zero.start, zero.width, 1,
                                                                    method), vrange=vrange)
        where = pointer(*k.path, "bin", "limits") if k.nlimits is not None and b.width is None \
            else field_ptr
        raise PlanError(where, f"{e}: no value could be placed in a bin; use "
                        + ("a larger width or another origin" if b.width is not None
                           else "wider limits"), slug="bad-layout") from None


def _layout_time(k: Key, row: dict[str, Any]) -> Key:
    """Fix a time key's calendar step and bins over its limits (or the data's min/max). Like
    numeric bins, the last bin is closed: when the upper end falls on a bin edge, values
    equal to it belong to the bin that ends there (no extra bin past the limits)."""
    b = k.spec.bin
    assert b is not None
    p = names.extents(k.index)
    where = pointer(*k.path, "bin", "limits") if k.tlimits is not None else pointer(*k.path, "bin")
    try:
        return _layout_time_steps(k, row, p, b.bins or 20)
    except (OverflowError, ValueError):
        raise PlanError(where, "the time bins would start or end outside the years 1 to 9999 "
                        f"(in {k.tz}); use limits inside that range", slug="out-of-range") from None


def _layout_time_steps(k: Key, row: dict[str, Any], p: str, target: int) -> Key:
    if k.tlimits is not None:
        lo = k.tlimits[0].timestamp()
        hi = k.tlimits[1].timestamp()
    else:
        lo, hi = _num(row, p + "min"), _num(row, p + "max")
    if lo is None or hi is None:
        lo = hi = 0.0
    step = binning.time_step(hi - lo, target)
    closed = None
    if step.is_fixed:
        first = math.floor(lo / step.seconds) * step.seconds
        last = math.floor(hi / step.seconds) * step.seconds
        if last == hi and last > first:  # hi on an edge: the last bin [hi - step, hi] is closed
            last -= step.seconds
            closed = dt.datetime.fromtimestamp(hi, dt.timezone.utc)
        return dataclasses.replace(k, tstep=step, tstart=float(first), tclosed=closed,
                                   tcount=int(round((last - first) / step.seconds)) + 1)
    else:
        zone = zoneinfo.ZoneInfo(k.tz)
        lo_local = dt.datetime.fromtimestamp(lo, dt.timezone.utc).astimezone(zone).replace(tzinfo=None)
        hi_local = dt.datetime.fromtimestamp(hi, dt.timezone.utc).astimezone(zone).replace(tzinfo=None)
        first_l = _trunc_local(lo_local, step.unit)
        last_l = _trunc_local(hi_local, step.unit)
        count = _units_between(first_l, last_l, step.unit) + 1
        if last_l == hi_local and last_l > first_l:  # hi on a bin edge: closed last bin
            count -= 1
            closed = dt.datetime.fromtimestamp(hi, dt.timezone.utc)
        # every bin start and stop must be a wall-clock time Python (and the engines) know
        _time_bin_instant(k, _add_local(first_l, step.unit, count))
        return dataclasses.replace(k, tstep=step, tstart=first_l, tclosed=closed, tcount=count)


def _trunc_local(t: dt.datetime, unit: str) -> dt.datetime:
    """Python twin of SQL date_trunc on a naive wall-clock time (ISO week)."""
    if unit == "second":
        return t.replace(microsecond=0)
    if unit == "minute":
        return t.replace(second=0, microsecond=0)
    if unit == "hour":
        return t.replace(minute=0, second=0, microsecond=0)
    day = t.replace(hour=0, minute=0, second=0, microsecond=0)
    if unit == "day":
        return day
    if unit == "week":
        return day - dt.timedelta(days=day.weekday())
    if unit == "month":
        return day.replace(day=1)
    if unit == "quarter":
        return day.replace(day=1, month=(day.month - 1) // 3 * 3 + 1)
    if unit == "year":
        return day.replace(day=1, month=1)
    raise ValueError(unit)


def _add_local(t: dt.datetime, unit: str, n: int) -> dt.datetime:
    if unit == "day":
        return t + dt.timedelta(days=n)
    if unit == "week":
        return t + dt.timedelta(days=7 * n)
    months = {"month": 1, "quarter": 3, "year": 12}[unit] * n
    m = t.month - 1 + months
    return t.replace(year=t.year + m // 12, month=m % 12 + 1)


def _units_between(a: dt.datetime, b: dt.datetime, unit: str) -> int:
    """Whole calendar units from the bin start ``a`` to the bin start ``b`` (both truncated)."""
    if unit in ("day", "week"):
        return (b - a).days // (7 if unit == "week" else 1)
    months = (b.year - a.year) * 12 + b.month - a.month
    return months // {"month": 1, "quarter": 3, "year": 12}[unit]


def _time_bin_start(k: Key, i: int) -> Any:
    """The i-th bin start (epoch seconds, or a naive wall-clock time for calendar steps)."""
    assert k.tstep is not None
    if k.tstep.is_fixed:
        return k.tstart + i * k.tstep.seconds
    return _add_local(k.tstart, k.tstep.unit, i)


def _time_bin_instant(k: Key, v: Any) -> dt.datetime:
    if isinstance(v, dt.datetime):
        return v.replace(tzinfo=zoneinfo.ZoneInfo(k.tz)).astimezone(dt.timezone.utc)
    return dt.datetime.fromtimestamp(v, dt.timezone.utc)
