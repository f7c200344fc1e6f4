"""The cost of a width/origin bin whose value range is unknown, in DuckDB.

    python bench/floor.py        (BENCH_ROWS rows, data from bench/run.py; FLOOR_RUNS=7)

Without known extents the planner cannot prove that the plain ``floor((v - origin) /
width)`` lands every value in the bin numpy.histogram would, so it emits a guarded floor
(the index corrected by one where an edge recomputed as origin + k * width disagrees).
Four statements, timed interleaved on the bench's own read-only connection, medians of
FLOOR_RUNS rounds:

  service      the main statement the service emits (``POST /v1/sql``) for
               ``{x: distance_km, bin: {width: 2.5, origin: 0}}, y: count``
  service_plain  the same statement with only the bin expression replaced by the plain
               ``FLOOR((v - origin) / width)`` (sqlglot tree surgery)
  hand_guarded the hand-written grouped count, bin expression = the service's guarded one
  hand_plain   the hand-written grouped count with ``floor((v - origin) / width)``

service vs service_plain is the guard's cost in place; hand_guarded vs hand_plain is the
same without the rest of the statement. ``equal`` says whether the four answers agree on
this data (bin index and count per bin). (The planner now proves the plain floor exact for
width 2.5 over this data, so ``service`` may hold no guard; then only service vs hand.)

Candidates (``candidates``, same interleaved rounds): formulations of the exact index for a
width the plain floor cannot be proved for (CANDIDATE_WIDTH = 0.1, a non-dyadic width;
layout over the data's min/max), each inside the finiteness CASE the planner writes for a
DOUBLE column, as hand-written grouped counts:

  cand_plain        FLOOR((v - o) / w)                          (not exact: the reference cost)
  cand_index_clamp  guard, clamped on the guarded index         (the planner before)
  cand_value_clamp  guard, clamped on v against the first/last edge (the planner now)
  cand_bool_clamp   the guard as CAST(comparison AS INTEGER) sums, clamped on v
  cand_checked      the plain floor clamped on v, with each group's min / max value (the
                    checked plain floor, planner/emit_checked.py: the service re-runs the
                    guarded form only when a group holds a value outside its bin)

``cand_equal`` says whether each answer equals cand_index_clamp's (the exact reference).
"""

from __future__ import annotations

import os
import statistics
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import runner  # noqa: E402

RUNS = int(os.environ.get("FLOOR_RUNS", "7"))
WIDTH, ORIGIN, COLUMN = 2.5, 0.0, "distance_km"
REQUEST = {"source": "deliveries",
           "channels": {"x": {"column": COLUMN, "bin": {"width": WIDTH, "origin": ORIGIN}},
                        "y": {"agg": "count"}}}


def service_sql(plan_config: Path | str) -> str:
    """The main statement the service plans for REQUEST (``POST /v1/sql``, in process)."""
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    with TestClient(create_app(load_settings(plan_config))) as c:
        r = c.post("/v1/sql", json=REQUEST)
        r.raise_for_status()
        return r.json()["sql"][-1]


def variants(sql: str) -> dict[str, str]:
    import sqlglot
    from sqlglot import exp

    tree = sqlglot.parse_one(sql, read="duckdb")
    guarded = None
    for alias in tree.find_all(exp.Alias):  # the key: a FLOOR corrected by a CASE (the
        # guard repeats the FLOOR; the finiteness CASE around a plain FLOOR is no guard)
        if len(list(alias.this.find_all(exp.Floor))) > 1 and alias.this.find(exp.Case) is not None:
            guarded = alias
            break
    hand = ("SELECT {k} AS k, count(*) AS n FROM deliveries AS s GROUP BY 1 ORDER BY 1 NULLS LAST")
    out = {"service": sql,
           "hand_plain": hand.format(k=f"floor((s.{COLUMN} - {ORIGIN!r}) / {WIDTH!r})")}
    if guarded is not None:  # (after a planner that needs no guard: service vs hand only)
        guard_sql = guarded.this.sql("duckdb")
        guarded.set("this", guarded.this.find(exp.Floor).copy())  # FLOOR((v - origin) / width)
        out["service_plain"] = tree.sql("duckdb")
        out["hand_guarded"] = hand.format(k=guard_sql)
    return out


CANDIDATE_WIDTH = 0.1


