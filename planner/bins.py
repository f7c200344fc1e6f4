"""Bin layouts: nice widths, bin-count rules and calendar steps.

* Nice numbers: P. S. Heckbert, "Nice Numbers for Graph Labels", Graphics Gems (1990):
  {1, 2, 5} x 10^k (``nicenum``). ``bins: N`` widens Heckbert's set to the two-digit steps
  ``NICE_MANTISSAS`` = {1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8} x 10^k (every edge still a short
  decimal) and picks the width whose bins (edges on multiples of the width, covering the
  data) number closest to N without exceeding it (``nice_bins``). With 1-2-5 alone the
  steps are up to 2.5x apart and the count can fall to 0.4 N (N = 10 over [0, 21] gives 5);
  neighbouring steps of this set are at most 4/3 apart, so the count stays within
  [0.7 N, N] for N >= 5 (tests/test_reference_bins.py checks it on a table of layouts).
* Bin-count rules as ``numpy.histogram_bin_edges`` implements them
  (numpy/lib/_histograms_impl.py, ``_hist_bin_*`` and ``_get_bin_edges``): H. A. Sturges
  (1926), D. W. Scott (1979), D. Freedman & P. Diaconis (1981), and the square-root choice.
  The rule gives a bin *width* from the values inside the range; the count is
  ``ceil((hi - lo) / width)`` and the edges are ``linspace(lo, hi, count + 1)``.
"""

from __future__ import annotations

import functools
import math
import sys
from dataclasses import dataclass
from decimal import Decimal

#: smallest positive normal double: below it widths lose precision (subnormal)
_TINY = sys.float_info.min


class LayoutError(ValueError):
    """A layout whose edges cannot be represented as distinct finite doubles."""


def nicenum(x: float, round_: bool) -> float:
    """Heckbert's nicenum: a number of the form {1, 2, 5} x 10^k close to ``x``.

    With ``round_`` the nearest such number, otherwise the smallest one >= x.
    """
    if x <= 0 or not math.isfinite(x):
        raise ValueError("nicenum needs a positive finite number")
    expv = Decimal(x).adjusted()  # floor(log10 x), exact also for subnormal x
    f = float(Decimal(x).scaleb(-expv))
    if round_:
        nf = 1.0 if f < 1.5 else 2.0 if f < 3.0 else 5.0 if f < 7.0 else 10.0
    else:
        nf = 1.0 if f <= 1.0 else 2.0 if f <= 2.0 else 5.0 if f <= 5.0 else 10.0
    return _nice(nf, expv)


def _nice(mantissa: float, expv: int) -> float:
    """mantissa x 10^expv as the double nearest to the decimal (0.2, not 2 * 0.1)."""
    return float(Decimal(repr(mantissa)).scaleb(expv))


@dataclass(frozen=True)
class NumericBins:
    """Equal-width bins [start + i*width, start + (i+1)*width), last bin closed."""

    start: float
    width: float
    count: int | None  # None: open-ended (never produced since layouts read the data)
    method: str

    @property
    def stop(self) -> float | None:
        if self.count is None:
            return None
        return self.start + self.count * self.width


def _snap(v: float, step: float) -> float:
    """Remove floating noise from a multiple of a nice step (0.30000000000000004 -> 0.3)."""
    if step <= 0 or not math.isfinite(v):
        return v
    digits = max(0, -math.floor(math.log10(step)) + 2)
    if digits > 300:
        return v
    return round(v, digits)


def _edge(k: int, step: float) -> float:
    """The k-th multiple of a nice step as a double: the double nearest to the decimal
    k x step (0.3, not 3 * 0.1 = 0.30000000000000004)."""
    return float(Decimal(k) * Decimal(repr(step)))


def _grid_index(v: float, step: float, up: bool) -> int:
    """The largest k with edge_k <= v (or, with ``up``, the smallest k with edge_k >= v).
    LayoutError when consecutive edges near v would be the same double (a step below the
    spacing of doubles there: the search for k would not end)."""
    if not abs(v) / step < 2.0 ** 52:
        raise LayoutError(f"bins of width {step:.17g} near {v:.17g} have edges that are not "
                          "distinct finite numbers")
    k = math.floor(v / step)
    while _edge(k, step) > v:
        k -= 1
    while _edge(k + 1, step) <= v:
        k += 1
    if up and _edge(k, step) < v:
        k += 1
    return k


