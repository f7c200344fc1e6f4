"""Dialect registry and capability table: every target renders every construct (or refuses
it with the 422 its ``unsupported`` set promises), the README table is the generated one,
``POST /v1/sql?dialect=`` and ``sluice plan --dialect`` work for all twelve dialects and
answer an unknown dialect with 400 / exit code 4, and the optional warehouse engines say
which library to install.

Outside references: sqlglot's parser for each target (every statement parses back), the
README file, and the live engines in tests/test_engines_matrix.py (each capability cell of a
live dialect is exercised there).
"""

from __future__ import annotations

import ast
import dataclasses
import importlib.util
import json
import re
import sys
from pathlib import Path

import pytest
import sqlglot

from planner.compile import finish, prepare
from planner.dialects import ALIASES, DIALECTS, FEATURES, Dialect, capability_table_markdown, get_dialect
from planner.dialects.base import TABLE_ROWS
from planner.dialects.capabilities import Capabilities
from planner.errors import Unsupported
from planner.model import ChartRequest

ROOT = Path(__file__).resolve().parent.parent

_spec = importlib.util.spec_from_file_location("sluice_regen_golden_d",
                                               Path(__file__).with_name("regen_golden.py"))
regen = importlib.util.module_from_spec(_spec)
sys.modules["sluice_regen_golden_d"] = regen
_spec.loader.exec_module(regen)

ALL = sorted(DIALECTS)
LIVE = ["duckdb", "postgres", "mysql", "sqlite", "clickhouse", "spark"]
GENERATED = ["bigquery", "snowflake", "trino", "redshift", "databricks", "tsql"]

#: each feature a dialect may list as unsupported, with a request that needs it
FEATURE_REQUESTS = {
    "median": {"channels": {"x": {"column": "grp"}, "y": {"agg": "median", "column": "x"}}},
    "quantile": {"channels": {"x": {"column": "grp"}, "y": {"agg": "quantile", "column": "x", "q": 0.1}}},
    "stddev": {"channels": {"x": {"column": "grp"}, "y": {"agg": "var_pop", "column": "x"}}},
    "tz": {"channels": {"x": {"column": "ts", "trunc": "day", "tz": "Asia/Tokyo"}, "y": {"agg": "count"}}},
}


def test_twelve_dialects_registered():
    assert set(ALL) == set(LIVE) | set(GENERATED)
    for name, d in DIALECTS.items():
        assert d.name == name
        assert d.caps.checked == ("live" if name in LIVE else "golden")
        assert set(d.caps.unsupported) <= set(FEATURE_REQUESTS) | {"count_distinct", "approx_count_distinct",
                                                               "trunc_week", "extract", "window"}
    assert get_dialect("mariadb") is DIALECTS["mysql"]
    with pytest.raises(KeyError):
        get_dialect("oracle")


@pytest.mark.parametrize("dialect", ALL)
@pytest.mark.parametrize("case", list(regen.CASES))
def test_every_dialect_renders_every_case(dialect: str, case: str):
    suffix, text = regen.render(dialect, case)
    if suffix == "refused":
        assert text.startswith(f"not supported on {dialect}: ")
        return
    sqlglot.parse_one(text.rstrip().rstrip(";"), read=DIALECTS[dialect].sqlglot)


@pytest.mark.parametrize("dialect", ALL)
@pytest.mark.parametrize("feature", list(FEATURE_REQUESTS))
def test_refusals_follow_the_capability_table(dialect: str, feature: str):
    d = DIALECTS[dialect]
    req = ChartRequest.model_validate({"source": "sales", **FEATURE_REQUESTS[feature]})
    if d.supports(feature):
        plan = prepare(req, regen.SCHEMA, d)
        plan = finish(plan, {})
        assert plan.main_sql
    else:
        with pytest.raises(Unsupported) as err:
            prepare(req, regen.SCHEMA, d)
        assert err.value.status == 422
        assert err.value.detail.startswith(f"not supported on {dialect}: ")
        assert d.how(feature).startswith(("no (422)", "UTC only (422)"))


