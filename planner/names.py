"""The planner's internal column and CTE names: the one owner of every ``_sluice_...`` name.

Output names of a chart are the user's (``planner.bind._assign_names`` keeps them apart from
these); every name the planner invents for itself starts with ``INTERNAL`` and is built by
one function here, so the stages (bind, layout, emit, shape in ``app/service.py``) and M4 can
never disagree about a spelling:

==========================  ==============================  ==================================
function                    name                            meaning
==========================  ==============================  ==================================
``key(i)``                  ``_sluice_k<i>``                key i's grouping value
``outside_flag(i)``         ``_sluice_o<i>``                1 when the row is outside key i's limits
``outside_count(i)``        ``_sluice_out<i>``              rows outside key i's limits (total)
``measure(i)``              ``_sluice_a<i>``                measure i's aggregate per group
``measure_input(i)``        ``_sluice_m<i>``                measure i's per-row input
``measure_window(i)``       ``_sluice_a<i>_w``              measure i's ``then`` value per group
``measure_part(i, j)``      ``_sluice_m<i>_p<j>``           composite measure i's input j
``extents(i, stat)``        ``_sluice_e<i>_<stat>``         extents statistic (min, max, n, sd, q1, q3, w)
``matched()``               ``_sluice_matched``             matched rows (window total)
``groups()``                ``_sluice_groups``              groups before LIMIT (window total)
``rows()``                  ``_sluice_n``                   rows per group
``m4(part)``                ``_sluice_m4_<part>``           M4's extents (min, max, n) and CTEs
``measure_partial(i, p)``   ``_sluice_a<i>_<p>``            measure i's fold partial (sum, cnt)
``cte(stage)``              ``_sluice_<stage>``             a CTE of the main statement (``CTES``)
``top_rank(i)``             ``_sluice_rank<i>``             top key i's ranking CTE (v, rank r)
``bin_series(i)``           ``_sluice_bins<i>``             binned key i's every bin (dense CTE)
``score_window()``          ``_sluice_w``                   window-column prefix of a top score
``facet_rank()``            ``_sluice_frank``               a group's rank in its facet
``has_data()``              ``_sluice_has``                 1 on data rows, 0 on dense grid rows
``series_index()``          ``_sluice_i``                   the integer series' column
``series()``                ``_sluice_n``                   the integer series' table alias
``profile(part)``           ``_sluice_<part>``              a column profile's output / CTE
                                                            (``PROFILE_PARTS``)
``dim_alias(i)``            ``_sluice_d<i>``                the i-th joined dimension table
``expr_column(text)``       ``_sluice_x<digest>``           a request's ``expr`` as a column
                                                            (its text stays its output name)
``sets_column(j)``          ``_sluice_g<j>``                grouping-sets statement: column j of
                                                            the shared rows / groups
``set_id()``                ``_sluice_set``                 the GROUPING() bits of a group
``sets(j)``                 ``_sluice_sets<j>``             grouping j of a grouping-sets statement
``chart()``                 ``_sluice_chart``               which chart a row of a shared
                                                            statement answers
``chart_cte(i, stage)``     ``_sluice_c<i>_<stage>``        chart i's CTE in a shared statement
``chart_column(i, j)``      ``_sluice_c<i>_<j>``            chart i's column j (extents: its name)
==========================  ==============================  ==================================

Window columns of a built aggregate are named after their input's name plus ``_r``, ``_c``,
``_mu`` (``planner.emit_measures``): ``_sluice_m<i>_r``, ``_sluice_e<i>_w_c``, ... No other
planner or app module spells the prefix (tests/test_planner_layers.py checks it); a new
internal name gets its function here. Column profiles (``planner/profile.py``, one
statement per column, never in the same statement as a chart's names) take theirs from
``profile`` (``profile.VALUE``, ``COUNT``, ...).
"""

from __future__ import annotations

import hashlib

#: Prefix of the planner's own columns in a result; the service strips them.
INTERNAL = "_sluice_"


def key(i: int) -> str:
    return f"{INTERNAL}k{i}"


def outside_flag(i: int) -> str:
    return f"{INTERNAL}o{i}"


def outside_count(i: int) -> str:
    return f"{INTERNAL}out{i}"


def measure(i: int) -> str:
    return f"{INTERNAL}a{i}"


def measure_input(i: int) -> str:
    return f"{INTERNAL}m{i}"


def measure_part(i: int, j: int) -> str:
    """The per-row input of aggregate j of composite named measure i (planner/measure_sql.py)."""
    return f"{measure_input(i)}_p{j}"


def measure_window(i: int) -> str:
    """Measure i's measure over the grouped table (``then``: planner/emit_window.py)."""
    return f"{measure(i)}_w"