def check_layout(b: NumericBins) -> NumericBins:
    """Refuse edges that are not distinct finite doubles (the bins would hold nothing)."""
    if b.count is None:
        return b
    stop = b.stop
    ok = (math.isfinite(b.start) and math.isfinite(b.width) and b.width >= _TINY
          and stop is not None and math.isfinite(stop))
    if ok:
        # spacing of doubles grows with magnitude: the widest-magnitude edges decide
        for e in (b.start, stop - b.width):
            if not e + b.width > e:
                ok = False
    if not ok:
        raise LayoutError(f"bins of width {b.width:.17g} from {b.start:.17g} have edges that are "
                          "not distinct finite numbers")
    return b


def nice_step_count(lo: float, hi: float, step: float) -> tuple[float, int]:
    """(start, count) of the bins of width ``step`` on multiples of the step covering [lo, hi]
    (the last bin closed: a value equal to its stop belongs to it)."""
    first = _grid_index(lo, step, up=False)
    last = _grid_index(hi, step, up=True)
    return _edge(first, step), max(1, last - first)


#: mantissas of the nice widths ``bins: N`` chooses from (module docstring)
NICE_MANTISSAS = (1.0, 1.2, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0)


@functools.lru_cache(maxsize=4096)  # (the plan cache asks for the layout of every extents row)
def nice_bins(lo: float, hi: float, target: int) -> NumericBins:
    """Nice bins covering [lo, hi]: among the widths NICE_MANTISSAS x 10^k, the one
    whose bin count is closest to ``target`` without exceeding it (ties: the finer width).
    When no width gives at most ``target`` bins (target 1 with data across a multiple of
    every width, e.g. around 0), the width giving the fewest bins."""
    if hi < lo:
        lo, hi = hi, lo
    target = max(int(target), 1)
    if hi == lo or not (hi - lo) >= _TINY * 1e3:
        # A single value (or a span too narrow to split): one unit-ish bin around it.
        width = nicenum(abs(lo), True) / 10.0 if lo != 0 else 1.0
        if not width >= _TINY * 1e3:
            width = 1.0
        start = _snap(math.floor(lo / width) * width, width)
        if not start + width > hi:
            start = lo
        return check_layout(NumericBins(start, width, 1, "nice"))
    best, fewest = _nice_search(lo, hi, target, prune=True)
    if best is None:  # only then does the fewest-bins fallback matter: the full search
        best, fewest = _nice_search(lo, hi, target, prune=False)
    chosen = best or fewest
    if chosen is None:
        raise LayoutError(f"no nice width splits [{lo!r}, {hi!r}]")
    count, step, start = chosen
    return check_layout(NumericBins(start, step, count, "nice"))


def _nice_search(lo: float, hi: float, target: int, prune: bool
                 ) -> tuple[tuple[int, float, float] | None, tuple[int, float, float] | None]:
    """(best, fewest) as (count, step, start) over the nice widths in increasing order.
    ``prune``: a width's count lies within ``span/step`` and ``span/step + 2`` (its grid
    edges are the doubles nearest k x step; ``slack`` covers their rounding), so widths
    whose count must exceed the target are not laid out, and the search stops once no
    wider width can give more bins than the best so far (fewest is then not complete)."""
    span = Decimal(hi) - Decimal(lo)  # (exact: hi - lo overflows for -1e308 .. 1e308)
    e_lo = (span / target).adjusted() - 1
    e_hi = max(span, Decimal(abs(lo)), Decimal(abs(hi))).adjusted() + 1  # widths holding all
    best: tuple[int, float, float] | None = None  # (count, step, start)
    fewest: tuple[int, float, float] | None = None
    for e in range(e_lo, e_hi + 1):
        for m in NICE_MANTISSAS:
            step = _nice(m, e)
            if not (_TINY <= step < math.inf and math.isfinite(lo / step)
                    and math.isfinite(hi / step)):
                continue
            if prune:
                q = hi / step - lo / step
                slack = 2.0 + (abs(lo) + abs(hi)) / step * 1e-12
                if q > target + slack:
                    continue
                if best is not None and q + 2.0 + slack < best[0]:
                    return best, fewest
            try:
                start, count = nice_step_count(lo, hi, step)
            except LayoutError:  # edges finer than the doubles near lo or hi: wider ones next
                continue
            if not math.isfinite(start + count * step):  # an edge past the largest double
                continue
            if count <= target and (best is None or count > best[0]):
                best = (count, step, start)
            if fewest is None or count < fewest[0]:
                fewest = (count, step, start)
    return best, fewest