def test_fd_and_scott_rules_refused_without_quantiles_or_stddev():
    for name, d in DIALECTS.items():
        for rule, need in (("fd", "quantile"), ("scott", "stddev")):
            req = ChartRequest.model_validate({"source": "sales", "channels": {
                "x": {"column": "x", "bin": {"rule": rule}}, "y": {"agg": "count"}}})
            if d.supports(need):
                prepare(req, regen.SCHEMA, d)
            else:
                with pytest.raises(Unsupported, match=f"not supported on {name}: bin rule {rule}"):
                    prepare(req, regen.SCHEMA, d)


def test_readme_capability_table_is_generated():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    m = re.search(r"<!-- capability-table:start -->\n(.*?)<!-- capability-table:end -->", text, re.S)
    assert m, "README.md lacks the capability-table markers"
    assert m.group(1) == capability_table_markdown(), \
        "README capability table is stale: paste planner.dialects.capability_table_markdown()"


def test_capability_table_covers_every_dialect_and_row():
    table = capability_table_markdown().splitlines()
    header = [c.strip() for c in table[0].strip("|").split("|")]
    assert header[1:] == list(DIALECTS)
    for line in table[2:]:
        cells = [c.strip() for c in line.strip("|").split("|")]
        assert len(cells) == len(DIALECTS) + 1 and all(cells)



#: a value other than the base's for each Capabilities field the table shows
OTHER_VALUE = {"checked": "golden", "unsupported": frozenset({"tz"}), "quantile_method": "window",
               "stddev_method": "two_pass", "approx_distinct": ("hll", 0.5),
               "nulls_order_native": False, "param_form": ("each", "qmark"),
               "max_identifier_bytes": 30, "identifiers_bmp_only": True, "arg_min_max": True,
               "grouping_sets": True}


def test_every_capability_field_is_shown_or_internal():
    """Each field of the record names its table row (and changing it changes that cell of
    the generated table) or says why it is internal."""
    rows = {key for key, _ in TABLE_ROWS}
    shown = set()
    for f in dataclasses.fields(Capabilities):
        assert f.type and f.metadata, f"{f.name}: no type or metadata"
        assert ("row" in f.metadata) != ("internal" in f.metadata), f.name
        if "internal" in f.metadata:
            assert f.metadata["internal"].strip(), f.name
            continue
        row = f.metadata["row"]
        keys = [k for k in rows if k in FEATURES] if row == "features" else [row]
        assert keys and set(keys) <= rows, f"{f.name}: row {row!r} is not in TABLE_ROWS"
        shown.add(f.name)

        class Other(Dialect):
            caps = dataclasses.replace(Dialect.caps, **{f.name: OTHER_VALUE[f.name]})

        base, other = Dialect(), Other()
        assert any(base.how(k) != other.how(k) for k in keys), f"{f.name} changes no cell"
    assert shown == set(OTHER_VALUE)


def test_capabilities_are_frozen():
    with pytest.raises(dataclasses.FrozenInstanceError):
        DIALECTS["duckdb"].caps.arg_min_max = False  # type: ignore[misc]


def test_a_record_field_as_class_attribute_is_refused():
    with pytest.raises(TypeError, match="unsupported belong in caps"):
        type("Old", (Dialect,), {"unsupported": frozenset({"tz"})})


