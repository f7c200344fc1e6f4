"""Access (app/auth.py): hashed API keys granting sources, 401 / 403, filtered source lists,
open probes, CORS allow-list."""

from __future__ import annotations


import pytest


# pytest puts tests/ on sys.path (no __init__.py, default import mode)
import test_fuzz_fixture as fx  # noqa: E402
KEY_A = "k-deliveries-0123456789abcdef"
KEY_ALL = "k-everything-fedcba9876543210"
KEY_SALTED = "a passphrase someone chose"
BODY = {"channels": {"x": {"column": "depot"}, "y": {"agg": "count"}}}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from fastapi.testclient import TestClient

    from app.auth import hash_key, sha256_hex
    from app.main import create_app
    from app.settings import load_settings

    root = tmp_path_factory.mktemp("auth")
    db = root / "a.duckdb"
    fx.build_duckdb(db)
    cfg = root / "sluice.toml"
    salted = hash_key(KEY_SALTED, iterations=2000)
    cfg.write_text(
        fx.config(db) + fx.config(db, name="secret")
        + '[server]\nrequest_log = false\ncors_origins = ["https://dash.example.org"]\n'
        f'[[keys]]\nname = "dashboards"\nhash = "sha256:{sha256_hex(KEY_A)}"\nsources = ["deliveries"]\n'
        f'[[keys]]\nname = "admin"\nhash = "{sha256_hex(KEY_ALL).upper()}"\nsources = ["*"]\n'
        f'[[keys]]\nname = "people"\nhash = "{salted}"\nsources = ["secret"]\n')
    assert KEY_A not in cfg.read_text() and KEY_SALTED not in cfg.read_text()  # only hashes
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        yield c


def bearer(key):
    return {"Authorization": f"Bearer {key}"}


def _problem(r, status):
    assert r.status_code == status, (r.status_code, r.text)
    assert r.headers["content-type"].startswith("application/problem+json")
    return r.json()


@pytest.mark.parametrize("headers", [{}, bearer("wrong"), {"X-API-Key": "wrong"},
                                     {"Authorization": "Basic " + KEY_A}, {"Authorization": "Bearer"},
                                     {"Authorization": f"Bearer {KEY_A}x"}, {"X-API-Key": ""}])
def test_401_without_or_with_a_bad_key(client, headers):
    for method, path, body in (("POST", "/v1/chart", {"source": "deliveries", **BODY}),
                               ("POST", "/v1/sql", {"source": "deliveries", **BODY}),
                               ("GET", "/v1/sources", None), ("GET", "/v1/sources/deliveries", None),
                               ("GET", "/metrics", None)):
        r = client.request(method, path, json=body, headers=headers)
        _problem(r, 401)
        assert r.headers["www-authenticate"] == "Bearer"


def test_granted_source_answers(client):
    for headers in (bearer(KEY_A), {"X-API-Key": KEY_A}):
        r = client.post("/v1/chart", json={"source": "deliveries", **BODY}, headers=headers)
        assert r.status_code == 200, r.text


def test_403_for_a_source_not_granted_and_no_probing(client):
    p = _problem(client.post("/v1/chart", json={"source": "secret", **BODY}, headers=bearer(KEY_A)), 403)
    assert p["pointer"] == "/source"
    # an unknown source gets the same answer as a forbidden one: names cannot be probed
    p2 = _problem(client.post("/v1/chart", json={"source": "secrett", **BODY}, headers=bearer(KEY_A)), 403)
    assert "secret'" not in p2["detail"] and "suggestions" not in p2
    _problem(client.get("/v1/sources/secret", headers=bearer(KEY_A)), 403)
    _problem(client.post("/v1/sql", json={"source": "secret", **BODY}, headers=bearer(KEY_A)), 403)
    r = client.post("/v1/batch", json={"source": "secret", "charts": [BODY]}, headers=bearer(KEY_A))
    assert r.status_code == 403 or (r.status_code == 200 and r.json()["results"][0]["status"] == 403)


def test_source_list_shows_only_granted_sources(client):
    names = lambda r: [s["name"] for s in r.json()["sources"]]  # noqa: E731
    assert names(client.get("/v1/sources", headers=bearer(KEY_A))) == ["deliveries"]
    assert names(client.get("/v1/sources", headers=bearer(KEY_ALL))) == ["deliveries", "secret"]
    assert names(client.get("/v1/sources", headers={"X-API-Key": KEY_SALTED})) == ["secret"]


