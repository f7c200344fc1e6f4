"""The TypeScript types in clients/typescript/sluice.d.ts, checked with the real tools:
``openapi-typescript`` regenerates them from the live app's /openapi.json (the committed file
must be current: `make types` rewrites it) and ``tsc --noEmit --strict`` (TypeScript 5)
compiles a usage file against them — a chart request literal and a column profile read
type-check, and a misspelt key or field is a compile error (TypeScript's excess-property and
property-existence checks)."""

from __future__ import annotations

import importlib.util
import shutil
import subprocess
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
TS_DIR = REPO / "clients" / "typescript"
TSC = REPO / "tests" / "js" / "node_modules" / ".bin" / "tsc"
TSC_FLAGS = ["--noEmit", "--strict", "--target", "es2022", "--module", "esnext",
             "--moduleResolution", "bundler"]


def _generator():
    spec = importlib.util.spec_from_file_location("sluice_ts_generate", TS_DIR / "generate.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


gen = _generator()


@pytest.fixture(scope="module")
def document() -> dict:
    from fastapi.testclient import TestClient

    with TestClient(gen.build_app()) as c:
        r = c.get("/openapi.json")
    assert r.status_code == 200
    return r.json()


def tsc(tmp_path: Path, name: str, text: str | None = None) -> subprocess.CompletedProcess:
    """Compile ``name`` (from clients/typescript, or ``text``) beside copies of the types."""
    assert TSC.exists(), f"{TSC} missing: run `make node`"
    for f in ("sluice.d.ts", "example.ts", "example_answer.ts"):
        shutil.copy(TS_DIR / f, tmp_path / f)
    if text is not None:
        (tmp_path / name).write_text(text, encoding="utf-8")
    return subprocess.run([str(TSC), *TSC_FLAGS, *name.split()], cwd=tmp_path,
                          capture_output=True, text=True, timeout=180)


def test_committed_types_are_current(document):
    got = gen.typescript(document)
    want = (TS_DIR / "sluice.d.ts").read_text(encoding="utf-8")
    assert got == want, "clients/typescript/sluice.d.ts is stale: run `make types`"


def test_request_literal_and_profile_read_type_check(tmp_path):
    p = tsc(tmp_path, "example.ts")
    assert p.returncode == 0, p.stdout + p.stderr


MISTAKES = [
    ('  channels: {\n    x: {', '  chanels: {\n    x: {', "'chanels'"),       # misspelt key
    ('y: { agg: "count" }', 'y: { agg: "cnt" }', '"cnt"'),                     # unknown aggregate
    ('bin: { bins: 20 }', 'bin: { bins: "20" }', "not assignable to type 'number'"),  # wrong type
    ('p.null_count > 0', 'p.null_cont > 0', "'null_cont'"),                    # misspelt field
    ('${v.count}', '${v.cnt}', "'cnt'"),
]


def test_mistakes_fail_to_compile(tmp_path):
    """Each mistake in its own copy of example.ts; one tsc run; every copy must fail with
    an error naming the mistake (a copy that compiled would have no error line)."""
    text = (TS_DIR / "example.ts").read_text(encoding="utf-8")
    names = []
    for i, (old, new, _) in enumerate(MISTAKES):
        assert old in text, old
        names.append(f"bad_{i}.ts")
        (tmp_path / names[-1]).write_text(text.replace(old, new), encoding="utf-8")
    p = tsc(tmp_path, " ".join(names))
    assert p.returncode != 0, "tsc accepted every mistake"
    for name, (_, _, word) in zip(names, MISTAKES):
        errors = [line for line in p.stdout.splitlines() if line.startswith(name + "(")]
        assert errors and any("error TS" in e and word in e for e in errors), (name, p.stdout)


def _answer_schema(document: dict) -> dict:
    ok = document["paths"]["/v1/chart"]["post"]["responses"]["200"]
    return ok.get("content", {}).get("application/json", {}).get("schema", {})


def test_chart_answer_fields_type_check(document, tmp_path):
    if not _answer_schema(document):
        pytest.skip("the OpenAPI document has no schema for the 200 answer of POST /v1/chart yet")
    p = tsc(tmp_path, "example_answer.ts")
    assert p.returncode == 0, p.stdout + p.stderr
    text = (TS_DIR / "example_answer.ts").read_text(encoding="utf-8")
    bad = tsc(tmp_path, "example_answer.ts", text.replace("stats.matched_rows", "stats.matched_row"))
    # the answer models allow extra members (index signature `unknown`), so a misspelt field
    # reads as `unknown` and fails where it is used as a number: the error names that line
    line = next(i for i, t in enumerate(text.splitlines(), 1) if "stats.matched_rows" in t)
    assert bad.returncode != 0 and f"example_answer.ts({line}," in bad.stdout, bad.stdout