def _dialect_names_compared(tree: ast.AST) -> list[str]:
    """Comparisons of a ``.name`` / ``.dialect`` attribute or a variable ``dialect`` with a
    dialect name (or a tuple/list/set of them)."""
    names = set(DIALECTS) | set(ALIASES)

    def strings(n: ast.AST) -> set[str]:
        if isinstance(n, ast.Constant) and isinstance(n.value, str):
            return {n.value}
        if isinstance(n, (ast.Tuple, ast.List, ast.Set)):
            return set().union(*(strings(e) for e in n.elts))
        return set()

    def is_name(n: ast.AST) -> bool:
        return (isinstance(n, ast.Attribute) and n.attr in ("name", "dialect")) or \
            (isinstance(n, ast.Name) and n.id in ("dialect", "dialect_name"))

    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare):
            operands = [node.left, *node.comparators]
            if any(strings(o) & names for o in operands) and any(is_name(o) for o in operands):
                found.append(f"{node.lineno}: {ast.unparse(node)}")
    return found


def test_scan_finds_a_dialect_name_comparison():
    # the scan itself is checked on code it must flag (and on code it must not)
    assert _dialect_names_compared(ast.parse('if d.name == "sqlite": pass'))
    assert _dialect_names_compared(ast.parse('x = dialect in ("mysql", "tsql")'))
    assert not _dialect_names_compared(ast.parse('x = "mariadb" in version.lower()'))


def test_no_dialect_name_is_tested_outside_planner_dialects():
    """What a target can do is read from its Capabilities record, never from its name."""
    found = []
    for top in ("planner", "app"):
        for path in sorted((ROOT / top).rglob("*.py")):
            if path.parent.name == "dialects" and path.parent.parent.name == "planner":
                continue
            found += [f"{path.relative_to(ROOT)}:{hit}"
                      for hit in _dialect_names_compared(ast.parse(path.read_text(encoding="utf-8")))]
    assert not found, "compare capabilities, not dialect names: " + "; ".join(found)

# --- /v1/sql and sluice plan for every dialect -------------------------------------------

@pytest.fixture(scope="module")
def plan_config(tmp_path_factory):
    fx_spec = importlib.util.spec_from_file_location("sluice_engine_fixtures_d",
                                                     Path(__file__).with_name("engine_fixtures.py"))
    fx = importlib.util.module_from_spec(fx_spec)
    fx_spec.loader.exec_module(fx)
    root = tmp_path_factory.mktemp("dialects")
    src = fx.load_duckdb(root, fx.arrow_table(fx.make_rows()[:500]))
    cfg = root / "sluice.toml"
    cfg.write_text(f'[sources.t]\nengine = "duckdb"\npath = "{src["path"]}"\ntable = "t"\n',
                   encoding="utf-8")
    return cfg


BODY = {"source": "t", "channels": {"x": {"column": "x", "bin": {"bins": 10}},
                                    "color": {"column": "cat", "top": 3}, "y": {"agg": "count"}},
        "where": [{"column": "ts", "gte": "2026-02-01"}], "stack": "sum"}


@pytest.fixture(scope="module")
def sql_client(plan_config):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    with TestClient(create_app(load_settings(plan_config)), raise_server_exceptions=False) as c:
        yield c


@pytest.mark.parametrize("dialect", ALL)
def test_v1_sql_every_dialect(sql_client, dialect: str):
    r = sql_client.post(f"/v1/sql?dialect={dialect}", json=BODY)
    assert r.status_code == 200, r.text
    out = r.json()
    assert out["dialect"] == dialect
    extents, main = out["sql"]
    assert "_sluice_e0_min" in extents  # the extents ran on the source (DuckDB)
    sqlglot.parse_one(main, read=DIALECTS[dialect].sqlglot)


def test_v1_sql_unknown_dialect_is_400(sql_client):
    r = sql_client.post("/v1/sql?dialect=oracle", json=BODY)
    assert r.status_code == 400
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "unknown dialect 'oracle'" in r.json()["detail"]
    for name in ALL:
        assert name in r.json()["detail"]


