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
``extents(i, stat)``        ``_sluice_e<i>_<stat>``         extents statistic (min, max, n, sd, q1, q3, w)
``matched()``               ``_sluice_matched``             matched rows (window total)
``groups()``                ``_sluice_groups``              groups before LIMIT (window total)
``rows()``                  ``_sluice_n``                   rows per group
``m4(part)``                ``_sluice_m4_<part>``           M4's extents (min, max, n) and CTEs
==========================  ==============================  ==================================

Column profiles (``planner/profile.py``, one statement per column) name their outputs
with the same prefix (``profile.VALUE``, ``COUNT``, ...). The emit stage
(``planner/compile.py``) still writes some of its CTE names and window
prefixes as f-strings over ``INTERNAL`` (base, grouped, counted, kept, dense, final, rank,
...); they are to move here.
"""

from __future__ import annotations

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


def extents(i: int, stat: str = "") -> str:
    """``extents(i)`` is the prefix of key i's statistics, ``extents(i, "min")`` one of them."""
    return f"{INTERNAL}e{i}_{stat}"


def matched() -> str:
    return f"{INTERNAL}matched"


def groups() -> str:
    return f"{INTERNAL}groups"


def rows() -> str:
    return f"{INTERNAL}n"


def m4(part: str) -> str:
    return f"{INTERNAL}m4_{part}"
