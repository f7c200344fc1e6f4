"""Bin layouts: nice widths, bin-count rules and calendar steps.

* Nice numbers: P. S. Heckbert, "Nice Numbers for Graph Labels", Graphics Gems (1990),
  the ``nicenum`` routine and its "loose labelling" use.
* Bin-count rules as ``numpy.histogram_bin_edges`` implements them:
  H. A. Sturges (1926), D. W. Scott (1979), D. Freedman & P. Diaconis (1981), and the
  square-root choice. Edges are ``linspace(min, max, k + 1)`` exactly as numpy builds them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


def nicenum(x: float, round_: bool) -> float:
    """Heckbert's nicenum: a number of the form {1, 2, 5} x 10^k close to ``x``.

    With ``round_`` the nearest such number, otherwise the smallest one >= x.
    """
    if x <= 0 or not math.isfinite(x):
        raise ValueError("nicenum needs a positive finite number")
    expv = math.floor(math.log10(x))
    f = x / 10.0 ** expv
    if round_:
        nf = 1.0 if f < 1.5 else 2.0 if f < 3.0 else 5.0 if f < 7.0 else 10.0
    else:
        nf = 1.0 if f <= 1.0 else 2.0 if f <= 2.0 else 5.0 if f <= 5.0 else 10.0
    return nf * 10.0 ** expv


@dataclass(frozen=True)
class NumericBins:
    """Equal-width bins [start + i*width, start + (i+1)*width), last bin closed."""

    start: float
    width: float
    count: int | None  # None: open-ended (width + origin without limits)
    method: str

    @property
    def stop(self) -> float | None:
        if self.count is None:
            return None
        return self.start + self.count * self.width


def _snap(v: float, step: float) -> float:
    """Remove floating noise from a multiple of a nice step (0.30000000000000004 -> 0.3)."""
    if step <= 0:
        return v
    digits = max(0, -math.floor(math.log10(step)) + 2)
    return round(v, digits)


def nice_bins(lo: float, hi: float, target: int) -> NumericBins:
    """Loose nice bins covering [lo, hi] with about ``target`` bins (Heckbert 1990)."""
    if hi < lo:
        lo, hi = hi, lo
    if hi == lo:
        # A single value: one unit-ish bin around it (Heckbert's method needs a range).
        width = nicenum(abs(lo), True) / 10.0 if lo != 0 else 1.0
        start = _snap(math.floor(lo / width) * width, width)
        return NumericBins(start, width, 1, "nice")
    span = nicenum(hi - lo, False)
    width = nicenum(span / max(target, 1), True)
    start = _snap(math.floor(lo / width) * width, width)
    stop = _snap(math.ceil(hi / width) * width, width)
    count = max(1, int(round((stop - start) / width)))
    return NumericBins(start, width, count, "nice")


def rule_bin_count(rule: str, n: int, lo: float, hi: float,
                   std_pop: float | None = None, iqr: float | None = None) -> int:
    """Number of equal bins on [lo, hi] the way numpy.histogram_bin_edges picks it."""
    ptp = hi - lo
    if n <= 0 or ptp == 0:
        return 1
    if rule == "sturges":
        width = ptp / (math.log2(n) + 1.0)
    elif rule == "sqrt":
        width = ptp / math.sqrt(n)
    elif rule == "scott":
        width = (24.0 * math.pi ** 0.5 / n) ** (1.0 / 3.0) * (std_pop or 0.0)
    elif rule == "fd":
        width = 2.0 * (iqr or 0.0) * n ** (-1.0 / 3.0)
    else:  # pragma: no cover - the model only admits the four rules
        raise ValueError(rule)
    if width <= 0:
        return 1
    return int(math.ceil(ptp / width))


def rule_bins(rule: str, n: int, lo: float, hi: float,
              std_pop: float | None = None, iqr: float | None = None) -> NumericBins:
    k = rule_bin_count(rule, n, lo, hi, std_pop, iqr)
    if hi == lo:
        # numpy widens a zero range to [lo - 0.5, hi + 0.5]
        return NumericBins(lo - 0.5, 1.0 / k, k, rule)
    return NumericBins(lo, (hi - lo) / k, k, rule)


def width_bins(width: float, origin: float, lo: float | None, hi: float | None) -> NumericBins:
    """Fixed width and origin; with limits the bins cover [lo, hi] on the origin's grid."""
    if lo is None or hi is None:
        return NumericBins(origin, width, None, "width")
    first = math.floor((lo - origin) / width)
    last = math.ceil((hi - origin) / width)
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