@pytest.mark.parametrize("dialect", ALL)
def test_cli_plan_every_dialect(plan_config, tmp_path, capsys, dialect: str):
    from app.cli import main

    body = tmp_path / "chart.json"
    body.write_text(json.dumps(BODY), encoding="utf-8")
    code = main(["plan", str(body), "--dialect", dialect, "--config", str(plan_config)])
    out = capsys.readouterr()
    assert code == 0, out.err
    statements = [s for s in out.out.split(";\n") if s.strip()]
    assert len(statements) == 2
    sqlglot.parse_one(statements[-1], read=DIALECTS[dialect].sqlglot)


def test_cli_plan_unknown_dialect_exit_code(plan_config, tmp_path, capsys):
    from app.cli import EXIT_PLAN, main

    body = tmp_path / "chart.json"
    body.write_text(json.dumps(BODY), encoding="utf-8")
    code = main(["plan", str(body), "--dialect", "oracle", "--config", str(plan_config)])
    err = capsys.readouterr().err
    assert code == EXIT_PLAN
    assert "unknown dialect 'oracle'" in err


# --- optional warehouse engines -------------------------------------------------------------

@pytest.mark.parametrize("engine,module,extra", [
    ("trino", "trino", "trino"), ("bigquery", "google.cloud.bigquery", "bigquery"),
    ("snowflake", "snowflake.connector", "snowflake")])
def test_warehouse_engine_without_library_says_what_to_install(engine, module, extra):
    from app.engines import EngineUnavailable, open_engine
    from app.settings import SourceConfig

    try:
        installed = importlib.util.find_spec(module) is not None
    except ModuleNotFoundError:
        installed = False
    if installed:  # the extra is installed here: the message path cannot be shown
        return
    with pytest.raises(EngineUnavailable) as err:
        open_engine(SourceConfig(name="w", engine=engine, table="t", dsn=f"{engine}://x"))
    assert f"sluice-charts[{extra}]" in err.value.message


# --- filter_sql: one meaning everywhere (issue 9.8), checked live in test_engines_semantics --

FILTERS_EVERYWHERE = [
    "cat NOT LIKE 'a%'", "cat NOT ILIKE 'A!_%' ESCAPE '!'", "NOT (cat LIKE 'a\\b')",
    "cat LIKE '[x]*?%_'", "round(x, -1) = 20 AND round(x) > 1 AND round(n, 2) < 3",
    "round(round(x, 2), 1) = 1",
]


@pytest.mark.parametrize("dialect", ALL)
@pytest.mark.parametrize("text", FILTERS_EVERYWHERE)
def test_filter_sql_semantics_render_and_parse_everywhere(dialect, text):
    """NOT LIKE is accepted (it was refused), and every target's form of LIKE / ILIKE /
    round parses back with sqlglot's parser for that target (outside reference)."""
    d = get_dialect(dialect)
    plan = prepare(ChartRequest.model_validate({"source": "sales", "channels": {
        "x": {"column": "grp"}, "y": {"agg": "count"}}, "filter_sql": text}), regen.SCHEMA, d)
    plan = finish(plan, {})
    sql = plan.main_sql
    assert "ROUND(" not in sql.upper().replace("_ROUND", "")  # no engine round: ours is written out
    sqlglot.parse_one(sql, read=d.sqlglot)


@pytest.mark.parametrize("text,words", [
    ("cat LIKE 'a!' ESCAPE '!'", "must come before"),
    ("cat LIKE 'a!x' ESCAPE '!'", "must come before"),
    ("cat LIKE grp", "string literal"),
    ("cat LIKE NULL", "string literal"),
    ("round(round(round(round(round(x, 1), 1), 1), 1), 1) = 1", "nested too deeply"),
])
def test_filter_sql_like_and_round_refusals(text, words):
    from planner.errors import PlanError

    with pytest.raises(PlanError) as err:
        prepare(ChartRequest.model_validate({"source": "sales", "channels": {
            "y": {"agg": "count"}}, "filter_sql": text}), regen.SCHEMA, get_dialect("duckdb"))
    assert err.value.status == 422 and err.value.pointer == "/filter_sql"  # RFC 6901 pointer
    assert words in err.value.detail, err.value.detail