def extents(i: int, stat: str = "") -> str:
    """``extents(i)`` is the prefix of key i's statistics, ``extents(i, "min")`` one of them."""
    return f"{INTERNAL}e{i}_{stat}"


def extents_guarded() -> str:
    """A column only the guarded extents statement carries (its row proves nothing about
    the finiteness of the values: ``planner.emit_extents.finite_proved``)."""
    return f"{INTERNAL}eguarded"


def matched() -> str:
    return f"{INTERNAL}matched"


def groups() -> str:
    return f"{INTERNAL}groups"


def rows() -> str:
    return f"{INTERNAL}n"


def value(i: int) -> str:
    """Key i's DOUBLE value per source row, for the checked floor (planner.emit_keys)."""
    return f"{INTERNAL}v{i}"


def value_range(i: int, end: str) -> str:
    """``value_range(i, "min")`` / ``"max"``: key i's smallest / largest value per group."""
    return f"{INTERNAL}v{i}_{end}"


def cut_text(j: int) -> str:
    """1 where text output j (``Plan.text_outputs``) was longer than MAX_TEXT_CHARS."""
    return f"{INTERNAL}cut{j}"


def text_full(j: int) -> str:
    """Text output j whole, for ordering only (the answer carries it cut)."""
    return f"{INTERNAL}full{j}"


def misbinned() -> str:
    """1 when some group's values do not all lie in its bin (the checked floor missed)."""
    return f"{INTERNAL}misbinned"


def m4(part: str) -> str:
    return f"{INTERNAL}m4_{part}"


def measure_partial(i: int, part: str) -> str:
    """A partial the top-N fold re-aggregates: ``measure_partial(i, "sum")`` / ``"cnt"``."""
    return f"{measure(i)}_{part}"


#: the main statement's CTEs, in the order they may appear (planner.emit_main; "sets" and
#: "spine": the grouping-sets statement of a batch, planner.emit_sets)
CTES = ("base", "ranked", "pairs", "grouped", "relabelled", "folded", "counted", "kept",
        "others", "grid", "cells", "dense", "windowed", "final", "sets", "spine")


def cte(stage: str) -> str:
    """The CTE of one stage of the main statement (``stage`` in ``CTES``)."""
    assert stage in CTES, stage
    return f"{INTERNAL}{stage}"


def top_rank(i: int) -> str:
    return f"{INTERNAL}rank{i}"


def bin_series(i: int) -> str:
    return f"{INTERNAL}bins{i}"


def score_window() -> str:
    return f"{INTERNAL}w"


def facet_rank() -> str:
    return f"{INTERNAL}frank"


def has_data() -> str:
    return f"{INTERNAL}has"


def series_index() -> str:
    return f"{INTERNAL}i"


def series() -> str:
    """The integer series' table alias (the spelling of ``rows()``, another namespace)."""
    return f"{INTERNAL}n"


#: the names of a column profile's statement (planner.profile)
PROFILE_PARTS = ("value", "count", "rows", "nulls", "non_null", "distinct", "min", "max",
                 "cut", "rank", "grouped", "ranked")


def profile(part: str) -> str:
    """An output column or CTE of a column profile (``part`` in ``PROFILE_PARTS``)."""
    assert part in PROFILE_PARTS, part
    return f"{INTERNAL}{part}"


def dim_alias(i: int) -> str:
    return f"{INTERNAL}d{i}"


def expr_column(text: str) -> str:
    """The source-relation column of a request's ``{"expr": text}``: a short identifier (an
    expr's text may be longer than an engine keeps a name: MariaDB cuts at 256 characters)."""
    return f"{INTERNAL}x{hashlib.sha256(text.encode('utf-8')).hexdigest()[:16]}"


def sets_column(j: int) -> str:
    """Column j of a grouping-sets statement's shared rows and groups (planner.emit_sets)."""
    return f"{INTERNAL}g{j}"


def sets(j: int) -> str:
    """Grouping j of a grouping-sets statement (planner.emit_sets)."""
    return f"{cte('sets')}{j}"


def set_id() -> str:
    return f"{INTERNAL}set"


def chart() -> str:
    return f"{INTERNAL}chart"


def chart_cte(i: int, stage: str) -> str:
    """Chart i's CTE of one stage in a shared statement (``stage`` in ``CTES``, or "out")."""
    assert stage in CTES or stage in ("out", "cut"), stage
    return f"{INTERNAL}c{i}_{stage}"


def chart_column(i: int, j: int | str) -> str:
    """Chart i's output column j (or, for its extents, its own name) in a shared statement."""
    return f"{INTERNAL}c{i}_{j}"
