"""The `sluice` console script, run for real (subprocess), and its documented exit codes:
0 ok, 2 usage, 3 config, 4 plan error, 5 source unavailable.

`sluice chart` answers are checked against pandas on the same rows (the demo file read
with DuckDB into a DataFrame) and against POST /v1/chart on the same config; `sluice key`
against hashlib (SHA-256, FIPS 180-4) and the API's own key check."""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
SLUICE = str(Path(sys.executable).with_name("sluice"))
REQ = {"source": "deliveries", "channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}


def run(*args: str, stdin: str | None = None, env: dict | None = None, cwd: Path | None = None,
        timeout: float = 60, newline: str | None = None) -> subprocess.CompletedProcess:
    """``newline=""`` keeps line breaks as written (CSV's CRLF)."""
    e = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    e.update(env or {})
    p = subprocess.run([SLUICE, *args], input=None if stdin is None else stdin.encode(), env=e,
                       cwd=cwd or REPO, capture_output=True, timeout=timeout)
    decode = (lambda b: b.decode()) if newline == "" else (
        lambda b: b.decode().replace("\r\n", "\n"))
    return subprocess.CompletedProcess(p.args, p.returncode, decode(p.stdout), decode(p.stderr))


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("cli") / "demo.duckdb"
    p = run("demo", "--rows", "3000", "--out", str(out), "--quiet")
    assert p.returncode == 0, p.stderr
    assert "wrote 3,000 rows" in p.stdout
    return out


@pytest.fixture(scope="module")
def config(demo) -> Path:
    cfg = demo.with_name("sluice.toml")
    cfg.write_text(f'[sources.deliveries]\nengine = "duckdb"\npath = "{demo}"\ntable = "deliveries"\n')
    return cfg


def test_console_script_is_installed():
    assert Path(SLUICE).exists() or shutil.which("sluice")


def test_help_lists_commands_environment_and_exit_codes():
    p = run("--help")
    assert p.returncode == 0
    for word in ("serve", "demo", "plan", "chart", "key", "sources", "SLUICE_CONFIG", "SLUICE_SOURCES__",
                 "exit codes:", "3  config error", "5  a source is unavailable"):
        assert word in p.stdout
    for cmd in ("serve", "demo", "plan", "chart", "key", "sources"):
        sub = run(cmd, "--help")
        assert sub.returncode == 0 and f"usage: sluice {cmd}" in sub.stdout
        assert "exit codes:" in sub.stdout
        assert max(len(line) for line in sub.stdout.splitlines()) <= 100  # reads in a terminal


def test_version():
    p = run("--version")
    assert p.returncode == 0 and p.stdout.startswith("sluice ")


@pytest.mark.parametrize("args", [[], ["frobnicate"], ["demo", "--rows", "0"], ["demo", "--rows", "x"],
                                  ["plan"], ["serve", "--port", "eighty"]])
def test_usage_errors_exit_2(args):
    p = run(*args)
    assert p.returncode == 2, p.stderr
    assert "usage: sluice" in p.stderr


def test_plan_unreadable_file_is_usage(tmp_path):
    p = run("plan", str(tmp_path / "missing.json"))
    assert p.returncode == 2
    assert "cannot read" in p.stderr and "missing.json" in p.stderr


def test_sources_ok(config):
    p = run("sources", "--config", str(config))
    assert p.returncode == 0, p.stderr
    assert p.stdout.split("\t")[:3] == ["deliveries", "duckdb", "deliveries"]
    assert "3000 rows" in p.stdout


def test_plan_from_stdin_prints_sql(config):
    p = run("plan", "-", "--config", str(config), stdin=json.dumps(REQ))
    assert p.returncode == 0, p.stderr
    assert "SELECT" in p.stdout and "GROUP BY" in p.stdout.upper()
    assert p.stdout.rstrip().endswith(";")


def test_plan_other_dialect_and_env_config(config, tmp_path):
    f = tmp_path / "chart.json"
    f.write_text(json.dumps(REQ))
    p = run("plan", str(f), "--dialect", "duckdb", env={"SLUICE_CONFIG": str(config)})
    assert p.returncode == 0, p.stderr
    assert '"depot"' in p.stdout


@pytest.mark.parametrize("stdin, words", [
    ("{not json", "not valid JSON"),
    ("[1, 2]", "must be a JSON object"),
    (json.dumps({"source": "deliveries", "channels": {"x": {"column": "depott"}}}), "/channels/x/column"),
    (json.dumps({"source": "deliveries", "channels": {"x": {"colum": "depot"}}}), "/channels/x"),
    (json.dumps({"source": "elsewhere", "channels": {"x": {"column": "depot"}}}), "/source"),
])
def test_plan_errors_exit_4_with_pointer(config, stdin, words):
    p = run("plan", "-", "--config", str(config), stdin=stdin)
    assert p.returncode == 4, (p.returncode, p.stderr)
    assert words in p.stderr
    assert "Traceback" not in p.stderr


def test_plan_unknown_dialect_exit_4(config):
    p = run("plan", "-", "--config", str(config), "--dialect", "cobol", stdin=json.dumps(REQ))
    assert p.returncode == 4 and "unknown dialect" in p.stderr


@pytest.mark.parametrize("cmd", [["sources"], ["plan", "-"]])
def test_config_errors_exit_3(tmp_path, cmd):
    bad = tmp_path / "bad.toml"
    bad.write_text('[sources.d]\nengine = "duckdb"\ntable = "t"\npaht = "x"\n')
    p = run(*cmd, "--config", str(bad), stdin=json.dumps(REQ))
    assert p.returncode == 3
    assert p.stderr.startswith("sluice: config error: ")
    assert str(bad) in p.stderr and "[sources.d.paht]" in p.stderr and "'path'" in p.stderr


def test_env_override_errors_exit_3(config):
    p = run("sources", "--config", str(config), env={"SLUICE_MAX_LIMIT": "lots"})
    assert p.returncode == 3 and "SLUICE_MAX_LIMIT" in p.stderr


def test_source_unavailable_exit_5(tmp_path, config):
    cfg = tmp_path / "gone.toml"
    cfg.write_text(config.read_text() + f'\n[sources.gone]\nengine = "duckdb"\n'
                   f'path = "{tmp_path / "nope.duckdb"}"\ntable = "t"\n')
    p = run("sources", "--config", str(cfg))
    assert p.returncode == 5
    assert "deliveries\tduckdb" in p.stdout and "gone\tduckdb\tt\tUNAVAILABLE" in p.stdout
    p = run("plan", "-", "--config", str(cfg), "--source", "gone", stdin=json.dumps(REQ))
    assert p.returncode == 5 and "nope.duckdb" in p.stderr


def test_serve_bad_config_exits_3_before_listening(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[sources]\n")
    p = run("serve", "--port", "1", "--config", str(bad))
    assert p.returncode == 3 and "[sources] no sources" in p.stderr


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_serve_answers_healthz(config, tmp_path):
    import httpx

    port = _free_port()
    log = open(tmp_path / "serve.log", "w")
    env = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    proc = subprocess.Popen([SLUICE, "serve", "--port", str(port), "--config", str(config)],
                            cwd=REPO, env=env, stdout=log, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 20
        while True:
            assert proc.poll() is None, (tmp_path / "serve.log").read_text()
            try:
                r = httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1)
                break
            except httpx.HTTPError:
                assert time.monotonic() < deadline, "no answer within 20 s"
                time.sleep(0.1)
        assert r.status_code == 200
        assert httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=5).json()["ready"] is True
    finally:
        proc.terminate()
        proc.wait(10)
        log.close()
    lines = [json.loads(x) for x in (tmp_path / "serve.log").read_text().splitlines() if x.startswith("{")]
    assert [x["path"] for x in lines] == ["/healthz", "/readyz"]  # our JSON lines, no uvicorn access log


# --- sluice chart: table, CSV and JSON against pandas -------------------------------------

CHART = {"source": "deliveries",
         "channels": {"x": {"column": "depot"}, "y": {"agg": "count"},
                      "size": {"agg": "avg", "column": "delay_min"},
                      "color": {"column": "on_time"}}}


@pytest.fixture(scope="module")
def frame(demo):
    """The demo rows as a pandas DataFrame (the reference)."""
    import duckdb

    con = duckdb.connect(str(demo), read_only=True)
    try:
        return con.sql("SELECT * FROM deliveries").df()
    finally:
        con.close()


@pytest.fixture(scope="module")
def expected(frame):
    """pandas groupby of the same rows: count and mean delay per (depot, on_time), keys
    ascending with NULLs last (the answer's documented order)."""
    g = frame.groupby(["depot", "on_time"], dropna=False)
    out = g.size().to_frame("count").join(g["delay_min"].mean().to_frame("avg_delay_min"))
    out = out.reset_index().sort_values(["depot", "on_time"], na_position="last", kind="stable")
    import pandas as pd

    return [(r.depot, None if pd.isna(r.on_time) else bool(r.on_time), int(r.count),
             None if pd.isna(r.avg_delay_min) else float(r.avg_delay_min))
            for r in out.itertuples()]


def _close(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return abs(a - b) <= 1e-9 * max(1.0, abs(b))


def _check_rows(rows, expected):
    assert len(rows) == len(expected)
    for got, want in zip(rows, expected):
        assert got[:3] == want[:3], (got, want)          # pandas groupby size
        assert _close(got[3], want[3]), (got, want)      # pandas mean


def test_chart_table_is_aligned_and_matches_pandas(config, expected):
    p = run("chart", "-", "--config", str(config), stdin=json.dumps(CHART))
    assert p.returncode == 0, p.stderr
    lines = p.stdout.rstrip("\n").split("\n")
    header, rule, body = lines[0], lines[1], lines[2:]
    # column extents come from the rule line; every cell sits inside its column
    spans, pos = [], 0
    for dashes in rule.split("  "):
        spans.append((pos, pos + len(dashes)))
        pos += len(dashes) + 2
    names = [header[a:b].strip() for a, b in spans]
    assert sorted(names) == ["avg_delay_min", "count", "depot", "on_time"]
    rows = []
    for line in body:
        line = line.ljust(spans[-1][1])
        cells = {n: line[a:b] for n, (a, b) in zip(names, spans)}
        # text left-aligned, numbers right-aligned (common practice for terminal tables)
        for n in ("depot", "on_time"):
            assert cells[n] == cells[n].rstrip().ljust(len(cells[n])), line
        for n in ("count", "avg_delay_min"):
            assert cells[n] == cells[n].strip().rjust(len(cells[n])), line
        c = {n: v.strip() for n, v in cells.items()}
        rows.append((c["depot"], {"true": True, "false": False, "null": None}[c["on_time"]],
                     int(c["count"]), None if c["avg_delay_min"] == "null" else float(c["avg_delay_min"])))
    _check_rows(rows, expected)
    assert f"{len(expected)} rows" in p.stderr and "3000 source rows" in p.stderr


def test_chart_csv_matches_pandas(config, expected, tmp_path):
    import csv
    import io

    f = tmp_path / "chart.json"
    f.write_text(json.dumps(CHART))
    p = run("chart", str(f), "--format", "csv", "--config", str(config), newline="")
    assert p.returncode == 0, p.stderr
    assert "\r\n" in p.stdout  # RFC 4180 line breaks
    rows = list(csv.DictReader(io.StringIO(p.stdout, newline="")))
    assert sorted(rows[0]) == ["avg_delay_min", "count", "depot", "on_time"]
    parsed = [(r["depot"], {"true": True, "false": False, "": None}[r["on_time"]],
               int(r["count"]), None if r["avg_delay_min"] == "" else float(r["avg_delay_min"]))
              for r in rows]
    _check_rows(parsed, expected)


def test_chart_json_is_the_api_answer(config, expected):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    p = run("chart", "-", "--format", "json", "--config", str(config), stdin=json.dumps(CHART))
    assert p.returncode == 0, p.stderr
    got = json.loads(p.stdout)
    d = got["data"]
    rows = list(zip(d["depot"], d["on_time"], d["count"], d["avg_delay_min"]))
    _check_rows(rows, expected)
    with TestClient(create_app(load_settings(config))) as c:
        api = c.post("/v1/chart", json=CHART).json()
    for k in ("columns", "data", "stats", "sql", "dialect", "domains", "bins"):
        assert got[k] == api[k], k  # the same ChartService path as the API


def test_chart_timestamps_and_truncation_are_said(config, frame):
    body = {"source": "deliveries", "limit": 3,
            "channels": {"x": {"column": "delivered_at", "trunc": "month", "tz": "Europe/Berlin"},
                         "y": {"agg": "count"}}}
    p = run("chart", "-", "--format", "csv", "--config", str(config), stdin=json.dumps(body),
            newline="")
    assert p.returncode == 0, p.stderr
    rows = p.stdout.strip().split("\r\n")[1:]
    # pandas: months in Berlin local time (tz_convert uses the IANA database)
    local = frame["delivered_at"].dt.tz_convert("Europe/Berlin")
    months = local.dt.tz_localize(None).dt.to_period("M").value_counts().sort_index()
    want = [(str(m.start_time.tz_localize("Europe/Berlin").isoformat()), int(n))
            for m, n in list(months.items())[:3]]
    assert [tuple(r.split(",")) for r in rows] == [(t, str(n)) for t, n in want]
    assert f"truncated: 3 of {len(months)} groups shown" in p.stderr


def test_chart_errors(config, tmp_path):
    bad = {"source": "deliveries", "channels": {"x": {"column": "depott"}}}
    p = run("chart", "-", "--config", str(config), stdin=json.dumps(bad))
    assert p.returncode == 4 and "/channels/x/column" in p.stderr and "depot" in p.stderr
    p = run("chart", "-", "--config", str(config), "--format", "xml", stdin=json.dumps(CHART))
    assert p.returncode == 2
    cfg = tmp_path / "gone.toml"
    cfg.write_text(f'[sources.gone]\nengine = "duckdb"\npath = "{tmp_path / "no.duckdb"}"\n'
                   'table = "t"\n')
    p = run("chart", "-", "--config", str(cfg), "--source", "gone", stdin=json.dumps(CHART))
    assert p.returncode == 5 and "no.duckdb" in p.stderr and "Traceback" not in p.stderr


# --- sluice key ----------------------------------------------------------------------------

def test_key_new_hash_is_sha256_and_authenticates(demo, tmp_path):
    import hashlib

    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    p = run("key", "new")
    assert p.returncode == 0, p.stderr
    fields = dict(line.split(":", 1) for line in p.stdout.strip().splitlines())
    key, digest = fields["key"].strip(), fields["hash"].strip()
    assert len(key) >= 32
    assert digest == "sha256:" + hashlib.sha256(key.encode()).hexdigest()  # FIPS 180-4
    assert run("key", "new").stdout != p.stdout  # random each time
    cfg = tmp_path / "keys.toml"
    cfg.write_text(f'[sources.deliveries]\nengine = "duckdb"\npath = "{demo}"\n'
                   f'table = "deliveries"\n\n[[keys]]\nhash = "{digest}"\nsources = ["*"]\n')
    with TestClient(create_app(load_settings(cfg))) as c:
        assert c.get("/v1/sources").status_code == 401
        assert c.get("/v1/sources", headers={"X-API-Key": key}).status_code == 200


def test_key_hash_is_pbkdf2_that_verifies():
    import hashlib

    p = run("key", "hash", "correct horse")
    assert p.returncode == 0, p.stderr
    algo, iters, salt, want = p.stdout.strip().split("$")
    assert algo == "pbkdf2_sha256"
    got = hashlib.pbkdf2_hmac("sha256", b"correct horse", bytes.fromhex(salt), int(iters))  # RFC 8018
    assert got.hex() == want
    assert run("key").returncode == 2 and run("key", "hash").returncode == 2


def test_old_key_module_still_works():
    p = subprocess.run([sys.executable, "-m", "app.auth", "new"], capture_output=True, text=True,
                       cwd=REPO, timeout=30)
    assert p.returncode == 0 and p.stdout.startswith("key:  ")
