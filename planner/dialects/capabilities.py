"""What a target can do, as one typed record per dialect (``Dialect.caps``).

Every fact the planner asks of a target -- which features it refuses, how it builds exact
quantiles and deviations, how it binds parameters, how long its identifiers may be, how it
orders NULLs -- is a field here. A dialect declares its record once
(``caps = Capabilities(...)``, or ``dataclasses.replace(Parent.caps, ...)`` in a subclass);
the planner reads ``d.caps.<field>`` and never a dialect's name.

Each field's metadata says where the README capability table shows it (``row``: a key of
``TABLE_ROWS``, the cell written by ``Dialect.how``) or why it is ``internal`` (a choice of
plan shape with the same answer, not something a caller can observe); tests/test_dialects.py
checks that every field has one of the two.
"""

from __future__ import annotations

from dataclasses import dataclass, field


def _row(key: str) -> dict[str, str]:
    return {"row": key}


def _internal(why: str) -> dict[str, str]:
    return {"internal": why}


@dataclass(frozen=True)
class Capabilities:
    """The capability record of one target (defaults: the ANSI-ish base)."""

    checked: str = field(default="live", metadata=_row("engine"))
    """How the target's engine is checked: "live" (a real engine in the test suite) or
    "golden" (generated SQL compared with reviewed files and parsed back by sqlglot)."""

    unsupported: frozenset[str] = field(default=frozenset(), metadata=_row("features"))
    """Features (keys of ``FEATURES``) the target cannot express faithfully: a request that
    needs one is refused with a 422 ``not supported on <dialect>: <feature>``. Shown in the
    rows of those features."""

    quantile_method: str = field(default="native", metadata=_row("quantile"))
    """Exact quantiles (median, quantile, the Freedman-Diaconis rule): "native" -- the
    target's own type 7 percentile aggregate (``Dialect.quantile``) -- or "window":
    Hyndman & Fan (1996) type 7 built by the planner from ROW_NUMBER() and COUNT() windows
    per group, interpolating between the order statistics floor(h) and floor(h) + 1,
    h = (n - 1) q (planner/emit_measures.py, ``_window_columns``)."""

    stddev_method: str = field(default="native", metadata=_row("stddev"))
    """Standard deviation / variance: "native" aggregates or "two_pass": the group mean
    first (a window AVG), then the corrected sum of squared deviations (Chan, Golub &
    LeVeque 1983), for targets without them."""

    approx_distinct: tuple[str, float | None] = field(default=("hyperloglog", None),
                                                      metadata=_row("approx_count_distinct"))
    """Approximate count distinct: (method, relative standard error) reported in the
    response; a method starting with "exact" means the target answers exactly."""

    boolean_min_max: bool = field(default=True, metadata=_internal(
        "MIN / MAX of a boolean column, or of its 1 / 0 indicator: the same answer"))
    """False when the target has no MIN / MAX of a boolean (PostgreSQL: no min(boolean);
    SQL Server: not for bit): min / max of a boolean column then aggregate its 1 / 0 / NULL
    indicator (planner/emit_measures.py ``_measure_input``) and the answer reads it back as
    a boolean."""

    nulls_order_native: bool = field(default=True, metadata=_row("nulls_order"))
    """True when ``ORDER BY x NULLS FIRST/LAST`` is accepted as written; False: emulated
    with a CASE term first (``Dialect.order``)."""

    param_form: tuple[str, str] | None = field(default=None, metadata=_row("params"))
    """Values as bound parameters (planner/compile.py ``bind_sql``): (form of long IN
    lists, driver paramstyle), or None for literals only. Forms: "list" (one array
    parameter under UNNEST), "json" (one JSON array under json_each), "each" (one
    placeholder per value)."""

    max_identifier_bytes: int | None = field(default=None, metadata=_row("identifiers"))
    """Identifier cap in bytes where the engine silently CUTS longer names (the answer would
    then lack the column): longer output names are refused (422); None: no cap that
    matters."""

    identifiers_bmp_only: bool = field(default=False, metadata=_row("identifiers"))
    """Identifiers hold only the Basic Multilingual Plane (MariaDB/MySQL keep names in
    utf8mb3): output names with a character beyond U+FFFF are refused (422)."""

    arg_min_max: bool = field(default=False, metadata=_row("m4"))
    """arg_min / arg_max (min_by / max_by) render and are checked here: the M4 reduction
    (planner/m4.py) is offered; otherwise ``reduce: m4`` is refused (422)."""

    grouping_sets: bool = field(default=False, metadata=_row("grouping_sets"))
    """``GROUP BY GROUPING SETS (...)`` with ``GROUPING(e)`` (Gray et al., "Data Cube: A
    Relational Aggregation Operator Generalizing Group-By, Cross-Tab, and Sub-Totals", 1997):
    the charts of one ``/v1/batch`` whose composed filters are equal can be grouped in one
    scan (planner/emit_sets.py), when ``shared_cte`` also says the engine computes the grouped
    sets once. False: one statement per chart."""

    shared_cte: str | None = field(default=None, metadata=_internal(
        "one statement for a batch or one per chart; the answers are the same (it also "
        "words the grouping_sets cell)"))
    """How a CTE that several parts of one statement read is computed once: "materialized"
    (written ``AS MATERIALIZED``), "engine" (the engine shares it by itself), or None (the
    engine may inline it per reference, so one statement of N charts could scan N times:
    the batch then runs one statement per chart even with ``grouping_sets``)."""

    wide_instants: bool = field(default=False, metadata=_internal(
        "only adds a range test to time keys; the answer is the same"))
    """The engine's timestamps can lie outside years 1..9999 (year 12000, 'infinity'), which
    neither Python nor RFC 3339 can write: time keys treat them as NULL
    (``Dialect.instant_range``)."""

    whole_integer_cells: bool = field(default=True, metadata=_internal(
        "chooses the cheaper exact bin index; the answer is the same"))
    """Every value of an integer-kind column is a whole number (bins then check their plain
    floor index at whole numbers only: planner/emit_keys.py ``_integer_floor_is_exact``).
    False on SQLite, where an INTEGER column keeps 2.5 as a REAL cell."""

    float64_reals: bool = field(default=False, metadata=_internal(
        "chooses literal or bound parameter; the comparison is the same"))
    """Every column of kind double holds 64-bit doubles whatever its declared type (SQLite
    stores every REAL as an 8-byte double), so a float compared with it may be bound as a
    parameter (planner/values.py ``_float64``)."""

    distinct_pairs: bool = field(default=False, metadata=_internal(
        "a faster plan shape for COUNT(DISTINCT); the answer is the same"))
    """COUNT(DISTINCT m) beside the row count COUNT(*) is faster as a grouping of the
    distinct (keys, m) pairs first (planner/emit_main.py ``_distinct_pairs``)."""

    materialize_order_statistics: bool = field(default=False, metadata=_internal(
        "a faster plan shape for quantiles; the answer is the same"))
    """The grouped CTE of a main statement that computes an order statistic (the
    registry's ``order_statistic``: quantile, median) is written ``AS MATERIALIZED``: the windows
    over the groups above it (matched rows, group count) otherwise slow the aggregate's
    finalize down (planner/emit_main.py ``_main_statement``)."""

    quantile_interpolates_integers: bool = field(default=False, metadata=_internal(
        "leaves out a CAST the engine does itself; the answer is the same"))
    """The native quantile of an integer column returns the DOUBLE type 7 interpolation
    itself, so the planner may leave out the CAST (planner/emit_main.py ``_grouped``)."""

    window_extremes: str = field(default="native", metadata=_internal(
        "rewrites MIN / MAX windows into FIRST_VALUE; the answer is the same"))
    """How ``MIN(e) / MAX(e) OVER (...)`` without an ORDER BY (the windows over all groups:
    matched rows, outside-limit counts, the layout check) is computed: "native", or
    "first_value": ``FIRST_VALUE(e) OVER (... ORDER BY e, NULLs last)`` (``Dialect.render``).
    MariaDB 10.11 recomputes a MIN / MAX window per row over the whole frame: over 20,000
    groups one took 11.7 s, FIRST_VALUE 0.014 s (measured on the CI machine), so a chart of
    a few ten thousand groups or dense bins ran into its statement timeout."""

    nonfinite_decimals: bool = field(default=False, metadata=_internal(
        "guards decimal bins against NaN / infinity as double ones are"))
    """A decimal column may hold NaN and +-Infinity (PostgreSQL numeric: NaN always,
    Infinity since 14), which bins treat as a double's: the NULL bin (``Dialect.nonfinite``)."""

    extremes_show_nonfinite: bool = field(default=False, metadata=_internal(
        "reads the extents without the finiteness guard and checks them after; the answer "
        "is the same"))
    """MIN / MAX of a double column return a non-finite value (inf, -inf, NaN) whenever the
    rows hold one (NaN ordered above +inf, or no NaN at all), so an extents row whose every
    min and max is finite or NULL equals the guarded one: the extents statement reads the
    plain values (~0.6x the guarded statement, 10M rows, DuckDB) and the service runs the
    guarded one only when a min or max comes back non-finite (planner/emit_extents.py
    ``extents_checks``)."""


__all__ = ["Capabilities"]
