"""The API as a browser meets it, in headless Debian chromium against a real uvicorn server:

* CORS: a page served from one loopback origin (127.0.0.1:<A>) calls the API on another
  (127.0.0.1:<B>) with the headers README documents (``Cache-Control: no-cache``,
  ``X-Request-ID``, ``X-API-Key``) and reads ``X-Request-ID`` and ``X-Sluice-Truncated``
  from the answers. Reference: the Fetch standard's CORS protocol as Chromium implements
  it (a header that is not allowed fails the preflight: checked too, so the test can fail).
* ``/docs`` works offline: chromium resolves every host but 127.0.0.1 to nothing, and the
  Swagger UI page still renders the operations of the OpenAPI document.

Skipped when chromium/chromedriver are missing (``make test`` installs them, .ci/browser.sh).
"""

from __future__ import annotations

import contextlib
import functools
import json
import os
import threading
from http.server import SimpleHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

import test_browser as tb  # noqa: E402  (skips this module too when chromium is missing)

webdriver = pytest.importorskip("selenium.webdriver")
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402

KEY = "page-test-key-4f9a2c"


@contextlib.contextmanager
def page_server(root: Path):
    """A static file server on another loopback port: the page's own origin."""
    class Quiet(SimpleHTTPRequestHandler):
        def log_message(self, *args):
            pass

    handler = functools.partial(Quiet, directory=str(root))
    httpd = ThreadingHTTPServer(("127.0.0.1", 0), handler)
    t = threading.Thread(target=httpd.serve_forever, daemon=True)
    t.start()
    try:
        yield f"http://127.0.0.1:{httpd.server_address[1]}"
    finally:
        httpd.shutdown()
        httpd.server_close()


@pytest.fixture(scope="module")
def driver(tmp_path_factory):
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # never let Selenium Manager reach the network
    opts = Options()
    opts.binary_location = tb.CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage", "--window-size=1200,900",
                 # offline: no name but the loopback address resolves (the /docs check)
                 "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
                 f"--user-data-dir={tmp_path_factory.mktemp('chromium-api')}"):
        opts.add_argument(flag)
    d = webdriver.Chrome(options=opts, service=Service(tb.CHROMEDRIVER))
    d.set_page_load_timeout(30)
    try:
        yield d
    finally:
        d.quit()


PAGE = """<!doctype html><html><head><meta charset="utf-8"><title>cors</title></head><body>
<script>
const API = %(api)s, KEY = %(key)s, BODY = %(body)s;
window.result = null;
(async () => {
  const out = {};
  try {
    const r = await fetch(API + "/v1/chart", {method: "POST", body: JSON.stringify(BODY),
      headers: {"Content-Type": "application/json", "Accept": "application/json",
                "Cache-Control": "no-cache", "X-Request-ID": "page-req-0001", "X-API-Key": KEY}});
    out.status = r.status;
    out.requestId = r.headers.get("X-Request-ID");
    const j = await r.json();
    out.cache = j.cache;
    out.rows = j.stats.result_rows;
  } catch (e) { out.error = String(e); }
  try {
    const r = await fetch(API + "/v1/chart", {method: "POST", body: JSON.stringify({...BODY, limit: 2}),
      headers: {"Content-Type": "application/json", "Accept": "text/csv", "X-API-Key": KEY}});
    out.csvStatus = r.status;
    out.truncated = r.headers.get("X-Sluice-Truncated");
    out.csvLines = (await r.text()).trim().split("\\r\\n").length;
  } catch (e) { out.csvError = String(e); }
  try {
    const r = await fetch(API + "/v1/sources", {headers: {"X-API-Key": KEY, "X-Not-Listed": "1"}});
    out.unlisted = r.status;
  } catch (e) { out.unlisted = "blocked: " + e.name; }
  window.result = out;
})();
</script></body></html>
"""


