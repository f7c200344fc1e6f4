"""The `sluice` console script, run for real (subprocess), and its documented exit codes:
0 ok, 2 usage, 3 config, 4 plan error, 5 source unavailable."""

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
        timeout: float = 60) -> subprocess.CompletedProcess:
    e = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    e.update(env or {})
    return subprocess.run([SLUICE, *args], input=stdin, env=e, cwd=cwd or REPO,
                          capture_output=True, text=True, timeout=timeout)


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
    for word in ("serve", "demo", "plan", "sources", "SLUICE_CONFIG", "SLUICE_SOURCES__",
                 "exit codes:", "3  config error", "5  a source is unavailable"):
        assert word in p.stdout
    for cmd in ("serve", "demo", "plan", "sources"):
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