def rule_width(rule: str, n: int, ptp: float, std_pop: float | None, iqr: float | None) -> float:
    """numpy's ``_hist_bin_<rule>(x)`` for n values of peak-to-peak ``ptp`` (x trimmed to the
    range), population standard deviation ``std_pop`` and interquartile range ``iqr``."""
    if rule == "sturges":
        return ptp / (math.log2(n) + 1.0)
    if rule == "sqrt":
        return ptp / math.sqrt(n)
    if rule == "scott":
        return (24.0 * math.pi ** 0.5 / n) ** (1.0 / 3.0) * (std_pop or 0.0)
    if rule == "fd":
        return 2.0 * (iqr or 0.0) * n ** (-1.0 / 3.0)
    raise ValueError(rule)  # pragma: no cover - the model only admits the four rules


def rule_bin_count(rule: str, n: int, lo: float, hi: float, ptp: float,
                   std_pop: float | None = None, iqr: float | None = None,
                   integer: bool = False) -> int:
    """numpy ``_get_bin_edges`` for a string ``bins``: the rule's width from the n values
    inside [lo, hi] (peak-to-peak ``ptp``), then ``ceil((hi - lo) / width)``; 1 bin when there
    are no values or the width is 0; integer data get a width of at least 1."""
    if n <= 0:
        return 1
    width = rule_width(rule, n, ptp, std_pop, iqr)
    if not width:  # numpy: `if width:` (0 -> one bin; NaN is truthy and fails below)
        return 1
    if integer and width < 1:
        width = 1.0
    k = math.ceil((hi - lo) / width)
    return max(1, int(k))


def rule_bins(rule: str, n: int, lo: float, hi: float, ptp: float | None = None,
              std_pop: float | None = None, iqr: float | None = None,
              integer: bool = False) -> NumericBins:
    """``numpy.histogram_bin_edges(a, bins=rule, range=(lo, hi))``: [lo, hi] are the limits
    (or the data's min/max), ``ptp`` the peak-to-peak of the values inside them (default
    hi - lo). numpy widens a zero range to [lo - 0.5, hi + 0.5]."""
    if ptp is None:
        ptp = hi - lo
    if hi == lo:
        lo, hi = lo - 0.5, hi + 0.5
    k = rule_bin_count(rule, n, lo, hi, ptp, std_pop, iqr, integer)
    return NumericBins(lo, (hi - lo) / k, k, rule)


def width_bins(width: float, origin: float, lo: float, hi: float) -> NumericBins:
    """Fixed width and origin: the bins of the origin's grid covering [lo, hi] (the limits or
    the data's min/max); a value equal to the last stop belongs to the last bin."""
    q_lo, q_hi = (lo - origin) / width, (hi - origin) / width
    if not (math.isfinite(q_lo) and math.isfinite(q_hi)):
        raise LayoutError(f"width {width:g} from origin {origin:g} cannot place the values "
                          f"[{lo:g}, {hi:g}] (the bin numbers overflow)")
    first = math.floor(q_lo)
    last = math.ceil(q_hi)
    start = origin + first * width
    return NumericBins(_snap(start, width), width, max(1, last - first), "width")


# --- calendar steps ---------------------------------------------------------------------

@dataclass(frozen=True)
class TimeStep:
    """A calendar step: a fixed number of seconds (sub-day) or a calendar unit."""

    iso: str  # ISO 8601 duration
    seconds: int  # nominal length, used to choose the step
    unit: str | None = None  # 'day' | 'week' | 'month' | 'quarter' | 'year' for calendar steps

    @property
    def is_fixed(self) -> bool:
        return self.unit is None


TIME_STEPS: tuple[TimeStep, ...] = (
    TimeStep("PT1S", 1), TimeStep("PT5S", 5), TimeStep("PT15S", 15), TimeStep("PT30S", 30),
    TimeStep("PT1M", 60), TimeStep("PT5M", 300), TimeStep("PT15M", 900),
    TimeStep("PT30M", 1800), TimeStep("PT1H", 3600), TimeStep("PT3H", 10800),
    TimeStep("PT6H", 21600), TimeStep("PT12H", 43200),
    TimeStep("P1D", 86400, "day"), TimeStep("P1W", 7 * 86400, "week"),
    TimeStep("P1M", 2629746, "month"), TimeStep("P3M", 7889238, "quarter"),
    TimeStep("P1Y", 31556952, "year"),
)


def time_step(span_seconds: float, target: int) -> TimeStep:
    """The smallest calendar step that gives at most ``target`` bins over the span."""
    for step in TIME_STEPS:
        if span_seconds / step.seconds <= target:
            return step
    return TIME_STEPS[-1]