def test_page_on_another_origin_uses_the_documented_headers(demo_db, tmp_path, driver):
    from app.auth import hash_key

    site = tmp_path / "site"
    site.mkdir()
    with page_server(site) as origin:
        config = (tb.DEMO_SOURCE.format(db=demo_db)
                  + f'[server]\ncors_origins = ["{origin}"]\n'
                  + f'[[keys]]\nname = "page"\nhash = "{hash_key(KEY, 1000)}"\n'
                  + 'sources = ["deliveries"]\n')
        with tb.serving(tmp_path, config) as api:
            body = {"source": "deliveries",
                    "channels": {"x": {"column": "vehicle"}, "y": {"agg": "count"}}}
            (site / "index.html").write_text(PAGE % {"api": json.dumps(api),
                                                     "key": json.dumps(KEY),
                                                     "body": json.dumps(body)})
            assert origin.split(":")[-1] != api.split(":")[-1]  # two origins (ports differ)
            driver.get(origin + "/index.html")
            WebDriverWait(driver, 30).until(lambda d: d.execute_script("return window.result"))
            out = driver.execute_script("return window.result")
    assert "error" not in out, out
    assert out["status"] == 200 and out["rows"] == 5  # demo: five vehicles
    assert out["requestId"] == "page-req-0001"  # exposed, and the caller's own id echoed
    assert out["cache"] == "miss"  # Cache-Control: no-cache passed the preflight
    assert out["csvStatus"] == 200 and out["truncated"] == "true" and out["csvLines"] == 3
    # a header the API does not allow fails the preflight: the check above can fail
    assert out["unlisted"] == "blocked: TypeError", out


def test_preflight_and_exposed_headers_over_http(demo_db, tmp_path):
    """The same from the CORS protocol's side, header by header (Fetch standard: the
    preflight answer lists allowed request headers; the answer lists exposed ones)."""
    import httpx

    origin = "http://127.0.0.1:9"
    config = tb.DEMO_SOURCE.format(db=demo_db) + f'[server]\ncors_origins = ["{origin}"]\n'
    with tb.serving(tmp_path, config) as api:
        pre = httpx.options(api + "/v1/chart", headers={
            "Origin": origin, "Access-Control-Request-Method": "POST",
            "Access-Control-Request-Headers": "cache-control, x-request-id, x-api-key, content-type"})
        assert pre.status_code == 200, pre.text
        allowed = {h.strip().lower() for h in pre.headers["access-control-allow-headers"].split(",")}
        assert {"cache-control", "x-request-id", "x-api-key", "content-type"} <= allowed
        r = httpx.get(api + "/v1/sources", headers={"Origin": origin})
        exposed = {h.strip().lower() for h in r.headers["access-control-expose-headers"].split(",")}
        assert {"x-request-id", "retry-after", "x-sluice-truncated"} <= exposed
        other = httpx.options(api + "/v1/chart", headers={
            "Origin": "http://127.0.0.1:10", "Access-Control-Request-Method": "POST"})
        assert other.status_code == 400  # an origin not listed gets no CORS grant


def test_docs_render_offline(server, driver):
    """Swagger UI from the package's assets renders every tag of the document with no
    network but loopback (--host-resolver-rules above)."""
    import httpx

    driver.get(server + "/docs")
    WebDriverWait(driver, 30).until(
        lambda d: d.find_elements(By.CSS_SELECTOR, ".opblock-summary-path, .opblock-summary-path__deprecated"))
    paths = {e.text.replace("\u200b", "") for e in
             driver.find_elements(By.CSS_SELECTOR, ".opblock-summary-path")}
    doc = httpx.get(server + "/openapi.json").json()
    assert set(doc["paths"]) <= paths, (sorted(doc["paths"]), sorted(paths))
    assert "/v1/chart" in paths
    errors = driver.find_elements(By.CSS_SELECTOR, ".errors-wrapper")
    assert not errors, [e.text for e in errors]


demo_db = tb.demo_db
server = tb.server