def candidates(con: Any) -> dict[str, str]:
    """The candidate statements (module docstring) over the data's own min/max layout."""
    import math

    lo, hi = con.sql(f"SELECT min({COLUMN}), max({COLUMN}) FROM deliveries").fetchall()[0]
    w, o = CANDIDATE_WIDTH, ORIGIN
    first = math.floor((lo - o) / w)
    start = o + first * w
    count = max(1, math.ceil((hi - o) / w) - first)
    v = f"CAST(s.{COLUMN} AS DOUBLE)"
    S, W = f"CAST({start!r} AS DOUBLE)", f"CAST({w!r} AS DOUBLE)"
    i0 = f"FLOOR(({v} - {S}) / {W})"
    case_guard = (f"{i0} + (CASE WHEN {v} >= {S} + ({i0} + 1) * {W} THEN 1 "
                  f"WHEN {v} < {S} + ({i0}) * {W} THEN -1 ELSE 0 END)")
    bool_guard = (f"{i0} + CAST({v} >= {S} + ({i0} + 1) * {W} AS INTEGER) "
                  f"- CAST({v} < {S} + {i0} * {W} AS INTEGER)")
    top = count - 1
    stop = repr(start + float(count) * w)

    def index_clamp(g: str) -> str:
        return f"CASE WHEN {g} > {top} THEN {top} WHEN {g} < 0 THEN 0 ELSE {g} END"

    def value_clamp(g: str) -> str:
        return (f"CASE WHEN {v} >= CAST({stop} AS DOUBLE) THEN {top} WHEN {v} < {S} THEN 0 "
                f"ELSE {g} END")

    def finite(e: str) -> str:
        return f"CASE WHEN ISFINITE({v}) THEN {e} END"

    hand = "SELECT {k} AS k, count(*) AS n FROM deliveries AS s GROUP BY 1 ORDER BY 1 NULLS LAST"
    keys = {"cand_plain": finite(i0), "cand_index_clamp": finite(index_clamp(case_guard)),
            "cand_value_clamp": finite(value_clamp(case_guard)),
            "cand_bool_clamp": finite(value_clamp(bool_guard))}
    out = {name: hand.format(k=k) for name, k in keys.items()}
    out["cand_checked"] = (f"SELECT {finite(value_clamp(i0))} AS k, count(*) AS n, min({v}) AS vmin, "
                           f"max({v}) AS vmax FROM deliveries AS s GROUP BY 1 ORDER BY 1 NULLS LAST")
    return out


def measure(con: Any, qs: dict[str, str], runs: int = RUNS) -> dict[str, Any]:
    times: dict[str, list[float]] = {k: [] for k in qs}
    answers: dict[str, Any] = {}
    order = list(qs)
    for rnd in range(runs):
        for name in (order if rnd % 2 == 0 else order[::-1]):
            ms, tbl = runner.timed(lambda: con.sql(qs[name]).to_arrow_table())
            times[name].append(ms)
            answers[name] = tbl
        sys.stderr.write(f"\rfloor: round {rnd + 1}/{runs}")
    sys.stderr.write("\n")

    def counts(name: str) -> list[tuple]:
        t = answers[name]
        if name.startswith(("hand", "cand")):
            return [(r["k"], r["n"]) for r in t.select(["k", "n"]).to_pylist()]
        return [(r["x_lo"], r["count"]) for r in t.to_pylist()]

    hand = ([((None if k is None else ORIGIN + k * WIDTH), n) for k, n in counts("hand_plain")]
            if "hand_plain" in qs else None)
    equal = {name: (counts(name) if not name.startswith("hand") else
                    [((None if k is None else ORIGIN + k * WIDTH), n) for k, n in counts(name)]) == hand
             for name in qs if not name.startswith("cand")}
    cand_equal = {name: counts(name) == counts("cand_index_clamp") for name in qs
                  if name.startswith("cand") and "cand_index_clamp" in qs}
    med = {k: round(statistics.median(v), 2) for k, v in times.items()}
    guarded = "hand_guarded" in med
    plain = "hand_plain" in med
    cands = {k: v for k, v in med.items() if k.startswith("cand")}
    return {"runs": runs, "median_ms": med, "equal_to_hand_plain": equal, "guarded": guarded,
            "cand_equal": cand_equal,
            "cand_over_plain": {k: round(v / cands["cand_plain"], 3) for k, v in cands.items()}
            if cands else None,
            "guard_cost_in_statement": round(med["service"] / med["service_plain"], 3) if guarded else None,
            "guard_cost_alone": round(med["hand_guarded"] / med["hand_plain"], 3) if guarded else None,
            "service_over_hand_plain": round(med["service"] / med["hand_plain"], 3) if plain else None,
            "samples_ms": {k: [round(x, 2) for x in v] for k, v in times.items()}}


def main() -> None:
    import json

    import run as bench

    db, _walk = bench.build_data()
    qs = variants(service_sql(bench.plan_data()))
    con = runner.reference_connection(db)
    qs.update(candidates(con))
    res = measure(con, qs)
    res["rows"] = bench.ROWS
    res["sql"] = qs
    print(json.dumps({k: v for k, v in res.items() if k != "sql"}, indent=2))
    (HERE / "floor.json").write_text(json.dumps(res, indent=2))


if __name__ == "__main__":
    main()
