"""Config file + SLUICE_* environment overrides: validated up front, errors name file, key, fix."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from app.settings import ConfigError, load_settings, parse_settings

REPO = Path(__file__).resolve().parents[1]

GOOD = """
[server]
max_limit = 5000

[sources.deliveries]
engine = "duckdb"
path = "demo.duckdb"
table = "deliveries"
threads = 2
"""


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "sluice.toml"
    p.write_text(text, encoding="utf-8")
    return p


def error_of(fn, *a, **kw) -> ConfigError:
    with pytest.raises(ConfigError) as ei:
        fn(*a, **kw)
    return ei.value


def test_good_file_relative_path_and_options(tmp_path):
    st = load_settings(write(tmp_path, GOOD), environ={})
    assert st.max_limit == 5000
    src = st.sources["deliveries"]
    assert src.path == str(tmp_path / "demo.duckdb")  # relative to the file's folder
    assert src.options == {"threads": 2}


def test_builtin_demo_config_without_file():
    st = load_settings(environ={"SLUICE_DEMO_PATH": "/srv/demo.duckdb"})
    assert st.config_path == "<built-in demo config>"
    assert st.sources["deliveries"].path == "/srv/demo.duckdb"


@pytest.mark.parametrize("text, key, hint", [
    ('[sources.d]\nengine = "duckdb"\ntable = "t"\npth = "x.duckdb"\n', "sources.d.pth", "'path'"),
    ('[sources.d]\nengine = "duckdb"\ntabel = "t"\npath = "x"\n', "sources.d.tabel", "'table'"),
    ('[sever]\nmax_limit = 1\n[sources.d]\nengine = "duckdb"\ntable = "t"\npath = "x"\n', "sever", "'server'"),
    ('[server]\nmax_limt = 1\n[sources.d]\nengine = "duckdb"\ntable = "t"\npath = "x"\n',
     "server.max_limt", "'max_limit'"),
    ('[sources.d]\nengine = "postgress"\ntable = "t"\n', "sources.d.engine", "'postgres'"),
])
def test_unknown_keys_name_file_key_and_nearest(tmp_path, text, key, hint):
    path = write(tmp_path, text)
    e = error_of(load_settings, path, environ={})
    assert e.file == str(path) and e.key == key
    assert str(path) in str(e) and f"[{key}]" in str(e)
    assert f"did you mean {hint}" in str(e)


@pytest.mark.parametrize("text, key, words", [
    ("", "sources", "[sources.NAME]"),
    ('[sources.d]\nengine = "duckdb"\ntable = "t"\n', "sources.d.path", 'path = "FILE"'),
    ('[sources.d]\nengine = "duckdb"\npath = "x"\n', "sources.d.table", 'table = "deliveries"'),
    ('[server]\nmax_limit = "lots"\n[sources.d]\nengine = "duckdb"\ntable = "t"\npath = "x"\n',
     "server.max_limit", "max_limit = 100000"),
    ('[server]\nmax_limit = -1\n[sources.d]\nengine = "duckdb"\ntable = "t"\npath = "x"\n',
     "server.max_limit", "positive"),
    ('[server]\nrequest_log = 1\n[sources.d]\nengine = "duckdb"\ntable = "t"\npath = "x"\n',
     "server.request_log", "true or false"),
])
def test_missing_or_mistyped_values_say_the_fix(tmp_path, text, key, words):
    e = error_of(load_settings, write(tmp_path, text), environ={})
    assert e.key == key
    assert words in str(e)


def test_unreadable_and_invalid_toml(tmp_path):
    e = error_of(load_settings, tmp_path / "missing.toml", environ={})
    assert "missing.toml" in str(e) and "SLUICE_CONFIG" in str(e)
    e = error_of(load_settings, write(tmp_path, "[sources.d\nengine="), environ={})
    assert "not valid TOML" in str(e) and "line" in str(e)


def test_env_overrides_server_and_source(tmp_path):
    st = load_settings(write(tmp_path, GOOD), environ={
        "SLUICE_MAX_LIMIT": "250",
        "SLUICE_SERVER__MAX_BODY_BYTES": "4096",
        "SLUICE_REQUEST_LOG": "false",
        "SLUICE_SOURCES__DELIVERIES__PATH": "/data/other.duckdb",
        "SLUICE_SOURCES__DELIVERIES__OPTIONS__MEMORY_LIMIT": "1GB",
        "SLUICE_SOURCES__SALES__ENGINE": "postgres",
        "SLUICE_SOURCES__SALES__TABLE": "public.sales",
        "SLUICE_SOURCES__SALES__DSN": "postgresql://reader@db/warehouse",
        "SLUICE_API_TOKEN": "someone else's variable, left alone",
    })
    assert (st.max_limit, st.max_body_bytes, st.request_log) == (250, 4096, False)
    assert st.sources["deliveries"].path == "/data/other.duckdb"
    assert st.sources["deliveries"].options["memory_limit"] == "1GB"
    assert st.sources["sales"].dsn == "postgresql://reader@db/warehouse"


def test_env_override_on_builtin_demo():
    st = load_settings(environ={"SLUICE_MAX_LIMIT": "7"})
    assert st.max_limit == 7


@pytest.mark.parametrize("env, words", [
    ({"SLUICE_MAX_LIMIT": "many"}, ["SLUICE_MAX_LIMIT", "[server.max_limit]", "not an integer",
                                    "set SLUICE_MAX_LIMIT=100000"]),
    ({"SLUICE_MAX_LIMT": "5"}, ["SLUICE_MAX_LIMT", "did you mean 'SLUICE_MAX_LIMIT'"]),
    ({"SLUICE_SERVR__MAX_LIMIT": "5"}, ["SLUICE_SERVR__MAX_LIMIT", "did you mean 'server'"]),
    ({"SLUICE_SOURCES__DELIVERIES__PTH": "x"}, ["environment variable SLUICE_SOURCES__DELIVERIES__PTH",
                                                "[sources.deliveries.pth]", "did you mean 'path'"]),
    ({"SLUICE_SOURCES__NEW__PATH": "x"}, ["[sources.new.engine]", "is missing"]),
])
def test_env_errors_name_the_variable(tmp_path, env, words):
    e = error_of(load_settings, write(tmp_path, GOOD), environ=env)
    for w in words:
        assert w in str(e), str(e)


def test_parse_settings_keeps_the_old_signature():
    st = parse_settings({"sources": {"d": {"engine": "duckdb", "table": "t", "path": "/x.duckdb"}}})
    assert st.sources["d"].path == "/x.duckdb"


def test_uvicorn_fails_fast_with_a_readable_message(tmp_path):
    bad = write(tmp_path, '[sources.d]\nengine = "duckdb"\ntable = "t"\npaht = "x.duckdb"\n')
    env = dict(os.environ, SLUICE_CONFIG=str(bad))
    proc = subprocess.run([sys.executable, "-m", "uvicorn", "app.main:app", "--port", "0"],
                          cwd=REPO, env=env, capture_output=True, text=True, timeout=60)
    assert proc.returncode == 3
    assert "Traceback" not in proc.stderr
    assert f"sluice: config error: {bad}: [sources.d.paht] unknown key; did you mean 'path'?" in proc.stderr


def test_env_list_values_use_toml_array_syntax():
    st = load_settings(environ={"SLUICE_SERVER__CORS_ORIGINS": '["https://dash.example.org"]'})
    assert st.cors_origins == ["https://dash.example.org"]
    e = error_of(load_settings, environ={"SLUICE_SERVER__CORS_ORIGINS": '["unclosed'})
    assert "SLUICE_SERVER__CORS_ORIGINS" in str(e) and "TOML array" in str(e)
