"""Write the golden SQL files for the generated-only dialects.

    .venv/bin/python tests/regen_golden.py          # rewrite tests/golden/<dialect>/<case>.sql

Each case is planned against a fixed schema with a fixed extents row (no engine involved),
so the files change only when the planner or a dialect changes: review the diff like code.
A case the dialect refuses is written as ``<case>.refused`` holding the 422 message.
tests/test_dialects_golden.py compares these files and parses each with
``sqlglot.parse_one(sql, read=<dialect>)``.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from planner.compile import finish, prepare  # noqa: E402
from planner.dialects import get_dialect  # noqa: E402
from planner.errors import Unsupported  # noqa: E402
from planner.model import ChartRequest  # noqa: E402
from planner.schema import ColumnInfo, SourceSchema  # noqa: E402

GOLDEN = Path(__file__).resolve().parent / "golden"
GENERATED_ONLY = ("bigquery", "snowflake", "trino", "redshift", "databricks", "tsql")

SCHEMA = SourceSchema("sales", ("analytics", "sales"), {c.name: c for c in [
    ColumnInfo("id", "integer", "BIGINT"), ColumnInfo("cat", "string", "VARCHAR"),
    ColumnInfo("grp", "string", "VARCHAR"), ColumnInfo("n", "integer", "INTEGER"),
    ColumnInfo("x", "double", "DOUBLE"), ColumnInfo("amount", "decimal", "DECIMAL(12,2)"),
    ColumnInfo("flag", "boolean", "BOOLEAN"), ColumnInfo("ts", "timestamptz", "TIMESTAMPTZ"),
    ColumnInfo("tsn", "timestamp", "TIMESTAMP"),
]})

#: (request body, extents row the source would have answered)
CASES: dict[str, tuple[dict, dict]] = {
    "histogram": ({"channels": {"x": {"column": "x", "bin": {"bins": 20}}, "y": {"agg": "count"}},
                   "empty_bins": "zero"},
                  {"_sluice_e0_min": -61.5, "_sluice_e0_max": 78.25}),
    "time_bins_tz": ({"channels": {"x": {"column": "ts", "bin": {"bins": 12}, "tz": "Europe/Berlin"},
                                   "y": {"agg": "sum", "column": "amount"}}},
                     {"_sluice_e0_min": 1767225600.0, "_sluice_e0_max": 1798675200.0}),
    "trunc_extract_tz": ({"channels": {"x": {"column": "tsn", "trunc": "week", "tz": "America/New_York"},
                                       "color": {"column": "ts", "extract": "isodow", "tz": "America/New_York"},
                                       "by": [{"column": "ts", "extract": "isoyear"}],
                                       "y": {"agg": "count"}}}, {}),
    "quantile": ({"channels": {"x": {"column": "grp"}, "y": {"agg": "quantile", "column": "x", "q": 0.9},
                               "size": {"agg": "median", "column": "amount"}}}, {}),
    "top_other": ({"channels": {"x": {"column": "cat", "top": 5, "other_label": "(other)"},
                                "y": {"agg": "sum", "column": "x"}}}, {}),
    # top by a measure that cannot be folded after grouping: ranked from one grouped pass,
    # membership by IN (SELECT ...); the median is built from windows where there is no
    # percentile aggregate
    "top_median": ({"channels": {"x": {"column": "cat", "top": 5}, "color": {"column": "grp"},
                                 "y": {"agg": "median", "column": "x"}}}, {}),
    # filter_sql semantics (planner/filter_sql.py): round ties away from zero, LIKE with the
    # planner's own escaping, ILIKE folding ASCII letters only, NOT LIKE
    "filter_sql_semantics": ({"channels": {"x": {"column": "grp"}, "y": {"agg": "count"}},
                              "filter_sql": "round(x, 1) = 1.5 AND cat LIKE 'a!%[b]*_' ESCAPE '!' "
                                            "AND cat NOT ILIKE 'Z\\ü%'"}, {}),
    # avg folds from its sum / count partials
    "top_avg": ({"channels": {"x": {"column": "cat", "top": 5}, "y": {"agg": "avg", "column": "n"}}}, {}),
    # share (planner/aggregates.py): the mean of a 1 / 0 / NULL indicator of a boolean column
    # or of a filter_sql-style condition; with top it folds from sum / count partials
    "share": ({"channels": {"x": {"column": "cat", "top": 4},
                            "y": {"agg": "share", "column": "flag"},
                            "size": {"agg": "share", "condition": "x > 10 AND grp <> 'north'"}}},
              {}),
    "stack": ({"channels": {"x": {"column": "ts", "trunc": "month"}, "color": {"column": "cat"},
                            "y": {"agg": "count"}},
               "stack": "fraction", "facet": {"row": {"column": "grp"}, "max_groups": 50},
               "sort": [{"channel": "y", "desc": True}]}, {}),
    "window_measures": ({"channels": {"x": {"column": "ts", "trunc": "month"},
                                      "color": {"column": "grp"},
                                      "y": {"agg": "sum", "column": "amount", "then": "cumulative"},
                                      "size": {"agg": "count", "then": "change"},
                                      "opacity": {"agg": "count", "then": "fraction",
                                                  "within": "axis"}},
                         "sort": [{"channel": "y", "desc": True}]}, {}),
    "where_all_operators": ({"channels": {"x": {"column": "grp"}, "y": {"agg": "avg", "column": "n"},
                                          "size": {"agg": "approx_count_distinct", "column": "cat"},
                                          "opacity": {"agg": "stddev_samp", "column": "x"}},
                             "where": [
                                 {"column": "n", "eq": 3, "ne": 4, "lt": 10, "lte": 9, "gt": -5, "gte": -4},
                                 {"column": "cat", "in": ["alpha", "Zürich"], "not_in": ["beta"],
                                  "contains": "lp", "starts_with": "al"},
                                 {"column": "flag", "eq": True},
                                 {"column": "amount", "is_null": False},
                                 {"any": [{"column": "ts", "gte": "2026-01-01T00:00:00Z",
                                           "lt": "2026-04-01T00:00:00Z"},
                                          {"not": {"column": "x", "is_null": True}}]},
                                 {"column": "grp", "in": []}],
                             "sort": [{"channel": "size", "desc": True}], "limit": 50}, {}),
}


def render(dialect_name: str, case: str) -> tuple[str, str]:
    """(file suffix, content): ``sql`` with the statements, or ``refused`` with the 422."""
    body, extents = CASES[case]
    dialect = get_dialect(dialect_name)
    try:
        plan = prepare(ChartRequest.model_validate({"source": "sales", **body}), SCHEMA, dialect)
    except Unsupported as e:
        return "refused", e.detail + "\n"
    plan = finish(plan, extents)
    return "sql", plan.main_sql + ";\n"


def main() -> int:
    for name in GENERATED_ONLY:
        folder = GOLDEN / name
        folder.mkdir(parents=True, exist_ok=True)
        for old in folder.iterdir():
            old.unlink()
        for case in CASES:
            suffix, text = render(name, case)
            (folder / f"{case}.{suffix}").write_text(text, encoding="utf-8")
    print(f"wrote {len(GENERATED_ONLY) * len(CASES)} golden files under {GOLDEN}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