def test_wildcard_and_salted_keys(client):
    for src in ("deliveries", "secret"):
        assert client.post("/v1/chart", json={"source": src, **BODY}, headers=bearer(KEY_ALL)).status_code == 200
    assert client.post("/v1/chart", json={"source": "secret", **BODY},
                       headers=bearer(KEY_SALTED)).status_code == 200
    _problem(client.post("/v1/chart", json={"source": "deliveries", **BODY}, headers=bearer(KEY_SALTED)), 403)


def test_unknown_source_suggestions_only_name_granted_sources(client):
    p = _problem(client.post("/v1/chart", json={"source": "delivery", **BODY}, headers=bearer(KEY_ALL)), 404)
    assert p["suggestions"] == ["deliveries"]


def test_probes_and_docs_stay_open(client):
    assert client.get("/healthz").status_code == 200
    r = client.get("/readyz")
    assert r.status_code == 200 and r.json()["sources"] == {}  # no key: no source names
    assert set(client.get("/readyz", headers=bearer(KEY_A)).json()["sources"]) == {"deliveries"}
    assert client.get("/openapi.json").status_code == 200
    assert client.get("/docs").status_code == 200


def test_cors_allow_list(client):
    pre = {"Access-Control-Request-Method": "POST",
           "Access-Control-Request-Headers": "authorization,content-type"}
    r = client.options("/v1/chart", headers={"Origin": "https://dash.example.org", **pre})
    assert r.status_code == 200
    assert r.headers["access-control-allow-origin"] == "https://dash.example.org"
    assert "authorization" in r.headers["access-control-allow-headers"].lower()
    r = client.options("/v1/chart", headers={"Origin": "https://evil.example", **pre})
    assert "access-control-allow-origin" not in r.headers
    r = client.post("/v1/chart", json={"source": "deliveries", **BODY},
                    headers={"Origin": "https://evil.example", **bearer(KEY_A)})
    assert r.status_code == 200 and "access-control-allow-origin" not in r.headers
    r = client.post("/v1/chart", json={"source": "deliveries", **BODY},
                    headers={"Origin": "https://dash.example.org", **bearer(KEY_A)})
    assert r.headers["access-control-allow-origin"] == "https://dash.example.org"


def test_no_keys_means_open(tmp_path):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    db = tmp_path / "o.duckdb"
    fx.build_duckdb(db)
    cfg = tmp_path / "s.toml"
    cfg.write_text(fx.config(db) + "[server]\nrequest_log = false\n")
    with TestClient(create_app(load_settings(cfg, environ={})), raise_server_exceptions=False) as c:
        assert c.post("/v1/chart", json={"source": "deliveries", **BODY}).status_code == 200
        r = c.options("/v1/chart", headers={"Origin": "https://dash.example.org",
                                            "Access-Control-Request-Method": "POST"})
        assert "access-control-allow-origin" not in r.headers  # no CORS unless configured


@pytest.mark.parametrize("keys", [
    '[[keys]]\nhash = "plain-text-key"\nsources = ["deliveries"]\n',
    '[[keys]]\nhash = "sha256:abc"\nsources = ["deliveries"]\n',
    '[[keys]]\nhash = "sha256:' + "0" * 64 + '"\nsources = ["nope"]\n',
    '[[keys]]\nhash = "sha256:' + "0" * 64 + '"\nsources = []\n',
    '[[keys]]\nhash = "sha256:' + "0" * 64 + '"\nsources = ["deliveries"]\nkey = "x"\n',
    '[server]\ncors_origins = ["https://x.org/path"]\n',
])
def test_bad_key_config_is_refused(tmp_path, keys):
    from app.settings import ConfigError, load_settings

    cfg = tmp_path / "s.toml"
    cfg.write_text(fx.config(tmp_path / "x.duckdb") + keys)
    with pytest.raises(ConfigError):
        load_settings(cfg, environ={})


def test_cli_helpers(capsys):
    from app import auth

    assert auth.main(["new"]) == 0
    out = capsys.readouterr().out
    key = out.split("key:")[1].split()[0]
    h = out.split("hash:")[1].split()[0]
    assert h == "sha256:" + auth.sha256_hex(key)
    assert auth.main(["hash", "pw"]) == 0
    stored = capsys.readouterr().out.strip()
    assert stored.startswith("pbkdf2_sha256$") and auth._matches(stored, "pw") and not auth._matches(stored, "pw2")
