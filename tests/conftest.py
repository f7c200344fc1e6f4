"""Fixtures for the outside-reference test suite.

A session-scoped DuckDB file is built from `refdata.py` (fixed seed, no downloads), a TOML
config names its tables as sources, and the service is driven through FastAPI's TestClient.
The pandas/numpy copies of the same rows (`ref`) are what the expected answers come from.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest


from testmods import load  # noqa: E402 - tests/ is on sys.path (pytest rootdir)

refdata = load("refdata")  # the one copy every test module shares (tests/testmods.py)


@pytest.fixture(scope="session")
def fixture_paths(tmp_path_factory):
    root = tmp_path_factory.mktemp("sluice_ref")
    cfg = root / "sluice.toml"
    combined = root / "sluice-combined.toml"
    data = refdata.build_database(root)  # one DuckDB file per source + combined.duckdb
    refdata.write_config(cfg, root)
    refdata.write_config(combined, root, combined=True)
    return {"root": root, "config": cfg, "combined_config": combined, "data": data}


@pytest.fixture(scope="session")
def ref(fixture_paths):
    """pandas/numpy copies of every fixture table (see refdata.RefData)."""
    return fixture_paths["data"]


@pytest.fixture(scope="session")
def config_path(fixture_paths) -> Path:
    return fixture_paths["config"]


@pytest.fixture(scope="session")
def combined_config_path(fixture_paths) -> Path:
    """Same sources, but every table in one DuckDB file (combined.duckdb)."""
    return fixture_paths["combined_config"]


@pytest.fixture(scope="session")
def client(config_path):
    from fastapi.testclient import TestClient

    from app.main import create_app
    from app.settings import load_settings

    app = create_app(load_settings(config_path))
    # raise_server_exceptions=False: a crash must show up as the 500 a user would get.
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


class Api:
    """Thin helper over the TestClient: post a chart, check it worked, read the columns."""

    def __init__(self, client):
        self.client = client

    def post(self, body, path="/v1/chart", **kw):
        if isinstance(body, dict) and "source" not in body:
            body = {"source": "fixture", **body}
        return self.client.post(path, json=body, **kw)

    def chart(self, body, path="/v1/chart") -> dict:
        r = self.post(body, path)
        assert r.status_code == 200, f"{r.status_code}: {r.text[:2000]}\nrequest: {json.dumps(body)}"
        out = r.json()
        for key in ("columns", "data", "stats"):
            assert key in out, f"response lacks {key!r}: {sorted(out)}"
        return out

    @staticmethod
    def rows(resp) -> list[dict]:
        data = resp["data"]
        names = [c["name"] for c in resp["columns"]]
        for nm in names:
            assert nm in data, f"column {nm!r} listed in columns[] but missing from data"
        n = len(data[names[0]]) if names else 0
        for nm in names:
            assert len(data[nm]) == n, f"column {nm!r} has {len(data[nm])} values, expected {n}"
        return [{nm: data[nm][i] for nm in names} for i in range(n)]

    @staticmethod
    def column(resp, name) -> dict:
        for c in resp["columns"]:
            if c["name"] == name:
                return c
        raise AssertionError(f"no column {name!r} in {[c['name'] for c in resp['columns']]}")


def is_marked_approximate(resp) -> bool:
    """DESIGN: results are exact unless the response says `"approximate": true`.

    The contract does not pin where the flag lives; accept the top level, `stats`, or the
    measure's entry in `columns[]`.
    """
    if resp.get("approximate") is True:
        return True
    if isinstance(resp.get("stats"), dict) and resp["stats"].get("approximate") is True:
        return True
    return any(c.get("approximate") is True for c in resp.get("columns", []))


def close(a, b, rel=1e-9, abs_=0.0) -> bool:
    if a is None or b is None:
        return a is None and b is None
    if isinstance(b, float) and math.isnan(b):
        return a is None or (isinstance(a, float) and math.isnan(a))
    return math.isclose(float(a), float(b), rel_tol=rel, abs_tol=abs_)


Api.is_marked_approximate = staticmethod(is_marked_approximate)
Api.close = staticmethod(close)


@pytest.fixture(scope="session")
def api(client) -> Api:
    return Api(client)
